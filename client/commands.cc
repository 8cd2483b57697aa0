#include "client/commands.h"

#include <algorithm>
#include <cctype>
#include <ctime>
#include <filesystem>
#include <fstream>
#include <map>
#include <set>
#include <sstream>

#include "client/render.h"
#include "client/report_fetch.h"
#include "proto/sha256.h"
#include "client/stats.h"
#include "configs/reader/spec.h"
#include "configs/reader/suggest.h"
#include "configs/reader/sweep.h"

namespace graft::client {
namespace {

using json = nlohmann::ordered_json;
namespace fs = std::filesystem;

// What `fetch` downloads: every job's files, then those of the spec's scan: and das: blocks.
const std::vector<std::string> kArtifacts = {"weights.pt", "metrics.jsonl", "result.json", "spec.yaml",
                                             "failures.jsonl", "checkpoint.pt"};
const std::vector<std::string> kScanArtifacts = {"scan.json", "scan.tsv", "scan.svg"};
const std::vector<std::string> kDasArtifacts = {"das.json", "rotation.pt"};

// Whether a resolved spec has `key:` at its top level (ResolvedSpecYaml writes scan: and das:
// only when the config had them).
bool HasTopLevelKey(const std::string& spec_yaml, const std::string& key) {
  const std::string line = key + ":";
  return spec_yaml.rfind(line, 0) == 0 || spec_yaml.find("\n" + line) != std::string::npos;
}

// Reports a failed call and returns its exit code.
int Report(const grpc::Status& s, const std::string& what, Io& io) {
  switch (s.error_code()) {
    case grpc::StatusCode::UNAVAILABLE:
      if (IsTlsProblem(s)) {
        io.err << "graft: cannot connect to graftd at " << io.server << ": " << s.error_message()
               << "\n  TLS settings come from --ca-file, --cert, --key, --tls-server-name, GRAFT_CA_FILE, "
                  "GRAFT_CERT_FILE, GRAFT_KEY_FILE, GRAFT_TLS_SERVER_NAME or the client config\n";
        return kExitUnreachable;
      }
      io.err << "graft: cannot reach graftd at " << io.server << ": " << s.error_message()
             << "\n  is graftd running there? the address comes from --server, GRAFT_SERVER or the client config\n";
      return kExitUnreachable;
    case grpc::StatusCode::UNAUTHENTICATED:
      io.err << "graft: graftd at " << io.server << " refused the token: " << s.error_message()
             << "\n  check --token, --token-file, GRAFT_TOKEN or the client config\n";
      return kExitUnreachable;
    case grpc::StatusCode::PERMISSION_DENIED:
      io.err << "graft: " << what << ": permission denied: " << s.error_message() << "\n";
      return kExitFailure;
    case grpc::StatusCode::NOT_FOUND:
      io.err << "graft: " << s.error_message() << "\n  `graft list` shows your jobs\n";
      return kExitFailure;
    case grpc::StatusCode::DEADLINE_EXCEEDED:
      io.err << "graft: " << what << ": graftd at " << io.server << " did not answer in time\n";
      return kExitUnreachable;
    default:
      io.err << "graft: " << what << ": " << s.error_message() << "\n";
      return kExitFailure;
  }
}

bool ReadFileText(const std::string& path, std::string* text, std::ostream& err) {
  std::ifstream in(path, std::ios::binary);
  if (!in) {
    err << "graft: cannot open '" << path << "'\n";
    return false;
  }
  std::ostringstream s;
  s << in.rdbuf();
  *text = s.str();
  return true;
}

bool SplitPair(const std::string& text, const char* flag, std::string* key, std::string* value, std::ostream& err) {
  const size_t eq = text.find('=');
  if (eq == std::string::npos || eq == 0) {
    err << "graft: " << flag << " '" << text << "': expected key=value\n";
    return false;
  }
  *key = text.substr(0, eq);
  *value = text.substr(eq + 1);
  return true;
}

int64_t IdNumber(const std::string& id) { return std::atoll(id.c_str() + 2); }

std::string UtcTime(int64_t ms) {
  if (ms <= 0) return "-";
  const std::time_t t = static_cast<std::time_t>(ms / 1000);
  std::tm tm{};
  gmtime_r(&t, &tm);
  char buf[32];
  std::strftime(buf, sizeof(buf), "%Y-%m-%d %H:%M:%SZ", &tm);
  return buf;
}

// Every job matching `request`, following next_page_token (bounded).
grpc::Status ListAll(Api& api, v1::ListJobsRequest request, std::vector<v1::Job>* jobs) {
  request.set_page_size(500);
  for (int page = 0; page < 100000; ++page) {
    v1::ListJobsResponse resp;
    grpc::Status s = api.ListJobs(request, &resp);
    if (!s.ok()) return s;
    jobs->insert(jobs->end(), resp.jobs().begin(), resp.jobs().end());
    if (resp.next_page_token().empty()) return grpc::Status::OK;
    request.set_page_token(resp.next_page_token());
  }
  return grpc::Status(grpc::StatusCode::INTERNAL, "ListJobs: too many pages");
}

// The exit code for a set of final states.
int OutcomeCode(const std::map<std::string, int>& counts) {
  auto n = [&](const char* s) {
    auto it = counts.find(s);
    return it == counts.end() ? 0 : it->second;
  };
  if (n("failed") > 0) return kExitJobFailed;
  if (n("cancelled") > 0) return kExitJobCancelled;
  return kExitOk;
}

// Redraws a frame in place: moves the cursor up over the previous frame and clears below it.
class InPlace {
 public:
  explicit InPlace(std::ostream& out) : out_(out) {}
  void Draw(const std::string& frame) {
    if (lines_ > 0) out_ << "\x1b[" << lines_ << "A";
    out_ << "\r\x1b[J" << frame;
    out_.flush();
    lines_ = static_cast<int>(std::count(frame.begin(), frame.end(), '\n'));
  }

 private:
  std::ostream& out_;
  int lines_ = 0;
};

int WatchOrWait(Api& api, const WatchArgs& args, Io& io, bool draw) {
  Target target;
  if (!ParseTarget(args.id, true, &target, io.err)) return kExitUsage;
  const int64_t redraw_every_ms = 100;
  int64_t last_draw = 0;
  InPlace screen(io.out);
  const bool live = draw && !args.json && io.out_is_terminal;
  std::map<std::string, int> counts;
  grpc::Status s;
  if (!target.is_sweep) {
    JobView view;
    s = api.WatchJob(target.id, args.from_step, args.timeout_ms, [&](const v1::JobEvent& e) {
      // graftd replays stored points from from_step but forwards every new point; a watch that
      // starts ahead of the job shows only the points it asked for.
      if (e.has_point() && e.point().step() < args.from_step) return true;
      view.Apply(e);
      if (!draw) return true;
      if (args.json) {
        io.out << EventToJson(target.id, e).dump() << "\n";
        io.out.flush();
      } else if (live) {
        const int64_t now = io.now_ms();
        if (now - last_draw >= redraw_every_ms || IsFinal(view.job().state())) {
          screen.Draw(RenderJobFrame(view, io.width, now));
          last_draw = now;
        }
      } else {
        const std::string line = RenderJobLine(view, e);
        if (!line.empty()) io.out << line << "\n";
        io.out.flush();
      }
      return true;
    });
    if (live && s.ok()) screen.Draw(RenderJobFrame(view, io.width, io.now_ms()));
    if (s.ok() || s.error_code() == grpc::StatusCode::DEADLINE_EXCEEDED) {
      if (!IsFinal(view.job().state())) {
        if (s.ok()) {
          io.err << "graft: the watch of " << target.id << " ended while it is " << StateName(view.job().state())
                 << " (graftd stopped?)\n";
          return kExitFailure;
        }
        io.err << "graft: gave up after " << args.timeout_ms / 1000.0 << " s; " << target.id << " is still "
               << StateName(view.job().state()) << "\n";
        return kExitTimeout;
      }
    }
    if (!s.ok()) return Report(s, "watch " + target.id, io);
    const v1::Job& job = view.job();
    counts[StateName(job.state())] = 1;
    if (!draw) {
      if (args.json) {
        io.out << JobToJson(job, false).dump() << "\n";
      } else {
        io.out << job.id() << " " << StateName(job.state());
        if (!EndReason(job).empty()) io.out << ": " << EndReason(job);
        io.out << "\n";
      }
    }
    return OutcomeCode(counts);
  }
  SweepView view;
  s = api.WatchSweep(target.id, args.from_step, args.timeout_ms, [&](const v1::SweepEvent& e) {
    if (e.event().has_point() && e.event().point().step() < args.from_step) return true;
    view.Apply(e);
    if (!draw) return true;
    if (args.json) {
      io.out << EventToJson(e.job_id(), e.event()).dump() << "\n";
      io.out.flush();
    } else if (live) {
      const int64_t now = io.now_ms();
      if (now - last_draw >= redraw_every_ms) {
        screen.Draw(RenderSweepFrame(view, io.width, std::max(1, io.height - 4), now));
        last_draw = now;
      }
    } else {
      const std::string line = RenderSweepLine(view, e);
      if (!line.empty()) io.out << line << "\n";
      io.out.flush();
    }
    return true;
  });
  if (live && s.ok()) screen.Draw(RenderSweepFrame(view, io.width, std::max(1, io.height - 4), io.now_ms()));
  counts = view.CountByState();
  const int ended = counts["succeeded"] + counts["failed"] + counts["cancelled"];
  if (s.error_code() == grpc::StatusCode::DEADLINE_EXCEEDED) {
    io.err << "graft: gave up after " << args.timeout_ms / 1000.0 << " s; " << target.id << ": "
           << StateCounts(counts) << "\n";
    return kExitTimeout;
  }
  if (!s.ok()) return Report(s, "watch " + target.id, io);
  if (ended != static_cast<int>(view.order().size())) {
    io.err << "graft: the watch of " << target.id << " ended before its jobs did (graftd stopped?)\n";
    return kExitFailure;
  }
  if (args.json) {
    if (!draw) {  // wait --json: one summary object (watch --json printed the events)
      json j{{"sweep_id", target.id}, {"jobs", view.order().size()}, {"counts", json::object()}};
      for (const auto& [k, v] : counts) j["counts"][k] = v;
      io.out << j.dump() << "\n";
    }
  } else if (!live) {
    io.out << target.id << ": " << view.order().size() << " jobs: " << StateCounts(counts) << "\n";
  }
  for (const auto& id : view.order()) {
    const v1::Job& j = view.job(id).job();
    if (j.state() == v1::JOB_STATE_FAILED) io.err << id << " " << j.name() << " failed: " << j.error() << "\n";
  }
  return OutcomeCode(counts);
}

std::string CsvCell(const std::string& s) {
  if (s.find_first_of(",\"\n") == std::string::npos) return s;
  std::string out = "\"";
  for (char c : s) {
    if (c == '"') out += '"';
    out += c;
  }
  return out + "\"";
}

// Three decimals, rounded.
std::string Number(double v) {
  char buf[32];
  std::snprintf(buf, sizeof(buf), "%.3f", v);
  return buf;
}

}  // namespace

const std::vector<std::string>& CommandNames() {
  static const std::vector<std::string> kNames = {"check", "submit", "list",    "show",    "watch",   "wait",
                                                  "cancel", "metrics", "fetch", "compare", "resubmit", "workers",
                                                  "report"};
  return kNames;
}

bool ParseTarget(const std::string& text, bool allow_sweep, Target* target, std::ostream& err) {
  auto digits = [](const std::string& s) {
    return !s.empty() && std::all_of(s.begin(), s.end(), [](unsigned char c) { return std::isdigit(c); });
  };
  if (text.size() > 2 && text[1] == '-' && digits(text.substr(2)) && (text[0] == 'j' || text[0] == 's')) {
    if (text[0] == 's' && !allow_sweep) {
      err << "graft: '" << text << "' is a sweep; this command takes a job (j-<number>); `graft list --sweep " << text
          << "` lists its jobs\n";
      return false;
    }
    target->is_sweep = text[0] == 's';
    target->id = text;
    return true;
  }
  err << "graft: '" << text << "' is not a job id (j-<number>)" << (allow_sweep ? " or a sweep id (s-<number>)" : "");
  std::string lower = text;
  for (char& c : lower) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
  if (digits(text)) {
    err << "; did you mean 'j-" << text << "'?";
  } else if (lower != text && lower.size() > 2 && lower[1] == '-' && digits(lower.substr(2))) {
    err << "; did you mean '" << lower << "'?";
  }
  err << "\n";
  return false;
}

void FlattenMetrics(const std::string& prefix, const json& value, std::vector<std::pair<std::string, std::string>>* out) {
  if (value.is_object()) {
    for (const auto& [k, v] : value.items()) FlattenMetrics(prefix.empty() ? k : prefix + "." + k, v, out);
  } else if (value.is_null()) {
    out->emplace_back(prefix, "");
  } else if (value.is_string()) {
    out->emplace_back(prefix, value.get<std::string>());
  } else {
    out->emplace_back(prefix, value.dump());
  }
}

int CheckCommand(const CheckArgs& args, Io& io) {
  // The config library's check, which `graft-worker check` calls too: both print the same.
  auto summary = config::CheckFile(args.file, args.overrides, args.max_sweep_jobs);
  if (!summary.ok()) {
    if (absl::IsNotFound(summary.status())) {
      io.err << "graft: " << summary.status().message() << "\n";
      return kExitFailure;
    }
    io.err << summary.status().message() << "\n";
    return kExitInvalidConfig;
  }
  io.out << *summary;
  return kExitOk;
}

int SubmitCommand(Api& api, const SubmitArgs& args, Io& io) {
  v1::SubmitJobRequest req;
  std::string text;
  if (!ReadFileText(args.file, &text, io.err)) return kExitFailure;
  for (const auto& l : args.labels) {
    std::string k, v;
    if (!SplitPair(l, "--label", &k, &v, io.err)) return kExitUsage;
    (*req.mutable_labels())[k] = v;
  }
  // Validate locally first (the server's own library): a bad config needs no round trip. A sweep
  // above the default limit is left to the server, whose limit may be higher.
  auto plan = config::PlanFromText(text, args.file, args.overrides, 1000);
  if (!plan.ok() && !absl::IsResourceExhausted(plan.status())) {
    io.err << plan.status().message() << "\n";
    return kExitInvalidConfig;
  }
  req.set_config_yaml(text);
  req.set_source_name(args.file);
  for (const auto& o : args.overrides) req.add_overrides(o);
  req.set_priority(args.priority);
  v1::SubmitJobResponse resp;
  grpc::Status s = api.Submit(req, &resp);
  if (s.error_code() == grpc::StatusCode::INVALID_ARGUMENT || s.error_code() == grpc::StatusCode::RESOURCE_EXHAUSTED) {
    io.err << s.error_message() << "\n";
    return kExitInvalidConfig;
  }
  if (!s.ok()) return Report(s, "submit", io);
  if (args.json) {
    json j{{"job_id", resp.job_id()}, {"sweep_id", resp.sweep_id()}, {"job_ids", json::array()}};
    for (const auto& id : resp.job_ids()) j["job_ids"].push_back(id);
    io.out << j.dump() << "\n";
  } else if (resp.sweep_id().empty()) {
    io.out << "submitted " << resp.job_id() << " (" << (plan.ok() ? plan->jobs.front().name : args.file) << ")\n";
  } else {
    io.out << "submitted sweep " << resp.sweep_id() << ": " << resp.job_ids_size() << " jobs\n";
    for (int i = 0; i < resp.job_ids_size(); ++i) {
      io.out << "  " << resp.job_ids(i);
      if (plan.ok() && i < static_cast<int>(plan->jobs.size())) io.out << "  " << plan->jobs[i].name;
      io.out << "\n";
    }
  }
  io.out.flush();
  if (!args.watch) return kExitOk;
  WatchArgs w;
  w.id = resp.sweep_id().empty() ? resp.job_id() : resp.sweep_id();
  w.json = args.json;
  return WatchOrWait(api, w, io, true);
}

int ListCommand(Api& api, const ListArgs& args, Io& io) {
  v1::ListJobsRequest req;
  if (!args.state.empty()) {
    auto st = ParseStateName(args.state);
    if (!st) {
      const std::string near = config::Nearest(args.state, {"queued", "running", "succeeded", "failed", "cancelled"});
      io.err << "graft: --state '" << args.state << "': expected queued | running | succeeded | failed | cancelled"
             << (near.empty() ? "" : "; did you mean '" + near + "'?") << "\n";
      return kExitUsage;
    }
    req.set_state(*st);
  }
  if (!args.sweep.empty()) {
    Target t;
    if (!ParseTarget(args.sweep, true, &t, io.err)) return kExitUsage;
    if (!t.is_sweep) {
      io.err << "graft: --sweep takes a sweep id (s-<number>), got the job '" << args.sweep << "'\n";
      return kExitUsage;
    }
    req.set_sweep_id(t.id);
  }
  for (const auto& l : args.labels) {
    std::string k, v;
    if (!SplitPair(l, "--label", &k, &v, io.err)) return kExitUsage;
    (*req.mutable_labels())[k] = v;
  }
  std::vector<v1::Job> jobs;
  grpc::Status s = ListAll(api, req, &jobs);
  if (!s.ok()) return Report(s, "list", io);
  // ListJobs leaves out the latest point; a job that has run gets it from GetJob.
  for (auto& job : jobs) {
    if (job.started_ms() <= 0) continue;
    v1::Job full;
    s = api.GetJob(job.id(), &full);
    if (s.error_code() == grpc::StatusCode::NOT_FOUND) continue;
    if (!s.ok()) return Report(s, "list", io);
    if (full.has_latest()) *job.mutable_latest() = full.latest();
  }
  if (args.json) {
    json arr = json::array();
    for (const auto& job : jobs) arr.push_back(JobToJson(job, false));
    io.out << arr.dump() << "\n";
    return kExitOk;
  }
  if (jobs.empty()) {
    io.out << "no jobs\n";
    return kExitOk;
  }
  std::vector<std::vector<std::string>> rows;
  const int64_t now = io.now_ms();
  for (const auto& job : jobs) {
    // Changed-case IIA, as in watch and compare: unchanged cases inflate the overall figure.
    std::string iia = "-";
    if (job.has_latest()) {
      json m = ParseMetrics(job.latest().metrics_json());
      if (auto v = AccuracyValue(m, "iia_changed_held_out")) iia = Number(*v);
    }
    rows.push_back({job.id(), job.name(), StateName(job.state()), ProgressBar(job.step(), job.total_steps(), 10),
                    std::to_string(job.step()) + "/" + std::to_string(job.total_steps()), iia, Elapsed(job, now)});
  }
  io.out << RenderTable({"ID", "NAME", "STATE", "PROGRESS", "STEPS", "IIA CHANGED", "ELAPSED"}, rows);
  return kExitOk;
}

int ShowCommand(Api& api, const ShowArgs& args, Io& io) {
  Target t;
  if (!ParseTarget(args.id, false, &t, io.err)) return kExitUsage;
  v1::Job job;
  grpc::Status s = api.GetJob(t.id, &job);
  if (!s.ok()) return Report(s, "show", io);
  if (args.spec) {
    io.out << job.spec_yaml();
    return kExitOk;
  }
  if (args.json) {
    io.out << JobToJson(job, true).dump(2) << "\n";
    return kExitOk;
  }
  std::ostringstream o;
  o << "job " << job.id() << "  " << job.name() << "\n";
  std::vector<std::pair<std::string, std::string>> rows;
  rows.push_back({"state", StateName(job.state()) + (job.attempt() > 0 ? " (attempt " + std::to_string(job.attempt()) +
                                                                              " of " + std::to_string(job.max_attempts()) + ")"
                                                                        : "")});
  if (!job.error().empty()) rows.push_back({"error", job.error()});
  if (!job.cancel_reason().empty()) rows.push_back({"reason", job.cancel_reason()});
  rows.push_back({"owner", job.owner()});
  if (!job.sweep_id().empty()) rows.push_back({"sweep", job.sweep_id()});
  rows.push_back({"priority", std::to_string(job.priority())});
  if (!job.labels().empty()) {
    std::map<std::string, std::string> sorted(job.labels().begin(), job.labels().end());
    std::string l;
    for (const auto& [k, v] : sorted) l += (l.empty() ? "" : ", ") + k + "=" + v;
    rows.push_back({"labels", l});
  }
  rows.push_back({"submitted", UtcTime(job.submitted_ms())});
  rows.push_back({"started", UtcTime(job.started_ms())});
  rows.push_back({"finished", UtcTime(job.finished_ms())});
  rows.push_back({"elapsed", Elapsed(job, io.now_ms())});
  rows.push_back({"steps", std::to_string(job.step()) + "/" + std::to_string(job.total_steps()) + " " +
                               ProgressBar(job.step(), job.total_steps(), 20)});
  if (job.checkpoint_step() > 0) rows.push_back({"checkpoint", "at step " + std::to_string(job.checkpoint_step())});
  if (!job.worker_id().empty() && job.state() == v1::JOB_STATE_RUNNING) rows.push_back({"worker", job.worker_id()});
  for (const auto& [k, v] : rows) o << "  " << k << std::string(12 - k.size(), ' ') << v << "\n";
  if (job.has_latest()) {
    json m = ParseMetrics(job.latest().metrics_json());
    o << "latest evaluation (step " << job.latest().step() << ", attempt " << job.latest().attempt() << ")\n";
    std::vector<std::pair<std::string, std::string>> acc = {
        {"task accuracy, held out (acc_held_out)", AccuracyText(m, "acc_held_out")},
        {"task accuracy, training (acc_train)", AccuracyText(m, "acc_train")},
        {"IIA, held out (iia_held_out)", AccuracyText(m, "iia_held_out")},
        {"IIA, changed cases (iia_changed_held_out)", AccuracyText(m, "iia_changed_held_out")}};
    if (m.contains("iia_by_set") && m["iia_by_set"].is_object()) {
      for (const auto& [name, v] : m["iia_by_set"].items()) {
        acc.push_back({"IIA, set " + name, AccuracyText(m["iia_by_set"], name)});
      }
    }
    if (m.contains("unchanged_floor") && m["unchanged_floor"].is_number()) {
      acc.push_back({"unchanged floor (unchanged_floor)", Number(m["unchanged_floor"].get<double>())});
    }
    size_t w = 0;
    for (const auto& [k, v] : acc) w = std::max(w, k.size());
    for (const auto& [k, v] : acc) o << "  " << k << std::string(w - k.size() + 2, ' ') << v << "\n";
  } else {
    o << "no evaluations yet\n";
  }
  o << "resolved spec: graft show " << job.id() << " --spec; artifacts: graft fetch " << job.id() << " --out DIR\n";
  io.out << o.str();
  return kExitOk;
}

int WatchCommand(Api& api, const WatchArgs& args, Io& io) { return WatchOrWait(api, args, io, true); }
int WaitCommand(Api& api, const WatchArgs& args, Io& io) { return WatchOrWait(api, args, io, false); }

int CancelCommand(Api& api, const CancelArgs& args, Io& io) {
  Target t;
  if (!ParseTarget(args.id, true, &t, io.err)) return kExitUsage;
  if (!t.is_sweep) {
    v1::Job job;
    grpc::Status s = api.CancelJob(t.id, args.reason, &job);
    if (s.error_code() == grpc::StatusCode::FAILED_PRECONDITION) {
      io.err << "graft: " << s.error_message() << "; only a queued or running job can be cancelled\n";
      return kExitFailure;
    }
    if (!s.ok()) return Report(s, "cancel", io);
    if (args.json) {
      io.out << JobToJson(job, false).dump() << "\n";
    } else {
      io.out << "cancelled " << job.id() << " (" << job.name() << ")";
      if (!job.worker_id().empty()) io.out << "; its worker stops at its next report, within one evaluation interval";
      io.out << "\n";
    }
    return kExitOk;
  }
  v1::CancelSweepResponse resp;
  grpc::Status s = api.CancelSweep(t.id, args.reason, &resp);
  if (!s.ok()) return Report(s, "cancel", io);
  if (args.json) {
    json arr = json::array();
    for (const auto& j : resp.jobs()) arr.push_back(JobToJson(j, false));
    io.out << json{{"sweep_id", t.id}, {"cancelled", arr}}.dump() << "\n";
  } else if (resp.jobs().empty()) {
    io.out << "nothing to cancel: every job of " << t.id << " has ended\n";
  } else {
    io.out << "cancelled " << resp.jobs_size() << " jobs of " << t.id << ":";
    for (const auto& j : resp.jobs()) io.out << " " << j.id();
    io.out << "\n";
  }
  return kExitOk;
}

int MetricsCommand(Api& api, const MetricsArgs& args, Io& io) {
  Target t;
  if (!ParseTarget(args.id, false, &t, io.err)) return kExitUsage;
  if (args.format != "csv" && args.format != "jsonl" && args.format != "json") {
    io.err << "graft: --format '" << args.format << "': expected csv, jsonl or json\n";
    return kExitUsage;
  }
  std::vector<v1::Point> points;
  grpc::Status s = api.GetMetrics(t.id, &points);
  if (!s.ok()) return Report(s, "metrics", io);
  if (args.format == "jsonl" || args.format == "json") {
    json all = json::array();
    for (const auto& p : points) {
      json m = ParseMetrics(p.metrics_json());
      if (!m.is_object()) m = json::object();
      // The stored object, with the attempt that produced it and the step it is stored under.
      m["step"] = p.step();
      m["attempt"] = p.attempt();
      if (args.format == "jsonl") {
        io.out << m.dump() << "\n";
      } else {
        all.push_back(std::move(m));
      }
    }
    // --json, like every --json but watch's: one JSON value (here an array of the points).
    if (args.format == "json") io.out << all.dump() << "\n";
    return kExitOk;
  }
  // CSV: step and attempt, then every flattened field in the order first seen.
  std::vector<std::string> columns = {"step", "attempt"};
  std::set<std::string> known(columns.begin(), columns.end());
  std::vector<std::map<std::string, std::string>> rows;
  for (const auto& p : points) {
    std::vector<std::pair<std::string, std::string>> flat;
    json m = ParseMetrics(p.metrics_json());
    if (m.is_object()) FlattenMetrics("", m, &flat);
    std::map<std::string, std::string> row;
    for (const auto& [k, v] : flat) {
      if (!known.count(k)) {
        known.insert(k);
        columns.push_back(k);
      }
      row[k] = v;
    }
    row["step"] = std::to_string(p.step());
    row["attempt"] = std::to_string(p.attempt());
    rows.push_back(std::move(row));
  }
  for (size_t i = 0; i < columns.size(); ++i) io.out << (i ? "," : "") << CsvCell(columns[i]);
  io.out << "\n";
  for (const auto& row : rows) {
    for (size_t i = 0; i < columns.size(); ++i) {
      auto it = row.find(columns[i]);
      io.out << (i ? "," : "") << (it == row.end() ? "" : CsvCell(it->second));
    }
    io.out << "\n";
  }
  return kExitOk;
}

int FetchCommand(Api& api, const FetchArgs& args, Io& io) {
  Target t;
  if (!ParseTarget(args.id, false, &t, io.err)) return kExitUsage;
  v1::Job job;
  grpc::Status s = api.GetJob(t.id, &job);
  if (!s.ok()) return Report(s, "fetch", io);
  std::error_code ec;
  fs::create_directories(args.out_dir, ec);
  if (ec) {
    io.err << "graft: cannot create '" << args.out_dir << "': " << ec.message() << "\n";
    return kExitFailure;
  }
  int fetched = 0;
  std::vector<std::string> missing;
  std::vector<std::string> names = kArtifacts;
  if (HasTopLevelKey(job.spec_yaml(), "scan")) names.insert(names.end(), kScanArtifacts.begin(), kScanArtifacts.end());
  if (HasTopLevelKey(job.spec_yaml(), "das")) names.insert(names.end(), kDasArtifacts.begin(), kDasArtifacts.end());
  for (const auto& name : names) {
    const std::string final_path = (fs::path(args.out_dir) / name).string();
    const std::string part_path = final_path + ".part";
    std::ofstream out(part_path, std::ios::binary | std::ios::trunc);
    if (!out) {
      io.err << "graft: cannot write '" << part_path << "'\n";
      return kExitFailure;
    }
    graft::Sha256 sha;
    int64_t total = -1, got = 0;
    std::string want_sha;
    s = api.Download(t.id, name, [&](const v1::ArtifactChunk& c) {
      if (!c.sha256().empty()) {
        want_sha = c.sha256();
        total = c.total_bytes();
      }
      sha.Update(c.data());
      got += static_cast<int64_t>(c.data().size());
      out.write(c.data().data(), static_cast<std::streamsize>(c.data().size()));
      return static_cast<bool>(out);
    });
    out.close();
    if (s.error_code() == grpc::StatusCode::NOT_FOUND) {
      fs::remove(part_path, ec);
      missing.push_back(name);
      continue;
    }
    if (!s.ok()) {
      fs::remove(part_path, ec);
      return Report(s, "fetch " + name, io);
    }
    const std::string have_sha = sha.HexDigest();
    if (!out.good() || got != total || have_sha != want_sha) {
      fs::remove(part_path, ec);
      io.err << "graft: " << name << " of " << t.id << " arrived damaged: " << got << " bytes with SHA-256 " << have_sha
             << ", expected " << total << " bytes with " << want_sha << "; nothing was kept, try again\n";
      return kExitFailure;
    }
    fs::rename(part_path, final_path, ec);
    if (ec) {
      io.err << "graft: cannot write '" << final_path << "': " << ec.message() << "\n";
      return kExitFailure;
    }
    ++fetched;
    io.out << final_path << "  " << got << " bytes  sha256 " << have_sha << " verified\n";
  }
  if (fetched == 0) {
    io.err << "graft: " << t.id << " has no artifacts yet (it is " << StateName(job.state())
           << "); a worker uploads checkpoint.pt every training.checkpoint_every steps and the rest when the job "
              "succeeds\n";
    return kExitFailure;
  }
  if (!missing.empty()) {
    io.out << "not stored for " << t.id << " (" << StateName(job.state()) << "):";
    for (const auto& m : missing) io.out << " " << m;
    io.out << "\n";
  }
  return kExitOk;
}

int CompareCommand(Api& api, const CompareArgs& args, Io& io) {
  Target t;
  if (!ParseTarget(args.id, true, &t, io.err)) return kExitUsage;
  if (!t.is_sweep) {
    io.err << "graft: compare takes a sweep (s-<number>); `graft show " << t.id << "` shows one job\n";
    return kExitUsage;
  }
  if (args.format != "table" && args.format != "csv" && args.format != "json") {
    io.err << "graft: --format '" << args.format << "': expected table, csv or json\n";
    return kExitUsage;
  }
  v1::ListJobsRequest req;
  req.set_sweep_id(t.id);
  std::vector<v1::Job> jobs;
  grpc::Status s = ListAll(api, req, &jobs);
  if (!s.ok()) return Report(s, "compare", io);
  if (jobs.empty()) {
    io.err << "graft: no sweep " << t.id << "\n  `graft list` shows your jobs\n";
    return kExitFailure;
  }
  std::sort(jobs.begin(), jobs.end(), [](const v1::Job& a, const v1::Job& b) { return IdNumber(a.id()) < IdNumber(b.id()); });
  struct Group {
    std::string setting;
    std::vector<std::string> ids;
    std::vector<double> acc, iia;
  };
  std::vector<Group> groups;
  std::map<std::string, size_t> index;
  std::vector<v1::Job> left_out;
  for (const auto& listed : jobs) {
    if (listed.state() != v1::JOB_STATE_SUCCEEDED) {
      left_out.push_back(listed);
      continue;
    }
    v1::Job job;
    s = api.GetJob(listed.id(), &job);
    if (!s.ok()) return Report(s, "compare", io);
    json r = ParseMetrics(job.result_json());
    const std::string setting = SettingOf(job.name());
    if (!index.count(setting)) {
      index[setting] = groups.size();
      groups.push_back(Group{setting, {}, {}, {}});
    }
    Group& g = groups[index[setting]];
    g.ids.push_back(job.id());
    if (auto v = AccuracyValue(r, "acc_held_out")) g.acc.push_back(*v);
    if (auto v = AccuracyValue(r, "iia_changed_held_out")) g.iia.push_back(*v);
  }
  auto stat_json = [](const MeanInterval& m) {
    json j{{"n", m.n}, {"mean", m.n > 0 ? json(m.mean) : json(nullptr)}, {"sd", m.n > 1 ? json(m.sd) : json(nullptr)},
           {"lo", m.has_interval ? json(m.lo) : json(nullptr)}, {"hi", m.has_interval ? json(m.hi) : json(nullptr)}};
    return j;
  };
  auto stat_text = [](const MeanInterval& m) -> std::string {
    if (m.n == 0) return "-";
    if (!m.has_interval) return Number(m.mean) + " (1 seed: no interval)";
    return Number(m.mean) + " [" + Number(m.lo) + ", " + Number(m.hi) + "]";
  };
  if (args.format == "json") {
    json out{{"sweep_id", t.id}, {"level", 0.95}, {"interval", "mean +- t(0.975, n-1) * sd / sqrt(n) over seeds"},
             {"settings", json::array()}, {"left_out", json::array()}};
    for (const auto& g : groups) {
      out["settings"].push_back({{"setting", g.setting},
                                 {"seeds", g.ids.size()},
                                 {"job_ids", g.ids},
                                 {"acc_held_out", stat_json(MeanWithInterval(g.acc))},
                                 {"iia_changed_held_out", stat_json(MeanWithInterval(g.iia))}});
    }
    for (const auto& j : left_out) out["left_out"].push_back({{"id", j.id()}, {"name", j.name()}, {"state", StateName(j.state())}});
    io.out << out.dump(2) << "\n";
    return kExitOk;
  }
  if (args.format == "csv") {
    io.out << "setting,seeds,acc_held_out_mean,acc_held_out_sd,acc_held_out_lo,acc_held_out_hi,iia_changed_held_out_mean,"
              "iia_changed_held_out_sd,iia_changed_held_out_lo,iia_changed_held_out_hi\n";
    auto cells = [](const MeanInterval& m) {
      auto num = [](double v) {
        char buf[32];
        std::snprintf(buf, sizeof(buf), "%.17g", v);
        return std::string(buf);
      };
      return (m.n > 0 ? num(m.mean) : "") + "," + (m.n > 1 ? num(m.sd) : "") + "," + (m.has_interval ? num(m.lo) : "") +
             "," + (m.has_interval ? num(m.hi) : "");
    };
    for (const auto& g : groups) {
      io.out << CsvCell(g.setting) << "," << g.ids.size() << "," << cells(MeanWithInterval(g.acc)) << ","
             << cells(MeanWithInterval(g.iia)) << "\n";
    }
    return kExitOk;
  }
  if (groups.empty()) {
    io.out << "no succeeded jobs in " << t.id << " yet\n";
  } else {
    std::vector<std::vector<std::string>> rows;
    for (const auto& g : groups) {
      rows.push_back({g.setting, std::to_string(g.ids.size()), stat_text(MeanWithInterval(g.acc)),
                      stat_text(MeanWithInterval(g.iia))});
    }
    io.out << RenderTable({"SETTING", "SEEDS", "TASK ACCURACY (acc_held_out)", "CHANGED-CASE IIA (iia_changed_held_out)"}, rows);
    io.out << "mean over seeds of each job's final held-out value; [95% interval: mean +- t(0.975, n-1) * sd / sqrt(n)]\n";
  }
  if (!left_out.empty()) {
    io.out << "left out (not succeeded):";
    for (const auto& j : left_out) io.out << " " << j.id() << " (" << StateName(j.state()) << ")";
    io.out << "\n";
  }
  return kExitOk;
}

int ReportCommand(Api& api, const ReportArgs& args, Io& io) {
  Target t;
  if (!ParseTarget(args.id, true, &t, io.err)) return kExitUsage;
  auto write = [&](const std::string& dir, const std::string& html) {
    auto path = WriteReportPage(dir, html);
    if (!path.ok()) {
      io.err << "graft: " << path.status().message() << "\n";
      return false;
    }
    io.out << *path << "\n";
    return true;
  };
  if (!t.is_sweep) {
    RunReport run;
    grpc::Status s = FetchRunReport(api, t.id, io.server, &run);
    if (!s.ok()) return Report(s, "report", io);
    return write(args.out_dir, RenderJobReport(run)) ? kExitOk : kExitFailure;
  }
  v1::ListJobsRequest req;
  req.set_sweep_id(t.id);
  std::vector<v1::Job> jobs;
  grpc::Status s = ListAll(api, req, &jobs);
  if (!s.ok()) return Report(s, "report", io);
  if (jobs.empty()) {
    io.err << "graft: no sweep " << t.id << "\n  `graft list` shows your jobs\n";
    return kExitFailure;
  }
  std::sort(jobs.begin(), jobs.end(), [](const v1::Job& a, const v1::Job& b) { return IdNumber(a.id()) < IdNumber(b.id()); });
  SweepReport sweep;
  sweep.id = t.id;
  sweep.source = "graftd at " + io.server;
  for (const auto& listed : jobs) {
    RunReport run;
    s = FetchRunReport(api, listed.id(), io.server, &run);
    if (!s.ok()) return Report(s, "report " + listed.id(), io);
    // Each job's page beside the sweep's, linked from it.
    if (!write((fs::path(args.out_dir) / run.id).string(), RenderJobReport(run))) return kExitFailure;
    sweep.job_pages[run.id] = run.id + "/index.html";
    sweep.jobs.push_back(std::move(run));
  }
  return write(args.out_dir, RenderSweepReport(sweep)) ? kExitOk : kExitFailure;
}

int ResubmitCommand(Api& api, const ResubmitArgs& args, Io& io) {
  Target t;
  if (!ParseTarget(args.id, false, &t, io.err)) return kExitUsage;
  v1::Job job;
  grpc::Status s = api.GetJob(t.id, &job);
  if (!s.ok()) return Report(s, "resubmit", io);
  if (job.state() != v1::JOB_STATE_FAILED && job.state() != v1::JOB_STATE_CANCELLED) {
    io.err << "graft: " << t.id << " is " << StateName(job.state())
           << "; only a failed or cancelled job can be resubmitted (`graft submit CONFIG` makes a new job)\n";
    return kExitFailure;
  }
  v1::SubmitJobRequest req;
  req.set_config_yaml(job.spec_yaml());
  req.set_source_name(t.id + "/spec.yaml");
  req.set_priority(job.priority());
  for (const auto& [k, v] : job.labels()) (*req.mutable_labels())[k] = v;
  (*req.mutable_labels())["resubmit_of"] = t.id;
  v1::SubmitJobResponse resp;
  s = api.Submit(req, &resp);
  if (s.error_code() == grpc::StatusCode::INVALID_ARGUMENT) {
    io.err << s.error_message() << "\n";
    return kExitInvalidConfig;
  }
  if (!s.ok()) return Report(s, "resubmit", io);
  if (args.json) {
    io.out << json{{"job_id", resp.job_id()}, {"resubmit_of", t.id}}.dump() << "\n";
  } else {
    io.out << "resubmitted " << t.id << " as " << resp.job_id() << " (" << job.name() << ")\n";
  }
  return kExitOk;
}

namespace {

std::string WorkerStateName(v1::WorkerState s) {
  switch (s) {
    case v1::WORKER_STATE_IDLE: return "idle";
    case v1::WORKER_STATE_TRAINING: return "training";
    case v1::WORKER_STATE_GONE: return "gone";
    case v1::WORKER_STATE_PENDING: return "pending";
    default: return "unknown";
  }
}

// "4711" for a plain Slurm job, "4700_3 (4711)" for an array task, "-" outside Slurm.
std::string SlurmText(const v1::Worker& w) {
  if (!w.slurm_array_job_id().empty()) {
    std::string t = w.slurm_array_job_id() + "_" + w.slurm_array_task_id();
    if (!w.slurm_job_id().empty() && w.slurm_job_id() != w.slurm_array_job_id()) t += " (" + w.slurm_job_id() + ")";
    return t;
  }
  return w.slurm_job_id().empty() ? "-" : w.slurm_job_id();
}

}  // namespace

int WorkersCommand(Api& api, const WorkersArgs& args, Io& io) {
  v1::ListWorkersResponse resp;
  grpc::Status s = api.ListWorkers(args.all, &resp);
  if (!s.ok()) return Report(s, "workers", io);
  const int64_t now = io.now_ms();
  if (args.json) {
    json arr = json::array();
    for (const auto& w : resp.workers()) {
      arr.push_back(json{{"id", w.id()},
                         {"host", w.host()},
                         {"cores", w.cores()},
                         {"threads", w.threads()},
                         {"version", w.version()},
                         {"state", WorkerStateName(w.state())},
                         {"job_id", w.job_id()},
                         {"step", w.step()},
                         {"slurm_job_id", w.slurm_job_id()},
                         {"slurm_array_job_id", w.slurm_array_job_id()},
                         {"slurm_array_task_id", w.slurm_array_task_id()},
                         {"registered_ms", w.registered_ms()},
                         {"last_seen_ms", w.last_seen_ms()},
                         {"jobs_finished", w.jobs_finished()},
                         {"gone_reason", w.gone_reason()}});
    }
    io.out << arr.dump() << "\n";
    return kExitOk;
  }
  if (resp.workers().empty()) {
    io.out << (args.all ? "no workers have registered\n" : "no workers (graft workers --all shows those gone)\n");
    return kExitOk;
  }
  std::vector<std::vector<std::string>> rows;
  int counts[5] = {0, 0, 0, 0, 0};
  for (const auto& w : resp.workers()) {
    std::string state = WorkerStateName(w.state());
    if (w.state() == v1::WORKER_STATE_TRAINING) state += " " + w.job_id() + " at step " + std::to_string(w.step());
    if (w.state() == v1::WORKER_STATE_GONE && !w.gone_reason().empty()) state += " (" + w.gone_reason() + ")";
    const bool pending = w.state() == v1::WORKER_STATE_PENDING;
    rows.push_back({w.id(), pending ? "-" : w.host(), pending ? "-" : std::to_string(w.threads()), SlurmText(w),
                    state, pending ? "-" : FormatDuration(now - w.last_seen_ms()) + " ago",
                    pending ? "-" : std::to_string(w.jobs_finished())});
    const int k = static_cast<int>(w.state());
    if (k >= 0 && k < 5) ++counts[k];
  }
  io.out << RenderTable({"ID", "HOST", "THREADS", "SLURM JOB", "STATE", "LAST REPORT", "JOBS FINISHED"}, rows);
  io.out << resp.workers_size() << " workers: " << counts[v1::WORKER_STATE_IDLE] << " idle, "
         << counts[v1::WORKER_STATE_TRAINING] << " training, " << counts[v1::WORKER_STATE_PENDING] << " pending";
  if (args.all) io.out << ", " << counts[v1::WORKER_STATE_GONE] << " gone";
  io.out << "\n";
  return kExitOk;
}

}  // namespace graft::client
