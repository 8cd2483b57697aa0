// The gRPC services of graft.v1 over a Coordinator, with the callback API: streaming calls and
// the lease long poll hold no thread while they wait. Every call is authorised first, in
// Authorize() (server/auth.h), against the token table current at that moment, and counted
// against its token's calls in flight (and a watch against its user's open watches). When the
// token table is reloaded, open watch streams whose token it no longer admits end with
// UNAUTHENTICATED. Thread-safety: the services may be called concurrently; the coordinator and
// the LiveTokens they point to must outlive them.
#ifndef GRAFT_SERVER_SERVICES_H_
#define GRAFT_SERVER_SERVICES_H_

#include <memory>

#include "graft/v1/graft.grpc.pb.h"
#include "server/auth.h"
#include "server/coordinator.h"

namespace graft::server {

std::unique_ptr<v1::Jobs::CallbackService> CreateJobsService(Coordinator* coordinator, LiveTokens* tokens);
std::unique_ptr<v1::Workers::CallbackService> CreateWorkersService(Coordinator* coordinator, LiveTokens* tokens);

// absl::Status -> grpc::Status with the same code and message.
grpc::Status ToGrpc(const absl::Status& status);

}  // namespace graft::server

#endif  // GRAFT_SERVER_SERVICES_H_
