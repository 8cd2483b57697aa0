// libFuzzer target: every request of both services, through the real service implementations
// (server/services.cc over a Coordinator and an SQLite store in a temporary data dir), called on an
// in-process gRPC channel. Input: byte 0 picks the RPC, byte 1 the caller (no token, a malformed
// header, an unknown token, a revoked token, two users, two worker tokens, an admin), the rest is
// the request message in protobuf wire format. The store starts with a leased job (with an
// artifact), a queued job, a cancelled job and a sweep, and is made afresh every kResetEvery
// inputs. Promises checked after each call: the status is one the API documents for a request
// (proto/graft/v1/graft.proto: no INTERNAL, UNKNOWN or UNAVAILABLE), callers without a valid
// token get UNAUTHENTICATED and roles outside the service PERMISSION_DENIED; and, every
// kCheckEvery inputs and at each reset, `PRAGMA integrity_check` answers ok and no stored job was
// lost. The harness bounds what would only make it wait: LeaseJob waits at most 5 ms, a watch
// stream gets 20 ms (DEADLINE_EXCEEDED is then the client's own code).
//
// With GRAFT_FUZZ_WRITE_SEEDS=DIR set, it writes its seed requests (recorded from the calls a
// client and a worker make) into DIR and exits: tests/fuzz/corpus/service holds them.
#include <sqlite3.h>
#include <unistd.h>

#include <atomic>
#include <chrono>
#include <condition_variable>
#include <cstddef>
#include <cstdint>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <functional>
#include <memory>
#include <mutex>
#include <set>
#include <string>
#include <vector>

#include <grpcpp/grpcpp.h>

#include "absl/strings/str_cat.h"
#include "graft/v1/graft.grpc.pb.h"
#include "proto/sha256.h"
#include "server/auth.h"
#include "server/coordinator.h"
#include "server/services.h"
#include "spdlog/sinks/null_sink.h"
#include "spdlog/spdlog.h"
#include "tests/fuzz/fuzz_util.h"

namespace graft::fuzz {
namespace {

namespace fs = std::filesystem;
using grpc::StatusCode;

constexpr int kResetEvery = 2000;
constexpr int kCheckEvery = 100;

// The callers, in the order byte 1 picks them.
struct Caller {
  const char* label;
  std::string authorization;  // "" sends none
  enum { kNone, kUser, kWorker, kAdmin } role;
};
const std::vector<Caller>& Callers() {
  static const std::vector<Caller> callers = {
      {"no token", "", Caller::kNone},
      {"malformed", "Token alice-fuzz-token", Caller::kNone},
      {"unknown", "Bearer nobody-fuzz-token", Caller::kNone},
      {"revoked", "Bearer carol-fuzz-token", Caller::kNone},
      {"alice", "Bearer alice-fuzz-token", Caller::kUser},
      {"bob", "Bearer bob-fuzz-token", Caller::kUser},
      {"node1", "Bearer node1-fuzz-token", Caller::kWorker},
      {"node2", "Bearer node2-fuzz-token", Caller::kWorker},
      {"root", "Bearer root-fuzz-token", Caller::kAdmin},
  };
  return callers;
}

std::string TokensYaml() {
  std::string out;
  for (auto [token, name, role, revoked] :
       std::vector<std::tuple<const char*, const char*, const char*, bool>>{
           {"alice-fuzz-token", "alice", "user", false}, {"bob-fuzz-token", "bob", "user", false},
           {"node1-fuzz-token", "node1", "worker", false}, {"node2-fuzz-token", "node2", "worker", false},
           {"root-fuzz-token", "root", "admin", false}, {"carol-fuzz-token", "carol", "user", true}}) {
    absl::StrAppend(&out, "- {name: ", name, ", role: ", role, ", sha256: ", Sha256Hex(token),
                    revoked ? ", revoked: \"2026-01-01T00:00:00Z\"" : "", "}\n");
  }
  return out;
}

const char kSmallJob[] = R"(name: fuzz-seed
algorithm:
  inputs: {a: [x, y], b: bool}
  mechanisms: {m: "a == x && b"}
  output: {o: {expr: m, classes: [no, yes]}}
network: {hidden: [8, 8]}
alignment: {m: {layer: 0, units: 0-3}}
training: {steps: 10, batch_size: 4}
evaluation: {every: 5, held_out: 0, triples: 16}
)";

const char kSmallSweep[] = R"(name: fuzz-sweep
algorithm:
  inputs: {a: [x, y], b: bool}
  mechanisms: {m: "a == x && b"}
  output: {o: {expr: m, classes: [no, yes]}}
network: {hidden: [8, 8]}
alignment: {m: {layer: 0, units: 0-3}}
training: {steps: 10, batch_size: 4}
evaluation: {every: 5, held_out: 0, triples: 16}
sweep: {seeds: [1, 2]}
)";

// One coordinator with its store, services and in-process channel.
class Env {
 public:
  Env() {
    char dir[] = "/tmp/graft-service-fuzz-XXXXXX";
    Require(mkdtemp(dir) != nullptr, "mkdtemp failed");
    dir_ = dir;
    auto table = server::TokenTable::Parse(TokensYaml(), "fuzz-tokens.yaml");
    Require(table.ok(), table.status().ToString());
    tokens_ = std::make_unique<server::LiveTokens>(std::move(*table));
    auto store = server::OpenSqliteJobStore(dir_ + "/graft.db", server::Durability::kNormal);
    Require(store.ok(), store.status().ToString());
    server::CoordinatorOptions options;
    options.data_dir = dir_;
    options.max_sweep_jobs = 8;
    options.max_artifact_bytes = 1 << 20;
    clock_ = server::CreateSystemClock();
    auto log = std::make_shared<spdlog::logger>("fuzz", std::make_shared<spdlog::sinks::null_sink_mt>());
    coordinator_ = std::make_unique<server::Coordinator>(std::move(*store), options, clock_.get(), log);
    Require(coordinator_->Start().ok(), "coordinator start");
    jobs_service_ = server::CreateJobsService(coordinator_.get(), tokens_.get());
    workers_service_ = server::CreateWorkersService(coordinator_.get(), tokens_.get());
    grpc::ServerBuilder builder;
    builder.RegisterService(jobs_service_.get());
    builder.RegisterService(workers_service_.get());
    server_ = builder.BuildAndStart();
    Require(server_ != nullptr, "in-process server");
    channel_ = server_->InProcessChannel(grpc::ChannelArguments());
    jobs_ = v1::Jobs::NewStub(channel_);
    workers_ = v1::Workers::NewStub(channel_);
    Seed();
  }
  ~Env() {
    jobs_.reset();
    workers_.reset();
    channel_.reset();
    server_->Shutdown(std::chrono::system_clock::now() + std::chrono::seconds(1));
    coordinator_->Shutdown();
    server_.reset();
    jobs_service_.reset();
    workers_service_.reset();
    coordinator_.reset();
    std::error_code ec;
    fs::remove_all(dir_, ec);
  }

  std::unique_ptr<grpc::ClientContext> Ctx(const Caller& who, int timeout_ms = 5000) {
    auto ctx = std::make_unique<grpc::ClientContext>();
    if (!who.authorization.empty()) ctx->AddMetadata("authorization", who.authorization);
    ctx->set_deadline(std::chrono::system_clock::now() + std::chrono::milliseconds(timeout_ms));
    return ctx;
  }
  v1::Jobs::Stub& jobs() { return *jobs_; }
  v1::Workers::Stub& workers() { return *workers_; }
  const std::string& db() const { return dir_; }

  // `PRAGMA integrity_check` on the store's file, and the number of stored jobs.
  void CheckStore() {
    sqlite3* db = nullptr;
    Require(sqlite3_open_v2((dir_ + "/graft.db").c_str(), &db, SQLITE_OPEN_READONLY, nullptr) == SQLITE_OK, "open");
    std::string integrity;
    int64_t jobs = -1;
    auto query = [&](const char* sql, std::function<void(sqlite3_stmt*)> row) {
      sqlite3_stmt* st = nullptr;
      Require(sqlite3_prepare_v2(db, sql, -1, &st, nullptr) == SQLITE_OK, sqlite3_errmsg(db));
      while (sqlite3_step(st) == SQLITE_ROW) row(st);
      sqlite3_finalize(st);
    };
    query("PRAGMA integrity_check", [&](sqlite3_stmt* st) {
      absl::StrAppend(&integrity, reinterpret_cast<const char*>(sqlite3_column_text(st, 0)));
    });
    query("SELECT COUNT(*) FROM jobs", [&](sqlite3_stmt* st) { jobs = sqlite3_column_int64(st, 0); });
    sqlite3_close(db);
    Require(integrity == "ok", "PRAGMA integrity_check: " + integrity);
    Require(jobs >= jobs_seen_, absl::StrCat("stored jobs went from ", jobs_seen_, " to ", jobs));
    jobs_seen_ = jobs;
  }

 private:
  // j-1 leased by node1's worker w-1-fuzz with result.json uploaded, j-2 queued, j-3 cancelled,
  // and a sweep s-4 of two queued jobs.
  void Seed() {
    const Caller& alice = Callers()[4];
    const Caller& node1 = Callers()[6];
    for (int i = 0; i < 3; ++i) {
      v1::SubmitJobRequest r;
      r.set_config_yaml(kSmallJob);
      v1::SubmitJobResponse o;
      Require(jobs_->SubmitJob(Ctx(alice).get(), r, &o).ok(), "seed submit");
    }
    v1::RegisterWorkerRequest reg;
    reg.set_host("fuzz");
    v1::RegisterWorkerResponse me;
    Require(workers_->RegisterWorker(Ctx(node1).get(), reg, &me).ok(), "seed register");
    v1::LeaseJobRequest lr;
    lr.set_worker_id(me.worker_id());
    lr.set_wait_ms(1000);
    v1::LeaseJobResponse lease;
    Require(workers_->LeaseJob(Ctx(node1).get(), lr, &lease).ok() && lease.job_id() == "j-1", "seed lease");
    {
      const std::string bytes = "{\"steps\": 10}";
      v1::UploadArtifactResponse o;
      auto ctx = Ctx(node1);
      auto wr = workers_->UploadArtifact(ctx.get(), &o);
      v1::UploadArtifactRequest h;
      h.mutable_header()->set_worker_id(me.worker_id());
      h.mutable_header()->set_job_id("j-1");
      h.mutable_header()->set_attempt(lease.attempt());
      h.mutable_header()->set_name("result.json");
      h.mutable_header()->set_total_bytes(static_cast<int64_t>(bytes.size()));
      h.mutable_header()->set_sha256(Sha256Hex(bytes));
      wr->Write(h);
      v1::UploadArtifactRequest d;
      d.set_data(bytes);
      wr->Write(d);
      wr->WritesDone();
      Require(wr->Finish().ok(), "seed upload");
    }
    v1::CancelJobRequest cr;
    cr.set_job_id("j-3");
    v1::Job cancelled;
    Require(jobs_->CancelJob(Ctx(alice).get(), cr, &cancelled).ok(), "seed cancel");
    v1::SubmitJobRequest sr;
    sr.set_config_yaml(kSmallSweep);
    v1::SubmitJobResponse so;
    Require(jobs_->SubmitJob(Ctx(alice).get(), sr, &so).ok(), "seed sweep");
    CheckStore();
  }

  std::string dir_;
  std::unique_ptr<server::LiveTokens> tokens_;
  std::unique_ptr<server::Clock> clock_;
  std::unique_ptr<server::Coordinator> coordinator_;
  std::unique_ptr<v1::Jobs::CallbackService> jobs_service_;
  std::unique_ptr<v1::Workers::CallbackService> workers_service_;
  std::unique_ptr<grpc::Server> server_;
  std::shared_ptr<grpc::Channel> channel_;
  std::unique_ptr<v1::Jobs::Stub> jobs_;
  std::unique_ptr<v1::Workers::Stub> workers_;
  int64_t jobs_seen_ = 0;
};

template <typename Message>
bool Decode(const std::string& bytes, Message* m) {
  return m->ParseFromString(bytes);
}

template <typename Reader, typename Event>
grpc::Status Drain(Reader& rd, Event* e) {
  while (rd->Read(e)) {
  }
  return rd->Finish();
}

// Decodes the request and makes the call; false when the bytes are not a request of this kind.
using RpcCall = std::function<bool(Env&, const Caller&, const std::string&, grpc::Status*)>;

struct Rpc {
  const char* name;
  bool worker_service;
  bool stream;  // a watch: DEADLINE_EXCEEDED from the harness's own deadline is allowed
  RpcCall call;
};

// A unary call of one of the two stubs (`stub`: &Env::jobs or &Env::workers).
template <typename Stub, typename Req, typename Resp>
RpcCall Unary(Stub& (Env::*stub)(), grpc::Status (Stub::*method)(grpc::ClientContext*, const Req&, Resp*),
              int timeout_ms = 5000) {
  return [stub, method, timeout_ms](Env& env, const Caller& who, const std::string& b, grpc::Status* s) {
    Req r;
    Resp o;
    if (!Decode(b, &r)) return false;
    *s = ((env.*stub)().*method)(env.Ctx(who, timeout_ms).get(), r, &o);
    return true;
  };
}

// A server-streaming call, read to its end.
template <typename Stub, typename Req, typename Event>
RpcCall Streamed(Stub& (Env::*stub)(),
                 std::unique_ptr<grpc::ClientReader<Event>> (Stub::*method)(grpc::ClientContext*, const Req&),
                 int timeout_ms = 5000) {
  return [stub, method, timeout_ms](Env& env, const Caller& who, const std::string& b, grpc::Status* s) {
    Req r;
    if (!Decode(b, &r)) return false;
    auto ctx = env.Ctx(who, timeout_ms);
    auto rd = ((env.*stub)().*method)(ctx.get(), r);
    Event e;
    *s = Drain(rd, &e);
    return true;
  };
}

const std::vector<Rpc>& Rpcs() {
  static const std::vector<Rpc> rpcs = {
      {"SubmitJob", false, false, Unary(&Env::jobs, &v1::Jobs::Stub::SubmitJob, 20000)},
      {"GetJob", false, false, Unary(&Env::jobs, &v1::Jobs::Stub::GetJob)},
      {"ListJobs", false, false, Unary(&Env::jobs, &v1::Jobs::Stub::ListJobs)},
      {"CancelJob", false, false, Unary(&Env::jobs, &v1::Jobs::Stub::CancelJob)},
      {"WatchJob", false, true, Streamed(&Env::jobs, &v1::Jobs::Stub::WatchJob, 20)},
      {"WatchSweep", false, true, Streamed(&Env::jobs, &v1::Jobs::Stub::WatchSweep, 20)},
      {"CancelSweep", false, false, Unary(&Env::jobs, &v1::Jobs::Stub::CancelSweep)},
      {"GetMetrics", false, false, Unary(&Env::jobs, &v1::Jobs::Stub::GetMetrics)},
      {"DownloadArtifact", false, false, Streamed(&Env::jobs, &v1::Jobs::Stub::DownloadArtifact)},
      {"GetServerInfo", false, false, Unary(&Env::jobs, &v1::Jobs::Stub::GetServerInfo)},
      {"ListWorkers", false, false, Unary(&Env::jobs, &v1::Jobs::Stub::ListWorkers)},
      {"RegisterWorker", true, false, Unary(&Env::workers, &v1::Workers::Stub::RegisterWorker)},
      {"LeaseJob", true, false,
       [](Env& env, const Caller& who, const std::string& b, grpc::Status* s) {
         v1::LeaseJobRequest r;
         v1::LeaseJobResponse o;
         if (!Decode(b, &r)) return false;
         r.set_wait_ms(std::min<int64_t>(std::max<int64_t>(r.wait_ms(), 0), 5));
         *s = env.workers().LeaseJob(env.Ctx(who).get(), r, &o);
         return true;
       }},
      {"Report", true, false, Unary(&Env::workers, &v1::Workers::Stub::Report)},
      {"FetchCheckpoint", true, false, Streamed(&Env::workers, &v1::Workers::Stub::FetchCheckpoint)},
      {"UploadArtifact", true, false,
       [](Env& env, const Caller& who, const std::string& b, grpc::Status* s) {
         // The bytes are the messages of the stream, each prefixed by its length (one byte).
         std::vector<v1::UploadArtifactRequest> parts;
         for (size_t at = 0; at < b.size() && parts.size() < 8;) {
           const size_t n = static_cast<unsigned char>(b[at]);
           v1::UploadArtifactRequest r;
           if (!r.ParseFromString(b.substr(at + 1, n))) return false;
           parts.push_back(std::move(r));
           at += 1 + n;
         }
         v1::UploadArtifactResponse o;
         auto ctx = env.Ctx(who);
         auto wr = env.workers().UploadArtifact(ctx.get(), &o);
         for (const auto& p : parts) {
           if (!wr->Write(p)) break;
         }
         wr->WritesDone();
         *s = wr->Finish();
         return true;
       }},
      {"FinishJob", true, false, Unary(&Env::workers, &v1::Workers::Stub::FinishJob)},
      {"DeregisterWorker", true, false, Unary(&Env::workers, &v1::Workers::Stub::DeregisterWorker)},
  };
  return rpcs;
}

// The codes a request may get (graft.proto's list, plus DATA_LOSS for artifacts).
bool Documented(StatusCode c) {
  switch (c) {
    case StatusCode::OK:
    case StatusCode::INVALID_ARGUMENT:
    case StatusCode::NOT_FOUND:
    case StatusCode::FAILED_PRECONDITION:
    case StatusCode::UNAUTHENTICATED:
    case StatusCode::PERMISSION_DENIED:
    case StatusCode::RESOURCE_EXHAUSTED:
    case StatusCode::DATA_LOSS:
      return true;
    default:
      return false;
  }
}

std::unique_ptr<Env>& TheEnv() {
  static std::unique_ptr<Env> env;
  return env;
}

// The seed corpus: requests as graft and graft-worker send them, against the seeded store.
void WriteSeeds(const std::string& dir) {
  fs::create_directories(dir);
  int n = 0;
  auto put = [&](int rpc, int caller, const google::protobuf::Message& m) {
    std::string bytes = std::string(1, static_cast<char>(rpc)) + std::string(1, static_cast<char>(caller));
    bytes += m.SerializeAsString();
    std::ofstream(absl::StrCat(dir, "/seed-", Rpcs()[rpc].name, "-", Callers()[caller].label, "-", n++),
                  std::ios::binary)
        << bytes;
  };
  auto index = [](const std::string& name) {
    for (size_t i = 0; i < Rpcs().size(); ++i) {
      if (Rpcs()[i].name == name) return static_cast<int>(i);
    }
    Broken("no rpc " + name);
  };
  const int alice = 4, bob = 5, node1 = 6, node2 = 7, root = 8;
  v1::SubmitJobRequest submit;
  submit.set_config_yaml(kSmallJob);
  submit.set_source_name("fuzz.yaml");
  submit.add_overrides("training.steps=20");
  (*submit.mutable_labels())["team"] = "routing";
  put(index("SubmitJob"), alice, submit);
  v1::SubmitJobRequest sweep;
  sweep.set_config_yaml(kSmallSweep);
  put(index("SubmitJob"), root, sweep);
  for (const char* id : {"j-1", "j-2", "j-3", "j-999"}) {
    v1::GetJobRequest g;
    g.set_job_id(id);
    put(index("GetJob"), alice, g);
    v1::CancelJobRequest c;
    c.set_job_id(id);
    c.set_reason("fuzz");
    put(index("CancelJob"), bob, c);
    v1::WatchJobRequest w;
    w.set_job_id(id);
    w.set_from_step(5);
    put(index("WatchJob"), alice, w);
    v1::GetMetricsRequest m;
    m.set_job_id(id);
    put(index("GetMetrics"), root, m);
    v1::DownloadArtifactRequest d;
    d.set_job_id(id);
    d.set_name("result.json");
    put(index("DownloadArtifact"), alice, d);
  }
  v1::ListJobsRequest list;
  list.set_state(v1::JOB_STATE_QUEUED);
  list.set_owner("alice");
  list.set_page_size(2);
  (*list.mutable_labels())["team"] = "routing";
  put(index("ListJobs"), bob, list);
  v1::WatchSweepRequest ws;
  ws.set_sweep_id("s-4");
  put(index("WatchSweep"), alice, ws);
  v1::CancelSweepRequest cs;
  cs.set_sweep_id("s-4");
  put(index("CancelSweep"), root, cs);
  put(index("GetServerInfo"), alice, v1::GetServerInfoRequest());
  v1::ListWorkersRequest lw;
  lw.set_include_gone(true);
  put(index("ListWorkers"), bob, lw);
  v1::RegisterWorkerRequest reg;
  reg.set_host("node");
  reg.set_cores(2);
  reg.set_threads(1);
  reg.set_version("0.1.0");
  reg.set_slurm_job_id("4713");
  reg.set_slurm_array_job_id("4700");
  reg.set_slurm_array_task_id("3");
  put(index("RegisterWorker"), node2, reg);
  v1::LeaseJobRequest lease;
  lease.set_worker_id("w-1-fuzz");
  lease.set_wait_ms(5);
  put(index("LeaseJob"), node1, lease);
  for (int who : {node1, node2}) {
    v1::ReportRequest rep;
    rep.set_worker_id("w-1-fuzz");
    rep.set_job_id("j-1");
    rep.set_attempt(1);
    rep.set_step(5);
    auto* p = rep.add_points();
    p->set_step(5);
    p->set_metrics_json("{\"step\": 5, \"iia_held_out\": {\"value\": 0.5}}");
    put(index("Report"), who, rep);
    v1::FetchCheckpointRequest f;
    f.set_worker_id("w-1-fuzz");
    f.set_job_id("j-1");
    f.set_attempt(1);
    put(index("FetchCheckpoint"), who, f);
    v1::FinishJobRequest fin;
    fin.set_worker_id("w-1-fuzz");
    fin.set_job_id("j-1");
    fin.set_attempt(1);
    fin.set_succeeded_result_json("{\"steps\": 10}");
    put(index("FinishJob"), who, fin);
    v1::FinishJobRequest back = fin;
    back.set_handed_back_reason("SIGTERM");
    put(index("FinishJob"), who, back);
    v1::DeregisterWorkerRequest dr;
    dr.set_worker_id("w-1-fuzz");
    dr.set_reason("idle");
    put(index("DeregisterWorker"), who, dr);
  }
  {
    // An upload stream: a header and one data message, each prefixed by its length.
    const std::string bytes = "{\"steps\": 10}";
    v1::UploadArtifactRequest h;
    h.mutable_header()->set_worker_id("w-1-fuzz");
    h.mutable_header()->set_job_id("j-1");
    h.mutable_header()->set_attempt(1);
    h.mutable_header()->set_name("metrics.jsonl");
    h.mutable_header()->set_total_bytes(static_cast<int64_t>(bytes.size()));
    h.mutable_header()->set_sha256(Sha256Hex(bytes));
    v1::UploadArtifactRequest d;
    d.set_data(bytes);
    std::string stream;
    for (const auto* m : {&h, &d}) {
      const std::string s = m->SerializeAsString();
      stream += std::string(1, static_cast<char>(s.size())) + s;
    }
    std::ofstream(absl::StrCat(dir, "/seed-UploadArtifact-node1-", n++), std::ios::binary)
        << std::string(1, static_cast<char>(index("UploadArtifact"))) << std::string(1, static_cast<char>(node1))
        << stream;
  }
}

}  // namespace
}  // namespace graft::fuzz

extern "C" int LLVMFuzzerInitialize(int*, char***) {
  using namespace graft::fuzz;
  if (const char* dir = std::getenv("GRAFT_FUZZ_WRITE_SEEDS")) {
    WriteSeeds(dir);
    std::exit(0);
  }
  TheEnv() = std::make_unique<Env>();
  std::atexit([] { TheEnv().reset(); });
  return 0;
}

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  using namespace graft::fuzz;
  static int inputs = 0;
  if (size < 2) return 0;
  const Rpc& rpc = Rpcs()[data[0] % Rpcs().size()];
  const Caller& who = Callers()[data[1] % Callers().size()];
  const std::string bytes(reinterpret_cast<const char*>(data) + 2, size - 2);
  grpc::Status s;
  Env& env = *TheEnv();
  if (!rpc.call(env, who, bytes, &s)) return 0;
  const StatusCode code = s.error_code();
  const std::string what = absl::StrCat(rpc.name, " as ", who.label, ": ", static_cast<int>(code), " ", s.error_message());
  Require(Documented(code) || (rpc.stream && code == StatusCode::DEADLINE_EXCEEDED), "undocumented status: " + what);
  if (who.role == Caller::kNone) Require(code == StatusCode::UNAUTHENTICATED, "no valid token, yet " + what);
  if (who.role != Caller::kNone && (who.role == Caller::kWorker) != rpc.worker_service) {
    Require(code == StatusCode::PERMISSION_DENIED, "a role outside the service, yet " + what);
  }
  ++inputs;
  if (inputs % kCheckEvery == 0) env.CheckStore();
  if (inputs % kResetEvery == 0) {
    env.CheckStore();
    TheEnv() = std::make_unique<Env>();
  }
  return 0;
}
