// graftd and graft-worker as real processes on loopback ports the server picks, driven by a
// small C++ client: submit and finish, cancel, auth for every RPC and role, a coordinator
// killed with SIGKILL, a worker killed with SIGKILL.
#include <signal.h>

#include <chrono>
#include <fstream>
#include <iostream>
#include <map>
#include <set>
#include <sstream>
#include <thread>

#include <google/protobuf/descriptor.h>
#include <grpcpp/generic/generic_stub.h>
#include <grpcpp/grpcpp.h>

#include "absl/strings/str_cat.h"
#include "graft/v1/graft.grpc.pb.h"
#include "gtest/gtest.h"
#include "nlohmann/json.hpp"
#include "proto/sha256.h"
#include "tests/cluster.h"
#include "tests/test_util.h"

namespace graft {
namespace {

using json = nlohmann::json;
using ::graft::testing::Cluster;
using ::graft::testing::kAlice;
using ::graft::testing::kBob;
using ::graft::testing::kRoot;
using ::graft::testing::kRevoked;
using ::graft::testing::kWorker;
using ::graft::testing::kWorker2;
using ::graft::testing::BinaryDir;
using ::graft::testing::ReadFile;
using ::graft::testing::ScopedProcess;
using ::graft::testing::ScopedTempDir;
using ::graft::testing::SourceDir;
using ::graft::testing::WaitFor;
using ::graft::testing::WriteFile;

// Timings, and which steps the last process trained (resumed_from_step, steps_this_process),
// differ between a resumed and an uninterrupted run of one spec; nothing else may.
json WithoutTimings(json j) {
  for (const char* k : {"wall_s", "examples_per_s", "peak_rss_mb", "first_step_s", "train_steps_s",
                        "resumed_from_step", "steps_this_process"}) {
    j.erase(k);
  }
  if (j.contains("provenance")) j.erase("provenance");
  return j;
}

const std::vector<std::string> kSmall = {"training.steps=120", "training.batch_size=64", "evaluation.every=40",
                                         "evaluation.triples=256", "network.hidden=[32,32,32]"};

TEST(Service, SubmitTrainAndFetchArtifacts) {
  Cluster c;
  auto worker = c.StartWorker("w1");
  const std::string id = c.Submit(kAlice, "parcel-routing", kSmall);
  ASSERT_FALSE(id.empty());
  ASSERT_TRUE(c.WaitState(id, v1::JOB_STATE_SUCCEEDED, 60000)) << c.Log() << ReadFile(worker->log_path());
  v1::Job job = c.Get(id);
  EXPECT_EQ(job.attempt(), 1);
  EXPECT_EQ(job.owner(), "alice");
  EXPECT_EQ(job.step(), 120);
  json result = json::parse(job.result_json());
  EXPECT_EQ(result["steps"], 120);
  std::vector<v1::Point> points = c.Metrics(id);
  ASSERT_EQ(points.size(), 4u);  // steps 0, 40, 80, 120
  EXPECT_EQ(points.back().step(), 120);
  EXPECT_EQ(json::parse(points.back().metrics_json())["iia_held_out"], result["iia_held_out"]);
  // Download weights.pt in chunks and check its digest.
  v1::DownloadArtifactRequest req;
  req.set_job_id(id);
  req.set_name("weights.pt");
  auto ctx = c.Ctx(kAlice);
  auto reader = c.jobs().DownloadArtifact(ctx.get(), req);
  v1::ArtifactChunk chunk;
  std::string bytes, sha;
  int64_t total = -1;
  while (reader->Read(&chunk)) {
    if (!chunk.sha256().empty()) {
      sha = chunk.sha256();
      total = chunk.total_bytes();
    }
    bytes += chunk.data();
  }
  ASSERT_TRUE(reader->Finish().ok());
  EXPECT_EQ(static_cast<int64_t>(bytes.size()), total);
  EXPECT_EQ(graft::Sha256Hex(bytes), sha);
  // One log line per state change, with the job id and attempt; no token in the log.
  const std::string log = c.Log();
  EXPECT_NE(log.find("job " + id + " attempt 1: running on"), std::string::npos) << log;
  EXPECT_NE(log.find("job " + id + " attempt 1: succeeded"), std::string::npos) << log;
  for (const char* t : {kAlice, kBob, kRoot, kWorker}) EXPECT_EQ(log.find(t), std::string::npos);
}

TEST(Service, RejectsAnInvalidConfigWithItsLocation) {
  Cluster c;
  v1::SubmitJobRequest req;
  req.set_config_yaml(ReadFile(SourceDir() + "/configs/parcel-routing.yaml"));
  req.set_source_name("parcel-routing.yaml");
  req.add_overrides("training.stepz=5");
  v1::SubmitJobResponse resp;
  grpc::Status s = c.jobs().SubmitJob(c.Ctx(kAlice).get(), req, &resp);
  EXPECT_EQ(s.error_code(), grpc::StatusCode::INVALID_ARGUMENT);
  EXPECT_NE(s.error_message().find("--set #1:1:10: unknown key 'stepz' in 'training'; did you mean 'steps'?"),
            std::string::npos)
      << s.error_message();
  req.clear_overrides();
  req.set_config_yaml(std::string(2 << 20, '#'));
  s = c.jobs().SubmitJob(c.Ctx(kAlice).get(), req, &resp);
  EXPECT_EQ(s.error_code(), grpc::StatusCode::RESOURCE_EXHAUSTED) << s.error_message();
}

// The worker stops at its next report after the cancel, whatever its speed. graftd's step at the
// moment of the cancel (CancelJob's reply) is C, the last step a report brought in. The worker's
// next report is a heartbeat (at a step >= C) or, at the latest, the report of the first
// evaluation after C, which the trainer sends and waits for before it takes another step: so it
// stops at a step between C and that evaluation, and no point after it is stored.
TEST(Service, CancelStopsARunningJobAtItsNextReport) {
  Cluster c;
  auto worker = c.StartWorker("w1");
  const int64_t every = 100;
  const std::string id = c.Submit(kAlice, "parcel-routing",
                                  {"training.steps=1000000", "evaluation.every=100", "evaluation.triples=256",
                                   "training.checkpoint_every=1000000"});
  ASSERT_TRUE(WaitFor([&] { return c.Get(id).step() > 0; }, 60000)) << ReadFile(worker->log_path());
  v1::CancelJobRequest req;
  req.set_job_id(id);
  req.set_reason("changed my mind");
  v1::Job cancelled;
  ASSERT_TRUE(c.jobs().CancelJob(c.Ctx(kAlice).get(), req, &cancelled).ok());
  EXPECT_EQ(cancelled.state(), v1::JOB_STATE_CANCELLED);
  const int64_t at_cancel = cancelled.step();
  // The worker acknowledges: the stop step is added to the cancel reason, and `error`, which is
  // for failures, stays empty.
  ASSERT_TRUE(WaitFor([&] { return c.Get(id).cancel_reason().find("stopped at step ") != std::string::npos; }, 60000))
      << c.Get(id).cancel_reason() << ReadFile(worker->log_path());
  const std::string reason = c.Get(id).cancel_reason();
  EXPECT_EQ(reason.rfind("cancelled by alice: changed my mind; the worker stopped at step ", 0), 0u) << reason;
  EXPECT_EQ(c.Get(id).error(), "");
  const size_t at = reason.find("stopped at step ");
  const int64_t stopped = std::stoll(reason.substr(at + 16));
  const int64_t next_evaluation = (at_cancel / every + 1) * every;
  EXPECT_GE(stopped, at_cancel);
  EXPECT_LE(stopped, next_evaluation) << "graftd's step at the cancel " << at_cancel << ", stopped at " << stopped;
  for (const auto& p : c.Metrics(id)) EXPECT_LE(p.step(), stopped) << "a point after the stop";
  // Cancelling again is refused: the job is final.
  grpc::Status again = c.jobs().CancelJob(c.Ctx(kAlice).get(), req, &cancelled);
  EXPECT_EQ(again.error_code(), grpc::StatusCode::FAILED_PRECONDITION);
  // The worker is free for the next job.
  const std::string next = c.Submit(kAlice, "parcel-routing", kSmall);
  EXPECT_TRUE(c.WaitState(next, v1::JOB_STATE_SUCCEEDED, 60000)) << ReadFile(worker->log_path());
}

// Every RPC of both services against every kind of caller (table-driven): no token, a malformed
// header (a valid token under another scheme), an unknown token, a revoked token, a user, another
// user, a worker token, another worker token, and an admin. Each cell's expected code is written
// below (README "Who may call what" prints the same table). The calls act on alice's things: her
// job (leased by node1, which uploaded its result.json), her cancelled job and her cancelled sweep,
// and node1's workers, so a user reaching another user's things, or a worker token acting as
// another token's worker, shows up as a wrong cell. The table must name every RPC of the
// services' generated descriptors, so a new RPC fails here until added.
TEST(Service, EveryCallNeedsATokenAndTheRightRole) {
  Cluster c;
  auto& J = c.jobs();
  auto& W = c.workers();
  // Alice's job, leased by node1 (as a worker would), with an uploaded result.json.
  const std::string job = c.Submit(kAlice, "parcel-routing", kSmall);
  auto register_as = [&](const char* token) {
    v1::RegisterWorkerRequest r;
    r.set_host("table");
    v1::RegisterWorkerResponse o;
    grpc::Status s = W.RegisterWorker(c.Ctx(token).get(), r, &o);
    EXPECT_TRUE(s.ok()) << s.error_message();
    return o.worker_id();
  };
  const std::string holder = register_as(kWorker), poller = register_as(kWorker), leaving = register_as(kWorker);
  v1::LeaseJobRequest lreq;
  lreq.set_worker_id(holder);
  lreq.set_wait_ms(10000);
  v1::LeaseJobResponse lease;
  ASSERT_TRUE(W.LeaseJob(c.Ctx(kWorker).get(), lreq, &lease).ok());
  ASSERT_EQ(lease.job_id(), job);
  const std::string result = "{\"steps\": 0}";
  auto upload = [&](grpc::ClientContext* x, const std::string& name) {
    v1::UploadArtifactResponse o;
    auto wr = W.UploadArtifact(x, &o);
    v1::UploadArtifactRequest r;
    v1::ArtifactHeader* h = r.mutable_header();
    h->set_worker_id(holder);
    h->set_job_id(job);
    h->set_attempt(lease.attempt());
    h->set_name(name);
    h->set_total_bytes(static_cast<int64_t>(result.size()));
    h->set_sha256(graft::Sha256Hex(result));
    wr->Write(r);
    v1::UploadArtifactRequest data;
    data.set_data(result);
    wr->Write(data);
    wr->WritesDone();
    return wr->Finish();
  };
  ASSERT_TRUE(upload(c.Ctx(kWorker).get(), "result.json").ok());
  // Alice's cancelled job and cancelled sweep: watching them ends at once.
  const std::string ended = c.Submit(kAlice, "parcel-routing", kSmall);
  {
    v1::CancelJobRequest r;
    r.set_job_id(ended);
    v1::Job o;
    ASSERT_TRUE(J.CancelJob(c.Ctx(kAlice).get(), r, &o).ok());
  }
  std::string sweep;
  {
    v1::SubmitJobRequest r;
    r.set_config_yaml(ReadFile(SourceDir() + "/configs/parcel-routing-sweep.yaml"));
    r.set_source_name("parcel-routing-sweep.yaml");
    v1::SubmitJobResponse o;
    grpc::Status s = J.SubmitJob(c.Ctx(kAlice).get(), r, &o);
    ASSERT_TRUE(s.ok()) << s.error_message();
    sweep = o.sweep_id();
    ASSERT_FALSE(sweep.empty());
    v1::CancelSweepRequest cr;
    cr.set_sweep_id(sweep);
    v1::CancelSweepResponse co;
    ASSERT_TRUE(J.CancelSweep(c.Ctx(kAlice).get(), cr, &co).ok());
  }

  using Call = std::function<grpc::Status(grpc::ClientContext*)>;
  std::map<std::string, Call> calls;
  calls["SubmitJob"] = [&](grpc::ClientContext* x) {
    v1::SubmitJobRequest r;
    r.set_config_yaml(ReadFile(SourceDir() + "/configs/parcel-routing.yaml"));
    v1::SubmitJobResponse o;
    return J.SubmitJob(x, r, &o);
  };
  calls["GetJob"] = [&](grpc::ClientContext* x) {
    v1::GetJobRequest r;
    r.set_job_id(job);
    v1::Job o;
    return J.GetJob(x, r, &o);
  };
  calls["ListJobs"] = [&](grpc::ClientContext* x) {
    v1::ListJobsRequest r;
    r.set_owner("alice");
    v1::ListJobsResponse o;
    return J.ListJobs(x, r, &o);
  };
  calls["CancelJob"] = [&](grpc::ClientContext* x) {  // already cancelled: FAILED_PRECONDITION for those who see it
    v1::CancelJobRequest r;
    r.set_job_id(ended);
    v1::Job o;
    return J.CancelJob(x, r, &o);
  };
  calls["WatchJob"] = [&](grpc::ClientContext* x) {
    v1::WatchJobRequest r;
    r.set_job_id(ended);
    auto rd = J.WatchJob(x, r);
    v1::JobEvent e;
    while (rd->Read(&e)) {
    }
    return rd->Finish();
  };
  calls["WatchSweep"] = [&](grpc::ClientContext* x) {
    v1::WatchSweepRequest r;
    r.set_sweep_id(sweep);
    auto rd = J.WatchSweep(x, r);
    v1::SweepEvent e;
    while (rd->Read(&e)) {
    }
    return rd->Finish();
  };
  calls["CancelSweep"] = [&](grpc::ClientContext* x) {  // every job has ended: OK, nothing more to cancel
    v1::CancelSweepRequest r;
    r.set_sweep_id(sweep);
    v1::CancelSweepResponse o;
    return J.CancelSweep(x, r, &o);
  };
  calls["GetMetrics"] = [&](grpc::ClientContext* x) {
    v1::GetMetricsRequest r;
    r.set_job_id(job);
    v1::GetMetricsResponse o;
    return J.GetMetrics(x, r, &o);
  };
  calls["DownloadArtifact"] = [&](grpc::ClientContext* x) {
    v1::DownloadArtifactRequest r;
    r.set_job_id(job);
    r.set_name("result.json");
    auto rd = J.DownloadArtifact(x, r);
    v1::ArtifactChunk ch;
    std::string bytes;
    while (rd->Read(&ch)) bytes += ch.data();
    grpc::Status s = rd->Finish();
    if (s.ok() && bytes != result) return grpc::Status(grpc::StatusCode::INTERNAL, "downloaded other bytes");
    return s;
  };
  calls["GetServerInfo"] = [&](grpc::ClientContext* x) {
    v1::GetServerInfoRequest r;
    v1::ServerInfo o;
    return J.GetServerInfo(x, r, &o);
  };
  calls["ListWorkers"] = [&](grpc::ClientContext* x) {
    v1::ListWorkersRequest r;
    v1::ListWorkersResponse o;
    return J.ListWorkers(x, r, &o);
  };
  calls["RegisterWorker"] = [&](grpc::ClientContext* x) {
    v1::RegisterWorkerRequest r;
    r.set_host("test");
    v1::RegisterWorkerResponse o;
    return W.RegisterWorker(x, r, &o);
  };
  calls["LeaseJob"] = [&](grpc::ClientContext* x) {  // node1's idle worker; nothing is queued after 10 ms
    v1::LeaseJobRequest r;
    r.set_worker_id(poller);
    r.set_wait_ms(10);
    v1::LeaseJobResponse o;
    return W.LeaseJob(x, r, &o);
  };
  calls["Report"] = [&](grpc::ClientContext* x) {  // node1's current lease of alice's job
    v1::ReportRequest r;
    r.set_worker_id(holder);
    r.set_job_id(job);
    r.set_attempt(lease.attempt());
    r.set_step(1);
    v1::ReportResponse o;
    return W.Report(x, r, &o);
  };
  calls["FetchCheckpoint"] = [&](grpc::ClientContext* x) {  // the lease is current, but no checkpoint exists
    v1::FetchCheckpointRequest r;
    r.set_worker_id(holder);
    r.set_job_id(job);
    r.set_attempt(lease.attempt());
    auto rd = W.FetchCheckpoint(x, r);
    v1::ArtifactChunk ch;
    while (rd->Read(&ch)) {
    }
    return rd->Finish();
  };
  calls["UploadArtifact"] = [&](grpc::ClientContext* x) { return upload(x, "result.json"); };
  calls["FinishJob"] = [&](grpc::ClientContext* x) {  // node1's worker, a job that does not exist
    v1::FinishJobRequest r;
    r.set_worker_id(holder);
    r.set_job_id("j-999999");
    r.set_failed_reason("test");
    v1::FinishJobResponse o;
    return W.FinishJob(x, r, &o);
  };
  calls["DeregisterWorker"] = [&](grpc::ClientContext* x) {  // again after leaving: still OK
    v1::DeregisterWorkerRequest r;
    r.set_worker_id(leaving);
    r.set_reason("table");
    v1::DeregisterWorkerResponse o;
    return W.DeregisterWorker(x, r, &o);
  };

  // The callers, in the table's column order.
  struct Who {
    std::string label;
    std::string authorization;  // the metadata value; "" sends none
  };
  const std::vector<Who> who = {{"no token", ""},
                                {"malformed", std::string("Token ") + kAlice},
                                {"unknown", "Bearer not-a-token"},
                                {"revoked", std::string("Bearer ") + kRevoked},
                                {"user", std::string("Bearer ") + kAlice},
                                {"other user", std::string("Bearer ") + kBob},
                                {"worker", std::string("Bearer ") + kWorker},
                                {"other worker", std::string("Bearer ") + kWorker2},
                                {"admin", std::string("Bearer ") + kRoot}};
  using C = grpc::StatusCode;
  const C OK = C::OK, NF = C::NOT_FOUND, FP = C::FAILED_PRECONDITION, PD = C::PERMISSION_DENIED,
          UA = C::UNAUTHENTICATED;
  // clang-format off
  const std::map<std::string, std::vector<C>> expected = {
      //                    none malformed unknown revoked user other-user worker other-worker admin
      {"SubmitJob",        {UA,  UA,       UA,     UA,     OK,  OK,        PD,    PD,          OK}},
      {"GetJob",           {UA,  UA,       UA,     UA,     OK,  NF,        PD,    PD,          OK}},
      {"ListJobs",         {UA,  UA,       UA,     UA,     OK,  PD,        PD,    PD,          OK}},
      {"CancelJob",        {UA,  UA,       UA,     UA,     FP,  NF,        PD,    PD,          FP}},
      {"WatchJob",         {UA,  UA,       UA,     UA,     OK,  NF,        PD,    PD,          OK}},
      {"WatchSweep",       {UA,  UA,       UA,     UA,     OK,  NF,        PD,    PD,          OK}},
      {"CancelSweep",      {UA,  UA,       UA,     UA,     OK,  NF,        PD,    PD,          OK}},
      {"GetMetrics",       {UA,  UA,       UA,     UA,     OK,  NF,        PD,    PD,          OK}},
      {"DownloadArtifact", {UA,  UA,       UA,     UA,     OK,  NF,        PD,    PD,          OK}},
      {"GetServerInfo",    {UA,  UA,       UA,     UA,     OK,  OK,        PD,    PD,          OK}},
      {"ListWorkers",      {UA,  UA,       UA,     UA,     OK,  OK,        PD,    PD,          OK}},
      {"RegisterWorker",   {UA,  UA,       UA,     UA,     PD,  PD,        OK,    OK,          PD}},
      {"LeaseJob",         {UA,  UA,       UA,     UA,     PD,  PD,        OK,    PD,          PD}},
      {"Report",           {UA,  UA,       UA,     UA,     PD,  PD,        OK,    PD,          PD}},
      {"FetchCheckpoint",  {UA,  UA,       UA,     UA,     PD,  PD,        NF,    PD,          PD}},
      {"UploadArtifact",   {UA,  UA,       UA,     UA,     PD,  PD,        OK,    PD,          PD}},
      {"FinishJob",        {UA,  UA,       UA,     UA,     PD,  PD,        NF,    PD,          PD}},
      {"DeregisterWorker", {UA,  UA,       UA,     UA,     PD,  PD,        OK,    PD,          PD}},
  };
  // clang-format on
  // Every RPC of the Jobs and Workers services, as the generated descriptors list them.
  size_t methods = 0;
  for (const char* service : {"graft.v1.Jobs", "graft.v1.Workers"}) {
    const auto* d = google::protobuf::DescriptorPool::generated_pool()->FindServiceByName(service);
    ASSERT_NE(d, nullptr) << service;
    for (int m = 0; m < d->method_count(); ++m) {
      ++methods;
      const std::string name = d->method(m)->name();
      if (!calls.count(name) || !expected.count(name)) ADD_FAILURE() << service << "." << name << " is not in the table";
    }
  }
  ASSERT_EQ(calls.size(), methods);
  ASSERT_EQ(expected.size(), methods);
  std::string seen_table;  // what came back, printed on a failure
  for (const auto& [name, row] : expected) {
    ASSERT_EQ(row.size(), who.size()) << name;
    absl::StrAppend(&seen_table, name, ":");
    for (size_t i = 0; i < who.size(); ++i) {
      grpc::ClientContext ctx;
      if (!who[i].authorization.empty()) ctx.AddMetadata("authorization", who[i].authorization);
      ctx.set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(10));
      grpc::Status s = calls.at(name)(&ctx);
      absl::StrAppend(&seen_table, " ", static_cast<int>(s.error_code()));
      EXPECT_EQ(s.error_code(), row[i]) << name << " as " << who[i].label << ": " << s.error_message();
    }
    absl::StrAppend(&seen_table, "\n");
  }
  if (::testing::Test::HasFailure()) std::cerr << "codes seen, in column order:\n" << seen_table;
  // The refusals say why, without the token.
  {
    grpc::ClientContext ctx;
    ctx.AddMetadata("authorization", std::string("Bearer ") + kRevoked);
    v1::ListJobsRequest r;
    v1::ListJobsResponse o;
    grpc::Status s = J.ListJobs(&ctx, r, &o);
    EXPECT_NE(s.error_message().find("revoked"), std::string::npos) << s.error_message();
    EXPECT_EQ(s.error_message().find(kRevoked), std::string::npos) << s.error_message();
  }
  {
    v1::ReportRequest r;
    r.set_worker_id(holder);
    r.set_job_id(job);
    r.set_attempt(lease.attempt());
    v1::ReportResponse o;
    grpc::Status s = W.Report(c.Ctx(kWorker2).get(), r, &o);
    EXPECT_NE(s.error_message().find("belongs to another worker token; 'node2' may act only as the workers it registered"),
              std::string::npos)
        << s.error_message();
  }
  // Another user's list holds only their own job (from the SubmitJob cell); the owner's and an
  // admin's hold alice's job.
  v1::ListJobsRequest list;
  v1::ListJobsResponse listed;
  ASSERT_TRUE(J.ListJobs(c.Ctx(kBob).get(), list, &listed).ok());
  ASSERT_EQ(listed.jobs_size(), 1);
  EXPECT_EQ(listed.jobs(0).owner(), "bob");
  for (const char* t : {kAlice, kRoot}) {
    ASSERT_TRUE(J.ListJobs(c.Ctx(t).get(), list, &listed).ok());
    bool has = false;
    for (const auto& j : listed.jobs()) has = has || j.id() == job;
    EXPECT_TRUE(has) << t;
  }
  const std::string log = c.Log();
  for (const char* t : {kAlice, kBob, kRoot, kWorker, kWorker2, kRevoked}) {
    EXPECT_EQ(log.find(t), std::string::npos) << "token in log";
  }
}

TEST(Service, RefusesAPlaintextNonLoopbackAddress) {
  ScopedTempDir dir;
  WriteFile(dir.path() + "/tokens.yaml", "[]\n");
  auto r = ::graft::testing::RunCommand(BinaryDir() + "/bin/graftd --listen 0.0.0.0:0 --tokens-file " + dir.path() +
                                        "/tokens.yaml --data-dir " + dir.path() + "/data");
  EXPECT_EQ(r.exit_code, 2) << r.output;
  EXPECT_NE(r.output.find("--allow-plaintext"), std::string::npos) << r.output;
  // The shipped settings file loads; a mistake in one names file:line:col and the key.
  WriteFile(dir.path() + "/bad.yaml", "listen: 127.0.0.1:0\nlease_secs: 3\n");
  auto bad = ::graft::testing::RunCommand(BinaryDir() + "/bin/graftd --config " + dir.path() + "/bad.yaml");
  EXPECT_EQ(bad.exit_code, 2) << bad.output;
  EXPECT_NE(bad.output.find("bad.yaml:2:1: unknown key 'lease_secs'"), std::string::npos) << bad.output;
  auto shipped = ::graft::testing::RunCommand(BinaryDir() + "/bin/graftd --config " + SourceDir() +
                                              "/configs/graftd.yaml --listen 0.0.0.0:0");
  EXPECT_EQ(shipped.exit_code, 2) << shipped.output;  // loads, then refuses the address
  EXPECT_NE(shipped.output.find("refusing to listen on 0.0.0.0:0"), std::string::npos) << shipped.output;
}

// A fake worker (this test) reports points and records each acknowledgement; graftd is killed
// with SIGKILL mid-stream, with jobs queued, running and finished. After a restart every
// acknowledged point is stored, the finished job is intact, the fake worker's lease survived the
// restart (its hand-back is accepted), and every job goes on to finish. The real worker riding
// out a restart is Fault.AWorkerResendsEveryPointAcrossACoordinatorRestart (fault_test.cc).
TEST(Service, CoordinatorKilledLosesNoAcknowledgedPoint) {
  Cluster c;
  const std::string done = c.Submit(kAlice, "parcel-routing", kSmall);
  {
    auto worker = c.StartWorker("w0");
    ASSERT_TRUE(c.WaitState(done, v1::JOB_STATE_SUCCEEDED, 60000)) << ReadFile(worker->log_path());
    worker->Signal(SIGTERM);
    EXPECT_EQ(worker->Wait(30000), 0);
  }
  const std::string running = c.Submit(kAlice, "parcel-routing", kSmall);
  const std::string queued = c.Submit(kAlice, "parcel-routing", kSmall);
  const std::string worker_id = c.RegisterFakeWorker("fake");
  ASSERT_FALSE(worker_id.empty());
  const v1::LeaseJobResponse lease = c.LeaseFor(worker_id, 1000);
  ASSERT_EQ(lease.job_id(), running);
  std::vector<int64_t> acknowledged;  // written by the reporter thread; read after it is joined
  std::atomic<size_t> acknowledged_count{0};
  std::atomic<bool> failed{false};
  std::thread reporter([&] {
    for (int64_t step = 1; step <= 100000 && !failed; ++step) {
      v1::ReportRequest r;
      r.set_worker_id(worker_id);
      r.set_job_id(running);
      r.set_attempt(lease.attempt());
      r.set_step(step);
      auto* p = r.add_points();
      p->set_step(step);
      p->set_metrics_json("{\"step\": " + std::to_string(step) + "}");
      v1::ReportResponse resp;
      grpc::Status s = c.workers().Report(c.Ctx(kWorker, 2000).get(), r, &resp);
      if (!s.ok()) {
        failed = true;
        break;
      }
      if (resp.acknowledged_step() >= step) {
        acknowledged.push_back(step);
        ++acknowledged_count;
      }
    }
  });
  ASSERT_TRUE(WaitFor([&] { return acknowledged_count.load() >= 30 || failed; }, 30000));
  c.KillCoordinator();
  reporter.join();
  ASSERT_GE(acknowledged.size(), 30u);
  c.StartCoordinator();
  std::vector<v1::Point> stored = c.Metrics(running);
  std::set<int64_t> steps;
  for (const auto& p : stored) steps.insert(p.step());
  for (int64_t s : acknowledged) EXPECT_TRUE(steps.count(s)) << "acknowledged point " << s << " lost";
  EXPECT_EQ(c.Get(done).state(), v1::JOB_STATE_SUCCEEDED);
  EXPECT_EQ(c.Get(queued).state(), v1::JOB_STATE_QUEUED);
  v1::Job held = c.Get(running);
  EXPECT_EQ(held.state(), v1::JOB_STATE_RUNNING);
  EXPECT_EQ(held.worker_id(), worker_id);
  // The fake worker hands the job back (its lease is still current), and a real worker finishes
  // everything.
  v1::FinishJobRequest back;
  back.set_worker_id(worker_id);
  back.set_job_id(running);
  back.set_attempt(lease.attempt());
  back.set_handed_back_reason("the fake worker leaves");
  v1::FinishJobResponse back_resp;
  grpc::Status handed = c.workers().FinishJob(c.Ctx(kWorker).get(), back, &back_resp);
  ASSERT_TRUE(handed.ok()) << handed.error_message();
  auto worker = c.StartWorker("w1");
  EXPECT_TRUE(c.WaitState(running, v1::JOB_STATE_SUCCEEDED, 90000)) << c.Log() << ReadFile(worker->log_path());
  EXPECT_TRUE(c.WaitState(queued, v1::JOB_STATE_SUCCEEDED, 90000)) << c.Log() << ReadFile(worker->log_path());
  EXPECT_EQ(c.Get(running).attempt(), 2);
  // The second attempt replaced the fake points: the history is the real run's.
  std::vector<v1::Point> final_points = c.Metrics(running);
  ASSERT_EQ(final_points.size(), 4u);
  EXPECT_EQ(final_points.back().attempt(), 2);
}

// A worker killed with SIGKILL mid-job: the lease lapses, the job is leased again, the new
// attempt resumes from a checkpoint step > 0, and its final metrics equal an uninterrupted run.
// The worker is frozen (SIGSTOP) at the moment it is seen mid-job, so the kill lands before the
// job can end however fast it trains; a 4 s lease is four missed heartbeats, and an extra lapse
// of the second worker on a loaded machine would only add an attempt.
TEST(Service, WorkerKilledMidJobResumesFromItsCheckpoint) {
  Cluster c(/*lease_seconds=*/4);
  const std::vector<std::string> sets = {"training.steps=3000", "training.checkpoint_every=500",
                                         "evaluation.every=250", "evaluation.triples=512",
                                         "network.hidden=[256,256,256]"};
  const std::string id = c.Submit(kAlice, "parcel-routing", sets);
  auto w1 = c.StartWorker("w1");
  ASSERT_TRUE(WaitFor([&] { return c.Get(id).checkpoint_step() >= 500; }, 120000)) << ReadFile(w1->log_path());
  ASSERT_TRUE(w1->Signal(SIGSTOP));
  ASSERT_EQ(c.Get(id).state(), v1::JOB_STATE_RUNNING) << "finished before it could be interrupted";
  w1->Signal(SIGKILL);
  w1->Wait(10000);
  auto w2 = c.StartWorker("w2");
  ASSERT_TRUE(c.WaitState(id, v1::JOB_STATE_SUCCEEDED, 180000)) << c.Log() << ReadFile(w2->log_path());
  v1::Job job = c.Get(id);
  EXPECT_GE(job.attempt(), 2);
  const std::string w2_log = ReadFile(w2->log_path());
  const size_t at = w2_log.find("resuming from step ");
  ASSERT_NE(at, std::string::npos) << w2_log;
  EXPECT_GT(std::stoll(w2_log.substr(at + 19)), 0);
  // The same spec trained in one go, locally.
  WriteFile(c.dir() + "/spec.yaml", job.spec_yaml());
  auto r = ::graft::testing::RunCommand(::graft::testing::WorkerBinary() + " run " + c.dir() + "/spec.yaml --out " +
                                        c.dir() + "/local");
  ASSERT_EQ(r.exit_code, 0) << r.output;
  std::istringstream local(ReadFile(c.dir() + "/local/metrics.jsonl"));
  std::vector<json> expected;
  std::string line;
  while (std::getline(local, line)) {
    if (!line.empty()) expected.push_back(WithoutTimings(json::parse(line)));
  }
  std::vector<json> got;
  for (const auto& p : c.Metrics(id)) got.push_back(WithoutTimings(json::parse(p.metrics_json())));
  ASSERT_EQ(got.size(), expected.size());
  for (size_t i = 0; i < got.size(); ++i) EXPECT_EQ(got[i], expected[i]) << "point " << i;
  EXPECT_EQ(WithoutTimings(json::parse(job.result_json())),
            WithoutTimings(json::parse(ReadFile(c.dir() + "/local/result.json"))));
  // The last attempt trained only the steps after the checkpoint it resumed from.
  const json result = json::parse(job.result_json());
  EXPECT_GT(result["resumed_from_step"].get<int64_t>(), 0);
  EXPECT_EQ(result["steps_this_process"].get<int64_t>(), 3000 - result["resumed_from_step"].get<int64_t>());
}

// Watching a job: its state first, then each point as it is stored, then the final state, and
// the stream ends; a second watch from a later step gets only the points from there.
TEST(Service, WatchStreamsStateAndPointsUntilTheEnd) {
  Cluster c;
  const std::string id = c.Submit(kAlice, "parcel-routing", kSmall);
  std::vector<v1::JobEvent> events;  // written by the watcher thread; read after it is joined
  std::atomic<bool> first_event{false};
  grpc::Status watch_status;
  std::thread watcher([&] {
    v1::WatchJobRequest r;
    r.set_job_id(id);
    auto ctx = c.Ctx(kAlice, 90000);
    auto reader = c.jobs().WatchJob(ctx.get(), r);
    v1::JobEvent e;
    while (reader->Read(&e)) {
      events.push_back(e);
      first_event = true;
    }
    watch_status = reader->Finish();
  });
  // No worker exists until the watcher has its first event, so that event is the queued state.
  EXPECT_TRUE(WaitFor([&] { return first_event.load(); }, 30000));
  auto worker = c.StartWorker("w1");
  watcher.join();
  ASSERT_TRUE(watch_status.ok()) << watch_status.error_message();
  ASSERT_FALSE(events.empty());
  ASSERT_TRUE(events.front().has_state_change());
  EXPECT_EQ(events.front().state_change().state(), v1::JOB_STATE_QUEUED);
  ASSERT_TRUE(events.back().has_state_change());
  EXPECT_EQ(events.back().state_change().state(), v1::JOB_STATE_SUCCEEDED);
  std::vector<int64_t> steps;
  bool saw_running = false;
  for (const auto& e : events) {
    if (e.has_point()) steps.push_back(e.point().step());
    if (e.has_state_change() && e.state_change().state() == v1::JOB_STATE_RUNNING) saw_running = true;
  }
  EXPECT_TRUE(saw_running);
  EXPECT_EQ(steps, (std::vector<int64_t>{0, 40, 80, 120}));
  // Resumable from a step: only the points from there, then the (final) state, then the end.
  v1::WatchJobRequest r;
  r.set_job_id(id);
  r.set_from_step(80);
  auto ctx = c.Ctx(kAlice);
  auto reader = c.jobs().WatchJob(ctx.get(), r);
  v1::JobEvent e;
  std::vector<int64_t> later;
  while (reader->Read(&e)) {
    if (e.has_point()) later.push_back(e.point().step());
  }
  EXPECT_TRUE(reader->Finish().ok());
  EXPECT_EQ(later, (std::vector<int64_t>{80, 120}));
}

// SIGTERM to a busy worker: it checkpoints, uploads, hands the job back and exits 0; the
// hand-back is not counted as an attempt, and the next attempt resumes from that checkpoint.
TEST(Service, SigtermHandsTheJobBackWithoutSpendingAnAttempt) {
  Cluster c;
  const std::string id = c.Submit(kAlice, "parcel-routing",
                                  {"training.steps=1000000", "evaluation.every=5000", "evaluation.triples=256",
                                   "training.checkpoint_every=1000000"});
  auto w1 = c.StartWorker("w1");
  ASSERT_TRUE(WaitFor([&] { return c.Get(id).step() > 0; }, 60000)) << ReadFile(w1->log_path());
  w1->Signal(SIGTERM);
  EXPECT_EQ(w1->Wait(60000), 0) << ReadFile(w1->log_path());
  v1::Job job = c.Get(id);
  EXPECT_EQ(job.state(), v1::JOB_STATE_QUEUED) << ReadFile(w1->log_path());
  EXPECT_EQ(job.attempt(), 1);
  EXPECT_EQ(job.max_attempts(), 4);  // 3 + the hand-back
  EXPECT_GT(job.checkpoint_step(), 0);
  const int64_t handed_at = job.checkpoint_step();
  auto w2 = c.StartWorker("w2");
  ASSERT_TRUE(WaitFor([&] { return c.Get(id).attempt() == 2 && c.Get(id).state() == v1::JOB_STATE_RUNNING; }, 30000));
  ASSERT_TRUE(WaitFor([&] { return ReadFile(w2->log_path()).find("resuming from step") != std::string::npos; }, 30000));
  EXPECT_NE(ReadFile(w2->log_path()).find("resuming from step " + std::to_string(handed_at)), std::string::npos)
      << ReadFile(w2->log_path());
  v1::CancelJobRequest cancel;
  cancel.set_job_id(id);
  v1::Job out;
  EXPECT_TRUE(c.jobs().CancelJob(c.Ctx(kAlice).get(), cancel, &out).ok());
}

// Server reflection is on and needs no token: a raw ServerReflectionInfo call listing the
// services (request field 7, list_services, hand-encoded: tag 0x3a, length 0).
TEST(Service, ReflectionListsTheServicesWithoutAToken) {
  Cluster c;
  grpc::GenericStub stub(c.channel());
  grpc::ClientContext ctx;
  ctx.set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(10));
  grpc::CompletionQueue cq;
  auto call = stub.PrepareCall(&ctx, "/grpc.reflection.v1alpha.ServerReflection/ServerReflectionInfo", &cq);
  auto wait = [&](intptr_t expected) {
    void* tag = nullptr;
    bool ok = false;
    EXPECT_TRUE(cq.Next(&tag, &ok));
    EXPECT_EQ(reinterpret_cast<intptr_t>(tag), expected);
    return ok;
  };
  call->StartCall(reinterpret_cast<void*>(1));
  ASSERT_TRUE(wait(1));
  const char request[] = {0x3a, 0x00};
  grpc::Slice slice(request, sizeof(request));
  grpc::ByteBuffer buffer(&slice, 1);
  call->Write(buffer, reinterpret_cast<void*>(2));
  ASSERT_TRUE(wait(2));
  call->WritesDone(reinterpret_cast<void*>(3));
  ASSERT_TRUE(wait(3));
  grpc::ByteBuffer response;
  call->Read(&response, reinterpret_cast<void*>(4));
  ASSERT_TRUE(wait(4));
  std::vector<grpc::Slice> slices;
  ASSERT_TRUE(response.Dump(&slices).ok());
  std::string bytes;
  for (const auto& s : slices) bytes.append(reinterpret_cast<const char*>(s.begin()), s.size());
  EXPECT_NE(bytes.find("graft.v1.Jobs"), std::string::npos);
  EXPECT_NE(bytes.find("graft.v1.Workers"), std::string::npos);
  grpc::Status status;
  call->Finish(&status, reinterpret_cast<void*>(5));
  wait(5);
  EXPECT_TRUE(status.ok()) << status.error_message();
  cq.Shutdown();
  void* tag;
  bool ok;
  while (cq.Next(&tag, &ok)) {
  }
}

}  // namespace
}  // namespace graft
