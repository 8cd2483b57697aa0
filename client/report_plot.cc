#include "client/report_plot.h"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <sstream>

namespace graft::client {
namespace {

// Sizes shared by every figure (px at 96 per inch): 12 px text is about 9 pt when a 680 px
// figure is printed 180 mm wide.
constexpr int kFont = 12;
constexpr int kSmallFont = 11;
constexpr int kLeft = 56;     // room for the y tick labels and the y axis title
constexpr int kRight = 200;   // room for the reference labels at the lines' right ends
constexpr int kTop = 28;      // the title
constexpr int kBottom = 44;   // x tick labels and the x axis title
constexpr int kLegendRow = 18;
const char* const kInk = "#222222";
const char* const kGrid = "#e4e4e4";
const char* const kReferenceGrey = "#5f5f5f";

std::string Num(double v) {
  char buf[32];
  std::snprintf(buf, sizeof(buf), "%.1f", v);
  return buf;
}

std::string TickText(double v) {
  char buf[32];
  if (std::fabs(v - std::round(v)) < 1e-9) {
    std::snprintf(buf, sizeof(buf), "%.0f", v);
  } else {
    std::snprintf(buf, sizeof(buf), "%g", v);
  }
  return buf;
}

struct Frame {
  double x0, x1, y0, y1;  // data range
  int left, top, width, height;  // plot area in px
  double X(double x) const { return left + (x1 > x0 ? (x - x0) / (x1 - x0) : 0.5) * width; }
  double Y(double y) const { return top + height - (y1 > y0 ? (y - y0) / (y1 - y0) : 0.5) * height; }
};

void Axes(std::ostringstream& s, const Frame& f, const std::vector<double>& xticks,
          const std::vector<std::string>& xtick_labels, const std::string& x_label, const std::string& y_label) {
  for (double t : NiceTicks(f.y0, f.y1, 5)) {
    const double y = f.Y(t);
    s << "<line class=\"grid\" x1=\"" << f.left << "\" x2=\"" << f.left + f.width << "\" y1=\"" << Num(y)
      << "\" y2=\"" << Num(y) << "\" stroke=\"" << kGrid << "\" stroke-width=\"1\"/>\n";
    s << "<text x=\"" << f.left - 6 << "\" y=\"" << Num(y + 4) << "\" text-anchor=\"end\" font-size=\"" << kSmallFont
      << "\">" << TickText(t) << "</text>\n";
  }
  for (size_t i = 0; i < xticks.size(); ++i) {
    const double x = f.X(xticks[i]);
    s << "<line x1=\"" << Num(x) << "\" x2=\"" << Num(x) << "\" y1=\"" << f.top + f.height << "\" y2=\""
      << f.top + f.height + 4 << "\" stroke=\"" << kInk << "\"/>\n";
    s << "<text x=\"" << Num(x) << "\" y=\"" << f.top + f.height + 17 << "\" text-anchor=\"middle\" font-size=\""
      << kSmallFont << "\">" << HtmlEscape(xtick_labels[i]) << "</text>\n";
  }
  s << "<rect x=\"" << f.left << "\" y=\"" << f.top << "\" width=\"" << f.width << "\" height=\"" << f.height
    << "\" fill=\"none\" stroke=\"" << kInk << "\" stroke-width=\"1\"/>\n";
  s << "<text class=\"axis-label\" x=\"" << f.left + f.width / 2 << "\" y=\"" << f.top + f.height + 36
    << "\" text-anchor=\"middle\" font-size=\"" << kFont << "\">" << HtmlEscape(x_label) << "</text>\n";
  const int cy = f.top + f.height / 2;
  s << "<text class=\"axis-label\" x=\"14\" y=\"" << cy << "\" text-anchor=\"middle\" font-size=\"" << kFont
    << "\" transform=\"rotate(-90 14 " << cy << ")\">" << HtmlEscape(y_label) << "</text>\n";
}

std::string StrokeDash(int dash) {
  const std::string& d = DashPattern(dash);
  return d.empty() ? "" : " stroke-dasharray=\"" + d + "\"";
}

// Runs of consecutive finite points, so a missing value leaves a gap instead of a false segment.
std::vector<std::vector<size_t>> FiniteRuns(const std::vector<double>& x, const std::vector<double>& y) {
  std::vector<std::vector<size_t>> runs(1);
  for (size_t i = 0; i < x.size() && i < y.size(); ++i) {
    if (std::isfinite(x[i]) && std::isfinite(y[i])) {
      runs.back().push_back(i);
    } else if (!runs.back().empty()) {
      runs.emplace_back();
    }
  }
  if (runs.back().empty()) runs.pop_back();
  return runs;
}

std::string ReferenceColour(int colour) { return colour < 0 ? kReferenceGrey : PaletteColour(colour); }

void LegendLine(std::ostringstream& s, int x, int y, const std::string& colour, int dash, double width,
                const std::string& text) {
  s << "<line x1=\"" << x << "\" x2=\"" << x + 26 << "\" y1=\"" << y - 4 << "\" y2=\"" << y - 4 << "\" stroke=\""
    << colour << "\" stroke-width=\"" << width << "\"" << StrokeDash(dash) << "/>\n";
  s << "<text x=\"" << x + 32 << "\" y=\"" << y << "\" font-size=\"" << kSmallFont << "\">" << HtmlEscape(text)
    << "</text>\n";
}

struct LegendEntry {
  int colour;
  int dash;
  double width;
  std::string text;
};

// One row per entry, then one per reference line, from `y` down.
void Legend(std::ostringstream& s, int y, const std::vector<LegendEntry>& entries,
            const std::vector<ReferenceLine>& references) {
  for (const auto& e : entries) {
    LegendLine(s, kLeft, y, PaletteColour(e.colour), e.dash, e.width, e.text);
    y += kLegendRow;
  }
  for (const auto& ref : references) {
    LegendLine(s, kLeft, y, ReferenceColour(ref.colour), ref.dash, 1.2, ref.label + " (reference) " + Fixed3(ref.y));
    y += kLegendRow;
  }
}

}  // namespace

const std::string& PaletteColour(int index) {
  // Checked by tests/python/check_palette.py (every pair apart under simulated colour-vision
  // deficiencies); keep the list on one line per four colours, which the check reads.
  static const std::vector<std::string> kPalette = {"#1f5aa6", "#e07b00", "#70508a", "#56a8dc",
                                                    "#8a5a44", "#5a9e4b", "#4c1a80", "#333333"};
  const int n = static_cast<int>(kPalette.size());
  return kPalette[((index % n) + n) % n];
}

const std::string& DashPattern(int index) {
  static const std::vector<std::string> kDashes = {"", "7 4", "2 3", "9 3 2 3", "4 2", "12 4"};
  const int n = static_cast<int>(kDashes.size());
  return kDashes[((index % n) + n) % n];
}

std::string HtmlEscape(const std::string& text) {
  std::string out;
  out.reserve(text.size());
  for (char c : text) {
    switch (c) {
      case '&': out += "&amp;"; break;
      case '<': out += "&lt;"; break;
      case '>': out += "&gt;"; break;
      case '"': out += "&quot;"; break;
      case '\'': out += "&#39;"; break;
      default: out += c;
    }
  }
  return out;
}

std::string Fixed3(double value) {
  if (!std::isfinite(value)) return "-";
  char buf[32];
  std::snprintf(buf, sizeof(buf), "%.3f", value);
  return buf;
}

std::vector<double> NiceTicks(double lo, double hi, int target) {
  if (!(hi > lo)) return {lo};
  const double raw = (hi - lo) / std::max(1, target);
  const double mag = std::pow(10.0, std::floor(std::log10(raw)));
  double step = mag;
  for (double m : {1.0, 2.0, 2.5, 5.0, 10.0}) {
    if (m * mag >= raw) {
      step = m * mag;
      break;
    }
  }
  std::vector<double> ticks;
  for (double t = std::ceil(lo / step - 1e-9) * step; t <= hi + step * 1e-9; t += step) {
    ticks.push_back(std::fabs(t) < step * 1e-9 ? 0.0 : t);
  }
  return ticks;
}

std::string RenderLineChart(const LineChart& c) {
  Frame f{c.x_min, c.x_max, c.y_min, c.y_max, kLeft, kTop, c.width - kLeft - kRight, c.height - kTop - kBottom};
  std::vector<const Series*> legend;
  for (const auto& s : c.series) {
    if (!s.faint) legend.push_back(&s);
  }
  const int legend_rows = static_cast<int>(legend.size() + c.references.size());
  const int total_height = c.height + legend_rows * kLegendRow + 8;
  std::ostringstream s;
  s << "<svg class=\"chart\" xmlns=\"http://www.w3.org/2000/svg\" width=\"" << c.width << "\" height=\""
    << total_height << "\" viewBox=\"0 0 " << c.width << " " << total_height << "\" role=\"img\" aria-label=\""
    << HtmlEscape(c.title) << "\">\n";
  s << "<text class=\"chart-title\" x=\"" << kLeft << "\" y=\"17\" font-size=\"13\" font-weight=\"bold\">"
    << HtmlEscape(c.title) << "</text>\n";
  const std::vector<double> xticks = NiceTicks(c.x_min, c.x_max, 6);
  std::vector<std::string> xlabels;
  for (double t : xticks) xlabels.push_back(TickText(t));
  Axes(s, f, xticks, xlabels, c.x_label, c.y_label);
  // Bands first, then faint curves, then curves, so every curve is on top of every band.
  for (const auto& ser : c.series) {
    if (ser.faint || ser.lo.size() != ser.x.size() || ser.hi.size() != ser.x.size()) continue;
    for (const auto& run : FiniteRuns(ser.x, ser.lo)) {
      std::ostringstream pts;
      bool ok = true;
      for (size_t i : run) ok = ok && std::isfinite(ser.hi[i]);
      if (!ok || run.empty()) continue;
      for (size_t i : run) pts << Num(f.X(ser.x[i])) << "," << Num(f.Y(ser.hi[i])) << " ";
      for (auto it = run.rbegin(); it != run.rend(); ++it) pts << Num(f.X(ser.x[*it])) << "," << Num(f.Y(ser.lo[*it])) << " ";
      s << "<polygon class=\"band\" data-series=\"" << HtmlEscape(ser.key) << "\" points=\"" << pts.str()
        << "\" fill=\"" << PaletteColour(ser.colour) << "\" fill-opacity=\"0.16\" stroke=\"none\"/>\n";
    }
  }
  for (const auto& ser : c.series) {
    if (!ser.faint) continue;
    for (const auto& run : FiniteRuns(ser.x, ser.y)) {
      s << "<polyline class=\"seed-curve\" data-series=\"" << HtmlEscape(ser.key) << "\" points=\"";
      for (size_t i : run) s << Num(f.X(ser.x[i])) << "," << Num(f.Y(ser.y[i])) << " ";
      s << "\" fill=\"none\" stroke=\"" << PaletteColour(ser.colour) << "\" stroke-opacity=\"0.35\" stroke-width=\"1\"/>\n";
    }
  }
  for (const auto& ref : c.references) {
    if (!std::isfinite(ref.y)) continue;
    const double y = f.Y(std::clamp(ref.y, c.y_min, c.y_max));
    s << "<line class=\"reference\" data-reference=\"" << HtmlEscape(ref.key) << "\" data-value=\"" << ref.y
      << "\" x1=\"" << f.left << "\" x2=\"" << f.left + f.width << "\" y1=\"" << Num(y) << "\" y2=\"" << Num(y)
      << "\" stroke=\"" << ReferenceColour(ref.colour) << "\" stroke-width=\"1.2\"" << StrokeDash(ref.dash) << "/>\n";
  }
  for (const auto& ser : c.series) {
    if (ser.faint) continue;
    // One polyline per series; a gap (NaN) splits it into a path of several moves instead.
    const auto runs = FiniteRuns(ser.x, ser.y);
    s << "<polyline class=\"curve\" data-series=\"" << HtmlEscape(ser.key) << "\" data-label=\""
      << HtmlEscape(ser.label) << "\" points=\"";
    for (const auto& run : runs) {
      for (size_t i : run) s << Num(f.X(ser.x[i])) << "," << Num(f.Y(ser.y[i])) << " ";
    }
    s << "\" fill=\"none\" stroke=\"" << PaletteColour(ser.colour) << "\" stroke-width=\"2\" stroke-linejoin=\"round\""
      << StrokeDash(ser.dash) << "/>\n";
  }
  // Reference labels at the right end, nudged apart when two lines are close.
  std::vector<std::pair<double, const ReferenceLine*>> labels;
  for (const auto& ref : c.references) {
    if (std::isfinite(ref.y)) labels.emplace_back(f.Y(std::clamp(ref.y, c.y_min, c.y_max)), &ref);
  }
  std::sort(labels.begin(), labels.end(), [](const auto& a, const auto& b) { return a.first < b.first; });
  double last = -1e9;
  for (auto& [y, ref] : labels) {
    const double at = std::max(y + 4, last + kSmallFont + 1);
    last = at;
    s << "<text x=\"" << f.left + f.width + 4 << "\" y=\"" << Num(at) << "\" font-size=\"" << kSmallFont
      << "\" fill=\"" << ReferenceColour(ref->colour) << "\">" << HtmlEscape(ref->label) << " " << Fixed3(ref->y)
      << "</text>\n";
  }
  std::vector<LegendEntry> entries;
  for (const Series* ser : legend) {
    entries.push_back({ser->colour, ser->dash, 2, ser->label + (ser->note.empty() ? "" : "  " + ser->note)});
  }
  Legend(s, c.height + 10, entries, c.references);
  s << "</svg>\n";
  return s.str();
}

std::string RenderPointChart(const PointChart& c) {
  const int n = static_cast<int>(c.categories.size());
  Frame f{-0.5, n - 0.5, c.y_min, c.y_max, kLeft, kTop, c.width - kLeft - 16, c.height - kTop - kBottom};
  const int legend_rows = static_cast<int>(c.series.size() + c.references.size());
  const int total_height = c.height + legend_rows * kLegendRow + 8;
  std::ostringstream s;
  s << "<svg class=\"chart points\" xmlns=\"http://www.w3.org/2000/svg\" width=\"" << c.width << "\" height=\""
    << total_height << "\" viewBox=\"0 0 " << c.width << " " << total_height << "\" role=\"img\" aria-label=\""
    << HtmlEscape(c.title) << "\">\n";
  s << "<text class=\"chart-title\" x=\"" << kLeft << "\" y=\"17\" font-size=\"13\" font-weight=\"bold\">"
    << HtmlEscape(c.title) << "</text>\n";
  std::vector<double> xticks;
  for (int i = 0; i < n; ++i) xticks.push_back(i);
  Axes(s, f, xticks, c.categories, c.x_label, c.y_label);
  for (const auto& ref : c.references) {
    if (!std::isfinite(ref.y)) continue;
    const double y = f.Y(std::clamp(ref.y, c.y_min, c.y_max));
    s << "<line class=\"reference\" data-reference=\"" << HtmlEscape(ref.key) << "\" x1=\"" << f.left << "\" x2=\""
      << f.left + f.width << "\" y1=\"" << Num(y) << "\" y2=\"" << Num(y) << "\" stroke=\"" << ReferenceColour(ref.colour)
      << "\" stroke-width=\"1.2\"" << StrokeDash(ref.dash) << "/>\n";
  }
  const int count = static_cast<int>(c.series.size());
  for (int k = 0; k < count; ++k) {
    const PointSeries& ser = c.series[k];
    const std::string colour = PaletteColour(ser.colour);
    // Series side by side within a category, so their error bars do not hide each other.
    const double offset = count > 1 ? (k - (count - 1) / 2.0) * std::min(0.5 / count, 0.12) : 0;
    s << "<g class=\"point-series\" data-series=\"" << HtmlEscape(ser.key) << "\">\n";
    for (int i = 0; i < n && i < static_cast<int>(ser.dots.size()); ++i) {
      for (double d : ser.dots[i]) {
        if (!std::isfinite(d)) continue;
        s << "<circle class=\"seed-dot\" cx=\"" << Num(f.X(i + offset) + 7) << "\" cy=\"" << Num(f.Y(d))
          << "\" r=\"2\" fill=\"" << colour << "\" fill-opacity=\"0.4\"/>\n";
      }
    }
    if (c.connect) {
      s << "<polyline points=\"";
      for (int i = 0; i < n && i < static_cast<int>(ser.y.size()); ++i) {
        if (std::isfinite(ser.y[i])) s << Num(f.X(i + offset)) << "," << Num(f.Y(ser.y[i])) << " ";
      }
      s << "\" fill=\"none\" stroke=\"" << colour << "\" stroke-width=\"1\"" << StrokeDash(ser.dash) << "/>\n";
    }
    for (int i = 0; i < n && i < static_cast<int>(ser.y.size()); ++i) {
      if (!std::isfinite(ser.y[i])) continue;
      const double x = f.X(i + offset);
      if (i < static_cast<int>(ser.lo.size()) && std::isfinite(ser.lo[i]) && std::isfinite(ser.hi[i])) {
        const double y0 = f.Y(std::clamp(ser.lo[i], c.y_min, c.y_max)), y1 = f.Y(std::clamp(ser.hi[i], c.y_min, c.y_max));
        s << "<line class=\"interval\" x1=\"" << Num(x) << "\" x2=\"" << Num(x) << "\" y1=\"" << Num(y0) << "\" y2=\""
          << Num(y1) << "\" stroke=\"" << colour << "\" stroke-width=\"1.5\"/>\n";
        for (double yy : {y0, y1}) {
          s << "<line x1=\"" << Num(x - 4) << "\" x2=\"" << Num(x + 4) << "\" y1=\"" << Num(yy) << "\" y2=\"" << Num(yy)
            << "\" stroke=\"" << colour << "\" stroke-width=\"1.5\"/>\n";
        }
      }
      s << "<circle class=\"point\" cx=\"" << Num(x) << "\" cy=\"" << Num(f.Y(ser.y[i])) << "\" r=\"3.5\" fill=\""
        << colour << "\"><title>" << HtmlEscape(ser.label) << ", " << HtmlEscape(c.categories[i]) << ": "
        << Fixed3(ser.y[i]) << "</title></circle>\n";
    }
    s << "</g>\n";
  }
  std::vector<LegendEntry> entries;
  for (const auto& ser : c.series) entries.push_back({ser.colour, ser.dash, 1.5, ser.label});
  Legend(s, c.height + 10, entries, c.references);
  s << "</svg>\n";
  return s.str();
}

}  // namespace graft::client
