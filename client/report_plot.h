// The charts of graft's HTML reports as inline SVG text: curves with their interval bands, faint
// per-seed curves, horizontal reference lines, and points with error bars over named categories.
// One palette and one set of sizes for every chart, chosen for print and colour-blind readers
// (README "Reports"). Everything here turns numbers into text; nothing reads or writes files.
// Thread-safety: pure functions.
#ifndef GRAFT_CLIENT_REPORT_PLOT_H_
#define GRAFT_CLIENT_REPORT_PLOT_H_

#include <string>
#include <vector>

namespace graft::client {

// The report palette: eight colours, blue and orange first, that differ in lightness as well as
// hue, so every pair stays apart under simulated protanopia, deuteranopia and tritanopia
// (tests/python/check_palette.py) and in grey-scale print. Every series also differs from its
// neighbours by dash pattern, so colour is never the only cue. Index wraps around.
const std::string& PaletteColour(int index);
// The stroke-dasharray of dash pattern `index` ("" for solid); wraps around.
const std::string& DashPattern(int index);

// "&amp;" etc. for text and attribute values.
std::string HtmlEscape(const std::string& text);
// "%.3f", or "-" for NaN.
std::string Fixed3(double value);

// One curve of a line chart. Points with NaN y are gaps. With `lo`/`hi` (same length as `x`)
// its interval is drawn as a band behind it; `faint` draws a thin pale line without band or
// legend entry (one seed of a sweep behind the mean curve).
struct Series {
  std::string key;    // data-series attribute: the metric's dotted name, e.g. "iia_by_set.local"
  std::string label;  // legend text
  int colour = 0;     // palette index
  int dash = 0;       // dash pattern index
  std::vector<double> x, y, lo, hi;
  bool faint = false;
  std::string note;   // appended to the legend entry (e.g. the last value and its interval)
};

// A horizontal line across the plot: a control or a floor.
struct ReferenceLine {
  std::string key;    // data-reference attribute, e.g. "unchanged_floor"
  std::string label;  // written at the line's right end and in the legend
  double y = 0;
  int colour = -1;    // palette index; -1: the reference grey
  int dash = 1;
};

struct LineChart {
  std::string title;
  std::string x_label;  // with its unit, e.g. "training step (optimiser steps)"
  std::string y_label;
  double x_min = 0, x_max = 1;
  double y_min = 0, y_max = 1;
  std::vector<Series> series;
  std::vector<ReferenceLine> references;
  int width = 760;   // px of the whole figure
  int height = 300;  // px of the plot area's frame, without the legend
};

// The figure as one <svg class="chart"> element: axes with ticks and labels, the bands, the faint
// curves, the curves (each a <polyline class="curve" data-series="KEY">, one per series that is
// not faint, with one vertex per finite point), the reference lines (<line class="reference"
// data-reference="KEY">) and a legend below the plot.
std::string RenderLineChart(const LineChart& chart);

// Points with error bars over named categories (a swept key's values, or the figures of DAS).
struct PointSeries {
  std::string key;
  std::string label;
  int colour = 0;
  int dash = 0;
  std::vector<double> y, lo, hi;        // one per category; NaN: no point; lo/hi NaN: no interval
  std::vector<std::vector<double>> dots;  // per category: faint dots (one per seed) behind it
};
struct PointChart {
  std::string title;
  std::string x_label;
  std::string y_label;
  std::vector<std::string> categories;
  double y_min = 0, y_max = 1;
  std::vector<PointSeries> series;
  std::vector<ReferenceLine> references;
  int width = 340;
  int height = 220;
  bool connect = true;  // join a series' points with a thin line (ordered categories)
};
// One <svg class="chart points">: each series a <g class="point-series" data-series="KEY"> with one
// <circle> per point and an error bar (<line class="interval">) where it has an interval.
std::string RenderPointChart(const PointChart& chart);

// "Nice" tick positions covering [lo, hi], about `target` of them.
std::vector<double> NiceTicks(double lo, double hi, int target);

}  // namespace graft::client

#endif  // GRAFT_CLIENT_REPORT_PLOT_H_
