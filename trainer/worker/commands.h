// The subcommands of graft-worker, as functions that write to the streams they are given and
// return the process exit code, one of the table graft, graft-worker and graftd share
// (proto/exit_codes.h, README "Exit codes"), so tests can call them in-process.
// Thread-safety: each call is independent.
#ifndef GRAFT_TRAINER_WORKER_COMMANDS_H_
#define GRAFT_TRAINER_WORKER_COMMANDS_H_

#include <atomic>
#include <cstdint>
#include <ostream>
#include <string>
#include <vector>

#include "proto/exit_codes.h"

namespace graft::worker {

// The codes the subcommands return: 0 done, 1 a run-time failure, 2 an invalid config or weights
// that do not fit it, 8 (run) stopped early with a checkpoint written: resume with --resume.
using ::graft::kExitFailure;
using ::graft::kExitInterrupted;
using ::graft::kExitInvalidConfig;
using ::graft::kExitOk;
using ::graft::kExitUsage;

// `graft-worker check CONFIG [--set k=v]... [--max-sweep-jobs N]`: validates and prints the
// summary to `out` (for a sweep: its job count and every job's name, as `graft check` prints),
// or the errors (one "FILE:LINE:COL: message" per line) to `err`. A sweep of more than
// `max_sweep_jobs` jobs is invalid (2).
int CheckCommand(const std::string& config, const std::vector<std::string>& overrides, std::ostream& out,
                 std::ostream& err, int64_t max_sweep_jobs = 1000);

struct RunArgs {
  std::string config;
  std::vector<std::string> overrides;
  std::string out_dir;
  std::string resume_dir;
  int64_t stop_after_step = -1;
  std::string logits_dump_path;
};

// `graft-worker run CONFIG --out DIR [--set k=v]... [--resume DIR]`: trains the job, writing
// the run directory; the live progress line goes to `err`. `stop` (may be null) is polled at
// step boundaries, e.g. set by SIGINT/SIGTERM. A sweep is refused (2) with a message saying to
// submit it to graftd, or to train one of its jobs with `--set sweep=null` and that job's values.
int RunCommand(const RunArgs& args, const std::atomic<bool>* stop, std::ostream& out, std::ostream& err,
               bool err_is_terminal);

struct AnalyseArgs {
  std::string config;
  std::vector<std::string> overrides;
  std::string weights_path;  // weights.pt from graft or a Python torch.save dict
  std::string out_dir;
};

// `graft-worker evaluate|scan|das CONFIG --weights FILE --out DIR [--set k=v]...`: analyses a
// stored network without training it and writes the command's files into DIR (see
// trainer/train/analysis.h); the summary goes to `out`, progress and errors to `err`. Exit
// codes: 0 done; 2 invalid config or weights that do not fit it; 1 other failures (such as a
// weights file that cannot be opened).
int EvaluateCommand(const AnalyseArgs& args, std::ostream& out, std::ostream& err);
int ScanCommand(const AnalyseArgs& args, std::ostream& out, std::ostream& err);
int DasCommand(const AnalyseArgs& args, std::ostream& out, std::ostream& err);

// `graft-worker report RUN_DIR --out DIR`: writes DIR/index.html, the HTML report of a run
// directory (client/report.h; the same page `graft report` writes for a job) and prints its path.
// 1 when RUN_DIR is no run directory or DIR cannot be written.
int ReportCommand(const std::string& run_dir, const std::string& out_dir, std::ostream& out, std::ostream& err);

}  // namespace graft::worker

#endif  // GRAFT_TRAINER_WORKER_COMMANDS_H_
