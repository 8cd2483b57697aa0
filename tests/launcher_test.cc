// The elastic launcher against a real coordinator over a temporary SQLite store, with a fake
// clock and a fake command runner that records what would have been submitted to Slurm. The
// real sbatch path is exercised by the Slurm drill (tests/slurm_test.cc).
#include <map>
#include <memory>
#include <string>
#include <vector>

#include "gtest/gtest.h"
#include "server/coordinator.h"
#include "server/launcher.h"
#include "spdlog/sinks/null_sink.h"
#include "spdlog/spdlog.h"
#include "tests/fake_clock.h"
#include "tests/test_util.h"

namespace graft::server {
namespace {

using ::graft::testing::FakeClock;
using ::graft::testing::ReadFile;
using ::graft::testing::ScopedTempDir;
using ::graft::testing::SourceDir;

// Answers sbatch with a fixed array job id (or a failure) and squeue with a given task list.
class FakeRunner : public CommandRunner {
 public:
  struct Call {
    std::vector<std::string> argv;
    std::map<std::string, std::string> env;
  };
  CommandOutcome Run(const std::vector<std::string>& argv, const std::map<std::string, std::string>& env,
                     int64_t) override {
    calls.push_back({argv, env});
    if (argv[0] == "squeue") return squeue;
    CommandOutcome out = sbatch;
    if (out.exit_code == 0) out.output = std::to_string(next_id++) + "\n";
    return out;
  }
  std::vector<Call> Submits() const {
    std::vector<Call> out;
    for (const auto& c : calls) {
      if (c.argv[0] == "sbatch") out.push_back(c);
    }
    return out;
  }
  std::vector<Call> calls;
  CommandOutcome sbatch{0, ""};
  CommandOutcome squeue{0, ""};
  int next_id = 100;
};

class LauncherTest : public ::testing::Test {
 protected:
  void SetUp() override {
    auto store = OpenSqliteJobStore(dir_.path() + "/graft.db", Durability::kNormal);
    ASSERT_TRUE(store.ok()) << store.status();
    CoordinatorOptions options;
    options.data_dir = dir_.path() + "/data";
    options.sweep_interval_ms = 3'600'000;  // no background sweeps: the fake clock rules
    log_ = std::make_shared<spdlog::logger>("test", std::make_shared<spdlog::sinks::null_sink_mt>());
    coordinator_ = std::make_unique<Coordinator>(std::move(*store), options, &clock_, log_);
    ASSERT_TRUE(coordinator_->Start().ok());
    options_.enabled = true;
    options_.max_workers = 3;
    options_.cpus_per_worker = 2;
    options_.partition = "cpu";
    options_.time_limit = "08:00:00";
    options_.script = "/opt/graft/graft-workers.sbatch";
    options_.server = "coord.example:7070";
    options_.worker_token_file = "/etc/graft/worker.token";
    options_.ca_file = "/etc/graft/ca.pem";
    options_.idle_exit_seconds = 90;
    options_.env = {{"SLURM_CONF", "/x/slurm.conf"}};
  }
  void TearDown() override {
    if (coordinator_) coordinator_->Shutdown();
  }

  void SubmitJobs(int n) {
    v1::SubmitJobRequest req;
    req.set_config_yaml(ReadFile(SourceDir() + "/configs/parcel-routing.yaml"));
    req.set_source_name("parcel-routing.yaml");
    for (int i = 0; i < n; ++i) {
      auto r = coordinator_->Submit(Principal{"alice", Role::kUser}, req);
      ASSERT_TRUE(r.ok()) << r.status();
    }
  }
  std::string Register(const std::string& array_job, const std::string& task) {
    v1::RegisterWorkerRequest req;
    req.set_host("node7");
    req.set_threads(2);
    req.set_slurm_job_id(array_job + task);
    req.set_slurm_array_job_id(array_job);
    req.set_slurm_array_task_id(task);
    auto r = coordinator_->Register(Principal{"node", Role::kWorker}, req);
    EXPECT_TRUE(r.ok()) << r.status();
    return r.ok() ? r->worker_id() : "";
  }
  std::vector<std::string> States() {
    auto r = coordinator_->ListWorkers(false);
    EXPECT_TRUE(r.ok()) << r.status();
    std::vector<std::string> out;
    for (const auto& w : r->workers()) out.push_back(v1::WorkerState_Name(w.state()) + " " + w.id());
    return out;
  }

  ScopedTempDir dir_;
  FakeClock clock_{1'000'000};
  std::shared_ptr<spdlog::logger> log_;
  std::unique_ptr<Coordinator> coordinator_;
  LauncherOptions options_;
  FakeRunner runner_;
};

TEST_F(LauncherTest, SubmitsWhatTheQueueNeedsUpToTheCeilingCountingPendingTasks) {
  SubmitJobs(5);
  Launcher launcher(coordinator_.get(), options_, &runner_, &clock_, log_);
  // Five queued jobs, no workers, a ceiling of three: one array of three tasks.
  EXPECT_EQ(launcher.Tick(), 3);
  ASSERT_EQ(runner_.Submits().size(), 1u);
  const FakeRunner::Call call = runner_.Submits()[0];
  EXPECT_EQ(call.argv, (std::vector<std::string>{"sbatch", "--parsable", "--array=0-2", "--cpus-per-task=2",
                                                 "--partition=cpu", "--time=08:00:00",
                                                 "/opt/graft/graft-workers.sbatch"}));
  EXPECT_EQ(call.env.at("GRAFT_SERVER"), "coord.example:7070");
  EXPECT_EQ(call.env.at("GRAFT_WORKER_TOKEN_FILE"), "/etc/graft/worker.token");
  EXPECT_EQ(call.env.at("GRAFT_CA_FILE"), "/etc/graft/ca.pem");
  EXPECT_EQ(call.env.at("GRAFT_IDLE_EXIT"), "90");
  EXPECT_EQ(call.env.at("SLURM_CONF"), "/x/slurm.conf");
  EXPECT_EQ(States(), (std::vector<std::string>{"WORKER_STATE_PENDING slurm-100_0", "WORKER_STATE_PENDING slurm-100_1",
                                                "WORKER_STATE_PENDING slurm-100_2"}));
  // squeue still lists them: the pending tasks count against the ceiling, nothing more is asked.
  runner_.squeue.output = "100_0\n100_1\n100_2\n";
  EXPECT_EQ(launcher.Tick(), 0);
  EXPECT_EQ(runner_.Submits().size(), 1u);
  // A task starts and registers: it is a worker now, no longer pending; still at the ceiling.
  const std::string w = Register("100", "0");
  runner_.squeue.output = "100_0\n100_1\n100_2\n";
  EXPECT_EQ(launcher.Tick(), 0);
  EXPECT_EQ(States(), (std::vector<std::string>{"WORKER_STATE_IDLE " + w, "WORKER_STATE_PENDING slurm-100_1",
                                                "WORKER_STATE_PENDING slurm-100_2"}));
  auto demand = coordinator_->Demand();
  EXPECT_EQ(demand.queued_jobs, 5);
  EXPECT_EQ(demand.idle_workers, 1);
  EXPECT_EQ(demand.live_workers, 1);
  EXPECT_EQ(demand.pending_tasks, 2);
}

TEST_F(LauncherTest, ForgetsTasksSlurmNoLongerListsAndAsksAgain) {
  SubmitJobs(2);
  options_.max_workers = 2;
  Launcher launcher(coordinator_.get(), options_, &runner_, &clock_, log_);
  EXPECT_EQ(launcher.Tick(), 2);
  // Task 0 was cancelled in Slurm before it started; squeue lists only task 1.
  runner_.squeue.output = "100_1\n";
  EXPECT_EQ(launcher.Tick(), 1);
  ASSERT_EQ(runner_.Submits().size(), 2u);
  EXPECT_EQ(runner_.Submits()[1].argv[2], "--array=0-0");
  // The status command is squeue for the pending array jobs only.
  std::vector<std::string> squeue;
  for (const auto& c : runner_.calls) {
    if (c.argv[0] == "squeue") squeue = c.argv;
  }
  EXPECT_EQ(squeue, (std::vector<std::string>{"squeue", "--noheader", "--array", "--format=%i", "--jobs", "100"}));
  // Every id has left Slurm's memory: squeue refuses the list, and nothing is pending any more.
  runner_.squeue = CommandOutcome{1, "slurm_load_jobs error: Invalid job id specified\n"};
  EXPECT_EQ(launcher.Tick(), 2);
  // Any other squeue failure keeps the pending tasks (and asks for nothing more).
  runner_.squeue = CommandOutcome{1, "squeue: error: Unable to contact slurm controller\n"};
  EXPECT_EQ(launcher.Tick(), 0);
  EXPECT_EQ(coordinator_->Demand().pending_tasks, 2);
}

TEST_F(LauncherTest, AFailingSubmitIsRetriedWithBackoffAndNothingIsRecorded) {
  SubmitJobs(1);
  options_.retry_ms = 5000;
  runner_.sbatch = CommandOutcome{1, "sbatch: error: invalid partition specified: cpu\n"};
  Launcher launcher(coordinator_.get(), options_, &runner_, &clock_, log_);
  EXPECT_EQ(launcher.Tick(), 0);
  EXPECT_EQ(runner_.Submits().size(), 1u);
  EXPECT_EQ(coordinator_->Demand().pending_tasks, 0);
  // Backing off: no second try until 5 s have passed, then 10 s.
  clock_.now_ms += 4999;
  EXPECT_EQ(launcher.Tick(), 0);
  EXPECT_EQ(runner_.Submits().size(), 1u);
  clock_.now_ms += 1;
  EXPECT_EQ(launcher.Tick(), 0);
  EXPECT_EQ(runner_.Submits().size(), 2u);
  clock_.now_ms += 9999;
  EXPECT_EQ(launcher.Tick(), 0);
  EXPECT_EQ(runner_.Submits().size(), 2u);
  // A command that succeeds without printing a job id is a failure too.
  runner_.sbatch = CommandOutcome{0, ""};
  clock_.now_ms += 1;
  runner_.next_id = -1;  // FakeRunner prints "-1": not a job id
  EXPECT_EQ(launcher.Tick(), 0);
  EXPECT_EQ(runner_.Submits().size(), 3u);
  // Once the command works, the backoff is over.
  runner_.next_id = 200;
  clock_.now_ms += 20000;
  EXPECT_EQ(launcher.Tick(), 1);
  EXPECT_EQ(coordinator_->Demand().pending_tasks, 1);
}

TEST(LauncherProcessRunner, RunsACommandWithItsEnvironmentAndReportsFailures) {
  auto runner = CreateProcessRunner();
  CommandOutcome ok = runner->Run({"/bin/sh", "-c", "echo \"$GRAFT_SERVER\"; echo err >&2; exit 3"},
                                  {{"GRAFT_SERVER", "h:1"}}, 10000);
  EXPECT_EQ(ok.exit_code, 3);
  EXPECT_EQ(ok.output, "h:1\nerr\n");
  CommandOutcome missing = runner->Run({"/nonexistent/sbatch"}, {}, 10000);
  EXPECT_EQ(missing.exit_code, -1);
  EXPECT_NE(missing.output.find("cannot start '/nonexistent/sbatch'"), std::string::npos) << missing.output;
}

}  // namespace
}  // namespace graft::server
