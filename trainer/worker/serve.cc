#include "trainer/worker/serve.h"

#include <sys/statvfs.h>
#include <unistd.h>

#include <algorithm>
#include <chrono>
#include <cstdlib>
#include <condition_variable>
#include <deque>
#include <filesystem>
#include <fstream>
#include <mutex>
#include <sstream>
#include <thread>

#include <grpcpp/grpcpp.h>

#include "absl/strings/str_cat.h"
#include "graft/v1/graft.grpc.pb.h"
#include "proto/sha256.h"
#include "proto/tls.h"
#include "configs/reader/spec.h"
#include "trainer/train/analysis.h"
#include "trainer/train/trainer.h"
#include "trainer/worker/commands.h"

namespace graft::worker {
namespace {

namespace fs = std::filesystem;
using Clock = std::chrono::steady_clock;

// " (N bytes free in DIR)", for messages about a directory that cannot be written.
std::string FreeSpace(const std::string& dir) {
  struct statvfs st;
  if (statvfs(dir.c_str(), &st) != 0) return "";
  const unsigned long long free_bytes = static_cast<unsigned long long>(st.f_bavail) * st.f_frsize;
  return absl::StrCat(" (", free_bytes, " bytes free in ", dir, ")");
}

bool Retryable(const grpc::Status& s) {
  return s.error_code() == grpc::StatusCode::UNAVAILABLE || s.error_code() == grpc::StatusCode::DEADLINE_EXCEEDED ||
         s.error_code() == grpc::StatusCode::RESOURCE_EXHAUSTED;
}

// The connection to the coordinator, with the token attached to every call.
class Link {
 public:
  Link(const std::string& server, tls::ClientCredentials credentials, std::string token, std::ostream& err)
      : server_(server),
        credentials_(std::move(credentials)),
        stub_(v1::Workers::NewStub(tls::CreateChannel(server, credentials_))),
        token_(std::move(token)),
        err_(err) {}

  std::unique_ptr<grpc::ClientContext> Context(int64_t timeout_ms) {
    auto ctx = std::make_unique<grpc::ClientContext>();
    ctx->AddMetadata("authorization", "Bearer " + token_);
    ctx->set_deadline(std::chrono::system_clock::now() + std::chrono::milliseconds(timeout_ms));
    return ctx;
  }

  // Calls `call` until it returns a non-retryable status, `stop` is set, or `give_up_ms`
  // passes; waits with exponential backoff (0.2 s doubling to 5 s) between tries.
  template <typename Call>
  grpc::Status Retry(const char* what, Call call, const std::atomic<bool>* stop, int64_t give_up_ms) {
    const auto start = Clock::now();
    int64_t backoff = 200;
    for (;;) {
      grpc::Status s = call();
      if (s.ok()) connected_ = true;
      if (!Retryable(s)) return s;
      std::string why = s.error_message();
      if (s.error_code() == grpc::StatusCode::UNAVAILABLE) {
        // gRPC says only that the handshake failed; a handshake of our own names the cause. Before
        // the first successful call a misconfiguration is final: retrying cannot mend it.
        const tls::Diagnosis d = tls::Diagnose(server_, credentials_);
        if (d.misconfigured && !connected_) {
          return grpc::Status(grpc::StatusCode::FAILED_PRECONDITION,
                              absl::StrCat("cannot connect to the coordinator at ", server_, ": ", d.message,
                                           " (a TLS setting, not an outage: not retrying)"));
        }
        if (!d.message.empty()) why = d.message;
      }
      const int64_t elapsed =
          std::chrono::duration_cast<std::chrono::milliseconds>(Clock::now() - start).count();
      if ((stop != nullptr && stop->load()) || elapsed > give_up_ms) return s;
      err_ << "graft-worker: " << what << ": coordinator unavailable (" << why << "); retrying in "
           << backoff << " ms\n";
      std::this_thread::sleep_for(std::chrono::milliseconds(backoff));
      backoff = std::min<int64_t>(backoff * 2, 5000);
    }
  }

  v1::Workers::Stub& stub() { return *stub_; }

 private:
  const std::string server_;
  const tls::ClientCredentials credentials_;
  bool connected_ = false;  // a call through Retry has succeeded
  std::unique_ptr<v1::Workers::Stub> stub_;
  std::string token_;
  std::ostream& err_;
};

// One leased job: training, reporting and uploads.
class JobRun {
 public:
  JobRun(Link& link, const ServeArgs& args, std::string worker_id, const v1::LeaseJobResponse& lease,
         const std::atomic<bool>* process_stop, std::ostream& err)
      : link_(link), args_(args), worker_id_(std::move(worker_id)), lease_(lease), process_stop_(process_stop), err_(err) {}

  void Execute();
  // True when the job was handed back because this worker's work dir cannot be written (a full
  // or read-only disk): the worker should stop rather than lease work it cannot do.
  bool work_dir_failed() const { return work_dir_failed_; }

 private:
  // Sends pending points and progress; returns false when the coordinator could not be reached.
  bool ReportNow();
  void ReporterLoop();
  grpc::Status UploadFile(const std::string& name, const std::string& path, int64_t step);
  grpc::Status FetchCheckpoint(const std::string& path);
  void FinishWith(v1::FinishJobRequest request);
  void FlushPoints(int64_t give_up_ms);
  // Runs the spec's `scan:` and `das:` blocks on the trained network in `dir`, as `graft-worker
  // run` does, with the job's threads capped by --threads. Fails naming the analysis.
  absl::Status AnalyseTrained(const config::ResolvedJob& job, const fs::path& dir);

  Link& link_;
  const ServeArgs& args_;
  const std::string worker_id_;
  const v1::LeaseJobResponse lease_;
  const std::atomic<bool>* process_stop_;
  std::ostream& err_;

  std::mutex mu_;
  std::deque<v1::Point> pending_;  // guarded by mu_: not yet acknowledged
  std::atomic<int64_t> step_{0};
  std::atomic<bool> halt_{false};       // tells the trainer to checkpoint and stop
  std::atomic<bool> cancelled_{false};  // the coordinator said stop
  std::atomic<bool> superseded_{false}; // this attempt is no longer current
  std::atomic<bool> reporter_done_{false};
  bool work_dir_failed_ = false;
  std::mutex report_mu_;                // one Report in flight at a time
  std::condition_variable wake_;
};

bool JobRun::ReportNow() {
  std::lock_guard<std::mutex> one(report_mu_);
  v1::ReportRequest req;
  req.set_worker_id(worker_id_);
  req.set_job_id(lease_.job_id());
  req.set_attempt(lease_.attempt());
  req.set_step(step_.load());
  {
    std::lock_guard<std::mutex> lock(mu_);
    for (const auto& p : pending_) *req.add_points() = p;
  }
  v1::ReportResponse resp;
  auto ctx = link_.Context(10000);
  grpc::Status s = link_.stub().Report(ctx.get(), req, &resp);
  if (!s.ok()) {
    if (s.error_code() == grpc::StatusCode::FAILED_PRECONDITION || s.error_code() == grpc::StatusCode::NOT_FOUND) {
      err_ << "graft-worker: " << lease_.job_id() << ": " << s.error_message() << "\n";
      superseded_ = true;
      halt_ = true;
    }
    return false;
  }
  {
    std::lock_guard<std::mutex> lock(mu_);
    while (!pending_.empty() && pending_.front().step() <= resp.acknowledged_step()) pending_.pop_front();
  }
  if (resp.stop()) {
    if (!cancelled_) err_ << "graft-worker: " << lease_.job_id() << ": stopping: " << resp.stop_reason() << "\n";
    cancelled_ = true;
    halt_ = true;
  }
  return true;
}

void JobRun::ReporterLoop() {
  auto last = Clock::now();
  std::unique_lock<std::mutex> lock(mu_);
  while (!reporter_done_) {
    wake_.wait_for(lock, std::chrono::milliseconds(100));
    if (reporter_done_) break;
    if (process_stop_->load()) halt_ = true;
    if (Clock::now() - last >= std::chrono::milliseconds(args_.heartbeat_ms) || !pending_.empty()) {
      lock.unlock();
      ReportNow();
      last = Clock::now();
      lock.lock();
    }
  }
}

grpc::Status JobRun::UploadFile(const std::string& name, const std::string& path, int64_t step) {
  return link_.Retry(
      "upload", [&]() {
        int64_t bytes = 0;
        const std::string sha = Sha256File(path, &bytes);
        auto ctx = link_.Context(120000);
        v1::UploadArtifactResponse resp;
        auto writer = link_.stub().UploadArtifact(ctx.get(), &resp);
        v1::UploadArtifactRequest req;
        v1::ArtifactHeader* h = req.mutable_header();
        h->set_worker_id(worker_id_);
        h->set_job_id(lease_.job_id());
        h->set_attempt(lease_.attempt());
        h->set_name(name);
        h->set_total_bytes(bytes);
        h->set_sha256(sha);
        h->set_step(step);
        bool ok = writer->Write(req);
        std::ifstream in(path, std::ios::binary);
        std::string buf(1 << 20, '\0');
        while (ok && in) {
          in.read(buf.data(), static_cast<std::streamsize>(buf.size()));
          const std::streamsize n = in.gcount();
          if (n <= 0) break;
          v1::UploadArtifactRequest chunk;
          chunk.set_data(buf.data(), static_cast<size_t>(n));
          ok = writer->Write(chunk);
        }
        writer->WritesDone();
        return writer->Finish();
      },
      nullptr, 120000);
}

grpc::Status JobRun::FetchCheckpoint(const std::string& path) {
  return link_.Retry(
      "fetch checkpoint", [&]() {
        v1::FetchCheckpointRequest req;
        req.set_worker_id(worker_id_);
        req.set_job_id(lease_.job_id());
        req.set_attempt(lease_.attempt());
        auto ctx = link_.Context(120000);
        auto reader = link_.stub().FetchCheckpoint(ctx.get(), req);
        std::ofstream out(path, std::ios::binary | std::ios::trunc);
        v1::ArtifactChunk chunk;
        std::string sha;
        while (reader->Read(&chunk)) {
          if (!chunk.sha256().empty()) sha = chunk.sha256();
          out.write(chunk.data().data(), static_cast<std::streamsize>(chunk.data().size()));
        }
        out.close();
        grpc::Status s = reader->Finish();
        if (!s.ok()) return s;
        if (!out) {  // ABORTED: not retried, and read as this worker's disk below
          return grpc::Status(grpc::StatusCode::ABORTED,
                              absl::StrCat(path, ": cannot write the fetched checkpoint",
                                           FreeSpace(fs::path(path).parent_path().string())));
        }
        int64_t bytes = 0;
        if (Sha256File(path, &bytes) != sha) return grpc::Status(grpc::StatusCode::DATA_LOSS, "checkpoint checksum mismatch");
        return grpc::Status::OK;
      },
      process_stop_, 120000);
}

void JobRun::FlushPoints(int64_t give_up_ms) {
  const auto start = Clock::now();
  int64_t backoff = 200;
  for (;;) {
    {
      std::lock_guard<std::mutex> lock(mu_);
      if (pending_.empty()) return;
    }
    if (superseded_) return;
    ReportNow();
    {
      std::lock_guard<std::mutex> lock(mu_);
      if (pending_.empty()) return;
    }
    if (Clock::now() - start > std::chrono::milliseconds(give_up_ms)) {
      err_ << "graft-worker: " << lease_.job_id() << ": could not deliver " << pending_.size() << " points\n";
      return;
    }
    std::this_thread::sleep_for(std::chrono::milliseconds(backoff));
    backoff = std::min<int64_t>(backoff * 2, 5000);
  }
}

void JobRun::FinishWith(v1::FinishJobRequest request) {
  request.set_worker_id(worker_id_);
  request.set_job_id(lease_.job_id());
  request.set_attempt(lease_.attempt());
  grpc::Status s = link_.Retry(
      "finish", [&]() {
        auto ctx = link_.Context(10000);
        v1::FinishJobResponse resp;
        return link_.stub().FinishJob(ctx.get(), request, &resp);
      },
      nullptr, 120000);
  if (!s.ok()) err_ << "graft-worker: " << lease_.job_id() << ": finish refused: " << s.error_message() << "\n";
}

void JobRun::Execute() {
  const fs::path dir = fs::path(args_.work_dir) / absl::StrCat(lease_.job_id(), "-attempt", lease_.attempt());
  std::error_code ec;
  fs::remove_all(dir, ec);
  fs::create_directories(dir, ec);
  err_ << "graft-worker: leased " << lease_.job_id() << " attempt " << lease_.attempt()
       << (lease_.resume_step() > 0 ? absl::StrCat(", resuming from step ", lease_.resume_step()) : "") << "\n";
  auto job = config::LoadJobFromText(lease_.spec_yaml(), "spec.yaml", {});
  if (!job.ok()) {
    v1::FinishJobRequest r;
    r.set_failed_reason(absl::StrCat("the worker could not load the spec: ", job.status().message()));
    FinishWith(r);
    return;
  }
  train::RunOptions options;
  options.out_dir = dir.string();
  if (lease_.resume_step() > 0) {
    grpc::Status s = FetchCheckpoint((dir / "checkpoint.pt").string());
    if (!s.ok()) {
      err_ << "graft-worker: " << lease_.job_id() << ": cannot fetch the checkpoint (" << s.error_message()
           << "); handing the job back\n";
      work_dir_failed_ = s.error_code() == grpc::StatusCode::ABORTED;
      v1::FinishJobRequest r;
      r.set_handed_back_reason(work_dir_failed_
                                   ? "the worker's work dir cannot be written: " + s.error_message()
                                   : "checkpoint fetch failed: " + s.error_message());
      FinishWith(r);
      return;
    }
    options.resume_dir = dir.string();
  }
  options.stop_requested = &halt_;
  options.max_threads = args_.threads;
  options.on_evaluation = [this](int64_t step, const std::string& line) {
    v1::Point p;
    p.set_step(step);
    p.set_attempt(lease_.attempt());
    p.set_metrics_json(line);
    {
      std::lock_guard<std::mutex> lock(mu_);
      pending_.push_back(std::move(p));
    }
    step_ = step;
    ReportNow();  // at every evaluation, so a cancellation is seen within one interval
  };
  options.on_checkpoint = [this, &dir](int64_t step) {
    grpc::Status s = UploadFile("checkpoint.pt", (dir / "checkpoint.pt").string(), step);
    if (!s.ok()) err_ << "graft-worker: checkpoint upload failed: " << s.error_message() << "\n";
  };
  options.on_step = [this](int64_t step) { step_ = step; };

  std::thread reporter([this] { ReporterLoop(); });
  auto outcome = train::Train(*job, options);
  // Analysis blocks run while the reporter still renews the lease (a DAS search takes seconds).
  absl::Status analysed = absl::OkStatus();
  if (outcome.ok() && outcome->kind == train::RunOutcome::Kind::kFinished && !halt_) {
    analysed = AnalyseTrained(*job, dir);
  }
  {
    std::lock_guard<std::mutex> lock(mu_);
    reporter_done_ = true;
  }
  wake_.notify_all();
  reporter.join();

  if (superseded_) {
    err_ << "graft-worker: " << lease_.job_id() << " attempt " << lease_.attempt() << " dropped (superseded)\n";
    return;
  }
  FlushPoints(120000);
  v1::FinishJobRequest r;
  if (!outcome.ok() && absl::IsUnavailable(outcome.status())) {
    // The trainer could not write its run directory (a full or read-only disk here): not the
    // job's fault, so it goes back to the queue for a worker with room.
    work_dir_failed_ = true;
    const std::string why = absl::StrCat("the worker's work dir cannot be written: ", outcome.status().message(),
                                         FreeSpace(args_.work_dir));
    err_ << "graft-worker: " << lease_.job_id() << ": " << why << "; handing the job back\n";
    r.set_handed_back_reason(why);
  } else if (!outcome.ok()) {
    r.set_failed_reason(std::string(outcome.status().message()));
  } else if (!analysed.ok()) {
    r.set_failed_reason(std::string(analysed.message()));
  } else if (outcome->kind == train::RunOutcome::Kind::kInterrupted) {
    if (cancelled_) {
      r.set_stopped_reason(absl::StrCat("stopped at step ", outcome->step));
    } else {
      r.set_handed_back_reason(absl::StrCat("worker stopping (signal) at step ", outcome->step));
    }
  } else {
    // The scan and DAS files exist only when the spec has those blocks.
    std::vector<std::string> names = {"weights.pt", "metrics.jsonl", "spec.yaml", "failures.jsonl"};
    for (const char* optional : {"scan.json", "scan.tsv", "scan.svg", "das.json", "rotation.pt"}) {
      if (fs::exists(dir / optional)) names.push_back(optional);
    }
    names.push_back("result.json");
    for (const std::string& name : names) {
      grpc::Status s = UploadFile(name, (dir / name).string(), outcome->step);
      if (!s.ok()) {
        err_ << "graft-worker: upload of " << name << " failed: " << s.error_message() << "\n";
        r.set_failed_reason(absl::StrCat("upload of ", name, " failed: ", s.error_message()));
        FinishWith(r);
        return;
      }
    }
    std::ifstream in(dir / "result.json");
    std::stringstream ss;
    ss << in.rdbuf();
    r.set_succeeded_result_json(ss.str());
  }
  FinishWith(r);
  err_ << "graft-worker: " << lease_.job_id() << " attempt " << lease_.attempt() << " done\n";
  fs::remove_all(dir, ec);
}

absl::Status JobRun::AnalyseTrained(const config::ResolvedJob& job, const fs::path& dir) {
  if (!job.spec.scan.present && !job.spec.das.present) return absl::OkStatus();
  config::ResolvedJob capped = job;
  if (args_.threads > 0) capped.spec.training.threads = std::min(capped.spec.training.threads, args_.threads);
  train::AnalysisOptions options;
  options.weights_path = (dir / "weights.pt").string();
  options.out_dir = dir.string();
  if (job.spec.scan.present) {
    auto summary = train::ScanStored(capped, options);
    if (!summary.ok()) {
      return absl::Status(summary.status().code(), absl::StrCat("scan after training: ", summary.status().message()));
    }
    err_ << "graft-worker: " << lease_.job_id() << ": " << *summary;
  }
  if (job.spec.das.present) {
    auto summary = train::DasStored(capped, options);
    if (!summary.ok()) {
      return absl::Status(summary.status().code(), absl::StrCat("DAS after training: ", summary.status().message()));
    }
    err_ << "graft-worker: " << lease_.job_id() << ": " << *summary;
  }
  return absl::OkStatus();
}

}  // namespace

int ServeCommand(const ServeArgs& args_in, const std::atomic<bool>* stop, std::ostream& err) {
  ServeArgs args = args_in;
  std::ifstream tf(args.token_file);
  std::string token;
  if (!tf || !(tf >> token) || token.empty()) {
    err << "graft-worker: cannot read a token from '" << args.token_file << "'\n";
    return kExitInvalidConfig;
  }
  if (args.work_dir.empty()) {
    args.work_dir = (fs::temp_directory_path() / absl::StrCat("graft-worker-", getpid())).string();
  }
  auto credentials = tls::LoadClientCredentials({args.ca_file, args.cert_file, args.key_file, args.tls_server_name});
  if (!credentials.ok()) {
    err << "graft-worker: " << credentials.status().message() << "\n";
    return kExitInvalidConfig;
  }
  Link link(args.server, std::move(*credentials), token, err);
  char host[256] = {0};
  gethostname(host, sizeof(host) - 1);

  std::string worker_id;
  auto register_worker = [&]() -> bool {
    v1::RegisterWorkerRequest req;
    req.set_host(host);
    req.set_cores(static_cast<int32_t>(std::thread::hardware_concurrency()));
    req.set_threads(args.threads);
    req.set_version(GRAFT_WORKER_VERSION);
    auto env = [](const char* name) -> std::string {
      const char* v = std::getenv(name);
      return v == nullptr ? "" : v;
    };
    req.set_slurm_job_id(env("SLURM_JOB_ID"));
    req.set_slurm_array_job_id(env("SLURM_ARRAY_JOB_ID"));
    req.set_slurm_array_task_id(env("SLURM_ARRAY_TASK_ID"));
    v1::RegisterWorkerResponse resp;
    grpc::Status s = link.Retry(
        "register", [&]() {
          auto ctx = link.Context(10000);
          return link.stub().RegisterWorker(ctx.get(), req, &resp);
        },
        stop, INT64_MAX);
    if (!s.ok()) {
      if (!stop->load()) err << "graft-worker: register refused: " << s.error_message() << "\n";
      return false;
    }
    worker_id = resp.worker_id();
    err << "graft-worker: registered as " << worker_id << " with " << args.server << " (lease " << resp.lease_seconds()
        << " s" << (req.slurm_job_id().empty() ? "" : ", Slurm job " + req.slurm_job_id()) << ")\n";
    return true;
  };
  if (!register_worker()) return stop->load() ? kExitOk : kExitFailure;
  // Tells the coordinator this worker is leaving (best effort: a few seconds at most).
  auto deregister = [&](const std::string& reason) {
    v1::DeregisterWorkerRequest req;
    req.set_worker_id(worker_id);
    req.set_reason(reason);
    v1::DeregisterWorkerResponse resp;
    auto ctx = link.Context(5000);
    grpc::Status s = link.stub().DeregisterWorker(ctx.get(), req, &resp);
    if (!s.ok()) err << "graft-worker: deregister: " << s.error_message() << "\n";
  };

  auto idle_since = Clock::now();
  while (!stop->load()) {
    int64_t wait_ms = 5000;
    if (args.idle_exit_s > 0) {
      const int64_t idle_ms =
          std::chrono::duration_cast<std::chrono::milliseconds>(Clock::now() - idle_since).count();
      const int64_t left_ms = args.idle_exit_s * 1000 - idle_ms;
      if (left_ms <= 0) {
        const std::string reason = absl::StrCat("idle for ", args.idle_exit_s, " s (--idle-exit)");
        err << "graft-worker: nothing to lease for " << args.idle_exit_s << " s; leaving\n";
        deregister(reason);
        err << "graft-worker: stopped\n";
        return kExitOk;
      }
      wait_ms = std::clamp<int64_t>(left_ms, 1, 5000);
    }
    v1::LeaseJobRequest req;
    req.set_worker_id(worker_id);
    req.set_wait_ms(wait_ms);
    v1::LeaseJobResponse lease;
    grpc::Status s = link.Retry(
        "lease", [&]() {
          auto ctx = link.Context(15000);
          return link.stub().LeaseJob(ctx.get(), req, &lease);
        },
        stop, INT64_MAX);
    if (stop->load()) break;
    if (s.error_code() == grpc::StatusCode::NOT_FOUND) {
      if (!register_worker()) break;
      continue;
    }
    if (!s.ok()) {
      err << "graft-worker: lease refused: " << s.error_message() << "\n";
      return kExitFailure;
    }
    if (!lease.has_job()) continue;
    JobRun run(link, args, worker_id, lease, stop, err);
    run.Execute();
    if (run.work_dir_failed()) {
      err << "graft-worker: stopping: the work dir " << args.work_dir
          << " cannot be written; free space there (or give another --work-dir) and start the worker again\n";
      deregister("its work dir cannot be written");
      return kExitFailure;
    }
    idle_since = Clock::now();
  }
  deregister("stopped by a signal");
  err << "graft-worker: stopped\n";
  return kExitOk;
}

}  // namespace graft::worker
