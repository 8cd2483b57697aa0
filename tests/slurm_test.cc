// graft on a real Slurm: a private single-node cluster on loopback (scripts/slurm/test-cluster.sh),
// graftd started by the test, and workers that only Slurm starts, through the job-array template
// scripts/slurm/graft-workers.sbatch. graftd's data dir and the workers' scratch dirs are
// separate, so checkpoints and results reach the coordinator only over gRPC, as on a cluster
// without a shared filesystem. Every test stops its Slurm by PID and fails if anything is left.
// Where Slurm cannot start on the machine the Slurm tests skip with the reason; with CI=true in
// the environment that is a failure instead.
#include <unistd.h>

#include <algorithm>
#include <cstdlib>
#include <filesystem>
#include <iostream>
#include <map>
#include <set>
#include <sstream>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>

#include "gtest/gtest.h"
#include "tests/cluster.h"
#include "tests/test_util.h"

namespace graft::testing {
namespace {

namespace fs = std::filesystem;
using nlohmann::json;

std::string Template() { return SourceDir() + "/scripts/slurm/graft-workers.sbatch"; }
std::string WorkerBin() { return BinaryDir() + "/bin/graft-worker"; }

bool InCi() {
  const char* ci = std::getenv("CI");
  return ci != nullptr && std::string(ci) == "true";
}

// Single-quotes `s` for /bin/sh.
std::string Quote(const std::string& s) {
  std::string out = "'";
  for (char c : s) out += c == '\'' ? std::string("'\\''") : std::string(1, c);
  return out + "'";
}

std::vector<std::string> Lines(const std::string& text) {
  std::vector<std::string> lines;
  std::istringstream in(text);
  for (std::string line; std::getline(in, line);) {
    if (!line.empty()) lines.push_back(line);
  }
  return lines;
}

// "KEY=VALUE KEY=VALUE ..." (scontrol -o and jobcomp/filetxt lines) as a map.
std::map<std::string, std::string> Fields(const std::string& line) {
  std::map<std::string, std::string> fields;
  std::istringstream in(line);
  for (std::string word; in >> word;) {
    const size_t eq = word.find('=');
    if (eq != std::string::npos) fields[word.substr(0, eq)] = word.substr(eq + 1);
  }
  return fields;
}

// A private Slurm in a short directory of its own, started in the constructor and stopped by PID
// (scancel, scontrol listpids, the daemons, stray job steps) in the destructor, which fails the
// test if anything of it is still running.
class ScopedSlurm {
 public:
  ScopedSlurm() {
    CommandResult up = RunCommand(Script() + " up " + dir_.path());
    started_ = up.exit_code == 0;
    start_output_ = up.output;
  }
  ~ScopedSlurm() {
    CommandResult down = RunCommand(Script() + " down " + dir_.path());
    EXPECT_EQ(down.exit_code, 0) << "the private Slurm did not stop cleanly:\n" << down.output;
  }
  ScopedSlurm(const ScopedSlurm&) = delete;
  ScopedSlurm& operator=(const ScopedSlurm&) = delete;

  bool started() const { return started_; }
  const std::string& start_output() const { return start_output_; }
  std::string conf() const { return dir_.path() + "/etc/slurm.conf"; }

  // Runs a shell command with SLURM_CONF pointing at this cluster.
  CommandResult Run(const std::string& command) const {
    return RunCommand("export SLURM_CONF=" + Quote(conf()) + "; " + command);
  }

  // Submits with sbatch --parsable from `cwd` with `env` ("NAME=value" words, already quoted)
  // and returns the (array) job id, or "" with a test failure.
  std::string Submit(const std::string& cwd, const std::string& env, const std::string& args) const {
    CommandResult r = Run("cd " + Quote(cwd) + " && env " + env + " sbatch --parsable " + args);
    const std::string id = r.output.substr(0, r.output.find_first_not_of("0123456789"));
    EXPECT_TRUE(r.exit_code == 0 && !id.empty()) << "sbatch " << args << ":\n" << r.output;
    return r.exit_code == 0 ? id : "";
  }

  // Array tasks (or jobs) still known to squeue (pending, running or completing), as
  // "ARRAYJOB STATE" lines, one per task; "" for an empty queue.
  std::vector<std::string> Queue() const {
    CommandResult r = Run("squeue -h -r -o '%F %T'");
    EXPECT_EQ(r.exit_code, 0) << r.output;
    return Lines(r.output);
  }
  int CountQueued(const std::string& array_id) const {
    int n = 0;
    for (const std::string& line : Queue()) {
      if (line.rfind(array_id + " ", 0) == 0) ++n;
    }
    return n;
  }
  // Waits (bounded) until no task of `array_id` is left in the queue.
  bool WaitDrained(const std::string& array_id, int timeout_ms) const {
    return WaitFor([&] { return CountQueued(array_id) == 0; }, timeout_ms);
  }

  // The completion records (jobcomp/filetxt) of the tasks of `array_id`, by task id. They stay
  // after slurmctld forgets the job (there is no accounting database).
  std::map<std::string, std::map<std::string, std::string>> Completed(const std::string& array_id) const {
    std::map<std::string, std::map<std::string, std::string>> tasks;
    std::ifstream in(dir_.path() + "/log/jobcomp.log");
    for (std::string line; std::getline(in, line);) {
      auto f = Fields(line);
      if (f["ArrayJobId"] == array_id) tasks[f["ArrayTaskId"]] = f;
    }
    return tasks;
  }

  // slurmctld's log, for failure messages.
  std::string ControllerLog() const {
    return RunCommand("tail -n 40 " + Quote(dir_.path() + "/log/slurmctld.log")).output;
  }

 private:
  static std::string Script() { return SourceDir() + "/scripts/slurm/test-cluster.sh"; }

  ScopedTempDir dir_;
  bool started_ = false;
  std::string start_output_;
};

// Skips (or with CI=true fails) a test whose Slurm did not start; call as
// `if (!slurm.started()) return SlurmUnavailable(slurm);`.
void SlurmUnavailable(const ScopedSlurm& slurm) {
  if (InCi()) {
    ADD_FAILURE() << "CI=true: the private Slurm must start on CI machines, but:\n" << slurm.start_output();
    return;
  }
  GTEST_SKIP() << "Slurm cannot start on this machine:\n" << slurm.start_output();
}

std::vector<v1::Worker> Workers(Cluster& cluster, bool include_gone = true) {
  v1::ListWorkersRequest req;
  req.set_include_gone(include_gone);
  v1::ListWorkersResponse resp;
  grpc::Status s = cluster.jobs().ListWorkers(cluster.Ctx(kAlice).get(), req, &resp);
  EXPECT_TRUE(s.ok()) << s.error_message();
  return {resp.workers().begin(), resp.workers().end()};
}

const v1::Worker* FindWorker(const std::vector<v1::Worker>& workers, const std::string& id) {
  for (const auto& w : workers) {
    if (w.id() == id) return &w;
  }
  return nullptr;
}

// Submits `yaml` (a job or a sweep) as alice with `overrides`; returns every job id.
std::vector<std::string> SubmitYaml(Cluster& cluster, const std::string& yaml, const std::vector<std::string>& overrides) {
  v1::SubmitJobRequest req;
  req.set_config_yaml(yaml);
  req.set_source_name("slurm-test.yaml");
  for (const auto& o : overrides) req.add_overrides(o);
  v1::SubmitJobResponse resp;
  grpc::Status s = cluster.jobs().SubmitJob(cluster.Ctx(kAlice).get(), req, &resp);
  EXPECT_TRUE(s.ok()) << s.error_message();
  return {resp.job_ids().begin(), resp.job_ids().end()};
}

bool Ended(v1::JobState s) {
  return s == v1::JOB_STATE_SUCCEEDED || s == v1::JOB_STATE_FAILED || s == v1::JOB_STATE_CANCELLED;
}

// The shipped parcel-routing job as a six-job sweep (interchange weight 0 and 1, three seeds),
// each job a few tens of steps.
std::string SixJobSweep() {
  return ReadFile(SourceDir() + "/configs/parcel-routing.yaml") +
         "sweep:\n  grid:\n    training.loss_weights.interchange: [0.0, 1.0]\n  seeds: [1, 2, 3]\n";
}
const std::vector<std::string> kShortJob = {"training.steps=60", "evaluation.every=20", "training.checkpoint_every=20",
                                            "evaluation.triples=512"};

// Environment words for sbatch: the template's settings, and a node-local scratch base.
std::string WorkerEnv(const Cluster& cluster, const std::string& scratch, int idle_exit_s) {
  std::string env = "GRAFT_SERVER=" + Quote(cluster.address()) +
                    " GRAFT_WORKER_TOKEN_FILE=" + Quote(cluster.dir() + "/worker.token") +
                    " GRAFT_WORKER_BIN=" + Quote(WorkerBin()) + " GRAFT_IDLE_EXIT=" + std::to_string(idle_exit_s) +
                    " TMPDIR=" + Quote(scratch);
  if (cluster.tls().enabled()) env += " GRAFT_CA_FILE=" + Quote(cluster.tls().ca());
  return env;
}

// The cluster's TLS: graftd serves TLS with certificates of scripts/make-certs.sh made into
// `certs`, and workers dial with GRAFT_CA_FILE, as on a real cluster.
ClusterTls Tls(const ScopedTempDir& certs) { return ClusterTls{MakeCerts(certs.path() + "/certs"), false}; }

// ---------------------------------------------------------------------------------------------
// The template alone (no Slurm needed): its checks and how it maps a task's settings to flags.

struct TemplateRun {
  int exit_code;
  std::string output;
};
TemplateRun RunTemplate(const std::string& env) {
  CommandResult r = RunCommand("env -i PATH=/usr/bin:/bin " + env + " bash " + Quote(Template()));
  return {r.exit_code, r.output};
}

TEST(SlurmTemplate, RefusesMissingOrBadSettingsWithAMessage) {
  ScopedTempDir dir;
  const std::string token = dir.path() + "/worker.token";
  WriteFile(token, "t\n");
  const std::string ok = "GRAFT_SERVER=127.0.0.1:1 GRAFT_WORKER_TOKEN_FILE=" + token + " GRAFT_WORKER_BIN=" + WorkerBin();
  struct Case {
    std::string env;
    std::string message;
  };
  const std::vector<Case> cases = {
      {"GRAFT_WORKER_TOKEN_FILE=" + token + " GRAFT_WORKER_BIN=" + WorkerBin(), "GRAFT_SERVER is not set"},
      {"GRAFT_SERVER=127.0.0.1:1 GRAFT_WORKER_BIN=" + WorkerBin(), "GRAFT_WORKER_TOKEN_FILE is not set"},
      {"GRAFT_SERVER=127.0.0.1:1 GRAFT_WORKER_TOKEN_FILE=" + dir.path() + "/absent GRAFT_WORKER_BIN=" + WorkerBin(),
       "cannot read the worker token file"},
      {"GRAFT_SERVER=127.0.0.1:1 GRAFT_WORKER_TOKEN_FILE=" + token + " GRAFT_WORKER_BIN=" + dir.path() + "/absent",
       "is not an executable file"},
      {"GRAFT_SERVER=127.0.0.1:1 GRAFT_WORKER_TOKEN_FILE=" + token, "graft-worker is not on PATH"},
      {ok + " GRAFT_IDLE_EXIT=soon", "GRAFT_IDLE_EXIT='soon' is not a whole number of seconds"},
      {ok + " GRAFT_IDLE_EXIT=0", "GRAFT_IDLE_EXIT='0' is not a whole number of seconds"},
      {ok + " GRAFT_CA_FILE=" + dir.path() + "/absent.pem", "cannot read the CA file"},
  };
  for (const Case& c : cases) {
    TemplateRun r = RunTemplate(c.env);
    EXPECT_EQ(r.exit_code, 2) << c.env << "\n" << r.output;
    EXPECT_NE(r.output.find(c.message), std::string::npos) << c.env << "\n" << r.output;
  }
}

// The template outside Slurm with a task's environment: graft-worker found on PATH, --threads
// from SLURM_CPUS_PER_TASK, the Slurm ids recorded, the scratch dir under TMPDIR, and the
// worker leaves by GRAFT_IDLE_EXIT with exit code 0.
TEST(SlurmTemplate, StartsOneWorkerWithTheTasksSettings) {
  Cluster cluster;
  ScopedTempDir scratch;
  const std::string env = "PATH=" + Quote(BinaryDir() + "/bin:/usr/bin:/bin") + " GRAFT_SERVER=" +
                          Quote(cluster.address()) + " GRAFT_WORKER_TOKEN_FILE=" + Quote(cluster.dir() + "/worker.token") +
                          " GRAFT_IDLE_EXIT=1 TMPDIR=" + Quote(scratch.path()) +
                          " SLURM_CPUS_PER_TASK=2 SLURM_JOB_ID=907 SLURM_ARRAY_JOB_ID=905 SLURM_ARRAY_TASK_ID=2";
  CommandResult r = RunCommand("env -i " + env + " bash " + Quote(Template()));
  ASSERT_EQ(r.exit_code, 0) << r.output;
  EXPECT_NE(r.output.find(BinaryDir() + "/bin/graft-worker serve"), std::string::npos) << r.output;
  EXPECT_TRUE(fs::is_directory(scratch.path() + "/graft-worker-905_2")) << r.output;

  std::vector<v1::Worker> workers = Workers(cluster);
  ASSERT_EQ(workers.size(), 1u);
  EXPECT_EQ(workers[0].threads(), 2);
  EXPECT_EQ(workers[0].slurm_job_id(), "907");
  EXPECT_EQ(workers[0].slurm_array_job_id(), "905");
  EXPECT_EQ(workers[0].slurm_array_task_id(), "2");
  EXPECT_EQ(workers[0].state(), v1::WORKER_STATE_GONE);
}

// ---------------------------------------------------------------------------------------------
// The three drills on a real Slurm.

class SlurmTest : public ::testing::Test {
 protected:
  ScopedTempDir files_;  // certificates, sbatch's working dir and task output, the reference run
  ScopedTempDir scratch_;  // the workers' node-local disk (TMPDIR of every task)
  std::string out_dir() const { return files_.path(); }
  // Every task's output file, for failure messages.
  std::string TaskOutputs() const {
    std::string all;
    for (const auto& entry : fs::directory_iterator(out_dir())) {
      if (entry.path().extension() != ".out") continue;
      all += "--- " + entry.path().filename().string() + "\n" + ReadFile(entry.path().string());
    }
    return all;
  }
};

// Scenario 1: two array tasks of the template run a six-job sweep to the end and leave by
// --idle-exit; their tasks complete with exit code 0.
TEST_F(SlurmTest, TwoArrayTasksRunASweepAndLeaveWhenIdle) {
  ScopedSlurm slurm;
  if (!slurm.started()) return SlurmUnavailable(slurm);
  Cluster cluster(30, {}, Tls(files_));

  const std::vector<std::string> ids = SubmitYaml(cluster, SixJobSweep(), kShortJob);
  ASSERT_EQ(ids.size(), 6u);
  const std::string array =
      slurm.Submit(out_dir(), WorkerEnv(cluster, scratch_.path(), 3), "--array=0-1 -c 1 " + Quote(Template()));
  ASSERT_FALSE(array.empty());

  // Until every job ended, or no task is left to train them.
  auto all_ended = [&] {
    return std::all_of(ids.begin(), ids.end(), [&](const std::string& id) { return Ended(cluster.Get(id).state()); });
  };
  WaitFor([&] { return all_ended() || slurm.CountQueued(array) == 0; }, 180000);
  ASSERT_TRUE(all_ended()) << cluster.Log() << slurm.ControllerLog() << TaskOutputs();
  ASSERT_TRUE(slurm.WaitDrained(array, 60000)) << "the workers did not leave when idle\n" << TaskOutputs();

  const std::vector<v1::Worker> workers = Workers(cluster);
  for (const std::string& id : ids) {
    const v1::Job job = cluster.Get(id);
    EXPECT_EQ(job.state(), v1::JOB_STATE_SUCCEEDED) << id << ": " << job.error();
    const v1::Worker* w = FindWorker(workers, job.worker_id());
    ASSERT_NE(w, nullptr) << id << " ended by unknown worker '" << job.worker_id() << "'";
    EXPECT_EQ(w->slurm_array_job_id(), array) << id << " was trained by " << w->id();
    EXPECT_FALSE(w->slurm_job_id().empty()) << w->id();
  }
  // Both tasks registered, trained the six jobs between them, and left by --idle-exit.
  std::set<std::string> tasks;
  int finished = 0;
  for (const v1::Worker& w : workers) {
    EXPECT_EQ(w.slurm_array_job_id(), array) << w.id();
    EXPECT_EQ(w.threads(), 1) << w.id();
    EXPECT_EQ(w.state(), v1::WORKER_STATE_GONE) << w.id();
    tasks.insert(w.slurm_array_task_id());
    finished += static_cast<int>(w.jobs_finished());
  }
  EXPECT_EQ(tasks, (std::set<std::string>{"0", "1"}));
  EXPECT_EQ(finished, 6);
  const auto done = slurm.Completed(array);
  ASSERT_EQ(done.size(), 2u) << slurm.ControllerLog();
  for (const auto& [task, f] : done) {
    EXPECT_EQ(f.at("JobState"), "COMPLETED") << "task " << task;
    EXPECT_EQ(f.at("ExitCode"), "0:0") << "task " << task;
    const std::string output = ReadFile(out_dir() + "/graft-worker-" + array + "_" + task + ".out");
    EXPECT_NE(output.find("--idle-exit 3"), std::string::npos) << output;
    EXPECT_NE(output.find("leaving"), std::string::npos) << "task " << task << " did not leave by --idle-exit:\n"
                                                         << output;
    // Scratch on the node's disk, separate from graftd's data dir; emptied after each job.
    const fs::path work = fs::path(scratch_.path()) / ("graft-worker-" + array + "_" + task);
    EXPECT_TRUE(fs::is_directory(work)) << work;
    EXPECT_TRUE(fs::is_empty(work)) << work;
  }
}

// The template's own checks reach the task's output through Slurm: a task without
// GRAFT_SERVER fails with the message and a non-zero exit code.
TEST_F(SlurmTest, ATaskWithoutTheServerFailsWithAMessage) {
  ScopedSlurm slurm;
  if (!slurm.started()) return SlurmUnavailable(slurm);
  const std::string token = out_dir() + "/worker.token";
  WriteFile(token, "t\n");
  const std::string array = slurm.Submit(out_dir(), "-u GRAFT_SERVER GRAFT_WORKER_TOKEN_FILE=" + Quote(token),
                                         "--array=0 " + Quote(Template()));
  ASSERT_FALSE(array.empty());
  ASSERT_TRUE(slurm.WaitDrained(array, 60000)) << slurm.ControllerLog();
  const auto done = slurm.Completed(array);
  ASSERT_EQ(done.count("0"), 1u) << slurm.ControllerLog();
  EXPECT_EQ(done.at("0").at("JobState"), "FAILED");
  EXPECT_EQ(done.at("0").at("ExitCode"), "2:0");
  const std::string output = ReadFile(out_dir() + "/graft-worker-" + array + "_0.out");
  EXPECT_NE(output.find("GRAFT_SERVER is not set"), std::string::npos) << output;
}

// Scenario 2: a job longer than a task's 1-minute time limit. Slurm signals the worker
// (--signal=B:TERM@15: slurmctld checks limits every 30 s, so the signal comes 15-45 s into the
// task), the worker checkpoints, uploads and hands the job back and exits before the limit; the
// next task (one at a time: %1) resumes from that checkpoint. The result equals the same spec run
// uninterrupted by graft-worker run, field by field, but for timings.
TEST_F(SlurmTest, ATimeLimitedTaskHandsBackAndTheNextResumes) {
  ScopedSlurm slurm;
  if (!slurm.started()) return SlurmUnavailable(slurm);
  Cluster cluster(30, {}, Tls(files_));

  // Longer than the latest possible signal (45 s): since the hand-written MLP step, 60000 steps
  // ended inside the first task of a quiet 2-core CI run, hence five times as many. The assertion
  // on the attempts below says so if a faster machine still finishes it inside the first task.
  constexpr int64_t kSteps = 300000;
  const std::vector<std::string> ids =
      SubmitYaml(cluster, ReadFile(SourceDir() + "/configs/parcel-routing.yaml"),
                 {"training.steps=" + std::to_string(kSteps), "evaluation.every=25000", "training.checkpoint_every=50000",
                  "evaluation.triples=1024"});
  ASSERT_EQ(ids.size(), 1u);
  const std::string id = ids[0];
  // The reference: the same resolved spec, uninterrupted, in a process of its own.
  const std::string spec = out_dir() + "/spec.yaml";
  WriteFile(spec, cluster.Get(id).spec_yaml());
  ScopedProcess reference({WorkerBin(), "run", spec, "--out", out_dir() + "/reference"}, out_dir() + "/reference.log");

  // Up to 40 tasks, one at a time, each moving the job on by 15-45 s: enough also on a machine
  // slowed by other load. Those not needed are cancelled while still pending.
  const std::string array = slurm.Submit(out_dir(), WorkerEnv(cluster, scratch_.path(), 2),
                                         "--array=0-39%1 -c 1 --time=00:01:00 --signal=B:TERM@15 " + Quote(Template()));
  ASSERT_FALSE(array.empty());
  WaitFor([&] { return Ended(cluster.Get(id).state()) || slurm.CountQueued(array) == 0; }, 600000);
  ASSERT_TRUE(Ended(cluster.Get(id).state())) << cluster.Log() << slurm.ControllerLog() << TaskOutputs();
  // The tasks not needed any more are cancelled before they start; the running one leaves idle.
  slurm.Run("scancel --state=PENDING " + array);
  ASSERT_TRUE(slurm.WaitDrained(array, 120000)) << slurm.ControllerLog();
  ASSERT_EQ(reference.Wait(600000), 0) << ReadFile(out_dir() + "/reference.log");

  const v1::Job job = cluster.Get(id);
  ASSERT_EQ(job.state(), v1::JOB_STATE_SUCCEEDED) << job.error();
  ASSERT_GE(job.attempt(), 2) << "the job finished inside the first task, before Slurm's time-limit signal; "
                                 "it must train for longer than 45 s here";
  // A hand-back raises the job's allowance by one (graftd's default is 3 attempts), so it is not
  // counted against the job.
  EXPECT_EQ(job.max_attempts(), 3 + (job.attempt() - 1));
  EXPECT_GT(job.checkpoint_step(), 0);

  // Resumed, not restarted: the step-0 evaluation is still the first attempt's, the last is the
  // final attempt's (a restart from zero would have replaced every point).
  const std::vector<v1::Point> points = cluster.Metrics(id);
  ASSERT_FALSE(points.empty());
  EXPECT_EQ(points.front().step(), 0);
  EXPECT_EQ(points.front().attempt(), 1);
  EXPECT_EQ(points.back().attempt(), job.attempt());

  // Attempt 1 was task 0's; the job was finished by a later task of the same array.
  const std::vector<v1::Worker> workers = Workers(cluster);
  const v1::Worker* last = FindWorker(workers, job.worker_id());
  ASSERT_NE(last, nullptr) << job.worker_id();
  EXPECT_EQ(last->slurm_array_job_id(), array);
  EXPECT_NE(last->slurm_array_task_id(), "0");
  EXPECT_EQ(last->jobs_finished(), 1);
  for (const v1::Worker& w : workers) {
    if (w.slurm_array_task_id() == "0") {
      EXPECT_EQ(w.jobs_finished(), 0) << "task 0 handed its job back";
    }
  }
  // Every task that ran (its worker registered) ended by itself, exit code 0, before the limit's
  // kill (which Slurm records as TIMEOUT); the others were cancelled while pending.
  const auto done = slurm.Completed(array);
  std::set<std::string> ran;
  for (const v1::Worker& w : workers) ran.insert(w.slurm_array_task_id());
  EXPECT_GE(ran.size(), 2u);
  for (const std::string& task : ran) {
    ASSERT_EQ(done.count(task), 1u) << "no completion record for task " << task;
    EXPECT_EQ(done.at(task).at("JobState"), "COMPLETED") << "task " << task;
    EXPECT_EQ(done.at(task).at("ExitCode"), "0:0") << "task " << task;
  }
  std::cout << "time-limit drill: " << job.attempt() << " attempts over tasks 0-" << *std::max_element(
                   ran.begin(), ran.end(), [](const std::string& a, const std::string& b) { return std::stoi(a) < std::stoi(b); })
            << " of array " << array << ", last checkpoint at step " << job.checkpoint_step() << "\n";
  const std::string last_output =
      ReadFile(out_dir() + "/graft-worker-" + array + "_" + last->slurm_array_task_id() + ".out");
  EXPECT_NE(last_output.find("resuming from step"), std::string::npos) << last_output;

  // Same metrics as the uninterrupted run: every point, and result.json, but for timings.
  const std::vector<std::string> ref_lines = Lines(ReadFile(out_dir() + "/reference/metrics.jsonl"));
  ASSERT_EQ(points.size(), ref_lines.size());
  for (size_t i = 0; i < points.size(); ++i) {
    json got = json::parse(points[i].metrics_json());
    json want = json::parse(ref_lines[i]);
    got.erase("wall_s");
    want.erase("wall_s");
    EXPECT_EQ(got, want) << "point " << i;
  }
  json got = json::parse(job.result_json());
  json want = json::parse(ReadFile(out_dir() + "/reference/result.json"));
  // resumed_from_step and steps_this_process say which steps the last task trained, not what it
  // computed: the last attempt resumed after step 0 and trained only the rest.
  EXPECT_GT(got.value("resumed_from_step", int64_t{0}), 0);
  EXPECT_EQ(got.value("steps_this_process", int64_t{-1}), kSteps - got.value("resumed_from_step", int64_t{0}));
  EXPECT_EQ(want.value("resumed_from_step", int64_t{-1}), 0);
  for (const char* timing : {"wall_s", "examples_per_s", "first_step_s", "train_steps_s", "peak_rss_mb",
                             "resumed_from_step", "steps_this_process"}) {
    ASSERT_TRUE(want.contains(timing)) << timing;
    got.erase(timing);
    want.erase(timing);
  }
  EXPECT_EQ(got, want);
}

// Scenario 3: graftd's launcher submits the workers itself. A blocker job holds both CPUs, so
// graftd's tasks stay pending: they show as pending in `graft workers`, and six queued jobs get
// no more than max_workers (2) tasks, counting pending ones. Then the blocker goes, the tasks run
// the sweep and leave when idle.
TEST_F(SlurmTest, TheLauncherStartsAtMostMaxWorkersThroughSlurm) {
  ScopedSlurm slurm;
  if (!slurm.started()) return SlurmUnavailable(slurm);
  const ClusterTls tls = Tls(files_);
  // The launcher's worker token, in a dir of its own as on a cluster's shared home.
  ScopedTempDir token_dir;
  const std::string token_file = token_dir.path() + "/worker.token";
  WriteFile(token_file, std::string(kWorker) + "\n");
  const std::string settings = out_dir() + "/graftd.yaml";
  std::ostringstream yaml;
  yaml << "launcher:\n"
       << "  command: " << json("sbatch --parsable --chdir=" + out_dir()).dump() << "\n"
       << "  script: " << json(Template()).dump() << "\n"
       << "  interval_seconds: 1\n"
       << "  max_workers: 2\n"
       << "  cpus_per_worker: 1\n"
       << "  worker_token_file: " << json(token_file).dump() << "\n"
       << (tls.enabled() ? "  ca_file: " + json(tls.ca()).dump() + "\n" : "")
       << "  idle_exit_seconds: 3\n"
       << "  worker_bin: " << json(WorkerBin()).dump() << "\n"
       << "  env:\n"
       << "    SLURM_CONF: " << json(slurm.conf()).dump() << "\n"
       << "    TMPDIR: " << json(scratch_.path()).dump() << "\n";
  // Occupy the node first, so that graftd's tasks must wait in the queue.
  const std::string blocker = slurm.Submit(out_dir(), "", "-c 2 -o blocker.out --wrap 'exec sleep 600'");
  ASSERT_FALSE(blocker.empty());
  ASSERT_TRUE(WaitFor([&] { return slurm.Run("squeue -h -j " + blocker + " -o %T").output == "RUNNING\n"; }, 60000))
      << slurm.ControllerLog();

  WriteFile(settings, yaml.str());
  Cluster cluster(30, {"--config", settings}, tls);

  const std::vector<std::string> ids = SubmitYaml(cluster, SixJobSweep(), kShortJob);
  ASSERT_EQ(ids.size(), 6u);

  // The most tasks of graftd's (every job but the blocker) alive or pending at once, and of
  // workers graft workers shows alive or pending; sampled at every poll below.
  int most_tasks = 0, most_workers = 0;
  auto sample = [&] {
    int tasks = 0;
    for (const std::string& line : slurm.Queue()) {
      if (line.rfind(blocker + " ", 0) != 0) ++tasks;
    }
    most_tasks = std::max(most_tasks, tasks);
    most_workers = std::max(most_workers, static_cast<int>(Workers(cluster, false).size()));
  };
  // While the node is full: graftd's tasks wait, and graft workers --json lists them as pending.
  std::string listing;
  int pending = 0;
  ASSERT_TRUE(WaitFor(
      [&] {
        sample();
        CommandResult r = RunCommand(BinaryDir() + "/bin/graft --server " + cluster.address() + " --token " + kAlice +
                                     (tls.enabled() ? " --ca-file " + Quote(tls.ca()) : "") + " workers --json");
        listing = r.output;
        json list = json::parse(r.output, nullptr, false);
        if (r.exit_code != 0 || !list.is_array()) return false;
        pending = 0;
        for (const json& w : list) {
          pending += w.value("state", "") == "pending" && !w.value("slurm_array_job_id", "").empty();
        }
        return pending >= 2;
      },
      60000))
      << listing << cluster.Log() << slurm.ControllerLog() << TaskOutputs();
  EXPECT_EQ(pending, 2) << "six queued jobs, max_workers 2:\n" << listing;
  EXPECT_EQ(slurm.CountQueued(blocker), 1);

  ASSERT_EQ(slurm.Run("scancel " + blocker).exit_code, 0);
  ASSERT_TRUE(WaitFor(
      [&] {
        sample();
        return std::all_of(ids.begin(), ids.end(), [&](const std::string& id) { return Ended(cluster.Get(id).state()); });
      },
      300000))
      << cluster.Log() << slurm.ControllerLog() << TaskOutputs();
  // The workers leave by --idle-exit and graftd submits nothing more for an empty queue.
  ASSERT_TRUE(WaitFor(
      [&] {
        sample();
        return slurm.Queue().empty();
      },
      120000))
      << slurm.ControllerLog();

  EXPECT_LE(most_tasks, 2) << "graftd submitted more tasks than max_workers";
  EXPECT_LE(most_workers, 2) << "graft workers showed more than max_workers alive or pending";
  EXPECT_GE(most_tasks, 1);
  const std::vector<v1::Worker> workers = Workers(cluster);
  std::set<std::string> arrays;
  for (const std::string& id : ids) {
    const v1::Job job = cluster.Get(id);
    EXPECT_EQ(job.state(), v1::JOB_STATE_SUCCEEDED) << id << ": " << job.error();
    const v1::Worker* w = FindWorker(workers, job.worker_id());
    ASSERT_NE(w, nullptr) << id << ": " << job.worker_id();
    EXPECT_FALSE(w->slurm_job_id().empty()) << w->id() << " is not a Slurm task";
    arrays.insert(w->slurm_array_job_id());
  }
  // Every task graftd submitted completed with exit code 0.
  for (const std::string& a : arrays) {
    for (const auto& [task, f] : slurm.Completed(a)) {
      EXPECT_EQ(f.at("JobState"), "COMPLETED") << a << "_" << task;
      EXPECT_EQ(f.at("ExitCode"), "0:0") << a << "_" << task;
    }
  }
}

}  // namespace
}  // namespace graft::testing
