#include "client/report_fetch.h"

#include <sstream>

#include "client/render.h"
#include "proto/sha256.h"

namespace graft::client {
namespace {

using json = nlohmann::ordered_json;

// The artifact's bytes; NOT_FOUND passes through so the caller can leave it out.
grpc::Status DownloadText(Api& api, const std::string& job_id, const std::string& name, std::string* text) {
  graft::Sha256 sha;
  std::string want_sha;
  int64_t total = -1;
  text->clear();
  grpc::Status s = api.Download(job_id, name, [&](const v1::ArtifactChunk& c) {
    if (!c.sha256().empty()) {
      want_sha = c.sha256();
      total = c.total_bytes();
    }
    sha.Update(c.data());
    text->append(c.data());
    return true;
  });
  if (!s.ok()) return s;
  const std::string have = sha.HexDigest();
  if (static_cast<int64_t>(text->size()) != total || have != want_sha) {
    return grpc::Status(grpc::StatusCode::DATA_LOSS, name + " of " + job_id + " arrived damaged: " +
                                                         std::to_string(text->size()) + " bytes with SHA-256 " + have +
                                                         ", expected " + std::to_string(total) + " bytes with " +
                                                         want_sha + "; try again");
  }
  return grpc::Status::OK;
}

}  // namespace

grpc::Status FetchRunReport(Api& api, const std::string& job_id, const std::string& server, RunReport* run) {
  v1::Job job;
  grpc::Status s = api.GetJob(job_id, &job);
  if (!s.ok()) return s;
  run->id = job.id();
  run->name = job.name();
  run->state = StateName(job.state());
  run->end_reason = EndReason(job);
  run->source = "graftd at " + server;
  run->spec_yaml = job.spec_yaml();
  if (!job.result_json().empty()) run->result = ParseMetrics(job.result_json());
  if (run->result.is_discarded()) run->result = json();
  std::vector<v1::Point> points;
  s = api.GetMetrics(job_id, &points);
  if (!s.ok()) return s;
  for (const auto& p : points) {
    json m = ParseMetrics(p.metrics_json());
    if (!m.is_object()) continue;
    m["step"] = p.step();
    run->points.push_back(std::move(m));
  }
  std::string text;
  for (const char* name : {"failures.jsonl", "scan.svg", "scan.json", "das.json"}) {
    s = DownloadText(api, job_id, name, &text);
    if (s.error_code() == grpc::StatusCode::NOT_FOUND) continue;
    if (!s.ok()) return s;
    const std::string n = name;
    if (n == "failures.jsonl") {
      std::stringstream in(text);
      std::string line;
      while (std::getline(in, line)) {
        json f = json::parse(line, nullptr, false);
        if (f.is_object()) run->failures.push_back(std::move(f));
      }
    } else if (n == "scan.svg") {
      run->scan_svg = text;
    } else {
      json v = json::parse(text, nullptr, false);
      (n == "scan.json" ? run->scan : run->das) = v.is_discarded() ? json() : v;
    }
  }
  return grpc::Status::OK;
}

}  // namespace graft::client
