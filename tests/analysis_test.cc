// Analysis of stored networks (issue 7): evaluate without training, controls in every report,
// the alignment scan, DAS, and loading weights saved by Python. Each external reference is named
// beside its check.
#include <fstream>
#include <set>
#include <sstream>

#include <torch/torch.h>

#include "gtest/gtest.h"
#include "nlohmann/json.hpp"
#include "tests/test_util.h"
#include "trainer/net/rotation.h"

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

std::string ParcelConfig() { return SourceDir() + "/configs/parcel-routing.yaml"; }
std::string Script(const std::string& name) {
  return std::string(SystemPython()) + " " + SourceDir() + "/tests/python/" + name;
}
json Json(const std::string& path) { return json::parse(ReadFile(path)); }

// Two networks trained once for the whole suite with the shipped parcel-routing config (about
// 3 s each): `aligned_` as shipped (local = layer 1 units 0-15, careful = layer 1 units 16-31),
// and `moved_` with the sites moved to layer 2 units 32-47 and 48-63, so that neither a scan
// nor a rotation that starts near the identity finds them by starting there.
class AnalysisTest : public ::testing::Test {
 protected:
  static void SetUpTestSuite() {
    dir_ = new ScopedTempDir();
    aligned_ = dir_->path() + "/aligned";
    moved_ = dir_->path() + "/moved";
    auto a = RunCommand(WorkerBinary() + " run " + ParcelConfig() + " --out " + aligned_);
    ASSERT_EQ(a.exit_code, 0) << a.output;
    auto b = RunCommand(WorkerBinary() + " run " + ParcelConfig() + " --out " + moved_ + kMoved);
    ASSERT_EQ(b.exit_code, 0) << b.output;
  }
  static void TearDownTestSuite() {
    delete dir_;
    dir_ = nullptr;
  }
  static constexpr const char* kMoved =
      " --set alignment.local.layer=2 --set alignment.local.units=32-47"
      " --set alignment.careful.layer=2 --set alignment.careful.units=48-63";
  static ScopedTempDir* dir_;
  static std::string aligned_, moved_;
};
ScopedTempDir* AnalysisTest::dir_ = nullptr;
std::string AnalysisTest::aligned_, AnalysisTest::moved_;

// The rotation's own contract: R = matrix_exp(S) with S = A - A^T, computed in float64.
// Orthogonality (R^T R = I) is the definition of a rotation; SciPy's scipy.linalg.expm (Debian's
// /usr/bin/python3) is the reference for the matrix exponential. Both are checked at float64
// precision, 1e-12 (check_rotation.py says why: float64 gives about 1e-14 here, any float32 step
// about 1e-6), so a float32 computation fails.
TEST(Rotation, IsOrthogonalAndEqualsScipyExpmOfItsSkewMatrix) {
  torch::manual_seed(11);
  net::Rotation rot(12, /*init_scale=*/0.7);  // far from the identity
  torch::NoGradGuard no_grad;
  torch::Tensor r64 = rot->MatrixDouble();
  ASSERT_EQ(r64.scalar_type(), torch::kFloat64);
  ASSERT_EQ(rot->Skew().scalar_type(), torch::kFloat64);
  const torch::Tensor eye64 = torch::eye(12, torch::kFloat64);
  const double orth = (r64.t().matmul(r64) - eye64).abs().max().item<double>();
  EXPECT_LE(orth, 1e-12);
  EXPECT_GT((r64 - eye64).abs().max().item<double>(), 0.1);
  // The float32 matrix the interchange uses is that float64 matrix rounded once.
  torch::Tensor r = rot->Matrix();
  EXPECT_EQ(r.scalar_type(), torch::kFloat32);
  EXPECT_TRUE(torch::equal(r, r64.to(torch::kFloat32)));
  // The interchange is a patch in the rotated basis: with an all-false mask it gives the base back.
  torch::Tensor b = torch::randn({5, 12}), s = torch::randn({5, 12});
  EXPECT_TRUE(torch::allclose(rot->Interchange(b, s, torch::zeros({5, 12}, torch::kBool)), b, 1e-5, 1e-5));
  EXPECT_TRUE(torch::allclose(rot->Interchange(b, s, torch::ones({5, 12}, torch::kBool)), s, 1e-5, 1e-5));
  ScopedTempDir dir;
  c10::Dict<std::string, torch::Tensor> dict;
  dict.insert("rotation", rot->MatrixDouble().contiguous());
  dict.insert("skew", rot->Skew().contiguous());
  std::vector<char> bytes = torch::pickle_save(c10::IValue(dict));
  ::graft::testing::WriteFile(dir.path() + "/rotation.pt", std::string(bytes.begin(), bytes.end()));
  auto py = RunCommand(Script("check_rotation.py") + " " + dir.path() + "/rotation.pt --min-turn 0.1");
  EXPECT_EQ(py.exit_code, 0) << py.output;
  EXPECT_NE(py.output.find("checked 1 rotations"), std::string::npos) << py.output;
}

// `evaluate` on the run's own weights.pt gives the run's final figures exactly, controls included.
TEST_F(AnalysisTest, EvaluateReproducesTheTrainingRunsFinalMetrics) {
  ScopedTempDir out;
  auto r = RunCommand(WorkerBinary() + " evaluate " + ParcelConfig() + " --weights " + aligned_ + "/weights.pt --out " +
                      out.path());
  ASSERT_EQ(r.exit_code, 0) << r.output;
  json run = Json(aligned_ + "/result.json"), ev = Json(out.path() + "/evaluation.json");
  for (const char* key : {"acc_train", "acc_held_out", "iia_held_out", "iia_changed_held_out", "iia_by_set", "unchanged_floor",
                          "control_untrained_network", "control_random_units", "confusion"}) {
    ASSERT_TRUE(run.contains(key)) << key;
    EXPECT_EQ(run[key], ev[key]) << key;
  }
  EXPECT_EQ(ReadFile(aligned_ + "/failures.jsonl"), ReadFile(out.path() + "/failures.jsonl"));
  EXPECT_NE(r.output.find("IIA, changed cases only"), std::string::npos) << r.output;
}

// The controls of a run's result.json. These are consistency checks among graft's own outputs
// (the untrained control is metrics.jsonl's step-0 line, the random units avoid the real site,
// the confusion table and failures.jsonl add up to the IIA counts) plus one property of the
// trained network (swapping units outside the aligned sites moves no changed case to its
// counterfactual label); no outside reference here.
TEST_F(AnalysisTest, RunResultCarriesTheControls) {
  json res = Json(aligned_ + "/result.json");
  std::istringstream metrics(ReadFile(aligned_ + "/metrics.jsonl"));
  std::string first;
  std::getline(metrics, first);
  json step0 = json::parse(first);
  ASSERT_EQ(step0["step"], 0);
  EXPECT_EQ(res["control_untrained_network"]["iia_held_out"], step0["iia_held_out"]);
  EXPECT_EQ(res["control_untrained_network"]["iia_changed_held_out"], step0["iia_changed_held_out"]);
  // Random units: as many as the real site, in the same layer, none of the real units.
  const json& sites = res["control_random_units"]["sites"];
  std::set<int> real;
  for (int u = 0; u < 32; ++u) real.insert(u);
  for (const char* var : {"local", "careful"}) {
    EXPECT_EQ(sites[var]["layer"], 1) << var;
    ASSERT_EQ(sites[var]["units"].size(), 16u) << var;
    for (int u : sites[var]["units"]) EXPECT_EQ(real.count(u), 0u) << var << " unit " << u;
  }
  // The IIT network ignores its unaligned units, so swapping them changes nothing: the control
  // scores the unchanged floor overall and 0 on changed cases, far below the real alignment.
  EXPECT_EQ(res["control_random_units"]["iia_changed_held_out"]["correct"], 0);
  EXPECT_GE(res["iia_changed_held_out"]["value"].get<double>(), 0.98);
  // The confusion table: per set, rows sum to the set's triples, the diagonal to its correct ones.
  const json& conf = res["confusion"];
  EXPECT_EQ(conf["classes"], json({"van", "truck", "bike", "courier"}));
  int64_t failures_expected = 0;
  for (const char* set : {"local", "careful", "local+careful"}) {
    int64_t total = 0, diagonal = 0;
    for (size_t e = 0; e < 4; ++e) {
      for (size_t p = 0; p < 4; ++p) {
        total += conf["by_set"][set][e][p].get<int64_t>();
        if (e == p) diagonal += conf["by_set"][set][e][p].get<int64_t>();
      }
    }
    EXPECT_EQ(total, res["iia_by_set"][set]["n"].get<int64_t>()) << set;
    EXPECT_EQ(diagonal, res["iia_by_set"][set]["correct"].get<int64_t>()) << set;
    failures_expected += total - diagonal;
  }
  // failures.jsonl: min(200, failing triples) lines, each with symbols.
  std::istringstream lines(ReadFile(aligned_ + "/failures.jsonl"));
  std::string line;
  int64_t count = 0;
  while (std::getline(lines, line)) {
    json f = json::parse(line);
    EXPECT_TRUE(f["base"]["origin"].is_string());
    EXPECT_NE(f["expected"], f["predicted"]);
    ++count;
  }
  EXPECT_EQ(count, std::min<int64_t>(200, failures_expected));
}

// A standard-training run has failing triples: the file then holds exactly 200 (the cap).
TEST(Controls, FailuresAreCappedAt200AndNamedWithSymbols) {
  ScopedTempDir dir;
  auto r = RunCommand(WorkerBinary() + " run " + ParcelConfig() + " --out " + dir.path() +
                      " --set training.steps=200 --set training.loss_weights.interchange=0");
  ASSERT_EQ(r.exit_code, 0) << r.output;
  json res = Json(dir.path() + "/result.json");
  ASSERT_GT(res["iia_held_out"]["n"].get<int64_t>() - res["iia_held_out"]["correct"].get<int64_t>(), 200);
  std::istringstream lines(ReadFile(dir.path() + "/failures.jsonl"));
  std::string line;
  int count = 0;
  const std::set<std::string> routes = {"van", "truck", "bike", "courier"};
  while (std::getline(lines, line)) {
    json f = json::parse(line);
    EXPECT_EQ(routes.count(f["expected"].get<std::string>()), 1u) << line;
    EXPECT_EQ(routes.count(f["predicted"].get<std::string>()), 1u) << line;
    EXPECT_TRUE(f["source"]["fragile"] == "true" || f["source"]["fragile"] == "false") << line;
    ++count;
  }
  EXPECT_EQ(count, 200);
}

// A network trained with IIT at a site scans best at that site (both variables), among all
// three layers in blocks of 16.
TEST_F(AnalysisTest, ScanFindsTheSitesIitTrainedAt) {
  ScopedTempDir out;
  auto r = RunCommand(WorkerBinary() + " scan " + ParcelConfig() + " --weights " + moved_ + "/weights.pt --out " +
                      out.path() + kMoved + " --set scan.block=16 --set scan.random_subsets=2");
  ASSERT_EQ(r.exit_code, 0) << r.output;
  json scan = Json(out.path() + "/scan.json");
  const json& local = scan["variables"]["local"]["best"];
  EXPECT_EQ(local["layer"], 2);
  EXPECT_EQ(local["units"].front(), 32);
  EXPECT_EQ(local["units"].back(), 47);
  const json& careful = scan["variables"]["careful"]["best"];
  EXPECT_EQ(careful["layer"], 2);
  EXPECT_EQ(careful["units"].front(), 48);
  EXPECT_EQ(careful["units"].back(), 63);
  EXPECT_GE(local["iia_changed"]["value"].get<double>(), 0.98);
  // 3 layers x (4 blocks + 2 random subsets) candidates per variable, one table row each.
  EXPECT_EQ(scan["variables"]["local"]["candidates"].size(), 18u);
  const std::string table = ReadFile(out.path() + "/scan.tsv");
  EXPECT_EQ(std::count(table.begin(), table.end(), '\n'), 1 + 2 * 18);
  // The picture, read by Python's XML parser (tests/python/check_scan.py): one heat map per
  // variable of 3 layers x 4 blocks (the random subsets are not drawn), each cell carrying its
  // candidate's figures from scan.json, and the best site found above outlined.
  auto py = RunCommand(Script("check_scan.py") + " " + out.path());
  EXPECT_EQ(py.exit_code, 0) << py.output;
  EXPECT_NE(py.output.find("local: 12 cells (3 layers x 4 blocks), outlined [(2, '32-47')]"), std::string::npos)
      << py.output;
  EXPECT_NE(py.output.find("careful: 12 cells (3 layers x 4 blocks), outlined [(2, '48-63')]"), std::string::npos)
      << py.output;
  EXPECT_NE(py.output.find("checked 2 heat maps"), std::string::npos) << py.output;
  EXPECT_NE(r.output.find("local: best site layer 2 units 32-47"), std::string::npos) << r.output;
  EXPECT_NE(r.output.find("scan careful: 18/18 candidates"), std::string::npos) << r.output;
}

// DAS on the IIT network finds IIA near 1 at the aligned layer, while the same search on the
// untrained network of the same shape stays far lower (the DAS paper's finding, Geiger, Wu et
// al. 2023, from memory). The rotated slices start at dimensions 0-15 and 16-31, and the units
// 0-15 and 16-31 of layer 2 carry no alignment (checked below with evaluate), so the search has
// to learn a real rotation; check_rotation.py checks it against SciPy.
TEST_F(AnalysisTest, DasFindsTheAlignmentWhileTheUntrainedControlDoesNot) {
  ScopedTempDir out;
  const std::string moved_weights = moved_ + "/weights.pt";
  auto guess = RunCommand(WorkerBinary() + " evaluate " + ParcelConfig() + " --weights " + moved_weights + " --out " +
                          out.path() + "/guess --set alignment.local.layer=2 --set alignment.careful.layer=2");
  ASSERT_EQ(guess.exit_code, 0) << guess.output;
  EXPECT_LE(Json(out.path() + "/guess/evaluation.json")["iia_changed_held_out"]["value"].get<double>(), 0.5);

  auto r = RunCommand(WorkerBinary() + " das " + ParcelConfig() + " --weights " + moved_weights + " --out " + out.path() +
                      kMoved + " --set das.steps=300");
  ASSERT_EQ(r.exit_code, 0) << r.output;
  json das = Json(out.path() + "/das.json");
  EXPECT_EQ(das["layer"], 2);
  const json& found = das["network"];
  const json& control = das["control_untrained_network"];
  EXPECT_GE(found["iia_held_out"]["value"].get<double>(), 0.97) << found;
  EXPECT_GE(found["iia_changed_held_out"]["value"].get<double>(), 0.95) << found;
  EXPECT_LE(control["iia_changed_held_out"]["value"].get<double>(), 0.6) << control;
  EXPECT_LT(control["iia_changed_held_out"]["hi"].get<double>(), found["iia_changed_held_out"]["lo"].get<double>());
  auto py = RunCommand(Script("check_rotation.py") + " " + out.path() + "/rotation.pt --min-turn 0.1");
  EXPECT_EQ(py.exit_code, 0) << py.output;
  EXPECT_NE(py.output.find("checked 2 rotations"), std::string::npos) << py.output;
}

// A dict saved by Python's torch.save (zip format, float64; written by Debian's /usr/bin/python3)
// evaluates to the same figures as the graft network with the same parameters.
TEST_F(AnalysisTest, PythonSavedDictEvaluatesLikeTheGraftNetwork) {
  ScopedTempDir out;
  auto py = RunCommand(Script("resave_weights.py") + " " + aligned_ + "/weights.pt " + out.path() + "/py.pt");
  ASSERT_EQ(py.exit_code, 0) << py.output;
  ASSERT_NE(py.output.find("zip format"), std::string::npos) << py.output;
  auto a = RunCommand(WorkerBinary() + " evaluate " + ParcelConfig() + " --weights " + out.path() + "/py.pt --out " +
                      out.path() + "/py");
  ASSERT_EQ(a.exit_code, 0) << a.output;
  auto b = RunCommand(WorkerBinary() + " evaluate " + ParcelConfig() + " --weights " + aligned_ + "/weights.pt --out " +
                      out.path() + "/graft");
  ASSERT_EQ(b.exit_code, 0) << b.output;
  json ja = Json(out.path() + "/py/evaluation.json"), jb = Json(out.path() + "/graft/evaluation.json");
  for (const char* key : {"acc_held_out", "iia_held_out", "iia_changed_held_out", "iia_by_set", "control_random_units"}) {
    EXPECT_EQ(ja[key], jb[key]) << key;
  }
}

TEST_F(AnalysisTest, WeightsThatDoNotFitAreRefusedNamingTensorsAndShapes) {
  ScopedTempDir out;
  auto py = RunCommand(Script("resave_weights.py") + " " + aligned_ + "/weights.pt " + out.path() + "/bad.pt --break");
  ASSERT_EQ(py.exit_code, 0) << py.output;
  auto r = RunCommand(WorkerBinary() + " evaluate " + ParcelConfig() + " --weights " + out.path() + "/bad.pt --out " +
                      out.path() + "/e");
  EXPECT_EQ(r.exit_code, 2) << r.output;
  EXPECT_NE(r.output.find("'hidden.0.weight' has shape [64, 31] but the config needs [64, 32]"), std::string::npos)
      << r.output;
  EXPECT_NE(r.output.find("missing: out.bias"), std::string::npos) << r.output;
  EXPECT_NE(r.output.find("not part of this config's network: decoder.weight"), std::string::npos) << r.output;
  // A config whose network differs is refused the same way; a missing file is exit 1 with its name.
  auto w = RunCommand(WorkerBinary() + " evaluate " + ParcelConfig() + " --weights " + aligned_ +
                      "/weights.pt --set network.hidden=[64,64] --set alignment.local.layer=0 "
                      "--set alignment.careful.layer=0 --out " + out.path() + "/w");
  EXPECT_EQ(w.exit_code, 2) << w.output;
  EXPECT_NE(w.output.find("not part of this config's network: hidden.2.bias, hidden.2.weight"), std::string::npos)
      << w.output;
  auto m = RunCommand(WorkerBinary() + " evaluate " + ParcelConfig() + " --weights " + out.path() + "/none.pt --out " +
                      out.path() + "/m");
  EXPECT_EQ(m.exit_code, 1) << m.output;
  EXPECT_NE(m.output.find("none.pt: cannot open the weights file"), std::string::npos) << m.output;
}

}  // namespace
}  // namespace graft

namespace graft {
namespace {

// A `scan:` or `das:` block makes `run` analyse the network it has just trained, into the same
// run directory: the scan of layer 1 finds the sites IIT trained at, DAS on the aligned layer
// reports on the run's own held-out triples, and the files hold what the blocks asked for.
TEST(RunWithAnalysisBlocks, ScanAndDasRunAfterTraining) {
  ScopedTempDir dir;
  auto r = RunCommand(WorkerBinary() + " run " + ParcelConfig() + " --out " + dir.path() +
                      " --set training.steps=300 --set evaluation.triples=512 --set 'scan={layers: [1], pairs: 256}'"
                      " --set 'das={steps: 50}'");
  ASSERT_EQ(r.exit_code, 0) << r.output;
  const json res = Json(dir.path() + "/result.json");
  ASSERT_EQ(res["iia_held_out"]["n"], 512);

  // scan.json: layer 1 only, 64 units in blocks of the site size (16): 4 candidates per variable,
  // each on 256 pairs; the best is the aligned site.
  const json scan = Json(dir.path() + "/scan.json");
  EXPECT_EQ(scan["pairs_per_candidate"], 256);
  EXPECT_EQ(scan["ranked_by"], "iia_changed_held_out");
  ASSERT_EQ(scan["variables"].size(), 2u);
  const std::vector<std::pair<std::string, int>> sites = {{"local", 0}, {"careful", 16}};
  for (const auto& [var, first] : sites) {
    SCOPED_TRACE(var);
    const json& v = scan["variables"][var];
    ASSERT_EQ(v["candidates"].size(), 4u);
    for (size_t i = 0; i < 4; ++i) {
      const json& c = v["candidates"][i];
      EXPECT_EQ(c["layer"], 1);
      EXPECT_EQ(c["kind"], "block");
      EXPECT_EQ(c["units"].size(), 16u);
      EXPECT_EQ(c["units"].front(), 16 * static_cast<int>(i));
      EXPECT_EQ(c["iia"]["n"], 256);
      EXPECT_EQ(c["iia_changed"]["n"], v["candidates"][0]["iia_changed"]["n"]);  // the same pairs
    }
    EXPECT_EQ(v["aligned_site"]["layer"], 1);
    EXPECT_EQ(v["aligned_site"]["units"].front(), first);
    EXPECT_EQ(v["best"]["layer"], 1);
    EXPECT_EQ(v["best"]["units"].front(), first);
    EXPECT_EQ(v["best"]["units"].back(), first + 15);
    EXPECT_GE(v["best"]["iia_changed"]["value"].get<double>(), 0.95);
  }
  auto svg = RunCommand(Script("check_scan.py") + " " + dir.path());
  EXPECT_EQ(svg.exit_code, 0) << svg.output;
  EXPECT_NE(svg.output.find("local: 4 cells (1 layers x 4 blocks), outlined [(1, '0-15')]"), std::string::npos)
      << svg.output;
  EXPECT_NE(svg.output.find("careful: 4 cells (1 layers x 4 blocks), outlined [(1, '16-31')]"), std::string::npos)
      << svg.output;

  // das.json: the layer both variables share, the steps asked for, 16 rotated dimensions each;
  // the trained network and the untrained control evaluated on the run's 512 held-out triples,
  // so the unchanged floor and the changed count are the run's.
  const json das = Json(dir.path() + "/das.json");
  EXPECT_EQ(das["layer"], 1);
  EXPECT_EQ(das["steps"], 50);
  EXPECT_EQ(das["rotated_dims"], json::parse(R"({"local": {"first": 0, "count": 16},
                                                 "careful": {"first": 16, "count": 16}})"));
  std::ostringstream cases;
  cases.precision(17);
  for (const char* who : {"network", "control_untrained_network"}) {
    SCOPED_TRACE(who);
    const json& m = das[who];
    EXPECT_EQ(m["unchanged_floor"], res["unchanged_floor"]);
    EXPECT_EQ(m["iia_held_out"]["n"], 512);
    EXPECT_EQ(m["iia_changed_held_out"]["n"], res["iia_changed_held_out"]["n"]);
    for (const char* key : {"iia_held_out", "iia_changed_held_out"}) {
      const json& a = m[key];
      EXPECT_DOUBLE_EQ(a["value"].get<double>(), a["correct"].get<double>() / a["n"].get<double>()) << key;
      cases << a["correct"] << " " << a["n"] << " " << a["lo"].get<double>() << " " << a["hi"].get<double>() << "\n";
    }
    EXPECT_EQ(m["iia_by_set"].size(), 3u);
  }
  // The trained network keeps its IIA under the learned rotation; the untrained control does
  // not reach it (the DAS finding cited above DasFindsTheAlignmentWhileTheUntrainedControlDoesNot).
  EXPECT_GE(das["network"]["iia_changed_held_out"]["value"].get<double>(), 0.9) << das["network"];
  EXPECT_LT(das["control_untrained_network"]["iia_changed_held_out"]["hi"].get<double>(),
            das["network"]["iia_changed_held_out"]["lo"].get<double>());
  // Its intervals are Wilson's (statsmodels), its rotations orthogonal and SciPy's expm of their
  // skew matrices, in float64.
  ::graft::testing::WriteFile(dir.path() + "/das-intervals.txt", cases.str());
  auto wilson = RunCommand(Script("check_wilson.py") + " " + dir.path() + "/das-intervals.txt");
  EXPECT_EQ(wilson.exit_code, 0) << wilson.output;
  EXPECT_NE(wilson.output.find("checked 4 intervals"), std::string::npos) << wilson.output;
  auto rot = RunCommand(Script("check_rotation.py") + " " + dir.path() + "/rotation.pt");
  EXPECT_EQ(rot.exit_code, 0) << rot.output;
  EXPECT_NE(rot.output.find("checked 2 rotations"), std::string::npos) << rot.output;
  EXPECT_NE(r.output.find("DAS at layer 1, 50 steps"), std::string::npos) << r.output;
}

}  // namespace
}  // namespace graft
