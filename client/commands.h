// The `graft` commands as functions: each takes the API seam (api.h), its arguments and the
// output streams, and returns the process exit code, so tests call them directly and the main
// only parses flags. Thread-safety: a command runs on one thread; Io and Api are not shared.
#ifndef GRAFT_CLIENT_COMMANDS_H_
#define GRAFT_CLIENT_COMMANDS_H_

#include <cstdint>
#include <functional>
#include <ostream>
#include <string>
#include <vector>

#include "client/api.h"
#include "client/report.h"  // SettingOf
#include "nlohmann/json.hpp"
#include "proto/exit_codes.h"

namespace graft::client {

// Every command returns one of the exit codes shared by graft, graft-worker and graftd
// (proto/exit_codes.h; README "Exit codes").
using ::graft::ExitCode;
using ::graft::kExitFailure;
using ::graft::kExitInvalidConfig;
using ::graft::kExitJobCancelled;
using ::graft::kExitJobFailed;
using ::graft::kExitOk;
using ::graft::kExitTimeout;
using ::graft::kExitUnreachable;
using ::graft::kExitUsage;

struct Io {
  Io(std::ostream& out_stream, std::ostream& err_stream) : out(out_stream), err(err_stream) {}
  std::ostream& out;
  std::ostream& err;
  bool out_is_terminal = false;          // redraw live views in place with ANSI cursor movement
  int width = 100;                       // terminal columns
  int height = 40;                       // terminal rows
  std::function<int64_t()> now_ms;       // wall clock, ms since the epoch (a seam for tests)
  std::string server;                    // for messages ("cannot reach graftd at ...")
};

// What a command line names: a job "j-N" or a sweep "s-N".
struct Target {
  bool is_sweep = false;
  std::string id;
};

struct CheckArgs {
  std::string file;
  std::vector<std::string> overrides;  // "key.path=value"
  int64_t max_sweep_jobs = 1000;       // graftd's default --max-sweep-jobs
};
struct SubmitArgs {
  std::string file;
  std::vector<std::string> overrides;
  int32_t priority = 0;
  std::vector<std::string> labels;  // "key=value"
  bool watch = false;
  bool json = false;
};
struct ListArgs {
  std::string state;                // a state name; empty: any
  std::string sweep;                // "s-N"; empty: any
  std::vector<std::string> labels;  // "key=value", all must match
  bool json = false;
};
struct ShowArgs {
  std::string id;
  bool json = false;
  bool spec = false;  // print only the resolved spec
};
struct WatchArgs {
  std::string id;  // j-N or s-N
  int64_t from_step = 0;
  int64_t timeout_ms = 0;  // 0: until the jobs end
  bool json = false;
};
struct CancelArgs {
  std::string id;
  std::string reason;
  bool json = false;
};
struct MetricsArgs {
  std::string id;
  std::string format = "csv";  // csv | jsonl | json (one array)
};
struct FetchArgs {
  std::string id;
  std::string out_dir;
};
struct CompareArgs {
  std::string id;
  std::string format = "table";  // table | csv | json
};
struct ResubmitArgs {
  std::string id;
  bool json = false;
};
struct ReportArgs {
  std::string id;       // j-N or s-N
  std::string out_dir;  // DIR/index.html; a sweep's job pages in DIR/<job id>/index.html
};
struct WorkersArgs {
  bool all = false;   // also the workers that are gone
  bool json = false;
};

// Offline: validates CONFIG (and a sweep's every combination) with the server's own library and
// prints its summary, or the server's exact error lines on `err`.
int CheckCommand(const CheckArgs& args, Io& io);
int SubmitCommand(Api& api, const SubmitArgs& args, Io& io);
int ListCommand(Api& api, const ListArgs& args, Io& io);
int ShowCommand(Api& api, const ShowArgs& args, Io& io);
// Follows a job (live curves) or a sweep (one line per job) until it ends; exits like Wait.
int WatchCommand(Api& api, const WatchArgs& args, Io& io);
// Blocks until the job or every job of the sweep has ended; prints one summary line.
int WaitCommand(Api& api, const WatchArgs& args, Io& io);
int CancelCommand(Api& api, const CancelArgs& args, Io& io);
int MetricsCommand(Api& api, const MetricsArgs& args, Io& io);
int FetchCommand(Api& api, const FetchArgs& args, Io& io);
int CompareCommand(Api& api, const CompareArgs& args, Io& io);
int ResubmitCommand(Api& api, const ResubmitArgs& args, Io& io);
// Writes the HTML report of a job or a sweep (client/report.h) and prints the paths written.
// 1 when graftd has no such job or sweep, or DIR cannot be written; 6 when graftd is unreachable.
int ReportCommand(Api& api, const ReportArgs& args, Io& io);
// The worker fleet: one row per worker (id, host, threads, Slurm job, state, last report, jobs
// finished); `json`: an array of objects with the fields of v1::Worker in snake_case.
int WorkersCommand(Api& api, const WorkersArgs& args, Io& io);

// Parses "j-N" / "s-N"; on failure writes a message with a suggestion to `err` and returns
// false. `allow_sweep` false refuses s-N with a message saying the command takes a job.
bool ParseTarget(const std::string& text, bool allow_sweep, Target* target, std::ostream& err);

// Flattens a metrics object into dotted columns ("acc_held_out.value", "iia_by_set.local.lo", ...),
// scalars as JSON text (strings unquoted, null empty), in the object's key order.
void FlattenMetrics(const std::string& prefix, const nlohmann::ordered_json& value,
                    std::vector<std::pair<std::string, std::string>>* out);

// The command names, for "did you mean ...?" in the main.
const std::vector<std::string>& CommandNames();

}  // namespace graft::client

#endif  // GRAFT_CLIENT_COMMANDS_H_
