// Runs the coordinator process: opens the store, recovers, serves both gRPC services (plus
// reflection) until `stop` is set, then shuts down cleanly. Returns the exit code (0 clean
// stop, 2 bad settings, 1 failure). Sets the process's umask to 077: the data dir, database and
// artifacts are its user's only. Thread-safety: call once per process.
#ifndef GRAFT_SERVER_GRAFTD_H_
#define GRAFT_SERVER_GRAFTD_H_

#include <atomic>
#include <string>

#include "server/graftd_config.h"

namespace graft::server {

// `reload` (may be null), set by SIGHUP, makes graftd reread its tokens file at once; it is
// cleared when done.
int RunGraftd(const GraftdConfig& config, const std::atomic<bool>* stop, std::atomic<bool>* reload = nullptr);

// The address the launcher's workers dial when `launcher.server` is not set: the listen host
// with the bound port, or this machine's hostname when graftd listens on every interface.
std::string WorkerAddress(const std::string& listen, int port);

}  // namespace graft::server

#endif  // GRAFT_SERVER_GRAFTD_H_
