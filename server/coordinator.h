// The coordinator's logic, independent of gRPC: submitting and validating jobs, the queue and
// its leases (long polls, expiry, attempts, hand-backs), points and their watchers,
// artifacts in the data dir, and who may see what. The gRPC services in services.h are thin
// adapters over it. Thread-safety: every public method is safe to call from any thread; one
// mutex serialises state changes, and callbacks (watch events, lease replies) are invoked
// outside it.
#ifndef GRAFT_SERVER_COORDINATOR_H_
#define GRAFT_SERVER_COORDINATOR_H_

#include <condition_variable>
#include <cstdint>
#include <fstream>
#include <functional>
#include <map>
#include <memory>
#include <mutex>
#include <string>
#include <thread>
#include <vector>

#include "absl/status/statusor.h"
#include "graft/v1/graft.pb.h"
#include "configs/reader/spec.h"
#include "proto/sha256.h"
#include "server/auth.h"
#include "server/job_store.h"
#include "spdlog/logger.h"

namespace graft::server {

// The time source, a seam for tests.
class Clock {
 public:
  virtual ~Clock() = default;
  virtual int64_t NowMs() = 0;
};
std::unique_ptr<Clock> CreateSystemClock();

// The limits are graftd's settings of the same names (configs/graftd.yaml documents each); a
// request beyond one is refused, INVALID_ARGUMENT or RESOURCE_EXHAUSTED, with a message naming the
// setting and its value, before anything is stored.
struct CoordinatorOptions {
  std::string data_dir = "./var/graft";  // database and artifacts
  int64_t lease_ms = 30000;               // a worker must report within this
  int max_attempts = 3;                   // leases a job may use before it fails
  int64_t max_config_bytes = 1 << 20;     // larger submissions are refused
  int64_t max_sweep_jobs = 1000;          // larger sweeps are refused before anything is stored
  int64_t max_artifact_bytes = int64_t{4} << 30;  // one uploaded artifact (checkpoint.pt, weights.pt ...)
  config::SpecLimits spec;                // variables, domains, tables, input space, parameters, steps
  int64_t max_points_per_report = 1000;   // points in one Report
  int64_t max_name_bytes = 256;           // a job's name (the config's name), source name, a worker's host and version
  int64_t max_label_bytes = 256;          // each label key and each label value
  int64_t max_labels_per_job = 32;        // labels of one submission
  int64_t max_reason_bytes = 16384;       // a cancel, failure, hand-back, stop or leave reason
  int64_t max_watches_per_user = 64;      // open WatchJob and WatchSweep streams of one token name
  int64_t max_requests_in_flight_per_token = 512;  // calls of one token name not yet answered (long polls included)
  int64_t sweep_interval_ms = 200;        // how often lapsed leases and long polls are checked
};

// An artifact upload in progress; owned by the caller between BeginUpload and CommitUpload.
class Upload {
 public:
  ~Upload();
  absl::Status Write(const std::string& bytes);

 private:
  friend class Coordinator;
  Upload() = default;
  v1::ArtifactHeader header_;
  int64_t job_id_ = 0;
  std::string tmp_path_, final_path_;
  std::ofstream out_;
  int64_t written_ = 0;
  Sha256 sha_;
  bool committed_ = false;
};

class Coordinator {
 public:
  Coordinator(std::unique_ptr<JobStore> store, const CoordinatorOptions& options, Clock* clock,
              std::shared_ptr<spdlog::logger> log);
  ~Coordinator();
  Coordinator(const Coordinator&) = delete;
  Coordinator& operator=(const Coordinator&) = delete;

  // Recovers (jobs whose lease lapsed while the coordinator was down go back to the queue)
  // and starts the background sweeper. REQUIRES: called once, before serving.
  absl::Status Start();
  // Stops the sweeper and answers every waiting long poll with "no job".
  void Shutdown();

  const CoordinatorOptions& options() const { return options_; }

  // --- people and scripts
  absl::StatusOr<v1::SubmitJobResponse> Submit(const Principal& who, const v1::SubmitJobRequest& request);
  absl::StatusOr<v1::Job> Get(const Principal& who, const std::string& job_id);
  absl::StatusOr<v1::ListJobsResponse> List(const Principal& who, const v1::ListJobsRequest& request);
  absl::StatusOr<v1::Job> Cancel(const Principal& who, const std::string& job_id, const std::string& reason);
  // Cancels every job of the sweep that has not ended; NotFound for an unknown (or another
  // user's) sweep.
  absl::StatusOr<v1::CancelSweepResponse> CancelSweep(const Principal& who, const std::string& sweep_id,
                                                      const std::string& reason);
  absl::StatusOr<std::vector<v1::Point>> Metrics(const Principal& who, const std::string& job_id);
  // The stored artifact's record (its bytes are in record.path).
  absl::StatusOr<ArtifactRecord> Artifact(const Principal& who, const std::string& job_id, const std::string& name);
  absl::StatusOr<v1::ServerInfo> Info();
  // The fleet: every registered worker with its state (idle, training JOB at step N, gone),
  // then the Slurm tasks the launcher submitted that have not registered yet (pending).
  absl::StatusOr<v1::ListWorkersResponse> ListWorkers(bool include_gone);

  // --- the elastic launcher (server/launcher.h)
  struct FleetDemand {
    int64_t queued_jobs = 0;
    int64_t idle_workers = 0;     // live workers holding no job
    int64_t live_workers = 0;     // idle or training
    int64_t pending_tasks = 0;    // submitted to Slurm, not registered yet
  };
  FleetDemand Demand();
  // Records Slurm array tasks just submitted (array job id, task ids) as pending until a worker
  // registers with them or ForgetPending drops them.
  void AddPending(const std::string& array_job_id, const std::vector<std::string>& task_ids, int64_t now_ms);
  // The pending tasks, as "ARRAYJOB_TASK".
  std::vector<std::string> PendingTasks();
  // Drops pending tasks that Slurm no longer knows (ended or cancelled without registering).
  void ForgetPending(const std::vector<std::string>& tasks);

  // Watching: `sink` receives the job's current state, then its stored points with step >=
  // from_step, then every later event, in order, until Unwatch or a final state (after which
  // `sink` gets `done` = true once). `sink` must not block or call back into the coordinator.
  using WatchSink = std::function<void(const v1::JobEvent& event, bool done)>;
  absl::StatusOr<int64_t> Watch(const Principal& who, const std::string& job_id, int64_t from_step, WatchSink sink);
  void Unwatch(int64_t watch_id);
  // The same for every job of a sweep: each event tagged with its job id; `done` once every
  // job has ended.
  using SweepSink = std::function<void(const v1::SweepEvent& event, bool done)>;
  absl::StatusOr<int64_t> WatchSweep(const Principal& who, const std::string& sweep_id, int64_t from_step,
                                     SweepSink sink);

  // --- workers (the caller has already checked the worker role). A worker id is bound to the
  // name of the token that registered it: every later call naming that worker must come with a
  // token of the same name, or it is PermissionDenied; an unknown worker id is NotFound. Report,
  // FetchCheckpoint, uploads and Finish also need the job's current lease (worker and attempt),
  // or they are FailedPrecondition.
  absl::StatusOr<v1::RegisterWorkerResponse> Register(const Principal& who, const v1::RegisterWorkerRequest& request);
  // Completes `done` (exactly once, from any thread) within request.wait_ms, with a job or
  // has_job = false. Returns the long poll's number for DropWaiter (0 when `done` was completed
  // at once).
  using LeaseDone = std::function<void(absl::Status status, const v1::LeaseJobResponse& response)>;
  uint64_t Lease(const Principal& who, const v1::LeaseJobRequest& request, LeaseDone done);
  // The caller of long poll `waiter` has gone (its call was cancelled, or its process died): it is
  // no longer offered a job, and its `done` is completed with Cancelled. Nothing if it was
  // already answered.
  void DropWaiter(uint64_t waiter);
  absl::StatusOr<v1::ReportResponse> Report(const Principal& who, const v1::ReportRequest& request);
  // The worker leaves: shown as gone from now on. NotFound for an unknown worker.
  absl::Status Deregister(const Principal& who, const v1::DeregisterWorkerRequest& request);
  absl::StatusOr<ArtifactRecord> CheckpointFor(const Principal& who, const v1::FetchCheckpointRequest& request);
  absl::StatusOr<std::unique_ptr<Upload>> BeginUpload(const Principal& who, const v1::ArtifactHeader& header);
  absl::StatusOr<int64_t> CommitUpload(Upload& upload);
  absl::Status Finish(const Principal& who, const v1::FinishJobRequest& request);

 private:
  struct Waiter {
    uint64_t number;
    std::string worker_id;
    int64_t deadline_ms;
    LeaseDone done;
  };
  struct Watcher {
    int64_t job_id;       // a job watch, or 0
    std::string sweep_id; // a sweep watch, or ""
    WatchSink sink;
    SweepSink sweep_sink;
    int64_t from_step = 0;  // points below it are not sent
  };
  using Deferred = std::vector<std::function<void()>>;  // callbacks to run after unlocking

  absl::StatusOr<JobRecord> LoadVisible(const Principal& who, const std::string& job_id);  // REQUIRES: mu_
  // InvalidArgument "WHAT is N bytes; this coordinator accepts at most SETTING = MAX" when `text` is longer.
  absl::Status CheckLength(const std::string& what, const std::string& text, int64_t max, const char* setting) const;
  // The worker's record when `worker_id` is registered and was registered by a token named
  // who.name: NotFound for an unknown worker, PermissionDenied for another token's worker (or one
  // registered before tokens were recorded). REQUIRES: mu_
  absl::StatusOr<WorkerRecord> CheckWorker(const Principal& who, const std::string& worker_id);
  absl::StatusOr<JobRecord> LoadLeased(const std::string& job_id, const std::string& worker_id, int32_t attempt,
                                       bool allow_cancelled);  // REQUIRES: mu_
  v1::Job ToProto(const JobRecord& job, bool with_texts);
  // Notes a call from the worker (for `last_seen_ms`). REQUIRES: mu_
  void Seen(const std::string& worker_id) { seen_ms_[worker_id] = clock_->NowMs(); }
  // The workers with their states. REQUIRES: mu_
  absl::StatusOr<std::vector<v1::Worker>> FleetLocked(bool include_gone);
  // Adds one to the worker's jobs_finished. REQUIRES: mu_
  void CountFinished(const std::string& worker_id);
  void Publish(const JobRecord& job, const v1::JobEvent& event, bool final_state, Deferred& deferred);  // REQUIRES: mu_
  // True when every job of the sweep has ended. REQUIRES: mu_
  bool SweepOver(const std::string& sweep_id);
  absl::StatusOr<std::vector<JobRecord>> SweepJobs(const Principal& who, const std::string& sweep_id);  // REQUIRES: mu_
  void PublishState(const JobRecord& job, Deferred& deferred);                                    // REQUIRES: mu_
  // Leases queued jobs to waiting workers. REQUIRES: mu_
  void ServeWaiters(Deferred& deferred);
  // Builds the lease reply for a freshly leased job (resume point, rewind). REQUIRES: mu_
  absl::StatusOr<v1::LeaseJobResponse> Leased(JobRecord job, Deferred& deferred);
  void Sweep();
  void SweepLoop();
  absl::Status RequeueLapsed(Deferred& deferred);  // REQUIRES: mu_

  std::unique_ptr<JobStore> store_;
  const CoordinatorOptions options_;
  Clock* clock_;
  std::shared_ptr<spdlog::logger> log_;

  std::mutex mu_;
  std::vector<Waiter> waiters_;                  // guarded by mu_
  uint64_t last_waiter_ = 0;                     // guarded by mu_
  std::map<int64_t, Watcher> watchers_;          // guarded by mu_
  int64_t next_watch_id_ = 1;                    // guarded by mu_
  std::map<int64_t, int64_t> acknowledged_;      // job -> highest stored step this attempt; guarded by mu_
  int64_t next_worker_ = 1;                      // guarded by mu_
  std::map<std::string, int64_t> seen_ms_;       // worker -> its last call, newer than the store's; guarded by mu_
  std::map<std::string, int64_t> pending_;       // "ARRAYJOB_TASK" -> submitted_ms; guarded by mu_
  bool stopping_ = false;                        // guarded by mu_
  std::string last_sweep_error_;                 // the sweep's last failure ("" if it worked); guarded by mu_
  std::condition_variable wake_;
  std::thread sweeper_;
};

// "j-42" <-> 42.
std::string JobName(int64_t id);
absl::StatusOr<int64_t> ParseJobId(const std::string& text);

}  // namespace graft::server

#endif  // GRAFT_SERVER_COORDINATOR_H_
