// Runs the coordinator process: opens the store, recovers, serves both gRPC services (plus
// reflection) until `stop` is set, then shuts down cleanly. Returns the exit code (0 clean
// stop, 2 bad settings, 1 failure). Thread-safety: call once per process.
#ifndef GRAFT_SERVER_GRAFTD_H_
#define GRAFT_SERVER_GRAFTD_H_

#include <atomic>

#include "server/graftd_config.h"

namespace graft::server {

int RunGraftd(const GraftdConfig& config, const std::atomic<bool>* stop);

}  // namespace graft::server

#endif  // GRAFT_SERVER_GRAFTD_H_
