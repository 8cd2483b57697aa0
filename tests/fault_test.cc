// Faults the README promises to survive, each proven by a test that waits on events, not time.
// `Recovery.*`: the coordinator in-process over a temporary SQLite store with a fake clock (the
// `server::Clock` seam), so lease expiry is a clock step, not a wait: leases that lapsed while the
// coordinator was down, a job failing once its attempts are spent, a superseded attempt refused
// everywhere. `Fault.*`: graftd and `graft-worker serve` as real processes on loopback: a hung
// (SIGSTOPped) worker, a worker resending points across a coordinator restart, a rewind reaching
// a watcher.
#include <signal.h>
#include <sqlite3.h>

#include <atomic>
#include <chrono>
#include <filesystem>
#include <fstream>
#include <iostream>
#include <map>
#include <memory>
#include <mutex>
#include <sstream>
#include <string>
#include <thread>
#include <vector>

#include "graft/v1/graft.grpc.pb.h"
#include "gtest/gtest.h"
#include "nlohmann/json.hpp"
#include "proto/sha256.h"
#include "server/coordinator.h"
#include "spdlog/sinks/ringbuffer_sink.h"
#include "spdlog/spdlog.h"
#include "tests/cluster.h"
#include "tests/fake_clock.h"
#include "tests/test_util.h"

namespace graft {
namespace {

using json = nlohmann::json;
using ::graft::testing::BinaryDir;
using ::graft::testing::Cluster;
using ::graft::testing::FakeClock;
using ::graft::testing::kAlice;
using ::graft::testing::ReadFile;
using ::graft::testing::RunCommand;
using ::graft::testing::ScopedProcess;
using ::graft::testing::ScopedTempDir;
using ::graft::testing::SourceDir;
using ::graft::testing::WaitFor;
using ::graft::testing::WorkerBinary;
using ::graft::testing::WriteFile;

// ---------------------------------------------------------------------------------------------
// The coordinator in-process, with a fake clock.

class RecoveryTest : public ::testing::Test {
 protected:
  // A coordinator over DIR/graft.db; `sweep_ms` is how often its sweeper checks leases (real
  // time; the leases themselves run on the fake clock).
  std::unique_ptr<server::Coordinator> Open(int max_attempts, int64_t sweep_ms) {
    auto store = server::OpenSqliteJobStore(dir_.path() + "/graft.db", server::Durability::kNormal);
    EXPECT_TRUE(store.ok()) << store.status();
    if (!store.ok()) return nullptr;
    server::CoordinatorOptions options;
    options.data_dir = dir_.path() + "/data";
    options.lease_ms = 30'000;
    options.max_attempts = max_attempts;
    options.sweep_interval_ms = sweep_ms;
    auto c = std::make_unique<server::Coordinator>(std::move(*store), options, &clock_, log_);
    absl::Status st = c->Start();
    EXPECT_TRUE(st.ok()) << st;
    return c;
  }
  std::string Submit(server::Coordinator& c) {
    v1::SubmitJobRequest req;
    req.set_config_yaml(ReadFile(SourceDir() + "/configs/parcel-routing.yaml"));
    req.set_source_name("parcel-routing.yaml");
    auto r = c.Submit(alice_, req);
    EXPECT_TRUE(r.ok()) << r.status();
    return r.ok() ? r->job_id() : "";
  }
  std::string Register(server::Coordinator& c, const std::string& host) {
    v1::RegisterWorkerRequest req;
    req.set_host(host);
    auto r = c.Register(node_, req);
    EXPECT_TRUE(r.ok()) << r.status();
    return r.ok() ? r->worker_id() : "";
  }
  // Leases with a queued job present, so the reply comes before Lease returns.
  v1::LeaseJobResponse Lease(server::Coordinator& c, const std::string& worker) {
    v1::LeaseJobRequest req;
    req.set_worker_id(worker);
    req.set_wait_ms(0);
    v1::LeaseJobResponse out;
    bool answered = false;
    c.Lease(node_, req, [&](absl::Status st, const v1::LeaseJobResponse& r) {
      EXPECT_TRUE(st.ok()) << st;
      out = r;
      answered = true;
    });
    EXPECT_TRUE(answered) << "no job was queued for " << worker;
    return out;
  }
  absl::StatusOr<v1::ReportResponse> Report(server::Coordinator& c, const std::string& worker,
                                            const v1::LeaseJobResponse& lease, int64_t step, const std::string& tag) {
    v1::ReportRequest r;
    r.set_worker_id(worker);
    r.set_job_id(lease.job_id());
    r.set_attempt(lease.attempt());
    r.set_step(step);
    v1::Point* p = r.add_points();
    p->set_step(step);
    p->set_metrics_json(json{{"step", step}, {"by", tag}}.dump());
    return c.Report(node_, r);
  }
  v1::ArtifactHeader Header(const std::string& worker, const v1::LeaseJobResponse& lease, const std::string& bytes,
                            int64_t step) {
    v1::ArtifactHeader h;
    h.set_worker_id(worker);
    h.set_job_id(lease.job_id());
    h.set_attempt(lease.attempt());
    h.set_name("checkpoint.pt");
    h.set_total_bytes(static_cast<int64_t>(bytes.size()));
    h.set_sha256(Sha256Hex(bytes));
    h.set_step(step);
    return h;
  }
  absl::Status UploadCheckpoint(server::Coordinator& c, const std::string& worker, const v1::LeaseJobResponse& lease,
                                const std::string& bytes, int64_t step) {
    auto up = c.BeginUpload(node_, Header(worker, lease, bytes, step));
    if (!up.ok()) return up.status();
    absl::Status st = (*up)->Write(bytes);
    if (!st.ok()) return st;
    return c.CommitUpload(**up).status();
  }
  v1::Job Get(server::Coordinator& c, const std::string& id) {
    auto j = c.Get(alice_, id);
    EXPECT_TRUE(j.ok()) << j.status();
    return j.ok() ? *j : v1::Job();
  }
  std::string Logged() {
    std::string all;
    for (const auto& line : sink_->last_formatted()) all += line;
    return all;
  }

  ScopedTempDir dir_;
  FakeClock clock_{5'000'000};
  std::shared_ptr<spdlog::sinks::ringbuffer_sink_mt> sink_ = std::make_shared<spdlog::sinks::ringbuffer_sink_mt>(256);
  std::shared_ptr<spdlog::logger> log_ = std::make_shared<spdlog::logger>("recovery", sink_);
  const server::Principal alice_{"alice", server::Role::kUser};
  const server::Principal node_{"node1", server::Role::kWorker};  // every worker's token
};

// A coordinator that was down while a lease ran out sends that job back to the queue when it
// starts (before its sweeper ever runs: here it never does), and keeps a lease that has not
// run out. Removing the recovery from Coordinator::Start leaves the first job running forever.
TEST_F(RecoveryTest, LeasesThatLapsedWhileDownAreQueuedAtStart) {
  const int64_t never = 3'600'000;  // no sweeps: only Start() may requeue
  std::string lapsed, alive, w1, w2;
  {
    auto c = Open(3, never);
    lapsed = Submit(*c);
    alive = Submit(*c);
    w1 = Register(*c, "a");
    w2 = Register(*c, "b");
    const v1::LeaseJobResponse first = Lease(*c, w1);  // at t0: runs to t0 + 30 s
    EXPECT_EQ(first.job_id(), lapsed);
    ASSERT_TRUE(Report(*c, w1, first, 0, "a").ok());
    clock_.now_ms += 20'000;
    const v1::LeaseJobResponse second = Lease(*c, w2);  // at t0 + 20 s: runs to t0 + 50 s
    EXPECT_EQ(second.job_id(), alive);
    ASSERT_TRUE(Report(*c, w2, second, 0, "b").ok());
    c->Shutdown();
  }
  // Down until t0 + 30.001 s: j-1's lease has run out, j-2's has not.
  clock_.now_ms += 10'001;
  auto c = Open(3, never);
  v1::Job j1 = Get(*c, lapsed), j2 = Get(*c, alive);
  EXPECT_EQ(j1.state(), v1::JOB_STATE_QUEUED);
  EXPECT_EQ(j1.attempt(), 1);
  EXPECT_EQ(j1.worker_id(), "");
  EXPECT_EQ(j2.state(), v1::JOB_STATE_RUNNING);
  EXPECT_EQ(j2.worker_id(), w2);
  EXPECT_NE(Logged().find("job " + lapsed + " attempt 1: lease lapsed on " + w1 + "; queued for attempt 2"),
            std::string::npos)
      << Logged();
  // The next lease of the requeued job is attempt 2; the first attempt's reports are refused.
  const std::string w3 = Register(*c, "c");
  v1::LeaseJobResponse again = Lease(*c, w3);
  EXPECT_EQ(again.job_id(), lapsed);
  EXPECT_EQ(again.attempt(), 2);
  v1::LeaseJobResponse stale;
  stale.set_job_id(lapsed);
  stale.set_attempt(1);
  EXPECT_EQ(Report(*c, w1, stale, 20, "a").status().code(), absl::StatusCode::kFailedPrecondition);
  c->Shutdown();
}

// max_attempts leases, each lapsing: the job fails with the reason, and is not leased again.
TEST_F(RecoveryTest, AJobFailsWithTheReasonOnceItsAttemptsAreSpent) {
  auto c = Open(/*max_attempts=*/2, /*sweep_ms=*/5);
  const std::string id = Submit(*c);
  const std::string w1 = Register(*c, "a"), w2 = Register(*c, "b");
  EXPECT_EQ(Lease(*c, w1).attempt(), 1);
  clock_.now_ms += 30'001;
  ASSERT_TRUE(WaitFor([&] { return Get(*c, id).state() == v1::JOB_STATE_QUEUED; }, 10000)) << Logged();
  v1::LeaseJobResponse second = Lease(*c, w2);
  EXPECT_EQ(second.attempt(), 2);
  clock_.now_ms += 30'001;
  ASSERT_TRUE(WaitFor([&] { return Get(*c, id).state() == v1::JOB_STATE_FAILED; }, 10000)) << Logged();
  v1::Job job = Get(*c, id);
  EXPECT_EQ(job.attempt(), 2);
  EXPECT_EQ(job.error(), "the lease of attempt 2 lapsed (" + w2 + " stopped reporting); no attempts left of 2");
  EXPECT_EQ(job.cancel_reason(), "");
  EXPECT_GT(job.finished_ms(), 0);
  // A failed job is final: its last attempt is refused, and a waiting worker gets nothing.
  EXPECT_EQ(Report(*c, w2, second, 50, "b").status().code(), absl::StatusCode::kFailedPrecondition);
  v1::LeaseJobRequest req;
  req.set_worker_id(w1);
  req.set_wait_ms(0);
  auto answered = std::make_shared<std::atomic<bool>>(false);
  auto got_job = std::make_shared<std::atomic<bool>>(false);
  c->Lease(node_, req, [answered, got_job](absl::Status, const v1::LeaseJobResponse& r) {
    *got_job = r.has_job();
    *answered = true;
  });
  ASSERT_TRUE(WaitFor([&] { return answered->load(); }, 10000));
  EXPECT_FALSE(*got_job);
  c->Shutdown();
}

// Attempt 1 lapses while it still has an upload open; attempt 2 resumes from attempt 1's
// checkpoint and writes its own. Every call of attempt 1 is refused from then on, and its upload
// cannot overwrite attempt 2's checkpoint or its points.
TEST_F(RecoveryTest, ASupersededAttemptIsRefusedEverywhere) {
  auto c = Open(3, /*sweep_ms=*/5);
  const std::string id = Submit(*c);
  const std::string a = Register(*c, "a"), b = Register(*c, "b");
  const v1::LeaseJobResponse first = Lease(*c, a);
  ASSERT_TRUE(Report(*c, a, first, 0, "a").ok());
  ASSERT_TRUE(Report(*c, a, first, 50, "a").ok());
  ASSERT_TRUE(UploadCheckpoint(*c, a, first, "checkpoint of a at 50", 50).ok());
  const std::string late_bytes = "checkpoint of a at 100";
  auto late = c->BeginUpload(node_, Header(a, first, late_bytes, 100));  // begun, not committed
  ASSERT_TRUE(late.ok()) << late.status();
  ASSERT_TRUE((*late)->Write(late_bytes).ok());

  clock_.now_ms += 30'001;
  ASSERT_TRUE(WaitFor([&] { return Get(*c, id).state() == v1::JOB_STATE_QUEUED; }, 10000)) << Logged();
  const v1::LeaseJobResponse second = Lease(*c, b);
  EXPECT_EQ(second.attempt(), 2);
  EXPECT_EQ(second.resume_step(), 50);
  ASSERT_TRUE(Report(*c, b, second, 100, "b").ok());
  const std::string b_bytes = "checkpoint of b at 100";
  ASSERT_TRUE(UploadCheckpoint(*c, b, second, b_bytes, 100).ok());

  auto refused = [](const absl::Status& st) {
    return st.code() == absl::StatusCode::kFailedPrecondition &&
           st.message().find("is no longer current") != std::string::npos;
  };
  EXPECT_TRUE(refused(Report(*c, a, first, 100, "a").status()));
  EXPECT_TRUE(refused(c->CommitUpload(**late).status()));
  EXPECT_TRUE(refused(c->BeginUpload(node_, Header(a, first, late_bytes, 100)).status()));
  v1::FetchCheckpointRequest fetch;
  fetch.set_worker_id(a);
  fetch.set_job_id(id);
  fetch.set_attempt(1);
  EXPECT_TRUE(refused(c->CheckpointFor(node_, fetch).status()));
  v1::FinishJobRequest finish;
  finish.set_worker_id(a);
  finish.set_job_id(id);
  finish.set_attempt(1);
  finish.set_succeeded_result_json("{}");
  EXPECT_TRUE(refused(c->Finish(node_, finish)));

  // Attempt 2's state is intact: its checkpoint (bytes and record), its points, its lease.
  auto artifact = c->Artifact(alice_, id, "checkpoint.pt");
  ASSERT_TRUE(artifact.ok()) << artifact.status();
  EXPECT_EQ(artifact->attempt, 2);
  EXPECT_EQ(artifact->step, 100);
  EXPECT_EQ(ReadFile(artifact->path), b_bytes);
  auto points = c->Metrics(alice_, id);
  ASSERT_TRUE(points.ok());
  ASSERT_EQ(points->size(), 3u);
  EXPECT_EQ((*points)[2].attempt(), 2);
  EXPECT_EQ(json::parse((*points)[2].metrics_json())["by"], "b");
  v1::Job job = Get(*c, id);
  EXPECT_EQ(job.state(), v1::JOB_STATE_RUNNING);
  EXPECT_EQ(job.worker_id(), b);
  EXPECT_EQ(job.checkpoint_step(), 100);
  finish.set_worker_id(b);
  finish.set_attempt(2);
  EXPECT_TRUE(c->Finish(node_, finish).ok());
  EXPECT_EQ(Get(*c, id).state(), v1::JOB_STATE_SUCCEEDED);
  c->Shutdown();
}

// ---------------------------------------------------------------------------------------------
// Real processes.

std::string RegisteredId(const std::string& log_path) {
  const std::string log = ReadFile(log_path);
  const std::string key = "registered as ";
  const size_t at = log.rfind(key);
  if (at == std::string::npos) return "";
  const size_t start = at + key.size();
  return log.substr(start, log.find(' ', start) - start);
}

bool Contains(const std::string& path, const std::string& text) {
  return ReadFile(path).find(text) != std::string::npos;
}

json WithoutTimings(json j) {
  for (const char* k : {"wall_s", "examples_per_s", "peak_rss_mb", "first_step_s", "train_steps_s",
                        "resumed_from_step", "steps_this_process"}) {
    j.erase(k);
  }
  return j;
}

// The checkpoint's record in graftd's store, read with SQLite beside the running graftd (WAL
// lets a reader in): {attempt, step}.
std::pair<int, int64_t> StoredCheckpoint(const Cluster& c, const std::string& job_id) {
  sqlite3* db = nullptr;
  std::pair<int, int64_t> out{-1, -1};
  if (sqlite3_open_v2((c.dir() + "/data/graft.db").c_str(), &db, SQLITE_OPEN_READONLY, nullptr) != SQLITE_OK) {
    ADD_FAILURE() << sqlite3_errmsg(db);
    sqlite3_close(db);
    return out;
  }
  sqlite3_busy_timeout(db, 10000);
  sqlite3_stmt* q = nullptr;
  sqlite3_prepare_v2(db, "SELECT attempt, step FROM artifacts WHERE job_id = ? AND name = 'checkpoint.pt'", -1, &q,
                     nullptr);
  sqlite3_bind_int64(q, 1, std::stoll(job_id.substr(2)));
  if (sqlite3_step(q) == SQLITE_ROW) out = {sqlite3_column_int(q, 0), sqlite3_column_int64(q, 1)};
  sqlite3_finalize(q);
  sqlite3_close(db);
  return out;
}

// A worker stopped with SIGSTOP loses its lease and the job moves to another worker. After
// SIGCONT its late report and checkpoint upload are refused, nothing of attempt 1 lands after
// attempt 2's resume step, and the worker drops the job and trains fresh work.
TEST(Fault, AHungWorkerLosesItsJobAndItsLateReportsAreRefused) {
  // A lease of 4 s: four missed heartbeats before a lapse, so only the stopped worker loses one.
  Cluster c(/*lease_seconds=*/4);
  const std::string id = c.Submit(kAlice, "parcel-routing",
                                  {"training.steps=1000000", "evaluation.every=50", "training.checkpoint_every=100",
                                   "evaluation.triples=256"});
  auto w1 = c.StartWorker("w1");
  ASSERT_TRUE(WaitFor([&] { return c.Get(id).checkpoint_step() >= 100; }, 120000)) << ReadFile(w1->log_path());
  const std::string w1_id = RegisteredId(w1->log_path());
  ASSERT_EQ(c.Get(id).worker_id(), w1_id);
  ASSERT_TRUE(w1->Signal(SIGSTOP));
  auto w2 = c.StartWorker("w2");
  // The lease lapses (graftd's clock, not ours) and w2 takes attempt 2.
  ASSERT_TRUE(WaitFor(
      [&] {
        v1::Job j = c.Get(id);
        return j.attempt() >= 2 && j.state() == v1::JOB_STATE_RUNNING && j.worker_id() != w1_id;
      },
      120000))
      << c.Log();
  const int attempt = c.Get(id).attempt();
  const std::string w2_id = c.Get(id).worker_id();
  ASSERT_TRUE(WaitFor([&] { return Contains(w2->log_path(), "resuming from step "); }, 30000));
  const std::string w2_log = ReadFile(w2->log_path());
  const int64_t resumed = std::stoll(w2_log.substr(w2_log.find("resuming from step ") + 19));
  EXPECT_GE(resumed, 100);
  // Attempt 2 has a checkpoint of its own before w1 wakes: something a late upload could overwrite.
  ASSERT_TRUE(WaitFor([&] { return c.Get(id).checkpoint_step() > resumed; }, 120000)) << ReadFile(w2->log_path());
  // Fresh work for w1 once it has dropped the job (w2 is busy with the endless one).
  const std::string fresh = c.Submit(kAlice, "parcel-routing",
                                     {"training.steps=120", "evaluation.every=40", "evaluation.triples=256"});
  ASSERT_TRUE(w1->Signal(SIGCONT));
  ASSERT_TRUE(WaitFor([&] { return Contains(w1->log_path(), id + " attempt 1 dropped (superseded)"); }, 60000))
      << ReadFile(w1->log_path());
  const std::string w1_log = ReadFile(w1->log_path());
  EXPECT_NE(w1_log.find("attempt 1 of job " + id + " by " + w1_id + " is no longer current"), std::string::npos)
      << w1_log;
  EXPECT_NE(w1_log.find("checkpoint upload failed"), std::string::npos) << w1_log;
  ASSERT_TRUE(c.WaitState(fresh, v1::JOB_STATE_SUCCEEDED, 120000)) << ReadFile(w1->log_path());
  EXPECT_EQ(c.Get(fresh).worker_id(), w1_id);
  // Nothing of attempt 1 after the resume step; the stored checkpoint is still attempt 2's.
  v1::Job job = c.Get(id);
  EXPECT_EQ(job.attempt(), attempt) << c.Log();
  EXPECT_EQ(job.worker_id(), w2_id);
  int attempt2_points = 0;
  for (const auto& p : c.Metrics(id)) {
    if (p.step() > resumed) {
      EXPECT_EQ(p.attempt(), attempt) << "step " << p.step();
      ++attempt2_points;
    }
  }
  EXPECT_GT(attempt2_points, 0);
  const auto [ckpt_attempt, ckpt_step] = StoredCheckpoint(c, id);
  EXPECT_EQ(ckpt_attempt, attempt);
  EXPECT_GT(ckpt_step, resumed);
  v1::CancelJobRequest cancel;
  cancel.set_job_id(id);
  v1::Job out;
  EXPECT_TRUE(c.jobs().CancelJob(c.Ctx(kAlice).get(), cancel, &out).ok());
}

// graftd is SIGKILLed while a real worker trains (the worker is frozen for the moment of the
// kill, so the job is certainly mid-run). The worker keeps training, retries its final upload
// with a doubling backoff, and once graftd is back on the same address it resends every point
// that was not acknowledged: the stored curve is the fault-free run's, each step once, in one
// attempt (the lease, 600 s, outlasts the outage).
TEST(Fault, AWorkerResendsEveryPointAcrossACoordinatorRestart) {
  Cluster c(/*lease_seconds=*/600);
  const std::vector<std::string> sets = {"training.steps=3000", "evaluation.every=50",
                                         "training.checkpoint_every=1000000", "evaluation.triples=256"};
  const std::string id = c.Submit(kAlice, "parcel-routing", sets);
  auto w1 = c.StartWorker("w1");
  ASSERT_TRUE(WaitFor([&] { return c.Metrics(id).size() >= 3; }, 120000)) << ReadFile(w1->log_path());
  ASSERT_TRUE(w1->Signal(SIGSTOP));
  const size_t stored_before = c.Metrics(id).size();
  ASSERT_LT(stored_before, 61u) << "the job ended before the outage; raise training.steps";
  c.KillCoordinator();
  ASSERT_TRUE(w1->Signal(SIGCONT));
  // The worker trains on while graftd is gone; its final checkpoint upload backs off, doubling.
  ASSERT_TRUE(WaitFor([&] { return Contains(w1->log_path(), "; retrying in 400 ms"); }, 180000))
      << ReadFile(w1->log_path());
  const std::string during = ReadFile(w1->log_path());
  EXPECT_NE(during.find("upload: coordinator unavailable"), std::string::npos) << during;
  EXPECT_LT(during.find("; retrying in 200 ms"), during.find("; retrying in 400 ms")) << during;
  c.StartCoordinator();
  ASSERT_TRUE(c.WaitState(id, v1::JOB_STATE_SUCCEEDED, 180000)) << c.Log() << ReadFile(w1->log_path());
  v1::Job job = c.Get(id);
  EXPECT_EQ(job.attempt(), 1);
  // The same spec trained once, locally.
  WriteFile(c.dir() + "/spec.yaml", job.spec_yaml());
  auto r = RunCommand(WorkerBinary() + " run " + c.dir() + "/spec.yaml --out " + c.dir() + "/local");
  ASSERT_EQ(r.exit_code, 0) << r.output;
  std::istringstream local(ReadFile(c.dir() + "/local/metrics.jsonl"));
  std::vector<json> expected;
  std::string line;
  while (std::getline(local, line)) {
    if (!line.empty()) expected.push_back(WithoutTimings(json::parse(line)));
  }
  const std::vector<v1::Point> points = c.Metrics(id);
  ASSERT_EQ(points.size(), 61u);
  ASSERT_EQ(expected.size(), 61u);
  for (size_t i = 0; i < points.size(); ++i) {
    EXPECT_EQ(points[i].step(), static_cast<int64_t>(50 * i));
    EXPECT_EQ(WithoutTimings(json::parse(points[i].metrics_json())), expected[i]) << "point " << i;
  }
  EXPECT_EQ(WithoutTimings(json::parse(job.result_json())),
            WithoutTimings(json::parse(ReadFile(c.dir() + "/local/result.json"))));
  std::cout << "resend drill: " << stored_before << " of 61 points stored before graftd was killed, "
            << 61 - stored_before << " acknowledged after its restart\n";
}

// A watcher following a job sees the rewind when a new attempt replaces points, then the new
// attempt's points; applying the events as documented gives the stored curve.
TEST(Fault, ARewindReachesAWatcher) {
  Cluster c(/*lease_seconds=*/4);
  const std::string id = c.Submit(kAlice, "parcel-routing",
                                  {"training.steps=1000000", "evaluation.every=50", "training.checkpoint_every=100",
                                   "evaluation.triples=256"});
  std::mutex mu;
  std::vector<v1::JobEvent> events;  // guarded by mu
  grpc::Status watch_status;
  std::atomic<bool> watch_done{false};
  std::thread watcher([&] {
    v1::WatchJobRequest r;
    r.set_job_id(id);
    auto ctx = c.Ctx(kAlice, 300000);
    auto reader = c.jobs().WatchJob(ctx.get(), r);
    v1::JobEvent e;
    while (reader->Read(&e)) {
      std::lock_guard<std::mutex> lock(mu);
      events.push_back(e);
    }
    watch_status = reader->Finish();
    watch_done = true;
  });
  auto w1 = c.StartWorker("w1");
  ASSERT_TRUE(WaitFor([&] { return c.Get(id).checkpoint_step() >= 200; }, 120000)) << ReadFile(w1->log_path());
  w1->Signal(SIGKILL);
  w1->Wait(10000);
  auto w2 = c.StartWorker("w2");
  ASSERT_TRUE(WaitFor([&] { return Contains(w2->log_path(), "resuming from step "); }, 120000)) << c.Log();
  const std::string w2_log = ReadFile(w2->log_path());
  const int64_t checkpoint = std::stoll(w2_log.substr(w2_log.find("resuming from step ") + 19));
  EXPECT_GE(checkpoint, 200);
  // Wait for the rewind and two points of the new attempt at the watcher.
  auto new_points = [&] {
    std::lock_guard<std::mutex> lock(mu);
    int after = 0;
    bool rewound = false;
    for (const auto& e : events) {
      if (e.has_rewind()) rewound = true;
      if (rewound && e.has_point() && e.point().attempt() >= 2) ++after;
    }
    return after >= 2;
  };
  ASSERT_TRUE(WaitFor(new_points, 120000)) << c.Log() << ReadFile(w2->log_path());
  v1::CancelJobRequest cancel;
  cancel.set_job_id(id);
  v1::Job out;
  ASSERT_TRUE(c.jobs().CancelJob(c.Ctx(kAlice).get(), cancel, &out).ok());
  ASSERT_TRUE(WaitFor([&] { return watch_done.load(); }, 60000));
  watcher.join();
  ASSERT_TRUE(watch_status.ok()) << watch_status.error_message();
  // The first rewind: attempt 2 replaces everything after attempt 1's last checkpoint.
  std::map<int64_t, v1::Point> curve;
  int rewinds = 0;
  bool first_after_rewind = false;
  for (const auto& e : events) {
    if (e.has_rewind()) {
      if (rewinds++ == 0) {
        EXPECT_EQ(e.rewind().attempt(), 2);
        EXPECT_EQ(e.rewind().from_step(), checkpoint + 1);
        first_after_rewind = true;
      }
      curve.erase(curve.lower_bound(e.rewind().from_step()), curve.end());
    } else if (e.has_point()) {
      if (first_after_rewind) {
        EXPECT_EQ(e.point().step(), checkpoint + 50) << "the first point after the rewind";
        EXPECT_EQ(e.point().attempt(), 2);
        first_after_rewind = false;
      }
      curve[e.point().step()] = e.point();
    }
  }
  ASSERT_GE(rewinds, 1);
  ASSERT_TRUE(events.back().has_state_change());
  EXPECT_EQ(events.back().state_change().state(), v1::JOB_STATE_CANCELLED);
  // The watcher's curve is the stored one, up to where the stream ended (a point the worker
  // reports after the cancel is still stored, but the stream has ended by then).
  ASSERT_FALSE(curve.empty());
  std::vector<v1::Point> stored;
  for (const auto& p : c.Metrics(id)) {
    if (p.step() <= curve.rbegin()->first) stored.push_back(p);
  }
  ASSERT_EQ(curve.size(), stored.size());
  size_t i = 0;
  for (const auto& [step, p] : curve) {
    EXPECT_EQ(p.step(), stored[i].step());
    EXPECT_EQ(p.attempt(), stored[i].attempt()) << "step " << step;
    EXPECT_EQ(p.metrics_json(), stored[i].metrics_json()) << "step " << step;
    ++i;
  }
}

// A tmpfs of `kib` KiB mounted at `dir` (created), unmounted on destruction. Mounting needs root
// (CAP_SYS_ADMIN), as in CI; elsewhere the test fails saying so.
class ScopedTmpfs {
 public:
  ScopedTmpfs(const std::string& dir, int kib) : dir_(dir) {
    std::filesystem::create_directories(dir);
    auto r = RunCommand("mount -t tmpfs -o size=" + std::to_string(kib) + "k tmpfs " + dir);
    mounted_ = r.exit_code == 0;
    EXPECT_TRUE(mounted_) << "cannot mount a tmpfs at " << dir << " (this test needs root): " << r.output;
  }
  ~ScopedTmpfs() {
    if (mounted_) RunCommand("umount " + dir_);
  }
  bool mounted() const { return mounted_; }

 private:
  std::string dir_;
  bool mounted_ = false;
};

// A worker whose own work dir is full cannot write its checkpoint: it hands the job back with the
// reason (not counted as an attempt, the job does not fail), deregisters and exits 1 saying what
// to do; another worker with room trains the job to the end.
TEST(Fault, AWorkerWhoseWorkDirFillsHandsItsJobBack) {
  Cluster c;
  const std::string small = c.dir() + "/small";
  ScopedTmpfs tmpfs(small, 512);
  ASSERT_TRUE(tmpfs.mounted());
  {  // First prove that a write really fails there (root ignores permission bits, not quotas).
    std::ofstream probe(small + "/probe", std::ios::binary);
    const std::string mib(1 << 20, 'x');
    probe << mib;
    probe.flush();
    EXPECT_FALSE(probe.good()) << "a 1 MiB write fit in the 512 KiB tmpfs";
  }
  std::filesystem::remove(small + "/probe");
  // Width 256: a checkpoint of about 1.7 MB, more than the tmpfs holds.
  const std::string id = c.Submit(kAlice, "parcel-routing",
                                  {"training.steps=300", "evaluation.every=50", "training.checkpoint_every=100",
                                   "evaluation.triples=256", "network.hidden=[256,256,256]"});
  std::vector<std::string> argv = {WorkerBinary(), "serve", "--server", c.address(),
                                   "--token-file", c.dir() + "/worker.token", "--work-dir", small};
  ScopedProcess w1(argv, c.dir() + "/w1.log");
  EXPECT_EQ(w1.Wait(180000), 1) << ReadFile(w1.log_path());
  const std::string log = ReadFile(w1.log_path());
  EXPECT_NE(log.find(id + ": the worker's work dir cannot be written: "), std::string::npos) << log;
  EXPECT_NE(log.find("bytes free in " + small), std::string::npos) << log;
  EXPECT_NE(log.find("graft-worker: stopping: the work dir " + small + " cannot be written"), std::string::npos)
      << log;
  v1::Job job = c.Get(id);
  EXPECT_EQ(job.state(), v1::JOB_STATE_QUEUED) << job.error();
  EXPECT_EQ(job.error(), "");
  EXPECT_EQ(job.attempt(), 1);
  EXPECT_EQ(job.max_attempts(), 4);  // 3 + the hand-back
  EXPECT_NE(c.Log().find("handed back by " + RegisteredId(w1.log_path()) + " (the worker's work dir cannot be written"),
            std::string::npos)
      << c.Log();
  // The worker left the fleet; one with room finishes the job.
  auto w2 = c.StartWorker("w2");
  ASSERT_TRUE(c.WaitState(id, v1::JOB_STATE_SUCCEEDED, 180000)) << c.Log() << ReadFile(w2->log_path());
  EXPECT_EQ(c.Metrics(id).size(), 7u);
}

// `PRAGMA integrity_check` of the cluster's database, read with SQLite's own library (not graft's
// store): "ok" when the file is sound.
std::string IntegrityCheck(const Cluster& c) {
  sqlite3* db = nullptr;
  std::string answer = "cannot open";
  if (sqlite3_open_v2((c.dir() + "/data/graft.db").c_str(), &db, SQLITE_OPEN_READONLY, nullptr) == SQLITE_OK) {
    sqlite3_busy_timeout(db, 10000);
    sqlite3_stmt* q = nullptr;
    sqlite3_prepare_v2(db, "PRAGMA integrity_check", -1, &q, nullptr);
    answer = sqlite3_step(q) == SQLITE_ROW ? reinterpret_cast<const char*>(sqlite3_column_text(q, 0)) : sqlite3_errmsg(db);
    sqlite3_finalize(q);
  }
  sqlite3_close(db);
  return answer;
}

// Runs a command as the unprivileged user nobody (uid and gid 65534, no other groups).
const std::vector<std::string> kAsNobody = {"/usr/bin/setpriv", "--reuid=65534", "--regid=65534", "--clear-groups"};
std::string AsNobody(const std::string& command) {
  return "/usr/bin/setpriv --reuid=65534 --regid=65534 --clear-groups " + command;
}

grpc::Status TrySubmit(Cluster& c, const std::vector<std::string>& sets, std::string* id) {
  v1::SubmitJobRequest req;
  req.set_config_yaml(ReadFile(SourceDir() + "/configs/parcel-routing.yaml"));
  req.set_source_name("parcel-routing.yaml");
  for (const auto& set : sets) req.add_overrides(set);
  v1::SubmitJobResponse resp;
  grpc::Status s = c.jobs().SubmitJob(c.Ctx(kAlice).get(), req, &resp);
  *id = resp.job_id();
  return s;
}

size_t CountListed(Cluster& c) {
  v1::ListJobsRequest req;
  v1::ListJobsResponse resp;
  grpc::Status s = c.jobs().ListJobs(c.Ctx(kAlice).get(), req, &resp);
  EXPECT_TRUE(s.ok()) << s.error_message();
  return static_cast<size_t>(resp.jobs_size());
}

void ExpectSamePoints(const std::vector<v1::Point>& kept, const std::vector<v1::Point>& now) {
  std::map<int64_t, std::string> stored;
  for (const auto& p : now) stored[p.step()] = p.metrics_json();
  for (const auto& p : kept) {
    ASSERT_TRUE(stored.count(p.step())) << "the acknowledged point at step " << p.step() << " was lost";
    EXPECT_EQ(stored[p.step()], p.metrics_json()) << "step " << p.step();
  }
}

const std::vector<std::string> kTinyJob = {"training.steps=100", "evaluation.every=50", "evaluation.triples=256",
                                           "training.checkpoint_every=50"};

// graftd run as an unprivileged user on a data dir it cannot write (root ignores permission
// bits, so the test drops to nobody, and first proves that nobody's writes there fail), after a
// clean stop (no -wal file left) and after a SIGKILL (-wal and -shm left): it starts, serves every
// stored job and point, refuses new work with UNAVAILABLE naming the disk, and the database is
// sound afterwards.
TEST(Fault, OnAReadOnlyDataDirGraftdServesWhatItHasAndRefusesNewWork) {
  for (const bool killed : {false, true}) {
    SCOPED_TRACE(killed ? "graftd was killed" : "graftd stopped cleanly");
    Cluster c;
    const std::string done = c.Submit(kAlice, "parcel-routing", kTinyJob);
    {
      auto w = c.StartWorker("w1");
      ASSERT_TRUE(c.WaitState(done, v1::JOB_STATE_SUCCEEDED, 180000)) << c.Log() << ReadFile(w->log_path());
    }
    // Queued, or leased to the killed worker's long poll, which graftd still held: either way stored.
    const std::string queued = c.Submit(kAlice, "parcel-routing", kTinyJob);
    const v1::JobState queued_state = c.Get(queued).state();
    const std::vector<v1::Point> points = c.Metrics(done);
    ASSERT_EQ(points.size(), 3u);  // steps 0, 50 and 100
    if (killed) {
      c.KillCoordinator();
      ASSERT_TRUE(std::filesystem::exists(c.dir() + "/data/graft.db-wal"));
    } else {
      ASSERT_EQ(c.StopCoordinator(), 0) << c.Log();
      ASSERT_FALSE(std::filesystem::exists(c.dir() + "/data/graft.db-wal"));
    }

    // Root keeps the data dir and its files (0755, 0644); nobody gets the cluster's own dir (for
    // graftd's port file) and the tokens file.
    const std::string data = c.dir() + "/data";
    for (const std::string& cmd : {"chown 65534:65534 " + c.dir() + " " + c.dir() + "/tokens.yaml",
                                   "chmod 0755 " + c.dir(), "chmod -R u+rwX,go+rX,go-w " + data}) {
      auto r = RunCommand(cmd);
      ASSERT_EQ(r.exit_code, 0) << cmd << ": " << r.output;
    }
    auto probe = RunCommand(AsNobody("/usr/bin/touch " + data + "/probe"));
    ASSERT_NE(probe.exit_code, 0) << "nobody could write into " << data << ": the test proves nothing";
    probe = RunCommand(AsNobody("/usr/bin/touch " + c.dir() + "/probe"));
    ASSERT_EQ(probe.exit_code, 0) << "nobody cannot write its own dir: " << probe.output;

    c.StartCoordinator(kAsNobody);
    EXPECT_EQ(c.Get(done).state(), v1::JOB_STATE_SUCCEEDED) << c.Log();
    EXPECT_EQ(c.Get(queued).state(), queued_state);
    EXPECT_EQ(CountListed(c), 2u);
    ExpectSamePoints(points, c.Metrics(done));
    EXPECT_EQ(c.Metrics(done).size(), points.size());

    std::string id;
    grpc::Status s = TrySubmit(c, kTinyJob, &id);
    EXPECT_EQ(s.error_code(), grpc::StatusCode::UNAVAILABLE) << s.error_message();
    EXPECT_NE(s.error_message().find("the data dir's disk cannot be written"), std::string::npos) << s.error_message();
    std::cout << "read-only data dir (" << (killed ? "after a kill" : "after a clean stop") << "): " << s.error_message()
              << "\n";
    v1::RegisterWorkerRequest reg;
    reg.set_host("late-node");
    v1::RegisterWorkerResponse registered;
    s = c.workers().RegisterWorker(c.Ctx(::graft::testing::kWorker).get(), reg, &registered);
    EXPECT_EQ(s.error_code(), grpc::StatusCode::UNAVAILABLE) << s.error_message();
    EXPECT_NE(s.error_message().find("the data dir's disk cannot be written"), std::string::npos) << s.error_message();
    EXPECT_EQ(CountListed(c), 2u);  // nothing half-stored

    ASSERT_EQ(c.StopCoordinator(), 0) << c.Log();
    EXPECT_EQ(IntegrityCheck(c), "ok");
  }
}

// graftd on a small tmpfs that fills while a worker reports and uploads: new work is refused with
// RESOURCE_EXHAUSTED naming the disk, reads go on, the worker keeps resending, no acknowledged
// point is lost; once space is freed the job finishes and new work is taken, without a restart.
TEST(Fault, OnAFullDiskGraftdRefusesWorkLosesNothingAndGoesOnOnceFreed) {
  Cluster c;
  ASSERT_EQ(c.StopCoordinator(), 0) << c.Log();
  const std::string data = c.dir() + "/data";
  std::filesystem::remove_all(data);
  ScopedTmpfs tmpfs(data, 4096);
  ASSERT_TRUE(tmpfs.mounted());
  c.StartCoordinator();

  const std::string id = c.Submit(kAlice, "parcel-routing",
                                  {"training.steps=400", "evaluation.every=50", "evaluation.triples=256",
                                   "training.checkpoint_every=50"});
  auto w = c.StartWorker("w1");
  ASSERT_TRUE(WaitFor([&] { return !c.Metrics(id).empty(); }, 180000)) << c.Log() << ReadFile(w->log_path());

  // Fill the disk: 16 KiB writes until one fails (proving it is full), the filler kept open.
  const std::string filler = data + "/filler";
  {
    std::ofstream out(filler, std::ios::binary);
    const std::string chunk(16 << 10, 'f');
    for (int i = 0; i < 4096 && out; ++i) out.write(chunk.data(), static_cast<std::streamsize>(chunk.size())).flush();
    ASSERT_FALSE(out.good()) << "64 MiB fit in a 4 MiB tmpfs";
  }
  // New work is refused (the database may still have a few free pages: submit until it says so).
  grpc::Status refused;
  std::vector<std::string> accepted;
  for (int i = 0; i < 200 && refused.ok(); ++i) {
    std::string more;
    refused = TrySubmit(c, kTinyJob, &more);
    if (refused.ok()) accepted.push_back(more);
  }
  EXPECT_EQ(refused.error_code(), grpc::StatusCode::RESOURCE_EXHAUSTED) << refused.error_message();
  EXPECT_NE(refused.error_message().find("the data dir's disk is full"), std::string::npos) << refused.error_message();
  std::cout << "disk full: " << accepted.size() << " submissions accepted, then: " << refused.error_message() << "\n";
  // The worker's reports are refused too, and it keeps resending.
  ASSERT_TRUE(WaitFor([&] { return Contains(w->log_path(), "the data dir's disk is full"); }, 180000))
      << ReadFile(w->log_path());
  // Reads go on.
  const std::vector<v1::Point> kept = c.Metrics(id);
  EXPECT_FALSE(kept.empty());
  EXPECT_EQ(c.Get(id).state(), v1::JOB_STATE_RUNNING);
  EXPECT_EQ(CountListed(c), 1 + accepted.size());

  std::filesystem::remove(filler);
  ASSERT_TRUE(c.WaitState(id, v1::JOB_STATE_SUCCEEDED, 300000)) << c.Log() << ReadFile(w->log_path());
  const std::vector<v1::Point> final_points = c.Metrics(id);
  ExpectSamePoints(kept, final_points);
  EXPECT_EQ(final_points.size(), 9u);  // steps 0, 50, ..., 400
  std::string after;
  ASSERT_TRUE(TrySubmit(c, kTinyJob, &after).ok());
  accepted.push_back(after);
  for (const std::string& more : accepted) {
    EXPECT_TRUE(c.WaitState(more, v1::JOB_STATE_SUCCEEDED, 180000)) << more << "\n" << c.Log();
  }
  ASSERT_EQ(c.StopCoordinator(), 0) << c.Log();
  EXPECT_EQ(IntegrityCheck(c), "ok");
}

}  // namespace
}  // namespace graft
