#include "server/services.h"

#include <atomic>
#include <deque>
#include <fstream>
#include <map>
#include <mutex>

#include "absl/strings/str_cat.h"

namespace graft::server {
namespace {

constexpr size_t kChunkBytes = 1 << 20;
// Events queued for one watch stream whose client does not read them, before the stream is ended.
constexpr size_t kMaxWatchBacklog = 10000;

// The `authorization` metadata of a call, or nullopt.
std::optional<std::string> AuthorizationOf(grpc::CallbackServerContext* ctx) {
  const auto& md = ctx->client_metadata();
  auto it = md.find("authorization");
  if (it == md.end()) return std::nullopt;
  return std::string(it->second.data(), it->second.size());
}

// Counts, per token name, the calls in flight and the open watch streams, against
// max_requests_in_flight_per_token and max_watches_per_user. A Hold gives its unit back when the
// last copy is destroyed. Thread-safe.
class CallBudget {
 public:
  CallBudget(int64_t max_calls, int64_t max_watches) : max_calls_(max_calls), max_watches_(max_watches) {}
  using Hold = std::shared_ptr<void>;

  absl::StatusOr<Hold> Call(const std::string& name) {
    return Take(calls_, name, max_calls_, [&](int64_t n) {
      return absl::StrCat("'", name, "' has ", n,
                          " requests in flight; graftd allows at most max_requests_in_flight_per_token = ", max_calls_,
                          " per token: retry when some have finished");
    });
  }
  absl::StatusOr<Hold> Watch(const std::string& name) {
    return Take(watches_, name, max_watches_, [&](int64_t n) {
      return absl::StrCat("'", name, "' has ", n, " watch streams open; graftd allows at most max_watches_per_user = ",
                          max_watches_, ": close one first");
    });
  }

 private:
  template <typename Message>
  absl::StatusOr<Hold> Take(std::map<std::string, int64_t>& counts, const std::string& name, int64_t max,
                            Message message) {
    std::lock_guard<std::mutex> lock(mu_);
    int64_t& n = counts[name];
    if (n >= max) return absl::ResourceExhaustedError(message(n));
    ++n;
    auto* map = &counts;
    return Hold(nullptr, [this, map, name](void*) {
      std::lock_guard<std::mutex> lock(mu_);
      auto it = map->find(name);
      if (it != map->end() && --it->second <= 0) map->erase(it);
    });
  }

  const int64_t max_calls_, max_watches_;
  std::mutex mu_;
  std::map<std::string, int64_t> calls_;    // guarded by mu_
  std::map<std::string, int64_t> watches_;  // guarded by mu_
};

// An admitted call: who, and its unit of the caller's budget (held until the call ends).
struct Caller {
  Principal who;
  CallBudget::Hold hold;
};

// Authorises a call against the current token table, then takes a unit of the caller's budget.
absl::StatusOr<Caller> Admit(const LiveTokens& tokens, CallBudget& budget, grpc::CallbackServerContext* ctx,
                             Service service) {
  const std::optional<std::string> authorization = AuthorizationOf(ctx);
  auto who = Authorize(*tokens.Current(), authorization ? &*authorization : nullptr, service);
  if (!who.ok()) return who.status();
  auto hold = budget.Call(who->name);
  if (!hold.ok()) return hold.status();
  return Caller{*who, *hold};
}

// The open watch streams with the authorization each was opened with, so that when the token
// table changes a stream whose token is no longer admitted ends (UNAUTHENTICATED for a revoked
// token). Thread-safe.
class OpenStreams {
 public:
  using End = std::function<void(const grpc::Status&)>;
  explicit OpenStreams(const LiveTokens* tokens) : tokens_(tokens) {}

  // Registers a stream; `end` may be called from any thread until Remove. The stream is checked
  // against the current table at once, so a reload between admission and here is not missed.
  int64_t Add(const std::string& authorization, End end) {
    int64_t id;
    {
      std::lock_guard<std::mutex> lock(mu_);
      id = next_++;
      streams_[id] = {authorization, end};
    }
    absl::Status st = Authorize(*tokens_->Current(), &authorization, Service::kJobs).status();
    if (!st.ok()) end(ToGrpc(st));
    return id;
  }
  void Remove(int64_t id) {
    std::lock_guard<std::mutex> lock(mu_);
    streams_.erase(id);
  }
  // Ends every stream that `tokens` no longer admits.
  void Recheck(const TokenTable& tokens) {
    std::vector<std::pair<End, absl::Status>> ending;
    {
      std::lock_guard<std::mutex> lock(mu_);
      for (const auto& [id, stream] : streams_) {
        absl::Status st = Authorize(tokens, &stream.first, Service::kJobs).status();
        if (!st.ok()) ending.emplace_back(stream.second, st);
      }
    }
    for (const auto& [end, st] : ending) end(ToGrpc(st));
  }

 private:
  const LiveTokens* tokens_;
  std::mutex mu_;
  std::map<int64_t, std::pair<std::string, End>> streams_;  // guarded by mu_
  int64_t next_ = 1;                                        // guarded by mu_
};

grpc::ServerUnaryReactor* Reply(grpc::CallbackServerContext* ctx, const absl::Status& status) {
  auto* r = ctx->DefaultReactor();
  r->Finish(ToGrpc(status));
  return r;
}

// Streams a file in chunks; the first chunk carries the size and digest.
class FileWriter : public grpc::ServerWriteReactor<v1::ArtifactChunk> {
 public:
  // `hold`: the caller's budget unit, given back when the stream ends.
  explicit FileWriter(const absl::StatusOr<ArtifactRecord>& artifact, CallBudget::Hold hold = nullptr)
      : hold_(std::move(hold)) {
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

  CallBudget::Hold hold_;
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
  // `subscribe` registers a sink with the coordinator and returns the watch id. The stream is
  // registered in `streams` with `authorization` (ended when its token is revoked) and keeps
  // `holds` (budget units) until it is done.
  StreamWriter(Coordinator* coordinator, const std::function<absl::StatusOr<int64_t>(Sink)>& subscribe,
               OpenStreams* streams, const std::string& authorization, std::vector<CallBudget::Hold> holds)
      : coordinator_(coordinator), streams_(streams), holds_(std::move(holds)), shared_(std::make_shared<Shared>()) {
    shared_->reactor = this;
    std::shared_ptr<Shared> shared = shared_;
    stream_id_ = streams_->Add(authorization, [shared](const grpc::Status& status) { EndSoon(shared, status); });
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
    streams_->Remove(stream_id_);
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
    bool ending = false;      // guarded by mu; end with end_status once no write is in flight
    grpc::Status end_status;  // guarded by mu
  };

  // Ends the stream from outside (a revoked token): after the write in flight, if any.
  static void EndSoon(const std::shared_ptr<Shared>& shared, const grpc::Status& status) {
    std::lock_guard<std::mutex> lock(shared->mu);
    if (shared->reactor == nullptr || shared->ending) return;
    shared->ending = true;
    shared->end_status = status;
    if (shared->registered) shared->reactor->MaybeWriteLocked();
  }

  static void Push(const std::shared_ptr<Shared>& shared, const Event& e, bool done) {
    std::lock_guard<std::mutex> lock(shared->mu);
    if (shared->reactor == nullptr || shared->ending) return;
    if (done) {
      shared->done = true;
    } else if (shared->queue.size() >= kMaxWatchBacklog) {
      // A watcher that stopped reading: its events would pile up here without end. It is told
      // so and can reconnect from the step it has; the others are not held up by it.
      shared->ending = true;
      shared->end_status = grpc::Status(
          grpc::StatusCode::RESOURCE_EXHAUSTED,
          absl::StrCat("this watch fell ", kMaxWatchBacklog, " events behind (the client stopped reading); ",
                       "watch again with from_step set to the last step received"));
      // The front may be in flight; the rest is dropped.
      while (shared->queue.size() > (shared->writing ? 1u : 0u)) shared->queue.pop_back();
    } else {
      shared->queue.push_back(e);
    }
    if (shared->registered) shared->reactor->MaybeWriteLocked();
  }
  // REQUIRES: shared_->mu held.
  void MaybeWriteLocked() {
    if (shared_->finished || shared_->writing) return;
    if (shared_->ending) {
      EndLocked(shared_->end_status);
    } else if (!shared_->queue.empty()) {
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
  OpenStreams* streams_;
  std::vector<CallBudget::Hold> holds_;
  std::shared_ptr<Shared> shared_;
  int64_t stream_id_ = 0;
  int64_t watch_id_ = 0;
};

class UploadReader : public grpc::ServerReadReactor<v1::UploadArtifactRequest> {
 public:
  UploadReader(Coordinator* coordinator, Caller caller, v1::UploadArtifactResponse* response)
      : coordinator_(coordinator), caller_(std::move(caller)), response_(response) {
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
      auto up = coordinator_->BeginUpload(caller_.who, request_.header());
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
  Caller caller_;
  v1::UploadArtifactResponse* response_;
  v1::UploadArtifactRequest request_;
  std::unique_ptr<Upload> upload_;
};

// What a stream reactor's constructor needs to refuse a call.
template <typename Base>
struct Refused : Base {
  explicit Refused(const absl::Status& s) { this->Finish(ToGrpc(s)); }
  void OnDone() override { delete this; }
};

class JobsImpl : public v1::Jobs::CallbackService {
 public:
  JobsImpl(Coordinator* c, LiveTokens* t)
      : c_(c),
        t_(t),
        budget_(c->options().max_requests_in_flight_per_token, c->options().max_watches_per_user),
        streams_(t) {
    listener_ = t_->AddListener([this](const TokenTable& table) { streams_.Recheck(table); });
  }
  ~JobsImpl() override { t_->RemoveListener(listener_); }

  grpc::ServerUnaryReactor* SubmitJob(grpc::CallbackServerContext* ctx, const v1::SubmitJobRequest* req,
                                      v1::SubmitJobResponse* resp) override {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kJobs);
    if (!caller.ok()) return Reply(ctx, caller.status());
    auto out = c_->Submit(caller->who, *req);
    if (out.ok()) *resp = *out;
    return Reply(ctx, out.status());
  }
  grpc::ServerUnaryReactor* GetJob(grpc::CallbackServerContext* ctx, const v1::GetJobRequest* req,
                                   v1::Job* resp) override {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kJobs);
    if (!caller.ok()) return Reply(ctx, caller.status());
    auto job = c_->Get(caller->who, req->job_id());
    if (job.ok()) *resp = *job;
    return Reply(ctx, job.status());
  }
  grpc::ServerUnaryReactor* ListJobs(grpc::CallbackServerContext* ctx, const v1::ListJobsRequest* req,
                                     v1::ListJobsResponse* resp) override {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kJobs);
    if (!caller.ok()) return Reply(ctx, caller.status());
    auto list = c_->List(caller->who, *req);
    if (list.ok()) *resp = *list;
    return Reply(ctx, list.status());
  }
  grpc::ServerUnaryReactor* CancelJob(grpc::CallbackServerContext* ctx, const v1::CancelJobRequest* req,
                                      v1::Job* resp) override {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kJobs);
    if (!caller.ok()) return Reply(ctx, caller.status());
    auto job = c_->Cancel(caller->who, req->job_id(), req->reason());
    if (job.ok()) *resp = *job;
    return Reply(ctx, job.status());
  }
  grpc::ServerWriteReactor<v1::JobEvent>* WatchJob(grpc::CallbackServerContext* ctx,
                                                   const v1::WatchJobRequest* req) override {
    auto caller = AdmitWatch(ctx);
    if (!caller.ok()) return new Refused<grpc::ServerWriteReactor<v1::JobEvent>>(caller.status());
    const Principal who = caller->first.who;
    return new StreamWriter<v1::JobEvent>(
        c_,
        [&](Coordinator::WatchSink sink) { return c_->Watch(who, req->job_id(), req->from_step(), std::move(sink)); },
        &streams_, AuthorizationOf(ctx).value_or(""), {caller->first.hold, caller->second});
  }
  grpc::ServerWriteReactor<v1::SweepEvent>* WatchSweep(grpc::CallbackServerContext* ctx,
                                                       const v1::WatchSweepRequest* req) override {
    auto caller = AdmitWatch(ctx);
    if (!caller.ok()) return new Refused<grpc::ServerWriteReactor<v1::SweepEvent>>(caller.status());
    const Principal who = caller->first.who;
    return new StreamWriter<v1::SweepEvent>(
        c_,
        [&](Coordinator::SweepSink sink) {
          return c_->WatchSweep(who, req->sweep_id(), req->from_step(), std::move(sink));
        },
        &streams_, AuthorizationOf(ctx).value_or(""), {caller->first.hold, caller->second});
  }
  grpc::ServerUnaryReactor* CancelSweep(grpc::CallbackServerContext* ctx, const v1::CancelSweepRequest* req,
                                        v1::CancelSweepResponse* resp) override {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kJobs);
    if (!caller.ok()) return Reply(ctx, caller.status());
    auto out = c_->CancelSweep(caller->who, req->sweep_id(), req->reason());
    if (out.ok()) *resp = *out;
    return Reply(ctx, out.status());
  }
  grpc::ServerUnaryReactor* GetMetrics(grpc::CallbackServerContext* ctx, const v1::GetMetricsRequest* req,
                                       v1::GetMetricsResponse* resp) override {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kJobs);
    if (!caller.ok()) return Reply(ctx, caller.status());
    auto points = c_->Metrics(caller->who, req->job_id());
    if (points.ok()) {
      for (auto& p : *points) *resp->add_points() = std::move(p);
    }
    return Reply(ctx, points.status());
  }
  grpc::ServerWriteReactor<v1::ArtifactChunk>* DownloadArtifact(grpc::CallbackServerContext* ctx,
                                                                const v1::DownloadArtifactRequest* req) override {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kJobs);
    if (!caller.ok()) return new FileWriter(caller.status());
    return new FileWriter(c_->Artifact(caller->who, req->job_id(), req->name()), caller->hold);
  }
  grpc::ServerUnaryReactor* GetServerInfo(grpc::CallbackServerContext* ctx, const v1::GetServerInfoRequest*,
                                          v1::ServerInfo* resp) override {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kJobs);
    if (!caller.ok()) return Reply(ctx, caller.status());
    auto info = c_->Info();
    if (info.ok()) *resp = *info;
    return Reply(ctx, info.status());
  }
  grpc::ServerUnaryReactor* ListWorkers(grpc::CallbackServerContext* ctx, const v1::ListWorkersRequest* req,
                                        v1::ListWorkersResponse* resp) override {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kJobs);
    if (!caller.ok()) return Reply(ctx, caller.status());
    auto r = c_->ListWorkers(req->include_gone());
    if (r.ok()) *resp = *r;
    return Reply(ctx, r.status());
  }

 private:
  // A watch takes a unit of the caller's calls and one of their watches.
  absl::StatusOr<std::pair<Caller, CallBudget::Hold>> AdmitWatch(grpc::CallbackServerContext* ctx) {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kJobs);
    if (!caller.ok()) return caller.status();
    auto watch = budget_.Watch(caller->who.name);
    if (!watch.ok()) return watch.status();
    return std::make_pair(*caller, *watch);
  }

  Coordinator* c_;
  LiveTokens* t_;
  CallBudget budget_;
  OpenStreams streams_;
  int64_t listener_ = 0;
};

// A worker's long poll for a job. Answered later, from whichever thread finds a job or the
// deadline; no thread waits. It counts as a call in flight until it is answered. When its caller
// goes away (the call is cancelled, or the worker's process died and its connection closed), the
// coordinator drops its waiter at once: it is offered no job and gives its unit back.
class LongPoll : public grpc::ServerUnaryReactor {
 public:
  explicit LongPoll(Coordinator* c) : c_(c) {}

  void Start(Caller caller, const v1::LeaseJobRequest& request, v1::LeaseJobResponse* response) {
    const uint64_t waiter = c_->Lease(caller.who, request,
                                      [this, response, hold = caller.hold](absl::Status status,
                                                                           const v1::LeaseJobResponse& reply) {
                                        if (status.ok()) *response = reply;
                                        Finish(ToGrpc(status));
                                      });
    waiter_.store(waiter);
    if (cancelled_.load()) c_->DropWaiter(waiter);  // cancelled before the number was known
  }
  void OnCancel() override {
    cancelled_.store(true);
    c_->DropWaiter(waiter_.load());  // 0 (not yet known, or answered at once) is a no-op
  }
  void OnDone() override { delete this; }

 private:
  Coordinator* const c_;
  std::atomic<uint64_t> waiter_{0};
  std::atomic<bool> cancelled_{false};
};

class WorkersImpl : public v1::Workers::CallbackService {
 public:
  WorkersImpl(Coordinator* c, LiveTokens* t)
      : c_(c), t_(t), budget_(c->options().max_requests_in_flight_per_token, c->options().max_watches_per_user) {}

  grpc::ServerUnaryReactor* RegisterWorker(grpc::CallbackServerContext* ctx, const v1::RegisterWorkerRequest* req,
                                           v1::RegisterWorkerResponse* resp) override {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kWorkers);
    if (!caller.ok()) return Reply(ctx, caller.status());
    auto r = c_->Register(caller->who, *req);
    if (r.ok()) *resp = *r;
    return Reply(ctx, r.status());
  }
  grpc::ServerUnaryReactor* LeaseJob(grpc::CallbackServerContext* ctx, const v1::LeaseJobRequest* req,
                                     v1::LeaseJobResponse* resp) override {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kWorkers);
    if (!caller.ok()) return Reply(ctx, caller.status());
    auto* poll = new LongPoll(c_);
    poll->Start(std::move(*caller), *req, resp);
    return poll;
  }
  grpc::ServerUnaryReactor* Report(grpc::CallbackServerContext* ctx, const v1::ReportRequest* req,
                                   v1::ReportResponse* resp) override {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kWorkers);
    if (!caller.ok()) return Reply(ctx, caller.status());
    auto r = c_->Report(caller->who, *req);
    if (r.ok()) *resp = *r;
    return Reply(ctx, r.status());
  }
  grpc::ServerWriteReactor<v1::ArtifactChunk>* FetchCheckpoint(grpc::CallbackServerContext* ctx,
                                                               const v1::FetchCheckpointRequest* req) override {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kWorkers);
    if (!caller.ok()) return new FileWriter(caller.status());
    return new FileWriter(c_->CheckpointFor(caller->who, *req), caller->hold);
  }
  grpc::ServerReadReactor<v1::UploadArtifactRequest>* UploadArtifact(grpc::CallbackServerContext* ctx,
                                                                     v1::UploadArtifactResponse* resp) override {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kWorkers);
    if (!caller.ok()) return new Refused<grpc::ServerReadReactor<v1::UploadArtifactRequest>>(caller.status());
    return new UploadReader(c_, std::move(*caller), resp);
  }
  grpc::ServerUnaryReactor* FinishJob(grpc::CallbackServerContext* ctx, const v1::FinishJobRequest* req,
                                      v1::FinishJobResponse*) override {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kWorkers);
    if (!caller.ok()) return Reply(ctx, caller.status());
    return Reply(ctx, c_->Finish(caller->who, *req));
  }
  grpc::ServerUnaryReactor* DeregisterWorker(grpc::CallbackServerContext* ctx, const v1::DeregisterWorkerRequest* req,
                                             v1::DeregisterWorkerResponse*) override {
    auto caller = Admit(*t_, budget_, ctx, server::Service::kWorkers);
    if (!caller.ok()) return Reply(ctx, caller.status());
    return Reply(ctx, c_->Deregister(caller->who, *req));
  }

 private:
  Coordinator* c_;
  LiveTokens* t_;
  CallBudget budget_;
};

}  // namespace

grpc::Status ToGrpc(const absl::Status& status) {
  if (status.ok()) return grpc::Status::OK;
  return grpc::Status(static_cast<grpc::StatusCode>(static_cast<int>(status.code())), std::string(status.message()));
}

std::unique_ptr<v1::Jobs::CallbackService> CreateJobsService(Coordinator* coordinator, LiveTokens* tokens) {
  return std::make_unique<JobsImpl>(coordinator, tokens);
}
std::unique_ptr<v1::Workers::CallbackService> CreateWorkersService(Coordinator* coordinator, LiveTokens* tokens) {
  return std::make_unique<WorkersImpl>(coordinator, tokens);
}

}  // namespace graft::server
