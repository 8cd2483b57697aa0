// What the client prints: tables, progress bars, sparklines, durations, jobs as JSON, and the
// live views of `watch` (the curves of one job, the lines of a sweep). Everything here turns
// values into text; nothing talks to the coordinator or the terminal.
// Thread-safety: pure functions; a JobView or SweepView is used from one thread.
#ifndef GRAFT_CLIENT_RENDER_H_
#define GRAFT_CLIENT_RENDER_H_

#include <cstdint>
#include <map>
#include <optional>
#include <string>
#include <vector>

#include "graft/v1/graft.pb.h"
#include "nlohmann/json.hpp"

namespace graft::client {

// "queued", "running", "succeeded", "failed", "cancelled" ("unspecified" for 0).
std::string StateName(v1::JobState state);
// The inverse of StateName; nullopt for an unknown name.
std::optional<v1::JobState> ParseStateName(const std::string& name);
bool IsFinal(v1::JobState state);

// "[#####-----]" with `width` cells between the brackets; an unknown total gives dashes.
std::string ProgressBar(int64_t step, int64_t total, int width);
// One block character (U+2581..U+2588) per value in [0, 1], the last `max_width` values.
std::string Sparkline(const std::vector<double>& values, int max_width);
// "850ms", "12s", "3m05s", "2h03m"; negative gives "-".
std::string FormatDuration(int64_t ms);
// The time a job has run: to now while running, to its end once finished; "-" if never started.
std::string Elapsed(const v1::Job& job, int64_t now_ms);
// Why a job ended without success, for people: a failed job's `error`, a cancelled job's
// `cancel_reason` ("cancelled by alice: <reason>; the worker stopped at step N"; from a graftd
// older than that field, its `error`); "" for any other job.
std::string EndReason(const v1::Job& job);

// Columns padded to their widest cell (UTF-8 aware), two spaces apart, header first.
std::string RenderTable(const std::vector<std::string>& header, const std::vector<std::vector<std::string>>& rows);

// Parses a point's or a result's JSON text (a discarded value when it is not JSON) and renames the
// keys of runs made before graft's names settled (acc_test, iia_test, iia_changed_test,
// unchanged_fraction, iia_step0) to today's (acc_held_out, iia_held_out, iia_changed_held_out,
// unchanged_floor, control_untrained_network), at every depth, so older stored points read alike.
nlohmann::ordered_json ParseMetrics(const std::string& text);

// metrics[key]["value"] when it is a number.
std::optional<double> AccuracyValue(const nlohmann::ordered_json& metrics, const std::string& key);
// "0.983 [0.912, 1.000]" for an accuracy object, "-" when absent.
std::string AccuracyText(const nlohmann::ordered_json& metrics, const std::string& key);

// A job as JSON with snake_case keys, the state as its name, `latest` with `metrics` parsed,
// and (with_texts) `spec_yaml` and `result` (parsed result.json) when present.
nlohmann::ordered_json JobToJson(const v1::Job& job, bool with_texts);
// A point: {"step", "attempt", "metrics": {...}}.
nlohmann::ordered_json PointToJson(const v1::Point& point);
// One line of `watch --json`: {"type": "state"|"point"|"rewind", "job_id", ...}.
nlohmann::ordered_json EventToJson(const std::string& job_id, const v1::JobEvent& event);

struct StoredPoint {
  int32_t attempt = 0;
  nlohmann::ordered_json metrics;
};

// What a watcher knows about one job: the job as last reported and its points by step.
class JobView {
 public:
  // A state change replaces the job; a point is stored by step (a repeat replaces it); a rewind
  // drops every point with step >= its from_step.
  void Apply(const v1::JobEvent& event);
  const v1::Job& job() const { return job_; }
  const std::map<int64_t, StoredPoint>& points() const { return points_; }
  int points_received() const { return points_received_; }

 private:
  v1::Job job_;
  std::map<int64_t, StoredPoint> points_;
  int points_received_ = 0;
};

// The marks of the job chart. Task accuracy is kTaskGlyph; intervention set number N (1-based, in
// the order of `training.interventions`, which is the stored order of `iia_by_set`) is
// SetGlyph(N): '1' to '9', then 'a' to 'z' for sets 10 to 35, and 0 (listed in the legend, not
// drawn) beyond; a cell where two or more curves meet is kSharedGlyph.
inline constexpr char kTaskGlyph = 'T';
inline constexpr char kSharedGlyph = ':';
char SetGlyph(int number);

// The live curves of one job: task accuracy (acc_held_out) and IIA of each intervention set
// (iia_by_set) against steps, y from 0 to 1, x from 0 to the job's total steps, with a legend
// that says which mark is which curve ("1 = IIA, set local") and holds the latest values.
// `width` is the terminal's width in columns.
std::string RenderJobFrame(const JobView& view, int width, int64_t now_ms);
// The plain line for an event when output is not a terminal ("" for nothing to say).
std::string RenderJobLine(const JobView& view, const v1::JobEvent& event);

// What a watcher knows about a sweep: one JobView per job, in the order first seen.
class SweepView {
 public:
  void Apply(const v1::SweepEvent& event);
  const std::vector<std::string>& order() const { return order_; }
  const JobView& job(const std::string& id) const { return jobs_.at(id); }
  // Jobs by state name.
  std::map<std::string, int> CountByState() const;

 private:
  std::vector<std::string> order_;
  std::map<std::string, JobView> jobs_;
};

// One line per job (id, name, state, progress bar, steps, a sparkline of iia_changed_held_out over
// its points and its latest value) and a footer with counts by state; at most `max_rows` job
// lines (the rest are counted).
std::string RenderSweepFrame(const SweepView& view, int width, int max_rows, int64_t now_ms);
std::string RenderSweepLine(const SweepView& view, const v1::SweepEvent& event);
// "2 queued, 1 running, 4 succeeded, 0 failed, 0 cancelled".
std::string StateCounts(const std::map<std::string, int>& counts);

}  // namespace graft::client

#endif  // GRAFT_CLIENT_RENDER_H_
