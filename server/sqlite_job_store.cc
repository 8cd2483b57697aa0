// SqliteJobStore: the JobStore on one SQLite connection in WAL mode, serialised by a mutex.
// Every SQL text is a constant of this file; values only ever reach SQLite as bound
// parameters. Schema changes are an ordered list of steps (kMigrations); the database's
// PRAGMA user_version counts the steps already applied.
#include <sqlite3.h>

#include <cstdint>
#include <filesystem>
#include <map>
#include <memory>
#include <mutex>
#include <optional>
#include <string>
#include <string_view>
#include <unordered_map>
#include <utility>
#include <vector>

#include "absl/status/status.h"
#include "absl/status/statusor.h"
#include "absl/strings/str_cat.h"
#include "nlohmann/json.hpp"
#include "server/job_store.h"

namespace graft::server {
namespace {

// Schema steps, oldest first. Step i (0-based) takes the database from user_version i to
// i + 1. Append new steps; never edit a released one.
constexpr const char* kMigrations[] = {
    // Version 1: jobs, their points and artifacts, and workers.
    R"sql(
CREATE TABLE jobs (
  id               INTEGER PRIMARY KEY AUTOINCREMENT,
  name             TEXT    NOT NULL,
  owner            TEXT    NOT NULL,
  state            INTEGER NOT NULL CHECK (state BETWEEN 1 AND 5),
  priority         INTEGER NOT NULL,
  labels_json      TEXT    NOT NULL,
  attempt          INTEGER NOT NULL,
  max_attempts     INTEGER NOT NULL,
  submitted_ms     INTEGER NOT NULL,
  started_ms       INTEGER NOT NULL,
  finished_ms      INTEGER NOT NULL,
  total_steps      INTEGER NOT NULL,
  step             INTEGER NOT NULL,
  spec_yaml        TEXT    NOT NULL,
  result_json      TEXT    NOT NULL,
  error            TEXT    NOT NULL,
  worker_id        TEXT    NOT NULL,
  lease_expires_ms INTEGER NOT NULL,
  checkpoint_step  INTEGER NOT NULL,
  sweep_id         TEXT    NOT NULL
);
CREATE INDEX jobs_by_state_priority ON jobs (state, priority DESC, id);
CREATE TABLE points (
  job_id       INTEGER NOT NULL REFERENCES jobs (id),
  step         INTEGER NOT NULL,
  attempt      INTEGER NOT NULL,
  metrics_json TEXT    NOT NULL,
  PRIMARY KEY (job_id, step)
) WITHOUT ROWID;
CREATE TABLE artifacts (
  job_id  INTEGER NOT NULL REFERENCES jobs (id),
  name    TEXT    NOT NULL,
  path    TEXT    NOT NULL,
  bytes   INTEGER NOT NULL,
  sha256  TEXT    NOT NULL,
  step    INTEGER NOT NULL,
  attempt INTEGER NOT NULL,
  PRIMARY KEY (job_id, name)
) WITHOUT ROWID;
CREATE TABLE workers (
  id            TEXT    PRIMARY KEY,
  host          TEXT    NOT NULL,
  cores         INTEGER NOT NULL,
  threads       INTEGER NOT NULL,
  version       TEXT    NOT NULL,
  registered_ms INTEGER NOT NULL,
  last_seen_ms  INTEGER NOT NULL
) WITHOUT ROWID;
)sql",
    // Version 2: where a worker runs (its Slurm job, when it is one), how many jobs it ended,
    // and when it said it was leaving (0: it has not).
    R"sql(
ALTER TABLE workers ADD COLUMN slurm_job_id        TEXT    NOT NULL DEFAULT '';
ALTER TABLE workers ADD COLUMN slurm_array_job_id  TEXT    NOT NULL DEFAULT '';
ALTER TABLE workers ADD COLUMN slurm_array_task_id TEXT    NOT NULL DEFAULT '';
ALTER TABLE workers ADD COLUMN jobs_finished       INTEGER NOT NULL DEFAULT 0;
ALTER TABLE workers ADD COLUMN left_ms             INTEGER NOT NULL DEFAULT 0;
)sql",
    // Version 3: why a job was cancelled has a column of its own, and `error` holds failures only.
    // Until now a cancelled job (state 5) kept its cancellation in `error`: it moves across.
    R"sql(
ALTER TABLE jobs ADD COLUMN cancel_reason TEXT NOT NULL DEFAULT '';
UPDATE jobs SET cancel_reason = error, error = '' WHERE state = 5;
)sql",
    // Version 4: the worker token that registered a worker, so that no other token can act as it.
    // Workers registered before have '' and must register again.
    R"sql(
ALTER TABLE workers ADD COLUMN token_name TEXT NOT NULL DEFAULT '';
)sql",
};

constexpr int kBusyTimeoutMs = 5000;

// Column list shared by every query that reads whole jobs; ReadJob depends on this order.
constexpr char kJobColumns[] =
    "id, name, owner, state, priority, labels_json, attempt, max_attempts, submitted_ms, "
    "started_ms, finished_ms, total_steps, step, spec_yaml, result_json, error, worker_id, "
    "lease_expires_ms, checkpoint_step, sweep_id, cancel_reason";

bool ValidState(int64_t v) {
  return v >= static_cast<int>(JobState::kQueued) && v <= static_cast<int>(JobState::kCancelled);
}

absl::StatusOr<std::string> LabelsToJson(const std::map<std::string, std::string>& labels) {
  try {
    return nlohmann::json(labels).dump();
  } catch (const nlohmann::json::exception& e) {
    // dump() refuses strings that are not valid UTF-8.
    return absl::InvalidArgumentError(absl::StrCat("job labels must be valid UTF-8: ", e.what()));
  }
}

absl::StatusOr<std::map<std::string, std::string>> LabelsFromJson(int64_t job_id, const std::string& text) {
  nlohmann::json parsed = nlohmann::json::parse(text, nullptr, /*allow_exceptions=*/false);
  std::map<std::string, std::string> labels;
  bool ok = parsed.is_object();
  if (ok) {
    for (const auto& [key, value] : parsed.items()) {
      if (!value.is_string()) {
        ok = false;
        break;
      }
      labels.emplace(key, value.get<std::string>());
    }
  }
  if (!ok) {
    return absl::InternalError(absl::StrCat("job store: job ", job_id,
                                            ": stored labels are not a JSON object of strings: ", text));
  }
  return labels;
}

// The status of a failed SQLite call with result code `rc`: a busy or locked database is
// Unavailable (try again); a full disk is ResourceExhausted and a disk that cannot be written
// (read-only, permissions, I/O errors) Unavailable, both saying so before SQLite's own message;
// anything else is Internal.
absl::Status StoreError(int rc, const std::string& message) {
  switch (rc & 0xff) {
    case SQLITE_BUSY:
    case SQLITE_LOCKED:
      return absl::UnavailableError(message);
    case SQLITE_FULL:
      return absl::ResourceExhaustedError(absl::StrCat("the data dir's disk is full: ", message));
    case SQLITE_READONLY:
    case SQLITE_CANTOPEN:
    case SQLITE_PERM:
    case SQLITE_IOERR:
      return absl::UnavailableError(absl::StrCat("the data dir's disk cannot be written: ", message));
    default:
      return absl::InternalError(message);
  }
}

// A cached prepared statement in use. On destruction it is reset and its bindings cleared,
// ready for the next user. Bind errors are remembered and reported by the next Step().
class Statement {
 public:
  Statement(sqlite3* db, sqlite3_stmt* stmt, std::string op) : db_(db), stmt_(stmt), op_(std::move(op)) {}
  ~Statement() {
    if (stmt_ != nullptr) {
      sqlite3_reset(stmt_);
      sqlite3_clear_bindings(stmt_);
    }
  }
  Statement(Statement&& other) noexcept
      : db_(other.db_), stmt_(std::exchange(other.stmt_, nullptr)), op_(std::move(other.op_)),
        bind_rc_(other.bind_rc_) {}
  Statement(const Statement&) = delete;
  Statement& operator=(const Statement&) = delete;
  Statement& operator=(Statement&&) = delete;

  void BindInt(int index, int64_t value) { Check(sqlite3_bind_int64(stmt_, index, value)); }
  void BindNull(int index) { Check(sqlite3_bind_null(stmt_, index)); }
  void BindText(int index, std::string_view value) {
    Check(sqlite3_bind_text64(stmt_, index, value.data(), value.size(), SQLITE_TRANSIENT, SQLITE_UTF8));
  }

  // True when a row is ready, false when the statement has finished.
  absl::StatusOr<bool> Step() {
    if (bind_rc_ != SQLITE_OK) return Error(bind_rc_);
    const int rc = sqlite3_step(stmt_);
    if (rc == SQLITE_ROW) return true;
    if (rc == SQLITE_DONE) return false;
    return Error(rc);
  }
  // Steps a statement that returns no rows to completion.
  absl::Status Run() {
    for (;;) {
      absl::StatusOr<bool> row = Step();
      if (!row.ok()) return row.status();
      if (!*row) return absl::OkStatus();
    }
  }

  int64_t Int(int col) const { return sqlite3_column_int64(stmt_, col); }
  std::string Text(int col) const {
    const unsigned char* text = sqlite3_column_text(stmt_, col);
    if (text == nullptr) return std::string();
    return std::string(reinterpret_cast<const char*>(text), sqlite3_column_bytes(stmt_, col));
  }
  // The extended result code of the last failure on this connection.
  int ExtendedErrcode() const { return sqlite3_extended_errcode(db_); }

 private:
  void Check(int rc) {
    if (rc != SQLITE_OK && bind_rc_ == SQLITE_OK) bind_rc_ = rc;
  }
  absl::Status Error(int rc) const {
    return StoreError(rc, absl::StrCat("job store ", op_, ": ", sqlite3_errmsg(db_), " (sqlite code ",
                                       sqlite3_extended_errcode(db_), ")"));
  }

  sqlite3* db_;
  sqlite3_stmt* stmt_;
  std::string op_;
  int bind_rc_ = SQLITE_OK;
};

class SqliteJobStore final : public JobStore {
 public:
  SqliteJobStore(std::string path, sqlite3* db) : path_(std::move(path)), db_(db) {}
  ~SqliteJobStore() override {
    std::lock_guard<std::mutex> lock(mu_);
    for (auto& [sql, stmt] : statements_) sqlite3_finalize(stmt);
    statements_.clear();
    // close_v2 defers the close until anything still open is finalised; nothing should be.
    sqlite3_close_v2(db_);
  }
  SqliteJobStore(const SqliteJobStore&) = delete;
  SqliteJobStore& operator=(const SqliteJobStore&) = delete;

  // Sets the connection options and migrates the schema. Called once, before any other use.
  absl::Status Initialise(Durability durability);

  absl::StatusOr<int64_t> InsertJob(const JobRecord& job) override;
  absl::StatusOr<std::vector<int64_t>> InsertSweep(const std::vector<JobRecord>& jobs) override;
  absl::StatusOr<JobRecord> GetJob(int64_t id) override;
  absl::StatusOr<std::vector<JobRecord>> ListJobs(const JobFilter& filter, int64_t before_id,
                                                  int limit) override;
  absl::Status UpdateJob(const JobRecord& job) override;
  absl::StatusOr<std::optional<JobRecord>> LeaseNext(const std::string& worker_id, int64_t now_ms,
                                                    int64_t lease_ms) override;
  absl::StatusOr<std::vector<JobRecord>> ExpiredLeases(int64_t now_ms) override;
  absl::StatusOr<std::map<JobState, int64_t>> CountByState() override;
  absl::Status PutPoints(int64_t job_id, const std::vector<PointRecord>& points) override;
  absl::Status DeletePointsFrom(int64_t job_id, int64_t from_step) override;
  absl::StatusOr<std::vector<PointRecord>> Points(int64_t job_id, int64_t from_step) override;
  absl::Status PutArtifact(const ArtifactRecord& artifact) override;
  absl::StatusOr<std::optional<ArtifactRecord>> GetArtifact(int64_t job_id, const std::string& name) override;
  absl::Status PutWorker(const WorkerRecord& worker) override;
  absl::StatusOr<std::vector<WorkerRecord>> Workers() override;
  absl::StatusOr<std::optional<WorkerRecord>> GetWorker(const std::string& id) override;

 private:
  // Ends the transaction opened by Begin(): commits on Commit(), otherwise rolls back.
  class ScopedTransaction {
   public:
    explicit ScopedTransaction(SqliteJobStore* store) : store_(store) {}
    ~ScopedTransaction() {
      if (!committed_) store_->RollbackIfActive();
    }
    ScopedTransaction(const ScopedTransaction&) = delete;
    ScopedTransaction& operator=(const ScopedTransaction&) = delete;
    absl::Status Commit(const std::string& op) {
      absl::Status st = store_->Exec("COMMIT", op);
      if (st.ok()) committed_ = true;
      return st;
    }

   private:
    SqliteJobStore* store_;
    bool committed_ = false;
  };

  // All private helpers REQUIRE: mu_ held.
  absl::StatusOr<Statement> Prepare(const std::string& sql, const std::string& op);
  absl::Status Exec(const std::string& sql, const std::string& op);
  // Opens a transaction; `immediate` takes the write lock at once (BEGIN IMMEDIATE).
  absl::Status Begin(bool immediate, const std::string& op);
  void RollbackIfActive();
  absl::StatusOr<int64_t> PragmaInt(const std::string& sql, const std::string& op);
  absl::StatusOr<std::string> PragmaText(const std::string& sql, const std::string& op);
  absl::Status Migrate();
  // NotFound unless job `id` exists.
  absl::Status RequireJob(int64_t id, const std::string& op);
  absl::StatusOr<JobRecord> ReadJob(const Statement& stmt);
  absl::StatusOr<std::vector<JobRecord>> ReadJobs(Statement& stmt, const JobFilter* label_filter, int limit);
  absl::Status BindJobFields(Statement& stmt, const JobRecord& job);
  absl::Status ErrorStatus(const std::string& op) const;

  const std::string path_;
  std::mutex mu_;
  sqlite3* db_;  // guarded by mu_
  std::unordered_map<std::string, sqlite3_stmt*> statements_;  // guarded by mu_; by SQL text
};

absl::Status SqliteJobStore::ErrorStatus(const std::string& op) const {
  const int code = sqlite3_extended_errcode(db_);
  return StoreError(code, absl::StrCat("job store ", op, " (", path_, "): ", sqlite3_errmsg(db_), " (sqlite code ",
                                       code, ")"));
}

absl::StatusOr<Statement> SqliteJobStore::Prepare(const std::string& sql, const std::string& op) {
  auto it = statements_.find(sql);
  if (it == statements_.end()) {
    sqlite3_stmt* stmt = nullptr;
    const int rc = sqlite3_prepare_v3(db_, sql.c_str(), static_cast<int>(sql.size()), SQLITE_PREPARE_PERSISTENT,
                                      &stmt, nullptr);
    if (rc != SQLITE_OK) {
      sqlite3_finalize(stmt);
      return ErrorStatus(op + ": prepare");
    }
    it = statements_.emplace(sql, stmt).first;
  }
  return Statement(db_, it->second, absl::StrCat(op, " (", path_, ")"));
}

absl::Status SqliteJobStore::Exec(const std::string& sql, const std::string& op) {
  absl::StatusOr<Statement> stmt = Prepare(sql, op);
  if (!stmt.ok()) return stmt.status();
  return stmt->Run();
}

absl::Status SqliteJobStore::Begin(bool immediate, const std::string& op) {
  return Exec(immediate ? "BEGIN IMMEDIATE" : "BEGIN", op + ": begin");
}

void SqliteJobStore::RollbackIfActive() {
  // Some errors (SQLITE_FULL, SQLITE_IOERR, ...) roll the transaction back by themselves.
  if (sqlite3_get_autocommit(db_) != 0) return;
  if (!Exec("ROLLBACK", "rollback").ok()) {
    // Last resort so the connection never stays inside a dead transaction.
    sqlite3_exec(db_, "ROLLBACK", nullptr, nullptr, nullptr);
  }
}

absl::StatusOr<int64_t> SqliteJobStore::PragmaInt(const std::string& sql, const std::string& op) {
  absl::StatusOr<Statement> stmt = Prepare(sql, op);
  if (!stmt.ok()) return stmt.status();
  absl::StatusOr<bool> row = stmt->Step();
  if (!row.ok()) return row.status();
  if (!*row) return absl::InternalError(absl::StrCat("job store ", op, " (", path_, "): '", sql, "' returned no row"));
  return stmt->Int(0);
}

absl::StatusOr<std::string> SqliteJobStore::PragmaText(const std::string& sql, const std::string& op) {
  absl::StatusOr<Statement> stmt = Prepare(sql, op);
  if (!stmt.ok()) return stmt.status();
  absl::StatusOr<bool> row = stmt->Step();
  if (!row.ok()) return row.status();
  if (!*row) return absl::InternalError(absl::StrCat("job store ", op, " (", path_, "): '", sql, "' returned no row"));
  return stmt->Text(0);
}

absl::Status SqliteJobStore::Initialise(Durability durability) {
  std::lock_guard<std::mutex> lock(mu_);
  if (sqlite3_busy_timeout(db_, kBusyTimeoutMs) != SQLITE_OK) return ErrorStatus("open: busy_timeout");
  sqlite3_extended_result_codes(db_, 1);

  // Refuse a newer schema before changing anything in the file (journal_mode=WAL persists).
  absl::StatusOr<int64_t> version = PragmaInt("PRAGMA user_version", "open: read schema version");
  if (!version.ok()) return version.status();
  if (*version > CurrentSchemaVersion() || *version < 0) {
    return absl::FailedPreconditionError(absl::StrCat(
        "job store ", path_, " has schema version ", *version, " but this graftd knows versions up to ",
        CurrentSchemaVersion(), "; open it with the graftd that wrote it (or a newer one)"));
  }

  // A database the OS will not let us write (a read-only data dir or file) is opened for reads:
  // graftd serves what it has, and every write fails with Unavailable naming the disk.
  const bool read_only = sqlite3_db_readonly(db_, "main") == 1;
  if (read_only && *version != CurrentSchemaVersion()) {
    return absl::FailedPreconditionError(absl::StrCat("job store ", path_, " cannot be written and has schema version ",
                                                      *version, "; this graftd must migrate it to version ",
                                                      CurrentSchemaVersion(), " first: make the data dir writable"));
  }
  // Read-only, the journal mode is the file's (an immutable open reports "delete"): nothing is written.
  absl::StatusOr<std::string> mode =
      PragmaText(read_only ? "PRAGMA journal_mode" : "PRAGMA journal_mode=WAL", "open: journal_mode");
  if (!mode.ok()) return mode.status();
  if (*mode != "wal" && !read_only) {
    return absl::FailedPreconditionError(absl::StrCat("job store ", path_, ": cannot switch to WAL mode (journal_mode is '",
                                                      *mode, "'); the database needs a local disk file"));
  }
  const bool full = durability == Durability::kFull;
  absl::Status st = Exec(full ? "PRAGMA synchronous=FULL" : "PRAGMA synchronous=NORMAL", "open: synchronous");
  if (!st.ok()) return st;
  absl::StatusOr<int64_t> sync = PragmaInt("PRAGMA synchronous", "open: synchronous");
  if (!sync.ok()) return sync.status();
  if (*sync != (full ? 2 : 1)) {
    return absl::InternalError(absl::StrCat("job store ", path_, ": synchronous is ", *sync, " after setting it to ",
                                            full ? 2 : 1));
  }
  st = Exec("PRAGMA foreign_keys=ON", "open: foreign_keys");
  if (!st.ok()) return st;
  absl::StatusOr<int64_t> fk = PragmaInt("PRAGMA foreign_keys", "open: foreign_keys");
  if (!fk.ok()) return fk.status();
  if (*fk != 1) return absl::InternalError(absl::StrCat("job store ", path_, ": foreign keys could not be enabled"));
  return read_only ? absl::OkStatus() : Migrate();
}

absl::Status SqliteJobStore::Migrate() {
  for (int target = 1; target <= CurrentSchemaVersion(); ++target) {
    const std::string op = absl::StrCat("migrate to schema version ", target);
    absl::Status st = Begin(/*immediate=*/true, op);
    if (!st.ok()) return st;
    ScopedTransaction txn(this);
    // Read again under the write lock: another process may have migrated meanwhile.
    absl::StatusOr<int64_t> version = PragmaInt("PRAGMA user_version", op);
    if (!version.ok()) return version.status();
    if (*version > CurrentSchemaVersion()) {
      return absl::FailedPreconditionError(absl::StrCat("job store ", path_, " has schema version ", *version,
                                                        " but this graftd knows versions up to ",
                                                        CurrentSchemaVersion()));
    }
    if (*version >= target) continue;  // the transaction rolls back, having changed nothing
    if (*version != target - 1) {
      return absl::InternalError(absl::StrCat("job store ", path_, ": schema version ", *version,
                                              " while migrating to ", target));
    }
    // Static multi-statement SQL from kMigrations: no values involved.
    char* errmsg = nullptr;
    if (sqlite3_exec(db_, kMigrations[target - 1], nullptr, nullptr, &errmsg) != SQLITE_OK) {
      std::string message = errmsg != nullptr ? errmsg : sqlite3_errmsg(db_);
      sqlite3_free(errmsg);
      return absl::InternalError(absl::StrCat("job store ", op, " (", path_, "): ", message));
    }
    // PRAGMA takes no bound parameters; `target` is this build's own step number.
    st = Exec(absl::StrCat("PRAGMA user_version = ", target), op);
    if (!st.ok()) return st;
    st = txn.Commit(op);
    if (!st.ok()) return st;
  }
  return absl::OkStatus();
}

absl::Status SqliteJobStore::RequireJob(int64_t id, const std::string& op) {
  absl::StatusOr<Statement> stmt = Prepare("SELECT 1 FROM jobs WHERE id = ?1", op);
  if (!stmt.ok()) return stmt.status();
  stmt->BindInt(1, id);
  absl::StatusOr<bool> row = stmt->Step();
  if (!row.ok()) return row.status();
  if (!*row) return absl::NotFoundError(absl::StrCat("job store ", op, ": no job ", id));
  return absl::OkStatus();
}

absl::Status SqliteJobStore::BindJobFields(Statement& stmt, const JobRecord& job) {
  if (!ValidState(static_cast<int64_t>(job.state))) {
    return absl::InvalidArgumentError(
        absl::StrCat("job state ", static_cast<int64_t>(job.state), " is not one of 1..5"));
  }
  absl::StatusOr<std::string> labels = LabelsToJson(job.labels);
  if (!labels.ok()) return labels.status();
  stmt.BindText(1, job.name);
  stmt.BindText(2, job.owner);
  stmt.BindInt(3, static_cast<int64_t>(job.state));
  stmt.BindInt(4, job.priority);
  stmt.BindText(5, *labels);
  stmt.BindInt(6, job.attempt);
  stmt.BindInt(7, job.max_attempts);
  stmt.BindInt(8, job.submitted_ms);
  stmt.BindInt(9, job.started_ms);
  stmt.BindInt(10, job.finished_ms);
  stmt.BindInt(11, job.total_steps);
  stmt.BindInt(12, job.step);
  stmt.BindText(13, job.spec_yaml);
  stmt.BindText(14, job.result_json);
  stmt.BindText(15, job.error);
  stmt.BindText(16, job.worker_id);
  stmt.BindInt(17, job.lease_expires_ms);
  stmt.BindInt(18, job.checkpoint_step);
  stmt.BindText(19, job.sweep_id);
  stmt.BindText(20, job.cancel_reason);
  return absl::OkStatus();
}

absl::StatusOr<JobRecord> SqliteJobStore::ReadJob(const Statement& stmt) {
  JobRecord job;
  job.id = stmt.Int(0);
  job.name = stmt.Text(1);
  job.owner = stmt.Text(2);
  const int64_t state = stmt.Int(3);
  if (!ValidState(state)) {
    return absl::InternalError(absl::StrCat("job store: job ", job.id, " has invalid stored state ", state));
  }
  job.state = static_cast<JobState>(state);
  job.priority = static_cast<int32_t>(stmt.Int(4));
  absl::StatusOr<std::map<std::string, std::string>> labels = LabelsFromJson(job.id, stmt.Text(5));
  if (!labels.ok()) return labels.status();
  job.labels = std::move(*labels);
  job.attempt = static_cast<int32_t>(stmt.Int(6));
  job.max_attempts = static_cast<int32_t>(stmt.Int(7));
  job.submitted_ms = stmt.Int(8);
  job.started_ms = stmt.Int(9);
  job.finished_ms = stmt.Int(10);
  job.total_steps = stmt.Int(11);
  job.step = stmt.Int(12);
  job.spec_yaml = stmt.Text(13);
  job.result_json = stmt.Text(14);
  job.error = stmt.Text(15);
  job.worker_id = stmt.Text(16);
  job.lease_expires_ms = stmt.Int(17);
  job.checkpoint_step = stmt.Int(18);
  job.sweep_id = stmt.Text(19);
  job.cancel_reason = stmt.Text(20);
  return job;
}

absl::StatusOr<std::vector<JobRecord>> SqliteJobStore::ReadJobs(Statement& stmt, const JobFilter* label_filter,
                                                                int limit) {
  std::vector<JobRecord> jobs;
  while (limit < 0 || static_cast<int>(jobs.size()) < limit) {
    absl::StatusOr<bool> row = stmt.Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    absl::StatusOr<JobRecord> job = ReadJob(stmt);
    if (!job.ok()) return job.status();
    if (label_filter != nullptr) {
      bool match = true;
      for (const auto& [key, value] : label_filter->labels) {
        auto it = job->labels.find(key);
        if (it == job->labels.end() || it->second != value) {
          match = false;
          break;
        }
      }
      if (!match) continue;
    }
    jobs.push_back(std::move(*job));
  }
  return jobs;
}

absl::StatusOr<int64_t> SqliteJobStore::InsertJob(const JobRecord& job) {
  std::lock_guard<std::mutex> lock(mu_);
  absl::StatusOr<Statement> stmt = Prepare(
      "INSERT INTO jobs (name, owner, state, priority, labels_json, attempt, max_attempts, submitted_ms, "
      "started_ms, finished_ms, total_steps, step, spec_yaml, result_json, error, worker_id, "
      "lease_expires_ms, checkpoint_step, sweep_id, cancel_reason) "
      "VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16, ?17, ?18, ?19, ?20)",
      "InsertJob");
  if (!stmt.ok()) return stmt.status();
  absl::Status st = BindJobFields(*stmt, job);
  if (!st.ok()) return st;
  st = stmt->Run();
  if (!st.ok()) return st;
  return static_cast<int64_t>(sqlite3_last_insert_rowid(db_));
}

absl::StatusOr<std::vector<int64_t>> SqliteJobStore::InsertSweep(const std::vector<JobRecord>& jobs) {
  if (jobs.empty()) return absl::InvalidArgumentError("InsertSweep: no jobs");
  std::lock_guard<std::mutex> lock(mu_);
  absl::Status st = Begin(/*immediate=*/true, "InsertSweep");
  if (!st.ok()) return st;
  ScopedTransaction txn(this);
  std::vector<int64_t> ids;
  std::string sweep_id;
  for (const JobRecord& job : jobs) {
    absl::StatusOr<Statement> stmt = Prepare(
        "INSERT INTO jobs (name, owner, state, priority, labels_json, attempt, max_attempts, submitted_ms, "
        "started_ms, finished_ms, total_steps, step, spec_yaml, result_json, error, worker_id, "
        "lease_expires_ms, checkpoint_step, sweep_id, cancel_reason) "
        "VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16, ?17, ?18, ?19, ?20)",
        "InsertSweep");
    if (!stmt.ok()) return stmt.status();
    JobRecord copy = job;
    copy.sweep_id = sweep_id;
    st = BindJobFields(*stmt, copy);
    if (!st.ok()) return st;
    st = stmt->Run();
    if (!st.ok()) return st;
    ids.push_back(static_cast<int64_t>(sqlite3_last_insert_rowid(db_)));
    if (sweep_id.empty()) {
      sweep_id = absl::StrCat("s-", ids.front());
      absl::StatusOr<Statement> upd = Prepare("UPDATE jobs SET sweep_id = ?1 WHERE id = ?2", "InsertSweep: name");
      if (!upd.ok()) return upd.status();
      upd->BindText(1, sweep_id);
      upd->BindInt(2, ids.front());
      st = upd->Run();
      if (!st.ok()) return st;
    }
  }
  st = txn.Commit("InsertSweep");
  if (!st.ok()) return st;
  return ids;
}

absl::StatusOr<JobRecord> SqliteJobStore::GetJob(int64_t id) {
  std::lock_guard<std::mutex> lock(mu_);
  absl::StatusOr<Statement> stmt = Prepare(absl::StrCat("SELECT ", kJobColumns, " FROM jobs WHERE id = ?1"), "GetJob");
  if (!stmt.ok()) return stmt.status();
  stmt->BindInt(1, id);
  absl::StatusOr<bool> row = stmt->Step();
  if (!row.ok()) return row.status();
  if (!*row) return absl::NotFoundError(absl::StrCat("job store GetJob: no job ", id));
  return ReadJob(*stmt);
}

absl::StatusOr<std::vector<JobRecord>> SqliteJobStore::ListJobs(const JobFilter& filter, int64_t before_id,
                                                                int limit) {
  if (limit < 0) return absl::InvalidArgumentError(absl::StrCat("ListJobs: limit must be >= 0, got ", limit));
  if (before_id < 0) {
    return absl::InvalidArgumentError(absl::StrCat("ListJobs: before_id must be >= 0 (0: no bound), got ", before_id));
  }
  if (filter.state.has_value() && !ValidState(static_cast<int64_t>(*filter.state))) {
    return absl::InvalidArgumentError(
        absl::StrCat("ListJobs: state filter ", static_cast<int64_t>(*filter.state), " is not one of 1..5"));
  }
  if (limit == 0) return std::vector<JobRecord>();
  std::lock_guard<std::mutex> lock(mu_);
  absl::StatusOr<Statement> stmt = Prepare(
      absl::StrCat("SELECT ", kJobColumns,
                   " FROM jobs WHERE (?1 IS NULL OR state = ?1) AND (?2 = '' OR owner = ?2) AND "
                   "(?3 = '' OR sweep_id = ?3) AND (?4 = 0 OR id < ?4) ORDER BY id DESC LIMIT ?5"),
      "ListJobs");
  if (!stmt.ok()) return stmt.status();
  if (filter.state.has_value()) {
    stmt->BindInt(1, static_cast<int64_t>(*filter.state));
  } else {
    stmt->BindNull(1);
  }
  stmt->BindText(2, filter.owner);
  stmt->BindText(3, filter.sweep_id);
  stmt->BindInt(4, before_id);
  // Labels are matched here, row by row, so SQL cannot apply the limit: read until `limit`
  // rows match or the rows run out (LIMIT -1 is SQLite's "no limit").
  const bool by_labels = !filter.labels.empty();
  stmt->BindInt(5, by_labels ? -1 : limit);
  return ReadJobs(*stmt, by_labels ? &filter : nullptr, limit);
}

absl::Status SqliteJobStore::UpdateJob(const JobRecord& job) {
  std::lock_guard<std::mutex> lock(mu_);
  absl::StatusOr<Statement> stmt = Prepare(
      "UPDATE jobs SET name = ?1, owner = ?2, state = ?3, priority = ?4, labels_json = ?5, attempt = ?6, "
      "max_attempts = ?7, submitted_ms = ?8, started_ms = ?9, finished_ms = ?10, total_steps = ?11, "
      "step = ?12, spec_yaml = ?13, result_json = ?14, error = ?15, worker_id = ?16, "
      "lease_expires_ms = ?17, checkpoint_step = ?18, sweep_id = ?19, cancel_reason = ?20 WHERE id = ?21",
      "UpdateJob");
  if (!stmt.ok()) return stmt.status();
  absl::Status st = BindJobFields(*stmt, job);
  if (!st.ok()) return st;
  stmt->BindInt(21, job.id);
  st = stmt->Run();
  if (!st.ok()) return st;
  if (sqlite3_changes(db_) == 0) return absl::NotFoundError(absl::StrCat("job store UpdateJob: no job ", job.id));
  return absl::OkStatus();
}

absl::StatusOr<std::optional<JobRecord>> SqliteJobStore::LeaseNext(const std::string& worker_id, int64_t now_ms,
                                                                  int64_t lease_ms) {
  if (worker_id.empty()) return absl::InvalidArgumentError("LeaseNext: worker_id must not be empty");
  if (lease_ms <= 0) return absl::InvalidArgumentError(absl::StrCat("LeaseNext: lease_ms must be > 0, got ", lease_ms));
  int64_t expires_ms = 0;
  if (__builtin_add_overflow(now_ms, lease_ms, &expires_ms)) {
    return absl::InvalidArgumentError(absl::StrCat("LeaseNext: now_ms ", now_ms, " + lease_ms ", lease_ms, " overflows"));
  }
  std::lock_guard<std::mutex> lock(mu_);
  // IMMEDIATE takes the write lock before the SELECT, so another connection to the same file
  // cannot pick the same job between our read and our write.
  absl::Status st = Begin(/*immediate=*/true, "LeaseNext");
  if (!st.ok()) return st;
  ScopedTransaction txn(this);
  int64_t id = 0;
  {
    absl::StatusOr<Statement> pick = Prepare(
        "SELECT id FROM jobs WHERE state = 1 ORDER BY priority DESC, id ASC LIMIT 1", "LeaseNext: pick");
    if (!pick.ok()) return pick.status();
    absl::StatusOr<bool> row = pick->Step();
    if (!row.ok()) return row.status();
    if (!*row) {
      st = txn.Commit("LeaseNext");
      if (!st.ok()) return st;
      return std::optional<JobRecord>();
    }
    id = pick->Int(0);
  }
  {
    absl::StatusOr<Statement> mark = Prepare(
        "UPDATE jobs SET state = 2, attempt = attempt + 1, worker_id = ?1, "
        "started_ms = CASE WHEN started_ms = 0 THEN ?2 ELSE started_ms END, lease_expires_ms = ?3 "
        "WHERE id = ?4",
        "LeaseNext: mark running");
    if (!mark.ok()) return mark.status();
    mark->BindText(1, worker_id);
    mark->BindInt(2, now_ms);
    mark->BindInt(3, expires_ms);
    mark->BindInt(4, id);
    st = mark->Run();
    if (!st.ok()) return st;
  }
  std::optional<JobRecord> leased;
  {
    absl::StatusOr<Statement> read =
        Prepare(absl::StrCat("SELECT ", kJobColumns, " FROM jobs WHERE id = ?1"), "LeaseNext: read");
    if (!read.ok()) return read.status();
    read->BindInt(1, id);
    absl::StatusOr<bool> row = read->Step();
    if (!row.ok()) return row.status();
    if (!*row) return absl::InternalError(absl::StrCat("LeaseNext: job ", id, " vanished inside its transaction"));
    absl::StatusOr<JobRecord> job = ReadJob(*read);
    if (!job.ok()) return job.status();
    leased = std::move(*job);
  }
  st = txn.Commit("LeaseNext");
  if (!st.ok()) return st;
  return leased;
}

absl::StatusOr<std::vector<JobRecord>> SqliteJobStore::ExpiredLeases(int64_t now_ms) {
  std::lock_guard<std::mutex> lock(mu_);
  absl::StatusOr<Statement> stmt =
      Prepare(absl::StrCat("SELECT ", kJobColumns,
                           " FROM jobs WHERE state = 2 AND lease_expires_ms < ?1 ORDER BY lease_expires_ms, id"),
              "ExpiredLeases");
  if (!stmt.ok()) return stmt.status();
  stmt->BindInt(1, now_ms);
  return ReadJobs(*stmt, nullptr, -1);
}

absl::StatusOr<std::map<JobState, int64_t>> SqliteJobStore::CountByState() {
  std::lock_guard<std::mutex> lock(mu_);
  absl::StatusOr<Statement> stmt = Prepare("SELECT state, COUNT(*) FROM jobs GROUP BY state", "CountByState");
  if (!stmt.ok()) return stmt.status();
  std::map<JobState, int64_t> counts;
  for (int s = static_cast<int>(JobState::kQueued); s <= static_cast<int>(JobState::kCancelled); ++s) {
    counts[static_cast<JobState>(s)] = 0;
  }
  for (;;) {
    absl::StatusOr<bool> row = stmt->Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    const int64_t state = stmt->Int(0);
    if (!ValidState(state)) return absl::InternalError(absl::StrCat("CountByState: invalid stored state ", state));
    counts[static_cast<JobState>(state)] = stmt->Int(1);
  }
  return counts;
}

absl::Status SqliteJobStore::PutPoints(int64_t job_id, const std::vector<PointRecord>& points) {
  std::lock_guard<std::mutex> lock(mu_);
  absl::Status st = Begin(/*immediate=*/true, "PutPoints");
  if (!st.ok()) return st;
  ScopedTransaction txn(this);
  st = RequireJob(job_id, "PutPoints");
  if (!st.ok()) return st;
  for (const PointRecord& point : points) {
    absl::StatusOr<Statement> stmt = Prepare(
        "INSERT OR REPLACE INTO points (job_id, step, attempt, metrics_json) VALUES (?1, ?2, ?3, ?4)", "PutPoints");
    if (!stmt.ok()) return stmt.status();
    stmt->BindInt(1, job_id);
    stmt->BindInt(2, point.step);
    stmt->BindInt(3, point.attempt);
    stmt->BindText(4, point.metrics_json);
    st = stmt->Run();
    if (!st.ok()) return st;
  }
  return txn.Commit("PutPoints");
}

absl::Status SqliteJobStore::DeletePointsFrom(int64_t job_id, int64_t from_step) {
  std::lock_guard<std::mutex> lock(mu_);
  absl::Status st = Begin(/*immediate=*/true, "DeletePointsFrom");
  if (!st.ok()) return st;
  ScopedTransaction txn(this);
  st = RequireJob(job_id, "DeletePointsFrom");
  if (!st.ok()) return st;
  absl::StatusOr<Statement> stmt = Prepare("DELETE FROM points WHERE job_id = ?1 AND step >= ?2", "DeletePointsFrom");
  if (!stmt.ok()) return stmt.status();
  stmt->BindInt(1, job_id);
  stmt->BindInt(2, from_step);
  st = stmt->Run();
  if (!st.ok()) return st;
  return txn.Commit("DeletePointsFrom");
}

absl::StatusOr<std::vector<PointRecord>> SqliteJobStore::Points(int64_t job_id, int64_t from_step) {
  std::lock_guard<std::mutex> lock(mu_);
  absl::Status st = Begin(/*immediate=*/false, "Points");
  if (!st.ok()) return st;
  ScopedTransaction txn(this);
  st = RequireJob(job_id, "Points");
  if (!st.ok()) return st;
  std::vector<PointRecord> points;
  {
    absl::StatusOr<Statement> stmt = Prepare(
        "SELECT step, attempt, metrics_json FROM points WHERE job_id = ?1 AND step >= ?2 ORDER BY step", "Points");
    if (!stmt.ok()) return stmt.status();
    stmt->BindInt(1, job_id);
    stmt->BindInt(2, from_step);
    for (;;) {
      absl::StatusOr<bool> row = stmt->Step();
      if (!row.ok()) return row.status();
      if (!*row) break;
      PointRecord point;
      point.step = stmt->Int(0);
      point.attempt = static_cast<int32_t>(stmt->Int(1));
      point.metrics_json = stmt->Text(2);
      points.push_back(std::move(point));
    }
  }
  st = txn.Commit("Points");
  if (!st.ok()) return st;
  return points;
}

absl::Status SqliteJobStore::PutArtifact(const ArtifactRecord& artifact) {
  std::lock_guard<std::mutex> lock(mu_);
  absl::StatusOr<Statement> stmt = Prepare(
      "INSERT OR REPLACE INTO artifacts (job_id, name, path, bytes, sha256, step, attempt) "
      "VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
      "PutArtifact");
  if (!stmt.ok()) return stmt.status();
  stmt->BindInt(1, artifact.job_id);
  stmt->BindText(2, artifact.name);
  stmt->BindText(3, artifact.path);
  stmt->BindInt(4, artifact.bytes);
  stmt->BindText(5, artifact.sha256);
  stmt->BindInt(6, artifact.step);
  stmt->BindInt(7, artifact.attempt);
  absl::Status st = stmt->Run();
  if (!st.ok() && stmt->ExtendedErrcode() == SQLITE_CONSTRAINT_FOREIGNKEY) {
    return absl::NotFoundError(absl::StrCat("job store PutArtifact: no job ", artifact.job_id));
  }
  return st;
}

absl::StatusOr<std::optional<ArtifactRecord>> SqliteJobStore::GetArtifact(int64_t job_id, const std::string& name) {
  std::lock_guard<std::mutex> lock(mu_);
  absl::Status st = Begin(/*immediate=*/false, "GetArtifact");
  if (!st.ok()) return st;
  ScopedTransaction txn(this);
  st = RequireJob(job_id, "GetArtifact");
  if (!st.ok()) return st;
  std::optional<ArtifactRecord> found;
  {
    absl::StatusOr<Statement> stmt = Prepare(
        "SELECT path, bytes, sha256, step, attempt FROM artifacts WHERE job_id = ?1 AND name = ?2", "GetArtifact");
    if (!stmt.ok()) return stmt.status();
    stmt->BindInt(1, job_id);
    stmt->BindText(2, name);
    absl::StatusOr<bool> row = stmt->Step();
    if (!row.ok()) return row.status();
    if (*row) {
      ArtifactRecord a;
      a.job_id = job_id;
      a.name = name;
      a.path = stmt->Text(0);
      a.bytes = stmt->Int(1);
      a.sha256 = stmt->Text(2);
      a.step = stmt->Int(3);
      a.attempt = static_cast<int32_t>(stmt->Int(4));
      found = std::move(a);
    }
  }
  st = txn.Commit("GetArtifact");
  if (!st.ok()) return st;
  return found;
}

absl::Status SqliteJobStore::PutWorker(const WorkerRecord& worker) {
  if (worker.id.empty()) return absl::InvalidArgumentError("PutWorker: worker id must not be empty");
  std::lock_guard<std::mutex> lock(mu_);
  absl::StatusOr<Statement> stmt = Prepare(
      "INSERT OR REPLACE INTO workers (id, host, cores, threads, version, registered_ms, last_seen_ms, "
      "slurm_job_id, slurm_array_job_id, slurm_array_task_id, jobs_finished, left_ms, token_name) "
      "VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13)",
      "PutWorker");
  if (!stmt.ok()) return stmt.status();
  stmt->BindText(1, worker.id);
  stmt->BindText(2, worker.host);
  stmt->BindInt(3, worker.cores);
  stmt->BindInt(4, worker.threads);
  stmt->BindText(5, worker.version);
  stmt->BindInt(6, worker.registered_ms);
  stmt->BindInt(7, worker.last_seen_ms);
  stmt->BindText(8, worker.slurm_job_id);
  stmt->BindText(9, worker.slurm_array_job_id);
  stmt->BindText(10, worker.slurm_array_task_id);
  stmt->BindInt(11, worker.jobs_finished);
  stmt->BindInt(12, worker.left_ms);
  stmt->BindText(13, worker.token_name);
  return stmt->Run();
}

namespace {
constexpr char kWorkerColumns[] =
    "id, host, cores, threads, version, registered_ms, last_seen_ms, slurm_job_id, slurm_array_job_id, "
    "slurm_array_task_id, jobs_finished, left_ms, token_name";
WorkerRecord ReadWorker(Statement& stmt) {
  WorkerRecord w;
  w.id = stmt.Text(0);
  w.host = stmt.Text(1);
  w.cores = static_cast<int32_t>(stmt.Int(2));
  w.threads = static_cast<int32_t>(stmt.Int(3));
  w.version = stmt.Text(4);
  w.registered_ms = stmt.Int(5);
  w.last_seen_ms = stmt.Int(6);
  w.slurm_job_id = stmt.Text(7);
  w.slurm_array_job_id = stmt.Text(8);
  w.slurm_array_task_id = stmt.Text(9);
  w.jobs_finished = stmt.Int(10);
  w.left_ms = stmt.Int(11);
  w.token_name = stmt.Text(12);
  return w;
}
}  // namespace

absl::StatusOr<std::vector<WorkerRecord>> SqliteJobStore::Workers() {
  std::lock_guard<std::mutex> lock(mu_);
  absl::StatusOr<Statement> stmt =
      Prepare(absl::StrCat("SELECT ", kWorkerColumns, " FROM workers ORDER BY registered_ms, id"), "Workers");
  if (!stmt.ok()) return stmt.status();
  std::vector<WorkerRecord> workers;
  for (;;) {
    absl::StatusOr<bool> row = stmt->Step();
    if (!row.ok()) return row.status();
    if (!*row) break;
    workers.push_back(ReadWorker(*stmt));
  }
  return workers;
}

absl::StatusOr<std::optional<WorkerRecord>> SqliteJobStore::GetWorker(const std::string& id) {
  std::lock_guard<std::mutex> lock(mu_);
  absl::StatusOr<Statement> stmt =
      Prepare(absl::StrCat("SELECT ", kWorkerColumns, " FROM workers WHERE id = ?1"), "GetWorker");
  if (!stmt.ok()) return stmt.status();
  stmt->BindText(1, id);
  absl::StatusOr<bool> row = stmt->Step();
  if (!row.ok()) return row.status();
  if (!*row) return std::optional<WorkerRecord>();
  return std::optional<WorkerRecord>(ReadWorker(*stmt));
}

}  // namespace

bool IsFinal(JobState s) {
  return s == JobState::kSucceeded || s == JobState::kFailed || s == JobState::kCancelled;
}

const char* ToString(JobState s) {
  switch (s) {
    case JobState::kQueued:
      return "queued";
    case JobState::kRunning:
      return "running";
    case JobState::kSucceeded:
      return "succeeded";
    case JobState::kFailed:
      return "failed";
    case JobState::kCancelled:
      return "cancelled";
  }
  return "unknown";
}

int CurrentSchemaVersion() { return static_cast<int>(sizeof(kMigrations) / sizeof(kMigrations[0])); }

absl::StatusOr<std::unique_ptr<JobStore>> OpenSqliteJobStore(const std::string& path, Durability durability) {
  // An empty path or ":memory:" would give SQLite a temporary database: nothing durable.
  if (path.empty() || path == ":memory:") {
    return absl::InvalidArgumentError("job store: the database path must name a file on a local disk");
  }
  sqlite3* db = nullptr;
  const int rc = sqlite3_open_v2(path.c_str(), &db, SQLITE_OPEN_READWRITE | SQLITE_OPEN_CREATE | SQLITE_OPEN_NOMUTEX,
                                 nullptr);
  if (rc != SQLITE_OK) {
    std::string message = absl::StrCat("job store: cannot open ", path, ": ",
                                       db != nullptr ? sqlite3_errmsg(db) : sqlite3_errstr(rc), " (sqlite code ", rc,
                                       ")");
    sqlite3_close_v2(db);
    if ((rc & 0xff) == SQLITE_BUSY) return absl::UnavailableError(message);
    return absl::InternalError(message);
  }
  if (sqlite3_db_readonly(db, "main") == 1) {
    // The OS will not let us write the file (a read-only data dir or file). SQLite then still
    // needs the -shm file beside it to read a WAL database; when graftd last stopped cleanly
    // there is none and none can be made, but neither is there a -wal file with content, so the
    // file alone is the whole database: open it as immutable. With a -wal file left (graftd was
    // killed), the existing -shm serves.
    std::error_code ec;
    const auto wal_bytes = std::filesystem::file_size(path + "-wal", ec);
    if (ec || wal_bytes == 0) {
      sqlite3_close_v2(db);
      db = nullptr;
      std::string uri = "file:";
      for (char ch : path) {
        if (ch == '%' || ch == '?' || ch == '#') {
          static constexpr char kHex[] = "0123456789abcdef";
          uri += {'%', kHex[(ch >> 4) & 0xf], kHex[ch & 0xf]};
        } else {
          uri += ch;
        }
      }
      uri += "?immutable=1";
      const int ro = sqlite3_open_v2(uri.c_str(), &db, SQLITE_OPEN_READONLY | SQLITE_OPEN_URI | SQLITE_OPEN_NOMUTEX,
                                     nullptr);
      if (ro != SQLITE_OK) {
        std::string message = absl::StrCat("job store: cannot open ", path, " for reading: ",
                                           db != nullptr ? sqlite3_errmsg(db) : sqlite3_errstr(ro));
        sqlite3_close_v2(db);
        return StoreError(ro, message);
      }
    }
  }
  auto store = std::make_unique<SqliteJobStore>(path, db);
  absl::Status st = store->Initialise(durability);
  if (!st.ok()) return st;
  return std::unique_ptr<JobStore>(std::move(store));
}

}  // namespace graft::server
