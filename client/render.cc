#include "client/render.h"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <sstream>

namespace graft::client {
namespace {

using json = nlohmann::ordered_json;

// Display width of UTF-8 text: code points, ignoring continuation bytes.
int Width(const std::string& s) {
  int w = 0;
  for (unsigned char c : s) {
    if ((c & 0xC0) != 0x80) ++w;
  }
  return w;
}

std::string Pad(const std::string& s, int width) {
  const int w = Width(s);
  return w >= width ? s : s + std::string(width - w, ' ');
}

std::string Fixed(double v, int digits = 3) {
  char buf[32];
  std::snprintf(buf, sizeof(buf), "%.*f", digits, v);
  return buf;
}

json ParseOrNull(const std::string& text) {
  if (text.empty()) return nullptr;
  json j = ParseMetrics(text);
  return j.is_discarded() ? json(text) : j;
}

void UpgradeNames(json* j) {
  static const std::pair<const char*, const char*> kLegacy[] = {
      {"acc_test", "acc_held_out"},         {"iia_test", "iia_held_out"},
      {"iia_changed_test", "iia_changed_held_out"}, {"unchanged_fraction", "unchanged_floor"},
      {"iia_step0", "control_untrained_network"}};
  if (j->is_array()) {
    for (auto& e : *j) UpgradeNames(&e);
    return;
  }
  if (!j->is_object()) return;
  bool legacy = false;
  for (const auto& [old_name, name] : kLegacy) legacy = legacy || (j->contains(old_name) && !j->contains(name));
  if (legacy) {
    json renamed = json::object();  // keeps the stored order of the keys
    for (auto& [k, v] : j->items()) {
      std::string key = k;
      for (const auto& [old_name, name] : kLegacy) {
        if (k == old_name && !j->contains(name)) key = name;
      }
      renamed[key] = std::move(v);
    }
    *j = std::move(renamed);
  }
  for (auto& [k, v] : j->items()) UpgradeNames(&v);
}

// The curves a job view draws: task accuracy first, then one per intervention set.
struct Series {
  std::string label;
  char glyph;                                       // 0: listed in the legend, not drawn
  std::vector<std::pair<int64_t, double>> points;  // ascending step
  std::string latest;                               // value text for the legend
};

std::vector<Series> CurvesOf(const JobView& view) {
  std::vector<Series> out;
  Series task{"task accuracy (acc_held_out)", kTaskGlyph, {}, "-"};
  std::map<std::string, Series> sets;
  std::vector<std::string> set_order;
  for (const auto& [step, p] : view.points()) {
    if (auto v = AccuracyValue(p.metrics, "acc_held_out")) {
      task.points.emplace_back(step, *v);
      task.latest = AccuracyText(p.metrics, "acc_held_out");
    }
    if (p.metrics.contains("iia_by_set") && p.metrics["iia_by_set"].is_object()) {
      for (const auto& [name, acc] : p.metrics["iia_by_set"].items()) {
        if (!sets.count(name)) {
          set_order.push_back(name);
          // Numbered in the order stored, which is training.interventions' order.
          const int number = static_cast<int>(set_order.size());
          const char glyph = SetGlyph(number);
          sets[name] = Series{"IIA, set " + name + " (iia_by_set" +
                                  (glyph == 0 ? ", set " + std::to_string(number) + ": not drawn)" : ")"),
                              glyph, {}, "-"};
        }
        if (AccuracyValue(p.metrics["iia_by_set"], name)) {
          sets[name].points.emplace_back(step, acc["value"].get<double>());
          sets[name].latest = AccuracyText(p.metrics["iia_by_set"], name);
        }
      }
    }
  }
  out.push_back(task);
  for (const auto& n : set_order) out.push_back(sets[n]);
  return out;
}

// The step a watcher has seen: the job's reported step, or its latest point when that is ahead
// (a point is forwarded as it arrives; the job's step moves with its next progress report).
int64_t StepSeen(const JobView& view) {
  const int64_t step = view.job().step();
  return view.points().empty() ? step : std::max(step, view.points().rbegin()->first);
}

std::string JobHeader(const v1::Job& job, int64_t step, int64_t now_ms) {
  std::ostringstream o;
  o << job.id() << "  " << job.name() << "  " << StateName(job.state()) << "  step " << step << "/"
    << job.total_steps();
  if (job.attempt() > 0) o << "  attempt " << job.attempt();
  o << "  elapsed " << Elapsed(job, now_ms);
  if (!EndReason(job).empty()) o << "\n" << EndReason(job);
  return o.str();
}

}  // namespace

char SetGlyph(int number) {
  if (number >= 1 && number <= 9) return static_cast<char>('0' + number);
  if (number >= 10 && number <= 35) return static_cast<char>('a' + (number - 10));
  return 0;
}

std::string StateName(v1::JobState state) {
  switch (state) {
    case v1::JOB_STATE_QUEUED:
      return "queued";
    case v1::JOB_STATE_RUNNING:
      return "running";
    case v1::JOB_STATE_SUCCEEDED:
      return "succeeded";
    case v1::JOB_STATE_FAILED:
      return "failed";
    case v1::JOB_STATE_CANCELLED:
      return "cancelled";
    default:
      return "unspecified";
  }
}

std::optional<v1::JobState> ParseStateName(const std::string& name) {
  for (v1::JobState s : {v1::JOB_STATE_QUEUED, v1::JOB_STATE_RUNNING, v1::JOB_STATE_SUCCEEDED, v1::JOB_STATE_FAILED,
                         v1::JOB_STATE_CANCELLED}) {
    if (StateName(s) == name) return s;
  }
  return std::nullopt;
}

bool IsFinal(v1::JobState state) {
  return state == v1::JOB_STATE_SUCCEEDED || state == v1::JOB_STATE_FAILED || state == v1::JOB_STATE_CANCELLED;
}

std::string ProgressBar(int64_t step, int64_t total, int width) {
  if (total <= 0) return "[" + std::string(width, '-') + "]";
  const double f = std::clamp(static_cast<double>(step) / static_cast<double>(total), 0.0, 1.0);
  const int filled = static_cast<int>(std::floor(f * width + 1e-9));
  return "[" + std::string(filled, '#') + std::string(width - filled, '-') + "]";
}

std::string Sparkline(const std::vector<double>& values, int max_width) {
  static const char* kBlocks[] = {"\u2581", "\u2582", "\u2583", "\u2584", "\u2585", "\u2586", "\u2587", "\u2588"};
  std::string out;
  const size_t start = values.size() > static_cast<size_t>(max_width) ? values.size() - max_width : 0;
  for (size_t i = start; i < values.size(); ++i) {
    const double v = std::clamp(values[i], 0.0, 1.0);
    out += kBlocks[std::min(7, static_cast<int>(std::floor(v * 8)))];
  }
  return out;
}

std::string FormatDuration(int64_t ms) {
  if (ms < 0) return "-";
  char buf[32];
  if (ms < 1000) {
    std::snprintf(buf, sizeof(buf), "%lldms", static_cast<long long>(ms));
  } else if (ms < 60000) {
    std::snprintf(buf, sizeof(buf), "%llds", static_cast<long long>(ms / 1000));
  } else if (ms < 3600000) {
    std::snprintf(buf, sizeof(buf), "%lldm%02llds", static_cast<long long>(ms / 60000),
                  static_cast<long long>(ms / 1000 % 60));
  } else {
    std::snprintf(buf, sizeof(buf), "%lldh%02lldm", static_cast<long long>(ms / 3600000),
                  static_cast<long long>(ms / 60000 % 60));
  }
  return buf;
}

std::string Elapsed(const v1::Job& job, int64_t now_ms) {
  if (job.started_ms() <= 0) return "-";
  const int64_t end = job.finished_ms() > 0 ? job.finished_ms() : now_ms;
  return FormatDuration(std::max<int64_t>(0, end - job.started_ms()));
}

std::string EndReason(const v1::Job& job) {
  if (job.state() == v1::JOB_STATE_FAILED) return job.error();
  if (job.state() == v1::JOB_STATE_CANCELLED) return job.cancel_reason().empty() ? job.error() : job.cancel_reason();
  return "";
}

std::string RenderTable(const std::vector<std::string>& header, const std::vector<std::vector<std::string>>& rows) {
  std::vector<int> widths(header.size(), 0);
  for (size_t c = 0; c < header.size(); ++c) widths[c] = Width(header[c]);
  for (const auto& r : rows) {
    for (size_t c = 0; c < r.size() && c < widths.size(); ++c) widths[c] = std::max(widths[c], Width(r[c]));
  }
  std::ostringstream o;
  auto line = [&](const std::vector<std::string>& cells) {
    std::string s;
    for (size_t c = 0; c < cells.size(); ++c) {
      s += c + 1 == cells.size() ? cells[c] : Pad(cells[c], widths[c]) + "  ";
    }
    while (!s.empty() && s.back() == ' ') s.pop_back();
    o << s << "\n";
  };
  line(header);
  for (const auto& r : rows) line(r);
  return o.str();
}

json ParseMetrics(const std::string& text) {
  json j = json::parse(text, nullptr, false);
  if (!j.is_discarded()) UpgradeNames(&j);
  return j;
}

std::optional<double> AccuracyValue(const json& metrics, const std::string& key) {
  if (!metrics.is_object() || !metrics.contains(key)) return std::nullopt;
  const json& a = metrics[key];
  if (!a.is_object() || !a.contains("value") || !a["value"].is_number()) return std::nullopt;
  return a["value"].get<double>();
}

std::string AccuracyText(const json& metrics, const std::string& key) {
  auto v = AccuracyValue(metrics, key);
  if (!v) return "-";
  const json& a = metrics[key];
  std::string s = Fixed(*v);
  if (a.contains("lo") && a["lo"].is_number() && a.contains("hi") && a["hi"].is_number()) {
    s += " [" + Fixed(a["lo"].get<double>()) + ", " + Fixed(a["hi"].get<double>()) + "]";
  }
  return s;
}

json JobToJson(const v1::Job& job, bool with_texts) {
  json j;
  j["id"] = job.id();
  j["name"] = job.name();
  j["owner"] = job.owner();
  j["state"] = StateName(job.state());
  j["sweep_id"] = job.sweep_id();
  j["priority"] = job.priority();
  j["labels"] = json::object();
  for (const auto& [k, v] : job.labels()) j["labels"][k] = v;
  j["attempt"] = job.attempt();
  j["max_attempts"] = job.max_attempts();
  j["submitted_ms"] = job.submitted_ms();
  j["started_ms"] = job.started_ms();
  j["finished_ms"] = job.finished_ms();
  j["step"] = job.step();
  j["total_steps"] = job.total_steps();
  j["checkpoint_step"] = job.checkpoint_step();
  j["worker_id"] = job.worker_id();
  j["error"] = job.error();
  j["cancel_reason"] = job.cancel_reason();
  if (job.has_latest()) j["latest"] = PointToJson(job.latest());
  if (with_texts) {
    if (!job.spec_yaml().empty()) j["spec_yaml"] = job.spec_yaml();
    if (!job.result_json().empty()) j["result"] = ParseOrNull(job.result_json());
  }
  return j;
}

json PointToJson(const v1::Point& point) {
  return json{{"step", point.step()}, {"attempt", point.attempt()}, {"metrics", ParseOrNull(point.metrics_json())}};
}

json EventToJson(const std::string& job_id, const v1::JobEvent& event) {
  json j;
  j["job_id"] = job_id;
  if (event.has_state_change()) {
    j["type"] = "state";
    j["job"] = JobToJson(event.state_change(), false);
  } else if (event.has_point()) {
    j["type"] = "point";
    json p = PointToJson(event.point());
    for (auto& [k, v] : p.items()) j[k] = v;
  } else if (event.has_rewind()) {
    j["type"] = "rewind";
    j["from_step"] = event.rewind().from_step();
    j["attempt"] = event.rewind().attempt();
  }
  return j;
}

void JobView::Apply(const v1::JobEvent& event) {
  if (event.has_state_change()) {
    job_ = event.state_change();
  } else if (event.has_point()) {
    ++points_received_;
    StoredPoint p;
    p.attempt = event.point().attempt();
    p.metrics = ParseOrNull(event.point().metrics_json());
    points_[event.point().step()] = std::move(p);
  } else if (event.has_rewind()) {
    points_.erase(points_.lower_bound(event.rewind().from_step()), points_.end());
  }
}

std::string RenderJobFrame(const JobView& view, int width, int64_t now_ms) {
  constexpr int kRows = 13;  // y = 1.00, 0.75, 0.50, 0.25, 0.00 on rows 0, 3, 6, 9, 12
  const int plot_width = std::clamp(width - 8, 20, 160);
  const std::vector<Series> series = CurvesOf(view);
  int64_t max_step = view.job().total_steps();
  for (const auto& [step, p] : view.points()) max_step = std::max(max_step, step);
  if (max_step <= 0) max_step = 1;
  auto col_of = [&](int64_t step) {
    return static_cast<int>(std::lround(static_cast<double>(step) / static_cast<double>(max_step) * (plot_width - 1)));
  };
  auto row_of = [&](double v) { return static_cast<int>(std::lround((1.0 - std::clamp(v, 0.0, 1.0)) * (kRows - 1))); };
  std::vector<std::string> grid(kRows, std::string(plot_width, ' '));
  bool shared = false;
  auto mark = [&](int row, int col, char glyph) {
    char& cell = grid[row][col];
    if (cell != ' ' && cell != glyph) {
      cell = kSharedGlyph;  // two or more curves pass through this cell
      shared = true;
    } else {
      cell = glyph;
    }
  };
  for (const Series& s : series) {
    if (s.glyph == 0) continue;
    const auto& pts = s.points;
    for (size_t i = 0; i < pts.size(); ++i) {
      const int c0 = col_of(pts[i].first);
      mark(row_of(pts[i].second), c0, s.glyph);
      if (i + 1 < pts.size()) {
        const int c1 = col_of(pts[i + 1].first);
        for (int c = c0 + 1; c < c1; ++c) {
          const double f = static_cast<double>(c - c0) / (c1 - c0);
          mark(row_of(pts[i].second + f * (pts[i + 1].second - pts[i].second)), c, s.glyph);
        }
      }
    }
  }
  std::ostringstream o;
  o << JobHeader(view.job(), StepSeen(view), now_ms) << "\n";
  o << "accuracy\n";
  for (int r = 0; r < kRows; ++r) {
    std::string label = "     ";
    if (r % 3 == 0) label = Fixed(1.0 - r / 12.0, 2) + " ";
    o << label << "|" << grid[r] << "\n";
  }
  o << "     +" << std::string(plot_width, '-') << "\n";
  // Step labels at the quarters, left-aligned at their column (the last right-aligned).
  std::string ticks(plot_width + 8, ' ');
  for (int q = 0; q <= 4; ++q) {
    const int64_t step = max_step * q / 4;
    const std::string t = std::to_string(step);
    int at = 6 + col_of(step);
    if (q == 4) at = 6 + plot_width - static_cast<int>(t.size());
    if (q > 0 && at < 6 + col_of(max_step * (q - 1) / 4) + 8) continue;  // no overlap
    for (size_t i = 0; i < t.size() && at + i < ticks.size(); ++i) ticks[at + i] = t[i];
  }
  while (!ticks.empty() && ticks.back() == ' ') ticks.pop_back();
  o << ticks << "\n";
  o << std::string(6 + plot_width / 2 - 3, ' ') << "steps\n";
  int label_width = 0;
  for (const auto& s : series) label_width = std::max(label_width, Width(s.label));
  for (const auto& s : series) {
    o << "  " << (s.glyph == 0 ? '-' : s.glyph) << " = " << Pad(s.label, label_width) << "  " << s.latest << "\n";
  }
  if (shared) o << "  " << kSharedGlyph << " = two or more curves in one cell\n";
  if (!view.points().empty()) {
    const auto& last = view.points().rbegin()->second.metrics;
    o << "  at step " << view.points().rbegin()->first << ": iia_held_out " << AccuracyText(last, "iia_held_out")
      << ", iia_changed_held_out " << AccuracyText(last, "iia_changed_held_out") << "\n";
  } else {
    o << "  no evaluations yet\n";
  }
  return o.str();
}

std::string RenderJobLine(const JobView& view, const v1::JobEvent& event) {
  const v1::Job& job = view.job();
  std::ostringstream o;
  if (event.has_state_change()) {
    o << job.id() << " " << StateName(job.state());
    if (job.state() == v1::JOB_STATE_RUNNING && job.attempt() > 0) o << " (attempt " << job.attempt() << ")";
    if (!EndReason(job).empty()) o << ": " << EndReason(job);
  } else if (event.has_point()) {
    const json& m = view.points().at(event.point().step()).metrics;
    o << job.id() << " step " << event.point().step() << "/" << job.total_steps() << " acc_held_out "
      << AccuracyText(m, "acc_held_out") << " iia_held_out " << AccuracyText(m, "iia_held_out") << " iia_changed_held_out "
      << AccuracyText(m, "iia_changed_held_out");
    if (m.contains("iia_by_set") && m["iia_by_set"].is_object()) {
      for (const auto& [name, acc] : m["iia_by_set"].items()) {
        if (auto v = AccuracyValue(m["iia_by_set"], name)) o << " " << name << " " << Fixed(*v);
      }
    }
  } else if (event.has_rewind()) {
    o << job.id() << " rewind: attempt " << event.rewind().attempt() << " replaces the points from step "
      << event.rewind().from_step();
  } else {
    return "";
  }
  return o.str();
}

void SweepView::Apply(const v1::SweepEvent& event) {
  if (!jobs_.count(event.job_id())) order_.push_back(event.job_id());
  jobs_[event.job_id()].Apply(event.event());
}

std::map<std::string, int> SweepView::CountByState() const {
  std::map<std::string, int> counts;
  for (const auto& [id, v] : jobs_) ++counts[StateName(v.job().state())];
  return counts;
}

std::string StateCounts(const std::map<std::string, int>& counts) {
  std::ostringstream o;
  bool first = true;
  for (const char* s : {"queued", "running", "succeeded", "failed", "cancelled"}) {
    auto it = counts.find(s);
    o << (first ? "" : ", ") << (it == counts.end() ? 0 : it->second) << " " << s;
    first = false;
  }
  return o.str();
}

std::string RenderSweepFrame(const SweepView& view, int width, int max_rows, int64_t now_ms) {
  std::vector<std::vector<std::string>> rows;
  const int shown = std::min<int>(static_cast<int>(view.order().size()), std::max(1, max_rows));
  for (int i = 0; i < shown; ++i) {
    const JobView& jv = view.job(view.order()[i]);
    const v1::Job& j = jv.job();
    std::vector<double> trend;
    std::string latest = "-";
    for (const auto& [step, p] : jv.points()) {
      if (auto v = AccuracyValue(p.metrics, "iia_changed_held_out")) {
        trend.push_back(*v);
        latest = Fixed(*v);
      }
    }
    const int64_t step = StepSeen(jv);
    rows.push_back({j.id(), j.name(), StateName(j.state()), ProgressBar(step, j.total_steps(), 10),
                    std::to_string(step) + "/" + std::to_string(j.total_steps()), Sparkline(trend, 16), latest,
                    Elapsed(j, now_ms)});
  }
  std::string table =
      RenderTable({"ID", "NAME", "STATE", "PROGRESS", "STEPS", "IIA CHANGED (trend)", "LATEST", "ELAPSED"}, rows);
  // Cut lines wider than the terminal, so that redrawing in place stays aligned.
  std::ostringstream o;
  std::istringstream in(table);
  for (std::string line; std::getline(in, line);) {
    if (Width(line) > width && width > 0) {
      std::string cut;
      int w = 0;
      for (unsigned char c : line) {
        if ((c & 0xC0) != 0x80 && ++w > width) break;
        cut.push_back(static_cast<char>(c));
      }
      line = cut;
    }
    o << line << "\n";
  }
  if (shown < static_cast<int>(view.order().size())) {
    o << "... and " << view.order().size() - shown << " more jobs\n";
  }
  o << view.order().size() << " jobs: " << StateCounts(view.CountByState()) << "\n";
  return o.str();
}

std::string RenderSweepLine(const SweepView& view, const v1::SweepEvent& event) {
  const JobView& jv = view.job(event.job_id());
  const v1::Job& j = jv.job();
  std::ostringstream o;
  const v1::JobEvent& e = event.event();
  if (e.has_state_change()) {
    o << j.id() << " " << j.name() << " " << StateName(j.state());
    if (!EndReason(j).empty()) o << ": " << EndReason(j);
  } else if (e.has_point()) {
    const json& m = jv.points().at(e.point().step()).metrics;
    o << j.id() << " " << j.name() << " step " << e.point().step() << "/" << j.total_steps() << " acc_held_out "
      << AccuracyText(m, "acc_held_out") << " iia_changed_held_out " << AccuracyText(m, "iia_changed_held_out");
  } else if (e.has_rewind()) {
    o << j.id() << " " << j.name() << " rewind: attempt " << e.rewind().attempt() << " replaces the points from step "
      << e.rewind().from_step();
  } else {
    return "";
  }
  return o.str();
}

}  // namespace graft::client
