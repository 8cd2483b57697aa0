#include "client/api.h"

#include <chrono>

#include "graft/v1/graft.grpc.pb.h"

namespace graft::client {
namespace {

// The error details that mark a status carrying a TLS diagnosis.
constexpr char kTlsProblem[] = "graft-tls-diagnosis";

class GrpcApi : public Api {
 public:
  explicit GrpcApi(const Connection& c)
      : connection_(c), stub_(v1::Jobs::NewStub(tls::CreateChannel(c.server, c.tls))) {}

  grpc::Status Submit(const v1::SubmitJobRequest& request, v1::SubmitJobResponse* response) override {
    auto ctx = Context(connection_.call_timeout_ms);
    return Checked(stub_->SubmitJob(ctx.get(), request, response));
  }
  grpc::Status GetJob(const std::string& job_id, v1::Job* job) override {
    v1::GetJobRequest req;
    req.set_job_id(job_id);
    auto ctx = Context(connection_.call_timeout_ms);
    return Checked(stub_->GetJob(ctx.get(), req, job));
  }
  grpc::Status ListJobs(const v1::ListJobsRequest& request, v1::ListJobsResponse* response) override {
    auto ctx = Context(connection_.call_timeout_ms);
    return Checked(stub_->ListJobs(ctx.get(), request, response));
  }
  grpc::Status CancelJob(const std::string& job_id, const std::string& reason, v1::Job* job) override {
    v1::CancelJobRequest req;
    req.set_job_id(job_id);
    req.set_reason(reason);
    auto ctx = Context(connection_.call_timeout_ms);
    return Checked(stub_->CancelJob(ctx.get(), req, job));
  }
  grpc::Status CancelSweep(const std::string& sweep_id, const std::string& reason,
                           v1::CancelSweepResponse* response) override {
    v1::CancelSweepRequest req;
    req.set_sweep_id(sweep_id);
    req.set_reason(reason);
    auto ctx = Context(connection_.call_timeout_ms);
    return Checked(stub_->CancelSweep(ctx.get(), req, response));
  }
  grpc::Status ListWorkers(bool include_gone, v1::ListWorkersResponse* response) override {
    v1::ListWorkersRequest req;
    req.set_include_gone(include_gone);
    auto ctx = Context(connection_.call_timeout_ms);
    return Checked(stub_->ListWorkers(ctx.get(), req, response));
  }
  grpc::Status GetMetrics(const std::string& job_id, std::vector<v1::Point>* points) override {
    v1::GetMetricsRequest req;
    req.set_job_id(job_id);
    v1::GetMetricsResponse resp;
    auto ctx = Context(connection_.call_timeout_ms);
    grpc::Status s = Checked(stub_->GetMetrics(ctx.get(), req, &resp));
    if (s.ok()) points->assign(resp.points().begin(), resp.points().end());
    return s;
  }
  grpc::Status WatchJob(const std::string& job_id, int64_t from_step, int64_t timeout_ms,
                        const std::function<bool(const v1::JobEvent&)>& on_event) override {
    v1::WatchJobRequest req;
    req.set_job_id(job_id);
    req.set_from_step(from_step);
    auto ctx = Context(timeout_ms);
    return Checked(Drain(stub_->WatchJob(ctx.get(), req), ctx.get(), on_event));
  }
  grpc::Status WatchSweep(const std::string& sweep_id, int64_t from_step, int64_t timeout_ms,
                          const std::function<bool(const v1::SweepEvent&)>& on_event) override {
    v1::WatchSweepRequest req;
    req.set_sweep_id(sweep_id);
    req.set_from_step(from_step);
    auto ctx = Context(timeout_ms);
    return Checked(Drain(stub_->WatchSweep(ctx.get(), req), ctx.get(), on_event));
  }
  grpc::Status Download(const std::string& job_id, const std::string& name,
                        const std::function<bool(const v1::ArtifactChunk&)>& on_chunk) override {
    v1::DownloadArtifactRequest req;
    req.set_job_id(job_id);
    req.set_name(name);
    auto ctx = Context(connection_.call_timeout_ms);
    return Checked(Drain(stub_->DownloadArtifact(ctx.get(), req), ctx.get(), on_chunk));
  }

 private:
  // An UNAVAILABLE whose cause a diagnostic handshake can name gets that sentence as its message.
  grpc::Status Checked(grpc::Status s) const {
    if (s.error_code() != grpc::StatusCode::UNAVAILABLE) return s;
    const tls::Diagnosis d = tls::Diagnose(connection_.server, connection_.tls);
    if (!d.misconfigured) return s;
    return grpc::Status(grpc::StatusCode::UNAVAILABLE, d.message, kTlsProblem);
  }

  std::unique_ptr<grpc::ClientContext> Context(int64_t timeout_ms) {
    auto ctx = std::make_unique<grpc::ClientContext>();
    ctx->AddMetadata("authorization", "Bearer " + connection_.token);
    if (timeout_ms > 0) {
      ctx->set_deadline(std::chrono::system_clock::now() + std::chrono::milliseconds(timeout_ms));
    }
    return ctx;
  }

  template <typename T>
  static grpc::Status Drain(std::unique_ptr<grpc::ClientReader<T>> reader, grpc::ClientContext* ctx,
                            const std::function<bool(const T&)>& on_message) {
    T message;
    while (reader->Read(&message)) {
      if (!on_message(message)) {
        ctx->TryCancel();
        while (reader->Read(&message)) {
        }
        reader->Finish();
        return grpc::Status::OK;
      }
    }
    return reader->Finish();
  }

  Connection connection_;
  std::unique_ptr<v1::Jobs::Stub> stub_;
};

}  // namespace

std::unique_ptr<Api> CreateGrpcApi(const Connection& connection) { return std::make_unique<GrpcApi>(connection); }

bool IsTlsProblem(const grpc::Status& status) {
  return status.error_code() == grpc::StatusCode::UNAVAILABLE && status.error_details() == kTlsProblem;
}

}  // namespace graft::client
