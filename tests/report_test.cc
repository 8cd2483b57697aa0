// HTML reports checked in a real browser, and the Python package against a real graftd (both for
// client_test). A sweep of an IIT setting and a baseline over two seeds runs on two workers; `graft
// report` writes the sweep's page and its job pages, `graft-worker report` a page from a fetched
// run directory, and tests/python/check_report_pages.py loads them all in Debian's headless
// Chromium (what it checks, and how the check is shown able to fail, is in its docstring). The
// Python package is checked by tests/python/check_graft_package.py on a local run with graft's
// logits dump and against the cluster.
#include <cstdlib>
#include <filesystem>
#include <iostream>
#include <string>
#include <vector>

#include <gtest/gtest.h>

#include "nlohmann/json.hpp"
#include "tests/cluster.h"
#include "tests/test_util.h"

namespace graft {
namespace {

namespace fs = std::filesystem;
using json = nlohmann::json;
using ::graft::testing::BinaryDir;
using ::graft::testing::Cluster;
using ::graft::testing::kAlice;
using ::graft::testing::ReadFile;
using ::graft::testing::RunCommand;
using ::graft::testing::ScopedTempDir;
using ::graft::testing::SourceDir;
using ::graft::testing::SystemPython;
using ::graft::testing::WriteFile;

// Small enough to train in about a second, large enough that the IIT network's curves leave the
// baseline's behind. The scan and DAS blocks give the job pages their analysis figures.
const char kSweepTail[] = R"(scan: {pairs: 256}
das: {steps: 30, batch_size: 64}
sweep:
  grid:
    training.loss_weights.interchange: [0, 1]
  seeds: [1, 2]
)";
const std::vector<std::string> kSmall = {"training.steps=300", "evaluation.every=50", "evaluation.triples=512",
                                         "network.hidden=[32,32,32]", "alignment.local.units=0-7",
                                         "alignment.careful.units=8-15"};

std::string Sets(const std::vector<std::string>& sets) {
  std::string out;
  for (const auto& s : sets) out += " --set " + s;
  return out;
}

testing::CommandResult Graft(Cluster& c, const std::string& args) {
  return RunCommand(BinaryDir() + "/bin/graft --server " + c.address() + " --token " + kAlice + " " + args);
}

TEST(Report, JobAndSweepPagesShowTheStoredFiguresInChromium) {
  Cluster c;
  auto w1 = c.StartWorker("w1");
  auto w2 = c.StartWorker("w2");
  ScopedTempDir dir;
  std::string config = ReadFile(SourceDir() + "/configs/parcel-routing.yaml");
  const std::string file = dir.path() + "/routing-sweep.yaml";
  WriteFile(file, config + "\n" + kSweepTail);
  auto sub = Graft(c, "submit " + file + Sets(kSmall) + " --json");
  ASSERT_EQ(sub.exit_code, 0) << sub.output;
  const json submitted = json::parse(sub.output);
  const std::string sweep = submitted["sweep_id"];
  auto waited = Graft(c, "wait " + sweep + " --timeout 240");
  ASSERT_EQ(waited.exit_code, 0) << waited.output << c.Log();

  const std::string out = dir.path() + "/report";
  auto rep = Graft(c, "report " + sweep + " --out " + out);
  ASSERT_EQ(rep.exit_code, 0) << rep.output;
  EXPECT_NE(rep.output.find(out + "/index.html"), std::string::npos) << rep.output;
  auto cmp = Graft(c, "compare " + sweep + " --format json");
  ASSERT_EQ(cmp.exit_code, 0) << cmp.output;
  WriteFile(dir.path() + "/compare.json", cmp.output);

  // Each job's files as the checker's reference, and the IIT and baseline job of seed 1.
  std::string iit, baseline, run_dirs;
  for (const auto& id : submitted["job_ids"]) {
    const std::string job = id;
    EXPECT_TRUE(fs::exists(out + "/" + job + "/index.html")) << job;
    auto fetched = Graft(c, "fetch " + job + " --out " + dir.path() + "/runs/" + job);
    ASSERT_EQ(fetched.exit_code, 0) << fetched.output;
    run_dirs += " " + dir.path() + "/runs/" + job;
    const std::string name = c.Get(job).name();
    if (name == "parcel-routing/interchange=1/seed=1") iit = job;
    if (name == "parcel-routing/interchange=0/seed=1") baseline = job;
  }
  ASSERT_FALSE(iit.empty());
  ASSERT_FALSE(baseline.empty());
  // graft-worker's page of the fetched run directory: the same page from local files.
  auto local = RunCommand(BinaryDir() + "/bin/graft-worker report " + dir.path() + "/runs/" + iit + " --out " +
                          dir.path() + "/local");
  ASSERT_EQ(local.exit_code, 0) << local.output;
  const std::string page = ReadFile(dir.path() + "/local/index.html");
  EXPECT_NE(page.find("id=\"scan\""), std::string::npos) << "the scan section is missing";
  EXPECT_NE(page.find("id=\"das\""), std::string::npos) << "the DAS section is missing";
  EXPECT_NE(page.find("<svg xmlns=\"http://www.w3.org/2000/svg\" width="), std::string::npos);

  auto checked = RunCommand(std::string(SystemPython()) + " " + SourceDir() + "/tests/python/check_report_pages.py" +
                            " --work " + dir.path() + "/browser" +
                            " --job " + dir.path() + "/runs/" + iit + " " + out + "/" + iit + "/index.html" +
                            " --job " + dir.path() + "/runs/" + baseline + " " + out + "/" + baseline + "/index.html" +
                            " --job " + dir.path() + "/runs/" + iit + " " + dir.path() + "/local/index.html" +
                            " --sweep " + out + "/index.html " + dir.path() + "/compare.json" + run_dirs);
  std::cout << checked.output;  // what was checked, in the test's log
  EXPECT_EQ(checked.exit_code, 0) << checked.output;
  EXPECT_NE(checked.output.find("all report checks passed"), std::string::npos) << checked.output;
  if (const char* keep = std::getenv("GRAFT_KEEP_REPORT")) {
    RunCommand("rm -rf " + std::string(keep) + " && cp -r " + dir.path() + " " + keep);
  }
}

// The palette against simulated colour-vision deficiencies (tests/python/check_palette.py; the
// first palette tried failed it: a blue and a purple 6.9 apart under deuteranopia).
TEST(Report, PaletteStaysApartForColourBlindReaders) {
  auto checked = RunCommand(std::string(SystemPython()) + " " + SourceDir() + "/tests/python/check_palette.py " +
                            SourceDir() + "/client/report_plot.cc");
  std::cout << checked.output;
  EXPECT_EQ(checked.exit_code, 0) << checked.output;
  EXPECT_NE(checked.output.find("palette: every pair apart"), std::string::npos) << checked.output;
}

TEST(Report, BadTargetsGiveClearErrors) {
  ScopedTempDir dir;
  auto no_run = RunCommand(BinaryDir() + "/bin/graft-worker report " + dir.path() + "/nothing --out " + dir.path() +
                           "/out");
  EXPECT_EQ(no_run.exit_code, 1) << no_run.output;
  EXPECT_NE(no_run.output.find("holds neither metrics.jsonl nor result.json"), std::string::npos) << no_run.output;
  EXPECT_FALSE(fs::exists(dir.path() + "/out/index.html"));
  Cluster c;
  auto missing = Graft(c, "report j-999 --out " + dir.path() + "/out");
  EXPECT_EQ(missing.exit_code, 1) << missing.output;
  auto usage = Graft(c, "report 999 --out " + dir.path() + "/out");
  EXPECT_EQ(usage.exit_code, 3) << usage.output;
  EXPECT_NE(usage.output.find("did you mean 'j-999'"), std::string::npos) << usage.output;
}

TEST(PythonPackage, RebuildsTheNetworkAgreesWithGraftAndDrivesGraftd) {
  ScopedTempDir dir;
  // The baseline, so IIA is neither 0 nor 1 and failures.jsonl is not empty; 64 triples, so the
  // logits dump holds every one of them.
  const std::string run = dir.path() + "/run";
  auto trained = RunCommand(BinaryDir() + "/bin/graft-worker run " + SourceDir() + "/configs/parcel-routing.yaml --out " +
                            run + Sets({"training.steps=300", "evaluation.every=100", "evaluation.triples=64",
                                        "training.loss_weights.interchange=0"}) +
                            " --dump-logits " + run + "/logits.json");
  ASSERT_EQ(trained.exit_code, 0) << trained.output;
  Cluster c;
  auto w1 = c.StartWorker("w1");
  auto checked = RunCommand(std::string(SystemPython()) + " " + SourceDir() + "/tests/python/check_graft_package.py" +
                            " --package-dir " + BinaryDir() + "/python --run-dir " + run + " --work " + dir.path() +
                            " --address " + c.address() + " --token " + kAlice + " --config " + SourceDir() +
                            "/configs/parcel-routing.yaml --set training.steps=100 --set evaluation.every=50" +
                            " --set evaluation.triples=256");
  std::cout << checked.output;
  EXPECT_EQ(checked.exit_code, 0) << checked.output;
  EXPECT_NE(checked.output.find(" checks passed, 0 failed"), std::string::npos) << checked.output;
  // The example beside the package still runs on today's API (on the same run).
  auto example = RunCommand("PYTHONPATH=" + BinaryDir() + "/python " + std::string(SystemPython()) + " " + SourceDir() +
                            "/client/python/example_notebook.py " + run);
  EXPECT_EQ(example.exit_code, 0) << example.output;
  EXPECT_NE(example.output.find("failing triples re-run: 0 correct"), std::string::npos) << example.output;
}

// graft.Client over mutual TLS, with the certificates of scripts/make-certs.sh.
TEST(PythonPackage, ClientSpeaksMutualTls) {
  ScopedTempDir dir;
  const std::string certs = testing::MakeCerts(dir.path() + "/certs");
  testing::ClusterTls tls{certs, true};
  Cluster c(30, {}, tls);
  auto checked = RunCommand(std::string(SystemPython()) + " " + SourceDir() + "/tests/python/check_graft_package.py" +
                            " --package-dir " + BinaryDir() + "/python --work " + dir.path() + " --token " + kAlice +
                            " --config " + SourceDir() + "/configs/parcel-routing.yaml --tls-address " + c.address() +
                            " --ca-file " + tls.ca() + " --cert " + tls.client_cert() + " --key " + tls.client_key());
  std::cout << checked.output;
  EXPECT_EQ(checked.exit_code, 0) << checked.output;
  EXPECT_NE(checked.output.find(" checks passed, 0 failed"), std::string::npos) << checked.output;
}

// The transformer kind: a tiny one, aligned at token positions, rebuilt from weights.pt.
TEST(PythonPackage, RebuildsAGraftTransformer) {
  ScopedTempDir dir;
  std::string config = ReadFile(SourceDir() + "/configs/parcel-routing.yaml");
  const size_t net = config.find("\nnetwork:"), training = config.find("\ntraining:");
  ASSERT_NE(net, std::string::npos);
  ASSERT_NE(training, std::string::npos);
  config = config.substr(0, net) + R"(
network: {type: transformer, width: 16, layers: 2, heads: 2, mlp_width: 32}
alignment:
  local:   {layer: 0, position: [origin, dest], units: 0-3}
  careful: {layer: 1, position: readout, units: 4-7}
)" + config.substr(training + 1);
  WriteFile(dir.path() + "/transformer.yaml", config);
  const std::string run = dir.path() + "/run";
  auto trained = RunCommand(BinaryDir() + "/bin/graft-worker run " + dir.path() + "/transformer.yaml --out " + run +
                            Sets({"training.steps=100", "evaluation.every=50", "evaluation.triples=64"}) +
                            " --dump-logits " + run + "/logits.json");
  ASSERT_EQ(trained.exit_code, 0) << trained.output;
  auto checked = RunCommand(std::string(SystemPython()) + " " + SourceDir() + "/tests/python/check_graft_package.py" +
                            " --package-dir " + BinaryDir() + "/python --run-dir " + run);
  std::cout << checked.output;
  EXPECT_EQ(checked.exit_code, 0) << checked.output;
  EXPECT_NE(checked.output.find(" checks passed, 0 failed"), std::string::npos) << checked.output;
}

}  // namespace
}  // namespace graft
