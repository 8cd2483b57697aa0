// Analysis of stored transformers (issue 14, section 4): evaluate reproduces the run, scan searches
// layers x positions x unit blocks (a heat map per position, read back by check_scan.py), DAS
// rotates one token's residual stream, and a dict saved by Python's torch.save loads the same.
#include <string>

#include "gtest/gtest.h"
#include "nlohmann/json.hpp"
#include "tests/test_util.h"

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

std::string Script(const std::string& name) {
  return std::string(SystemPython()) + " " + SourceDir() + "/tests/python/" + name;
}
json Json(const std::string& path) { return json::parse(ReadFile(path)); }

// Parcel routing (the shipped scenario) on a small transformer, both variables at the token of
// `dest` in layer 0: local in units 0-7, careful in units 8-15.
const char kParcelTransformer[] = R"(name: parcel-tokens
seed: 7
algorithm:
  inputs:
    origin:  [north, south, east, west, central, harbor]
    dest:    [north, south, east, west, central, harbor]
    weight:  [light, medium, heavy, oversize]
    fragile: bool
  mechanisms:
    local:   origin == dest
    careful: weight == heavy || weight == oversize || fragile
  output:
    route: {expr: "2*local + careful", classes: [van, truck, bike, courier]}
network:
  type: transformer
  width: 16
  layers: 2
  heads: 2
  mlp_width: 32
  activation: gelu
alignment:
  local:   {layer: 0, position: dest, units: 0-7}
  careful: {layer: 0, position: dest, units: 8-15}
training:
  steps: 400
  batch_size: 128
  optimizer: {type: adam, lr: 0.003}
  interventions: [[local], [careful], [local, careful]]
evaluation:
  every: 200
  held_out: 0.2
  triples: 2048
)";

// One network trained for the suite (about 3 s).
class TransformerAnalysisTest : public ::testing::Test {
 protected:
  static void SetUpTestSuite() {
    dir_ = new ScopedTempDir();
    config_ = dir_->path() + "/parcel-tokens.yaml";
    ::graft::testing::WriteFile(config_, kParcelTransformer);
    run_ = dir_->path() + "/run";
    auto r = RunCommand(WorkerBinary() + " run " + config_ + " --out " + run_);
    ASSERT_EQ(r.exit_code, 0) << r.output;
  }
  static void TearDownTestSuite() {
    delete dir_;
    dir_ = nullptr;
  }
  static ScopedTempDir* dir_;
  static std::string config_, run_;
};
ScopedTempDir* TransformerAnalysisTest::dir_ = nullptr;
std::string TransformerAnalysisTest::config_, TransformerAnalysisTest::run_;

// Catches an evaluate path that builds another network kind, or masks other columns, than the
// trainer: its figures would differ from the run's.
TEST_F(TransformerAnalysisTest, EvaluateReproducesTheRunAndDrawsControlsAtTheSamePositions) {
  ScopedTempDir out;
  auto r = RunCommand(WorkerBinary() + " evaluate " + config_ + " --weights " + run_ + "/weights.pt --out " + out.path());
  ASSERT_EQ(r.exit_code, 0) << r.output;
  json run = Json(run_ + "/result.json"), ev = Json(out.path() + "/evaluation.json");
  for (const char* key : {"acc_held_out", "iia_held_out", "iia_changed_held_out", "iia_by_set",
                          "control_untrained_network", "control_random_units", "confusion"}) {
    ASSERT_TRUE(run.contains(key)) << key;
    EXPECT_EQ(run[key], ev[key]) << key;
  }
  EXPECT_GE(run["iia_changed_held_out"]["value"].get<double>(), 0.9) << run["iia_changed_held_out"];
  const json& sites = ev["control_random_units"]["sites"];
  EXPECT_EQ(sites["local"]["layer"], 0);
  EXPECT_EQ(sites["local"]["position"], json::array({"dest"}));
  EXPECT_EQ(sites["local"]["units"].size(), 8u);
}

// Catches a scan that ignores positions (every token's candidates would score alike) or masks
// the wrong token: the best site of each variable must be the token and block IIT trained.
TEST_F(TransformerAnalysisTest, ScanFindsTheTokenAndUnitsIitTrainedAt) {
  ScopedTempDir out;
  auto r = RunCommand(WorkerBinary() + " scan " + config_ + " --weights " + run_ + "/weights.pt --out " + out.path() +
                      " --set scan.block=8");
  ASSERT_EQ(r.exit_code, 0) << r.output;
  json scan = Json(out.path() + "/scan.json");
  for (const auto& [name, first] : {std::pair<std::string, int>{"local", 0}, {"careful", 8}}) {
    const json& best = scan["variables"][name]["best"];
    EXPECT_EQ(best["layer"], 0) << name;
    EXPECT_EQ(best["position"], "dest") << name;
    EXPECT_EQ(best["units"].front(), first) << name;
    EXPECT_GE(best["iia_changed"]["value"].get<double>(), 0.9) << name;
    // Layer 0 x 5 tokens x 2 blocks, and the last layer at readout only (2 blocks).
    EXPECT_EQ(scan["variables"][name]["candidates"].size(), 12u) << name;
  }
  // Another token of the same layer carries nothing of local.
  for (const auto& c : scan["variables"]["local"]["candidates"]) {
    if (c["position"] == "weight") {
      EXPECT_LE(c["iia_changed"]["value"].get<double>(), 0.5) << c;
    }
  }
  // The picture (Python's XML parser): a heat map per variable and position, the best outlined.
  auto py = RunCommand(Script("check_scan.py") + " " + out.path());
  EXPECT_EQ(py.exit_code, 0) << py.output;
  EXPECT_NE(py.output.find("local at dest: 2 cells (1 layers x 2 blocks), outlined [(0, '0-7')]"), std::string::npos)
      << py.output;
  EXPECT_NE(py.output.find("local at readout: 4 cells (2 layers x 2 blocks), outlined []"), std::string::npos)
      << py.output;
  EXPECT_NE(py.output.find("checked 10 heat maps"), std::string::npos) << py.output;
  EXPECT_NE(r.output.find("local: best site layer 0 at dest units 0-7"), std::string::npos) << r.output;
}

// DAS at (layer 0, dest) finds the alignment on the trained network and not on the untrained
// one; a rotation of another token does not find it. Catches a rotation applied to the wrong
// columns of the flattened stream.
TEST_F(TransformerAnalysisTest, DasRotatesOneTokensResidualStream) {
  ScopedTempDir out;
  auto r = RunCommand(WorkerBinary() + " das " + config_ + " --weights " + run_ + "/weights.pt --out " + out.path() +
                      "/dest --set das.steps=150");
  ASSERT_EQ(r.exit_code, 0) << r.output;
  json das = Json(out.path() + "/dest/das.json");
  EXPECT_EQ(das["layer"], 0);
  EXPECT_EQ(das["position"], "dest");
  EXPECT_GE(das["network"]["iia_changed_held_out"]["value"].get<double>(), 0.9) << das["network"];
  EXPECT_LT(das["control_untrained_network"]["iia_changed_held_out"]["hi"].get<double>(),
            das["network"]["iia_changed_held_out"]["lo"].get<double>());
  auto other = RunCommand(WorkerBinary() + " das " + config_ + " --weights " + run_ + "/weights.pt --out " + out.path() +
                          "/weight --set das.steps=150 --set das.position=weight");
  ASSERT_EQ(other.exit_code, 0) << other.output;
  EXPECT_LE(Json(out.path() + "/weight/das.json")["network"]["iia_changed_held_out"]["value"].get<double>(), 0.6);
  EXPECT_NE(r.output.find("DAS at layer 0 at dest"), std::string::npos) << r.output;
}

// A dict saved by Python's torch.save (zip format, float64) under the documented names evaluates
// to the same figures; a dict missing a block tensor is refused by name.
TEST_F(TransformerAnalysisTest, PythonSavedDictEvaluatesLikeTheGraftNetwork) {
  ScopedTempDir out;
  auto py = RunCommand(Script("resave_weights.py") + " " + run_ + "/weights.pt " + out.path() + "/py.pt");
  ASSERT_EQ(py.exit_code, 0) << py.output;
  auto a = RunCommand(WorkerBinary() + " evaluate " + config_ + " --weights " + out.path() + "/py.pt --out " + out.path() +
                      "/py");
  ASSERT_EQ(a.exit_code, 0) << a.output;
  json ja = Json(out.path() + "/py/evaluation.json"), jb = Json(run_ + "/result.json");
  for (const char* key : {"acc_held_out", "iia_held_out", "iia_changed_held_out", "iia_by_set"}) {
    EXPECT_EQ(ja[key], jb[key]) << key;
  }
  auto cut = RunCommand(std::string(SystemPython()) + " -c \"import torch; d = torch.load('" + out.path() +
                        "/py.pt'); del d['block.1.attn.in_proj.bias']; torch.save(d, '" + out.path() + "/cut.pt')\"");
  ASSERT_EQ(cut.exit_code, 0) << cut.output;
  auto b = RunCommand(WorkerBinary() + " evaluate " + config_ + " --weights " + out.path() + "/cut.pt --out " + out.path() +
                      "/cut");
  EXPECT_EQ(b.exit_code, 2) << b.output;
  EXPECT_NE(b.output.find("missing: block.1.attn.in_proj.bias"), std::string::npos) << b.output;
}

}  // namespace
}  // namespace graft
