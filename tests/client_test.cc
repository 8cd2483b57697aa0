// The `graft` client: its commands called as functions against graftd and graft-worker running
// as real processes on loopback (tests/cluster.h), the `graft` binary's exit codes, a Python
// script on Debian's python3-grpcio, and its pieces (t quantile, SHA-256, settings, rendering)
// against outside references: SciPy, FIPS 180-2's worked examples, coreutils' sha256sum.
#include <csignal>
#include <cmath>
#include <cstdio>
#include <fstream>
#include <map>
#include <set>
#include <sstream>
#include <thread>

#include "client/api.h"
#include "client/commands.h"
#include "client/render.h"
#include "client/settings.h"
#include "proto/sha256.h"
#include "client/stats.h"
#include "gtest/gtest.h"
#include "nlohmann/json.hpp"
#include "tests/cluster.h"
#include "tests/test_util.h"
#include "configs/reader/spec.h"
#include "configs/reader/sweep.h"

namespace graft {
namespace {

using json = nlohmann::json;
using ::graft::testing::Cluster;
using ::graft::testing::kAlice;
using ::graft::testing::ReadFile;
using ::graft::testing::RunCommand;
using ::graft::testing::ScopedTempDir;
using ::graft::testing::SourceDir;
using ::graft::testing::BinaryDir;
using ::graft::testing::WaitFor;
using ::graft::testing::WriteFile;

// Small jobs that finish in well under a second of training.
const std::vector<std::string> kTiny = {"training.steps=40",         "training.batch_size=64",
                                        "evaluation.every=20",       "evaluation.triples=256",
                                        "network.hidden=[16,16,16]", "alignment.local.units=0-3",
                                        "alignment.careful.units=4-7"};
// The same, made to fail at run time: plain SGD with a huge step on a huge loss gives a NaN loss
// within a few steps (seen: "the loss became nan at step 3").
const std::vector<std::string> kDiverges = {"training.optimizer.type=sgd", "training.optimizer.lr=10",
                                            "training.loss_weights.task=1000000",
                                            "training.loss_weights.interchange=1000000"};

std::vector<std::string> Plus(std::vector<std::string> a, const std::vector<std::string>& b) {
  a.insert(a.end(), b.begin(), b.end());
  return a;
}

int64_t NowMs() {
  return std::chrono::duration_cast<std::chrono::milliseconds>(std::chrono::system_clock::now().time_since_epoch())
      .count();
}

// Output of one command called in-process.
struct Ran {
  int code = -1;
  std::string out, err;
};

template <typename F>
Ran Call(F&& f, bool terminal = false) {
  std::ostringstream out, err;
  client::Io io(out, err);
  io.out_is_terminal = terminal;
  io.width = 100;
  io.now_ms = NowMs;
  io.server = "test";
  Ran r;
  r.code = f(io);
  r.out = out.str();
  r.err = err.str();
  return r;
}

std::unique_ptr<client::Api> ApiFor(Cluster& c, const std::string& token = kAlice) {
  client::Connection conn;
  conn.server = c.address();
  conn.token = token;
  return client::CreateGrpcApi(conn);
}

std::vector<std::string> Lines(const std::string& text) {
  std::vector<std::string> out;
  std::istringstream in(text);
  for (std::string l; std::getline(in, l);) {
    if (!l.empty()) out.push_back(l);
  }
  return out;
}

std::string ParcelConfigWith(const std::string& extra) {
  std::string text = ReadFile(SourceDir() + "/configs/parcel-routing.yaml");
  if (!text.empty() && text.back() != '\n') text += "\n";
  return text + extra;
}

// The `graft` binary with a cluster's address and a token.
testing::CommandResult Graft(Cluster& c, const std::string& args) {
  return RunCommand(BinaryDir() + "/bin/graft --server " + c.address() + " --token " + kAlice + " " + args);
}

// ---------------------------------------------------------------------------------------------
// Sweeps through the client.

TEST(ClientSweep, ExpandsGridTogetherSampleAndSeedsIntoTheRightJobs) {
  Cluster c;  // no worker: the jobs stay queued, which is all this test needs
  auto api = ApiFor(c);
  ScopedTempDir dir;
  const std::string file = dir.path() + "/routing-sweep.yaml";
  WriteFile(file, ParcelConfigWith(R"(sweep:
  grid:
    training.loss_weights.interchange: [0.0, 1.0]
  together:
    - {alignment.local.layer: [0, 2], alignment.careful.layer: [0, 2]}
  sample:
    count: 2
    seed: 5
    params:
      training.optimizer.lr: {log_between: [0.0003, 0.01]}
      network.embedding.dim: {one_of: [4, 8]}
  seeds: [1, 2]
)"));
  client::SubmitArgs args;
  args.file = file;
  args.overrides = {"training.steps=40"};
  args.json = true;
  Ran r = Call([&](client::Io& io) { return client::SubmitCommand(*api, args, io); });
  ASSERT_EQ(r.code, 0) << r.err;
  json resp = json::parse(r.out);
  ASSERT_FALSE(resp["sweep_id"].get<std::string>().empty());
  // 2 (grid) x 2 (together) x 2 (sample) x 2 (seeds).
  ASSERT_EQ(resp["job_ids"].size(), 16u) << r.out;

  std::set<std::string> names, lrs;
  std::vector<std::string> wrong_names;
  size_t k = 0;
  for (double interchange : {0.0, 1.0}) {
    for (int layer : {0, 2}) {
      for (int draw = 0; draw < 2; ++draw) {
        for (int seed : {1, 2}) {
          const std::string id = resp["job_ids"][k++];
          v1::Job job = c.Get(id);
          EXPECT_EQ(job.sweep_id(), resp["sweep_id"]);
          EXPECT_EQ(job.total_steps(), 40);
          auto loaded = config::LoadJobFromText(job.spec_yaml(), id + "/spec.yaml", {});
          ASSERT_TRUE(loaded.ok()) << loaded.status();
          const config::JobSpec& s = loaded->spec;
          EXPECT_EQ(s.training.interchange_weight, interchange) << id;
          ASSERT_EQ(s.alignment.size(), 2u);
          EXPECT_EQ(s.alignment[0].layer, layer) << id;
          EXPECT_EQ(s.alignment[1].layer, layer) << id;
          EXPECT_EQ(s.seed, static_cast<uint64_t>(seed)) << id;
          EXPECT_GE(s.training.optimizer.lr, 0.0003) << id;
          EXPECT_LE(s.training.optimizer.lr, 0.01) << id;
          EXPECT_TRUE(s.network.embedding_dim == 4 || s.network.embedding_dim == 8) << id;
          EXPECT_EQ(s.training.steps, 40);
          // The name: the config's name, the varied values (the two layers vary together with
          // the same values, so one "layer=", as in the issue's example
          // "parcel-routing/interchange=0,layer=1/seed=2"), then the seed. The drawn lr is named
          // with three significant digits.
          const size_t lr_at = job.name().find(",lr=");
          ASSERT_NE(lr_at, std::string::npos) << job.name();
          const std::string lr_text = job.name().substr(lr_at + 4, job.name().find(",dim=") - lr_at - 4);
          EXPECT_NEAR(std::strtod(lr_text.c_str(), nullptr), s.training.optimizer.lr, 0.005 * s.training.optimizer.lr)
              << job.name();
          const std::string expected = "parcel-routing/interchange=" + std::string(interchange == 0 ? "0" : "1") +
                                       ",layer=" + std::to_string(layer) + ",lr=" + lr_text +
                                       ",dim=" + std::to_string(s.network.embedding_dim) + "/seed=" + std::to_string(seed);
          if (job.name() != expected) wrong_names.push_back(job.name() + " (expected " + expected + ")");
          EXPECT_EQ(s.name, job.name());
          names.insert(job.name());
          char lr[32];
          std::snprintf(lr, sizeof(lr), "%.17g", s.training.optimizer.lr);
          lrs.insert(lr);
        }
      }
    }
  }
  EXPECT_TRUE(wrong_names.empty()) << wrong_names.size() << " of 16 names differ, e.g. " << wrong_names.front();
  EXPECT_EQ(names.size(), 16u);
  EXPECT_EQ(lrs.size(), 2u);  // two random draws, shared by every grid point
  // They are the draws of the expansion that SampleDrawsFitTheirDistributionsPerScipy checks
  // against SciPy: the server stored what the library drew.
  auto plan = config::PlanFromText(ReadFile(file), file, args.overrides, 1000);
  ASSERT_TRUE(plan.ok()) << plan.status();
  std::set<std::string> planned_lrs;
  for (const config::PlannedJob& p : plan->jobs) {
    char lr[32];
    std::snprintf(lr, sizeof(lr), "%.17g", p.job.spec.training.optimizer.lr);
    planned_lrs.insert(lr);
  }
  EXPECT_EQ(lrs, planned_lrs);

  // `list --sweep` pages through and finds the same 16.
  client::ListArgs la;
  la.sweep = resp["sweep_id"];
  la.json = true;
  Ran listed = Call([&](client::Io& io) { return client::ListCommand(*api, la, io); });
  ASSERT_EQ(listed.code, 0) << listed.err;
  EXPECT_EQ(json::parse(listed.out).size(), 16u);
}

TEST(ClientSweep, AnInvalidCombinationRejectsTheWholeSweepAndStoresNothing) {
  Cluster c;
  auto api = ApiFor(c);
  ScopedTempDir dir;
  const std::string file = dir.path() + "/bad-sweep.yaml";
  // Layer 7 does not exist in a network of three hidden layers: combinations 3 and 4 of 4 (layer
  // 7 with seeds 1 and 2) are invalid, and the first of them is named.
  WriteFile(file, ParcelConfigWith("sweep:\n  grid:\n    alignment.local.layer: [1, 7]\n  seeds: [1, 2]\n"));
  // Through the server directly (no local check), to get the server's own message.
  v1::SubmitJobRequest req;
  req.set_config_yaml(ReadFile(file));
  req.set_source_name(file);
  v1::SubmitJobResponse resp;
  grpc::Status s = c.jobs().SubmitJob(c.Ctx(kAlice).get(), req, &resp);
  ASSERT_EQ(s.error_code(), grpc::StatusCode::INVALID_ARGUMENT);
  EXPECT_NE(s.error_message().find("sweep combination 3 of 4 (alignment.local.layer=7, seed=1)"), std::string::npos)
      << s.error_message();

  // `check` (offline) prints exactly the server's message.
  client::CheckArgs ca;
  ca.file = file;
  Ran checked = Call([&](client::Io& io) { return client::CheckCommand(ca, io); });
  EXPECT_EQ(checked.code, client::kExitInvalidConfig);
  EXPECT_EQ(checked.err, s.error_message() + "\n");
  EXPECT_EQ(checked.out, "");

  // `submit` refuses it with the same message and exit code 2.
  client::SubmitArgs sa;
  sa.file = file;
  Ran submitted = Call([&](client::Io& io) { return client::SubmitCommand(*api, sa, io); });
  EXPECT_EQ(submitted.code, client::kExitInvalidConfig);
  EXPECT_EQ(submitted.err, s.error_message() + "\n");

  // Nothing was stored.
  client::ListArgs la;
  la.json = true;
  Ran listed = Call([&](client::Io& io) { return client::ListCommand(*api, la, io); });
  ASSERT_EQ(listed.code, 0) << listed.err;
  EXPECT_EQ(json::parse(listed.out), json::array());
  v1::ListJobsRequest lr;
  v1::ListJobsResponse lresp;
  ASSERT_TRUE(c.jobs().ListJobs(c.Ctx(testing::kRoot).get(), lr, &lresp).ok());
  EXPECT_EQ(lresp.jobs_size(), 0);

  // A broken lone config: the same message from `check`, from the server and from the binary.
  const std::string typo = dir.path() + "/typo.yaml";
  WriteFile(typo, ParcelConfigWith("").replace(ParcelConfigWith("").find("activation: relu"), 16, "activation: rleu"));
  req.set_config_yaml(ReadFile(typo));
  req.set_source_name(typo);
  s = c.jobs().SubmitJob(c.Ctx(kAlice).get(), req, &resp);
  ASSERT_EQ(s.error_code(), grpc::StatusCode::INVALID_ARGUMENT);
  EXPECT_NE(s.error_message().find("did you mean 'relu'?"), std::string::npos) << s.error_message();
  ca.file = typo;
  checked = Call([&](client::Io& io) { return client::CheckCommand(ca, io); });
  EXPECT_EQ(checked.code, client::kExitInvalidConfig);
  EXPECT_EQ(checked.err, s.error_message() + "\n");
  auto bin = RunCommand(BinaryDir() + "/bin/graft check " + typo + " 2>&1");
  EXPECT_EQ(bin.exit_code, 2);
  EXPECT_EQ(bin.output, s.error_message() + "\n");
}

// The draws of `sample`, many of them, against SciPy's distributions (tests/python/check_draws.py):
// log_between must be log-uniform (Kolmogorov-Smirnov against scipy.stats.loguniform), between
// uniform (against scipy.stats.uniform) and whole_between a fair choice of every whole number in
// its bounds, both ends included (chi-square, scipy.stats.chisquare). 2000 draws from a fixed
// seed, so the outcome is the same on every run; level 0.001 (see the script). Being inside the
// bounds, all ExpandsGridTogetherSampleAndSeedsIntoTheRightJobs can check with two draws, would
// not tell a uniform draw from a log-uniform one. The same library function expands the sweep in
// `graft check`, `graft submit` and graftd.
TEST(ClientSweep, SampleDrawsFitTheirDistributionsPerScipy) {
  const int kDraws = 2000;
  const std::string text = ParcelConfigWith("sweep:\n  sample:\n    count: " + std::to_string(kDraws) +
                                            "\n    seed: 12\n    params:\n"
                                            "      training.optimizer.lr: {log_between: [0.0003, 0.01]}\n"
                                            "      training.loss_weights.interchange: {between: [0.25, 4.0]}\n"
                                            "      training.batch_size: {whole_between: [16, 35]}\n");
  auto plan = config::PlanFromText(text, "draws.yaml", {}, kDraws);
  ASSERT_TRUE(plan.ok()) << plan.status();
  ASSERT_EQ(plan->jobs.size(), static_cast<size_t>(kDraws));
  json lr = json::array(), weight = json::array(), batch = json::array();
  for (const config::PlannedJob& job : plan->jobs) {
    lr.push_back(job.job.spec.training.optimizer.lr);
    weight.push_back(job.job.spec.training.interchange_weight);
    batch.push_back(job.job.spec.training.batch_size);
  }
  json draws = {{"alpha", 0.001},
                {"draws",
                 {{{"name", "log_between lr"}, {"kind", "log_uniform"}, {"low", 0.0003}, {"high", 0.01}, {"values", lr}},
                  {{"name", "between interchange"}, {"kind", "uniform"}, {"low", 0.25}, {"high", 4.0}, {"values", weight}},
                  {{"name", "whole_between batch_size"}, {"kind", "whole_uniform"}, {"low", 16}, {"high", 35},
                   {"values", batch}}}}};
  ScopedTempDir dir;
  WriteFile(dir.path() + "/draws.json", draws.dump());
  auto py = RunCommand(std::string(::graft::testing::SystemPython()) + " " + SourceDir() +
                       "/tests/python/check_draws.py " + dir.path() + "/draws.json");
  EXPECT_EQ(py.exit_code, 0) << py.output;
  EXPECT_NE(py.output.find("checked 3 draws at level 0.001"), std::string::npos) << py.output;
}

// ---------------------------------------------------------------------------------------------
// watch.

struct Watched {
  std::vector<int64_t> steps;                  // points in the order received
  std::map<int64_t, json> metrics;             // step -> metrics
  std::vector<std::string> states;
};

Watched ParseWatchJson(const std::string& out) {
  Watched w;
  for (const auto& line : Lines(out)) {
    json e = json::parse(line);
    if (e["type"] == "point") {
      w.steps.push_back(e["step"]);
      w.metrics[e["step"]] = e["metrics"];
    } else if (e["type"] == "state") {
      w.states.push_back(e["job"]["state"]);
    }
  }
  return w;
}

TEST(ClientWatch, FromStepZeroAndFromAMiddleStepSeesEveryPointOnce) {
  Cluster c;
  auto worker = c.StartWorker("w1");
  const std::string id = c.Submit(kAlice, "parcel-routing",
                                  Plus(kTiny, {"training.steps=3000", "evaluation.every=150", "training.checkpoint_every=1500"}));
  ASSERT_FALSE(id.empty());
  // Watcher A from step 0, started while the job is queued or just running.
  Ran a;
  std::thread ta([&] {
    auto api = ApiFor(c);
    client::WatchArgs w;
    w.id = id;
    w.json = true;
    w.timeout_ms = 120000;
    a = Call([&](client::Io& io) { return client::WatchCommand(*api, w, io); });
  });
  // Watcher B from step 1500, started once the job has passed step 750 (or ended): ahead of the
  // job, it must still show only the points from step 1500.
  ASSERT_TRUE(WaitFor([&] { return c.Get(id).step() >= 750 || client::IsFinal(c.Get(id).state()); }, 60000));
  Ran b;
  std::thread tb([&] {
    auto api = ApiFor(c);
    client::WatchArgs w;
    w.id = id;
    w.from_step = 1500;
    w.json = true;
    w.timeout_ms = 120000;
    b = Call([&](client::Io& io) { return client::WatchCommand(*api, w, io); });
  });
  // Watcher C: a watch interrupted after its first points, resumed from the step after the last
  // one it saw; together the two parts must hold every point once.
  std::vector<int64_t> first_part;
  {
    auto api = ApiFor(c);
    grpc::Status st = api->WatchJob(id, 0, 60000, [&](const v1::JobEvent& e) {
      if (e.has_point()) first_part.push_back(e.point().step());
      return first_part.size() < 4;
    });
    ASSERT_TRUE(st.ok()) << st.error_message();
  }
  ASSERT_EQ(first_part.size(), 4u);
  Ran resumed;
  {
    auto api = ApiFor(c);
    client::WatchArgs w;
    w.id = id;
    w.from_step = first_part.back() + 1;
    w.json = true;
    w.timeout_ms = 120000;
    resumed = Call([&](client::Io& io) { return client::WatchCommand(*api, w, io); });
  }
  ta.join();
  tb.join();
  ASSERT_EQ(a.code, 0) << a.err << c.Log() << ReadFile(worker->log_path());
  ASSERT_EQ(b.code, 0) << b.err;
  ASSERT_EQ(resumed.code, 0) << resumed.err;
  const std::vector<v1::Point> stored = c.Metrics(id);
  ASSERT_EQ(stored.size(), 21u);  // 0, 150, ..., 3000
  std::vector<int64_t> all, from_1500;
  for (const auto& p : stored) {
    all.push_back(p.step());
    if (p.step() >= 1500) from_1500.push_back(p.step());
  }
  Watched wa = ParseWatchJson(a.out), wb = ParseWatchJson(b.out);
  EXPECT_EQ(wa.steps, all);  // each once, in order
  EXPECT_EQ(wb.steps, from_1500);
  std::vector<int64_t> joined = first_part;
  for (int64_t st : ParseWatchJson(resumed.out).steps) joined.push_back(st);
  EXPECT_EQ(joined, all);
  for (const auto& p : stored) {
    EXPECT_EQ(wa.metrics[p.step()], json::parse(p.metrics_json())) << p.step();
    if (p.step() >= 1500) {
      EXPECT_EQ(wb.metrics[p.step()], json::parse(p.metrics_json())) << p.step();
    }
  }
  ASSERT_FALSE(wa.states.empty());
  EXPECT_EQ(wa.states.back(), "succeeded");
  EXPECT_EQ(wb.states.back(), "succeeded");

  // Piped: one plain line per point, no escape sequences.
  auto api = ApiFor(c);
  client::WatchArgs w;
  w.id = id;
  Ran plain = Call([&](client::Io& io) { return client::WatchCommand(*api, w, io); });
  EXPECT_EQ(plain.code, 0);
  EXPECT_EQ(plain.out.find('\x1b'), std::string::npos);
  int point_lines = 0;
  for (const auto& l : Lines(plain.out)) point_lines += l.find(" step ") != std::string::npos;
  EXPECT_EQ(point_lines, 21) << plain.out;
  // On a terminal: redrawn in place, with labelled axes and a legend.
  Ran tty = Call([&](client::Io& io) { return client::WatchCommand(*api, w, io); }, true);
  EXPECT_EQ(tty.code, 0);
  EXPECT_NE(tty.out.find("\x1b[J"), std::string::npos);
  // The legend numbers the sets in training.interventions' order ([local], [careful],
  // [local, careful] in the shipped config), which is not their alphabetical order.
  for (const char* s : {"accuracy", "1.00 |", "0.50 |", "0.00 |", "steps", "3000", "T = task accuracy (acc_held_out)",
                        "1 = IIA, set local (iia_by_set)", "2 = IIA, set careful (iia_by_set)",
                        "3 = IIA, set local+careful (iia_by_set)"}) {
    EXPECT_NE(tty.out.find(s), std::string::npos) << s << "\n" << tty.out;
  }
}

// ---------------------------------------------------------------------------------------------
// wait, cancel, resubmit: exit codes of the real binary.

TEST(ClientWait, ExitCodesForSucceededFailedCancelledAndTimeout) {
  Cluster c;
  auto worker = c.StartWorker("w1");
  ScopedTempDir dir;
  const std::string config = SourceDir() + "/configs/parcel-routing.yaml";
  std::string sets;
  for (const auto& s : kTiny) sets += " --set " + s;

  auto ok = Graft(c, "submit " + config + sets + " --json");
  ASSERT_EQ(ok.exit_code, 0) << ok.output;
  const std::string ok_id = json::parse(ok.output)["job_id"];
  auto waited = Graft(c, "wait " + ok_id + " --timeout 120");
  EXPECT_EQ(waited.exit_code, 0) << waited.output << ReadFile(worker->log_path());
  EXPECT_NE(waited.output.find(ok_id + " succeeded"), std::string::npos) << waited.output;

  std::string bad_sets = sets;
  for (const auto& s : kDiverges) bad_sets += " --set " + s;
  auto bad = Graft(c, "submit " + config + bad_sets + " --json");
  ASSERT_EQ(bad.exit_code, 0) << bad.output;
  const std::string bad_id = json::parse(bad.output)["job_id"];
  waited = Graft(c, "wait " + bad_id + " --timeout 120");
  EXPECT_EQ(waited.exit_code, 4) << waited.output;
  EXPECT_NE(waited.output.find("nan"), std::string::npos) << waited.output;  // the worker's reason
  EXPECT_EQ(c.Get(bad_id).state(), v1::JOB_STATE_FAILED);

  // A sweep whose second job diverges: wait on the sweep is 4, and names the failed job.
  const std::string sweep_file = dir.path() + "/one-bad.yaml";
  WriteFile(sweep_file, ParcelConfigWith(R"(sweep:
  together:
    - {training.optimizer.lr: [0.001, 10], training.loss_weights.task: [1, 1000000], training.loss_weights.interchange: [1, 1000000]}
)"));
  auto sw = Graft(c, "submit " + sweep_file + sets + " --set training.optimizer.type=sgd --json");
  ASSERT_EQ(sw.exit_code, 0) << sw.output;
  json swj = json::parse(sw.output);
  waited = Graft(c, "wait " + swj["sweep_id"].get<std::string>() + " --timeout 120");
  EXPECT_EQ(waited.exit_code, 4) << waited.output;
  EXPECT_NE(waited.output.find("1 succeeded, 1 failed"), std::string::npos) << waited.output;
  EXPECT_NE(waited.output.find(swj["job_ids"][1].get<std::string>() + " "), std::string::npos) << waited.output;

  // A long job: wait --timeout gives 7, cancel, then wait gives 5.
  auto longer = Graft(c, "submit " + config + sets + " --set training.steps=1000000 --set evaluation.every=1000 --json");
  ASSERT_EQ(longer.exit_code, 0) << longer.output;
  const std::string long_id = json::parse(longer.output)["job_id"];
  ASSERT_TRUE(c.WaitState(long_id, v1::JOB_STATE_RUNNING, 60000));
  waited = Graft(c, "wait " + long_id + " --timeout 1");
  EXPECT_EQ(waited.exit_code, 7) << waited.output;
  auto cancelled = Graft(c, "cancel " + long_id + " --reason 'enough'");
  EXPECT_EQ(cancelled.exit_code, 0) << cancelled.output;
  waited = Graft(c, "wait " + long_id + " --timeout 60");
  EXPECT_EQ(waited.exit_code, 5) << waited.output;
  // Cancelling it again is refused (1); so is resubmitting a succeeded job.
  EXPECT_EQ(Graft(c, "cancel " + long_id).exit_code, 1);
  auto again = Graft(c, "resubmit " + ok_id);
  EXPECT_EQ(again.exit_code, 1) << again.output;
  EXPECT_NE(again.output.find("only a failed or cancelled job can be resubmitted"), std::string::npos);

  // Resubmit the failed job: a new job with the same resolved spec.
  auto re = Graft(c, "resubmit " + bad_id + " --json");
  ASSERT_EQ(re.exit_code, 0) << re.output;
  const std::string re_id = json::parse(re.output)["job_id"];
  EXPECT_NE(re_id, bad_id);
  v1::Job original = c.Get(bad_id), copy = c.Get(re_id);
  EXPECT_EQ(copy.spec_yaml(), original.spec_yaml());
  EXPECT_EQ(copy.name(), original.name());
  EXPECT_EQ(copy.labels().at("resubmit_of"), bad_id);
  waited = Graft(c, "wait " + re_id + " --timeout 120");
  EXPECT_EQ(waited.exit_code, 4) << waited.output;  // the same spec diverges the same way

  // Usage mistakes and an unreachable server.
  EXPECT_EQ(Graft(c, "wait 12").exit_code, 3);
  EXPECT_EQ(Graft(c, "wiat " + ok_id).exit_code, 3);
  EXPECT_EQ(Graft(c, "list --state runing").exit_code, 3);
  EXPECT_EQ(Graft(c, "show j-99999").exit_code, 1);
  auto away = RunCommand(BinaryDir() + "/bin/graft --server 127.0.0.1:1 --token x list");
  EXPECT_EQ(away.exit_code, 6) << away.output;
  auto wrong = RunCommand(BinaryDir() + "/bin/graft --server " + c.address() + " --token nope list");
  EXPECT_EQ(wrong.exit_code, 6) << wrong.output;
}

// ---------------------------------------------------------------------------------------------
// One table of exit codes for graft, graft-worker and graftd (README "Exit codes"), on the real
// binaries. The numbers are written out, not taken from proto/exit_codes.h: they are the contract
// scripts rely on, and a changed constant must fail here. graft's 4, 5, 6 and 7 need jobs and a
// coordinator and are checked in ClientWait.ExitCodesForSucceededFailedCancelledAndTimeout.

struct ExitCase {
  std::string command;   // run with /bin/sh from a temporary directory
  int code;              // the README's code
  std::string message;   // a fragment of what the program says, so the code has its reason
};

TEST(ExitCodes, OneTableForGraftGraftWorkerAndGraftd) {
  ScopedTempDir dir;
  const std::string d = dir.path();
  // graft with no server, token or client config from this process's environment.
  auto graft_with = [&](const std::string& env) {
    return "env -u GRAFT_TOKEN -u GRAFT_SERVER -u GRAFT_CONFIG HOME=" + d + " " + env + " " + BinaryDir() + "/bin/graft";
  };
  const std::string graft = graft_with("");
  const std::string worker = BinaryDir() + "/bin/graft-worker";
  const std::string graftd = BinaryDir() + "/bin/graftd";
  const std::string config = SourceDir() + "/configs/parcel-routing.yaml";
  WriteFile(d + "/bad.yaml", ParcelConfigWith("").replace(ParcelConfigWith("").find("activation: relu"), 16,
                                                          "activation: rleu"));
  WriteFile(d + "/client.yaml", "server: 127.0.0.1:1\ntokn: abc\n");
  WriteFile(d + "/graftd-bad.yaml", "listen: 127.0.0.1:0\nlease_secs: 3\n");
  WriteFile(d + "/tokens.yaml", "[]\n");
  WriteFile(d + "/a-file", "not a directory\n");
  const std::string small = " --set training.steps=60 --set training.batch_size=32 --set evaluation.every=20"
                            " --set evaluation.triples=128 --set network.hidden=[16,16,16]"
                            " --set alignment.local.units=0-3 --set alignment.careful.units=4-7"
                            " --set training.checkpoint_every=10";
  const std::vector<ExitCase> cases = {
      // graft: 0, 1, 2 (config and settings), 3, 6.
      {graft + " --help", 0, "Exit codes"},
      {graft + " check " + config, 0, "job parcel-routing"},
      {graft + " check " + d + "/missing.yaml", 1, "cannot open"},
      {graft + " check " + d + "/bad.yaml", 2, "did you mean 'relu'?"},
      {graft + " --server 127.0.0.1:1 --token x submit " + d + "/bad.yaml", 2, "did you mean 'relu'?"},
      {graft + " list", 2, "no token"},
      {graft_with("GRAFT_CONFIG=" + d + "/client.yaml") + " list", 2, "client.yaml:2:1: unknown key 'tokn'"},
      {graft, 3, "graft --help"},
      {graft + " shwo j-1", 3, "did you mean 'show'?"},
      {graft + " check", 3, "CONFIG"},
      {graft + " list --bogus", 3, "--bogus"},
      {graft + " --token x show 3", 3, "did you mean 'j-3'?"},
      {graft + " --token x list --state runing", 3, "did you mean 'running'?"},
      {graft + " --server 127.0.0.1:1 --token x list", 6, "cannot reach graftd"},
      // graft-worker, every subcommand: 0, 1, 2, 3, 8.
      {worker + " --help", 0, "Exit codes"},
      {worker + " check " + config, 0, "job parcel-routing"},
      {worker + " check " + d + "/missing.yaml", 1, "missing.yaml"},
      {worker + " evaluate " + config + " --weights " + d + "/none.pt --out " + d + "/e", 1, "none.pt"},
      {worker + " check " + d + "/bad.yaml", 2, "did you mean 'relu'?"},
      {worker + " run " + d + "/bad.yaml --out " + d + "/r", 2, "did you mean 'relu'?"},
      {worker + " evaluate " + d + "/bad.yaml --weights " + d + "/none.pt --out " + d + "/e", 2, "did you mean"},
      {worker + " scan " + d + "/bad.yaml --weights " + d + "/none.pt --out " + d + "/e", 2, "did you mean"},
      {worker + " das " + d + "/bad.yaml --weights " + d + "/none.pt --out " + d + "/e", 2, "did you mean"},
      {worker + " serve --server 127.0.0.1:1 --token-file " + d + "/missing.token", 2, "missing.token"},
      {worker, 3, "subcommand"},
      {worker + " trian " + config, 3, "subcommand"},
      {worker + " check", 3, "CONFIG"},
      {worker + " run " + config, 3, "--out"},
      {worker + " run " + config + " --out " + d + "/r --stop-after-step soon", 3, "soon"},
      {worker + " evaluate " + config + " --out " + d + "/e", 3, "--weights"},
      {worker + " scan " + config + " --out " + d + "/e", 3, "--weights"},
      {worker + " das " + config + " --out " + d + "/e", 3, "--weights"},
      {worker + " serve", 3, "--token-file"},
      {worker + " run " + config + " --out " + d + "/stopped" + small + " --stop-after-step 30", 8,
       "stopped after step 30"},
      {worker + " run " + config + " --out " + d + "/stopped" + small + " --resume " + d + "/stopped", 0,
       "finished 60 steps"},
      // graftd: 0 (--help; a clean stop is below), 1, 2, 3.
      {graftd + " --help", 0, "Exit codes"},
      {graftd + " --listen 127.0.0.1:0 --tokens-file " + d + "/tokens.yaml --data-dir " + d + "/a-file/data", 1,
       "cannot create the data dir"},
      {graftd + " --config " + d + "/graftd-bad.yaml", 2, "graftd-bad.yaml:2:1: unknown key 'lease_secs'"},
      {graftd + " --listen 127.0.0.1:0 --data-dir " + d + "/data", 2, "no tokens file"},
      {graftd + " --listen 0.0.0.0:0 --tokens-file " + d + "/tokens.yaml --data-dir " + d + "/data", 2,
       "--allow-plaintext"},
      {graftd + " --bogus", 3, "--bogus"},
      {graftd + " --lease-seconds soon", 3, "soon"},
      {graftd + " --durability fast", 3, "expected normal | full"},
  };
  for (const ExitCase& c : cases) {
    auto r = RunCommand("cd " + d + " && " + c.command);
    EXPECT_EQ(r.exit_code, c.code) << c.command << "\n" << r.output;
    EXPECT_NE(r.output.find(c.message), std::string::npos) << c.command << "\n" << r.output;
  }

  // graftd's 0: a clean stop on SIGTERM, once it listens.
  testing::ScopedProcess d0({graftd, "--listen", "127.0.0.1:0", "--tokens-file", d + "/tokens.yaml", "--data-dir",
                             d + "/data", "--port-file", d + "/port"},
                            d + "/graftd.log");
  ASSERT_TRUE(d0.started());
  // graftd renames the port file into place once it listens.
  ASSERT_TRUE(WaitFor([&] { return std::ifstream(d + "/port").good(); }, 30000)) << ReadFile(d + "/graftd.log");
  ASSERT_TRUE(d0.Signal(SIGTERM));
  EXPECT_EQ(d0.Wait(30000), 0) << ReadFile(d + "/graftd.log");
}

// ---------------------------------------------------------------------------------------------
// compare, metrics and fetch on a finished sweep.

// Student-t quantiles from SciPy for the given degrees of freedom (p = 0.975).
std::map<int, double> ScipyT975(const std::set<int>& dfs) {
  std::string list;
  for (int d : dfs) list += (list.empty() ? "" : ",") + std::to_string(d);
  auto r = RunCommand(std::string(testing::SystemPython()) +
                      " -c 'from scipy import stats\nfor d in [" + list +
                      "]: print(d, repr(float(stats.t.ppf(0.975, d))))'");
  EXPECT_EQ(r.exit_code, 0) << r.output;
  std::map<int, double> out;
  std::istringstream in(r.output);
  int d;
  double t;
  while (in >> d >> t) out[d] = t;
  return out;
}

TEST(ClientCompare, MatchesAHandComputationAndMetricsParseBack) {
  Cluster c;
  auto w1 = c.StartWorker("w1");
  auto w2 = c.StartWorker("w2");
  auto api = ApiFor(c);
  ScopedTempDir dir;
  const std::string file = dir.path() + "/seeds.yaml";
  WriteFile(file, ParcelConfigWith("sweep:\n  grid:\n    training.loss_weights.interchange: [0.0, 1.0]\n  seeds: [1, 2, 3]\n"));
  client::SubmitArgs sa;
  sa.file = file;
  sa.overrides = kTiny;
  sa.json = true;
  Ran sub = Call([&](client::Io& io) { return client::SubmitCommand(*api, sa, io); });
  ASSERT_EQ(sub.code, 0) << sub.err;
  const json submitted = json::parse(sub.out);
  const std::string sweep = submitted["sweep_id"];
  ASSERT_EQ(submitted["job_ids"].size(), 6u);
  client::WatchArgs wa;
  wa.id = sweep;
  wa.timeout_ms = 150000;
  Ran waited = Call([&](client::Io& io) { return client::WaitCommand(*api, wa, io); });
  ASSERT_EQ(waited.code, 0) << waited.out << waited.err << c.Log();

  // By hand: group the stored results by name without "/seed=N".
  std::map<std::string, std::vector<double>> acc, iia;
  std::map<std::string, int> seeds;
  for (const auto& id : submitted["job_ids"]) {
    v1::Job job = c.Get(id);
    ASSERT_EQ(job.state(), v1::JOB_STATE_SUCCEEDED);
    const std::string name = job.name();
    const std::string setting = name.substr(0, name.rfind("/seed="));
    json r = json::parse(job.result_json());
    acc[setting].push_back(r["acc_held_out"]["value"]);
    iia[setting].push_back(r["iia_changed_held_out"]["value"]);
    ++seeds[setting];
  }
  ASSERT_EQ(seeds.size(), 2u);
  EXPECT_EQ(seeds["parcel-routing/interchange=0"], 3);
  EXPECT_EQ(seeds["parcel-routing/interchange=1"], 3);
  const std::map<int, double> t = ScipyT975({2});
  ASSERT_EQ(t.count(2), 1u);
  client::CompareArgs ca;
  ca.id = sweep;
  ca.format = "json";
  Ran cmp = Call([&](client::Io& io) { return client::CompareCommand(*api, ca, io); });
  ASSERT_EQ(cmp.code, 0) << cmp.err;
  json out = json::parse(cmp.out);
  ASSERT_EQ(out["settings"].size(), 2u);
  bool some_spread = false;  // the interval check is not vacuous: some seeds disagree
  for (const auto& s : out["settings"]) {
    const std::string setting = s["setting"];
    EXPECT_EQ(s["seeds"], 3);
    for (const auto& [key, values] : {std::pair{"acc_held_out", acc[setting]}, std::pair{"iia_changed_held_out", iia[setting]}}) {
      ASSERT_EQ(values.size(), 3u);
      const double mean = (values[0] + values[1] + values[2]) / 3;
      double ss = 0;
      for (double v : values) ss += (v - mean) * (v - mean);
      const double sd = std::sqrt(ss / 2);
      const double half = t.at(2) * sd / std::sqrt(3.0);
      some_spread = some_spread || sd > 1e-6;
      EXPECT_NEAR(s[key]["mean"].get<double>(), mean, 1e-12) << setting << " " << key;
      EXPECT_NEAR(s[key]["sd"].get<double>(), sd, 1e-12) << setting << " " << key;
      EXPECT_NEAR(s[key]["lo"].get<double>(), mean - half, 1e-9) << setting << " " << key;
      EXPECT_NEAR(s[key]["hi"].get<double>(), mean + half, 1e-9) << setting << " " << key;
    }
  }
  EXPECT_TRUE(some_spread) << cmp.out;
  ca.format = "table";
  Ran table = Call([&](client::Io& io) { return client::CompareCommand(*api, ca, io); });
  ASSERT_EQ(table.code, 0);
  EXPECT_NE(table.out.find("parcel-routing/interchange=0"), std::string::npos) << table.out;
  EXPECT_NE(table.out.find("SEEDS"), std::string::npos) << table.out;

  // watch SWEEP on the finished sweep: every job's points once, each job's final state, and on a
  // terminal the footer with the counts by state.
  client::WatchArgs sw;
  sw.id = sweep;
  sw.json = true;
  Ran swatch = Call([&](client::Io& io) { return client::WatchCommand(*api, sw, io); });
  ASSERT_EQ(swatch.code, 0) << swatch.err;
  std::map<std::string, std::vector<int64_t>> steps_by_job;
  std::map<std::string, std::string> final_state;
  for (const auto& line : Lines(swatch.out)) {
    json e = json::parse(line);
    if (e["type"] == "point") steps_by_job[e["job_id"]].push_back(e["step"]);
    if (e["type"] == "state") final_state[e["job_id"]] = e["job"]["state"];
  }
  ASSERT_EQ(steps_by_job.size(), 6u) << swatch.out;
  for (const auto& [job_id, steps] : steps_by_job) {
    EXPECT_EQ(steps, (std::vector<int64_t>{0, 20, 40})) << job_id;
    EXPECT_EQ(final_state[job_id], "succeeded") << job_id;
  }
  sw.json = false;
  Ran stty = Call([&](client::Io& io) { return client::WatchCommand(*api, sw, io); }, true);
  EXPECT_EQ(stty.code, 0);
  EXPECT_NE(stty.out.find("6 jobs: 0 queued, 0 running, 6 succeeded, 0 failed, 0 cancelled"), std::string::npos)
      << stty.out;
  EXPECT_NE(stty.out.find("[##########]  40/40"), std::string::npos) << stty.out;

  // metrics: CSV and JSONL parse back to the stored points.
  const std::string id = json::parse(sub.out)["job_ids"][0];
  const std::vector<v1::Point> stored = c.Metrics(id);
  ASSERT_EQ(stored.size(), 3u);  // steps 0, 20, 40
  client::MetricsArgs ma;
  ma.id = id;
  ma.format = "jsonl";
  Ran jl = Call([&](client::Io& io) { return client::MetricsCommand(*api, ma, io); });
  ASSERT_EQ(jl.code, 0) << jl.err;
  std::vector<std::string> lines = Lines(jl.out);
  ASSERT_EQ(lines.size(), stored.size());
  for (size_t i = 0; i < stored.size(); ++i) {
    json line = json::parse(lines[i]);
    EXPECT_EQ(line["attempt"], stored[i].attempt());
    line.erase("attempt");
    EXPECT_EQ(line, json::parse(stored[i].metrics_json())) << i;
  }
  // --format json: the same objects in one array (one JSON value, as every --json but watch's).
  ma.format = "json";
  Ran one = Call([&](client::Io& io) { return client::MetricsCommand(*api, ma, io); });
  ASSERT_EQ(one.code, 0) << one.err;
  json arr = json::parse(one.out);
  ASSERT_TRUE(arr.is_array()) << one.out;
  ASSERT_EQ(arr.size(), stored.size());
  for (size_t i = 0; i < stored.size(); ++i) EXPECT_EQ(arr[i], json::parse(lines[i])) << i;

  // The --json rule (README "`--json` means one JSON value"), on the real binary: each command's
  // standard output parses as one JSON document (nlohmann's parse refuses trailing text, so two
  // JSON Lines fail), and `metrics --json` is the array above.
  const std::string sweep_id = submitted["sweep_id"];
  for (const std::string& cmd : std::vector<std::string>{"list --json", "list --sweep " + sweep_id + " --json", "show " + id + " --json",
                                 "wait " + id + " --json", "wait " + sweep_id + " --json", "metrics " + id + " --json",
                                 "compare " + sweep_id + " --json"}) {
    const std::string out_file = dir.path() + "/json-out";
    auto r = Graft(c, cmd + " > " + out_file);
    ASSERT_EQ(r.exit_code, 0) << cmd << ": " << r.output;
    json doc = json::parse(ReadFile(out_file), nullptr, false);
    EXPECT_FALSE(doc.is_discarded()) << cmd << " printed more or less than one JSON value:\n" << ReadFile(out_file);
    if (cmd.rfind("metrics", 0) == 0) {
      EXPECT_EQ(doc, arr);
    }
    if (cmd.rfind("list --sweep", 0) == 0) {
      EXPECT_EQ(doc.size(), 6u);
    }
  }

  // list: the IIA column is the latest changed-case IIA (as watch and compare show), not the
  // overall one; the standard-training jobs make the two differ, so showing iia_held_out fails.
  client::ListArgs la;
  la.sweep = sweep_id;
  Ran listed = Call([&](client::Io& io) { return client::ListCommand(*api, la, io); });
  ASSERT_EQ(listed.code, 0) << listed.err;
  std::vector<std::string> rows = Lines(listed.out);
  ASSERT_EQ(rows.size(), 7u) << listed.out;
  EXPECT_NE(rows[0].find("  IIA CHANGED  "), std::string::npos) << rows[0];
  const size_t column = rows[0].find("IIA CHANGED");
  bool overall_differs = false;
  for (const auto& job_id : submitted["job_ids"]) {
    v1::Job job = c.Get(job_id);
    json latest = json::parse(job.latest().metrics_json());
    char changed[16], overall[16];
    std::snprintf(changed, sizeof(changed), "%.3f", latest["iia_changed_held_out"]["value"].get<double>());
    std::snprintf(overall, sizeof(overall), "%.3f", latest["iia_held_out"]["value"].get<double>());
    overall_differs = overall_differs || std::string(changed) != overall;
    bool found = false;
    for (const auto& row : rows) {
      if (row.rfind(job.id() + " ", 0) != 0) continue;
      found = true;
      EXPECT_EQ(row.substr(column, 5), changed) << row;
    }
    EXPECT_TRUE(found) << job.id() << "\n" << listed.out;
  }
  EXPECT_TRUE(overall_differs) << "every job has iia_held_out == iia_changed_held_out; the check above proves nothing";

  ma.format = "csv";
  Ran csv = Call([&](client::Io& io) { return client::MetricsCommand(*api, ma, io); });
  ASSERT_EQ(csv.code, 0) << csv.err;
  lines = Lines(csv.out);
  ASSERT_EQ(lines.size(), stored.size() + 1);
  auto split = [](const std::string& l) {
    std::vector<std::string> cells;
    std::string cell;
    for (char ch : l) {
      if (ch == ',') {
        cells.push_back(cell);
        cell.clear();
      } else {
        cell += ch;
      }
    }
    cells.push_back(cell);
    return cells;
  };
  const std::vector<std::string> header = split(lines[0]);
  ASSERT_GE(header.size(), 2u);
  EXPECT_EQ(header[0], "step");
  EXPECT_EQ(header[1], "attempt");
  for (const char* col : {"acc_held_out.value", "acc_held_out.lo", "acc_held_out.hi", "acc_held_out.correct", "acc_held_out.n",
                          "iia_changed_held_out.value", "iia_by_set.local.value", "iia_by_set.local+careful.hi"}) {
    EXPECT_NE(std::find(header.begin(), header.end(), col), header.end()) << col << " in " << lines[0];
  }
  for (size_t i = 0; i < stored.size(); ++i) {
    const std::vector<std::string> cells = split(lines[i + 1]);
    ASSERT_EQ(cells.size(), header.size());
    EXPECT_EQ(std::stoll(cells[0]), stored[i].step());
    EXPECT_EQ(std::stoi(cells[1]), stored[i].attempt());
    json m = json::parse(stored[i].metrics_json());
    int checked = 0;
    for (size_t k = 2; k < header.size(); ++k) {
      // Walk the stored object along the dotted column name (set names contain no dots).
      json v = m;
      std::string path = header[k];
      // iia_by_set.<set>.<field>: the set name may hold '+', never '.'.
      size_t start = 0;
      for (size_t dot; (dot = path.find('.', start)) != std::string::npos; start = dot + 1) v = v[path.substr(start, dot - start)];
      v = v[path.substr(start)];
      if (v.is_null()) {
        EXPECT_EQ(cells[k], "") << header[k];
      } else if (v.is_number()) {
        EXPECT_EQ(std::strtod(cells[k].c_str(), nullptr), v.get<double>()) << header[k] << " row " << i;
      } else {
        EXPECT_EQ(cells[k], v.is_string() ? v.get<std::string>() : v.dump()) << header[k];
      }
      ++checked;
    }
    EXPECT_GT(checked, 20);
  }

  // fetch: every artifact, SHA-256 checked; the digests agree with coreutils' sha256sum.
  client::FetchArgs fa;
  fa.id = id;
  fa.out_dir = dir.path() + "/artifacts";
  Ran fetched = Call([&](client::Io& io) { return client::FetchCommand(*api, fa, io); });
  ASSERT_EQ(fetched.code, 0) << fetched.err;
  for (const char* name : {"weights.pt", "metrics.jsonl", "result.json", "spec.yaml", "checkpoint.pt"}) {
    const std::string path = fa.out_dir + "/" + name;
    auto sum = RunCommand("sha256sum " + path);
    ASSERT_EQ(sum.exit_code, 0) << name << ": " << sum.output << fetched.out;
    const std::string digest = sum.output.substr(0, 64);
    EXPECT_NE(fetched.out.find(path + "  "), std::string::npos) << fetched.out;
    EXPECT_NE(fetched.out.find("sha256 " + digest + " verified"), std::string::npos) << name << "\n" << fetched.out;
  }
  EXPECT_EQ(json::parse(ReadFile(fa.out_dir + "/result.json")), json::parse(c.Get(id).result_json()));
}

// ---------------------------------------------------------------------------------------------
// fetch of failures.jsonl and of the scan and DAS files a submitted config asks for.

// The counterfactual route of parcel-routing written out by hand from configs/parcel-routing.yaml
// (local: origin == dest; careful: weight heavy or oversize, or fragile; route = 2*local +
// careful over van, truck, bike, courier), independent of graft's compiled tables: the
// variables named in `set` take their values from the source, the rest from the base.
std::string HandRoute(const json& base, const json& source, const std::string& set) {
  auto truthy = [](const json& v) { return v.is_boolean() ? v.get<bool>() : v.get<std::string>() == "true"; };
  auto local = [](const json& in) { return in.at("origin") == in.at("dest"); };
  auto careful = [&](const json& in) {
    const std::string w = in.at("weight");
    return w == "heavy" || w == "oversize" || truthy(in.at("fragile"));
  };
  const bool moves_local = set == "local" || set == "local+careful";
  const bool moves_careful = set == "careful" || set == "local+careful";
  const int l = (moves_local ? local(source) : local(base)) ? 1 : 0;
  const int k = (moves_careful ? careful(source) : careful(base)) ? 1 : 0;
  static const char* const kRoutes[] = {"van", "truck", "bike", "courier"};
  return kRoutes[2 * l + k];
}

// A standard-training job (interchange 0, so its interventions fail often) with scan: and das:
// blocks: the worker runs both after training and uploads their files beside failures.jsonl;
// fetch downloads each one with its SHA-256 checked against coreutils' sha256sum, and the files
// hold what they should: every failure line is a real failure of the algorithm written out by
// hand, as many as result.json's IIA count says (at most 200), and the scan and DAS reports
// name the config's variables. A job without the blocks fetches failures.jsonl and does not
// report scan or DAS files as missing. Catches a worker that leaves out failures.jsonl or the
// analysis files, a coordinator that refuses their names, and a fetch that does not ask for them.
TEST(ClientFetch, FailuresAndTheScanAndDasFilesOfASubmittedJob) {
  Cluster c;
  auto worker = c.StartWorker("w1");
  ScopedTempDir dir;
  auto api = ApiFor(c);
  const std::string file = dir.path() + "/analysed.yaml";
  WriteFile(file, ParcelConfigWith("scan: {block: 4}\ndas: {steps: 20, batch_size: 64}\n"));
  client::SubmitArgs sa;
  sa.file = file;
  sa.overrides = Plus(kTiny, {"training.loss_weights.interchange=0"});
  sa.json = true;
  Ran submitted = Call([&](client::Io& io) { return client::SubmitCommand(*api, sa, io); });
  ASSERT_EQ(submitted.code, 0) << submitted.err;
  const std::string id = json::parse(submitted.out)["job_id"];
  ASSERT_TRUE(c.WaitState(id, v1::JOB_STATE_SUCCEEDED, 120000)) << c.Get(id).error() << ReadFile(worker->log_path());

  client::FetchArgs fa;
  fa.id = id;
  fa.out_dir = dir.path() + "/analysed";
  Ran fetched = Call([&](client::Io& io) { return client::FetchCommand(*api, fa, io); });
  ASSERT_EQ(fetched.code, 0) << fetched.err;
  EXPECT_EQ(fetched.out.find("not stored"), std::string::npos) << fetched.out;
  for (const char* name : {"failures.jsonl", "scan.json", "scan.tsv", "scan.svg", "das.json", "rotation.pt"}) {
    const std::string path = fa.out_dir + "/" + name;
    auto sum = RunCommand("sha256sum " + path);
    ASSERT_EQ(sum.exit_code, 0) << name << ": " << sum.output << fetched.out;
    EXPECT_NE(fetched.out.find(path + "  "), std::string::npos) << fetched.out;
    EXPECT_NE(fetched.out.find("sha256 " + sum.output.substr(0, 64) + " verified"), std::string::npos)
        << name << "\n" << fetched.out;
  }

  const json result = json::parse(ReadFile(fa.out_dir + "/result.json"));
  const int64_t failing = result["iia_held_out"]["n"].get<int64_t>() - result["iia_held_out"]["correct"].get<int64_t>();
  ASSERT_GT(failing, 0) << "a standard-training network fails some interchange interventions";
  const std::vector<std::string> lines = Lines(ReadFile(fa.out_dir + "/failures.jsonl"));
  EXPECT_EQ(static_cast<int64_t>(lines.size()), std::min<int64_t>(200, failing));
  for (const std::string& line : lines) {
    const json f = json::parse(line);
    const std::string set = f.at("set");
    EXPECT_TRUE(set == "local" || set == "careful" || set == "local+careful") << line;
    EXPECT_EQ(f.at("base_label"), HandRoute(f.at("base"), f.at("base"), "")) << line;
    EXPECT_EQ(f.at("expected"), HandRoute(f.at("base"), f.at("source"), set)) << line;
    EXPECT_NE(f.at("predicted"), f.at("expected")) << line;
  }
  const json scan = json::parse(ReadFile(fa.out_dir + "/scan.json"));
  for (const char* variable : {"local", "careful"}) {
    EXPECT_EQ(scan["variables"][variable]["best"]["units"].size(), 4u) << scan.dump();
  }
  EXPECT_NE(ReadFile(fa.out_dir + "/scan.svg").find("<svg"), std::string::npos);
  const json das = json::parse(ReadFile(fa.out_dir + "/das.json"));
  EXPECT_EQ(das["layer"], 1);
  EXPECT_EQ(das["steps"], 20);
  EXPECT_TRUE(das["network"].contains("iia_changed_held_out")) << das.dump();
  EXPECT_TRUE(das["control_untrained_network"].contains("iia_changed_held_out")) << das.dump();

  // Without analysis blocks: failures.jsonl, and no scan or DAS file is missed.
  const std::string plain = c.Submit(kAlice, "parcel-routing", kTiny);
  ASSERT_TRUE(c.WaitState(plain, v1::JOB_STATE_SUCCEEDED, 120000)) << c.Get(plain).error();
  fa.id = plain;
  fa.out_dir = dir.path() + "/plain";
  fetched = Call([&](client::Io& io) { return client::FetchCommand(*api, fa, io); });
  ASSERT_EQ(fetched.code, 0) << fetched.err;
  EXPECT_NE(fetched.out.find(fa.out_dir + "/failures.jsonl  "), std::string::npos) << fetched.out;
  EXPECT_EQ(fetched.out.find("scan"), std::string::npos) << fetched.out;
  EXPECT_EQ(fetched.out.find("das"), std::string::npos) << fetched.out;
}

// ---------------------------------------------------------------------------------------------
// A cancellation's reason has a field of its own; `error` is for failures.

// A running job cancelled with a reason: Job.cancel_reason names the user, the reason and how
// the worker stopped, Job.error stays empty, and `wait`, `show` and `show --json` say so; a job
// cancelled while queued has no worker part; a failed job has its error and no cancel reason.
// Catches the reason landing in `error` again, and the client printing the wrong field.
TEST(ClientCancel, TheReasonHasItsOwnFieldAndReadsAsBefore) {
  Cluster c;
  auto worker = c.StartWorker("w1");
  auto api = ApiFor(c);
  const std::string running = c.Submit(kAlice, "parcel-routing",
                                       Plus(kTiny, {"training.steps=1000000", "evaluation.every=1000"}));
  ASSERT_TRUE(c.WaitState(running, v1::JOB_STATE_RUNNING, 60000)) << ReadFile(worker->log_path());
  client::CancelArgs ca;
  ca.id = running;
  ca.reason = "wrong alignment";
  Ran cancelled = Call([&](client::Io& io) { return client::CancelCommand(*api, ca, io); });
  ASSERT_EQ(cancelled.code, 0) << cancelled.err;
  client::WatchArgs wa;
  wa.id = running;
  wa.timeout_ms = 60000;
  Ran waited = Call([&](client::Io& io) { return client::WaitCommand(*api, wa, io); });
  EXPECT_EQ(waited.code, 5) << waited.out << waited.err;
  // The worker's acknowledgement is stored after the state change: wait for it.
  ASSERT_TRUE(WaitFor([&] { return c.Get(running).cancel_reason().find("; the worker") != std::string::npos; }, 60000))
      << c.Get(running).cancel_reason();
  const v1::Job job = c.Get(running);
  EXPECT_EQ(job.error(), "");
  EXPECT_EQ(job.cancel_reason().rfind("cancelled by alice: wrong alignment; the worker stopped at step ", 0), 0u)
      << job.cancel_reason();
  waited = Call([&](client::Io& io) { return client::WaitCommand(*api, wa, io); });
  EXPECT_EQ(waited.code, 5);
  EXPECT_NE(waited.out.find(running + " cancelled: " + job.cancel_reason() + "\n"), std::string::npos) << waited.out;
  client::ShowArgs sh;
  sh.id = running;
  Ran shown = Call([&](client::Io& io) { return client::ShowCommand(*api, sh, io); });
  ASSERT_EQ(shown.code, 0) << shown.err;
  EXPECT_NE(shown.out.find(job.cancel_reason()), std::string::npos) << shown.out;
  EXPECT_EQ(shown.out.find("error"), std::string::npos) << shown.out;
  sh.json = true;
  shown = Call([&](client::Io& io) { return client::ShowCommand(*api, sh, io); });
  ASSERT_EQ(shown.code, 0) << shown.err;
  const json shown_json = json::parse(shown.out);
  EXPECT_EQ(shown_json["cancel_reason"], job.cancel_reason());
  EXPECT_EQ(shown_json["error"], "");

  // Cancelled while still queued: with no worker running, the job is never leased.
  worker.reset();
  const std::string queued = c.Submit(kAlice, "parcel-routing", kTiny);
  ca.id = queued;
  ca.reason = "";
  cancelled = Call([&](client::Io& io) { return client::CancelCommand(*api, ca, io); });
  ASSERT_EQ(cancelled.code, 0) << cancelled.err;
  EXPECT_EQ(c.Get(queued).cancel_reason(), "cancelled by alice");
  EXPECT_EQ(c.Get(queued).error(), "");

  // A failure keeps its error and has no cancel reason.
  worker = c.StartWorker("w2");
  const std::string failed = c.Submit(kAlice, "parcel-routing", Plus(kTiny, kDiverges));
  ASSERT_TRUE(c.WaitState(failed, v1::JOB_STATE_FAILED, 120000)) << ReadFile(worker->log_path());
  EXPECT_NE(c.Get(failed).error().find("nan"), std::string::npos) << c.Get(failed).error();
  EXPECT_EQ(c.Get(failed).cancel_reason(), "");
}

// ---------------------------------------------------------------------------------------------
// A script in another language: Python with Debian's grpcio and stubs generated at test time.

TEST(ClientPython, AScriptSubmitsAJobAndPollsItToCompletion) {
  Cluster c;
  auto worker = c.StartWorker("w1");
  std::string cmd = std::string(testing::SystemPython()) + " " + SourceDir() + "/tests/python/submit_and_poll.py" +
                    " --address " + c.address() + " --token " + kAlice + " --proto-dir " + SourceDir() + "/proto" +
                    " --config " + SourceDir() + "/configs/parcel-routing.yaml --timeout 120";
  for (const auto& s : kTiny) cmd += " --set " + s;
  auto r = RunCommand(cmd + " 2>&1");
  ASSERT_EQ(r.exit_code, 0) << r.output << c.Log();
  json out = json::parse(Lines(r.output).back());
  EXPECT_EQ(out["state"], "JOB_STATE_SUCCEEDED");
  EXPECT_EQ(out["points"], 3);
  EXPECT_EQ(out["last_step"], 40);
  v1::Job job = c.Get(out["job_id"]);
  EXPECT_EQ(job.state(), v1::JOB_STATE_SUCCEEDED);
  EXPECT_EQ(json::parse(job.result_json())["iia_held_out"]["value"], out["iia_held_out"]);
}

// ---------------------------------------------------------------------------------------------
// Pieces, against outside references.

TEST(ClientStats, TQuantileMatchesScipy) {
  ScopedTempDir dir;
  std::ostringstream lines;
  int n = 0;
  for (double p : {0.6, 0.9, 0.95, 0.975, 0.995, 0.9995, 0.025, 0.1}) {
    for (double df : {1.0, 2.0, 3.0, 4.0, 5.0, 7.0, 10.0, 19.0, 30.0, 100.0, 1000.0, 2.5}) {
      char buf[96];
      std::snprintf(buf, sizeof(buf), "%.17g %.17g %.17g\n", p, df, client::StudentTQuantile(p, df));
      lines << buf;
      ++n;
    }
  }
  WriteFile(dir.path() + "/t.txt", lines.str());
  auto r = RunCommand(std::string(testing::SystemPython()) + " " + SourceDir() + "/tests/python/check_t_quantile.py " +
                      dir.path() + "/t.txt 2>&1");
  EXPECT_EQ(r.exit_code, 0) << r.output;
  EXPECT_NE(r.output.find(std::to_string(n) + " quantiles"), std::string::npos) << r.output;
}

TEST(ClientStats, MeanIntervalByHand) {
  // Closed forms of Student-t quantiles (handbook facts, from memory): df = 1 is the Cauchy
  // distribution, t_p = tan(pi (p - 1/2)); df = 2 gives t_p = (2p - 1) / sqrt(2 p (1 - p)).
  // For p = 0.975: 12.7062047361747 and 0.95 / sqrt(0.04875) = 4.30265272974946. (SciPy's
  // t.ppf(0.975, 2) prints 4.302652729911275 on this machine, 1.6e-10 off the closed form.)
  for (double p : {0.6, 0.9, 0.975, 0.995}) {
    EXPECT_NEAR(client::StudentTQuantile(p, 1), std::tan(M_PI * (p - 0.5)), 1e-12 * std::tan(M_PI * (p - 0.5))) << p;
    const double t2 = (2 * p - 1) / std::sqrt(2 * p * (1 - p));
    EXPECT_NEAR(client::StudentTQuantile(p, 2), t2, 1e-13 * t2) << p;
  }
  // 0.9, 0.8, 1.0: mean 0.9, sd sqrt((0.01 + 0.01 + 0) / 2) = 0.1, so the half-width of the 95%
  // interval is 4.30265272974946 * 0.1 / sqrt(3) = 0.430265273 / 1.732050808 = 0.2484137712.
  client::MeanInterval m = client::MeanWithInterval({0.9, 0.8, 1.0});
  EXPECT_EQ(m.n, 3);
  EXPECT_NEAR(m.mean, 0.9, 1e-15);
  EXPECT_NEAR(m.sd, 0.1, 1e-15);
  ASSERT_TRUE(m.has_interval);
  EXPECT_NEAR(m.hi - m.mean, 0.2484137712, 1e-9);
  EXPECT_NEAR(m.mean - m.lo, 0.2484137712, 1e-9);
  // One seed: no interval.
  client::MeanInterval one = client::MeanWithInterval({0.75});
  EXPECT_EQ(one.n, 1);
  EXPECT_FALSE(one.has_interval);
  EXPECT_EQ(one.mean, 0.75);
}

TEST(ClientSha256, MatchesFipsExamplesAndCoreutils) {
  // FIPS 180-2, Appendix B (one-block, two-block and long messages) and the empty message;
  // digests written from memory, so each is also compared with coreutils' sha256sum of the same
  // bytes.
  ScopedTempDir dir;
  const std::vector<std::pair<std::string, std::string>> examples = {
      {"abc", "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"},
      {"abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq",
       "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1"},
      {std::string(1000000, 'a'), "cdc76e5c9914fb9281a1c7e284d73e67f1809a48a497200e046d39ccc7112cd0"},
      {"", "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"}};
  for (const auto& [message, digest] : examples) {
    EXPECT_EQ(graft::Sha256Hex(message), digest) << message.size() << " bytes";
    WriteFile(dir.path() + "/m", message);
    auto sum = RunCommand("sha256sum " + dir.path() + "/m");
    ASSERT_EQ(sum.exit_code, 0) << sum.output;
    EXPECT_EQ(sum.output.substr(0, 64), digest) << message.size() << " bytes";
  }
  // Every length around the block and padding boundaries, fed in uneven pieces, against sha256sum.
  std::string data;
  for (int i = 0; i < 300; ++i) data.push_back(static_cast<char>((i * 131 + 7) & 0xff));
  for (size_t len : {1u, 55u, 56u, 63u, 64u, 65u, 119u, 120u, 128u, 300u}) {
    const std::string bytes = data.substr(0, len);
    WriteFile(dir.path() + "/b", bytes);
    auto sum = RunCommand("sha256sum " + dir.path() + "/b");
    ASSERT_EQ(sum.exit_code, 0);
    graft::Sha256 s;
    for (size_t i = 0; i < bytes.size(); i += 7) s.Update(bytes.substr(i, 7));
    EXPECT_EQ(s.HexDigest(), sum.output.substr(0, 64)) << len;
  }
}

TEST(ClientSettings, FlagsThenEnvironmentThenConfigFile) {
  ScopedTempDir dir;
  const std::string cfg = dir.path() + "/client.yaml";
  WriteFile(dir.path() + "/tok", "file-token\n");
  WriteFile(cfg, "server: 10.0.0.5:7070\ntoken_file: tok\n");
  std::map<std::string, std::string> env = {{"GRAFT_CONFIG", cfg}};
  auto getenv = [&](const char* n) -> const char* {
    auto it = env.find(n);
    return it == env.end() ? nullptr : it->second.c_str();
  };
  client::SettingsSources src;
  src.getenv = getenv;
  auto s = client::ResolveSettings(src);
  ASSERT_TRUE(s.ok()) << s.status();
  EXPECT_EQ(s->server, "10.0.0.5:7070");
  EXPECT_EQ(s->token, "file-token");  // token_file relative to the config file, trimmed
  EXPECT_EQ(s->server_from, cfg + ":1:9");
  env["GRAFT_SERVER"] = "127.0.0.1:9000";
  env["GRAFT_TOKEN"] = "env-token";
  s = client::ResolveSettings(src);
  ASSERT_TRUE(s.ok());
  EXPECT_EQ(s->server, "127.0.0.1:9000");
  EXPECT_EQ(s->token, "env-token");
  src.flag_server = "127.0.0.1:9100";
  src.flag_token = "flag-token";
  s = client::ResolveSettings(src);
  ASSERT_TRUE(s.ok());
  EXPECT_EQ(s->server, "127.0.0.1:9100");
  EXPECT_EQ(s->token, "flag-token");
  EXPECT_EQ(s->token_from, "--token");
  // A mistake in the file names file:line:column and the key.
  src = client::SettingsSources();
  src.getenv = getenv;
  env.erase("GRAFT_SERVER");
  WriteFile(cfg, "server: 10.0.0.5:7070\ntokn: abc\n");
  s = client::ResolveSettings(src);
  ASSERT_FALSE(s.ok());
  EXPECT_EQ(s.status().message(), cfg + ":2:1: unknown key 'tokn' in the client config; did you mean 'token'?");
  WriteFile(cfg, "token: abc\ntoken_file: tok\n");
  env.erase("GRAFT_TOKEN");
  s = client::ResolveSettings(src);
  ASSERT_FALSE(s.ok());
  EXPECT_EQ(s.status().message(), cfg + ":2:13: token_file: give either token or token_file, not both");
  // GRAFT_CONFIG naming a missing file is an error; no file at the default path is not.
  env["GRAFT_CONFIG"] = dir.path() + "/missing.yaml";
  EXPECT_TRUE(absl::IsNotFound(client::ResolveSettings(src).status()));
  env.erase("GRAFT_CONFIG");
  env["HOME"] = dir.path();
  s = client::ResolveSettings(src);
  ASSERT_TRUE(s.ok());
  EXPECT_EQ(s->server, client::kDefaultServer);
  EXPECT_EQ(s->token, "");
}

v1::JobEvent PointEvent(int64_t step, int attempt, double acc) {
  v1::JobEvent e;
  e.mutable_point()->set_step(step);
  e.mutable_point()->set_attempt(attempt);
  e.mutable_point()->set_metrics_json(
      json{{"step", step}, {"acc_held_out", {{"value", acc}, {"lo", acc - 0.1}, {"hi", acc}, {"correct", 1}, {"n", 1}}}}
          .dump());
  return e;
}

TEST(ClientRender, RewindDropsThePointsFromItsStep) {
  client::JobView view;
  v1::JobEvent state;
  state.mutable_state_change()->set_id("j-1");
  state.mutable_state_change()->set_total_steps(60);
  state.mutable_state_change()->set_state(v1::JOB_STATE_RUNNING);
  view.Apply(state);
  for (int s : {0, 20, 40}) view.Apply(PointEvent(s, 1, 0.5));
  v1::JobEvent rewind;
  rewind.mutable_rewind()->set_from_step(21);
  rewind.mutable_rewind()->set_attempt(2);
  view.Apply(rewind);
  ASSERT_EQ(view.points().size(), 2u);  // 0 and 20 stay
  EXPECT_EQ(client::RenderJobLine(view, rewind), "j-1 rewind: attempt 2 replaces the points from step 21");
  view.Apply(PointEvent(40, 2, 0.9));
  view.Apply(PointEvent(60, 2, 1.0));
  std::vector<int64_t> steps;
  for (const auto& [s, p] : view.points()) steps.push_back(s);
  EXPECT_EQ(steps, (std::vector<int64_t>{0, 20, 40, 60}));
  EXPECT_EQ(view.points().at(40).attempt, 2);
  EXPECT_EQ(client::AccuracyValue(view.points().at(40).metrics, "acc_held_out"), 0.9);
  const std::string frame = client::RenderJobFrame(view, 80, 0);
  EXPECT_NE(frame.find("task accuracy (acc_held_out)  1.000 [0.900, 1.000]"), std::string::npos) << frame;
  // The top row (y = 1.00) holds the last point, at the right end of the x axis.
  std::istringstream in(frame);
  std::string line;
  while (std::getline(in, line) && line.rfind("1.00 |", 0) != 0) {
  }
  EXPECT_EQ(line.back(), 'T') << frame;  // task accuracy's mark
  // The job's reported step (0: no progress report since it started) lags its points: the header
  // shows the step of the latest point, as the sweep view's progress does.
  EXPECT_EQ(view.job().step(), 0);
  EXPECT_EQ(frame.rfind("j-1    running  step 60/60", 0), 0u) << frame;
  client::SweepView sweep;
  v1::SweepEvent se;
  se.set_job_id("j-1");
  *se.mutable_event() = state;
  sweep.Apply(se);
  *se.mutable_event() = PointEvent(20, 1, 0.5);
  sweep.Apply(se);
  const std::string sweep_frame = client::RenderSweepFrame(sweep, 120, 10, 0);
  EXPECT_NE(sweep_frame.find("[###-------]  20/60"), std::string::npos) << sweep_frame;
}

// The chart's marks (README "watch"): set N of training.interventions is drawn with its number,
// 1 to 9, then a, b, c ... from the tenth; task accuracy is T; a shared cell is ':'. Twelve sets,
// stored in an order that is not alphabetical, each at its own height: every set must get its own
// mark, drawn on its own row, and the legend must say which mark is which set, in stored order.
TEST(ClientRender, TwelveSetsGetTwelveDistinctMarksThatTheLegendNames) {
  client::JobView view;
  v1::JobEvent state;
  state.mutable_state_change()->set_id("j-1");
  state.mutable_state_change()->set_total_steps(100);
  state.mutable_state_change()->set_state(v1::JOB_STATE_RUNNING);
  view.Apply(state);
  // Set i (1-based) is named "v" + letter (13 - i): m, l, ..., b, so sorting by name would
  // reverse the numbering. Its IIA is 1 - i/12, which puts it on row i of the 13-row chart (row 0
  // is y = 1.00, the task accuracy; row 12 is y = 0.00).
  std::vector<std::string> names;
  auto point = [&](int64_t step) {
    nlohmann::ordered_json by_set = nlohmann::ordered_json::object();
    for (int i = 1; i <= 12; ++i) {
      const double v = 1.0 - i / 12.0;
      by_set["v" + std::string(1, static_cast<char>('a' + 13 - i))] = {{"value", v}, {"lo", v}, {"hi", v}};
    }
    nlohmann::ordered_json m = {{"step", step}, {"acc_held_out", {{"value", 1.0}, {"lo", 1.0}, {"hi", 1.0}}},
                                {"iia_by_set", by_set}};
    v1::JobEvent e;
    e.mutable_point()->set_step(step);
    e.mutable_point()->set_attempt(1);
    e.mutable_point()->set_metrics_json(m.dump());
    return e;
  };
  for (int i = 1; i <= 12; ++i) names.push_back("v" + std::string(1, static_cast<char>('a' + 13 - i)));
  for (int64_t step : {0, 50, 100}) view.Apply(point(step));
  const std::string frame = client::RenderJobFrame(view, 80, 0);

  // The legend: "  <mark> = <what>  <value>", task accuracy first, then the sets in stored order.
  std::vector<char> marks;
  std::vector<std::string> legend;
  for (const auto& line : Lines(frame)) {
    if (line.size() > 6 && line.compare(0, 2, "  ") == 0 && line[2] != ' ' && line.compare(3, 3, " = ") == 0) {
      marks.push_back(line[2]);
      legend.push_back(line.substr(6));
    }
  }
  ASSERT_EQ(marks.size(), 13u) << frame;
  EXPECT_EQ(marks[0], 'T') << frame;
  EXPECT_EQ(legend[0].rfind("task accuracy (acc_held_out)", 0), 0u) << legend[0];
  const std::string expected_marks = "123456789abc";
  for (int i = 1; i <= 12; ++i) {
    EXPECT_EQ(marks[i], expected_marks[i - 1]) << "set " << i << "\n" << frame;
    EXPECT_EQ(legend[i].rfind("IIA, set " + names[i - 1] + " (iia_by_set)", 0), 0u) << "set " << i << ": " << legend[i];
  }
  EXPECT_EQ(std::set<char>(marks.begin(), marks.end()).size(), 13u) << frame;
  EXPECT_EQ(frame.find(" = two or more curves in one cell"), std::string::npos) << frame;  // nothing shared

  // The chart: row r (after "accuracy") is "LABEL|cells"; each curve is flat, so its row holds its
  // mark in every column from x = 0 to the last step and nothing else.
  std::vector<std::string> rows;
  bool in_chart = false;
  for (const auto& line : Lines(frame)) {
    if (line == "accuracy") {
      in_chart = true;
      continue;
    }
    if (in_chart && line.size() > 6 && line[5] == '|') rows.push_back(line.substr(6));
    if (in_chart && line.rfind("     +", 0) == 0) break;
  }
  ASSERT_EQ(rows.size(), 13u) << frame;
  for (int r = 0; r < 13; ++r) {
    const char mark = marks[r];
    ASSERT_FALSE(rows[r].empty()) << "row " << r;
    EXPECT_EQ(rows[r], std::string(rows[r].size(), mark)) << "row " << r << " should be all '" << mark << "'\n"
                                                          << frame;
    EXPECT_EQ(rows[r].size(), rows[0].size()) << "row " << r;
  }

  // Two curves through one cell: the shared mark, and the legend line that explains it.
  v1::JobEvent meet;
  meet.mutable_point()->set_step(100);
  meet.mutable_point()->set_attempt(1);
  meet.mutable_point()->set_metrics_json(
      nlohmann::ordered_json{{"step", 100},
                             {"acc_held_out", {{"value", 0.5}}},
                             {"iia_by_set", {{"local", {{"value", 0.5}}}, {"careful", {{"value", 0.0}}}}}}
          .dump());
  client::JobView two;
  two.Apply(state);
  two.Apply(meet);
  const std::string shared = client::RenderJobFrame(two, 80, 0);
  EXPECT_NE(shared.find("0.50 |" + std::string(71, ' ') + ":"), std::string::npos) << shared;
  EXPECT_NE(shared.find("  : = two or more curves in one cell"), std::string::npos) << shared;
  EXPECT_NE(shared.find("  1 = IIA, set local (iia_by_set)"), std::string::npos) << shared;
  EXPECT_NE(shared.find("  2 = IIA, set careful (iia_by_set)"), std::string::npos) << shared;

  // Sets 10 to 35 are a to z; a 36th is listed with '-' and not drawn.
  nlohmann::ordered_json many = nlohmann::ordered_json::object();
  for (int i = 1; i <= 36; ++i) many["s" + std::to_string(i)] = {{"value", 0.5}};
  v1::JobEvent lots;
  lots.mutable_point()->set_step(100);
  lots.mutable_point()->set_metrics_json(nlohmann::ordered_json{{"step", 100}, {"iia_by_set", many}}.dump());
  client::JobView wide;
  wide.Apply(state);
  wide.Apply(lots);
  const std::string crowded = client::RenderJobFrame(wide, 80, 0);
  EXPECT_NE(crowded.find("  a = IIA, set s10 (iia_by_set)"), std::string::npos) << crowded;
  EXPECT_NE(crowded.find("  z = IIA, set s35 (iia_by_set)"), std::string::npos) << crowded;
  EXPECT_NE(crowded.find("  - = IIA, set s36 (iia_by_set, set 36: not drawn)"), std::string::npos) << crowded;
}

TEST(ClientRender, BarsSparklinesDurationsAndIds) {
  EXPECT_EQ(client::ProgressBar(5, 10, 10), "[#####-----]");
  EXPECT_EQ(client::ProgressBar(10, 10, 4), "[####]");
  EXPECT_EQ(client::ProgressBar(0, 0, 3), "[---]");
  EXPECT_EQ(client::Sparkline({0.0, 0.5, 1.0}, 10), "\u2581\u2585\u2588");
  EXPECT_EQ(client::Sparkline({0.0, 0.5, 1.0}, 2), "\u2585\u2588");
  EXPECT_EQ(client::FormatDuration(850), "850ms");
  EXPECT_EQ(client::FormatDuration(65000), "1m05s");
  EXPECT_EQ(client::FormatDuration(7380000), "2h03m");
  EXPECT_EQ(client::SettingOf("parcel-routing/interchange=0,layer=1/seed=2"), "parcel-routing/interchange=0,layer=1");
  EXPECT_EQ(client::SettingOf("parcel-routing"), "parcel-routing");
  std::ostringstream err;
  client::Target t;
  EXPECT_FALSE(client::ParseTarget("42", true, &t, err));
  EXPECT_NE(err.str().find("did you mean 'j-42'?"), std::string::npos) << err.str();
  err.str("");
  EXPECT_FALSE(client::ParseTarget("S-3", true, &t, err));
  EXPECT_NE(err.str().find("did you mean 's-3'?"), std::string::npos) << err.str();
  EXPECT_FALSE(client::ParseTarget("s-3", false, &t, err));
  ASSERT_TRUE(client::ParseTarget("s-3", true, &t, err));
  EXPECT_TRUE(t.is_sweep);
}

// A fake coordinator: every call unimplemented unless a test overrides it.
class FakeApi : public client::Api {
 public:
  grpc::Status Submit(const v1::SubmitJobRequest&, v1::SubmitJobResponse*) override { return Unused(); }
  grpc::Status GetJob(const std::string&, v1::Job*) override { return Unused(); }
  grpc::Status ListJobs(const v1::ListJobsRequest&, v1::ListJobsResponse*) override { return Unused(); }
  grpc::Status CancelJob(const std::string&, const std::string&, v1::Job*) override { return Unused(); }
  grpc::Status CancelSweep(const std::string&, const std::string&, v1::CancelSweepResponse*) override { return Unused(); }
  grpc::Status GetMetrics(const std::string&, std::vector<v1::Point>*) override { return Unused(); }
  grpc::Status WatchJob(const std::string&, int64_t, int64_t, const std::function<bool(const v1::JobEvent&)>&) override {
    return Unused();
  }
  grpc::Status WatchSweep(const std::string&, int64_t, int64_t,
                          const std::function<bool(const v1::SweepEvent&)>&) override {
    return Unused();
  }
  grpc::Status Download(const std::string&, const std::string&,
                        const std::function<bool(const v1::ArtifactChunk&)>&) override {
    return Unused();
  }

 private:
  static grpc::Status Unused() { return grpc::Status(grpc::StatusCode::UNIMPLEMENTED, "not used"); }
};

// A download that arrives damaged.
class DamagedDownloadApi : public FakeApi {
 public:
  grpc::Status GetJob(const std::string& id, v1::Job* job) override {
    job->set_id(id);
    job->set_state(v1::JOB_STATE_SUCCEEDED);
    return grpc::Status::OK;
  }
  grpc::Status Download(const std::string&, const std::string& name,
                        const std::function<bool(const v1::ArtifactChunk&)>& on_chunk) override {
    if (name != "weights.pt") return grpc::Status(grpc::StatusCode::NOT_FOUND, "no " + name);
    v1::ArtifactChunk c;
    c.set_total_bytes(5);
    c.set_sha256(graft::Sha256Hex("hello"));
    c.set_data("hellO");  // one byte flipped on the way
    on_chunk(c);
    return grpc::Status::OK;
  }
};

// A sweep of five jobs, four succeeded with final values chosen by hand and one failed, served
// two per page (three pages).
class HandSweepApi : public FakeApi {
 public:
  HandSweepApi() {
    Add("j-1", "routing/width=8/seed=1", v1::JOB_STATE_SUCCEEDED, 0.9, 0.5);
    Add("j-2", "routing/width=8/seed=2", v1::JOB_STATE_SUCCEEDED, 0.8, 0.7);
    Add("j-3", "routing/width=8/seed=3", v1::JOB_STATE_SUCCEEDED, 1.0, 0.6);
    Add("j-4", "routing/width=16/seed=1", v1::JOB_STATE_SUCCEEDED, 0.75, 0.25);
    Add("j-5", "routing/width=16/seed=2", v1::JOB_STATE_FAILED, 0, 0);
  }
  grpc::Status ListJobs(const v1::ListJobsRequest& req, v1::ListJobsResponse* resp) override {
    ++list_calls;
    // Newest first, two per page.
    const size_t start = req.page_token().empty() ? 0 : std::stoul(req.page_token());
    for (size_t i = start; i < start + 2 && i < jobs_.size(); ++i) *resp->add_jobs() = jobs_[jobs_.size() - 1 - i];
    if (start + 2 < jobs_.size()) resp->set_next_page_token(std::to_string(start + 2));
    return grpc::Status::OK;
  }
  grpc::Status GetJob(const std::string& id, v1::Job* job) override {
    for (const auto& j : jobs_) {
      if (j.id() == id) *job = j;
    }
    return grpc::Status::OK;
  }
  int list_calls = 0;

 private:
  void Add(const std::string& id, const std::string& name, v1::JobState state, double acc, double iia) {
    v1::Job j;
    j.set_id(id);
    j.set_name(name);
    j.set_state(state);
    j.set_sweep_id("s-1");
    if (state == v1::JOB_STATE_SUCCEEDED) {
      j.set_result_json(json{{"acc_held_out", {{"value", acc}}}, {"iia_changed_held_out", {{"value", iia}}}}.dump());
    }
    jobs_.push_back(j);
  }
  std::vector<v1::Job> jobs_;
};

TEST(ClientCompare, HandComputedSettingsWithOneSeedAndALeftOutJob) {
  HandSweepApi api;
  client::CompareArgs ca;
  ca.id = "s-1";
  ca.format = "json";
  Ran r = Call([&](client::Io& io) { return client::CompareCommand(api, ca, io); });
  ASSERT_EQ(r.code, 0) << r.err;
  EXPECT_EQ(api.list_calls, 3);  // every page
  json out = json::parse(r.out);
  ASSERT_EQ(out["settings"].size(), 2u);
  // width=8: acc 0.9, 0.8, 1.0 -> mean 0.9, sd 0.1, half-width 0.2484137712 (as in
  // ClientStats.MeanIntervalByHand); iia 0.5, 0.7, 0.6 -> mean 0.6, sd 0.1, the same half-width.
  const json& a = out["settings"][0];
  EXPECT_EQ(a["setting"], "routing/width=8");
  EXPECT_EQ(a["seeds"], 3);
  EXPECT_EQ(a["job_ids"], json({"j-1", "j-2", "j-3"}));
  EXPECT_NEAR(a["acc_held_out"]["mean"].get<double>(), 0.9, 1e-12);
  EXPECT_NEAR(a["acc_held_out"]["lo"].get<double>(), 0.9 - 0.2484137712, 1e-9);
  EXPECT_NEAR(a["acc_held_out"]["hi"].get<double>(), 0.9 + 0.2484137712, 1e-9);
  EXPECT_NEAR(a["iia_changed_held_out"]["mean"].get<double>(), 0.6, 1e-12);
  EXPECT_NEAR(a["iia_changed_held_out"]["sd"].get<double>(), 0.1, 1e-12);
  EXPECT_NEAR(a["iia_changed_held_out"]["hi"].get<double>(), 0.6 + 0.2484137712, 1e-9);
  // width=16: one succeeded seed, no interval; the failed seed is left out.
  const json& b = out["settings"][1];
  EXPECT_EQ(b["setting"], "routing/width=16");
  EXPECT_EQ(b["seeds"], 1);
  EXPECT_EQ(b["acc_held_out"]["mean"], 0.75);
  EXPECT_TRUE(b["acc_held_out"]["lo"].is_null());
  EXPECT_TRUE(b["acc_held_out"]["sd"].is_null());
  ASSERT_EQ(out["left_out"].size(), 1u);
  EXPECT_EQ(out["left_out"][0]["id"], "j-5");
  EXPECT_EQ(out["left_out"][0]["state"], "failed");
  ca.format = "table";
  r = Call([&](client::Io& io) { return client::CompareCommand(api, ca, io); });
  ASSERT_EQ(r.code, 0);
  EXPECT_NE(r.out.find("0.900 [0.652, 1.148]"), std::string::npos) << r.out;
  EXPECT_NE(r.out.find("0.750 (1 seed: no interval)"), std::string::npos) << r.out;
  EXPECT_NE(r.out.find("left out (not succeeded): j-5 (failed)"), std::string::npos) << r.out;
  ca.id = "j-1";
  r = Call([&](client::Io& io) { return client::CompareCommand(api, ca, io); });
  EXPECT_EQ(r.code, client::kExitUsage);
}

TEST(ClientFetch, ADamagedDownloadIsRefusedAndNothingIsKept) {
  DamagedDownloadApi api;
  ScopedTempDir dir;
  client::FetchArgs fa;
  fa.id = "j-1";
  fa.out_dir = dir.path() + "/out";
  Ran r = Call([&](client::Io& io) { return client::FetchCommand(api, fa, io); });
  EXPECT_EQ(r.code, client::kExitFailure);
  EXPECT_NE(r.err.find("weights.pt of j-1 arrived damaged"), std::string::npos) << r.err;
  EXPECT_FALSE(std::ifstream(fa.out_dir + "/weights.pt").good());
  EXPECT_FALSE(std::ifstream(fa.out_dir + "/weights.pt.part").good());
}

// ---------------------------------------------------------------------------------------------
// The worker fleet: `graft workers`, Slurm ids recorded at registration, --idle-exit.

// The fleet as `graft workers --json --all` prints it, by worker id.
std::map<std::string, json> Fleet(client::Api& api) {
  Ran r = Call([&](client::Io& io) {
    client::WorkersArgs a;
    a.all = true;
    a.json = true;
    return client::WorkersCommand(api, a, io);
  });
  std::map<std::string, json> out;
  if (r.code != 0) return out;
  for (const auto& w : json::parse(r.out)) out[w["id"].get<std::string>()] = w;
  return out;
}

// The id of the one worker whose field `key` equals `value`, or "".
std::string WorkerWith(const std::map<std::string, json>& fleet, const std::string& key, const std::string& value) {
  for (const auto& [id, w] : fleet) {
    if (w[key] == value) return id;
  }
  return "";
}

TEST(ClientWorkers, ListsTheFleetWithSlurmIdsStatesAndIdleExit) {
  Cluster c;
  auto api = ApiFor(c);
  // A worker that runs "inside" a Slurm array task (the variables Slurm sets), and one that leaves
  // after 1 s with nothing to lease.
  const std::vector<std::string> worker = {BinaryDir() + "/bin/graft-worker", "serve", "--server", c.address(),
                                           "--token-file", c.dir() + "/worker.token", "--threads", "1"};
  std::vector<std::string> slurm_argv = {"/usr/bin/env", "SLURM_JOB_ID=4711", "SLURM_ARRAY_JOB_ID=4700",
                                         "SLURM_ARRAY_TASK_ID=3"};
  slurm_argv.insert(slurm_argv.end(), worker.begin(), worker.end());
  slurm_argv.insert(slurm_argv.end(), {"--work-dir", c.dir() + "/wa"});
  testing::ScopedProcess slurm_worker(slurm_argv, c.dir() + "/wa.log");
  std::vector<std::string> idle_argv = worker;
  idle_argv.insert(idle_argv.end(), {"--work-dir", c.dir() + "/wb", "--idle-exit", "1"});
  std::vector<std::string> idle_env = {"/usr/bin/env", "-u", "SLURM_JOB_ID", "-u", "SLURM_ARRAY_JOB_ID", "-u",
                                       "SLURM_ARRAY_TASK_ID"};
  idle_env.insert(idle_env.end(), idle_argv.begin(), idle_argv.end());
  testing::ScopedProcess idle_worker(idle_env, c.dir() + "/wb.log");

  // The idle worker leaves by itself with exit code 0 and is shown gone, with its reason.
  ASSERT_EQ(idle_worker.Wait(60000), 0) << ReadFile(c.dir() + "/wb.log");
  EXPECT_NE(ReadFile(c.dir() + "/wb.log").find("nothing to lease for 1 s; leaving"), std::string::npos);
  std::string a_id;
  ASSERT_TRUE(WaitFor([&] { return !(a_id = WorkerWith(Fleet(*api), "slurm_job_id", "4711")).empty(); }, 30000))
      << ReadFile(c.dir() + "/wa.log");
  auto fleet = Fleet(*api);
  ASSERT_EQ(fleet.size(), 2u);
  const json& a = fleet[a_id];
  EXPECT_EQ(a["slurm_array_job_id"], "4700");
  EXPECT_EQ(a["slurm_array_task_id"], "3");
  EXPECT_EQ(a["threads"], 1);
  EXPECT_EQ(a["state"], "idle");
  EXPECT_EQ(a["jobs_finished"], 0);
  std::string b_id;
  for (const auto& [id, w] : fleet) {
    if (id != a_id) b_id = id;
  }
  EXPECT_EQ(fleet[b_id]["state"], "gone");
  EXPECT_EQ(fleet[b_id]["gone_reason"], "left");
  EXPECT_EQ(fleet[b_id]["slurm_job_id"], "");
  // Without --all the gone worker is left out; the table names the Slurm task.
  Ran table = Call([&](client::Io& io) { return client::WorkersCommand(*api, client::WorkersArgs{}, io); });
  ASSERT_EQ(table.code, 0) << table.err;
  EXPECT_NE(table.out.find("4700_3 (4711)"), std::string::npos) << table.out;
  EXPECT_EQ(table.out.find(b_id), std::string::npos) << table.out;
  EXPECT_NE(table.out.find("1 workers: 1 idle, 0 training, 0 pending"), std::string::npos) << table.out;

  // While it trains, the worker shows the job and its step; a job it ended keeps its worker id.
  const std::string long_job = c.Submit(kAlice, "parcel-routing", {"training.steps=1000000", "evaluation.every=10"});
  ASSERT_TRUE(WaitFor([&] {
    auto f = Fleet(*api);
    return f[a_id]["state"] == "training" && f[a_id]["job_id"] == long_job && f[a_id]["step"].get<int64_t>() > 0;
  }, 60000)) << Fleet(*api)[a_id].dump();
  Ran cancel = Call([&](client::Io& io) {
    client::CancelArgs ca;
    ca.id = long_job;
    return client::CancelCommand(*api, ca, io);
  });
  ASSERT_EQ(cancel.code, 0) << cancel.err;
  ASSERT_TRUE(c.WaitState(long_job, v1::JOB_STATE_CANCELLED, 60000));
  const std::string short_job = c.Submit(kAlice, "parcel-routing", {"training.steps=20", "evaluation.every=10"});
  ASSERT_TRUE(c.WaitState(short_job, v1::JOB_STATE_SUCCEEDED, 120000)) << ReadFile(c.dir() + "/wa.log");
  EXPECT_EQ(c.Get(short_job).worker_id(), a_id);
  ASSERT_TRUE(WaitFor([&] { return Fleet(*api)[a_id]["jobs_finished"] == 2; }, 30000)) << Fleet(*api)[a_id].dump();
  EXPECT_EQ(Fleet(*api)[a_id]["state"], "idle");
  // Workers see nothing of the fleet: the Jobs service is for people.
  auto as_worker = ApiFor(c, testing::kWorker);
  v1::ListWorkersResponse resp;
  EXPECT_EQ(as_worker->ListWorkers(true, &resp).error_code(), grpc::StatusCode::PERMISSION_DENIED);
}

}  // namespace
}  // namespace graft
