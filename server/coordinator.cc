#include "server/coordinator.h"

#include <algorithm>
#include <cerrno>
#include <chrono>
#include <cstdio>
#include <cstring>
#include <filesystem>

#include "absl/status/status.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_join.h"
#include "spdlog/spdlog.h"
#include "configs/reader/spec.h"
#include "configs/reader/sweep.h"

namespace graft::server {
namespace {

namespace fs = std::filesystem;

class SystemClock : public Clock {
 public:
  int64_t NowMs() override {
    return std::chrono::duration_cast<std::chrono::milliseconds>(
               std::chrono::system_clock::now().time_since_epoch())
        .count();
  }
};

// What a worker may upload and a user download: the run directory's files, and those of the
// spec's scan: and das: blocks (present only when the spec has them).
const std::vector<std::string> kArtifactNames = {"checkpoint.pt", "weights.pt", "result.json", "metrics.jsonl",
                                                 "spec.yaml",     "failures.jsonl", "scan.json", "scan.tsv",
                                                 "scan.svg",      "das.json",       "rotation.pt"};

bool IsArtifactName(const std::string& name) {
  return std::find(kArtifactNames.begin(), kArtifactNames.end(), name) != kArtifactNames.end();
}

v1::Point PointProto(const PointRecord& p) {
  v1::Point m;
  m.set_step(p.step);
  m.set_attempt(p.attempt);
  m.set_metrics_json(p.metrics_json);
  return m;
}

}  // namespace

std::unique_ptr<Clock> CreateSystemClock() { return std::make_unique<SystemClock>(); }

std::string JobName(int64_t id) { return absl::StrCat("j-", id); }

absl::StatusOr<int64_t> ParseJobId(const std::string& text) {
  std::string digits = text.rfind("j-", 0) == 0 ? text.substr(2) : text;
  if (digits.empty() || digits.size() > 18 ||
      !std::all_of(digits.begin(), digits.end(), [](char c) { return c >= '0' && c <= '9'; })) {
    return absl::InvalidArgumentError(absl::StrCat("'", text, "' is not a job id (expected j-<number>)"));
  }
  return std::stoll(digits);
}

namespace {

// The status of a failed write to the data dir, from errno: ResourceExhausted when the disk is
// full (or over quota), Unavailable otherwise; both name the file and say it is the disk.
absl::Status DiskWriteError(const std::string& path, const std::string& what) {
  const int err = errno;
  if (err == ENOSPC || err == EDQUOT) {
    return absl::ResourceExhaustedError(
        absl::StrCat("the data dir's disk is full: ", path, ": ", what, ": ", std::strerror(err)));
  }
  return absl::UnavailableError(absl::StrCat("the data dir's disk cannot be written: ", path, ": ", what, ": ",
                                             err != 0 ? std::strerror(err) : "unknown error"));
}

}  // namespace

Upload::~Upload() {
  if (!committed_ && !tmp_path_.empty()) {
    out_.close();
    std::error_code ec;
    fs::remove(tmp_path_, ec);
  }
}

absl::Status Upload::Write(const std::string& bytes) {
  written_ += static_cast<int64_t>(bytes.size());
  if (written_ > header_.total_bytes()) {
    return absl::InvalidArgumentError(absl::StrCat("upload of ", header_.name(), " exceeds its declared ",
                                                   header_.total_bytes(), " bytes"));
  }
  sha_.Update(bytes);
  errno = 0;
  out_.write(bytes.data(), static_cast<std::streamsize>(bytes.size()));
  if (!out_) return DiskWriteError(tmp_path_, "write failed");
  return absl::OkStatus();
}

Coordinator::Coordinator(std::unique_ptr<JobStore> store, const CoordinatorOptions& options, Clock* clock,
                         std::shared_ptr<spdlog::logger> log)
    : store_(std::move(store)), options_(options), clock_(clock), log_(std::move(log)) {}

Coordinator::~Coordinator() { Shutdown(); }

absl::Status Coordinator::Start() {
  std::error_code ec;
  fs::create_directories(fs::path(options_.data_dir) / "artifacts", ec);
  if (ec) return absl::UnavailableError(absl::StrCat(options_.data_dir, ": cannot create: ", ec.message()));
  Deferred deferred;
  {
    std::lock_guard<std::mutex> lock(mu_);
    absl::Status st = RequeueLapsed(deferred);
    if (absl::IsUnavailable(st) || absl::IsResourceExhausted(st)) {
      // Disk trouble (read-only, full): serve what is stored; the sweep sends the lapsed leases
      // back once the data dir can be written again.
      log_->warn("sending back leases that lapsed while graftd was down failed: {}; serving what is stored, "
                 "new work is refused until the data dir can be written",
                 std::string(st.message()));
      last_sweep_error_ = std::string(st.message());
    } else if (!st.ok()) {
      return st;
    }
    auto workers = store_->Workers();
    if (workers.ok()) next_worker_ = static_cast<int64_t>(workers->size()) + 1;
  }
  for (auto& f : deferred) f();
  sweeper_ = std::thread([this] { SweepLoop(); });
  return absl::OkStatus();
}

void Coordinator::Shutdown() {
  std::vector<Waiter> waiters;
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (stopping_) return;
    stopping_ = true;
    waiters.swap(waiters_);
  }
  wake_.notify_all();
  if (sweeper_.joinable()) sweeper_.join();
  for (auto& w : waiters) w.done(absl::OkStatus(), v1::LeaseJobResponse());
}

v1::Job Coordinator::ToProto(const JobRecord& j, bool with_texts) {
  v1::Job p;
  p.set_id(JobName(j.id));
  p.set_name(j.name);
  p.set_owner(j.owner);
  p.set_state(static_cast<v1::JobState>(static_cast<int>(j.state)));
  p.set_priority(j.priority);
  for (const auto& [k, v] : j.labels) (*p.mutable_labels())[k] = v;
  p.set_attempt(j.attempt);
  p.set_max_attempts(j.max_attempts);
  p.set_submitted_ms(j.submitted_ms);
  p.set_started_ms(j.started_ms);
  p.set_finished_ms(j.finished_ms);
  p.set_total_steps(j.total_steps);
  p.set_step(j.step);
  if (with_texts) {
    p.set_spec_yaml(j.spec_yaml);
    p.set_result_json(j.result_json);
  }
  p.set_error(j.error);
  p.set_cancel_reason(j.cancel_reason);
  p.set_worker_id(j.worker_id);
  p.set_checkpoint_step(j.checkpoint_step);
  p.set_sweep_id(j.sweep_id);
  return p;
}

absl::StatusOr<JobRecord> Coordinator::LoadVisible(const Principal& who, const std::string& job_id) {
  auto id = ParseJobId(job_id);
  if (!id.ok()) return id.status();
  auto job = store_->GetJob(*id);
  if (!job.ok()) {
    if (absl::IsNotFound(job.status())) return absl::NotFoundError(absl::StrCat("no job ", job_id));
    return job.status();
  }
  // Users see only their own jobs; another user's job is reported as absent.
  if (who.role != Role::kAdmin && job->owner != who.name) return absl::NotFoundError(absl::StrCat("no job ", job_id));
  return job;
}

namespace {

absl::Status NotRegistered(const std::string& worker_id) {
  return absl::NotFoundError(absl::StrCat("worker '", worker_id, "' is not registered; call RegisterWorker first"));
}

// PermissionDenied unless `w` (the record of `worker_id`) was registered by `who`'s token.
absl::Status OwnedBy(const Principal& who, const std::string& worker_id, const WorkerRecord& w) {
  if (w.token_name.empty()) {
    return absl::PermissionDeniedError(absl::StrCat("worker '", worker_id,
                                                    "' was registered by an older graftd that did not record its "
                                                    "token; it must register again"));
  }
  if (w.token_name != who.name) {
    return absl::PermissionDeniedError(absl::StrCat("worker '", worker_id, "' belongs to another worker token; '",
                                                    who.name, "' may act only as the workers it registered"));
  }
  return absl::OkStatus();
}

}  // namespace

absl::StatusOr<WorkerRecord> Coordinator::CheckWorker(const Principal& who, const std::string& worker_id) {
  auto w = store_->GetWorker(worker_id);
  if (!w.ok()) return w.status();
  if (!w->has_value()) return NotRegistered(worker_id);
  if (absl::Status st = OwnedBy(who, worker_id, **w); !st.ok()) return st;
  return **w;
}

absl::Status Coordinator::CheckLength(const std::string& what, const std::string& text, int64_t max,
                                      const char* setting) const {
  if (static_cast<int64_t>(text.size()) <= max) return absl::OkStatus();
  return absl::InvalidArgumentError(absl::StrCat(what, " is ", text.size(), " bytes; this coordinator accepts at most ",
                                                 setting, " = ", max));
}

absl::StatusOr<v1::SubmitJobResponse> Coordinator::Submit(const Principal& who, const v1::SubmitJobRequest& request) {
  int64_t bytes = static_cast<int64_t>(request.config_yaml().size());
  for (const auto& o : request.overrides()) bytes += static_cast<int64_t>(o.size());
  if (bytes > options_.max_config_bytes) {
    return absl::ResourceExhaustedError(absl::StrCat("the config (with its overrides) is ", bytes,
                                                     " bytes; this coordinator accepts at most max_config_bytes = ",
                                                     options_.max_config_bytes));
  }
  if (absl::Status st = CheckLength("source_name", request.source_name(), options_.max_name_bytes, "max_name_bytes");
      !st.ok()) {
    return st;
  }
  if (request.labels_size() > options_.max_labels_per_job) {
    return absl::InvalidArgumentError(absl::StrCat(request.labels_size(), " labels; this coordinator accepts at most ",
                                                   "max_labels_per_job = ", options_.max_labels_per_job, " per job"));
  }
  for (const auto& [k, v] : request.labels()) {
    if (k.empty()) return absl::InvalidArgumentError("a label needs a key");
    const std::string shown = k.substr(0, 40);
    if (absl::Status st = CheckLength("a label key", k, options_.max_label_bytes, "max_label_bytes"); !st.ok()) return st;
    if (absl::Status st = CheckLength(absl::StrCat("the value of label '", shown, "'"), v, options_.max_label_bytes,
                                      "max_label_bytes");
        !st.ok()) {
      return st;
    }
  }
  const std::string source = request.source_name().empty() ? "config.yaml" : request.source_name();
  std::vector<std::string> overrides(request.overrides().begin(), request.overrides().end());
  // The whole sweep is validated before anything is stored.
  auto plan = config::PlanFromText(request.config_yaml(), source, overrides, options_.max_sweep_jobs, options_.spec);
  if (!plan.ok()) {
    if (absl::IsInvalidArgument(plan.status()) || absl::IsResourceExhausted(plan.status())) return plan.status();
    return absl::InvalidArgumentError(plan.status().message());
  }
  for (const config::PlannedJob& p : plan->jobs) {
    if (absl::Status st = CheckLength(absl::StrCat("the job name '", p.name.substr(0, 40), "...'"), p.name,
                                      options_.max_name_bytes, "max_name_bytes");
        !st.ok()) {
      return st;
    }
  }
  std::vector<JobRecord> records;
  for (const config::PlannedJob& p : plan->jobs) {
    JobRecord r;
    r.name = p.name;
    r.owner = who.name;
    r.state = JobState::kQueued;
    r.priority = request.priority();
    for (const auto& [k, v] : request.labels()) r.labels[k] = v;
    r.max_attempts = options_.max_attempts;
    r.submitted_ms = clock_->NowMs();
    r.total_steps = p.job.spec.training.steps;
    r.spec_yaml = config::ResolvedSpecYaml(p.job.spec);
    records.push_back(std::move(r));
  }
  Deferred deferred;
  v1::SubmitJobResponse out;
  {
    std::lock_guard<std::mutex> lock(mu_);
    std::vector<int64_t> ids;
    if (plan->is_sweep) {
      auto stored = store_->InsertSweep(records);
      if (!stored.ok()) return stored.status();
      ids = *stored;
      out.set_sweep_id(absl::StrCat("s-", ids.front()));
    } else {
      auto stored = store_->InsertJob(records.front());
      if (!stored.ok()) return stored.status();
      ids.push_back(*stored);
    }
    out.set_job_id(JobName(ids.front()));
    for (size_t i = 0; i < ids.size(); ++i) {
      out.add_job_ids(JobName(ids[i]));
      log_->info("job {} attempt 0: queued ({} by {}, priority {}{})", JobName(ids[i]), records[i].name, who.name,
                 request.priority(), plan->is_sweep ? ", sweep " + out.sweep_id() : "");
    }
    ServeWaiters(deferred);
  }
  for (auto& f : deferred) f();
  return out;
}

absl::StatusOr<v1::Job> Coordinator::Get(const Principal& who, const std::string& job_id) {
  std::lock_guard<std::mutex> lock(mu_);
  auto job = LoadVisible(who, job_id);
  if (!job.ok()) return job.status();
  v1::Job p = ToProto(*job, true);
  auto points = store_->Points(job->id, 0);
  if (!points.ok()) return points.status();
  if (!points->empty()) {
    *p.mutable_latest() = PointProto(points->back());
  }
  return p;
}

absl::StatusOr<v1::ListJobsResponse> Coordinator::List(const Principal& who, const v1::ListJobsRequest& request) {
  JobFilter filter;
  if (request.state() != v1::JOB_STATE_UNSPECIFIED) filter.state = static_cast<JobState>(request.state());
  filter.owner = request.owner();
  if (who.role != Role::kAdmin) {
    if (!filter.owner.empty() && filter.owner != who.name) {
      return absl::PermissionDeniedError(absl::StrCat("'", who.name, "' may list only their own jobs"));
    }
    filter.owner = who.name;
  }
  for (const auto& [k, v] : request.labels()) filter.labels[k] = v;
  filter.sweep_id = request.sweep_id();
  int limit = request.page_size() <= 0 ? 50 : std::min(request.page_size(), 500);
  int64_t before = 0;
  if (!request.page_token().empty()) {
    auto id = ParseJobId(request.page_token());
    if (!id.ok()) return absl::InvalidArgumentError("page_token: not a token from a previous ListJobs reply");
    before = *id;
  }
  std::lock_guard<std::mutex> lock(mu_);
  auto jobs = store_->ListJobs(filter, before, limit + 1);
  if (!jobs.ok()) return jobs.status();
  v1::ListJobsResponse out;
  for (int i = 0; i < static_cast<int>(jobs->size()) && i < limit; ++i) *out.add_jobs() = ToProto((*jobs)[i], false);
  if (static_cast<int>(jobs->size()) > limit) out.set_next_page_token(JobName((*jobs)[limit - 1].id));
  return out;
}

absl::StatusOr<v1::Job> Coordinator::Cancel(const Principal& who, const std::string& job_id, const std::string& reason) {
  if (absl::Status st = CheckLength("the reason", reason, options_.max_reason_bytes, "max_reason_bytes"); !st.ok()) {
    return st;
  }
  Deferred deferred;
  v1::Job out;
  {
    std::lock_guard<std::mutex> lock(mu_);
    auto job = LoadVisible(who, job_id);
    if (!job.ok()) return job.status();
    if (IsFinal(job->state)) {
      return absl::FailedPreconditionError(absl::StrCat("job ", job_id, " is already ", ToString(job->state)));
    }
    const bool was_running = job->state == JobState::kRunning;
    job->state = JobState::kCancelled;
    job->finished_ms = clock_->NowMs();
    job->cancel_reason = absl::StrCat("cancelled by ", who.name, reason.empty() ? "" : ": ", reason);
    // A running job keeps its worker until the worker acknowledges (its next report says stop).
    absl::Status st = store_->UpdateJob(*job);
    if (!st.ok()) return st;
    log_->info("job {} attempt {}: cancelled by {}{}", job_id, job->attempt, who.name,
               was_running ? " (worker told at its next report)" : "");
    PublishState(*job, deferred);
    out = ToProto(*job, true);
  }
  for (auto& f : deferred) f();
  return out;
}

absl::StatusOr<std::vector<v1::Point>> Coordinator::Metrics(const Principal& who, const std::string& job_id) {
  std::lock_guard<std::mutex> lock(mu_);
  auto job = LoadVisible(who, job_id);
  if (!job.ok()) return job.status();
  auto points = store_->Points(job->id, 0);
  if (!points.ok()) return points.status();
  std::vector<v1::Point> out;
  for (const auto& p : *points) {
    out.push_back(PointProto(p));
  }
  return out;
}

absl::StatusOr<ArtifactRecord> Coordinator::Artifact(const Principal& who, const std::string& job_id,
                                                     const std::string& name) {
  if (!IsArtifactName(name)) {
    return absl::InvalidArgumentError(absl::StrCat("'", name, "' is not an artifact name; expected one of ",
                                                   absl::StrJoin(kArtifactNames, ", ")));
  }
  std::lock_guard<std::mutex> lock(mu_);
  auto job = LoadVisible(who, job_id);
  if (!job.ok()) return job.status();
  auto a = store_->GetArtifact(job->id, name);
  if (!a.ok()) return a.status();
  if (!a->has_value()) {
    return absl::NotFoundError(absl::StrCat("job ", job_id, " has no ", name, " yet (state ", ToString(job->state), ")"));
  }
  return **a;
}

absl::StatusOr<v1::ServerInfo> Coordinator::Info() {
  v1::ServerInfo info;
  info.set_version(GRAFT_VERSION_STRING);
  info.set_data_dir(options_.data_dir);
  info.set_lease_seconds(options_.lease_ms / 1000);
  info.set_max_sweep_jobs(options_.max_sweep_jobs);
  {
    std::lock_guard<std::mutex> lock(mu_);
    auto counts = store_->CountByState();
    if (!counts.ok()) return counts.status();
    info.set_queued_jobs((*counts)[JobState::kQueued]);
    info.set_running_jobs((*counts)[JobState::kRunning]);
    auto fleet = FleetLocked(false);
    if (!fleet.ok()) return fleet.status();
    int64_t live = 0;
    for (const auto& w : *fleet) live += w.state() == v1::WORKER_STATE_PENDING ? 0 : 1;
    info.set_workers(live);
  }
  int64_t bytes = 0;
  std::error_code ec;
  for (auto it = fs::recursive_directory_iterator(options_.data_dir, ec); !ec && it != fs::recursive_directory_iterator();
       it.increment(ec)) {
    std::error_code e2;
    if (it->is_regular_file(e2)) bytes += static_cast<int64_t>(it->file_size(e2));
  }
  info.set_data_dir_bytes(bytes);
  return info;
}

void Coordinator::Publish(const JobRecord& job, const v1::JobEvent& event, bool final_state, Deferred& deferred) {
  bool sweep_state_checked = false, sweep_over = false;
  for (auto it = watchers_.begin(); it != watchers_.end();) {
    Watcher& w = it->second;
    if (event.has_point() && event.point().step() < w.from_step) {
      ++it;
      continue;
    }
    if (w.job_id == job.id) {
      WatchSink sink = w.sink;
      deferred.push_back([sink, event, final_state] {
        sink(event, false);
        if (final_state) sink(v1::JobEvent(), true);
      });
      it = final_state ? watchers_.erase(it) : std::next(it);
    } else if (!job.sweep_id.empty() && w.sweep_id == job.sweep_id) {
      if (final_state && !sweep_state_checked) {
        sweep_over = SweepOver(job.sweep_id);
        sweep_state_checked = true;
      }
      SweepSink sink = w.sweep_sink;
      v1::SweepEvent se;
      se.set_job_id(JobName(job.id));
      *se.mutable_event() = event;
      const bool over = sweep_over;
      deferred.push_back([sink, se, over] {
        sink(se, false);
        if (over) sink(v1::SweepEvent(), true);
      });
      it = over ? watchers_.erase(it) : std::next(it);
    } else {
      ++it;
    }
  }
}

bool Coordinator::SweepOver(const std::string& sweep_id) {
  JobFilter filter;
  filter.sweep_id = sweep_id;
  auto jobs = store_->ListJobs(filter, 0, 1 << 30);
  if (!jobs.ok()) return false;
  for (const auto& j : *jobs) {
    if (!IsFinal(j.state)) return false;
  }
  return true;
}

absl::StatusOr<std::vector<JobRecord>> Coordinator::SweepJobs(const Principal& who, const std::string& sweep_id) {
  JobFilter filter;
  filter.sweep_id = sweep_id;
  auto jobs = store_->ListJobs(filter, 0, 1 << 30);
  if (!jobs.ok()) return jobs.status();
  if (jobs->empty() || (who.role != Role::kAdmin && jobs->front().owner != who.name)) {
    return absl::NotFoundError(absl::StrCat("no sweep ", sweep_id));
  }
  std::reverse(jobs->begin(), jobs->end());  // expansion order
  return jobs;
}

absl::StatusOr<int64_t> Coordinator::WatchSweep(const Principal& who, const std::string& sweep_id, int64_t from_step,
                                                SweepSink sink) {
  Deferred deferred;
  int64_t id;
  {
    std::lock_guard<std::mutex> lock(mu_);
    auto jobs = SweepJobs(who, sweep_id);
    if (!jobs.ok()) return jobs.status();
    std::vector<v1::SweepEvent> initial;
    bool over = true;
    for (const JobRecord& job : *jobs) {
      if (!IsFinal(job.state)) over = false;
      v1::SweepEvent state;
      state.set_job_id(JobName(job.id));
      *state.mutable_event()->mutable_state_change() = ToProto(job, false);
      initial.push_back(state);
      auto points = store_->Points(job.id, std::max<int64_t>(0, from_step));
      if (!points.ok()) return points.status();
      for (const auto& p : *points) {
        v1::SweepEvent e;
        e.set_job_id(JobName(job.id));
        *e.mutable_event()->mutable_point() = PointProto(p);
        initial.push_back(std::move(e));
      }
    }
    id = next_watch_id_++;
    if (!over) watchers_[id] = Watcher{0, sweep_id, nullptr, sink, std::max<int64_t>(0, from_step)};
    deferred.push_back([sink, initial, over] {
      for (const auto& e : initial) sink(e, false);
      if (over) sink(v1::SweepEvent(), true);
    });
  }
  for (auto& f : deferred) f();
  return id;
}

absl::StatusOr<v1::CancelSweepResponse> Coordinator::CancelSweep(const Principal& who, const std::string& sweep_id,
                                                                 const std::string& reason) {
  if (absl::Status st = CheckLength("the reason", reason, options_.max_reason_bytes, "max_reason_bytes"); !st.ok()) {
    return st;
  }
  std::vector<std::string> ids;
  {
    std::lock_guard<std::mutex> lock(mu_);
    auto jobs = SweepJobs(who, sweep_id);
    if (!jobs.ok()) return jobs.status();
    for (const auto& j : *jobs) {
      if (!IsFinal(j.state)) ids.push_back(JobName(j.id));
    }
  }
  v1::CancelSweepResponse out;
  for (const auto& id : ids) {
    auto job = Cancel(who, id, reason);
    if (job.ok()) *out.add_jobs() = *job;  // a job that ended meanwhile is skipped
  }
  return out;
}

void Coordinator::PublishState(const JobRecord& job, Deferred& deferred) {
  v1::JobEvent e;
  *e.mutable_state_change() = ToProto(job, false);
  Publish(job, e, IsFinal(job.state), deferred);
}

absl::StatusOr<int64_t> Coordinator::Watch(const Principal& who, const std::string& job_id, int64_t from_step,
                                           WatchSink sink) {
  Deferred deferred;
  int64_t id;
  {
    std::lock_guard<std::mutex> lock(mu_);
    auto job = LoadVisible(who, job_id);
    if (!job.ok()) return job.status();
    auto points = store_->Points(job->id, std::max<int64_t>(0, from_step));
    if (!points.ok()) return points.status();
    std::vector<v1::JobEvent> initial;
    v1::JobEvent state;
    *state.mutable_state_change() = ToProto(*job, false);
    initial.push_back(state);
    for (const auto& p : *points) {
      v1::JobEvent e;
      *e.mutable_point() = PointProto(p);
      initial.push_back(std::move(e));
    }
    const bool over = IsFinal(job->state);
    id = next_watch_id_++;
    if (!over) watchers_[id] = Watcher{job->id, "", sink, nullptr, std::max<int64_t>(0, from_step)};
    // Delivered before any later event: deferred callbacks run in order, and later events are
    // published under mu_ after this point.
    deferred.push_back([sink, initial, over] {
      for (const auto& e : initial) sink(e, false);
      if (over) sink(v1::JobEvent(), true);
    });
  }
  for (auto& f : deferred) f();
  return id;
}

void Coordinator::Unwatch(int64_t watch_id) {
  std::lock_guard<std::mutex> lock(mu_);
  watchers_.erase(watch_id);
}

absl::StatusOr<v1::RegisterWorkerResponse> Coordinator::Register(const Principal& who,
                                                                 const v1::RegisterWorkerRequest& request) {
  for (const auto& [what, text] : {std::pair<const char*, const std::string*>{"host", &request.host()},
                                   {"version", &request.version()},
                                   {"slurm_job_id", &request.slurm_job_id()},
                                   {"slurm_array_job_id", &request.slurm_array_job_id()},
                                   {"slurm_array_task_id", &request.slurm_array_task_id()}}) {
    if (absl::Status st = CheckLength(what, *text, options_.max_name_bytes, "max_name_bytes"); !st.ok()) return st;
  }
  std::lock_guard<std::mutex> lock(mu_);
  WorkerRecord w;
  w.id = absl::StrCat("w-", next_worker_++, "-", request.host().empty() ? who.name : request.host());
  w.host = request.host();
  w.cores = request.cores();
  w.threads = request.threads();
  w.version = request.version();
  w.slurm_job_id = request.slurm_job_id();
  w.slurm_array_job_id = request.slurm_array_job_id();
  w.slurm_array_task_id = request.slurm_array_task_id();
  w.registered_ms = w.last_seen_ms = clock_->NowMs();
  w.token_name = who.name;
  absl::Status st = store_->PutWorker(w);
  if (!st.ok()) return st;
  if (!w.slurm_array_job_id.empty()) pending_.erase(absl::StrCat(w.slurm_array_job_id, "_", w.slurm_array_task_id));
  if (!w.slurm_job_id.empty()) pending_.erase(w.slurm_job_id);
  log_->info("worker {} registered ({} cores, {} threads, version {}{})", w.id, w.cores, w.threads, w.version,
             w.slurm_job_id.empty() ? ""
             : w.slurm_array_job_id.empty()
                 ? absl::StrCat(", Slurm job ", w.slurm_job_id)
                 : absl::StrCat(", Slurm job ", w.slurm_job_id, " = array task ", w.slurm_array_job_id, "_",
                                w.slurm_array_task_id));
  v1::RegisterWorkerResponse out;
  out.set_worker_id(w.id);
  out.set_lease_seconds(std::max<int64_t>(1, options_.lease_ms / 1000));
  return out;
}

absl::StatusOr<v1::LeaseJobResponse> Coordinator::Leased(JobRecord job, Deferred& deferred) {
  v1::LeaseJobResponse out;
  out.set_has_job(true);
  out.set_job_id(JobName(job.id));
  out.set_attempt(job.attempt);
  out.set_spec_yaml(job.spec_yaml);
  int64_t resume = 0;
  if (job.checkpoint_step > 0) {
    auto a = store_->GetArtifact(job.id, "checkpoint.pt");
    if (a.ok() && a->has_value() && fs::exists((*a)->path)) resume = job.checkpoint_step;
  }
  out.set_resume_step(resume);
  acknowledged_[job.id] = resume;
  if (job.attempt > 1) {
    // The new attempt replaces every point after the step it resumes from.
    const int64_t from = resume > 0 ? resume + 1 : 0;
    absl::Status st = store_->DeletePointsFrom(job.id, from);
    if (!st.ok()) return st;
    v1::JobEvent e;
    e.mutable_rewind()->set_from_step(from);
    e.mutable_rewind()->set_attempt(job.attempt);
    Publish(job, e, false, deferred);
  }
  job.step = resume;
  absl::Status st = store_->UpdateJob(job);
  if (!st.ok()) return st;
  log_->info("job {} attempt {}: running on {}{}", JobName(job.id), job.attempt, job.worker_id,
             resume > 0 ? absl::StrCat(", resuming from step ", resume) : "");
  PublishState(job, deferred);
  return out;
}

void Coordinator::ServeWaiters(Deferred& deferred) {
  while (!waiters_.empty()) {
    Waiter& w = waiters_.front();
    auto leased = store_->LeaseNext(w.worker_id, clock_->NowMs(), options_.lease_ms);
    if (!leased.ok()) {
      log_->error("leasing for {} failed: {}", w.worker_id, leased.status().ToString());
      return;
    }
    if (!leased->has_value()) return;
    auto reply = Leased(**leased, deferred);
    LeaseDone done = std::move(w.done);
    waiters_.erase(waiters_.begin());
    if (!reply.ok()) {
      deferred.push_back([done, s = reply.status()] { done(s, v1::LeaseJobResponse()); });
    } else {
      deferred.push_back([done, r = *reply] { done(absl::OkStatus(), r); });
    }
  }
}

uint64_t Coordinator::Lease(const Principal& who, const v1::LeaseJobRequest& request, LeaseDone done) {
  Deferred deferred;
  uint64_t number = 0;
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (stopping_) {
      deferred.push_back([done] { done(absl::UnavailableError("the coordinator is shutting down"), v1::LeaseJobResponse()); });
    } else {
      // Seen: renew the worker's last_seen. A worker that deregistered must register again, and so
      // must one registered before worker ids were bound to tokens (token_name "").
      auto worker = store_->GetWorker(request.worker_id());
      absl::Status refused = worker.status();
      if (refused.ok() && worker->has_value() && !(*worker)->token_name.empty()) {
        refused = OwnedBy(who, request.worker_id(), **worker);
      }
      if (refused.ok() && (!worker->has_value() || (*worker)->left_ms != 0 || (*worker)->token_name.empty())) {
        refused = NotRegistered(request.worker_id());
      }
      if (!refused.ok()) {
        deferred.push_back([done, refused] { done(refused, v1::LeaseJobResponse()); });
      } else {
        (*worker)->last_seen_ms = clock_->NowMs();
        seen_ms_.erase(request.worker_id());
        (void)store_->PutWorker(**worker);
        const int64_t wait = std::clamp<int64_t>(request.wait_ms(), 0, 60000);
        number = ++last_waiter_;
        waiters_.push_back(Waiter{number, request.worker_id(), clock_->NowMs() + wait, std::move(done)});
        ServeWaiters(deferred);
      }
    }
  }
  for (auto& f : deferred) f();
  wake_.notify_all();
  return number;
}

void Coordinator::DropWaiter(uint64_t waiter) {
  if (waiter == 0) return;
  LeaseDone done;
  {
    std::lock_guard<std::mutex> lock(mu_);
    auto it = std::find_if(waiters_.begin(), waiters_.end(), [&](const Waiter& w) { return w.number == waiter; });
    if (it == waiters_.end()) return;
    done = std::move(it->done);
    log_->info("long poll of {} dropped: its caller went away", it->worker_id);
    waiters_.erase(it);
  }
  done(absl::CancelledError("the long poll's caller went away"), v1::LeaseJobResponse());
}

absl::StatusOr<JobRecord> Coordinator::LoadLeased(const std::string& job_id, const std::string& worker_id,
                                                  int32_t attempt, bool allow_cancelled) {
  auto id = ParseJobId(job_id);
  if (!id.ok()) return id.status();
  auto job = store_->GetJob(*id);
  if (!job.ok()) return absl::NotFoundError(absl::StrCat("no job ", job_id));
  const bool holder = job->worker_id == worker_id && job->attempt == attempt;
  if (holder && (job->state == JobState::kRunning || (allow_cancelled && job->state == JobState::kCancelled))) {
    return job;
  }
  return absl::FailedPreconditionError(absl::StrCat(
      "attempt ", attempt, " of job ", job_id, " by ", worker_id, " is no longer current (the job is ",
      ToString(job->state), ", attempt ", job->attempt, job->worker_id.empty() ? "" : " on " + job->worker_id,
      "); drop it"));
}

absl::StatusOr<v1::ReportResponse> Coordinator::Report(const Principal& who, const v1::ReportRequest& request) {
  Deferred deferred;
  v1::ReportResponse out;
  {
    if (request.points_size() > options_.max_points_per_report) {
      return absl::InvalidArgumentError(absl::StrCat(request.points_size(), " points in one report; this coordinator ",
                                                     "accepts at most max_points_per_report = ",
                                                     options_.max_points_per_report, "; send them in batches"));
    }
    std::lock_guard<std::mutex> lock(mu_);
    if (auto w = CheckWorker(who, request.worker_id()); !w.ok()) return w.status();
    auto job = LoadLeased(request.job_id(), request.worker_id(), request.attempt(), /*allow_cancelled=*/true);
    if (!job.ok()) return job.status();
    Seen(request.worker_id());
    std::vector<PointRecord> points;
    for (const auto& p : request.points()) {
      PointRecord r;
      r.step = p.step();
      r.attempt = request.attempt();
      r.metrics_json = p.metrics_json();
      points.push_back(std::move(r));
    }
    if (!points.empty()) {
      // Stored before acknowledged.
      absl::Status st = store_->PutPoints(job->id, points);
      if (!st.ok()) return st;
      int64_t& ack = acknowledged_[job->id];
      for (const auto& p : points) {
        ack = std::max(ack, p.step);
        v1::JobEvent e;
        *e.mutable_point() = PointProto(p);
        Publish(*job, e, false, deferred);
      }
    }
    out.set_acknowledged_step(acknowledged_[job->id]);
    if (job->state == JobState::kCancelled) {
      out.set_stop(true);
      out.set_stop_reason(job->cancel_reason);
    } else {
      job->step = std::max(job->step, request.step());
      job->lease_expires_ms = clock_->NowMs() + options_.lease_ms;
      absl::Status st = store_->UpdateJob(*job);
      if (!st.ok()) return st;
      if (!points.empty()) PublishState(*job, deferred);
    }
  }
  for (auto& f : deferred) f();
  return out;
}

absl::StatusOr<ArtifactRecord> Coordinator::CheckpointFor(const Principal& who, const v1::FetchCheckpointRequest& request) {
  std::lock_guard<std::mutex> lock(mu_);
  if (auto w = CheckWorker(who, request.worker_id()); !w.ok()) return w.status();
  auto job = LoadLeased(request.job_id(), request.worker_id(), request.attempt(), false);
  if (!job.ok()) return job.status();
  auto a = store_->GetArtifact(job->id, "checkpoint.pt");
  if (!a.ok()) return a.status();
  if (!a->has_value()) return absl::NotFoundError(absl::StrCat("job ", request.job_id(), " has no checkpoint"));
  return **a;
}

absl::StatusOr<std::unique_ptr<Upload>> Coordinator::BeginUpload(const Principal& who, const v1::ArtifactHeader& header) {
  if (!IsArtifactName(header.name())) {
    return absl::InvalidArgumentError(absl::StrCat("'", header.name(), "' is not an artifact name; expected one of ",
                                                   absl::StrJoin(kArtifactNames, ", ")));
  }
  if (header.total_bytes() < 0) {
    return absl::InvalidArgumentError(absl::StrCat("total_bytes: ", header.total_bytes(), " is negative"));
  }
  if (header.total_bytes() > options_.max_artifact_bytes) {
    return absl::InvalidArgumentError(absl::StrCat("the artifact ", header.name(), " is ", header.total_bytes(),
                                                   " bytes; this coordinator accepts at most max_artifact_bytes = ",
                                                   options_.max_artifact_bytes));
  }
  if (header.sha256().size() != 64) return absl::InvalidArgumentError("sha256: expected 64 hex digits");
  std::lock_guard<std::mutex> lock(mu_);
  if (auto w = CheckWorker(who, header.worker_id()); !w.ok()) return w.status();
  auto job = LoadLeased(header.job_id(), header.worker_id(), header.attempt(), false);
  if (!job.ok()) return job.status();
  std::unique_ptr<Upload> up(new Upload());
  up->header_ = header;
  up->job_id_ = job->id;
  const fs::path dir = fs::path(options_.data_dir) / "artifacts" / JobName(job->id);
  std::error_code ec;
  fs::create_directories(dir, ec);
  if (ec) return absl::UnavailableError(absl::StrCat(dir.string(), ": ", ec.message()));
  up->final_path_ = (dir / header.name()).string();
  up->tmp_path_ = absl::StrCat(up->final_path_, ".attempt", header.attempt(), ".tmp");
  errno = 0;
  up->out_.open(up->tmp_path_, std::ios::binary | std::ios::trunc);
  if (!up->out_) return DiskWriteError(up->tmp_path_, "cannot create");
  return up;
}

absl::StatusOr<int64_t> Coordinator::CommitUpload(Upload& up) {
  // The last buffered bytes reach the disk here: a full disk may show only now.
  errno = 0;
  up.out_.flush();
  up.out_.close();
  if (!up.out_) return DiskWriteError(up.tmp_path_, "write failed");
  if (up.written_ != up.header_.total_bytes()) {
    return absl::DataLossError(absl::StrCat("upload of ", up.header_.name(), " ended after ", up.written_,
                                            " of ", up.header_.total_bytes(), " bytes"));
  }
  const std::string digest = up.sha_.HexDigest();
  if (digest != up.header_.sha256()) {
    return absl::DataLossError(absl::StrCat("upload of ", up.header_.name(), ": SHA-256 ", digest,
                                            " does not match the declared ", up.header_.sha256()));
  }
  Deferred deferred;
  {
    std::lock_guard<std::mutex> lock(mu_);
    auto job = LoadLeased(up.header_.job_id(), up.header_.worker_id(), up.header_.attempt(), false);
    if (!job.ok()) return job.status();
    std::error_code ec;
    fs::rename(up.tmp_path_, up.final_path_, ec);
    if (ec) return absl::UnavailableError(absl::StrCat(up.final_path_, ": ", ec.message()));
    up.committed_ = true;
    ArtifactRecord a;
    a.job_id = job->id;
    a.name = up.header_.name();
    a.path = up.final_path_;
    a.bytes = up.written_;
    a.sha256 = digest;
    a.step = up.header_.step();
    a.attempt = up.header_.attempt();
    absl::Status st = store_->PutArtifact(a);
    if (!st.ok()) return st;
    job->lease_expires_ms = clock_->NowMs() + options_.lease_ms;
    if (a.name == "checkpoint.pt") job->checkpoint_step = a.step;
    st = store_->UpdateJob(*job);
    if (!st.ok()) return st;
  }
  return up.written_;
}

absl::Status Coordinator::Finish(const Principal& who, const v1::FinishJobRequest& request) {
  for (const std::string* reason : {&request.failed_reason(), &request.handed_back_reason(), &request.stopped_reason()}) {
    if (absl::Status st = CheckLength("the reason", *reason, options_.max_reason_bytes, "max_reason_bytes"); !st.ok()) {
      return st;
    }
  }
  Deferred deferred;
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (auto w = CheckWorker(who, request.worker_id()); !w.ok()) return w.status();
    const bool stopped = request.outcome_case() == v1::FinishJobRequest::kStoppedReason;
    auto job = LoadLeased(request.job_id(), request.worker_id(), request.attempt(), /*allow_cancelled=*/true);
    if (!job.ok()) return job.status();
    Seen(request.worker_id());
    if (job->state == JobState::kCancelled && !stopped) {
      // Finished just as it was cancelled: the cancellation stands.
      CountFinished(request.worker_id());
      absl::Status st = store_->UpdateJob(*job);
      if (!st.ok()) return st;
      PublishState(*job, deferred);
    } else {
      const std::string id = JobName(job->id);
      switch (request.outcome_case()) {
        case v1::FinishJobRequest::kSucceededResultJson:
          job->state = JobState::kSucceeded;
          job->result_json = request.succeeded_result_json();
          job->finished_ms = clock_->NowMs();
          job->step = job->total_steps;
          log_->info("job {} attempt {}: succeeded on {}", id, job->attempt, job->worker_id);
          break;
        case v1::FinishJobRequest::kFailedReason:
          job->state = JobState::kFailed;
          job->error = request.failed_reason();
          job->finished_ms = clock_->NowMs();
          log_->info("job {} attempt {}: failed on {}: {}", id, job->attempt, job->worker_id, job->error);
          break;
        case v1::FinishJobRequest::kHandedBackReason:
          // Not counted as an attempt: the allowance grows by one.
          job->state = JobState::kQueued;
          job->max_attempts += 1;
          log_->info("job {} attempt {}: handed back by {} ({}); queued again", id, job->attempt, job->worker_id,
                     request.handed_back_reason());
          break;
        case v1::FinishJobRequest::kStoppedReason:
          job->cancel_reason = absl::StrCat(job->cancel_reason, "; the worker ", request.stopped_reason());
          log_->info("job {} attempt {}: {} stopped it after the cancellation", id, job->attempt, job->worker_id);
          break;
        default:
          return absl::InvalidArgumentError("FinishJob needs an outcome");
      }
      // An ended job keeps the worker that ended it (Job.worker_id); a queued one has none.
      if (job->state == JobState::kQueued) {
        job->worker_id.clear();
      } else {
        CountFinished(request.worker_id());
      }
      job->lease_expires_ms = 0;
      absl::Status st = store_->UpdateJob(*job);
      if (!st.ok()) return st;
      PublishState(*job, deferred);
      if (job->state == JobState::kQueued) ServeWaiters(deferred);
    }
  }
  for (auto& f : deferred) f();
  return absl::OkStatus();
}

void Coordinator::CountFinished(const std::string& worker_id) {
  auto w = store_->GetWorker(worker_id);
  if (!w.ok() || !w->has_value()) return;
  (*w)->jobs_finished += 1;
  (*w)->last_seen_ms = std::max((*w)->last_seen_ms, clock_->NowMs());
  absl::Status st = store_->PutWorker(**w);
  if (!st.ok()) log_->warn("recording a finished job of {} failed: {}", worker_id, st.ToString());
}

absl::Status Coordinator::Deregister(const Principal& who, const v1::DeregisterWorkerRequest& request) {
  if (absl::Status st = CheckLength("the reason", request.reason(), options_.max_reason_bytes, "max_reason_bytes");
      !st.ok()) {
    return st;
  }
  std::lock_guard<std::mutex> lock(mu_);
  auto w = CheckWorker(who, request.worker_id());
  if (!w.ok()) return w.status();
  if (w->left_ms == 0) {
    w->left_ms = w->last_seen_ms = clock_->NowMs();
    seen_ms_.erase(request.worker_id());
    absl::Status st = store_->PutWorker(*w);
    if (!st.ok()) return st;
    log_->info("worker {} left: {} ({} jobs finished)", request.worker_id(),
               request.reason().empty() ? "no reason given" : request.reason(), w->jobs_finished);
  }
  return absl::OkStatus();
}

absl::StatusOr<std::vector<v1::Worker>> Coordinator::FleetLocked(bool include_gone) {
  auto workers = store_->Workers();
  if (!workers.ok()) return workers.status();
  JobFilter running;
  running.state = JobState::kRunning;
  auto jobs = store_->ListJobs(running, 0, 1 << 20);
  if (!jobs.ok()) return jobs.status();
  std::map<std::string, const JobRecord*> holding;
  for (const auto& j : *jobs) holding[j.worker_id] = &j;
  const int64_t now = clock_->NowMs();
  std::vector<v1::Worker> out;
  for (const auto& w : *workers) {
    v1::Worker p;
    p.set_id(w.id);
    p.set_host(w.host);
    p.set_cores(w.cores);
    p.set_threads(w.threads);
    p.set_version(w.version);
    p.set_slurm_job_id(w.slurm_job_id);
    p.set_slurm_array_job_id(w.slurm_array_job_id);
    p.set_slurm_array_task_id(w.slurm_array_task_id);
    p.set_registered_ms(w.registered_ms);
    int64_t seen = w.last_seen_ms;
    if (auto it = seen_ms_.find(w.id); it != seen_ms_.end()) seen = std::max(seen, it->second);
    p.set_last_seen_ms(seen);
    p.set_jobs_finished(w.jobs_finished);
    auto held = holding.find(w.id);
    if (w.left_ms > 0) {
      p.set_state(v1::WORKER_STATE_GONE);
      p.set_gone_reason("left");
    } else if (held != holding.end()) {
      p.set_state(v1::WORKER_STATE_TRAINING);
      p.set_job_id(JobName(held->second->id));
      p.set_step(held->second->step);
    } else if (now - seen > 2 * options_.lease_ms) {
      p.set_state(v1::WORKER_STATE_GONE);
      p.set_gone_reason(absl::StrCat("not seen for ", (now - seen) / 1000, " s"));
    } else {
      p.set_state(v1::WORKER_STATE_IDLE);
    }
    if (p.state() == v1::WORKER_STATE_GONE && !include_gone) continue;
    out.push_back(std::move(p));
  }
  for (const auto& [task, submitted] : pending_) {
    v1::Worker p;
    p.set_id("slurm-" + task);
    p.set_state(v1::WORKER_STATE_PENDING);
    const size_t us = task.find('_');
    p.set_slurm_array_job_id(task.substr(0, us));
    if (us != std::string::npos) p.set_slurm_array_task_id(task.substr(us + 1));
    p.set_registered_ms(submitted);
    out.push_back(std::move(p));
  }
  return out;
}

absl::StatusOr<v1::ListWorkersResponse> Coordinator::ListWorkers(bool include_gone) {
  std::lock_guard<std::mutex> lock(mu_);
  auto fleet = FleetLocked(include_gone);
  if (!fleet.ok()) return fleet.status();
  v1::ListWorkersResponse out;
  for (auto& w : *fleet) *out.add_workers() = std::move(w);
  return out;
}

Coordinator::FleetDemand Coordinator::Demand() {
  std::lock_guard<std::mutex> lock(mu_);
  FleetDemand d;
  auto counts = store_->CountByState();
  if (counts.ok()) d.queued_jobs = (*counts)[JobState::kQueued];
  auto fleet = FleetLocked(false);
  if (fleet.ok()) {
    for (const auto& w : *fleet) {
      if (w.state() == v1::WORKER_STATE_IDLE) ++d.idle_workers;
      if (w.state() == v1::WORKER_STATE_IDLE || w.state() == v1::WORKER_STATE_TRAINING) ++d.live_workers;
      if (w.state() == v1::WORKER_STATE_PENDING) ++d.pending_tasks;
    }
  }
  return d;
}

void Coordinator::AddPending(const std::string& array_job_id, const std::vector<std::string>& task_ids,
                             int64_t now_ms) {
  std::lock_guard<std::mutex> lock(mu_);
  for (const auto& t : task_ids) pending_[absl::StrCat(array_job_id, "_", t)] = now_ms;
}

std::vector<std::string> Coordinator::PendingTasks() {
  std::lock_guard<std::mutex> lock(mu_);
  std::vector<std::string> out;
  for (const auto& [task, submitted] : pending_) out.push_back(task);
  return out;
}

void Coordinator::ForgetPending(const std::vector<std::string>& tasks) {
  std::lock_guard<std::mutex> lock(mu_);
  for (const auto& t : tasks) {
    if (pending_.erase(t) > 0) log_->warn("Slurm task {} ended without registering a worker", t);
  }
}

absl::Status Coordinator::RequeueLapsed(Deferred& deferred) {
  auto lapsed = store_->ExpiredLeases(clock_->NowMs());
  if (!lapsed.ok()) return lapsed.status();
  for (JobRecord job : *lapsed) {
    const std::string id = JobName(job.id);
    const std::string worker = job.worker_id;
    job.worker_id.clear();
    job.lease_expires_ms = 0;
    if (job.attempt >= job.max_attempts) {
      job.state = JobState::kFailed;
      job.finished_ms = clock_->NowMs();
      job.error = absl::StrCat("the lease of attempt ", job.attempt, " lapsed (", worker,
                               " stopped reporting); no attempts left of ", job.max_attempts);
      log_->warn("job {} attempt {}: lease lapsed on {}; failed after {} attempts", id, job.attempt, worker,
                 job.max_attempts);
    } else {
      job.state = JobState::kQueued;
      log_->warn("job {} attempt {}: lease lapsed on {}; queued for attempt {}", id, job.attempt, worker,
                 job.attempt + 1);
    }
    absl::Status st = store_->UpdateJob(job);
    if (!st.ok()) return st;
    PublishState(job, deferred);
  }
  if (!lapsed->empty()) ServeWaiters(deferred);
  return absl::OkStatus();
}

void Coordinator::Sweep() {
  Deferred deferred;
  {
    std::lock_guard<std::mutex> lock(mu_);
    absl::Status st = RequeueLapsed(deferred);
    // Logged when it starts and when it ends, not once per sweep.
    const std::string error = st.ok() ? std::string() : std::string(st.message());
    if (error != last_sweep_error_) {
      if (!st.ok()) {
        log_->error("checking leases failed: {}", st.ToString());
      } else {
        log_->info("checking leases works again");
      }
      last_sweep_error_ = error;
    }
    const int64_t now = clock_->NowMs();
    for (auto it = waiters_.begin(); it != waiters_.end();) {
      if (it->deadline_ms <= now) {
        LeaseDone done = std::move(it->done);
        deferred.push_back([done] { done(absl::OkStatus(), v1::LeaseJobResponse()); });
        it = waiters_.erase(it);
      } else {
        ++it;
      }
    }
  }
  for (auto& f : deferred) f();
}

void Coordinator::SweepLoop() {
  std::unique_lock<std::mutex> lock(mu_);
  while (!stopping_) {
    wake_.wait_for(lock, std::chrono::milliseconds(options_.sweep_interval_ms));
    if (stopping_) break;
    lock.unlock();
    Sweep();
    lock.lock();
  }
}

}  // namespace graft::server
