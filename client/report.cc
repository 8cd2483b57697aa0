#include "client/report.h"

#include <algorithm>
#include <cmath>
#include <filesystem>
#include <fstream>
#include <limits>
#include <set>
#include <sstream>

#include <unistd.h>

#include <yaml-cpp/yaml.h>

#include "client/report_plot.h"
#include "client/stats.h"

namespace graft::client {
namespace {

namespace fs = std::filesystem;
using json = nlohmann::ordered_json;

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

// Colours of the job page's curves (palette indices), kept apart from the per-set curves.
constexpr int kChangedColour = 0;  // blue: IIA on changed cases, the figure that matters most
constexpr int kOverallColour = 1;  // orange: IIA on all triples
constexpr int kTaskColour = 7;     // near-black: task accuracy

const char* const kStyle = R"CSS(
body { font-family: "DejaVu Sans", Helvetica, Arial, sans-serif; font-size: 14px; color: #222; background: #fff;
       max-width: 1040px; margin: 20px auto; padding: 0 16px; line-height: 1.4; }
h1 { font-size: 21px; margin: 0 0 2px; }
h2 { font-size: 16px; margin: 26px 0 6px; padding-bottom: 2px; border-bottom: 1px solid #bbb; }
h3 { font-size: 14px; margin: 14px 0 4px; }
p { margin: 4px 0 8px; }
.sub { color: #444; margin-bottom: 10px; }
.note { color: #505050; font-size: 12.5px; max-width: 760px; }
table { border-collapse: collapse; font-size: 13px; margin: 4px 0 8px; }
th, td { padding: 2px 8px; text-align: left; border-bottom: 1px solid #e2e2e2; vertical-align: top; }
th { border-bottom: 1px solid #999; font-weight: bold; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.confusion td.num { min-width: 40px; }
table.confusion td.diagonal { font-weight: bold; outline: 1px solid #222; outline-offset: -1px; }
.figures { display: flex; flex-wrap: wrap; gap: 8px 20px; align-items: flex-start; }
svg.chart { display: block; max-width: 100%; height: auto; }
svg.chart text { font-family: "DejaVu Sans", Helvetica, Arial, sans-serif; }
pre { background: #f5f5f5; border: 1px solid #e2e2e2; padding: 8px; font-size: 12px; overflow-x: auto; }
a { color: #1f5aa6; }
.caution { border-left: 3px solid #999; padding-left: 8px; }
@media print {
  body { margin: 0; max-width: none; font-size: 11pt; }
  section { break-inside: avoid-page; }
  h2 { break-after: avoid-page; }
  pre { white-space: pre-wrap; }
  a { color: inherit; text-decoration: none; }
  th.key, td.key { display: none; }
  td { overflow-wrap: anywhere; }
}
@page { size: A4; margin: 14mm; }
)CSS";

std::string Escape(const std::string& s) { return HtmlEscape(s); }

std::string Page(const std::string& title, const std::string& body) {
  std::ostringstream s;
  s << "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
    << "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
    << "<meta name=\"generator\" content=\"graft report\">\n<title>" << Escape(title) << "</title>\n<style>" << kStyle
    << "</style>\n</head>\n<body>\n"
    << body << "</body>\n</html>\n";
  return s.str();
}

const json* Find(const json& object, const std::string& dotted) {
  const json* at = &object;
  size_t start = 0;
  while (true) {
    if (!at->is_object()) return nullptr;
    const size_t dot = dotted.find('.', start);
    // Set names contain '+' but never '.', so a dot always separates keys.
    const std::string key = dotted.substr(start, dot == std::string::npos ? std::string::npos : dot - start);
    auto it = at->find(key);
    if (it == at->end()) return nullptr;
    at = &*it;
    if (dot == std::string::npos) return at;
    start = dot + 1;
  }
}

double NumberAt(const json& object, const std::string& dotted) {
  const json* v = Find(object, dotted);
  return v && v->is_number() ? v->get<double>() : kNaN;
}

// An accuracy object {"value", "lo", "hi", "correct", "n"} at `dotted`, or nullptr.
const json* AccuracyAt(const json& object, const std::string& dotted) {
  const json* v = Find(object, dotted);
  return v && v->is_object() && v->contains("value") ? v : nullptr;
}

std::string IntervalText(const json& acc) {
  return Fixed3(NumberAt(acc, "value")) + " [" + Fixed3(NumberAt(acc, "lo")) + ", " + Fixed3(NumberAt(acc, "hi")) + "]";
}

// The intervention sets in the stored order of iia_by_set.
std::vector<std::string> SetNames(const json& final_point) {
  std::vector<std::string> names;
  const json* by_set = Find(final_point, "iia_by_set");
  if (by_set && by_set->is_object()) {
    for (const auto& [k, v] : by_set->items()) names.push_back(k);
  }
  return names;
}

// The series of one accuracy over the points: value with its Wilson bounds.
Series AccuracySeries(const std::vector<json>& points, const std::string& key, const std::string& label, int colour,
                      int dash) {
  Series s;
  s.key = key;
  s.label = label;
  s.colour = colour;
  s.dash = dash;
  const json* last = nullptr;
  for (const auto& p : points) {
    const json* acc = AccuracyAt(p, key);
    s.x.push_back(NumberAt(p, "step"));
    s.y.push_back(acc ? NumberAt(*acc, "value") : kNaN);
    s.lo.push_back(acc ? NumberAt(*acc, "lo") : kNaN);
    s.hi.push_back(acc ? NumberAt(*acc, "hi") : kNaN);
    if (acc) last = acc;
  }
  if (last) s.note = "last " + IntervalText(*last);
  return s;
}

double LastStep(const std::vector<json>& points) {
  double m = 0;
  for (const auto& p : points) m = std::max(m, NumberAt(p, "step"));
  return m;
}

struct YamlFacts {
  std::string name;
  double interchange_weight = kNaN;
  double task_weight = kNaN;
  long long steps = 0;
  long long seed = 0;
  std::string network;
};

YamlFacts ReadFacts(const std::string& spec_yaml) {
  YamlFacts f;
  try {
    YAML::Node root = YAML::Load(spec_yaml);
    if (root["name"]) f.name = root["name"].as<std::string>();
    if (root["seed"]) f.seed = root["seed"].as<long long>();
    YAML::Node w = root["training"]["loss_weights"];
    if (w && w["interchange"]) f.interchange_weight = w["interchange"].as<double>();
    if (w && w["task"]) f.task_weight = w["task"].as<double>();
    if (root["training"]["steps"]) f.steps = root["training"]["steps"].as<long long>();
    YAML::Node net = root["network"];
    if (net && net["type"]) {
      f.network = net["type"].as<std::string>();
      if (net["hidden"] && net["hidden"].IsSequence()) {
        f.network += " hidden";
        for (const auto& h : net["hidden"]) f.network += " " + h.as<std::string>();
      }
    }
  } catch (const YAML::Exception&) {
    // A spec that does not parse still gets a page: the facts line is left out.
  }
  return f;
}

std::string WeightText(double w) {
  char buf[32];
  std::snprintf(buf, sizeof(buf), "%g", w);
  return buf;
}

// One row of the final-figures table; `acc` may be a plain number (the unchanged floor).
void FigureRow(std::ostringstream& s, const std::string& key, const std::string& label, const json* acc) {
  if (!acc) return;
  s << "<tr data-key=\"" << Escape(key) << "\"><td>" << Escape(label) << "</td><td class=\"key\"><code>" << Escape(key)
    << "</code></td>";
  if (acc->is_number()) {
    s << "<td class=\"num\" data-field=\"value\">" << Fixed3(acc->get<double>())
      << "</td><td class=\"num\" colspan=\"4\">share of triples, not an estimate of the network</td></tr>\n";
    return;
  }
  s << "<td class=\"num\" data-field=\"value\">" << Fixed3(NumberAt(*acc, "value")) << "</td>"
    << "<td class=\"num\" data-field=\"lo\">" << Fixed3(NumberAt(*acc, "lo")) << "</td>"
    << "<td class=\"num\" data-field=\"hi\">" << Fixed3(NumberAt(*acc, "hi")) << "</td>"
    << "<td class=\"num\" data-field=\"correct\">" << (acc->contains("correct") ? (*acc)["correct"].dump() : "-") << "</td>"
    << "<td class=\"num\" data-field=\"n\">" << (acc->contains("n") ? (*acc)["n"].dump() : "-") << "</td></tr>\n";
}

std::string FinalTable(const json& final_row, const std::vector<std::string>& sets) {
  std::ostringstream s;
  s << "<table class=\"figures-table\" id=\"final-figures\">\n<thead><tr><th>figure</th><th class=\"key\">key</th><th "
       "class=\"num\">value</th><th class=\"num\">95% low</th><th class=\"num\">95% high</th><th "
       "class=\"num\">correct</th><th class=\"num\">n</th></tr></thead>\n<tbody>\n";
  FigureRow(s, "acc_train", "task accuracy, training inputs", AccuracyAt(final_row, "acc_train"));
  FigureRow(s, "acc_held_out", "task accuracy, held out", AccuracyAt(final_row, "acc_held_out"));
  FigureRow(s, "iia_held_out", "IIA, held out (all triples)", AccuracyAt(final_row, "iia_held_out"));
  FigureRow(s, "iia_changed_held_out", "IIA, changed cases only", AccuracyAt(final_row, "iia_changed_held_out"));
  for (const auto& set : sets) {
    FigureRow(s, "iia_by_set." + set, "IIA, set " + set, AccuracyAt(final_row, "iia_by_set." + set));
  }
  FigureRow(s, "unchanged_floor", "unchanged floor", Find(final_row, "unchanged_floor"));
  FigureRow(s, "control_untrained_network.iia_held_out", "control: untrained network, IIA",
            AccuracyAt(final_row, "control_untrained_network.iia_held_out"));
  FigureRow(s, "control_untrained_network.iia_changed_held_out", "control: untrained network, IIA on changed cases",
            AccuracyAt(final_row, "control_untrained_network.iia_changed_held_out"));
  FigureRow(s, "control_random_units.iia_held_out", "control: random units, IIA",
            AccuracyAt(final_row, "control_random_units.iia_held_out"));
  FigureRow(s, "control_random_units.iia_changed_held_out", "control: random units, IIA on changed cases",
            AccuracyAt(final_row, "control_random_units.iia_changed_held_out"));
  for (const auto& set : sets) {
    FigureRow(s, "control_random_units.iia_by_set." + set, "control: random units, set " + set,
              AccuracyAt(final_row, "control_random_units.iia_by_set." + set));
  }
  s << "</tbody>\n</table>\n";
  return s.str();
}

void AddReference(std::vector<ReferenceLine>* refs, const json& result, const std::string& key,
                  const std::string& label, int colour, int dash) {
  const double v = Find(result, key) && Find(result, key)->is_number() ? NumberAt(result, key)
                                                                        : NumberAt(result, key + ".value");
  if (std::isfinite(v)) refs->push_back(ReferenceLine{key, label, v, colour, dash});
}

std::string ConfusionTables(const json& result) {
  const json* conf = Find(result, "confusion");
  if (!conf || !conf->is_object()) return "";
  const json* classes = Find(*conf, "classes");
  const json* by_set = Find(*conf, "by_set");
  if (!classes || !by_set || !by_set->is_object()) return "";
  std::vector<std::string> names;
  for (const auto& c : *classes) names.push_back(c.is_string() ? c.get<std::string>() : c.dump());
  std::ostringstream s;
  s << "<section id=\"confusion\">\n<h2>Confusion of the intervened runs, per intervention set</h2>\n"
    << "<p class=\"note\">Rows: the counterfactual label (what the algorithm says the intervened run should give); "
       "columns: the class the network predicted. Counts of held-out triples of the final network; each cell is "
       "shaded by its share of its row (white 0, dark blue 1); the diagonal (correct) is outlined.</p>\n"
    << "<div class=\"figures\">\n";
  for (const auto& [set, rows] : by_set->items()) {
    s << "<div><h3>set " << Escape(set) << "</h3>\n<table class=\"confusion\" data-set=\"" << Escape(set)
      << "\">\n<thead><tr><th>label \\ predicted</th>";
    for (const auto& n : names) s << "<th class=\"num\">" << Escape(n) << "</th>";
    s << "<th class=\"num\">row total</th></tr></thead>\n<tbody>\n";
    size_t r = 0;
    for (const auto& row : rows) {
      double total = 0;
      for (const auto& c : row) total += c.is_number() ? c.get<double>() : 0;
      s << "<tr><th>" << Escape(r < names.size() ? names[r] : std::to_string(r)) << "</th>";
      size_t col = 0;
      for (const auto& c : row) {
        const double count = c.is_number() ? c.get<double>() : 0;
        const double share = total > 0 ? count / total : 0;
        // White to the palette's blue (#1f5aa6), linear in each channel.
        const int red = static_cast<int>(std::lround(255 - share * (255 - 0x1f)));
        const int green = static_cast<int>(std::lround(255 - share * (255 - 0x5a)));
        const int blue = static_cast<int>(std::lround(255 - share * (255 - 0xa6)));
        char bg[64];
        std::snprintf(bg, sizeof(bg), "background:#%02x%02x%02x;color:%s", red, green, blue,
                      share > 0.55 ? "#ffffff" : "#222222");
        s << "<td class=\"num" << (col == r ? " diagonal" : "") << "\" data-count=\"" << c.dump() << "\" style=\""
          << bg << "\">" << c.dump() << "</td>";
        ++col;
      }
      s << "<td class=\"num\">" << static_cast<long long>(total) << "</td></tr>\n";
      ++r;
    }
    s << "</tbody>\n</table></div>\n";
  }
  s << "</div>\n</section>\n";
  return s.str();
}

std::string Assignment(const json& values) {
  std::string out;
  if (!values.is_object()) return values.dump();
  for (const auto& [k, v] : values.items()) {
    if (!out.empty()) out += ", ";
    out += k + "=" + (v.is_string() ? v.get<std::string>() : v.dump());
  }
  return out;
}

// Strings as they are, whole numbers exactly, other numbers to 6 significant digits.
std::string Text(const json& v) {
  if (v.is_string()) return v.get<std::string>();
  if (v.is_number_float()) {
    char buf[32];
    std::snprintf(buf, sizeof(buf), "%.6g", v.get<double>());
    return buf;
  }
  return v.dump();
}

std::string FailuresTable(const std::vector<json>& failures) {
  std::ostringstream s;
  s << "<section id=\"failures\">\n<h2>Failing triples</h2>\n";
  if (failures.empty()) {
    s << "<p>No held-out triple failed (failures.jsonl is empty or absent).</p>\n</section>\n";
    return s.str();
  }
  s << "<p class=\"note\">" << failures.size()
    << " failing held-out triples of the final network (graft keeps up to 200), in the variables' symbols: the base "
       "input, the source input whose values the set's variables take, the base's own label, the counterfactual "
       "label the algorithm gives, and what the network predicted.</p>\n"
    << "<table id=\"failures-table\">\n<thead><tr><th class=\"num\">#</th><th>set</th><th>base</th><th>source</th>"
       "<th>base label</th><th>expected</th><th>predicted</th></tr></thead>\n<tbody>\n";
  int i = 0;
  for (const auto& f : failures) {
    s << "<tr><td class=\"num\">" << ++i << "</td><td>" << Escape(Text(f.value("set", json("")))) << "</td><td>"
      << Escape(Assignment(f.value("base", json::object()))) << "</td><td>"
      << Escape(Assignment(f.value("source", json::object()))) << "</td><td>"
      << Escape(Text(f.value("base_label", json("")))) << "</td><td>" << Escape(Text(f.value("expected", json(""))))
      << "</td><td>" << Escape(Text(f.value("predicted", json("")))) << "</td></tr>\n";
  }
  s << "</tbody>\n</table>\n</section>\n";
  return s.str();
}

// scan.svg as written by `scan`, without anything before its <svg> element.
std::string InlineSvg(const std::string& svg) {
  const size_t at = svg.find("<svg");
  return at == std::string::npos ? "" : svg.substr(at);
}

std::string UnitsText(const json& units) {
  if (!units.is_array() || units.empty()) return "-";
  std::vector<long long> u;
  for (const auto& x : units) u.push_back(x.get<long long>());
  bool contiguous = true;
  for (size_t i = 1; i < u.size(); ++i) contiguous = contiguous && u[i] == u[i - 1] + 1;
  if (contiguous) return std::to_string(u.front()) + "-" + std::to_string(u.back());
  std::string out;
  for (size_t i = 0; i < u.size(); ++i) out += (i ? "," : "") + std::to_string(u[i]);
  return out;
}

std::string ScanSection(const RunReport& run) {
  if (run.scan_svg.empty() && run.scan.is_null()) return "";
  std::ostringstream s;
  s << "<section id=\"scan\">\n<h2>Scan: where each variable can be found</h2>\n"
    << "<p class=\"note\">For each aligned variable alone, every candidate site (layer x unit block) was tried with "
       "that variable's interchange on held-out pairs; cells show IIA on changed cases (white 0, dark blue 1), the "
       "best site outlined in red. Hover a cell for its interval.</p>\n";
  if (run.scan.is_object() && run.scan.contains("variables")) {
    s << "<table id=\"scan-best\">\n<thead><tr><th>variable</th><th>aligned site</th><th>best site</th><th "
         "class=\"num\">IIA, changed</th><th class=\"num\">95% low</th><th class=\"num\">95% high</th><th "
         "class=\"num\">n</th></tr></thead>\n<tbody>\n";
    for (const auto& [var, v] : run.scan["variables"].items()) {
      const json& aligned = v.value("aligned_site", json::object());
      const json& best = v.value("best", json::object());
      const json& changed = best.value("iia_changed", json::object());
      s << "<tr data-key=\"scan." << Escape(var) << "\"><td>" << Escape(var) << "</td><td>layer "
        << aligned.value("layer", json(-1)).dump() << " units " << UnitsText(aligned.value("units", json::array()))
        << "</td><td>layer " << best.value("layer", json(-1)).dump() << " units "
        << UnitsText(best.value("units", json::array())) << "</td><td class=\"num\" data-field=\"value\">"
        << Fixed3(NumberAt(changed, "value")) << "</td><td class=\"num\" data-field=\"lo\">"
        << Fixed3(NumberAt(changed, "lo")) << "</td><td class=\"num\" data-field=\"hi\">"
        << Fixed3(NumberAt(changed, "hi")) << "</td><td class=\"num\" data-field=\"n\">"
        << changed.value("n", json(0)).dump() << "</td></tr>\n";
    }
    s << "</tbody>\n</table>\n";
  }
  if (!run.scan_svg.empty()) s << "<div class=\"scan-map\">" << InlineSvg(run.scan_svg) << "</div>\n";
  s << "</section>\n";
  return s.str();
}

std::string DasSection(const json& das) {
  if (!das.is_object() || !das.contains("network")) return "";
  const json& net = das["network"];
  const json& control = das.value("control_untrained_network", json::object());
  std::vector<std::string> keys = {"iia_held_out", "iia_changed_held_out"};
  std::vector<std::string> labels = {"all", "changed"};
  for (const auto& set : SetNames(net)) {
    keys.push_back("iia_by_set." + set);
    labels.push_back("set " + set);
  }
  PointChart chart;
  chart.title = "DAS at layer " + das.value("layer", json(-1)).dump() + ": IIA through the learned rotation";
  chart.x_label = "held-out triples (all, changed cases, each set)";
  chart.y_label = "IIA (fraction)";
  chart.categories = labels;
  chart.connect = false;
  chart.width = 560;
  for (int k = 0; k < 2; ++k) {
    const json& src = k == 0 ? net : control;
    PointSeries ps;
    ps.key = k == 0 ? "das.network" : "das.control_untrained_network";
    ps.label = k == 0 ? "trained network" : "control: untrained network, same search";
    ps.colour = k == 0 ? kChangedColour : kOverallColour;
    for (const auto& key : keys) {
      const json* acc = AccuracyAt(src, key);
      ps.y.push_back(acc ? NumberAt(*acc, "value") : kNaN);
      ps.lo.push_back(acc ? NumberAt(*acc, "lo") : kNaN);
      ps.hi.push_back(acc ? NumberAt(*acc, "hi") : kNaN);
    }
    chart.series.push_back(std::move(ps));
  }
  const double floor = NumberAt(net, "unchanged_floor");
  if (std::isfinite(floor)) chart.references.push_back(ReferenceLine{"unchanged_floor", "unchanged floor", floor, -1, 2});
  std::ostringstream s;
  s << "<section id=\"das\">\n<h2>DAS: distributed alignment search</h2>\n"
    << "<p class=\"note\">With the network frozen, an orthogonal rotation of layer " << das.value("layer", json(-1)).dump()
    << " was learned (" << das.value("steps", json(0)).dump()
    << " steps) and each variable given a slice of rotated dimensions; the same search on the untrained network is "
       "the control, since DAS can fit spurious alignments in wide layers. Bars are 95% Wilson intervals.</p>\n";
  if (das.contains("rotated_dims") && das["rotated_dims"].is_object()) {
    s << "<p>rotated dimensions:";
    for (const auto& [var, d] : das["rotated_dims"].items()) {
      const long long first = d.value("first", 0LL), count = d.value("count", 0LL);
      s << " " << Escape(var) << " " << first << "-" << first + count - 1 << ";";
    }
    s << "</p>\n";
  }
  s << RenderPointChart(chart) << "</section>\n";
  return s.str();
}

std::string SpecAndProvenance(const RunReport& run) {
  std::ostringstream s;
  s << "<section id=\"provenance\">\n<h2>Provenance and timing</h2>\n<table id=\"provenance-table\">\n<tbody>\n";
  auto row = [&](const std::string& k, const std::string& v) {
    s << "<tr><th>" << Escape(k) << "</th><td>" << Escape(v) << "</td></tr>\n";
  };
  row("data from", run.source);
  if (run.result.is_object()) {
    for (const char* k : {"steps", "resumed_from_step", "steps_this_process", "wall_s", "train_steps_s",
                          "examples_per_s", "peak_rss_mb"}) {
      if (run.result.contains(k)) row(k, Text(run.result[k]));
    }
    if (run.result.contains("provenance") && run.result["provenance"].is_object()) {
      for (const auto& [k, v] : run.result["provenance"].items()) row(k, Text(v));
    }
  }
  s << "</tbody>\n</table>\n</section>\n";
  s << "<section id=\"spec\">\n<h2>Resolved spec</h2>\n<p class=\"note\">spec.yaml: every default filled in; "
       "loading it gives the same job.</p>\n<pre>"
    << Escape(run.spec_yaml) << "</pre>\n</section>\n";
  return s.str();
}

const char* const kCaution =
    "<p class=\"note caution\">IIA on sampled triples is evidence, not proof, that the network implements the "
    "algorithm, and only on this config's input space and the triples drawn from it. Intervals are 95% Wilson "
    "intervals for a proportion; they do not cover the choice of seed (a sweep over seeds does). Do not base a safety "
    "decision about a deployed model on this page alone.</p>\n";

double LossMax(const std::vector<json>& points) {
  double m = 0;
  for (const auto& p : points) {
    for (const char* k : {"loss_task", "loss_interchange"}) {
      const double v = NumberAt(p, k);
      if (std::isfinite(v)) m = std::max(m, v);
    }
  }
  return m;
}

// Whether a value reads as a number, so a swept key's values can be ordered numerically.
bool AsNumber(const std::string& s, double* out) {
  if (s.empty()) return false;
  char* end = nullptr;
  const double v = std::strtod(s.c_str(), &end);
  if (end != s.c_str() + s.size()) return false;
  *out = v;
  return true;
}

}  // namespace

std::string SettingOf(const std::string& job_name) {
  const size_t slash = job_name.rfind('/');
  if (slash != std::string::npos && job_name.compare(slash + 1, 5, "seed=") == 0) return job_name.substr(0, slash);
  return job_name;
}

std::vector<std::pair<std::string, std::string>> VariedSettings(const std::string& job_name) {
  std::vector<std::pair<std::string, std::string>> out;
  const std::string setting = SettingOf(job_name);
  const size_t slash = setting.find('/');
  if (slash == std::string::npos) return out;
  std::stringstream parts(setting.substr(slash + 1));
  std::string part;
  while (std::getline(parts, part, ',')) {
    const size_t eq = part.find('=');
    if (eq == std::string::npos) {
      // A value with a comma in it: it belongs to the previous key.
      if (!out.empty()) out.back().second += "," + part;
      continue;
    }
    out.emplace_back(part.substr(0, eq), part.substr(eq + 1));
  }
  return out;
}

std::string RenderJobReport(const RunReport& run) {
  const json last_point = run.points.empty() ? json::object() : run.points.back();
  const json& final_row = run.result.is_object() ? run.result : last_point;
  const std::vector<std::string> sets = SetNames(final_row);
  const YamlFacts facts = ReadFacts(run.spec_yaml);
  const std::string name = run.name.empty() ? facts.name : run.name;
  std::ostringstream b;
  b << "<header>\n<h1>" << Escape(run.id) << (name.empty() ? "" : " &middot; " + Escape(name)) << "</h1>\n<p class=\"sub\">";
  if (!run.state.empty()) b << "<span class=\"state\">" << Escape(run.state) << "</span> &middot; ";
  if (std::isfinite(facts.interchange_weight)) {
    b << (facts.interchange_weight > 0
              ? "IIT (interchange loss weight " + WeightText(facts.interchange_weight) + ", task " +
                    WeightText(facts.task_weight) + ")"
              : std::string("standard training (interchange loss weight 0): a baseline"))
      << " &middot; ";
  }
  if (!facts.network.empty()) b << Escape(facts.network) << " &middot; ";
  b << "seed " << facts.seed << " &middot; " << run.points.size() << " evaluations to step "
    << static_cast<long long>(LastStep(run.points));
  if (facts.steps > 0) b << " of " << facts.steps;
  b << "</p>\n";
  if (!run.end_reason.empty()) b << "<p><strong>" << Escape(run.end_reason) << "</strong></p>\n";
  b << "</header>\n";

  b << "<section id=\"final\">\n<h2>" << (run.result.is_object() ? "Final figures (result.json)" : "Latest figures")
    << "</h2>\n";
  if (!run.result.is_object()) {
    b << "<p class=\"note\">No result.json yet: the figures are the latest evaluation's, without the controls.</p>\n";
  }
  b << FinalTable(final_row, sets)
    << "<p class=\"note\">Every accuracy with its 95% Wilson interval. IIA counts the triples (base, source, set) "
       "whose intervened prediction equals the counterfactual label; on changed cases that label differs from the "
       "base's own, so a network that ignores interventions scores the unchanged floor overall and 0 there.</p>\n"
    << "</section>\n";

  const double x_max = std::max({1.0, LastStep(run.points), static_cast<double>(facts.steps)});
  {
    LineChart c;
    c.title = "Task accuracy and IIA on held-out data";
    c.x_label = "training step (optimiser steps)";
    c.y_label = "accuracy (fraction)";
    c.x_max = x_max;
    c.series.push_back(AccuracySeries(run.points, "acc_held_out", "task accuracy, held out", kTaskColour, 2));
    c.series.push_back(AccuracySeries(run.points, "iia_held_out", "IIA, all triples", kOverallColour, 1));
    c.series.push_back(AccuracySeries(run.points, "iia_changed_held_out", "IIA, changed cases", kChangedColour, 0));
    const json& ref_source = run.result.is_object() ? run.result : last_point;
    AddReference(&c.references, ref_source, "unchanged_floor", "unchanged floor", -1, 2);
    AddReference(&c.references, ref_source, "control_untrained_network.iia_held_out", "untrained, all", kOverallColour, 3);
    AddReference(&c.references, ref_source, "control_untrained_network.iia_changed_held_out", "untrained, changed",
                 kChangedColour, 3);
    AddReference(&c.references, ref_source, "control_random_units.iia_held_out", "random units, all", kOverallColour, 4);
    AddReference(&c.references, ref_source, "control_random_units.iia_changed_held_out", "random units, changed",
                 kChangedColour, 4);
    LineChart per_set;
    per_set.title = "IIA per intervention set, held out";
    per_set.x_label = c.x_label;
    per_set.y_label = "IIA (fraction)";
    per_set.x_max = x_max;
    int i = 0;
    for (const auto& set : sets) {
      // Set colours start after the three of the first chart.
      const int colour = 2 + i;
      per_set.series.push_back(AccuracySeries(run.points, "iia_by_set." + set, "IIA, set " + set, colour, i));
      AddReference(&per_set.references, ref_source, "control_random_units.iia_by_set." + set,
                   "random units, " + set, colour, 3);
      ++i;
    }
    b << "<section id=\"curves\">\n<h2>Curves</h2>\n<p class=\"note\">Shaded bands: 95% Wilson intervals of each "
         "evaluation. Horizontal lines: the controls of the final network (untrained network of the same shape; "
         "random units of the same layers outside the alignment) and the unchanged floor, each in the colour of the "
         "curve it is compared with.</p>\n"
      << RenderLineChart(c) << (sets.empty() ? "" : RenderLineChart(per_set));
    const double loss_max = LossMax(run.points);
    if (loss_max > 0) {
      LineChart loss;
      loss.title = "Training loss";
      loss.x_label = c.x_label;
      loss.y_label = "cross-entropy (nats)";
      loss.x_max = x_max;
      loss.y_max = loss_max * 1.05;
      loss.height = 240;
      for (int k = 0; k < 2; ++k) {
        Series s;
        s.key = k == 0 ? "loss_task" : "loss_interchange";
        s.label = k == 0 ? "task loss (base runs)" : "interchange loss (intervened runs)";
        s.colour = k == 0 ? kTaskColour : kChangedColour;
        s.dash = k == 0 ? 2 : 0;
        for (const auto& p : run.points) {
          s.x.push_back(NumberAt(p, "step"));
          s.y.push_back(NumberAt(p, s.key));
        }
        if (std::any_of(s.y.begin(), s.y.end(), [](double v) { return std::isfinite(v); })) loss.series.push_back(s);
      }
      b << RenderLineChart(loss)
        << "<p class=\"note\">Mean training loss over the steps since the previous evaluation (no interval: these are "
           "means over batches, not estimates on held-out data).</p>\n";
    }
    b << "</section>\n";
  }
  b << ConfusionTables(run.result) << FailuresTable(run.failures) << ScanSection(run) << DasSection(run.das)
    << SpecAndProvenance(run) << kCaution;
  return Page(run.id + " " + name + ": graft report", b.str());
}

std::string RenderSweepReport(const SweepReport& sweep) {
  struct Group {
    std::string setting;
    std::vector<const RunReport*> jobs;  // succeeded, in id order
  };
  std::vector<Group> groups;
  std::map<std::string, size_t> index;
  std::vector<const RunReport*> left_out;
  std::map<std::string, int> states;
  std::string config_name;
  for (const auto& job : sweep.jobs) {
    ++states[job.state];
    if (config_name.empty()) config_name = job.name.substr(0, job.name.find('/'));
    if (job.state != "succeeded" || !job.result.is_object()) {
      left_out.push_back(&job);
      continue;
    }
    const std::string setting = SettingOf(job.name);
    if (!index.count(setting)) {
      index[setting] = groups.size();
      groups.push_back(Group{setting, {}});
    }
    groups[index[setting]].jobs.push_back(&job);
  }
  std::ostringstream b;
  b << "<header>\n<h1>" << Escape(sweep.id) << (config_name.empty() ? "" : " &middot; " + Escape(config_name))
    << "</h1>\n<p class=\"sub\">" << sweep.jobs.size() << " jobs:";
  for (const auto& [state, n] : states) b << " " << n << " " << Escape(state.empty() ? "local" : state) << ";";
  b << " " << groups.size() << " settings with succeeded jobs &middot; data from " << Escape(sweep.source)
    << "</p>\n</header>\n";

  // The compare table: what `graft compare` prints, with the job pages linked.
  b << "<section id=\"compare\">\n<h2>Settings compared</h2>\n<table id=\"compare-table\">\n<thead><tr><th>setting</th>"
       "<th class=\"num\">seeds</th><th class=\"num\">task accuracy, mean</th><th class=\"num\">95% low</th><th "
       "class=\"num\">95% high</th><th class=\"num\">IIA changed, mean</th><th class=\"num\">95% low</th><th "
       "class=\"num\">95% high</th><th>jobs</th></tr></thead>\n<tbody>\n";
  auto link = [&](const RunReport& job) {
    auto it = sweep.job_pages.find(job.id);
    return it == sweep.job_pages.end() ? Escape(job.id)
                                       : "<a href=\"" + Escape(it->second) + "\">" + Escape(job.id) + "</a>";
  };
  for (const auto& g : groups) {
    std::vector<double> acc, iia;
    for (const RunReport* j : g.jobs) {
      const double a = NumberAt(j->result, "acc_held_out.value"), c = NumberAt(j->result, "iia_changed_held_out.value");
      if (std::isfinite(a)) acc.push_back(a);
      if (std::isfinite(c)) iia.push_back(c);
    }
    const MeanInterval ma = MeanWithInterval(acc), mi = MeanWithInterval(iia);
    auto cells = [](const MeanInterval& m, const std::string& field) {
      return "<td class=\"num\" data-field=\"" + field + ".mean\">" + (m.n ? Fixed3(m.mean) : "-") +
             "</td><td class=\"num\" data-field=\"" + field + ".lo\">" + (m.has_interval ? Fixed3(m.lo) : "-") +
             "</td><td class=\"num\" data-field=\"" + field + ".hi\">" + (m.has_interval ? Fixed3(m.hi) : "-") + "</td>";
    };
    b << "<tr data-setting=\"" << Escape(g.setting) << "\"><td>" << Escape(g.setting) << "</td><td class=\"num\" "
      << "data-field=\"seeds\">" << g.jobs.size() << "</td>" << cells(ma, "acc_held_out")
      << cells(mi, "iia_changed_held_out") << "<td>";
    for (size_t i = 0; i < g.jobs.size(); ++i) b << (i ? " " : "") << link(*g.jobs[i]);
    b << "</td></tr>\n";
  }
  b << "</tbody>\n</table>\n<p class=\"note\">Per setting (the job name without its seed), the mean over seeds of each "
       "job's final held-out value with the 95% Student-t interval mean &plusmn; t(0.975, n&minus;1)&middot;sd/&radic;n, "
       "as <code>graft compare</code> gives it; not clipped to [0, 1]. One seed gives no interval.</p>\n";
  if (!left_out.empty()) {
    b << "<p>Left out (not succeeded):";
    for (const RunReport* j : left_out) b << " " << link(*j) << " (" << Escape(j->state) << ")";
    b << "</p>\n";
  }
  b << "</section>\n";

  // Mean curves over seeds, every seed's curve faint behind its setting's mean.
  double x_max = 1;
  for (const auto& g : groups) {
    for (const RunReport* j : g.jobs) x_max = std::max(x_max, LastStep(j->points));
  }
  b << "<section id=\"curves\">\n<h2>Curves over seeds</h2>\n<p class=\"note\">Per setting: the mean over its seeds at "
       "each evaluation step with its 95% Student-t band (where two or more seeds have that step), and each seed's "
       "own curve as a thin pale line behind it.</p>\n";
  for (const auto& [metric, title] : std::vector<std::pair<std::string, std::string>>{
           {"iia_changed_held_out", "IIA on changed cases, held out"}, {"acc_held_out", "Task accuracy, held out"}}) {
    LineChart c;
    c.title = title + ", mean over seeds";
    c.x_label = "training step (optimiser steps)";
    c.y_label = metric == "acc_held_out" ? "accuracy (fraction)" : "IIA (fraction)";
    c.x_max = x_max;
    int i = 0;
    for (const auto& g : groups) {
      std::map<double, std::vector<double>> by_step;
      for (const RunReport* j : g.jobs) {
        Series seed;
        seed.key = metric + "|" + g.setting + "|" + j->id;
        seed.colour = i;
        seed.faint = true;
        for (const auto& p : j->points) {
          const double step = NumberAt(p, "step"), v = NumberAt(p, metric + ".value");
          seed.x.push_back(step);
          seed.y.push_back(v);
          if (std::isfinite(v)) by_step[step].push_back(v);
        }
        c.series.push_back(std::move(seed));
      }
      Series mean;
      mean.key = metric + "|" + g.setting;
      mean.label = g.setting + " (" + std::to_string(g.jobs.size()) + " seeds)";
      mean.colour = i;
      mean.dash = i;
      for (const auto& [step, values] : by_step) {
        const MeanInterval m = MeanWithInterval(values);
        mean.x.push_back(step);
        mean.y.push_back(m.mean);
        mean.lo.push_back(m.has_interval ? m.lo : kNaN);
        mean.hi.push_back(m.has_interval ? m.hi : kNaN);
      }
      if (!mean.y.empty()) {
        const MeanInterval m = MeanWithInterval(by_step.rbegin()->second);
        mean.note = "last " + Fixed3(m.mean) + (m.has_interval ? " [" + Fixed3(m.lo) + ", " + Fixed3(m.hi) + "]" : "");
      }
      c.series.push_back(std::move(mean));
      ++i;
    }
    // A t band can leave [0, 1] with few seeds; the plot shows it to the frame's edge.
    for (auto& s : c.series) {
      for (auto* v : {&s.lo, &s.hi}) {
        for (double& x : *v) {
          if (std::isfinite(x)) x = std::clamp(x, 0.0, 1.0);
        }
      }
    }
    b << RenderLineChart(c);
  }
  b << "</section>\n";

  // One small multiple per swept key: the final changed-case IIA against the key's values, one
  // series per combination of the other keys.
  std::vector<std::string> keys;
  for (const auto& g : groups) {
    for (const auto& [k, v] : VariedSettings(g.setting + "/seed=0")) {
      if (std::find(keys.begin(), keys.end(), k) == keys.end()) keys.push_back(k);
    }
  }
  if (!keys.empty()) {
    b << "<section id=\"by-key\">\n<h2>Final changed-case IIA by swept setting</h2>\n<p class=\"note\">One panel per "
         "swept key: the mean over seeds of the final IIA on changed cases for each value of the key, with its 95% "
         "Student-t interval, one series per combination of the other keys; pale dots are the seeds.</p>\n<div "
         "class=\"figures\">\n";
    for (const auto& key : keys) {
      std::vector<std::string> values;
      std::vector<std::string> others;
      std::map<std::pair<std::string, std::string>, std::vector<double>> cells;  // (others, value) -> finals
      for (const auto& g : groups) {
        std::string value, rest;
        for (const auto& [k, v] : VariedSettings(g.setting + "/seed=0")) {
          if (k == key) {
            value = v;
          } else {
            rest += (rest.empty() ? "" : ",") + k + "=" + v;
          }
        }
        if (std::find(values.begin(), values.end(), value) == values.end()) values.push_back(value);
        if (std::find(others.begin(), others.end(), rest) == others.end()) others.push_back(rest);
        for (const RunReport* j : g.jobs) {
          const double v = NumberAt(j->result, "iia_changed_held_out.value");
          if (std::isfinite(v)) cells[{rest, value}].push_back(v);
        }
      }
      std::vector<double> numeric(values.size());
      bool all_numeric = true;
      for (size_t i = 0; i < values.size(); ++i) all_numeric = all_numeric && AsNumber(values[i], &numeric[i]);
      if (all_numeric) {
        std::vector<size_t> order(values.size());
        for (size_t i = 0; i < order.size(); ++i) order[i] = i;
        std::sort(order.begin(), order.end(), [&](size_t a, size_t c) { return numeric[a] < numeric[c]; });
        std::vector<std::string> sorted;
        for (size_t i : order) sorted.push_back(values[i]);
        values = sorted;
      }
      PointChart pc;
      pc.title = key;
      pc.x_label = key + " (swept value)";
      pc.y_label = "IIA, changed (fraction)";
      pc.categories = values;
      int si = 0;
      for (const auto& rest : others) {
        PointSeries ps;
        ps.key = key + "|" + rest;
        ps.label = rest.empty() ? "mean over seeds" : rest;
        ps.colour = si;
        ps.dash = si;
        for (const auto& value : values) {
          auto it = cells.find({rest, value});
          if (it == cells.end()) {
            ps.y.push_back(kNaN);
            ps.lo.push_back(kNaN);
            ps.hi.push_back(kNaN);
            ps.dots.emplace_back();
            continue;
          }
          const MeanInterval m = MeanWithInterval(it->second);
          ps.y.push_back(m.mean);
          ps.lo.push_back(m.has_interval ? m.lo : kNaN);
          ps.hi.push_back(m.has_interval ? m.hi : kNaN);
          ps.dots.push_back(it->second);
        }
        pc.series.push_back(std::move(ps));
        ++si;
      }
      b << "<div>" << RenderPointChart(pc) << "</div>\n";
    }
    b << "</div>\n</section>\n";
  }

  b << "<section id=\"jobs\">\n<h2>Jobs</h2>\n<table id=\"jobs-table\">\n<thead><tr><th>job</th><th>name</th>"
       "<th>state</th><th class=\"num\">steps</th><th class=\"num\">task accuracy</th><th class=\"num\">IIA, "
       "changed</th></tr></thead>\n<tbody>\n";
  for (const auto& job : sweep.jobs) {
    const json& last = job.result.is_object() ? job.result : (job.points.empty() ? json::object() : job.points.back());
    const json* acc = AccuracyAt(last, "acc_held_out");
    const json* iia = AccuracyAt(last, "iia_changed_held_out");
    b << "<tr data-job=\"" << Escape(job.id) << "\"><td>" << link(job) << "</td><td>" << Escape(job.name) << "</td><td>"
      << Escape(job.state) << (job.end_reason.empty() ? "" : ": " + Escape(job.end_reason)) << "</td><td class=\"num\">"
      << static_cast<long long>(LastStep(job.points)) << "</td><td class=\"num\">" << (acc ? IntervalText(*acc) : "-")
      << "</td><td class=\"num\">" << (iia ? IntervalText(*iia) : "-") << "</td></tr>\n";
  }
  b << "</tbody>\n</table>\n</section>\n" << kCaution;
  return Page(sweep.id + " " + config_name + ": graft sweep report", b.str());
}

absl::StatusOr<RunReport> LoadRunDirectory(const std::string& dir) {
  RunReport run;
  run.id = fs::path(dir).filename().string();
  if (run.id.empty()) run.id = fs::path(dir).parent_path().filename().string();
  run.source = "run directory " + dir;
  auto read = [&](const std::string& name, std::string* text) {
    std::ifstream in(fs::path(dir) / name, std::ios::binary);
    if (!in) return false;
    std::ostringstream ss;
    ss << in.rdbuf();
    *text = ss.str();
    return true;
  };
  auto lines = [&](const std::string& name, std::vector<json>* out) -> absl::Status {
    std::string text;
    if (!read(name, &text)) return absl::OkStatus();
    std::stringstream in(text);
    std::string line;
    int number = 0;
    while (std::getline(in, line)) {
      ++number;
      if (line.empty()) continue;
      json v = json::parse(line, nullptr, false);
      if (v.is_discarded()) {
        return absl::InvalidArgumentError((fs::path(dir) / name).string() + ":" + std::to_string(number) +
                                          ": not a JSON line");
      }
      out->push_back(std::move(v));
    }
    return absl::OkStatus();
  };
  std::string text;
  const bool has_metrics = fs::exists(fs::path(dir) / "metrics.jsonl");
  if (absl::Status st = lines("metrics.jsonl", &run.points); !st.ok()) return st;
  std::stable_sort(run.points.begin(), run.points.end(),
                   [](const json& a, const json& c) { return NumberAt(a, "step") < NumberAt(c, "step"); });
  if (read("result.json", &text)) {
    run.result = json::parse(text, nullptr, false);
    if (run.result.is_discarded()) return absl::InvalidArgumentError((fs::path(dir) / "result.json").string() + ": not JSON");
  }
  if (!has_metrics && run.result.is_null()) {
    return absl::NotFoundError(dir + " holds neither metrics.jsonl nor result.json; is it a run directory written by "
                                     "`graft-worker run` or `graft fetch`?");
  }
  read("spec.yaml", &run.spec_yaml);
  if (absl::Status st = lines("failures.jsonl", &run.failures); !st.ok()) return st;
  read("scan.svg", &run.scan_svg);
  for (auto [name, target] : {std::pair<const char*, json*>{"scan.json", &run.scan}, {"das.json", &run.das}}) {
    if (read(name, &text)) {
      *target = json::parse(text, nullptr, false);
      if (target->is_discarded()) *target = json();
    }
  }
  run.name = ReadFacts(run.spec_yaml).name;
  return run;
}

absl::StatusOr<std::string> WriteReportPage(const std::string& out_dir, const std::string& html) {
  std::error_code ec;
  fs::create_directories(out_dir, ec);
  if (ec) return absl::UnavailableError("cannot create '" + out_dir + "': " + ec.message());
  const std::string path = (fs::path(out_dir) / "index.html").string();
  const std::string part = path + ".part";
  {
    std::ofstream out(part, std::ios::binary | std::ios::trunc);
    out << html;
    out.close();
    if (!out) {
      fs::remove(part, ec);
      return absl::UnavailableError("cannot write '" + part + "'");
    }
  }
  fs::rename(part, path, ec);
  if (ec) return absl::UnavailableError("cannot write '" + path + "': " + ec.message());
  return path;
}

}  // namespace graft::client
