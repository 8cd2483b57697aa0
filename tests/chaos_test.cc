// The chaos drill: a sweep trained by three real `graft-worker serve` processes while worker
// processes are SIGKILLed and restarted and graftd itself is SIGKILLed twice and restarted on
// the same address and data dir. Afterwards every job has succeeded, every stored curve has each
// evaluation step exactly once, and every point, the final result and the uploaded files equal
// the same spec trained once by `graft-worker run` without faults (every field but timings).
//
// The schedule is seeded and driven by events: a worker is killed once it holds a lease and its
// job has advanced a drawn number of evaluations (2 to 4) in that lease; graftd is killed when a drawn
// number of jobs has succeeded and a worker is training. Every wait is a bounded poll of state.
// Settings (environment; scripts/chaos.sh passes its own): GRAFT_CHAOS_SEED (12),
// GRAFT_CHAOS_SECONDS (360: faults stop after this), GRAFT_CHAOS_KILLS (20 worker kills at most),
// GRAFT_CHAOS_JOBS (12), GRAFT_CHAOS_STEPS (400), GRAFT_CHAOS_WIDTH (512), GRAFT_CHAOS_WORKERS (3).
#include <signal.h>

#include <algorithm>
#include <chrono>
#include <cstdlib>
#include <fstream>
#include <iostream>
#include <map>
#include <random>
#include <set>
#include <sstream>
#include <string>
#include <vector>

#include <grpcpp/grpcpp.h>

#include "graft/v1/graft.grpc.pb.h"
#include "gtest/gtest.h"
#include "nlohmann/json.hpp"
#include "proto/sha256.h"
#include "tests/cluster.h"
#include "tests/test_util.h"

namespace graft {
namespace {

using json = nlohmann::json;
using ::graft::testing::BinaryDir;
using ::graft::testing::Cluster;
using ::graft::testing::kAlice;
using ::graft::testing::ReadFile;
using ::graft::testing::ScopedProcess;
using ::graft::testing::SourceDir;
using ::graft::testing::WaitFor;
using ::graft::testing::WriteFile;
using SteadyClock = std::chrono::steady_clock;

int64_t EnvInt(const char* name, int64_t fallback) {
  const char* v = std::getenv(name);
  if (v == nullptr || *v == '\0') return fallback;
  return std::stoll(v);
}

double SecondsSince(SteadyClock::time_point start) {
  return std::chrono::duration<double>(SteadyClock::now() - start).count();
}

// What differs between two runs of one spec only by when and where they ran: timings, and the
// fields saying which process trained which steps (a resumed attempt trained fewer).
json WithoutTimings(json j) {
  for (const char* k : {"wall_s", "examples_per_s", "peak_rss_mb", "first_step_s", "train_steps_s",
                        "resumed_from_step", "steps_this_process"}) {
    j.erase(k);
  }
  return j;
}

std::vector<std::string> Lines(const std::string& text) {
  std::vector<std::string> out;
  std::istringstream in(text);
  std::string line;
  while (std::getline(in, line)) {
    if (!line.empty()) out.push_back(line);
  }
  return out;
}

// The last "registered as ID" in a worker's log, or "".
std::string RegisteredId(const std::string& log_path) {
  std::ifstream in(log_path);
  std::string line, id;
  const std::string key = "registered as ";
  while (std::getline(in, line)) {
    const size_t at = line.find(key);
    if (at == std::string::npos) continue;
    const size_t start = at + key.size();
    id = line.substr(start, line.find(' ', start) - start);
  }
  return id;
}

// Downloads an artifact whole; returns false (with the status in *why) when it cannot.
bool Download(Cluster& c, const std::string& job, const std::string& name, std::string* bytes, std::string* sha,
              std::string* why) {
  v1::DownloadArtifactRequest req;
  req.set_job_id(job);
  req.set_name(name);
  auto ctx = c.Ctx(kAlice, 60000);
  auto reader = c.jobs().DownloadArtifact(ctx.get(), req);
  v1::ArtifactChunk chunk;
  bytes->clear();
  while (reader->Read(&chunk)) {
    if (!chunk.sha256().empty()) *sha = chunk.sha256();
    *bytes += chunk.data();
  }
  grpc::Status s = reader->Finish();
  *why = s.error_message();
  return s.ok();
}

// One worker slot: a process, restarted under a new name after each kill.
struct Slot {
  std::unique_ptr<ScopedProcess> process;
  std::string name;
  std::string id;  // its registered worker id, once known
  int generation = 0;
};

struct Kill {
  std::string worker_id;
  std::string job_id;  // the job it was training when killed
  int64_t step = 0;    // the job's step then
};

TEST(Chaos, DrillLosesNoPointAndMatchesTheFaultFreeRuns) {
  const int64_t seed = EnvInt("GRAFT_CHAOS_SEED", 12);
  const double fault_seconds = static_cast<double>(EnvInt("GRAFT_CHAOS_SECONDS", 360));
  const int64_t max_kills = EnvInt("GRAFT_CHAOS_KILLS", 20);
  const int64_t jobs_n = EnvInt("GRAFT_CHAOS_JOBS", 12);
  const int64_t steps = EnvInt("GRAFT_CHAOS_STEPS", 400);
  const int64_t width = EnvInt("GRAFT_CHAOS_WIDTH", 512);
  const int64_t workers_n = EnvInt("GRAFT_CHAOS_WORKERS", 3);
  const int64_t every = 50;
  ASSERT_GE(jobs_n, 10) << "the coordinator kills are placed among the first 9 successes";
  ASSERT_EQ(steps % every, 0) << "GRAFT_CHAOS_STEPS must be a multiple of " << every;
  const auto drill_start = SteadyClock::now();
  std::mt19937_64 rng(static_cast<uint64_t>(seed));
  auto draw = [&](int64_t lo, int64_t hi) { return std::uniform_int_distribution<int64_t>(lo, hi)(rng); };

  // max_attempts above the kill budget (worker kills plus leases lapsed while graftd was down).
  const int64_t max_attempts = max_kills + 10;
  Cluster c(/*lease_seconds=*/3, {"--max-attempts", std::to_string(max_attempts)});
  std::ostringstream sweep;
  sweep << ReadFile(SourceDir() + "/configs/parcel-routing.yaml") << "\nsweep:\n  seeds: [";
  for (int64_t i = 1; i <= jobs_n; ++i) sweep << (i > 1 ? ", " : "") << i;
  sweep << "]\n";
  const std::vector<std::string> sets = {
      "training.steps=" + std::to_string(steps), "evaluation.every=" + std::to_string(every),
      "training.checkpoint_every=" + std::to_string(every), "evaluation.triples=1024",
      "network.hidden=[" + std::to_string(width) + "," + std::to_string(width) + "," + std::to_string(width) + "]"};

  std::vector<Slot> slots(static_cast<size_t>(workers_n));
  auto start_slot = [&](size_t i) {
    Slot& s = slots[i];
    s.name = "w" + std::to_string(i) + "-" + std::to_string(s.generation++);
    s.id.clear();
    s.process = c.StartWorker(s.name);
  };
  for (size_t i = 0; i < slots.size(); ++i) start_slot(i);

  v1::SubmitJobRequest submit;
  submit.set_config_yaml(sweep.str());
  submit.set_source_name("chaos-sweep.yaml");
  for (const auto& s : sets) submit.add_overrides(s);
  v1::SubmitJobResponse submitted;
  {
    grpc::Status s = c.jobs().SubmitJob(c.Ctx(kAlice).get(), submit, &submitted);
    ASSERT_TRUE(s.ok()) << s.error_message();
  }
  ASSERT_EQ(submitted.job_ids_size(), jobs_n);
  const std::vector<std::string> ids(submitted.job_ids().begin(), submitted.job_ids().end());

  // Polls that tolerate nothing: graftd is up whenever they run (it is killed and restarted
  // synchronously below).
  auto list_workers = [&]() {
    v1::ListWorkersRequest req;
    v1::ListWorkersResponse resp;
    grpc::Status s = c.jobs().ListWorkers(c.Ctx(kAlice).get(), req, &resp);
    EXPECT_TRUE(s.ok()) << s.error_message();
    return resp;
  };
  // The sweep's jobs in one call: {succeeded, ended}.
  auto counts = [&]() {
    v1::ListJobsRequest req;
    req.set_sweep_id(submitted.sweep_id());
    req.set_page_size(500);
    v1::ListJobsResponse resp;
    grpc::Status s = c.jobs().ListJobs(c.Ctx(kAlice).get(), req, &resp);
    EXPECT_TRUE(s.ok()) << s.error_message();
    std::pair<int64_t, int64_t> n{0, 0};
    for (const auto& j : resp.jobs()) {
      n.first += j.state() == v1::JOB_STATE_SUCCEEDED ? 1 : 0;
      n.second += j.state() == v1::JOB_STATE_QUEUED || j.state() == v1::JOB_STATE_RUNNING ? 0 : 1;
    }
    return n;
  };
  auto succeeded = [&]() { return counts().first; };
  auto all_final = [&]() { return counts().second == jobs_n; };

  // The schedule: each worker kill waits for a drawn number of evaluations (2 to 4) in the
  // victim's current lease; graftd dies after a drawn number of successes in each of two windows.
  const int64_t coordinator_kill_at[2] = {draw(1, 4), draw(5, 9)};
  int coordinator_kills = 0;
  std::vector<Kill> kills;
  std::map<std::string, int64_t> first_seen;  // "worker job" -> the job's step when first seen there
  int64_t wanted_evaluations = draw(2, 4);
  // The next fault the drill's state makes due: graftd's kill once enough jobs succeeded while a
  // worker trains, or a worker whose lease has moved on by the drawn number of evaluations.
  struct Due {
    bool coordinator = false;
    bool worker = false;
    size_t victim = 0;
    Kill kill;
  };
  auto next_due = [&]() {
    Due due;
    const bool coordinator_due = coordinator_kills < 2 && succeeded() >= coordinator_kill_at[coordinator_kills];
    const bool workers_left = static_cast<int64_t>(kills.size()) < max_kills;
    if (!coordinator_due && !workers_left) return due;
    const v1::ListWorkersResponse fleet = list_workers();
    if (coordinator_due) {
      for (const auto& w : fleet.workers()) due.coordinator |= w.state() == v1::WORKER_STATE_TRAINING;
      if (due.coordinator) return due;
    }
    for (auto& slot : slots) {
      if (slot.id.empty()) slot.id = RegisteredId(slot.process->log_path());
    }
    std::vector<std::pair<size_t, Kill>> eligible;
    for (const auto& w : fleet.workers()) {
      if (w.state() != v1::WORKER_STATE_TRAINING) continue;
      for (size_t i = 0; i < slots.size(); ++i) {
        if (slots[i].id != w.id()) continue;
        const std::string key = w.id() + " " + w.job_id();
        auto [it, fresh] = first_seen.emplace(key, w.step());
        if (w.step() >= it->second + wanted_evaluations * every) eligible.push_back({i, {w.id(), w.job_id(), w.step()}});
      }
    }
    if (!workers_left || eligible.empty()) return due;
    const auto& [victim, kill] = eligible[static_cast<size_t>(draw(0, static_cast<int64_t>(eligible.size()) - 1))];
    due.worker = true;
    due.victim = victim;
    due.kill = kill;
    return due;
  };
  while (!all_final() && (coordinator_kills < 2 || static_cast<int64_t>(kills.size()) < max_kills)) {
    const int left_ms = static_cast<int>(1000 * (fault_seconds - SecondsSince(drill_start)));
    Due due;
    // Waits for an event (a fault falling due, or every job ending), at most until the budget ends.
    if (left_ms <= 0 || !WaitFor([&] { return (due = next_due()).coordinator || due.worker || all_final(); }, left_ms)) {
      break;
    }
    if (due.coordinator) {
      c.KillCoordinator();
      c.StartCoordinator();
      ++coordinator_kills;
      std::cout << "chaos: graftd killed and restarted (" << coordinator_kills << " of 2) at "
                << SecondsSince(drill_start) << " s\n";
    } else if (due.worker) {
      slots[due.victim].process->Signal(SIGKILL);
      ASSERT_NE(slots[due.victim].process->Wait(30000), -1) << "a killed worker did not exit";
      kills.push_back(due.kill);
      start_slot(due.victim);
      wanted_evaluations = draw(2, 4);
    }
  }
  const double fault_phase_s = SecondsSince(drill_start);
  // Both coordinator kills happen before the faults end unless the time budget ran out first.
  EXPECT_EQ(coordinator_kills, 2) << "the time budget ended before both graftd kills";
  // No more faults: the jobs finish.
  ASSERT_TRUE(WaitFor(all_final, 20 * 60 * 1000)) << c.Log();
  const double training_s = SecondsSince(drill_start);

  // Kills that landed while a job was in hand: graftd saw that worker's lease lapse.
  const std::string log = c.Log();
  int landed = 0;
  for (const Kill& k : kills) {
    landed += log.find("lease lapsed on " + k.worker_id + ";") != std::string::npos ? 1 : 0;
  }

  // The same specs trained once each, without faults, two at a time.
  const auto reference_start = SteadyClock::now();
  std::vector<v1::Job> jobs;
  for (const auto& id : ids) jobs.push_back(c.Get(id));
  for (size_t i = 0; i < jobs.size(); i += 2) {
    std::vector<std::unique_ptr<ScopedProcess>> runs;
    for (size_t j = i; j < std::min(i + 2, jobs.size()); ++j) {
      const std::string dir = c.dir() + "/reference-" + jobs[j].id();
      WriteFile(dir + ".yaml", jobs[j].spec_yaml());
      runs.push_back(std::make_unique<ScopedProcess>(
          std::vector<std::string>{BinaryDir() + "/bin/graft-worker", "run", dir + ".yaml", "--out", dir},
          dir + ".log"));
    }
    for (auto& r : runs) ASSERT_EQ(r->Wait(20 * 60 * 1000), 0) << ReadFile(r->log_path());
  }
  const double reference_s = SecondsSince(reference_start);

  int64_t attempts = 0, points_checked = 0, files_checked = 0;
  std::vector<int64_t> expected_steps;
  for (int64_t s = 0; s <= steps; s += every) expected_steps.push_back(s);
  for (const v1::Job& job : jobs) {
    SCOPED_TRACE(job.id() + " " + job.name());
    attempts += job.attempt();
    ASSERT_EQ(job.state(), v1::JOB_STATE_SUCCEEDED) << job.error() << "\n" << log;
    EXPECT_LE(job.attempt(), job.max_attempts());
    const std::string dir = c.dir() + "/reference-" + job.id();
    const std::vector<std::string> want = Lines(ReadFile(dir + "/metrics.jsonl"));
    ASSERT_EQ(want.size(), expected_steps.size());
    // The stored curve: every evaluation step exactly once, equal to the fault-free run's, and
    // attempts never decreasing along it (a superseded attempt's late point cannot land).
    const std::vector<v1::Point> points = c.Metrics(job.id());
    std::vector<int64_t> got_steps;
    for (const auto& p : points) got_steps.push_back(p.step());
    EXPECT_EQ(got_steps, expected_steps);
    int32_t last_attempt = 0;
    for (size_t i = 0; i < points.size() && i < want.size(); ++i) {
      EXPECT_EQ(WithoutTimings(json::parse(points[i].metrics_json())), WithoutTimings(json::parse(want[i])))
          << "point at step " << points[i].step() << " (attempt " << points[i].attempt() << ")";
      EXPECT_GE(points[i].attempt(), last_attempt) << "step " << points[i].step();
      last_attempt = points[i].attempt();
      ++points_checked;
    }
    EXPECT_EQ(WithoutTimings(json::parse(job.result_json())),
              WithoutTimings(json::parse(ReadFile(dir + "/result.json"))));
    // The uploaded files: the trained weights byte for byte, and metrics.jsonl line by line.
    std::string bytes, sha, why;
    ASSERT_TRUE(Download(c, job.id(), "weights.pt", &bytes, &sha, &why)) << why;
    EXPECT_EQ(Sha256Hex(bytes), sha);
    int64_t size = 0;
    EXPECT_EQ(sha, Sha256File(dir + "/weights.pt", &size)) << "weights differ from the fault-free run's";
    ASSERT_TRUE(Download(c, job.id(), "metrics.jsonl", &bytes, &sha, &why)) << why;
    const std::vector<std::string> uploaded = Lines(bytes);
    ASSERT_EQ(uploaded.size(), want.size()) << bytes;
    for (size_t i = 0; i < want.size(); ++i) {
      EXPECT_EQ(WithoutTimings(json::parse(uploaded[i])), WithoutTimings(json::parse(want[i]))) << "line " << i;
    }
    files_checked += 2;
  }
  EXPECT_GE(attempts, jobs_n);
  std::cout << "chaos drill (seed " << seed << "): " << jobs_n << " jobs of " << steps << " steps (width " << width
            << ") on " << workers_n << " workers\n"
            << "  worker kills: " << kills.size() << ", landed while a job was in hand: " << landed
            << "; graftd kills: " << coordinator_kills << "\n"
            << "  attempts used: " << attempts << " (" << jobs_n << " without faults)\n"
            << "  points checked: " << points_checked << ", files checked: " << files_checked << "\n"
            << "  time: faults " << fault_phase_s << " s, training done at " << training_s << " s, reference runs "
            << reference_s << " s, total " << SecondsSince(drill_start) << " s\n";
  // The drill must have done what it claims: kills landed on leased jobs.
  EXPECT_GT(landed, 0) << "no kill landed while a job was in hand";
}

}  // namespace
}  // namespace graft
