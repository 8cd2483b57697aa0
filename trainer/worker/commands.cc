#include "trainer/worker/commands.h"

#include "trainer/spec/spec.h"

namespace graft::worker {

int CheckCommand(const std::string& config, const std::vector<std::string>& overrides, std::ostream& out,
                 std::ostream& err) {
  auto job = spec::LoadJob(config, overrides);
  if (!job.ok()) {
    err << job.status().message() << "\n";
    return absl::IsNotFound(job.status()) ? kExitFailure : kExitInvalidConfig;
  }
  out << spec::Summarize(*job);
  return kExitOk;
}

}  // namespace graft::worker
