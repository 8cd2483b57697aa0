// `graft-worker serve`: the worker's lease loop around the trainer. Registers with the
// coordinator, leases one job at a time, trains it, reports every evaluation and a heartbeat,
// uploads checkpoints and final artifacts, and finishes the job; reconnects with backoff and
// resends unacknowledged points. SIGTERM: checkpoint, upload, hand the job back, exit 0.
// Thread-safety: one ServeCommand per process.
#ifndef GRAFT_TRAINER_WORKER_SERVE_H_
#define GRAFT_TRAINER_WORKER_SERVE_H_

#include <atomic>
#include <cstdint>
#include <ostream>
#include <string>

namespace graft::worker {

struct ServeArgs {
  std::string server = "127.0.0.1:7070";  // coordinator host:port
  std::string token_file;                  // file holding this worker's token (one line)
  int threads = 1;                         // at most this many threads per job
  std::string work_dir;                    // local scratch for run directories; default a temp dir
  int64_t heartbeat_ms = 1000;             // how often progress is reported between evaluations
};

// Runs until `stop` is set (returns 0 after handing back any job) or a fatal error (1; bad
// token file: 2).
int ServeCommand(const ServeArgs& args, const std::atomic<bool>* stop, std::ostream& err);

}  // namespace graft::worker

#endif  // GRAFT_TRAINER_WORKER_SERVE_H_
