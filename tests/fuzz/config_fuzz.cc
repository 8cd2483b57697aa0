// libFuzzer target: the config reader and validator as graftd runs them on a submission. The
// input is YAML text, optionally followed by a line "#--set" and one `key.path=value` override
// per line; it is planned (sweeps expanded) with graftd's default job limits and a small sweep
// cap. Promises checked: the result is OK, InvalidArgument or ResourceExhausted (the codes graftd
// documents for a submission), a refusal starts with a place ("fuzz.yaml:", "--set #", or "sweep
// combination"), and every planned job's resolved spec.yaml loads again (as the worker loads it)
// into the same text.
#include <cstddef>
#include <cstdint>
#include <string>
#include <vector>

#include "absl/strings/str_split.h"
#include "configs/reader/spec.h"
#include "configs/reader/sweep.h"
#include "tests/fuzz/fuzz_util.h"

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  using namespace graft;
  const std::string input(reinterpret_cast<const char*>(data), size);
  std::string text = input;
  std::vector<std::string> overrides;
  const std::string marker = "\n#--set\n";
  if (const size_t at = input.find(marker); at != std::string::npos) {
    text = input.substr(0, at + 1);
    for (absl::string_view line : absl::StrSplit(input.substr(at + marker.size()), '\n')) {
      if (!line.empty()) overrides.emplace_back(line);
    }
  }
  auto plan = config::PlanFromText(text, "fuzz.yaml", overrides, /*max_jobs=*/16, config::SpecLimits());
  if (!plan.ok()) {
    const absl::StatusCode code = plan.status().code();
    fuzz::Require(code == absl::StatusCode::kInvalidArgument || code == absl::StatusCode::kResourceExhausted,
                  "PlanFromText returned " + plan.status().ToString());
    const std::string m(plan.status().message());
    fuzz::Require(m.rfind("fuzz.yaml:", 0) == 0 || m.rfind("--set #", 0) == 0 || m.rfind("sweep combination ", 0) == 0,
                  "a refusal without its place: " + m);
    return 0;
  }
  fuzz::Require(!plan->jobs.empty(), "an accepted plan without jobs");
  for (const config::PlannedJob& job : plan->jobs) {
    const std::string yaml = config::ResolvedSpecYaml(job.job.spec);
    auto again = config::LoadJobFromText(yaml, "spec.yaml", {});
    fuzz::Require(again.ok(), "the resolved spec does not load again: " + again.status().ToString() + "\n" + yaml);
    fuzz::Require(config::ResolvedSpecYaml(again->spec) == yaml, "the resolved spec changes on a second load:\n" + yaml);
  }
  return 0;
}
