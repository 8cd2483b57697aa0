// The SQLite job store: every field round-trips, listing filters and pages like a brute-force
// model, leasing is exclusive under concurrency, and what was acknowledged survives a reopen
// and a killed process.
#include <poll.h>
#include <signal.h>
#include <sqlite3.h>
#include <sys/types.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <filesystem>
#include <cstdint>
#include <map>
#include <memory>
#include <mutex>
#include <random>
#include <set>
#include <string>
#include <thread>
#include <vector>

#include "gtest/gtest.h"
#include "server/job_store.h"
#include "tests/test_util.h"

namespace graft::server {
namespace {

using ::graft::testing::ScopedTempDir;

std::unique_ptr<JobStore> OpenOrDie(const std::string& path, Durability durability = Durability::kNormal) {
  absl::StatusOr<std::unique_ptr<JobStore>> store = OpenSqliteJobStore(path, durability);
  EXPECT_TRUE(store.ok()) << store.status();
  return store.ok() ? std::move(*store) : nullptr;
}

// A job with every field set to a distinct, non-default value.
JobRecord FullJob() {
  JobRecord job;
  job.name = "parcel-routing-\xC3\xA9tape";  // non-ASCII UTF-8 on purpose
  job.owner = "mira";
  job.state = JobState::kRunning;
  job.priority = -7;
  job.labels = {{"depot", "harbor"}, {"shift", "night"}, {"", "empty key"}};
  job.attempt = 2;
  job.max_attempts = 5;
  job.submitted_ms = 1700000000001;
  job.started_ms = 1700000000002;
  job.finished_ms = 1700000000003;
  job.total_steps = 4000;
  job.step = 1234;
  job.spec_yaml = "name: parcel-routing\nseed: 7\n'quoted' \"both\" ; DROP TABLE jobs; --\n";
  job.result_json = R"({"iia": 0.93})";
  job.error = "lease lapsed on worker w-3";
  job.worker_id = "w-3";
  job.lease_expires_ms = 1700000060000;
  job.checkpoint_step = 1000;
  job.sweep_id = "sweep-42";
  job.cancel_reason = "cancelled by mira: wrong \"layer\"; the worker stopped at step 1234";
  return job;
}

void ExpectSameJob(const JobRecord& a, const JobRecord& b) {
  EXPECT_EQ(a.id, b.id);
  EXPECT_EQ(a.name, b.name);
  EXPECT_EQ(a.owner, b.owner);
  EXPECT_EQ(a.state, b.state);
  EXPECT_EQ(a.priority, b.priority);
  EXPECT_EQ(a.labels, b.labels);
  EXPECT_EQ(a.attempt, b.attempt);
  EXPECT_EQ(a.max_attempts, b.max_attempts);
  EXPECT_EQ(a.submitted_ms, b.submitted_ms);
  EXPECT_EQ(a.started_ms, b.started_ms);
  EXPECT_EQ(a.finished_ms, b.finished_ms);
  EXPECT_EQ(a.total_steps, b.total_steps);
  EXPECT_EQ(a.step, b.step);
  EXPECT_EQ(a.spec_yaml, b.spec_yaml);
  EXPECT_EQ(a.result_json, b.result_json);
  EXPECT_EQ(a.error, b.error);
  EXPECT_EQ(a.worker_id, b.worker_id);
  EXPECT_EQ(a.lease_expires_ms, b.lease_expires_ms);
  EXPECT_EQ(a.checkpoint_step, b.checkpoint_step);
  EXPECT_EQ(a.sweep_id, b.sweep_id);
  EXPECT_EQ(a.cancel_reason, b.cancel_reason);
}

JobRecord QueuedJob(const std::string& name, int32_t priority = 0) {
  JobRecord job;
  job.name = name;
  job.owner = "mira";
  job.priority = priority;
  return job;
}

std::vector<int64_t> Ids(const std::vector<JobRecord>& jobs) {
  std::vector<int64_t> ids;
  for (const JobRecord& j : jobs) ids.push_back(j.id);
  return ids;
}

// Runs one SQL query on a separate raw connection and returns the first column of its first row.
std::string RawQuery(const std::string& path, const std::string& sql) {
  sqlite3* db = nullptr;
  std::string out = "<error>";
  if (sqlite3_open_v2(path.c_str(), &db, SQLITE_OPEN_READWRITE, nullptr) == SQLITE_OK) {
    sqlite3_stmt* stmt = nullptr;
    if (sqlite3_prepare_v2(db, sql.c_str(), -1, &stmt, nullptr) == SQLITE_OK && sqlite3_step(stmt) == SQLITE_ROW) {
      const unsigned char* text = sqlite3_column_text(stmt, 0);
      out = text != nullptr ? reinterpret_cast<const char*>(text) : "";
    }
    sqlite3_finalize(stmt);
  }
  sqlite3_close(db);
  return out;
}

// Sets user_version on a raw connection (creating the file if needed).
void SetUserVersion(const std::string& path, int version) {
  sqlite3* db = nullptr;
  ASSERT_EQ(sqlite3_open(path.c_str(), &db), SQLITE_OK);
  const std::string sql = "PRAGMA user_version = " + std::to_string(version);
  ASSERT_EQ(sqlite3_exec(db, sql.c_str(), nullptr, nullptr, nullptr), SQLITE_OK) << sqlite3_errmsg(db);
  sqlite3_close(db);
}

class SqliteJobStore : public ::testing::Test {
 protected:
  void SetUp() override {
    path_ = dir_.path() + "/jobs.db";
    store_ = OpenOrDie(path_);
    ASSERT_NE(store_, nullptr);
  }
  ScopedTempDir dir_;
  std::string path_;
  std::unique_ptr<JobStore> store_;
};

TEST(JobState, NamesAndFinality) {
  EXPECT_STREQ(ToString(JobState::kQueued), "queued");
  EXPECT_STREQ(ToString(JobState::kRunning), "running");
  EXPECT_STREQ(ToString(JobState::kSucceeded), "succeeded");
  EXPECT_STREQ(ToString(JobState::kFailed), "failed");
  EXPECT_STREQ(ToString(JobState::kCancelled), "cancelled");
  EXPECT_FALSE(IsFinal(JobState::kQueued));
  EXPECT_FALSE(IsFinal(JobState::kRunning));
  EXPECT_TRUE(IsFinal(JobState::kSucceeded));
  EXPECT_TRUE(IsFinal(JobState::kFailed));
  EXPECT_TRUE(IsFinal(JobState::kCancelled));
}

TEST_F(SqliteJobStore, InsertGetUpdateRoundTripsEveryField) {
  JobRecord job = FullJob();
  job.id = 999;  // ignored by InsertJob
  absl::StatusOr<int64_t> id = store_->InsertJob(job);
  ASSERT_OK(id);
  EXPECT_EQ(*id, 1);
  job.id = *id;
  absl::StatusOr<JobRecord> got = store_->GetJob(*id);
  ASSERT_OK(got);
  ExpectSameJob(*got, job);

  JobRecord changed;  // every field different again
  changed.id = *id;
  changed.name = "checksum-digits";
  changed.owner = "teo";
  changed.state = JobState::kFailed;
  changed.priority = 9;
  changed.labels = {{"digits", "4"}};
  changed.attempt = 3;
  changed.max_attempts = 3;
  changed.submitted_ms = 11;
  changed.started_ms = 12;
  changed.finished_ms = 13;
  changed.total_steps = 14;
  changed.step = 15;
  changed.spec_yaml = "name: checksum-digits\n";
  changed.result_json = "{}";
  changed.error = "diverged";
  changed.worker_id = "";
  changed.lease_expires_ms = 0;
  changed.checkpoint_step = 16;
  changed.sweep_id = "";
  changed.cancel_reason = "";
  ASSERT_OK(store_->UpdateJob(changed));
  got = store_->GetJob(*id);
  ASSERT_OK(got);
  ExpectSameJob(*got, changed);
}

TEST_F(SqliteJobStore, AssignsAscendingIdsFromOne) {
  for (int64_t want = 1; want <= 5; ++want) {
    absl::StatusOr<int64_t> id = store_->InsertJob(QueuedJob("j"));
    ASSERT_OK(id);
    EXPECT_EQ(*id, want);
  }
}

TEST_F(SqliteJobStore, MissingJobIsNotFound) {
  EXPECT_EQ(store_->GetJob(7).status().code(), absl::StatusCode::kNotFound);
  JobRecord job = QueuedJob("ghost");
  job.id = 7;
  EXPECT_EQ(store_->UpdateJob(job).code(), absl::StatusCode::kNotFound);
  EXPECT_EQ(store_->PutPoints(7, {{1, 1, "{}"}}).code(), absl::StatusCode::kNotFound);
  EXPECT_EQ(store_->PutPoints(7, {}).code(), absl::StatusCode::kNotFound);
  EXPECT_EQ(store_->DeletePointsFrom(7, 0).code(), absl::StatusCode::kNotFound);
  EXPECT_EQ(store_->Points(7, 0).status().code(), absl::StatusCode::kNotFound);
  ArtifactRecord a;
  a.job_id = 7;
  a.name = "weights.pt";
  EXPECT_EQ(store_->PutArtifact(a).code(), absl::StatusCode::kNotFound);
  EXPECT_EQ(store_->GetArtifact(7, "weights.pt").status().code(), absl::StatusCode::kNotFound);
  // Nothing was created on the way.
  absl::StatusOr<std::vector<JobRecord>> all = store_->ListJobs({}, 0, 100);
  ASSERT_OK(all);
  EXPECT_TRUE(all->empty());
}

TEST_F(SqliteJobStore, RejectsBadInputAndStaysUsable) {
  ASSERT_OK(store_->InsertJob(QueuedJob("keep")));
  JobRecord bad = QueuedJob("bad-state");
  bad.state = static_cast<JobState>(9);
  absl::Status st = store_->InsertJob(bad).status();
  EXPECT_EQ(st.code(), absl::StatusCode::kInvalidArgument) << st;
  EXPECT_NE(st.message().find("9"), std::string::npos) << st;
  bad.id = 1;
  EXPECT_EQ(store_->UpdateJob(bad).code(), absl::StatusCode::kInvalidArgument);

  JobRecord bad_labels = QueuedJob("bad-labels");
  bad_labels.labels = {{"depot", "\xff\xfe"}};  // not UTF-8
  EXPECT_EQ(store_->InsertJob(bad_labels).status().code(), absl::StatusCode::kInvalidArgument);

  EXPECT_EQ(store_->ListJobs({}, 0, -1).status().code(), absl::StatusCode::kInvalidArgument);
  EXPECT_EQ(store_->ListJobs({}, -5, 10).status().code(), absl::StatusCode::kInvalidArgument);
  EXPECT_EQ(store_->LeaseNext("", 0, 1000).status().code(), absl::StatusCode::kInvalidArgument);
  EXPECT_EQ(store_->LeaseNext("w", 0, 0).status().code(), absl::StatusCode::kInvalidArgument);
  EXPECT_EQ(store_->LeaseNext("w", INT64_MAX, 10).status().code(), absl::StatusCode::kInvalidArgument);
  EXPECT_EQ(store_->PutWorker(WorkerRecord{}).code(), absl::StatusCode::kInvalidArgument);

  absl::StatusOr<std::vector<JobRecord>> all = store_->ListJobs({}, 0, 100);
  ASSERT_OK(all);
  ASSERT_EQ(all->size(), 1u);
  EXPECT_EQ((*all)[0].name, "keep");
  EXPECT_EQ((*all)[0].state, JobState::kQueued);  // the bad lease attempts leased nothing
  absl::StatusOr<std::optional<JobRecord>> leased = store_->LeaseNext("w", 0, 1000);
  ASSERT_OK(leased);
  EXPECT_TRUE(leased->has_value());
}

TEST_F(SqliteJobStore, ListFiltersByEachField) {
  // id 1..6
  JobRecord a = QueuedJob("a");  // queued, mira, no sweep
  a.labels = {{"depot", "north"}};
  JobRecord b = QueuedJob("b");
  b.owner = "teo";
  b.labels = {{"depot", "north"}, {"shift", "day"}};
  JobRecord c = QueuedJob("c");
  c.state = JobState::kSucceeded;
  c.sweep_id = "s1";
  JobRecord d = QueuedJob("d");
  d.state = JobState::kSucceeded;
  d.owner = "teo";
  d.sweep_id = "s1";
  d.labels = {{"depot", "south"}, {"shift", "day"}};
  JobRecord e = QueuedJob("e");
  e.state = JobState::kRunning;
  e.sweep_id = "s2";
  JobRecord f = QueuedJob("f");
  f.state = JobState::kCancelled;
  f.labels = {{"depot", "north"}, {"shift", "day"}};
  for (const JobRecord& j : {a, b, c, d, e, f}) ASSERT_OK(store_->InsertJob(j));

  auto list = [&](const JobFilter& filter) {
    absl::StatusOr<std::vector<JobRecord>> jobs = store_->ListJobs(filter, 0, 100);
    EXPECT_TRUE(jobs.ok()) << jobs.status();
    return jobs.ok() ? Ids(*jobs) : std::vector<int64_t>{-1};
  };
  EXPECT_EQ(list({}), (std::vector<int64_t>{6, 5, 4, 3, 2, 1}));
  JobFilter by_state;
  by_state.state = JobState::kSucceeded;
  EXPECT_EQ(list(by_state), (std::vector<int64_t>{4, 3}));
  JobFilter by_owner;
  by_owner.owner = "teo";
  EXPECT_EQ(list(by_owner), (std::vector<int64_t>{4, 2}));
  JobFilter by_sweep;
  by_sweep.sweep_id = "s1";
  EXPECT_EQ(list(by_sweep), (std::vector<int64_t>{4, 3}));
  JobFilter by_label;
  by_label.labels = {{"depot", "north"}};
  EXPECT_EQ(list(by_label), (std::vector<int64_t>{6, 2, 1}));
  JobFilter by_two_labels;
  by_two_labels.labels = {{"depot", "north"}, {"shift", "day"}};
  EXPECT_EQ(list(by_two_labels), (std::vector<int64_t>{6, 2}));
  JobFilter combined;
  combined.state = JobState::kQueued;
  combined.owner = "teo";
  combined.labels = {{"shift", "day"}};
  EXPECT_EQ(list(combined), (std::vector<int64_t>{2}));
  JobFilter nothing;
  nothing.owner = "nobody";
  EXPECT_EQ(list(nothing), std::vector<int64_t>{});
}

// Paging with before_id, label filters and limits, against a brute-force model: for many
// seeded random filters, every page equals the model's page, and walking pages yields the
// model's full answer exactly once.
TEST_F(SqliteJobStore, ListPagesWithBeforeIdAndLabelsLikeModel) {
  std::mt19937 rng(20240611);
  const std::vector<std::string> depots = {"north", "south", "harbor"};
  const std::vector<std::string> owners = {"mira", "teo"};
  std::vector<JobRecord> model;
  for (int i = 0; i < 120; ++i) {
    JobRecord j = QueuedJob("j" + std::to_string(i));
    j.owner = owners[rng() % owners.size()];
    j.state = static_cast<JobState>(1 + rng() % 5);
    // Rare labels: only about one job in ten has depot=harbor and shift=night.
    if (rng() % 2 == 0) j.labels["depot"] = depots[rng() % depots.size()];
    if (rng() % 3 == 0) j.labels["shift"] = "night";
    absl::StatusOr<int64_t> id = store_->InsertJob(j);
    ASSERT_OK(id);
    j.id = *id;
    model.push_back(j);
  }
  auto matches = [](const JobRecord& j, const JobFilter& f) {
    if (f.state.has_value() && j.state != *f.state) return false;
    if (!f.owner.empty() && j.owner != f.owner) return false;
    if (!f.sweep_id.empty() && j.sweep_id != f.sweep_id) return false;
    for (const auto& [k, v] : f.labels) {
      auto it = j.labels.find(k);
      if (it == j.labels.end() || it->second != v) return false;
    }
    return true;
  };
  auto model_page = [&](const JobFilter& f, int64_t before_id, int limit) {
    std::vector<int64_t> ids;
    for (auto it = model.rbegin(); it != model.rend() && static_cast<int>(ids.size()) < limit; ++it) {
      if (before_id != 0 && it->id >= before_id) continue;
      if (matches(*it, f)) ids.push_back(it->id);
    }
    return ids;
  };
  int checked_pages = 0;
  for (int round = 0; round < 40; ++round) {
    JobFilter f;
    if (rng() % 3 == 0) f.state = static_cast<JobState>(1 + rng() % 5);
    if (rng() % 3 == 0) f.owner = owners[rng() % owners.size()];
    if (rng() % 2 == 0) f.labels["depot"] = depots[rng() % depots.size()];
    if (rng() % 2 == 0) f.labels["shift"] = "night";
    const int limit = 1 + static_cast<int>(rng() % 7);
    // Walk every page.
    std::vector<int64_t> walked;
    int64_t before_id = (rng() % 4 == 0) ? 1 + static_cast<int64_t>(rng() % 120) : 0;
    const std::vector<int64_t> all = model_page(f, before_id, 1000);
    for (int guard = 0; guard < 200; ++guard) {
      absl::StatusOr<std::vector<JobRecord>> page = store_->ListJobs(f, before_id, limit);
      ASSERT_OK(page);
      ASSERT_EQ(Ids(*page), model_page(f, before_id, limit)) << "round " << round << " before_id " << before_id;
      ++checked_pages;
      for (const JobRecord& j : *page) walked.push_back(j.id);
      if (static_cast<int>(page->size()) < limit) break;
      before_id = page->back().id;
    }
    EXPECT_EQ(walked, all) << "round " << round;
  }
  EXPECT_GT(checked_pages, 40);
  absl::StatusOr<std::vector<JobRecord>> none = store_->ListJobs({}, 0, 0);
  ASSERT_OK(none);
  EXPECT_TRUE(none->empty());
}

TEST_F(SqliteJobStore, LeasesHighestPriorityOldestFirst) {
  // ids 1..6 with priorities chosen so that neither id order nor priority order alone is right.
  const std::vector<int32_t> priorities = {0, 5, 0, 5, 9, -1};
  for (size_t i = 0; i < priorities.size(); ++i) {
    ASSERT_OK(store_->InsertJob(QueuedJob("p" + std::to_string(i), priorities[i])));
  }
  JobRecord not_queued = QueuedJob("done", 100);  // id 7: highest priority but finished
  not_queued.state = JobState::kSucceeded;
  ASSERT_OK(store_->InsertJob(not_queued));
  std::vector<int64_t> order;
  for (;;) {
    absl::StatusOr<std::optional<JobRecord>> leased = store_->LeaseNext("w-1", 1000, 60000);
    ASSERT_OK(leased);
    if (!leased->has_value()) break;
    order.push_back((*leased)->id);
    ASSERT_LT(order.size(), 10u);
  }
  EXPECT_EQ(order, (std::vector<int64_t>{5, 2, 4, 1, 3, 6}));
}

TEST_F(SqliteJobStore, LeaseMarksRunningIncrementsAttemptKeepsFirstStart) {
  absl::StatusOr<int64_t> id = store_->InsertJob(QueuedJob("j"));
  ASSERT_OK(id);
  absl::StatusOr<std::optional<JobRecord>> first = store_->LeaseNext("w-1", 1000, 500);
  ASSERT_OK(first);
  ASSERT_TRUE(first->has_value());
  const JobRecord& a = **first;
  EXPECT_EQ(a.id, *id);
  EXPECT_EQ(a.state, JobState::kRunning);
  EXPECT_EQ(a.attempt, 1);
  EXPECT_EQ(a.worker_id, "w-1");
  EXPECT_EQ(a.started_ms, 1000);
  EXPECT_EQ(a.lease_expires_ms, 1500);
  absl::StatusOr<JobRecord> stored = store_->GetJob(*id);
  ASSERT_OK(stored);
  ExpectSameJob(*stored, a);

  // Requeue (as the scheduler does after a lapsed lease) and lease again.
  JobRecord requeued = a;
  requeued.state = JobState::kQueued;
  requeued.worker_id = "";
  ASSERT_OK(store_->UpdateJob(requeued));
  absl::StatusOr<std::optional<JobRecord>> second = store_->LeaseNext("w-2", 5000, 700);
  ASSERT_OK(second);
  ASSERT_TRUE(second->has_value());
  EXPECT_EQ((*second)->attempt, 2);
  EXPECT_EQ((*second)->worker_id, "w-2");
  EXPECT_EQ((*second)->started_ms, 1000);  // kept
  EXPECT_EQ((*second)->lease_expires_ms, 5700);
}

TEST_F(SqliteJobStore, LeaseWithNothingQueuedReturnsNullopt) {
  absl::StatusOr<std::optional<JobRecord>> empty = store_->LeaseNext("w-1", 0, 1000);
  ASSERT_OK(empty);
  EXPECT_FALSE(empty->has_value());
  for (JobState s : {JobState::kRunning, JobState::kSucceeded, JobState::kFailed, JobState::kCancelled}) {
    JobRecord j = QueuedJob(ToString(s));
    j.state = s;
    ASSERT_OK(store_->InsertJob(j));
  }
  absl::StatusOr<std::optional<JobRecord>> none = store_->LeaseNext("w-1", 0, 1000);
  ASSERT_OK(none);
  EXPECT_FALSE(none->has_value());
}

// Leases everything from `stores` (one thread per entry) and checks each inserted job was
// leased exactly once and is stored as running under the thread that leased it.
void LeaseConcurrently(const std::vector<JobStore*>& stores, JobStore& check, int jobs) {
  std::set<int64_t> inserted;
  for (int i = 0; i < jobs; ++i) {
    absl::StatusOr<int64_t> id = check.InsertJob(QueuedJob("c" + std::to_string(i), i % 4));
    ASSERT_OK(id);
    inserted.insert(*id);
  }
  std::vector<std::vector<int64_t>> leased(stores.size());
  std::vector<absl::Status> errors(stores.size());
  std::vector<std::thread> threads;
  for (size_t t = 0; t < stores.size(); ++t) {
    threads.emplace_back([&, t] {
      const std::string worker = "w-" + std::to_string(t);
      for (;;) {
        absl::StatusOr<std::optional<JobRecord>> r = stores[t]->LeaseNext(worker, 1000, 60000);
        if (!r.ok()) {
          errors[t] = r.status();
          return;
        }
        if (!r->has_value()) return;
        leased[t].push_back((*r)->id);
      }
    });
  }
  for (std::thread& th : threads) th.join();
  std::multiset<int64_t> all;
  for (size_t t = 0; t < stores.size(); ++t) {
    EXPECT_OK(errors[t]);
    all.insert(leased[t].begin(), leased[t].end());
    for (int64_t id : leased[t]) {
      absl::StatusOr<JobRecord> j = check.GetJob(id);
      ASSERT_OK(j);
      EXPECT_EQ(j->state, JobState::kRunning);
      EXPECT_EQ(j->attempt, 1) << "job " << id << " leased more than once";
      EXPECT_EQ(j->worker_id, "w-" + std::to_string(t));
    }
  }
  EXPECT_EQ(all.size(), inserted.size()) << "some job leased twice or not at all";
  EXPECT_EQ(std::set<int64_t>(all.begin(), all.end()), inserted);
}

TEST_F(SqliteJobStore, ConcurrentLeasesFromOneStoreLeaseEachJobOnce) {
  LeaseConcurrently({store_.get(), store_.get(), store_.get(), store_.get()}, *store_, 200);
}

// Two store objects on one file: two connections, so exclusivity rests on BEGIN IMMEDIATE
// and the busy timeout, not on the mutex.
TEST_F(SqliteJobStore, ConcurrentLeasesFromTwoConnectionsLeaseEachJobOnce) {
  std::unique_ptr<JobStore> other = OpenOrDie(path_);
  ASSERT_NE(other, nullptr);
  LeaseConcurrently({store_.get(), other.get(), store_.get(), other.get()}, *store_, 200);
}

TEST_F(SqliteJobStore, ExpiredLeasesListsOnlyLapsedRunningJobs) {
  for (int i = 0; i < 3; ++i) ASSERT_OK(store_->InsertJob(QueuedJob("j" + std::to_string(i))));
  ASSERT_OK(store_->LeaseNext("w", 0, 100));   // job 1, expires 100
  ASSERT_OK(store_->LeaseNext("w", 0, 300));   // job 2, expires 300
  JobRecord finished = QueuedJob("finished");  // not running: never expired
  finished.state = JobState::kSucceeded;
  finished.lease_expires_ms = 10;
  ASSERT_OK(store_->InsertJob(finished));
  auto expired = [&](int64_t now) {
    absl::StatusOr<std::vector<JobRecord>> jobs = store_->ExpiredLeases(now);
    EXPECT_TRUE(jobs.ok()) << jobs.status();
    return jobs.ok() ? Ids(*jobs) : std::vector<int64_t>{-1};
  };
  EXPECT_EQ(expired(100), std::vector<int64_t>{});  // strictly less than now
  EXPECT_EQ(expired(101), std::vector<int64_t>{1});
  EXPECT_EQ(expired(1000), (std::vector<int64_t>{1, 2}));
}

TEST_F(SqliteJobStore, CountsJobsByState) {
  const std::vector<JobState> states = {JobState::kQueued, JobState::kQueued, JobState::kRunning,
                                        JobState::kFailed, JobState::kQueued, JobState::kFailed};
  for (JobState s : states) {
    JobRecord j = QueuedJob("j");
    j.state = s;
    ASSERT_OK(store_->InsertJob(j));
  }
  absl::StatusOr<std::map<JobState, int64_t>> counts = store_->CountByState();
  ASSERT_OK(counts);
  const std::map<JobState, int64_t> want = {{JobState::kQueued, 3},    {JobState::kRunning, 1},
                                            {JobState::kSucceeded, 0}, {JobState::kFailed, 2},
                                            {JobState::kCancelled, 0}};
  EXPECT_EQ(*counts, want);
}

TEST_F(SqliteJobStore, PutPointsReplacesSameStep) {
  absl::StatusOr<int64_t> id = store_->InsertJob(QueuedJob("j"));
  ASSERT_OK(id);
  absl::StatusOr<int64_t> other = store_->InsertJob(QueuedJob("other"));
  ASSERT_OK(other);
  ASSERT_OK(store_->PutPoints(*id, {{10, 1, R"({"loss":1.0})"}, {20, 1, R"({"loss":0.5})"}}));
  ASSERT_OK(store_->PutPoints(*other, {{10, 1, R"({"loss":9})"}}));
  // A resumed attempt rewrites step 20 and adds 30.
  ASSERT_OK(store_->PutPoints(*id, {{30, 2, R"({"loss":0.2})"}, {20, 2, R"({"loss":0.4})"}}));
  absl::StatusOr<std::vector<PointRecord>> points = store_->Points(*id, 0);
  ASSERT_OK(points);
  ASSERT_EQ(points->size(), 3u);
  EXPECT_EQ((*points)[0].step, 10);
  EXPECT_EQ((*points)[0].attempt, 1);
  EXPECT_EQ((*points)[0].metrics_json, R"({"loss":1.0})");
  EXPECT_EQ((*points)[1].step, 20);
  EXPECT_EQ((*points)[1].attempt, 2);
  EXPECT_EQ((*points)[1].metrics_json, R"({"loss":0.4})");
  EXPECT_EQ((*points)[2].step, 30);
  absl::StatusOr<std::vector<PointRecord>> other_points = store_->Points(*other, 0);
  ASSERT_OK(other_points);
  ASSERT_EQ(other_points->size(), 1u);
  EXPECT_EQ((*other_points)[0].metrics_json, R"({"loss":9})");
}

TEST_F(SqliteJobStore, PointsFromStepAscendingAndDeleteFrom) {
  absl::StatusOr<int64_t> id = store_->InsertJob(QueuedJob("j"));
  ASSERT_OK(id);
  absl::StatusOr<int64_t> other = store_->InsertJob(QueuedJob("other"));
  ASSERT_OK(other);
  // Inserted out of order.
  std::vector<PointRecord> batch;
  for (int64_t step : {50, 10, 40, 20, 30}) batch.push_back({step, 1, "{\"s\":" + std::to_string(step) + "}"});
  ASSERT_OK(store_->PutPoints(*id, batch));
  ASSERT_OK(store_->PutPoints(*other, {{40, 1, "{}"}}));
  auto steps = [&](int64_t job, int64_t from) {
    absl::StatusOr<std::vector<PointRecord>> p = store_->Points(job, from);
    EXPECT_TRUE(p.ok()) << p.status();
    std::vector<int64_t> out;
    if (p.ok()) {
      for (const PointRecord& r : *p) out.push_back(r.step);
    }
    return out;
  };
  EXPECT_EQ(steps(*id, 0), (std::vector<int64_t>{10, 20, 30, 40, 50}));
  EXPECT_EQ(steps(*id, 30), (std::vector<int64_t>{30, 40, 50}));
  EXPECT_EQ(steps(*id, 31), (std::vector<int64_t>{40, 50}));
  EXPECT_EQ(steps(*id, 51), std::vector<int64_t>{});
  ASSERT_OK(store_->DeletePointsFrom(*id, 30));
  EXPECT_EQ(steps(*id, 0), (std::vector<int64_t>{10, 20}));
  EXPECT_EQ(steps(*other, 0), std::vector<int64_t>{40});  // other jobs untouched
  ASSERT_OK(store_->DeletePointsFrom(*id, 0));
  EXPECT_EQ(steps(*id, 0), std::vector<int64_t>{});
}

TEST_F(SqliteJobStore, PutArtifactReplacesSameName) {
  absl::StatusOr<int64_t> id = store_->InsertJob(QueuedJob("j"));
  ASSERT_OK(id);
  absl::StatusOr<std::optional<ArtifactRecord>> none = store_->GetArtifact(*id, "checkpoint.pt");
  ASSERT_OK(none);
  EXPECT_FALSE(none->has_value());
  ArtifactRecord a{*id, "checkpoint.pt", "jobs/1/checkpoint.pt", 1024, "ab12", 100, 1};
  ASSERT_OK(store_->PutArtifact(a));
  ArtifactRecord w{*id, "weights.pt", "jobs/1/weights.pt", 2048, "cd34", 0, 1};
  ASSERT_OK(store_->PutArtifact(w));
  ArtifactRecord newer{*id, "checkpoint.pt", "jobs/1/checkpoint-2.pt", 4096, "ef56", 200, 2};
  ASSERT_OK(store_->PutArtifact(newer));
  absl::StatusOr<std::optional<ArtifactRecord>> got = store_->GetArtifact(*id, "checkpoint.pt");
  ASSERT_OK(got);
  ASSERT_TRUE(got->has_value());
  EXPECT_EQ((*got)->job_id, *id);
  EXPECT_EQ((*got)->name, "checkpoint.pt");
  EXPECT_EQ((*got)->path, "jobs/1/checkpoint-2.pt");
  EXPECT_EQ((*got)->bytes, 4096);
  EXPECT_EQ((*got)->sha256, "ef56");
  EXPECT_EQ((*got)->step, 200);
  EXPECT_EQ((*got)->attempt, 2);
  absl::StatusOr<std::optional<ArtifactRecord>> weights = store_->GetArtifact(*id, "weights.pt");
  ASSERT_OK(weights);
  ASSERT_TRUE(weights->has_value());
  EXPECT_EQ((*weights)->path, "jobs/1/weights.pt");
  EXPECT_EQ((*weights)->bytes, 2048);
}

WorkerRecord Worker(std::string id, std::string host, int32_t cores, int32_t threads, std::string version,
                    int64_t registered_ms, int64_t last_seen_ms) {
  WorkerRecord w;
  w.id = std::move(id);
  w.host = std::move(host);
  w.cores = cores;
  w.threads = threads;
  w.version = std::move(version);
  w.registered_ms = registered_ms;
  w.last_seen_ms = last_seen_ms;
  return w;
}

TEST_F(SqliteJobStore, PutWorkerInsertsOrReplacesById) {
  ASSERT_OK(store_->PutWorker(Worker("w-2", "node-b", 2, 1, "0.1.0", 100, 110)));
  ASSERT_OK(store_->PutWorker(Worker("w-1", "node-a", 4, 2, "0.1.0", 200, 210)));
  WorkerRecord slurm = Worker("w-2", "node-b", 2, 2, "0.2.0", 100, 999);
  slurm.slurm_job_id = "4711";
  slurm.slurm_array_job_id = "4700";
  slurm.slurm_array_task_id = "11";
  slurm.jobs_finished = 3;
  slurm.left_ms = 1000;
  ASSERT_OK(store_->PutWorker(slurm));
  absl::StatusOr<std::vector<WorkerRecord>> workers = store_->Workers();
  ASSERT_OK(workers);
  ASSERT_EQ(workers->size(), 2u);
  // Oldest registration first.
  const WorkerRecord& w2 = (*workers)[0];
  EXPECT_EQ(w2.id, "w-2");
  EXPECT_EQ(w2.threads, 2);
  EXPECT_EQ(w2.version, "0.2.0");
  EXPECT_EQ(w2.last_seen_ms, 999);
  EXPECT_EQ(w2.slurm_job_id, "4711");
  EXPECT_EQ(w2.slurm_array_job_id, "4700");
  EXPECT_EQ(w2.slurm_array_task_id, "11");
  EXPECT_EQ(w2.jobs_finished, 3);
  EXPECT_EQ(w2.left_ms, 1000);
  const WorkerRecord& w1 = (*workers)[1];
  EXPECT_EQ(w1.id, "w-1");
  EXPECT_EQ(w1.host, "node-a");
  EXPECT_EQ(w1.cores, 4);
  EXPECT_EQ(w1.threads, 2);
  EXPECT_EQ(w1.version, "0.1.0");
  EXPECT_EQ(w1.registered_ms, 200);
  EXPECT_EQ(w1.last_seen_ms, 210);
  EXPECT_EQ(w1.slurm_job_id, "");
  EXPECT_EQ(w1.jobs_finished, 0);
  EXPECT_EQ(w1.left_ms, 0);
  absl::StatusOr<std::optional<WorkerRecord>> one = store_->GetWorker("w-2");
  ASSERT_OK(one);
  ASSERT_TRUE(one->has_value());
  EXPECT_EQ((*one)->slurm_array_task_id, "11");
  absl::StatusOr<std::optional<WorkerRecord>> none = store_->GetWorker("w-9");
  ASSERT_OK(none);
  EXPECT_FALSE(none->has_value());
}

TEST_F(SqliteJobStore, ReopenFindsEverything) {
  ScopedTempDir dir;
  const std::string path = dir.path() + "/jobs.db";
  for (Durability durability : {Durability::kNormal, Durability::kFull}) {
    SCOPED_TRACE(durability == Durability::kFull ? "full" : "normal");
    std::filesystem::remove(path);
    JobRecord job = FullJob();
    {
      std::unique_ptr<JobStore> store = OpenOrDie(path, durability);
      ASSERT_NE(store, nullptr);
      absl::StatusOr<int64_t> id = store->InsertJob(job);
      ASSERT_OK(id);
      job.id = *id;
      ASSERT_OK(store->PutPoints(job.id, {{1, 1, "{\"a\":1}"}, {2, 1, "{\"a\":2}"}}));
      ASSERT_OK(store->PutArtifact({job.id, "weights.pt", "jobs/1/weights.pt", 7, "00ff", 2, 1}));
      ASSERT_OK(store->PutWorker(Worker("w-1", "node-a", 2, 1, "0.1.0", 5, 6)));
    }
    std::unique_ptr<JobStore> store = OpenOrDie(path, durability);
    ASSERT_NE(store, nullptr);
    absl::StatusOr<JobRecord> got = store->GetJob(job.id);
    ASSERT_OK(got);
    ExpectSameJob(*got, job);
    absl::StatusOr<std::vector<PointRecord>> points = store->Points(job.id, 0);
    ASSERT_OK(points);
    ASSERT_EQ(points->size(), 2u);
    EXPECT_EQ((*points)[1].metrics_json, "{\"a\":2}");
    absl::StatusOr<std::optional<ArtifactRecord>> art = store->GetArtifact(job.id, "weights.pt");
    ASSERT_OK(art);
    ASSERT_TRUE(art->has_value());
    EXPECT_EQ((*art)->sha256, "00ff");
    absl::StatusOr<std::vector<WorkerRecord>> workers = store->Workers();
    ASSERT_OK(workers);
    ASSERT_EQ(workers->size(), 1u);
    EXPECT_EQ((*workers)[0].host, "node-a");
    // The next id continues after the stored ones.
    absl::StatusOr<int64_t> next = store->InsertJob(QueuedJob("next"));
    ASSERT_OK(next);
    EXPECT_EQ(*next, job.id + 1);
  }
}

TEST_F(SqliteJobStore, OpensInWalMode) {
  EXPECT_EQ(RawQuery(path_, "PRAGMA journal_mode"), "wal");
}

TEST_F(SqliteJobStore, FreshFileGetsCurrentSchemaVersion) {
  EXPECT_GE(CurrentSchemaVersion(), 1);
  EXPECT_EQ(RawQuery(path_, "PRAGMA user_version"), std::to_string(CurrentSchemaVersion()));
  EXPECT_EQ(RawQuery(path_, "SELECT COUNT(*) FROM sqlite_master WHERE type = 'table' AND name IN "
                            "('jobs', 'points', 'artifacts', 'workers')"),
            "4");
  // Reopening an up-to-date file changes nothing and keeps working.
  store_.reset();
  store_ = OpenOrDie(path_);
  ASSERT_NE(store_, nullptr);
  EXPECT_EQ(RawQuery(path_, "PRAGMA user_version"), std::to_string(CurrentSchemaVersion()));
  ASSERT_OK(store_->InsertJob(QueuedJob("after-reopen")));
}

// Step 3 moves a cancelled job's reason out of `error` into `cancel_reason`. A version-2 file is
// made from a current one by dropping the column (SQLite >= 3.35) and writing the reasons where
// version 2 kept them; reopening migrates it. Catches a step that adds the column but leaves old
// cancellations in `error`, and one that also empties the error of a failed job.
TEST_F(SqliteJobStore, MigrationMovesOldCancelReasonsOutOfError) {
  ScopedTempDir dir;
  const std::string path = dir.path() + "/jobs.db";
  int64_t cancelled_id = 0, failed_id = 0, queued_id = 0;
  {
    std::unique_ptr<JobStore> store = OpenOrDie(path);
    ASSERT_NE(store, nullptr);
    JobRecord cancelled = QueuedJob("cancelled");
    cancelled.state = JobState::kCancelled;
    JobRecord failed = QueuedJob("failed");
    failed.state = JobState::kFailed;
    cancelled_id = *store->InsertJob(cancelled);
    failed_id = *store->InsertJob(failed);
    queued_id = *store->InsertJob(QueuedJob("queued"));
  }
  ASSERT_EQ(CurrentSchemaVersion(), 4) << "this test makes a version-2 file; a later step needs its own test";
  sqlite3* db = nullptr;
  ASSERT_EQ(sqlite3_open(path.c_str(), &db), SQLITE_OK);
  const std::string to_v2 =
      "ALTER TABLE workers DROP COLUMN token_name;"
      "ALTER TABLE jobs DROP COLUMN cancel_reason;"
      "UPDATE jobs SET error = 'cancelled by mira: enough; the worker stopped at step 40' WHERE name = 'cancelled';"
      "UPDATE jobs SET error = 'the loss became nan at step 3' WHERE name = 'failed';"
      "PRAGMA user_version = 2;";
  ASSERT_EQ(sqlite3_exec(db, to_v2.c_str(), nullptr, nullptr, nullptr), SQLITE_OK) << sqlite3_errmsg(db);
  sqlite3_close(db);

  std::unique_ptr<JobStore> store = OpenOrDie(path);
  ASSERT_NE(store, nullptr);
  EXPECT_EQ(RawQuery(path, "PRAGMA user_version"), "4");
  absl::StatusOr<JobRecord> cancelled = store->GetJob(cancelled_id);
  ASSERT_OK(cancelled);
  EXPECT_EQ(cancelled->cancel_reason, "cancelled by mira: enough; the worker stopped at step 40");
  EXPECT_EQ(cancelled->error, "");
  absl::StatusOr<JobRecord> failed = store->GetJob(failed_id);
  ASSERT_OK(failed);
  EXPECT_EQ(failed->error, "the loss became nan at step 3");
  EXPECT_EQ(failed->cancel_reason, "");
  absl::StatusOr<JobRecord> queued = store->GetJob(queued_id);
  ASSERT_OK(queued);
  EXPECT_EQ(queued->cancel_reason, "");
  EXPECT_EQ(queued->name, "queued");
}

// Step 4 records the worker token that registered each worker. A version-3 file (the column
// dropped) with a worker migrates to token_name '' (such a worker must register again) and keeps
// the rest of the row; a worker stored afterwards keeps its token name. Catches a step that is
// missing (the column would not exist: PutWorker fails) or a read that drops the name.
TEST_F(SqliteJobStore, MigrationGivesOldWorkersNoTokenName) {
  ScopedTempDir dir;
  const std::string path = dir.path() + "/jobs.db";
  {
    std::unique_ptr<JobStore> store = OpenOrDie(path);
    ASSERT_NE(store, nullptr);
    WorkerRecord w;
    w.id = "w-1-old";
    w.host = "old";
    w.token_name = "node1";
    ASSERT_OK(store->PutWorker(w));
  }
  ASSERT_EQ(CurrentSchemaVersion(), 4) << "this test makes a version-3 file; a later step needs its own test";
  sqlite3* db = nullptr;
  ASSERT_EQ(sqlite3_open(path.c_str(), &db), SQLITE_OK);
  ASSERT_EQ(sqlite3_exec(db, "ALTER TABLE workers DROP COLUMN token_name; PRAGMA user_version = 3;", nullptr, nullptr,
                         nullptr),
            SQLITE_OK)
      << sqlite3_errmsg(db);
  sqlite3_close(db);
  std::unique_ptr<JobStore> store = OpenOrDie(path);
  ASSERT_NE(store, nullptr);
  EXPECT_EQ(RawQuery(path, "PRAGMA user_version"), "4");
  auto old = store->GetWorker("w-1-old");
  ASSERT_OK(old);
  ASSERT_TRUE(old->has_value());
  EXPECT_EQ((*old)->host, "old");
  EXPECT_EQ((*old)->token_name, "");
  WorkerRecord fresh;
  fresh.id = "w-2-new";
  fresh.token_name = "node2";
  ASSERT_OK(store->PutWorker(fresh));
  auto back = store->GetWorker("w-2-new");
  ASSERT_OK(back);
  ASSERT_TRUE(back->has_value());
  EXPECT_EQ((*back)->token_name, "node2");
}

TEST_F(SqliteJobStore, RefusesNewerSchemaVersion) {
  ScopedTempDir dir;
  const std::string path = dir.path() + "/jobs.db";
  {
    std::unique_ptr<JobStore> store = OpenOrDie(path);
    ASSERT_NE(store, nullptr);
    ASSERT_OK(store->InsertJob(QueuedJob("precious")));
  }
  const int newer = CurrentSchemaVersion() + 3;
  SetUserVersion(path, newer);
  absl::StatusOr<std::unique_ptr<JobStore>> refused = OpenSqliteJobStore(path, Durability::kNormal);
  ASSERT_FALSE(refused.ok());
  EXPECT_EQ(refused.status().code(), absl::StatusCode::kFailedPrecondition) << refused.status();
  const std::string message(refused.status().message());
  EXPECT_NE(message.find(std::to_string(newer)), std::string::npos) << message;
  EXPECT_NE(message.find("up to " + std::to_string(CurrentSchemaVersion())), std::string::npos) << message;
  // The refusal lost nothing.
  EXPECT_EQ(RawQuery(path, "PRAGMA user_version"), std::to_string(newer));
  EXPECT_EQ(RawQuery(path, "SELECT name FROM jobs WHERE id = 1"), "precious");
}

TEST_F(SqliteJobStore, RefusesFileThatIsNotADatabase) {
  ScopedTempDir dir;
  const std::string path = dir.path() + "/notes.txt";
  const std::string contents(4096, 'x');
  graft::testing::WriteFile(path, contents);
  absl::StatusOr<std::unique_ptr<JobStore>> refused = OpenSqliteJobStore(path, Durability::kNormal);
  ASSERT_FALSE(refused.ok());
  EXPECT_NE(refused.status().message().find(path), std::string::npos) << refused.status();
  EXPECT_EQ(graft::testing::ReadFile(path), contents);
  EXPECT_EQ(OpenSqliteJobStore("", Durability::kNormal).status().code(), absl::StatusCode::kInvalidArgument);
}

// The child side of AcknowledgedPointsSurviveKill: opens the store, inserts a job and puts
// points one call at a time, writing the count of acknowledged calls to `fd` after each.
// Never returns.
[[noreturn]] void PointWriterChild(const std::string& path, int fd, int points) {
  absl::StatusOr<std::unique_ptr<JobStore>> store = OpenSqliteJobStore(path, Durability::kNormal);
  if (!store.ok()) _exit(2);
  absl::StatusOr<int64_t> id = (*store)->InsertJob(QueuedJob("crash"));
  if (!id.ok() || *id != 1) _exit(3);
  for (int64_t i = 0; i < points; ++i) {
    if (!(*store)->PutPoints(*id, {{i, 1, "{\"step\":" + std::to_string(i) + "}"}}).ok()) _exit(4);
    const int64_t acked = i + 1;
    if (write(fd, &acked, sizeof(acked)) != static_cast<ssize_t>(sizeof(acked))) _exit(5);
  }
  for (;;) pause();  // wait for the parent's SIGKILL
}

// SQLite documents (from memory: SQLite documentation, "Write-Ahead Logging" and
// "PRAGMA synchronous") that in WAL mode with synchronous=NORMAL a committed transaction
// survives an application crash; only power loss may lose the last commits. So every point
// whose PutPoints returned OK before the process was killed must be there after reopening.
TEST_F(SqliteJobStore, AcknowledgedPointsSurviveKill) {
  constexpr int kPoints = 50;
  std::mt19937 rng(77);
  for (int round = 0; round < 8; ++round) {
    SCOPED_TRACE("round " + std::to_string(round));
    ScopedTempDir dir;
    const std::string path = dir.path() + "/jobs.db";
    int fds[2];
    ASSERT_EQ(pipe(fds), 0);
    const int kill_after = 1 + static_cast<int>(rng() % kPoints);  // acks to wait for
    const int extra_delay_us = static_cast<int>(rng() % 200);       // then let it run a little
    fflush(nullptr);
    const pid_t pid = fork();
    ASSERT_GE(pid, 0);
    if (pid == 0) {
      close(fds[0]);
      PointWriterChild(path, fds[1], kPoints);
    }
    close(fds[1]);
    int64_t acked = 0;
    bool timed_out = false;
    while (acked < kill_after) {
      pollfd p{fds[0], POLLIN, 0};
      if (poll(&p, 1, 20000) <= 0) {  // bound: 20 s without an ack
        timed_out = true;
        break;
      }
      int64_t value = 0;
      const ssize_t n = read(fds[0], &value, sizeof(value));
      if (n != static_cast<ssize_t>(sizeof(value))) break;  // child ended early
      acked = value;
    }
    usleep(extra_delay_us);
    kill(pid, SIGKILL);
    int status = 0;
    ASSERT_EQ(waitpid(pid, &status, 0), pid);
    // Acks written before the kill are still in the pipe.
    for (;;) {
      int64_t value = 0;
      if (read(fds[0], &value, sizeof(value)) != static_cast<ssize_t>(sizeof(value))) break;
      acked = value;
    }
    close(fds[0]);
    ASSERT_FALSE(timed_out) << "child sent no ack for 20 s";
    ASSERT_TRUE(WIFSIGNALED(status) && WTERMSIG(status) == SIGKILL)
        << "child ended by itself, status " << status << " (exit codes: 2 open, 3 insert, 4 put, 5 pipe)";
    ASSERT_GE(acked, kill_after);

    std::unique_ptr<JobStore> store = OpenOrDie(path);
    ASSERT_NE(store, nullptr);
    absl::StatusOr<std::vector<PointRecord>> points = store->Points(1, 0);
    ASSERT_OK(points);
    // Every acknowledged point, in order; at most one more (committed, not yet acknowledged).
    ASSERT_GE(static_cast<int64_t>(points->size()), acked) << "acknowledged points lost";
    EXPECT_LE(static_cast<int64_t>(points->size()), std::min<int64_t>(acked + 1, kPoints));
    for (size_t i = 0; i < points->size(); ++i) {
      EXPECT_EQ((*points)[i].step, static_cast<int64_t>(i));
      EXPECT_EQ((*points)[i].metrics_json, "{\"step\":" + std::to_string(i) + "}");
    }
  }
}

}  // namespace
}  // namespace graft::server
