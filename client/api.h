// The client's seam to the coordinator: one method per `Jobs` call the commands use, so that
// tests can substitute a fake that records what it was asked. CreateGrpcApi() talks to a real
// graftd with a bearer token. Thread-safety: an Api is used from one thread at a time.
#ifndef GRAFT_CLIENT_API_H_
#define GRAFT_CLIENT_API_H_

#include <cstdint>
#include <functional>
#include <memory>
#include <string>
#include <vector>

#include <grpcpp/grpcpp.h>

#include "graft/v1/graft.pb.h"
#include "proto/tls.h"

namespace graft::client {

class Api {
 public:
  virtual ~Api() = default;
  virtual grpc::Status Submit(const v1::SubmitJobRequest& request, v1::SubmitJobResponse* response) = 0;
  virtual grpc::Status GetJob(const std::string& job_id, v1::Job* job) = 0;
  virtual grpc::Status ListJobs(const v1::ListJobsRequest& request, v1::ListJobsResponse* response) = 0;
  virtual grpc::Status CancelJob(const std::string& job_id, const std::string& reason, v1::Job* job) = 0;
  virtual grpc::Status CancelSweep(const std::string& sweep_id, const std::string& reason,
                                   v1::CancelSweepResponse* response) = 0;
  virtual grpc::Status GetMetrics(const std::string& job_id, std::vector<v1::Point>* points) = 0;
  // Streams: `on_event` is called for every event in order until the stream ends (OK) or it
  // returns false (the call is then cancelled and the result is OK). `timeout_ms` > 0 bounds the
  // whole stream (DEADLINE_EXCEEDED); 0 means no bound.
  virtual grpc::Status WatchJob(const std::string& job_id, int64_t from_step, int64_t timeout_ms,
                                const std::function<bool(const v1::JobEvent&)>& on_event) = 0;
  virtual grpc::Status WatchSweep(const std::string& sweep_id, int64_t from_step, int64_t timeout_ms,
                                  const std::function<bool(const v1::SweepEvent&)>& on_event) = 0;
  // Calls `on_chunk` for every chunk of the artifact; the first chunk carries size and SHA-256.
  virtual grpc::Status Download(const std::string& job_id, const std::string& name,
                                const std::function<bool(const v1::ArtifactChunk&)>& on_chunk) = 0;
  // The worker fleet. The default (for fakes that do not need it) is UNIMPLEMENTED.
  virtual grpc::Status ListWorkers(bool include_gone, v1::ListWorkersResponse* response) {
    (void)include_gone;
    (void)response;
    return grpc::Status(grpc::StatusCode::UNIMPLEMENTED, "ListWorkers");
  }
};

struct Connection {
  std::string server;               // host:port of graftd
  std::string token;                // bearer token
  int64_t call_timeout_ms = 30000;  // deadline of each unary call and of each download
  tls::ClientCredentials tls;       // loaded by tls::LoadClientCredentials; default: plaintext
};

// An Api over a channel to `connection.server`: TLS when `connection.tls` is enabled, else
// plaintext. A call that fails with UNAVAILABLE is diagnosed once with tls::Diagnose; when the
// diagnosis names a misconfiguration (wrong CA, expired or misnamed certificate, plaintext on
// one side, a missing or refused client certificate) the status keeps UNAVAILABLE and carries
// that sentence as its message (IsTlsProblem() is then true).
std::unique_ptr<Api> CreateGrpcApi(const Connection& connection);

// True for a status whose message is a TLS diagnosis rather than gRPC's own text.
bool IsTlsProblem(const grpc::Status& status);

}  // namespace graft::client

#endif  // GRAFT_CLIENT_API_H_
