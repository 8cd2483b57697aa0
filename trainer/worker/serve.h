// `graft-worker serve`: the worker's lease loop around the trainer. Registers with the
// coordinator, leases one job at a time, trains it, reports every evaluation and a heartbeat,
// uploads checkpoints and final artifacts, and finishes the job; reconnects with backoff and
// resends unacknowledged points. SIGTERM: checkpoint, upload, hand the job back, deregister,
// exit 0. Records where it runs (host, threads, and the Slurm job and array task from
// SLURM_JOB_ID, SLURM_ARRAY_JOB_ID, SLURM_ARRAY_TASK_ID when set).
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
  // TLS (proto/tls.h): on when ca_file is set, the PEM CA that signed the coordinator's
  // certificate; cert_file and key_file (together) add a client certificate for mutual TLS;
  // tls_server_name checks the certificate for that name instead of the address's host. A TLS
  // misconfiguration found at the first connection (wrong CA, expired or misnamed certificate,
  // plaintext against TLS or the reverse, a refused client certificate) is not an outage: the
  // worker prints the diagnosis and exits 1 instead of retrying.
  std::string ca_file;
  std::string cert_file;
  std::string key_file;
  std::string tls_server_name;
  int64_t heartbeat_ms = 1000;             // how often progress is reported between evaluations
  // > 0: after this many seconds with nothing to lease (counted from start-up or the end of the
  // last job) the worker deregisters and exits 0, so a Slurm array task ends and frees its
  // allocation when the queue is empty. 0 (default): wait for work forever.
  int64_t idle_exit_s = 0;
};

// Runs until `stop` is set (returns 0 after handing back any job), it was idle for
// `idle_exit_s` (0), or a fatal error (1, also a TLS misconfiguration; bad token file or TLS
// files that cannot be read or are not PEM: 2).
int ServeCommand(const ServeArgs& args, const std::atomic<bool>* stop, std::ostream& err);

}  // namespace graft::worker

#endif  // GRAFT_TRAINER_WORKER_SERVE_H_
