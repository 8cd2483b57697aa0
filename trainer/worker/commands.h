// The subcommands of graft-worker, as functions that write to the streams they are given and
// return the process exit code (0 success, 2 invalid config, 1 run-time failure), so tests can
// call them in-process. Thread-safety: each call is independent.
#ifndef GRAFT_TRAINER_WORKER_COMMANDS_H_
#define GRAFT_TRAINER_WORKER_COMMANDS_H_

#include <ostream>
#include <string>
#include <vector>

namespace graft::worker {

inline constexpr int kExitOk = 0;
inline constexpr int kExitFailure = 1;
inline constexpr int kExitInvalidConfig = 2;

// `graft-worker check CONFIG [--set k=v]...`: validates and prints the summary to `out`, or
// the errors (one "FILE:LINE:COL: message" per line) to `err`.
int CheckCommand(const std::string& config, const std::vector<std::string>& overrides, std::ostream& out,
                 std::ostream& err);

}  // namespace graft::worker

#endif  // GRAFT_TRAINER_WORKER_COMMANDS_H_
