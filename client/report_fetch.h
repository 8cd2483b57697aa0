// Gathers what a report page shows about one job from graftd: the job, its stored points and its
// text artifacts (failures.jsonl, scan.svg, scan.json, das.json), each download checked against
// its SHA-256. Thread-safety: as the Api it is given (one thread at a time).
#ifndef GRAFT_CLIENT_REPORT_FETCH_H_
#define GRAFT_CLIENT_REPORT_FETCH_H_

#include <string>

#include <grpcpp/grpcpp.h>

#include "client/api.h"
#include "client/report.h"

namespace graft::client {

// Fills `run` for `job_id`. Artifacts graftd does not hold (NOT_FOUND: a job still running, a
// job without a scan) are left empty; any other failed call is returned as is, and a download
// whose bytes do not match its SHA-256 is DATA_LOSS naming the artifact. `server` is recorded as
// the page's source.
grpc::Status FetchRunReport(Api& api, const std::string& job_id, const std::string& server, RunReport* run);

}  // namespace graft::client

#endif  // GRAFT_CLIENT_REPORT_FETCH_H_
