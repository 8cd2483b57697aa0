// The coordinator's durable state: jobs, their points, artifacts and workers. One seam
// (JobStore) with an SQLite implementation (SqliteJobStore, WAL mode) for graftd and tests.
// Thread-safety: every method of a JobStore may be called from any thread; implementations
// serialise access internally. Each method is one transaction: it happens completely or not
// at all, and has happened (durably, to the configured level) when it returns OK.
#ifndef GRAFT_SERVER_JOB_STORE_H_
#define GRAFT_SERVER_JOB_STORE_H_

#include <cstdint>
#include <map>
#include <memory>
#include <optional>
#include <string>
#include <vector>

#include "absl/status/status.h"
#include "absl/status/statusor.h"

namespace graft::server {

// Values match graft.v1.JobState.
enum class JobState { kQueued = 1, kRunning = 2, kSucceeded = 3, kFailed = 4, kCancelled = 5 };

bool IsFinal(JobState s);
const char* ToString(JobState s);  // "queued", "running", ...

struct JobRecord {
  int64_t id = 0;  // assigned by InsertJob, ascending from 1
  std::string name;
  std::string owner;
  JobState state = JobState::kQueued;
  int32_t priority = 0;
  std::map<std::string, std::string> labels;
  int32_t attempt = 0;       // 0 before the first lease
  int32_t max_attempts = 3;
  int64_t submitted_ms = 0;
  int64_t started_ms = 0;
  int64_t finished_ms = 0;
  int64_t total_steps = 0;
  int64_t step = 0;          // latest progress of the current attempt
  std::string spec_yaml;
  std::string result_json;
  std::string error;          // failed: why (a run-time failure, or no attempts left)
  std::string cancel_reason;  // cancelled: by whom and why ("cancelled by alice: <reason>"), and
                              // how its worker stopped; "" for a job never cancelled
  std::string worker_id;     // lease holder while running, else ""
  int64_t lease_expires_ms = 0;  // running: when the lease lapses unless renewed
  int64_t checkpoint_step = 0;   // step of the last stored checkpoint.pt, 0 if none
  std::string sweep_id;          // "s-<n>" for a member of a sweep, "" for a lone job
};

struct PointRecord {
  int64_t step = 0;
  int32_t attempt = 0;
  std::string metrics_json;
};

struct ArtifactRecord {
  int64_t job_id = 0;
  std::string name;    // checkpoint.pt, weights.pt, result.json, metrics.jsonl, spec.yaml, failures.jsonl,
                       // and scan.json, scan.tsv, scan.svg, das.json, rotation.pt for analysis blocks
  std::string path;    // file under the data dir holding the bytes
  int64_t bytes = 0;
  std::string sha256;  // hex
  int64_t step = 0;    // checkpoint.pt: its step
  int32_t attempt = 0;
};

struct WorkerRecord {
  std::string id;
  std::string host;
  int32_t cores = 0;
  int32_t threads = 0;
  std::string version;
  int64_t registered_ms = 0;
  int64_t last_seen_ms = 0;       // its last call (register, lease, report, finish)
  // From the worker's environment when it runs as a Slurm job ("" otherwise): SLURM_JOB_ID,
  // SLURM_ARRAY_JOB_ID and SLURM_ARRAY_TASK_ID.
  std::string slurm_job_id, slurm_array_job_id, slurm_array_task_id;
  int64_t jobs_finished = 0;      // jobs it ended: succeeded, failed, or stopped after a cancel
  int64_t left_ms = 0;            // when it said it was leaving; 0: it has not
  // The name of the worker token that registered it: only that token may act as this worker.
  // "" for a worker registered before schema version 4 (it must register again).
  std::string token_name;
};

struct JobFilter {
  std::optional<JobState> state;
  std::string owner;                          // "" = any
  std::map<std::string, std::string> labels;  // all must match
  std::string sweep_id;                       // "" = any
};

class JobStore {
 public:
  virtual ~JobStore() = default;

  // Stores a new job (id ignored) and returns its id.
  virtual absl::StatusOr<int64_t> InsertJob(const JobRecord& job) = 0;
  // Stores the jobs of one sweep in one transaction (all or none); each gets sweep_id
  // "s-<id of the first job>". Returns the ids in order. REQUIRES: jobs not empty.
  virtual absl::StatusOr<std::vector<int64_t>> InsertSweep(const std::vector<JobRecord>& jobs) = 0;
  // NotFound when there is no such job.
  virtual absl::StatusOr<JobRecord> GetJob(int64_t id) = 0;
  // Jobs matching `filter` with id < before_id (0: no bound), newest (highest id) first, at most
  // `limit`.
  virtual absl::StatusOr<std::vector<JobRecord>> ListJobs(const JobFilter& filter, int64_t before_id,
                                                          int limit) = 0;
  // Replaces every field of the job with id job.id. NotFound when absent.
  virtual absl::Status UpdateJob(const JobRecord& job) = 0;
  // Atomically picks the queued job with the highest priority (ties: lowest id), marks it
  // running with attempt + 1, worker_id, started_ms (if 0) and lease_expires_ms =
  // now_ms + lease_ms, and returns it; nullopt when nothing is queued.
  virtual absl::StatusOr<std::optional<JobRecord>> LeaseNext(const std::string& worker_id, int64_t now_ms,
                                                            int64_t lease_ms) = 0;
  // Running jobs whose lease_expires_ms < now_ms.
  virtual absl::StatusOr<std::vector<JobRecord>> ExpiredLeases(int64_t now_ms) = 0;
  // Number of jobs in each state.
  virtual absl::StatusOr<std::map<JobState, int64_t>> CountByState() = 0;

  // Stores points keyed by (job, step): a point for an existing step replaces it.
  virtual absl::Status PutPoints(int64_t job_id, const std::vector<PointRecord>& points) = 0;
  // Removes the job's points with step >= from_step.
  virtual absl::Status DeletePointsFrom(int64_t job_id, int64_t from_step) = 0;
  // The job's points with step >= from_step, ascending.
  virtual absl::StatusOr<std::vector<PointRecord>> Points(int64_t job_id, int64_t from_step) = 0;

  // Records an artifact (replacing one of the same job and name).
  virtual absl::Status PutArtifact(const ArtifactRecord& artifact) = 0;
  virtual absl::StatusOr<std::optional<ArtifactRecord>> GetArtifact(int64_t job_id, const std::string& name) = 0;

  virtual absl::Status PutWorker(const WorkerRecord& worker) = 0;  // insert or replace by id
  virtual absl::StatusOr<std::vector<WorkerRecord>> Workers() = 0;  // oldest registration first
  virtual absl::StatusOr<std::optional<WorkerRecord>> GetWorker(const std::string& id) = 0;
};

enum class Durability { kNormal, kFull };  // SQLite synchronous=NORMAL (survives a killed
                                           // process) or FULL (also power loss)

// Opens (creating if needed) `path` in WAL mode and migrates its schema to the current
// version. Fails with FailedPrecondition for a database written by a newer graftd.
absl::StatusOr<std::unique_ptr<JobStore>> OpenSqliteJobStore(const std::string& path, Durability durability);

// The schema version this build writes.
int CurrentSchemaVersion();

}  // namespace graft::server

#endif  // GRAFT_SERVER_JOB_STORE_H_
