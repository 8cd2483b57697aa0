// graftd and graft-worker as real processes on loopback ports the server picks, driven by a
// small C++ client: submit and finish, cancel, auth for every RPC and role, a coordinator
// killed with SIGKILL, a worker killed with SIGKILL.
#include <signal.h>

#include <chrono>
#include <fstream>
#include <map>
#include <set>
#include <sstream>
#include <thread>

#include <google/protobuf/descriptor.h>
#include <grpcpp/generic/generic_stub.h>
#include <grpcpp/grpcpp.h>

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
using ::graft::testing::kWorker;
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

// Every RPC with no token, a wrong token and each role (table-driven). A permitted caller gets
// the status its arguments lead to: OK for a real job, config or worker, NOT_FOUND for the
// made-up ids j-999999 and s-999999 and for the weights of a job that has not run. The table
// must name every RPC of the services' generated descriptors, so a new RPC fails here until added.
TEST(Service, EveryCallNeedsATokenAndTheRightRole) {
  Cluster c;
  const std::string job = c.Submit(kAlice, "parcel-routing", kSmall);
  // Registered worker ids, so that LeaseJob and DeregisterWorker can succeed.
  std::string worker_id, leaving_id;
  for (std::string* id : {&worker_id, &leaving_id}) {
    v1::RegisterWorkerRequest r;
    r.set_host("table");
    v1::RegisterWorkerResponse o;
    ASSERT_TRUE(c.workers().RegisterWorker(c.Ctx(kWorker).get(), r, &o).ok());
    *id = o.worker_id();
  }
  using Call = std::function<grpc::Status(grpc::ClientContext*)>;
  struct Entry {
    bool worker_service = false;
    grpc::StatusCode permitted;  // what a caller with the right role gets
    Call call;
  };
  std::map<std::string, Entry> calls;
  auto& J = c.jobs();
  auto& W = c.workers();
  const auto kOk = grpc::StatusCode::OK;
  const auto kNotFound = grpc::StatusCode::NOT_FOUND;
  calls["SubmitJob"] = {false, kOk, [&](grpc::ClientContext* x) {
                          v1::SubmitJobRequest r;
                          r.set_config_yaml(ReadFile(SourceDir() + "/configs/parcel-routing.yaml"));
                          v1::SubmitJobResponse o;
                          return J.SubmitJob(x, r, &o);
                        }};
  calls["GetJob"] = {false, kOk, [&](grpc::ClientContext* x) {
                       v1::GetJobRequest r;
                       r.set_job_id(job);
                       v1::Job o;
                       return J.GetJob(x, r, &o);
                     }};
  calls["ListJobs"] = {false, kOk, [&](grpc::ClientContext* x) {
                         v1::ListJobsRequest r;
                         v1::ListJobsResponse o;
                         return J.ListJobs(x, r, &o);
                       }};
  calls["CancelJob"] = {false, kNotFound, [&](grpc::ClientContext* x) {
                          v1::CancelJobRequest r;
                          r.set_job_id("j-999999");
                          v1::Job o;
                          return J.CancelJob(x, r, &o);
                        }};
  calls["WatchJob"] = {false, kNotFound, [&](grpc::ClientContext* x) {
                         v1::WatchJobRequest r;
                         r.set_job_id("j-999999");
                         auto rd = J.WatchJob(x, r);
                         v1::JobEvent e;
                         while (rd->Read(&e)) {
                         }
                         return rd->Finish();
                       }};
  calls["WatchSweep"] = {false, kNotFound, [&](grpc::ClientContext* x) {
                           v1::WatchSweepRequest r;
                           r.set_sweep_id("s-999999");
                           auto rd = J.WatchSweep(x, r);
                           v1::SweepEvent e;
                           while (rd->Read(&e)) {
                           }
                           return rd->Finish();
                         }};
  calls["CancelSweep"] = {false, kNotFound, [&](grpc::ClientContext* x) {
                            v1::CancelSweepRequest r;
                            r.set_sweep_id("s-999999");
                            v1::CancelSweepResponse o;
                            return J.CancelSweep(x, r, &o);
                          }};
  calls["GetMetrics"] = {false, kOk, [&](grpc::ClientContext* x) {
                           v1::GetMetricsRequest r;
                           r.set_job_id(job);
                           v1::GetMetricsResponse o;
                           return J.GetMetrics(x, r, &o);
                         }};
  calls["DownloadArtifact"] = {false, kNotFound, [&](grpc::ClientContext* x) {
                                 v1::DownloadArtifactRequest r;
                                 r.set_job_id(job);
                                 r.set_name("weights.pt");
                                 auto rd = J.DownloadArtifact(x, r);
                                 v1::ArtifactChunk ch;
                                 while (rd->Read(&ch)) {
                                 }
                                 return rd->Finish();
                               }};
  calls["GetServerInfo"] = {false, kOk, [&](grpc::ClientContext* x) {
                              v1::GetServerInfoRequest r;
                              v1::ServerInfo o;
                              return J.GetServerInfo(x, r, &o);
                            }};
  calls["ListWorkers"] = {false, kOk, [&](grpc::ClientContext* x) {
                            v1::ListWorkersRequest r;
                            v1::ListWorkersResponse o;
                            return J.ListWorkers(x, r, &o);
                          }};
  calls["DeregisterWorker"] = {true, kOk, [&](grpc::ClientContext* x) {
                                 v1::DeregisterWorkerRequest r;
                                 r.set_worker_id(leaving_id);
                                 r.set_reason("table");
                                 v1::DeregisterWorkerResponse o;
                                 return W.DeregisterWorker(x, r, &o);
                               }};
  calls["RegisterWorker"] = {true, kOk, [&](grpc::ClientContext* x) {
                               v1::RegisterWorkerRequest r;
                               r.set_host("test");
                               v1::RegisterWorkerResponse o;
                               return W.RegisterWorker(x, r, &o);
                             }};
  calls["LeaseJob"] = {true, kOk, [&](grpc::ClientContext* x) {
                         v1::LeaseJobRequest r;
                         r.set_worker_id(worker_id);
                         r.set_wait_ms(10);
                         v1::LeaseJobResponse o;
                         return W.LeaseJob(x, r, &o);
                       }};
  calls["Report"] = {true, kNotFound, [&](grpc::ClientContext* x) {
                       v1::ReportRequest r;
                       r.set_job_id("j-999999");
                       v1::ReportResponse o;
                       return W.Report(x, r, &o);
                     }};
  calls["FetchCheckpoint"] = {true, kNotFound, [&](grpc::ClientContext* x) {
                                v1::FetchCheckpointRequest r;
                                r.set_job_id("j-999999");
                                auto rd = W.FetchCheckpoint(x, r);
                                v1::ArtifactChunk ch;
                                while (rd->Read(&ch)) {
                                }
                                return rd->Finish();
                              }};
  calls["UploadArtifact"] = {true, kNotFound, [&](grpc::ClientContext* x) {
                               v1::UploadArtifactResponse o;
                               auto wr = W.UploadArtifact(x, &o);
                               v1::UploadArtifactRequest r;
                               r.mutable_header()->set_job_id("j-999999");
                               r.mutable_header()->set_name("weights.pt");
                               r.mutable_header()->set_sha256(std::string(64, '0'));
                               wr->Write(r);
                               wr->WritesDone();
                               return wr->Finish();
                             }};
  calls["FinishJob"] = {true, kNotFound, [&](grpc::ClientContext* x) {
                          v1::FinishJobRequest r;
                          r.set_job_id("j-999999");
                          r.set_failed_reason("test");
                          v1::FinishJobResponse o;
                          return W.FinishJob(x, r, &o);
                        }};
  // Every RPC of the Jobs and Workers services, as the generated descriptors list them.
  size_t methods = 0;
  for (const char* service : {"graft.v1.Jobs", "graft.v1.Workers"}) {
    const auto* d = google::protobuf::DescriptorPool::generated_pool()->FindServiceByName(service);
    ASSERT_NE(d, nullptr) << service;
    for (int m = 0; m < d->method_count(); ++m) {
      ++methods;
      auto it = calls.find(d->method(m)->name());
      if (it == calls.end()) {
        ADD_FAILURE() << service << "." << d->method(m)->name() << " is not in the table";
        continue;
      }
      EXPECT_EQ(it->second.worker_service, std::string(service) == "graft.v1.Workers") << it->first;
    }
  }
  ASSERT_EQ(calls.size(), methods);
  struct Who {
    std::string label, token;
    enum { kNone, kJobs, kWorkers } may;
  };
  const std::vector<Who> who = {{"no token", "", Who::kNone},
                                {"wrong token", "not-a-token", Who::kNone},
                                {"user", kAlice, Who::kJobs},
                                {"admin", kRoot, Who::kJobs},
                                {"worker", kWorker, Who::kWorkers}};
  for (const auto& [name, entry] : calls) {
    for (const Who& w : who) {
      auto ctx = c.Ctx(w.token, 10000);
      grpc::Status s = entry.call(ctx.get());
      SCOPED_TRACE(name + " as " + w.label + ": " + std::to_string(s.error_code()) + " " + s.error_message());
      if (w.may == Who::kNone) {
        EXPECT_EQ(s.error_code(), grpc::StatusCode::UNAUTHENTICATED);
      } else if ((w.may == Who::kWorkers) != entry.worker_service) {
        EXPECT_EQ(s.error_code(), grpc::StatusCode::PERMISSION_DENIED);
      } else {
        EXPECT_EQ(s.error_code(), entry.permitted);
      }
    }
  }
  // Users see and cancel only their own jobs; admins see all.
  v1::GetJobRequest get;
  get.set_job_id(job);
  v1::Job out;
  EXPECT_EQ(c.jobs().GetJob(c.Ctx(kBob).get(), get, &out).error_code(), grpc::StatusCode::NOT_FOUND);
  EXPECT_TRUE(c.jobs().GetJob(c.Ctx(kRoot).get(), get, &out).ok());
  v1::CancelJobRequest cancel;
  cancel.set_job_id(job);
  EXPECT_EQ(c.jobs().CancelJob(c.Ctx(kBob).get(), cancel, &out).error_code(), grpc::StatusCode::NOT_FOUND);
  v1::ListJobsRequest list;
  v1::ListJobsResponse listed;
  ASSERT_TRUE(c.jobs().ListJobs(c.Ctx(kBob).get(), list, &listed).ok());
  EXPECT_EQ(listed.jobs_size(), 0);
  ASSERT_TRUE(c.jobs().ListJobs(c.Ctx(kAlice).get(), list, &listed).ok());
  EXPECT_GE(listed.jobs_size(), 1);
  const std::string log = c.Log();
  for (const char* t : {kAlice, kBob, kRoot, kWorker}) EXPECT_EQ(log.find(t), std::string::npos) << "token in log";
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
  v1::RegisterWorkerRequest reg;
  reg.set_host("fake");
  v1::RegisterWorkerResponse me;
  ASSERT_TRUE(c.workers().RegisterWorker(c.Ctx(kWorker).get(), reg, &me).ok());
  v1::LeaseJobRequest lreq;
  lreq.set_worker_id(me.worker_id());
  lreq.set_wait_ms(1000);
  v1::LeaseJobResponse lease;
  ASSERT_TRUE(c.workers().LeaseJob(c.Ctx(kWorker).get(), lreq, &lease).ok());
  ASSERT_EQ(lease.job_id(), running);
  std::vector<int64_t> acknowledged;  // written by the reporter thread; read after it is joined
  std::atomic<size_t> acknowledged_count{0};
  std::atomic<bool> failed{false};
  std::thread reporter([&] {
    for (int64_t step = 1; step <= 100000 && !failed; ++step) {
      v1::ReportRequest r;
      r.set_worker_id(me.worker_id());
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
  EXPECT_EQ(held.worker_id(), me.worker_id());
  // The fake worker hands the job back (its lease is still current), and a real worker finishes
  // everything.
  v1::FinishJobRequest back;
  back.set_worker_id(me.worker_id());
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
  auto r = ::graft::testing::RunCommand(BinaryDir() + "/bin/graft-worker run " + c.dir() + "/spec.yaml --out " +
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
