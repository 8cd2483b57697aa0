// The elastic launcher: when queued jobs outnumber idle workers, graftd asks Slurm for more
// `graft-worker serve` processes (sbatch job arrays of the project's template), up to a
// ceiling that counts the tasks still pending in Slurm. Workers leave by themselves with
// --idle-exit, so the fleet shrinks when the queue is empty. graftd never manages nodes: Slurm
// does. Thread-safety: Launcher runs its own thread; Start/Stop from one thread; Tick() is for
// tests and must not race the thread (do not Start a launcher you Tick by hand).
#ifndef GRAFT_SERVER_LAUNCHER_H_
#define GRAFT_SERVER_LAUNCHER_H_

#include <condition_variable>
#include <cstdint>
#include <map>
#include <memory>
#include <mutex>
#include <string>
#include <thread>
#include <vector>

#include "spdlog/logger.h"

namespace graft::server {

class Coordinator;
class Clock;

// The `launcher:` block of graftd's settings. Absent (enabled = false): graftd starts nothing.
struct LauncherOptions {
  bool enabled = false;
  // The submit command, split on spaces (no shell): graftd appends --array=0-(N-1),
  // --cpus-per-task, --partition and --time when set, then `script`. It must print the array
  // job id first on its standard output (sbatch --parsable prints "ID" or "ID;CLUSTER").
  std::string command = "sbatch --parsable";
  std::string script;              // default: scripts/slurm/graft-workers.sbatch of this source tree
  int max_workers = 4;             // workers alive (idle or training) plus tasks pending, at most
  int cpus_per_worker = 1;         // --cpus-per-task; the worker's --threads
  std::string partition;           // --partition; empty: Slurm's default
  std::string time_limit;          // --time (Slurm's syntax, e.g. 08:00:00); empty: the partition's
  std::string server;              // GRAFT_SERVER, the address workers dial; empty: derived from
                                   // graftd's listen address and bound port (see graftd.cc)
  std::string worker_token_file;   // GRAFT_WORKER_TOKEN_FILE (required when enabled)
  std::string ca_file;             // GRAFT_CA_FILE; empty: graftd's own CA for clients, if any
  int64_t idle_exit_seconds = 120; // GRAFT_IDLE_EXIT: workers leave after this long without work
  std::string worker_bin;          // GRAFT_WORKER_BIN; empty: graft-worker beside graftd
  std::map<std::string, std::string> env;  // further variables for the submit command
  // Lists the tasks Slurm still knows, one "ARRAYJOB_TASK" per line; graftd appends the array
  // job ids joined by commas. Tasks it no longer lists that never registered are forgotten.
  std::string status_command = "squeue --noheader --array --format=%i --jobs";
  int64_t interval_ms = 2000;      // how often demand is checked
  int64_t retry_ms = 5000;         // first wait after a failed submit; doubles up to 5 minutes
  int64_t command_timeout_ms = 60000;
};

// Runs an external command: a seam, so tests can record what would be submitted.
struct CommandOutcome {
  int exit_code = -1;  // -1: it could not be started or timed out
  std::string output;  // standard output and standard error, interleaved
};
class CommandRunner {
 public:
  virtual ~CommandRunner() = default;
  // Runs argv[0] (looked up on PATH) with argv and the process environment plus `env`.
  virtual CommandOutcome Run(const std::vector<std::string>& argv, const std::map<std::string, std::string>& env,
                             int64_t timeout_ms) = 0;
};
std::unique_ptr<CommandRunner> CreateProcessRunner();

class Launcher {
 public:
  // `coordinator`, `runner` and `clock` must outlive the launcher.
  Launcher(Coordinator* coordinator, LauncherOptions options, CommandRunner* runner, Clock* clock,
           std::shared_ptr<spdlog::logger> log);
  ~Launcher();
  Launcher(const Launcher&) = delete;
  Launcher& operator=(const Launcher&) = delete;

  void Start();
  void Stop();
  // One round: forget pending tasks Slurm no longer lists, then submit as many tasks as the
  // queue needs and the ceiling allows (nothing while backing off after a failure). Returns
  // the number of tasks submitted.
  int Tick();

 private:
  void Loop();
  void RefreshPending();

  Coordinator* coordinator_;
  const LauncherOptions options_;
  CommandRunner* runner_;
  Clock* clock_;
  std::shared_ptr<spdlog::logger> log_;
  int64_t backoff_ms_ = 0;       // 0: not backing off; only the launcher thread touches these
  int64_t next_try_ms_ = 0;
  std::mutex mu_;
  bool stopping_ = false;        // guarded by mu_
  std::condition_variable wake_;
  std::thread thread_;
};

}  // namespace graft::server

#endif  // GRAFT_SERVER_LAUNCHER_H_
