#include "trainer/worker/commands.h"

#include "configs/reader/spec.h"
#include "trainer/train/analysis.h"
#include "trainer/train/trainer.h"

namespace graft::worker {

int CheckCommand(const std::string& config, const std::vector<std::string>& overrides, std::ostream& out,
                 std::ostream& err) {
  auto job = config::LoadJob(config, overrides);
  if (!job.ok()) {
    err << job.status().message() << "\n";
    return absl::IsNotFound(job.status()) ? kExitFailure : kExitInvalidConfig;
  }
  out << config::Summarize(*job);
  return kExitOk;
}

int RunCommand(const RunArgs& args, const std::atomic<bool>* stop, std::ostream& out, std::ostream& err,
               bool err_is_terminal) {
  auto job = config::LoadJob(args.config, args.overrides);
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
  options.logits_dump_path = args.logits_dump_path;
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
  // A `scan:` or `das:` block also analyses the trained network, into the same directory.
  if (job->spec.scan.present || job->spec.das.present) {
    train::AnalysisOptions analysis;
    analysis.weights_path = args.out_dir + "/weights.pt";
    analysis.out_dir = args.out_dir;
    analysis.progress = &err;
    if (job->spec.scan.present) {
      auto summary = train::ScanStored(*job, analysis);
      if (!summary.ok()) {
        err << "graft-worker: scan after training: " << summary.status().message() << "\n";
        return kExitFailure;
      }
      out << *summary;
    }
    if (job->spec.das.present) {
      auto summary = train::DasStored(*job, analysis);
      if (!summary.ok()) {
        err << "graft-worker: DAS after training: " << summary.status().message() << "\n";
        return kExitFailure;
      }
      out << *summary;
    }
  }
  return kExitOk;
}

namespace {

using AnalysisFn = absl::StatusOr<std::string> (*)(const config::ResolvedJob&, const train::AnalysisOptions&);

int Analyse(const AnalyseArgs& args, AnalysisFn fn, std::ostream& out, std::ostream& err) {
  auto job = config::LoadJob(args.config, args.overrides);
  if (!job.ok()) {
    err << job.status().message() << "\n";
    return absl::IsNotFound(job.status()) ? kExitFailure : kExitInvalidConfig;
  }
  train::AnalysisOptions options;
  options.weights_path = args.weights_path;
  options.out_dir = args.out_dir;
  options.progress = &err;
  auto summary = fn(*job, options);
  if (!summary.ok()) {
    err << "graft-worker: " << summary.status().message() << "\n";
    return absl::IsInvalidArgument(summary.status()) ? kExitInvalidConfig : kExitFailure;
  }
  out << *summary << "files in " << args.out_dir << "\n";
  return kExitOk;
}

}  // namespace

int EvaluateCommand(const AnalyseArgs& args, std::ostream& out, std::ostream& err) {
  return Analyse(args, &train::EvaluateStored, out, err);
}
int ScanCommand(const AnalyseArgs& args, std::ostream& out, std::ostream& err) {
  return Analyse(args, &train::ScanStored, out, err);
}
int DasCommand(const AnalyseArgs& args, std::ostream& out, std::ostream& err) {
  return Analyse(args, &train::DasStored, out, err);
}

}  // namespace graft::worker
