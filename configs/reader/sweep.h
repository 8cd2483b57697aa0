// Sweeps: a config's `sweep:` block expands into many jobs, the cartesian product of its grid
// axes, its `together` axes (keys that vary in step), its random `sample` draws and its seeds.
// The whole sweep is validated before anything is stored; one bad combination rejects it,
// naming the combination. Torch-free. Thread-safety: pure functions.
#ifndef GRAFT_CONFIGS_READER_SWEEP_H_
#define GRAFT_CONFIGS_READER_SWEEP_H_

#include <cstdint>
#include <string>
#include <utility>
#include <vector>

#include "absl/status/statusor.h"
#include "configs/reader/config_tree.h"
#include "configs/reader/spec.h"

namespace graft::config {

struct PlannedJob {
  // The job's name: the config's name, then the varied values (last key segment = value,
  // comma-separated), then seed=N; e.g. "parcel-routing/interchange=0,layer=1/seed=2".
  std::string name;
  std::vector<std::pair<std::string, std::string>> varied;  // full key path -> value, in axis order
  // The same settings as `--set` arguments with the exact values ("key.path=value", YAML text,
  // sampled numbers in full): with `sweep=null` first they make this job from the sweep's file.
  std::vector<std::string> overrides;
  ResolvedJob job;  // validated, with spec.name set to `name` for sweep members
};

struct SweepPlan {
  bool is_sweep = false;          // false: the config had no sweep block; jobs has one entry
  std::vector<PlannedJob> jobs;   // in expansion order: grid (first axis slowest), together, sample, seeds
};

// The largest sweep graftd accepts by default (its --max-sweep-jobs); `check` uses the same.
inline constexpr int64_t kDefaultMaxSweepJobs = 1000;

// Expands a parsed config (overrides already applied). A `sweep` key whose value is null
// (`sweep: null`, or `--set sweep=null`) turns the sweep off: the config is its base job. Fails with InvalidArgument naming the
// location of a mistake in the sweep block, or "sweep combination K of N (k=v,...): <error>"
// for the first combination that does not validate; ResourceExhausted when the sweep would make
// more than `max_jobs` jobs (checked before any combination is resolved).
// Every job is resolved within `limits` (spec.h).
absl::StatusOr<SweepPlan> ExpandConfig(const ConfigNode& root, int64_t max_jobs,
                                       const SpecLimits& limits = SpecLimits::None());

// Parses text, applies overrides (`--set #N`), and expands.
absl::StatusOr<SweepPlan> PlanFromText(const std::string& text, const std::string& source,
                                       const std::vector<std::string>& overrides, int64_t max_jobs,
                                       const SpecLimits& limits = SpecLimits::None());

// A short summary of a plan for `check`: the number of jobs and their names.
std::string SummarizePlan(const SweepPlan& plan);

// `check` of `graft` and `graft-worker` alike, so both accept the same files and print the same
// text: reads the file, applies the overrides, expands, and returns what to print (Summarize()
// for a lone job, SummarizePlan() for a sweep). NotFound when the file cannot be read; otherwise
// the errors of PlanFromText (InvalidArgument, or ResourceExhausted above `max_jobs`).
absl::StatusOr<std::string> CheckFile(const std::string& path, const std::vector<std::string>& overrides,
                                      int64_t max_jobs);

}  // namespace graft::config

#endif  // GRAFT_CONFIGS_READER_SWEEP_H_
