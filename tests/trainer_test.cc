// The trainer: intervention semantics of the network, resume determinism, the run directory,
// and independent recomputations (NumPy for logits, statsmodels for Wilson bounds).
#include <algorithm>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <sstream>

#include <torch/torch.h>

#include "gtest/gtest.h"
#include "nlohmann/json.hpp"
#include "tests/test_util.h"
#include "trainer/eval/wilson.h"
#include "trainer/net/mlp.h"
#include "trainer/train/flat_optimizer.h"

namespace graft {
namespace {

using json = nlohmann::json;
using ::graft::testing::BinaryDir;
using ::graft::testing::ReadFile;
using ::graft::testing::RunCommand;
using ::graft::testing::ScopedTempDir;
using ::graft::testing::SourceDir;
using ::graft::testing::SystemPython;
using ::graft::testing::WorkerBinary;

std::string Config(const std::string& name) { return SourceDir() + "/configs/" + name + ".yaml"; }

net::Mlp SmallNet() {
  torch::manual_seed(5);
  net::MlpOptions o;
  o.input_sizes = {6, 6, 4, 2};
  o.input_names = {"a", "b", "c", "d"};
  o.embedding_dim = 3;
  o.hidden = {16, 12, 10};
  o.num_classes = 4;
  return net::Mlp(o);
}

torch::Tensor RandomInputs(int64_t n) {
  return torch::stack({torch::randint(6, {n}, torch::kInt64), torch::randint(6, {n}, torch::kInt64),
                       torch::randint(4, {n}, torch::kInt64), torch::randint(2, {n}, torch::kInt64)},
                      1);
}

TEST(Mlp, InterventionEqualsAHandBuiltPatch) {
  net::Mlp net = SmallNet();
  torch::NoGradGuard no_grad;
  torch::Tensor b = RandomInputs(32), s = RandomInputs(32);
  std::vector<torch::Tensor> hb = net->Hidden(net->Embed(b), 2), hs = net->Hidden(net->Embed(s), 2);
  // Units 2..6 of layer 1 for even examples only.
  net::InterventionMasks masks;
  masks.lowest_layer = 1;
  masks.per_layer.resize(3);
  torch::Tensor m = torch::zeros({32, 12}, torch::kBool);
  for (int i = 0; i < 32; i += 2) m.index_put_({i, torch::indexing::Slice(2, 7)}, true);
  masks.per_layer[1] = m;
  torch::Tensor got = net->Intervened(hb, hs, masks);
  // By hand: copy the base activation, overwrite the units, run the rest of the network.
  torch::Tensor h1 = hb[1].clone();
  for (int i = 0; i < 32; i += 2) {
    for (int u = 2; u <= 6; ++u) h1[i][u] = hs[1][i][u];
  }
  torch::Tensor expected = net->Head(net->Layer(2, h1));
  EXPECT_TRUE(torch::equal(got, expected));
  // Odd examples were not intervened on: their logits are the base logits.
  torch::Tensor base_logits = net->Head(hb[2]);
  EXPECT_TRUE(torch::equal(got.slice(0, 1, 32, 2), base_logits.slice(0, 1, 32, 2)));
  EXPECT_FALSE(torch::allclose(got.slice(0, 0, 32, 2), base_logits.slice(0, 0, 32, 2)));
}

TEST(Mlp, PrefixReuseEqualsFullRecomputation) {
  net::Mlp net = SmallNet();
  torch::NoGradGuard no_grad;
  torch::Tensor b = RandomInputs(64), s = RandomInputs(64);
  std::vector<torch::Tensor> hb = net->Hidden(net->Embed(b), 2), hs = net->Hidden(net->Embed(s), 2);
  net::InterventionMasks masks;
  masks.lowest_layer = 1;
  masks.per_layer.resize(3);
  masks.per_layer[1] = torch::rand({64, 12}) < 0.3;
  masks.per_layer[2] = torch::rand({64, 10}) < 0.3;
  std::vector<torch::Tensor> partial = hb;
  partial[0] = torch::Tensor();  // below the lowest intervened layer: must not be read
  torch::Tensor reused = net->Intervened(partial, hs, masks);
  // Full recomputation from the embedding, patching each layer as it is computed.
  torch::Tensor h = net->Embed(b);
  for (int k = 0; k < 3; ++k) {
    h = net->Layer(k, h);
    if (masks.per_layer[k].defined()) h = torch::where(masks.per_layer[k], hs[k], h);
  }
  EXPECT_TRUE(torch::allclose(reused, net->Head(h), 0, 0));
}

TEST(Mlp, StackedForwardEqualsSeparateBaseAndIntervenedRuns) {
  net::Mlp net = SmallNet();
  torch::NoGradGuard no_grad;
  torch::Tensor b = RandomInputs(48);
  torch::Tensor perm = torch::randperm(48, torch::kInt64);
  net::InterventionMasks masks;
  masks.lowest_layer = 1;
  masks.per_layer.resize(3);
  masks.per_layer[1] = torch::rand({48, 12}) < 0.3;
  masks.per_layer[2] = torch::rand({48, 10}) < 0.3;
  torch::Tensor stacked = net->StackedForward(net->Embed(b), masks, {}, perm, true);
  std::vector<torch::Tensor> hb = net->Hidden(net->Embed(b), 2);
  std::vector<torch::Tensor> hs = net->Hidden(net->Embed(b.index_select(0, perm)), 2);
  torch::Tensor base_logits = net->Head(hb[2]);
  torch::Tensor iit_logits = net->Intervened(hb, hs, masks);
  // Stacking changes the matmul's row count, so BLAS may round differently: float tolerance.
  EXPECT_TRUE(torch::allclose(stacked.narrow(0, 0, 48), base_logits, 1e-5, 1e-6));
  EXPECT_TRUE(torch::allclose(stacked.narrow(0, 48, 48), iit_logits, 1e-5, 1e-6));
}

// LibTorch's own optimisers (the C++ ports of torch.optim.Adam and torch.optim.SGD) are the
// reference for the flat-buffer versions, on the same parameters and gradients.
TEST(FlatOptimizer, MatchesLibTorchAdamAndSgd) {
  for (bool adam : {true, false}) {
    for (double wd : {0.0, 0.01}) {
      torch::manual_seed(3);
      std::vector<torch::Tensor> mine = {torch::randn({5, 3}).requires_grad_(), torch::randn({7}).requires_grad_()};
      std::vector<torch::Tensor> ref, start;
      for (const auto& p : mine) ref.push_back(p.detach().clone().requires_grad_());
      for (const auto& p : mine) start.push_back(p.detach().clone());
      train::FlatOptimizerOptions o;
      o.adam = adam;
      o.lr = 0.01;
      o.weight_decay = wd;
      o.momentum = 0.9;
      train::FlatOptimizer flat(mine, o);
      std::unique_ptr<torch::optim::Optimizer> lib;
      if (adam) {
        lib = std::make_unique<torch::optim::Adam>(ref, torch::optim::AdamOptions(0.01).weight_decay(wd));
      } else {
        lib = std::make_unique<torch::optim::SGD>(ref, torch::optim::SGDOptions(0.01).momentum(0.9).weight_decay(wd));
      }
      for (int step = 0; step < 25; ++step) {
        torch::Tensor target = torch::randn({5, 3});
        flat.ZeroGrad();
        ((mine[0] - target).pow(2).sum() + mine[1].sin().sum()).backward();
        flat.Step();
        lib->zero_grad();
        ((ref[0] - target).pow(2).sum() + ref[1].sin().sum()).backward();
        lib->step();
      }
      for (size_t i = 0; i < mine.size(); ++i) {
        EXPECT_TRUE(torch::allclose(mine[i], ref[i], 1e-5, 1e-6)) << (adam ? "adam" : "sgd") << " wd " << wd << " param "
                                                                  << i << "\n" << mine[i] - ref[i];
      }
      // And the change is real: every parameter moved from where it started, by far more than the
      // agreement tolerance above, so the check is not between two untouched tensors. (25 steps of
      // lr 0.01 move each entry by up to about 0.25.)
      for (size_t i = 0; i < mine.size(); ++i) {
        EXPECT_GT((mine[i].detach() - start[i]).abs().max().item<double>(), 1e-2)
            << (adam ? "adam" : "sgd") << " wd " << wd << " param " << i << " did not move";
        EXPECT_GT((ref[i].detach() - start[i]).abs().max().item<double>(), 1e-2)
            << (adam ? "adam" : "sgd") << " wd " << wd << " LibTorch's param " << i << " did not move";
      }
    }
  }
}

// Everything in a metrics line but the timing.
json WithoutTimings(json j) {
  j.erase("wall_s");
  j.erase("examples_per_s");
  j.erase("peak_rss_mb");
  j.erase("first_step_s");
  j.erase("train_steps_s");
  j.erase("resumed_from_step");   // which steps this process trained, not what it computed
  j.erase("steps_this_process");
  if (j.contains("provenance")) j["provenance"].erase("graft_commit");
  return j;
}

std::vector<json> MetricLines(const std::string& path) {
  std::vector<json> lines;
  std::istringstream in(ReadFile(path));
  std::string line;
  while (std::getline(in, line)) {
    if (!line.empty()) lines.push_back(WithoutTimings(json::parse(line)));
  }
  return lines;
}

const char kSmallRun[] =
    " --set training.steps=120 --set training.batch_size=64 --set evaluation.every=40"
    " --set training.checkpoint_every=50 --set evaluation.triples=512 --set network.hidden=[32,32,32]";

TEST(Trainer, ResumeAfterInterruptionReproducesTheUninterruptedRun) {
  ScopedTempDir dir;
  const std::string a = dir.path() + "/a", b = dir.path() + "/b", c = dir.path() + "/c";
  auto ra = RunCommand(WorkerBinary() + " run " + Config("parcel-routing") + " --out " + a + kSmallRun);
  ASSERT_EQ(ra.exit_code, 0) << ra.output;
  // Interrupted after step 70 (between checkpoints and evaluations), then resumed.
  auto rb = RunCommand(WorkerBinary() + " run " + Config("parcel-routing") + " --out " + b + kSmallRun +
                       " --stop-after-step 70");
  ASSERT_EQ(rb.exit_code, 8) << rb.output;  // stopped early with a checkpoint (README "Exit codes")
  EXPECT_NE(rb.output.find("stopped after step 70"), std::string::npos) << rb.output;
  const std::string interrupted = ReadFile(b + "/metrics.jsonl");  // steps 0 and 40
  std::filesystem::copy_file(b + "/checkpoint.pt", b + "/checkpoint.pt.at70");
  auto rb2 = RunCommand(WorkerBinary() + " run " + Config("parcel-routing") + " --out " + b + kSmallRun +
                        " --resume " + b);
  ASSERT_EQ(rb2.exit_code, 0) << rb2.output;
  // A real resume, not a silent retrain (runs are deterministic, so equal metrics alone cannot
  // tell): the kept lines are the interrupted run's bytes, wall_s included, and this process
  // trained only the 50 remaining steps, as its progress output and result.json say.
  EXPECT_EQ(std::count(interrupted.begin(), interrupted.end(), '\n'), 2) << interrupted;
  EXPECT_EQ(ReadFile(b + "/metrics.jsonl").substr(0, interrupted.size()), interrupted);
  EXPECT_NE(rb2.output.find("resuming from step 70 of 120: 2 evaluations kept, training the remaining 50 steps"),
            std::string::npos)
      << rb2.output;
  EXPECT_EQ(rb2.output.find("step 40/120"), std::string::npos) << rb2.output;
  const json resumed = json::parse(ReadFile(b + "/result.json"));
  EXPECT_EQ(resumed["resumed_from_step"], 70);
  EXPECT_EQ(resumed["steps_this_process"], 50);
  EXPECT_EQ(resumed["steps"], 120);
  // From the checkpoint alone, as a worker that fetched it from graftd has it: the checkpoint
  // carries the kept lines itself.
  const std::string d = dir.path() + "/d";
  std::filesystem::create_directories(d);
  std::filesystem::copy_file(b + "/checkpoint.pt.at70", d + "/checkpoint.pt");
  auto rd = RunCommand(WorkerBinary() + " run " + Config("parcel-routing") + " --out " + d + kSmallRun + " --resume " + d);
  ASSERT_EQ(rd.exit_code, 0) << rd.output;
  EXPECT_EQ(ReadFile(d + "/metrics.jsonl").substr(0, interrupted.size()), interrupted);
  EXPECT_EQ(MetricLines(d + "/metrics.jsonl"), MetricLines(b + "/metrics.jsonl"));
  // The same spec and seed again, uninterrupted.
  auto rc = RunCommand(WorkerBinary() + " run " + Config("parcel-routing") + " --out " + c + kSmallRun);
  ASSERT_EQ(rc.exit_code, 0) << rc.output;
  const json fresh = json::parse(ReadFile(c + "/result.json"));
  EXPECT_EQ(fresh["resumed_from_step"], 0);
  EXPECT_EQ(fresh["steps_this_process"], 120);

  std::vector<json> ma = MetricLines(a + "/metrics.jsonl");
  ASSERT_EQ(ma.size(), 4u);  // steps 0, 40, 80, 120
  EXPECT_EQ(ma, MetricLines(b + "/metrics.jsonl"));
  EXPECT_EQ(ma, MetricLines(c + "/metrics.jsonl"));
  json res_a = WithoutTimings(json::parse(ReadFile(a + "/result.json")));
  EXPECT_EQ(res_a, WithoutTimings(json::parse(ReadFile(b + "/result.json"))));
  EXPECT_EQ(ReadFile(a + "/weights.pt"), ReadFile(b + "/weights.pt"));
  EXPECT_EQ(ReadFile(a + "/spec.yaml"), ReadFile(b + "/spec.yaml"));
  // The first evaluation is at step 0 and each line is an evaluation once.
  EXPECT_EQ(ma[0]["step"], 0);
  EXPECT_EQ(ma[3]["step"], 120);
}

TEST(Trainer, RefusesToResumeWithADifferentSpec) {
  ScopedTempDir dir;
  const std::string a = dir.path() + "/a";
  auto r = RunCommand(WorkerBinary() + " run " + Config("parcel-routing") + " --out " + a + kSmallRun +
                      " --stop-after-step 50");
  ASSERT_EQ(r.exit_code, 8) << r.output;
  auto r2 = RunCommand(WorkerBinary() + " run " + Config("parcel-routing") + " --out " + a + kSmallRun +
                       " --set training.optimizer.lr=0.01 --resume " + a);
  EXPECT_EQ(r2.exit_code, 2) << r2.output;
  EXPECT_NE(r2.output.find("belongs to a different spec"), std::string::npos) << r2.output;
}

TEST(Trainer, InvalidConfigExitsTwoWithTheLocation) {
  ScopedTempDir dir;
  auto r = RunCommand(WorkerBinary() + " run " + Config("parcel-routing") + " --out " + dir.path() +
                      " --set training.sources=outside");
  EXPECT_EQ(r.exit_code, 2) << r.output;
  EXPECT_NE(r.output.find("--set #1:1:18: training.sources: expected one of in_batch | independent"),
            std::string::npos)
      << r.output;
}

TEST(Trainer, RunDirectoryHasTheDocumentedFields) {
  ScopedTempDir dir;
  auto r = RunCommand(WorkerBinary() + " run " + Config("parcel-routing") + " --out " + dir.path() + kSmallRun);
  ASSERT_EQ(r.exit_code, 0) << r.output;
  json res = json::parse(ReadFile(dir.path() + "/result.json"));
  for (const char* key : {"step", "examples", "wall_s", "loss_task", "loss_interchange", "acc_train", "acc_held_out",
                          "iia_held_out", "iia_changed_held_out", "iia_by_set", "unchanged_floor", "steps", "train_steps_s",
                          "examples_per_s", "peak_rss_mb", "provenance"}) {
    EXPECT_TRUE(res.contains(key)) << key;
  }
  for (const char* key : {"graft_version", "graft_commit", "libtorch_version", "blas_library", "blas_threads",
                          "torch_threads", "cpu_model", "spec_hash"}) {
    EXPECT_TRUE(res["provenance"].contains(key)) << key;
  }
  EXPECT_EQ(res["provenance"]["blas_threads"], 1);
  EXPECT_EQ(res["provenance"]["torch_threads"], 1);
  EXPECT_NE(res["provenance"]["blas_library"].get<std::string>().find("openblas"), std::string::npos)
      << res["provenance"]["blas_library"];
  for (const char* set : {"local", "careful", "local+careful"}) EXPECT_TRUE(res["iia_by_set"].contains(set)) << set;
  const json& iia = res["iia_held_out"];
  EXPECT_EQ(iia["n"], 512);
  // Every reported interval is the 95% Wilson interval of its counts, per statsmodels'
  // proportion_confint(method="wilson") (tests/python/check_wilson.py), and value = correct / n.
  std::ostringstream cases;
  cases.precision(17);
  int intervals = 0;
  auto add = [&](const std::string& label, const json& a) {
    const int64_t k = a["correct"].get<int64_t>(), n = a["n"].get<int64_t>();
    ASSERT_GT(n, 0) << label;
    EXPECT_DOUBLE_EQ(a["value"].get<double>(), static_cast<double>(k) / static_cast<double>(n)) << label;
    cases << "# " << label << "\n" << k << " " << n << " " << a["lo"].get<double>() << " " << a["hi"].get<double>() << "\n";
    ++intervals;
  };
  for (const char* key : {"acc_train", "acc_held_out", "iia_held_out", "iia_changed_held_out"}) add(key, res[key]);
  for (auto& [set, a] : res["iia_by_set"].items()) add("iia_by_set." + set, a);
  ::graft::testing::WriteFile(dir.path() + "/intervals.txt", cases.str());
  auto py = RunCommand(std::string(SystemPython()) + " " + SourceDir() + "/tests/python/check_wilson.py " +
                       dir.path() + "/intervals.txt");
  EXPECT_EQ(py.exit_code, 0) << py.output;
  EXPECT_NE(py.output.find("checked " + std::to_string(intervals) + " intervals"), std::string::npos) << py.output;
  // The unchanged floor is the fraction of triples whose label the intervention leaves as it is,
  // so the changed count is n * (1 - unchanged). Both come from the same count inside graft, so
  // this only checks that they are reported consistently; NumpyRecomputesTheIntervenedLogitsFromWeights
  // recounts both from labels computed outside graft.
  EXPECT_EQ(res["iia_changed_held_out"]["n"].get<int64_t>(),
            std::llround(512 * (1.0 - res["unchanged_floor"].get<double>())));
}

// NumPy (Debian's, float64) recomputes base and intervened logits from weights.pt, the raw
// input tuples, the source choices, and the alignment and intervention sets of spec.yaml only;
// it also checks that torch.load gives a plain dict with exactly the documented names and
// shapes. With 64 evaluation triples the dump holds all of them, so --recount also recomputes
// every label from the config's algorithm (its own parser, Python's arithmetic) and recounts
// result.json's correct, changed and per-set counts and the unchanged floor.
TEST(Trainer, NumpyRecomputesTheIntervenedLogitsFromWeights) {
  ScopedTempDir dir;
  auto r = RunCommand(WorkerBinary() + " run " + Config("parcel-routing") + " --out " + dir.path() + kSmallRun +
                      " --set evaluation.triples=64 --dump-logits " + dir.path() + "/logits.json");
  ASSERT_EQ(r.exit_code, 0) << r.output;
  auto py = RunCommand(std::string(SystemPython()) + " " + SourceDir() + "/tests/python/recompute_intervention.py " +
                       dir.path() + " --recount");
  EXPECT_EQ(py.exit_code, 0) << py.output;
  EXPECT_NE(py.output.find("max |diff|"), std::string::npos) << py.output;
  EXPECT_NE(py.output.find("recounted from the labels: "), std::string::npos) << py.output;
  // The recount is not vacuous: some triples are changed and some are not.
  const json res = json::parse(ReadFile(dir.path() + "/result.json"));
  EXPECT_EQ(res["iia_held_out"]["n"], 64);
  EXPECT_GT(res["iia_changed_held_out"]["n"].get<int64_t>(), 0);
  EXPECT_LT(res["iia_changed_held_out"]["n"].get<int64_t>(), 64);
}

// statsmodels' proportion_confint(method="wilson") is the reference (Wilson, JASA 1927; the
// citation from memory).
TEST(Wilson, MatchesStatsmodels) {
  ScopedTempDir dir;
  std::ostringstream cases;
  cases.precision(17);
  const std::vector<std::pair<int64_t, int64_t>> kn = {{0, 1},     {1, 1},   {0, 10},      {10, 10},     {5, 10},
                                                       {1, 3},     {57, 58}, {0, 1000000}, {1000000, 1000000},
                                                       {123456, 1000000},    {999999, 1000000}, {4090, 4096}};
  for (auto [k, n] : kn) {
    auto a = eval::WilsonAccuracy(k, n);
    cases << k << " " << n << " " << a.lo << " " << a.hi << "\n";
  }
  ::graft::testing::WriteFile(dir.path() + "/cases.txt", cases.str());
  auto py = RunCommand(std::string(SystemPython()) + " " + SourceDir() + "/tests/python/check_wilson.py " +
                       dir.path() + "/cases.txt");
  EXPECT_EQ(py.exit_code, 0) << py.output;
  EXPECT_NE(py.output.find("checked 12 intervals"), std::string::npos) << py.output;
}

TEST(Wilson, EdgeCasesByFormula) {
  // The Wilson score formula, lo/hi = (p + z^2/2n -/+ z sqrt(p(1-p)/n + z^2/4n^2)) / (1 + z^2/n)
  // with p = k/n, as statistics texts give it (common practice, written from memory; statsmodels
  // checks the same cases in MatchesStatsmodels). k = n: the upper bound is 1; k = 0: the lower
  // bound is 0 (the Wilson interval never leaves [0, 1]).
  EXPECT_DOUBLE_EQ(eval::WilsonAccuracy(10, 10).hi, 1.0);
  EXPECT_DOUBLE_EQ(eval::WilsonAccuracy(0, 10).lo, 0.0);
  // n = 1, k = 1: lower bound 1 / (1 + z^2), from the closed form with p = 1.
  EXPECT_NEAR(eval::WilsonAccuracy(1, 1).lo, 1.0 / (1.0 + eval::kZ95 * eval::kZ95), 1e-15);
  auto empty = eval::WilsonAccuracy(0, 0);
  EXPECT_EQ(empty.n, 0);
  EXPECT_EQ(empty.lo, 0.0);
  EXPECT_EQ(empty.hi, 1.0);
}

json Result(const std::string& dir) { return json::parse(ReadFile(dir + "/result.json")); }

// The shipped demo configs, as shipped. The comparison with standard training checks the demo
// against the published claim of IIT (Geiger et al., ICML 2022; from memory): IIT reaches
// near-perfect IIA where standard training with the same seed does not. It is not an outside
// reference for the numbers themselves.
TEST(Demo, ParcelRoutingIitBeatsStandardTrainingOnChangedCases) {
  ScopedTempDir dir;
  auto iit = RunCommand(WorkerBinary() + " run " + Config("parcel-routing") + " --out " + dir.path() + "/iit");
  ASSERT_EQ(iit.exit_code, 0) << iit.output;
  auto base = RunCommand(WorkerBinary() + " run " + Config("parcel-routing") + " --out " + dir.path() +
                         "/baseline --set training.loss_weights.interchange=0");
  ASSERT_EQ(base.exit_code, 0) << base.output;
  json a = Result(dir.path() + "/iit"), b = Result(dir.path() + "/baseline");
  EXPECT_GE(a["acc_held_out"]["value"].get<double>(), 0.98);
  EXPECT_GE(a["iia_held_out"]["value"].get<double>(), 0.98);
  EXPECT_GE(a["iia_changed_held_out"]["value"].get<double>(), 0.98);
  EXPECT_GE(b["acc_held_out"]["value"].get<double>(), 0.98);
  EXPECT_LT(b["iia_changed_held_out"]["hi"].get<double>(), a["iia_changed_held_out"]["lo"].get<double>())
      << "baseline " << b["iia_changed_held_out"] << " vs IIT " << a["iia_changed_held_out"];
}

TEST(Demo, ChecksumDigitsReachesTheTargets) {
  ScopedTempDir dir;
  auto r = RunCommand(WorkerBinary() + " run " + Config("checksum-digits") + " --out " + dir.path());
  ASSERT_EQ(r.exit_code, 0) << r.output;
  json a = Result(dir.path());
  EXPECT_GE(a["acc_held_out"]["value"].get<double>(), 0.98);
  EXPECT_GE(a["iia_held_out"]["value"].get<double>(), 0.98);
  EXPECT_GE(a["iia_changed_held_out"]["value"].get<double>(), 0.98);
}

}  // namespace
}  // namespace graft
