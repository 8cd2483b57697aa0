// graft-load-bench: one graftd on loopback under a night's kind of traffic, for --seconds:
// --workers fake worker clients (one shared worker token, as a Slurm array has) leasing tiny jobs
// and reporting their points, --watchers clients watching running jobs to their end, and
// --pollers clients listing jobs every 50 ms, while a submitter keeps the queue from running dry.
// It prints the errors, the points a watcher missed (each watched job's stream against its stored
// points), the p50 and p99 of a lease's wait when jobs were queued and of a report's round trip,
// and graftd's resident memory at the end (VmRSS) and at its peak (VmHWM). The load generator runs
// on the same machine as graftd and shares its cores.
// Usage: graft-load-bench [--seconds 60] [--workers 64] [--watchers 8] [--pollers 4]
//                         [--graftd build/bin/graftd]
#include <signal.h>
#include <spawn.h>
#include <fcntl.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <atomic>
#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <future>
#include <iostream>
#include <mutex>
#include <random>
#include <set>
#include <sstream>
#include <string>
#include <thread>
#include <vector>

#include <grpcpp/grpcpp.h>

#include "graft/v1/graft.grpc.pb.h"
#include "proto/sha256.h"

namespace {

using Clock = std::chrono::steady_clock;
namespace fs = std::filesystem;

const char kUser[] = "load-user-token";
const char kWorker[] = "load-worker-token";

// A tiny job (nothing trains it: the fake workers only report) in a sweep of `seeds` seeds.
std::string SweepConfig(int first_seed, int seeds) {
  std::ostringstream s;
  s << "name: load\nalgorithm:\n  inputs: {a: [x, y], b: bool}\n  mechanisms: {m: \"a == x && b\"}\n"
       "  output: {o: {expr: m, classes: [no, yes]}}\nnetwork: {hidden: [8, 8]}\n"
       "alignment: {m: {layer: 0, units: 0-3}}\ntraining: {steps: 20, batch_size: 4}\n"
       "evaluation: {every: 5, held_out: 0, triples: 16}\nsweep: {seeds: [";
  for (int i = 0; i < seeds; ++i) s << (i ? ", " : "") << first_seed + i;
  s << "]}\n";
  return s.str();
}

struct Samples {
  std::mutex mu;
  std::vector<double> ms;
  void Add(double x) {
    std::lock_guard<std::mutex> lock(mu);
    ms.push_back(x);
  }
  double Quantile(double q) {
    std::lock_guard<std::mutex> lock(mu);
    if (ms.empty()) return 0;
    std::vector<double> v = ms;
    std::sort(v.begin(), v.end());
    const size_t i = std::min(v.size() - 1, static_cast<size_t>(q * static_cast<double>(v.size())));
    return v[i];
  }
  size_t size() {
    std::lock_guard<std::mutex> lock(mu);
    return ms.size();
  }
};

double Since(Clock::time_point t) { return std::chrono::duration<double, std::milli>(Clock::now() - t).count(); }

std::unique_ptr<grpc::ClientContext> Ctx(const char* token, int timeout_ms = 30000) {
  auto ctx = std::make_unique<grpc::ClientContext>();
  ctx->AddMetadata("authorization", std::string("Bearer ") + token);
  ctx->set_deadline(std::chrono::system_clock::now() + std::chrono::milliseconds(timeout_ms));
  return ctx;
}

long StatusKb(int pid, const char* key) {
  std::ifstream in("/proc/" + std::to_string(pid) + "/status");
  std::string line;
  while (std::getline(in, line)) {
    if (line.rfind(key, 0) == 0) return std::atol(line.c_str() + std::strlen(key));
  }
  return -1;
}

}  // namespace

int main(int argc, char** argv) {
  int seconds = 60, workers = 64, watchers = 8, pollers = 4;
  std::string graftd = "build/bin/graftd";
  for (int i = 1; i < argc; i += 2) {
    const std::string flag = argv[i];
    if (flag == "--help" || i + 1 == argc) {
      std::cerr << "usage: graft-load-bench [--seconds 60] [--workers 64] [--watchers 8] [--pollers 4] "
                   "[--graftd build/bin/graftd]\n";
      return flag == "--help" ? 0 : 3;
    }
    const std::string value = argv[i + 1];
    if (flag == "--seconds") seconds = std::atoi(value.c_str());
    else if (flag == "--workers") workers = std::atoi(value.c_str());
    else if (flag == "--watchers") watchers = std::atoi(value.c_str());
    else if (flag == "--pollers") pollers = std::atoi(value.c_str());
    else if (flag == "--graftd") graftd = value;
    else {
      std::cerr << "graft-load-bench: unknown flag " << flag << "\n";
      return 3;
    }
  }
  char tmpl[] = "/tmp/graft-load-XXXXXX";
  const std::string dir = mkdtemp(tmpl);
  {
    std::ofstream tokens(dir + "/tokens.yaml");
    tokens << "- {name: load, role: user, sha256: " << graft::Sha256Hex(kUser) << "}\n"
           << "- {name: nodes, role: worker, sha256: " << graft::Sha256Hex(kWorker) << "}\n";
  }
  std::vector<std::string> args = {graftd, "--listen", "127.0.0.1:0", "--data-dir", dir + "/data", "--tokens-file",
                                   dir + "/tokens.yaml", "--port-file", dir + "/port"};
  std::vector<char*> cargs;
  for (auto& a : args) cargs.push_back(a.data());
  cargs.push_back(nullptr);
  posix_spawn_file_actions_t fa;
  posix_spawn_file_actions_init(&fa);
  posix_spawn_file_actions_addopen(&fa, 2, (dir + "/graftd.log").c_str(), O_WRONLY | O_CREAT | O_TRUNC, 0600);
  pid_t pid = 0;
  if (posix_spawn(&pid, graftd.c_str(), &fa, nullptr, cargs.data(), environ) != 0) {
    std::cerr << "graft-load-bench: cannot start " << graftd << "\n";
    return 1;
  }
  int port = 0;
  for (int i = 0; i < 200 && port == 0; ++i) {
    std::ifstream in(dir + "/port");
    in >> port;
    if (port == 0) std::this_thread::sleep_for(std::chrono::milliseconds(50));
  }
  if (port == 0) {
    std::cerr << "graft-load-bench: graftd did not start; see " << dir << "/graftd.log\n";
    kill(pid, SIGKILL);
    return 1;
  }
  const std::string address = "127.0.0.1:" + std::to_string(port);
  // Clients on a few connections, as separate machines would be.
  auto channel = [&](int k) {
    grpc::ChannelArguments a;
    a.SetInt("graft.load.connection", k % 8);
    return grpc::CreateCustomChannel(address, grpc::InsecureChannelCredentials(), a);
  };

  std::atomic<bool> stop{false};
  std::atomic<int64_t> errors{0}, jobs_done{0}, points_reported{0}, lost{0}, watched{0}, polls{0};
  Samples lease_ms, report_ms;
  std::mutex error_mu;
  std::string first_error;
  auto error = [&](const std::string& what, const grpc::Status& s) {
    ++errors;
    std::lock_guard<std::mutex> lock(error_mu);
    if (first_error.empty()) first_error = what + ": " + std::to_string(s.error_code()) + " " + s.error_message();
  };

  // The submitter keeps at least 200 jobs queued, and says when the queue first holds them.
  std::promise<void> first_batch;
  bool first_batch_told = false;  // the submitter's own
  std::thread submitter([&] {
    auto jobs = graft::v1::Jobs::NewStub(channel(0));
    int seed = 1;
    while (!stop) {
      graft::v1::GetServerInfoRequest ir;
      graft::v1::ServerInfo info;
      grpc::Status s = jobs->GetServerInfo(Ctx(kUser).get(), ir, &info);
      if (!s.ok()) {
        error("GetServerInfo", s);
        continue;
      }
      if (info.queued_jobs() >= 200) {
        if (!first_batch_told) {
          first_batch_told = true;
          first_batch.set_value();
        }
        std::this_thread::sleep_for(std::chrono::milliseconds(20));
        continue;
      }
      graft::v1::SubmitJobRequest r;
      r.set_config_yaml(SweepConfig(seed, 100));
      seed += 100;
      graft::v1::SubmitJobResponse o;
      s = jobs->SubmitJob(Ctx(kUser).get(), r, &o);
      if (!s.ok()) error("SubmitJob", s);
    }
  });
  // The workers start against a queue: wait for the first batch (at most a minute).
  if (first_batch.get_future().wait_for(std::chrono::seconds(60)) != std::future_status::ready) {
    std::cerr << "graft-load-bench: the queue did not reach 200 jobs within 60 s; see " << dir << "/graftd.log\n";
    stop = true;
    submitter.join();
    kill(pid, SIGKILL);
    return 1;
  }
  const auto start = Clock::now();
  const auto end = start + std::chrono::seconds(seconds);

  std::vector<std::thread> threads;
  for (int w = 0; w < workers; ++w) {
    threads.emplace_back([&, w] {
      auto stub = graft::v1::Workers::NewStub(channel(w));
      graft::v1::RegisterWorkerRequest reg;
      reg.set_host("load-" + std::to_string(w));
      graft::v1::RegisterWorkerResponse me;
      grpc::Status s = stub->RegisterWorker(Ctx(kWorker).get(), reg, &me);
      if (!s.ok()) return error("RegisterWorker", s);
      while (Clock::now() < end) {
        graft::v1::LeaseJobRequest lr;
        lr.set_worker_id(me.worker_id());
        lr.set_wait_ms(2000);
        graft::v1::LeaseJobResponse lease;
        const auto t = Clock::now();
        s = stub->LeaseJob(Ctx(kWorker).get(), lr, &lease);
        if (!s.ok()) {
          error("LeaseJob", s);
          continue;
        }
        if (!lease.has_job()) continue;
        lease_ms.Add(Since(t));
        for (int step = 0; step <= 20; step += 5) {
          graft::v1::ReportRequest r;
          r.set_worker_id(me.worker_id());
          r.set_job_id(lease.job_id());
          r.set_attempt(lease.attempt());
          r.set_step(step);
          graft::v1::Point* p = r.add_points();
          p->set_step(step);
          p->set_metrics_json("{\"step\": " + std::to_string(step) + ", \"acc_held_out\": {\"value\": 0.5}}");
          graft::v1::ReportResponse o;
          const auto rt = Clock::now();
          s = stub->Report(Ctx(kWorker).get(), r, &o);
          if (!s.ok()) {
            error("Report", s);
            break;
          }
          report_ms.Add(Since(rt));
          ++points_reported;
        }
        graft::v1::FinishJobRequest f;
        f.set_worker_id(me.worker_id());
        f.set_job_id(lease.job_id());
        f.set_attempt(lease.attempt());
        f.set_succeeded_result_json("{\"steps\": 20}");
        graft::v1::FinishJobResponse fo;
        s = stub->FinishJob(Ctx(kWorker).get(), f, &fo);
        if (!s.ok()) error("FinishJob", s);
        else ++jobs_done;
      }
      graft::v1::DeregisterWorkerRequest d;
      d.set_worker_id(me.worker_id());
      graft::v1::DeregisterWorkerResponse dout;
      stub->DeregisterWorker(Ctx(kWorker).get(), d, &dout);
    });
  }
  for (int k = 0; k < watchers; ++k) {
    threads.emplace_back([&, k] {
      auto jobs = graft::v1::Jobs::NewStub(channel(k + 3));
      std::mt19937 rng(k);
      while (Clock::now() < end) {
        graft::v1::ListJobsRequest lr;
        lr.set_state(graft::v1::JOB_STATE_RUNNING);
        lr.set_page_size(16);
        graft::v1::ListJobsResponse running;
        grpc::Status s = jobs->ListJobs(Ctx(kUser).get(), lr, &running);
        if (!s.ok()) {
          error("ListJobs (watcher)", s);
          continue;
        }
        if (running.jobs_size() == 0) {
          std::this_thread::sleep_for(std::chrono::milliseconds(10));
          continue;
        }
        const std::string id = running.jobs(static_cast<int>(rng() % running.jobs_size())).id();
        graft::v1::WatchJobRequest wr;
        wr.set_job_id(id);
        auto ctx = Ctx(kUser, 60000);
        auto rd = jobs->WatchJob(ctx.get(), wr);
        graft::v1::JobEvent e;
        std::set<int64_t> seen;
        while (rd->Read(&e)) {
          if (e.has_point()) seen.insert(e.point().step());
        }
        s = rd->Finish();
        if (!s.ok()) {
          error("WatchJob", s);
          continue;
        }
        graft::v1::GetMetricsRequest mr;
        mr.set_job_id(id);
        graft::v1::GetMetricsResponse stored;
        s = jobs->GetMetrics(Ctx(kUser).get(), mr, &stored);
        if (!s.ok()) {
          error("GetMetrics", s);
          continue;
        }
        for (const auto& p : stored.points()) lost += seen.count(p.step()) ? 0 : 1;
        ++watched;
      }
    });
  }
  for (int k = 0; k < pollers; ++k) {
    threads.emplace_back([&, k] {
      auto jobs = graft::v1::Jobs::NewStub(channel(k + 5));
      while (Clock::now() < end) {
        graft::v1::ListJobsRequest lr;
        lr.set_page_size(50);
        graft::v1::ListJobsResponse out;
        grpc::Status s = jobs->ListJobs(Ctx(kUser).get(), lr, &out);
        if (!s.ok()) error("ListJobs", s);
        ++polls;
        std::this_thread::sleep_for(std::chrono::milliseconds(50));
      }
    });
  }
  for (auto& t : threads) t.join();
  stop = true;
  submitter.join();
  const double elapsed = Since(start) / 1000.0;
  const long rss = StatusKb(pid, "VmRSS:"), hwm = StatusKb(pid, "VmHWM:");
  kill(pid, SIGTERM);
  int status = 0;
  waitpid(pid, &status, 0);
  std::printf("load: %d workers, %d watchers, %d pollers for %.1f s against graftd on %s (the load generator "
              "shares the machine's cores)\n",
              workers, watchers, pollers, elapsed, address.c_str());
  std::printf("errors: %lld%s%s\n", static_cast<long long>(errors.load()), first_error.empty() ? "" : "; first: ",
              first_error.c_str());
  std::printf("jobs finished: %lld; points reported: %lld; jobs watched to the end: %lld; points a watcher missed: %lld; "
              "list polls: %lld\n",
              static_cast<long long>(jobs_done.load()), static_cast<long long>(points_reported.load()),
              static_cast<long long>(watched.load()), static_cast<long long>(lost.load()),
              static_cast<long long>(polls.load()));
  std::printf("lease with jobs queued: p50 %.2f ms, p99 %.2f ms (%zu leases)\n", lease_ms.Quantile(0.5),
              lease_ms.Quantile(0.99), lease_ms.size());
  std::printf("report round trip: p50 %.2f ms, p99 %.2f ms (%zu reports)\n", report_ms.Quantile(0.5),
              report_ms.Quantile(0.99), report_ms.size());
  std::printf("graftd memory at the end: VmRSS %.1f MB, peak VmHWM %.1f MB\n", rss / 1024.0, hwm / 1024.0);
  std::error_code ec;
  fs::remove_all(dir, ec);
  return errors.load() == 0 && lost.load() == 0 ? 0 : 1;
}
