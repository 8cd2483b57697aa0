#include "server/services.h"

#include <deque>
#include <fstream>
#include <mutex>

#include "absl/strings/str_cat.h"

namespace graft::server {
namespace {

constexpr size_t kChunkBytes = 1 << 20;

absl::StatusOr<Principal> Check(const TokenTable& tokens, grpc::CallbackServerContext* ctx, Service service) {
  const auto& md = ctx->client_metadata();
  auto it = md.find("authorization");
  if (it == md.end()) return Authorize(tokens, nullptr, service);
  const std::string value(it->second.data(), it->second.size());
  return Authorize(tokens, &value, service);
}

grpc::ServerUnaryReactor* Reply(grpc::CallbackServerContext* ctx, const absl::Status& status) {
  auto* r = ctx->DefaultReactor();
  r->Finish(ToGrpc(status));
  return r;
}

// Streams a file in chunks; the first chunk carries the size and digest.
class FileWriter : public grpc::ServerWriteReactor<v1::ArtifactChunk> {
 public:
  FileWriter(const absl::StatusOr<ArtifactRecord>& artifact) {
    if (!artifact.ok()) {
      Finish(ToGrpc(artifact.status()));
      return;
    }
    record_ = *artifact;
    in_.open(record_.path, std::ios::binary);
    if (!in_) {
      Finish(grpc::Status(grpc::StatusCode::DATA_LOSS, absl::StrCat("artifact file missing: ", record_.path)));
      return;
    }
    Next();
  }
  void OnWriteDone(bool ok) override {
    if (!ok) {
      Finish(grpc::Status(grpc::StatusCode::CANCELLED, "the client went away"));
      return;
    }
    Next();
  }
  void OnDone() override { delete this; }

 private:
  void Next() {
    if (done_) {
      Finish(grpc::Status::OK);
      return;
    }
    std::string buf(kChunkBytes, '\0');
    in_.read(buf.data(), static_cast<std::streamsize>(buf.size()));
    buf.resize(static_cast<size_t>(in_.gcount()));
    chunk_.Clear();
    chunk_.set_data(buf);
    if (first_) {
      chunk_.set_total_bytes(record_.bytes);
      chunk_.set_sha256(record_.sha256);
      first_ = false;
    }
    if (in_.eof() || buf.empty()) done_ = true;
    StartWrite(&chunk_);
  }

  ArtifactRecord record_;
  std::ifstream in_;
  v1::ArtifactChunk chunk_;
  bool first_ = true;
  bool done_ = false;
};

// A watch stream: events from the coordinator are queued and written one at a time. The queue
// lives in a block shared with the coordinator's sink, so that an event delivered after the
// call ended finds no reactor instead of a deleted one.
template <typename Event>
class StreamWriter : public grpc::ServerWriteReactor<Event> {
 public:
  using Sink = std::function<void(const Event&, bool)>;
  // `subscribe` registers a sink with the coordinator and returns the watch id.
  StreamWriter(Coordinator* coordinator, const std::function<absl::StatusOr<int64_t>(Sink)>& subscribe)
      : coordinator_(coordinator), shared_(std::make_shared<Shared>()) {
    shared_->reactor = this;
    std::shared_ptr<Shared> shared = shared_;
    auto id = subscribe([shared](const Event& e, bool done) { Push(shared, e, done); });
    std::lock_guard<std::mutex> lock(shared_->mu);
    if (!id.ok()) {
      EndLocked(ToGrpc(id.status()));
      return;
    }
    watch_id_ = *id;
    shared_->registered = true;
    MaybeWriteLocked();
  }
  void OnWriteDone(bool ok) override {
    std::lock_guard<std::mutex> lock(shared_->mu);
    shared_->writing = false;
    if (!ok) {
      EndLocked(grpc::Status(grpc::StatusCode::CANCELLED, "the client went away"));
      return;
    }
    shared_->queue.pop_front();
    MaybeWriteLocked();
  }
  void OnCancel() override {
    std::lock_guard<std::mutex> lock(shared_->mu);
    EndLocked(grpc::Status(grpc::StatusCode::CANCELLED, "watch cancelled"));
  }
  void OnDone() override {
    coordinator_->Unwatch(watch_id_);
    {
      std::lock_guard<std::mutex> lock(shared_->mu);
      shared_->reactor = nullptr;
    }
    delete this;
  }

 private:
  struct Shared {
    std::mutex mu;
    StreamWriter* reactor = nullptr;  // guarded by mu; null once the call is done
    std::deque<Event> queue;          // guarded by mu; the front is in flight while writing
    bool writing = false, done = false, finished = false, registered = false;  // guarded by mu
  };

  static void Push(const std::shared_ptr<Shared>& shared, const Event& e, bool done) {
    std::lock_guard<std::mutex> lock(shared->mu);
    if (shared->reactor == nullptr) return;
    if (done) {
      shared->done = true;
    } else {
      shared->queue.push_back(e);
    }
    if (shared->registered) shared->reactor->MaybeWriteLocked();
  }
  // REQUIRES: shared_->mu held.
  void MaybeWriteLocked() {
    if (shared_->finished || shared_->writing) return;
    if (!shared_->queue.empty()) {
      shared_->writing = true;
      this->StartWrite(&shared_->queue.front());
    } else if (shared_->done) {
      EndLocked(grpc::Status::OK);
    }
  }
  // REQUIRES: shared_->mu held.
  void EndLocked(const grpc::Status& status) {
    if (shared_->finished) return;
    shared_->finished = true;
    this->Finish(status);
  }

  Coordinator* coordinator_;
  std::shared_ptr<Shared> shared_;
  int64_t watch_id_ = 0;
};

class UploadReader : public grpc::ServerReadReactor<v1::UploadArtifactRequest> {
 public:
  UploadReader(Coordinator* coordinator, v1::UploadArtifactResponse* response)
      : coordinator_(coordinator), response_(response) {
    StartRead(&request_);
  }
  void OnReadDone(bool ok) override {
    if (!ok) {  // the client finished sending
      if (!upload_) {
        Finish(grpc::Status(grpc::StatusCode::INVALID_ARGUMENT, "an upload starts with its header"));
        return;
      }
      auto stored = coordinator_->CommitUpload(*upload_);
      if (!stored.ok()) {
        Finish(ToGrpc(stored.status()));
        return;
      }
      response_->set_stored_bytes(*stored);
      Finish(grpc::Status::OK);
      return;
    }
    if (request_.has_header()) {
      if (upload_) {
        Finish(grpc::Status(grpc::StatusCode::INVALID_ARGUMENT, "an upload has one header"));
        return;
      }
      auto up = coordinator_->BeginUpload(request_.header());
      if (!up.ok()) {
        Finish(ToGrpc(up.status()));
        return;
      }
      upload_ = std::move(*up);
    } else {
      if (!upload_) {
        Finish(grpc::Status(grpc::StatusCode::INVALID_ARGUMENT, "an upload starts with its header"));
        return;
      }
      absl::Status st = upload_->Write(request_.data());
      if (!st.ok()) {
        Finish(ToGrpc(st));
        return;
      }
    }
    StartRead(&request_);
  }
  void OnDone() override { delete this; }

 private:
  Coordinator* coordinator_;
  v1::UploadArtifactResponse* response_;
  v1::UploadArtifactRequest request_;
  std::unique_ptr<Upload> upload_;
};

class JobsImpl : public v1::Jobs::CallbackService {
 public:
  JobsImpl(Coordinator* c, const TokenTable* t) : c_(c), t_(t) {}

  grpc::ServerUnaryReactor* SubmitJob(grpc::CallbackServerContext* ctx, const v1::SubmitJobRequest* req,
                                      v1::SubmitJobResponse* resp) override {
    auto who = Check(*t_, ctx, server::Service::kJobs);
    if (!who.ok()) return Reply(ctx, who.status());
    auto out = c_->Submit(*who, *req);
    if (out.ok()) *resp = *out;
    return Reply(ctx, out.status());
  }
  grpc::ServerUnaryReactor* GetJob(grpc::CallbackServerContext* ctx, const v1::GetJobRequest* req,
                                   v1::Job* resp) override {
    auto who = Check(*t_, ctx, server::Service::kJobs);
    if (!who.ok()) return Reply(ctx, who.status());
    auto job = c_->Get(*who, req->job_id());
    if (job.ok()) *resp = *job;
    return Reply(ctx, job.status());
  }
  grpc::ServerUnaryReactor* ListJobs(grpc::CallbackServerContext* ctx, const v1::ListJobsRequest* req,
                                     v1::ListJobsResponse* resp) override {
    auto who = Check(*t_, ctx, server::Service::kJobs);
    if (!who.ok()) return Reply(ctx, who.status());
    auto list = c_->List(*who, *req);
    if (list.ok()) *resp = *list;
    return Reply(ctx, list.status());
  }
  grpc::ServerUnaryReactor* CancelJob(grpc::CallbackServerContext* ctx, const v1::CancelJobRequest* req,
                                      v1::Job* resp) override {
    auto who = Check(*t_, ctx, server::Service::kJobs);
    if (!who.ok()) return Reply(ctx, who.status());
    auto job = c_->Cancel(*who, req->job_id(), req->reason());
    if (job.ok()) *resp = *job;
    return Reply(ctx, job.status());
  }
  grpc::ServerWriteReactor<v1::JobEvent>* WatchJob(grpc::CallbackServerContext* ctx,
                                                   const v1::WatchJobRequest* req) override {
    auto who = Check(*t_, ctx, server::Service::kJobs);
    if (!who.ok()) {
      struct Refused : grpc::ServerWriteReactor<v1::JobEvent> {
        explicit Refused(const absl::Status& s) { Finish(ToGrpc(s)); }
        void OnDone() override { delete this; }
      };
      return new Refused(who.status());
    }
    return new StreamWriter<v1::JobEvent>(c_, [&](Coordinator::WatchSink sink) {
      return c_->Watch(*who, req->job_id(), req->from_step(), std::move(sink));
    });
  }
  grpc::ServerWriteReactor<v1::SweepEvent>* WatchSweep(grpc::CallbackServerContext* ctx,
                                                       const v1::WatchSweepRequest* req) override {
    auto who = Check(*t_, ctx, server::Service::kJobs);
    if (!who.ok()) {
      struct Refused : grpc::ServerWriteReactor<v1::SweepEvent> {
        explicit Refused(const absl::Status& s) { Finish(ToGrpc(s)); }
        void OnDone() override { delete this; }
      };
      return new Refused(who.status());
    }
    return new StreamWriter<v1::SweepEvent>(c_, [&](Coordinator::SweepSink sink) {
      return c_->WatchSweep(*who, req->sweep_id(), req->from_step(), std::move(sink));
    });
  }
  grpc::ServerUnaryReactor* CancelSweep(grpc::CallbackServerContext* ctx, const v1::CancelSweepRequest* req,
                                        v1::CancelSweepResponse* resp) override {
    auto who = Check(*t_, ctx, server::Service::kJobs);
    if (!who.ok()) return Reply(ctx, who.status());
    auto out = c_->CancelSweep(*who, req->sweep_id(), req->reason());
    if (out.ok()) *resp = *out;
    return Reply(ctx, out.status());
  }
  grpc::ServerUnaryReactor* GetMetrics(grpc::CallbackServerContext* ctx, const v1::GetMetricsRequest* req,
                                       v1::GetMetricsResponse* resp) override {
    auto who = Check(*t_, ctx, server::Service::kJobs);
    if (!who.ok()) return Reply(ctx, who.status());
    auto points = c_->Metrics(*who, req->job_id());
    if (points.ok()) {
      for (auto& p : *points) *resp->add_points() = std::move(p);
    }
    return Reply(ctx, points.status());
  }
  grpc::ServerWriteReactor<v1::ArtifactChunk>* DownloadArtifact(grpc::CallbackServerContext* ctx,
                                                                const v1::DownloadArtifactRequest* req) override {
    auto who = Check(*t_, ctx, server::Service::kJobs);
    if (!who.ok()) return new FileWriter(who.status());
    return new FileWriter(c_->Artifact(*who, req->job_id(), req->name()));
  }
  grpc::ServerUnaryReactor* GetServerInfo(grpc::CallbackServerContext* ctx, const v1::GetServerInfoRequest*,
                                          v1::ServerInfo* resp) override {
    auto who = Check(*t_, ctx, server::Service::kJobs);
    if (!who.ok()) return Reply(ctx, who.status());
    auto info = c_->Info();
    if (info.ok()) *resp = *info;
    return Reply(ctx, info.status());
  }
  grpc::ServerUnaryReactor* ListWorkers(grpc::CallbackServerContext* ctx, const v1::ListWorkersRequest* req,
                                        v1::ListWorkersResponse* resp) override {
    auto who = Check(*t_, ctx, server::Service::kJobs);
    if (!who.ok()) return Reply(ctx, who.status());
    auto r = c_->ListWorkers(req->include_gone());
    if (r.ok()) *resp = *r;
    return Reply(ctx, r.status());
  }

 private:
  Coordinator* c_;
  const TokenTable* t_;
};

class WorkersImpl : public v1::Workers::CallbackService {
 public:
  WorkersImpl(Coordinator* c, const TokenTable* t) : c_(c), t_(t) {}

  grpc::ServerUnaryReactor* RegisterWorker(grpc::CallbackServerContext* ctx, const v1::RegisterWorkerRequest* req,
                                           v1::RegisterWorkerResponse* resp) override {
    auto who = Check(*t_, ctx, server::Service::kWorkers);
    if (!who.ok()) return Reply(ctx, who.status());
    auto r = c_->Register(*who, *req);
    if (r.ok()) *resp = *r;
    return Reply(ctx, r.status());
  }
  grpc::ServerUnaryReactor* LeaseJob(grpc::CallbackServerContext* ctx, const v1::LeaseJobRequest* req,
                                     v1::LeaseJobResponse* resp) override {
    auto* reactor = ctx->DefaultReactor();
    auto who = Check(*t_, ctx, server::Service::kWorkers);
    if (!who.ok()) {
      reactor->Finish(ToGrpc(who.status()));
      return reactor;
    }
    // Answered later, from whichever thread finds a job or the deadline; no thread waits.
    c_->Lease(*req, [reactor, resp](absl::Status status, const v1::LeaseJobResponse& reply) {
      if (status.ok()) *resp = reply;
      reactor->Finish(ToGrpc(status));
    });
    return reactor;
  }
  grpc::ServerUnaryReactor* Report(grpc::CallbackServerContext* ctx, const v1::ReportRequest* req,
                                   v1::ReportResponse* resp) override {
    auto who = Check(*t_, ctx, server::Service::kWorkers);
    if (!who.ok()) return Reply(ctx, who.status());
    auto r = c_->Report(*req);
    if (r.ok()) *resp = *r;
    return Reply(ctx, r.status());
  }
  grpc::ServerWriteReactor<v1::ArtifactChunk>* FetchCheckpoint(grpc::CallbackServerContext* ctx,
                                                               const v1::FetchCheckpointRequest* req) override {
    auto who = Check(*t_, ctx, server::Service::kWorkers);
    if (!who.ok()) return new FileWriter(who.status());
    return new FileWriter(c_->CheckpointFor(*req));
  }
  grpc::ServerReadReactor<v1::UploadArtifactRequest>* UploadArtifact(grpc::CallbackServerContext* ctx,
                                                                     v1::UploadArtifactResponse* resp) override {
    auto who = Check(*t_, ctx, server::Service::kWorkers);
    if (!who.ok()) {
      struct Refused : grpc::ServerReadReactor<v1::UploadArtifactRequest> {
        explicit Refused(const absl::Status& s) { Finish(ToGrpc(s)); }
        void OnDone() override { delete this; }
      };
      return new Refused(who.status());
    }
    return new UploadReader(c_, resp);
  }
  grpc::ServerUnaryReactor* FinishJob(grpc::CallbackServerContext* ctx, const v1::FinishJobRequest* req,
                                      v1::FinishJobResponse*) override {
    auto who = Check(*t_, ctx, server::Service::kWorkers);
    if (!who.ok()) return Reply(ctx, who.status());
    return Reply(ctx, c_->Finish(*req));
  }
  grpc::ServerUnaryReactor* DeregisterWorker(grpc::CallbackServerContext* ctx, const v1::DeregisterWorkerRequest* req,
                                             v1::DeregisterWorkerResponse*) override {
    auto who = Check(*t_, ctx, server::Service::kWorkers);
    if (!who.ok()) return Reply(ctx, who.status());
    return Reply(ctx, c_->Deregister(*req));
  }

 private:
  Coordinator* c_;
  const TokenTable* t_;
};

}  // namespace

grpc::Status ToGrpc(const absl::Status& status) {
  if (status.ok()) return grpc::Status::OK;
  return grpc::Status(static_cast<grpc::StatusCode>(static_cast<int>(status.code())), std::string(status.message()));
}

std::unique_ptr<v1::Jobs::CallbackService> CreateJobsService(Coordinator* coordinator, const TokenTable* tokens) {
  return std::make_unique<JobsImpl>(coordinator, tokens);
}
std::unique_ptr<v1::Workers::CallbackService> CreateWorkersService(Coordinator* coordinator, const TokenTable* tokens) {
  return std::make_unique<WorkersImpl>(coordinator, tokens);
}

}  // namespace graft::server
