#include "trainer/worker/commands.h"

#include "absl/strings/str_join.h"
#include "client/report.h"
#include "configs/reader/spec.h"
#include "configs/reader/sweep.h"
#include "trainer/train/analysis.h"
#include "trainer/train/trainer.h"

namespace graft::worker {
namespace {

// `run`, `evaluate`, `scan` and `das` act on one job: true unless the config, after the overrides,
// has a sweep block, in which case it says on `err` what to do instead. Other problems are left
// to LoadJob to report.
bool IsOneJob(const std::string& config, const std::vector<std::string>& overrides, const char* command,
              std::ostream& err) {
  auto tree = config::ParseYamlFile(config);
  if (!tree.ok()) return true;
  for (size_t i = 0; i < overrides.size(); ++i) {
    if (!config::ApplyOverride(*tree, overrides[i], static_cast<int>(i + 1)).ok()) return true;
  }
  const config::ConfigNode* sweep = nullptr;
  config::Location where;
  if (tree->IsMap()) {
    for (const auto& [key, value] : tree->entries) {
      if (key.scalar == "sweep") {
        sweep = &value;
        where = key.loc;
      }
    }
  }
  if (sweep == nullptr || sweep->IsNull()) return true;
  auto plan = config::ExpandConfig(*tree, config::kDefaultMaxSweepJobs);
  err << where.ToString() << ": this config is a sweep";
  if (plan.ok()) err << " of " << plan->jobs.size() << " jobs";
  err << ", and `graft-worker " << command << "` takes one job:\n";
  if (std::string(command) == "run") {
    err << "  submit the sweep to graftd (graft submit " << config << "), or train one of its jobs here\n";
  } else {
    err << "  name one of its jobs\n";
  }
  err << "  with the sweep turned off (--set sweep=null) and that job's values given with --set";
  if (plan.ok() && !plan->jobs.empty()) {
    err << "; for the first\n  (" << plan->jobs.front().name << "):\n    --set sweep=null --set "
        << absl::StrJoin(plan->jobs.front().overrides, " --set ") << "\n";
  } else {
    err << "\n";
    if (!plan.ok()) err << plan.status().message() << "\n";
  }
  return false;
}

}  // namespace

int CheckCommand(const std::string& config, const std::vector<std::string>& overrides, std::ostream& out,
                 std::ostream& err, int64_t max_sweep_jobs) {
  // The config library's check, which `graft check` calls too: both print the same.
  auto summary = config::CheckFile(config, overrides, max_sweep_jobs);
  if (!summary.ok()) {
    err << summary.status().message() << "\n";
    return absl::IsNotFound(summary.status()) ? kExitFailure : kExitInvalidConfig;
  }
  out << *summary;
  return kExitOk;
}

int RunCommand(const RunArgs& args, const std::atomic<bool>* stop, std::ostream& out, std::ostream& err,
               bool err_is_terminal) {
  if (!IsOneJob(args.config, args.overrides, "run", err)) return kExitInvalidConfig;
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

int Analyse(const AnalyseArgs& args, const char* command, AnalysisFn fn, std::ostream& out, std::ostream& err) {
  if (!IsOneJob(args.config, args.overrides, command, err)) return kExitInvalidConfig;
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
  return Analyse(args, "evaluate", &train::EvaluateStored, out, err);
}
int ScanCommand(const AnalyseArgs& args, std::ostream& out, std::ostream& err) {
  return Analyse(args, "scan", &train::ScanStored, out, err);
}
int DasCommand(const AnalyseArgs& args, std::ostream& out, std::ostream& err) {
  return Analyse(args, "das", &train::DasStored, out, err);
}

int ReportCommand(const std::string& run_dir, const std::string& out_dir, std::ostream& out, std::ostream& err) {
  auto run = client::LoadRunDirectory(run_dir);
  if (!run.ok()) {
    err << "graft-worker: " << run.status().message() << "\n";
    return kExitFailure;
  }
  auto path = client::WriteReportPage(out_dir, client::RenderJobReport(*run));
  if (!path.ok()) {
    err << "graft-worker: " << path.status().message() << "\n";
    return kExitFailure;
  }
  out << *path << "\n";
  return kExitOk;
}

}  // namespace graft::worker
