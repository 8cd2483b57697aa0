// graft's HTML reports: one self-contained page per job (curves with Wilson bands, controls,
// confusion tables, failing triples, the resolved spec and provenance, scan and DAS figures) and
// per sweep (mean curves over seeds with t bands, the compare table, one small multiple per swept
// key, links to the job pages). Inline SVG and CSS only: no script, no font, no image and no link
// outside the page but the sweep's links to its job pages. `graft report` (client) and
// `graft-worker report` (a local run directory) both render through here.
// Thread-safety: pure functions, except the file writes named as such.
#ifndef GRAFT_CLIENT_REPORT_H_
#define GRAFT_CLIENT_REPORT_H_

#include <map>
#include <ostream>
#include <string>
#include <vector>

#include "absl/status/status.h"
#include "absl/status/statusor.h"
#include "nlohmann/json.hpp"

namespace graft::client {

// What a job's page shows. Every JSON value holds today's key names (older stored runs are
// renamed by the caller, e.g. with ParseMetrics in render.h).
struct RunReport {
  std::string id;            // "j-4", or the run directory's name
  std::string name;          // the job's name ("parcel-routing/interchange=0/seed=1")
  std::string state;         // "succeeded", "running", ...; "" for a local run directory
  std::string end_reason;    // why it failed or was cancelled; "" otherwise
  std::string source;        // where the data came from ("graftd at HOST:PORT", "run directory DIR")
  std::string spec_yaml;     // the resolved spec
  std::vector<nlohmann::ordered_json> points;  // metrics objects (one metrics.jsonl line each), by step
  nlohmann::ordered_json result;               // result.json; null while there is none
  std::vector<nlohmann::ordered_json> failures;  // failures.jsonl lines
  std::string scan_svg;        // scan.svg; "" when the run has no scan
  nlohmann::ordered_json scan;   // scan.json; null when absent
  nlohmann::ordered_json das;    // das.json; null when absent
};

struct SweepReport {
  std::string id;      // "s-3"
  std::string source;
  std::vector<RunReport> jobs;             // in id order
  std::map<std::string, std::string> job_pages;  // job id -> href of its page, for those written
};

// The setting a sweep job belongs to: its name without a trailing "/seed=N" segment.
std::string SettingOf(const std::string& job_name);
// The varied settings in a sweep job's name: "parcel-routing/interchange=0,layer=1/seed=2" gives
// {{"interchange", "0"}, {"layer", "1"}} (the seed is not among them).
std::vector<std::pair<std::string, std::string>> VariedSettings(const std::string& job_name);

// The pages as HTML text.
std::string RenderJobReport(const RunReport& run);
std::string RenderSweepReport(const SweepReport& sweep);

// Reads a run directory written by `graft-worker run` (or fetched by `graft fetch`): spec.yaml,
// metrics.jsonl, result.json, failures.jsonl and, when present, scan.svg, scan.json, das.json.
// NotFound when it holds neither metrics.jsonl nor result.json; InvalidArgument naming the file
// and line of a line that is not JSON.
absl::StatusOr<RunReport> LoadRunDirectory(const std::string& dir);

// Writes `html` to DIR/index.html (creating DIR), through a temporary file renamed into place.
// Returns the path written. Unavailable naming the path when it cannot be written.
absl::StatusOr<std::string> WriteReportPage(const std::string& out_dir, const std::string& html);

}  // namespace graft::client

#endif  // GRAFT_CLIENT_REPORT_H_
