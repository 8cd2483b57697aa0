#include "trainer/worker/commands.h"

#include "trainer/spec/spec.h"
#include "trainer/train/trainer.h"

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

int RunCommand(const RunArgs& args, const std::atomic<bool>* stop, std::ostream& out, std::ostream& err,
               bool err_is_terminal) {
  auto job = spec::LoadJob(args.config, args.overrides);
  if (!job.ok()) {
    err << job.status().message() << "\n";
    return absl::IsNotFound(job.status()) ? kExitFailure : kExitInvalidConfig;
  }
  train::RunOptions options;
  options.out_dir = args.out_dir;
  options.resume_dir = args.resume_dir;
  options.stop_after_step = args.stop_after_step;
  options.stop_requested = stop;
  options.progress = &err;
  options.progress_is_terminal = err_is_terminal;
  options.probe_path = args.probe_path;
  auto outcome = train::Train(*job, options);
  if (!outcome.ok()) {
    err << "graft-worker: " << outcome.status().message() << "\n";
    return absl::IsInvalidArgument(outcome.status()) ? kExitInvalidConfig : kExitFailure;
  }
  if (outcome->kind == train::RunOutcome::Kind::kInterrupted) {
    err << "graft-worker: stopped after step " << outcome->step << "; checkpoint in " << args.out_dir
        << "/checkpoint.pt; continue with --resume " << args.out_dir << "\n";
    return kExitInterrupted;
  }
  out << "finished " << outcome->step << " steps; artifacts in " << args.out_dir << "\n";
  return kExitOk;
}

}  // namespace graft::worker
