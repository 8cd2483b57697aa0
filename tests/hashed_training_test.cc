// Training and evaluation over an input space too large to list (issue 14, section 3): nine
// inputs of ten values (10^9 inputs), a toy model, a few steps. Nothing proportional to the
// space is built, training never sees a held-out input, evaluation draws only held-out ones, and
// the same seed gives the same run, also across an interruption.
#include <sys/resource.h>

#include <filesystem>
#include <set>
#include <string>
#include <vector>

#include <torch/torch.h>

#include "gtest/gtest.h"
#include "nlohmann/json.hpp"
#include "configs/reader/spec.h"
#include "tests/test_util.h"
#include "trainer/causal/split.h"
#include "trainer/train/evaluation.h"
#include "trainer/train/trainer.h"

namespace graft {
namespace {

using json = nlohmann::json;
using ::graft::testing::ReadFile;
using ::graft::testing::ScopedTempDir;

// tests/data/nine-digit-tally.yaml (nine inputs of ten values, 6 steps of 64, evaluations at 0, 3
// and 6 on 512 triples), with independent sources, so both kinds of training draws are checked.
std::string NineDigitsText() { return ReadFile(::graft::testing::SourceDir() + "/tests/data/nine-digit-tally.yaml"); }
const std::vector<std::string> kIndependent = {"training.sources=independent"};

config::ResolvedJob NineDigitsJob() {
  auto job = config::LoadJobFromText(NineDigitsText(), "nine.yaml", kIndependent);
  EXPECT_TRUE(job.ok()) << job.status();
  return std::move(*job);
}

std::vector<json> Lines(const std::string& path) {
  std::vector<json> out;
  std::istringstream in(ReadFile(path));
  std::string line;
  while (std::getline(in, line)) {
    json j = json::parse(line);
    j.erase("wall_s");
    out.push_back(j);
  }
  return out;
}

// Catches: a list of the space built anyway (the split's lists, or an evaluation sample that
// enumerates), training on held-out inputs (bases or independent sources drawn without the
// skip), evaluation triples and held-out task inputs taken from training inputs, and evaluation
// failing or reporting the wrong number of triples on a hashed space.
TEST(HashedTraining, TrainsAndEvaluatesTenToTheNineInputsWithoutListingThem) {
  const config::ResolvedJob job = NineDigitsJob();
  ASSERT_EQ(job.model->input_space_size(), 1000000000);
  ASSERT_TRUE(job.split.hashed);
  // The data structure a listed split would be (16 GB of input numbers here) is not built.
  EXPECT_EQ(job.split.train.capacity(), 0u);
  EXPECT_EQ(job.split.test.capacity(), 0u);

  const train::EvalInputs eval = train::CreateEvalInputs(job);
  ASSERT_EQ(eval.base.size(0), 512);
  ASSERT_EQ(eval.train.size(0), 512);
  ASSERT_EQ(eval.test.size(0), 512);
  auto each = [](const torch::Tensor& t, const std::function<void(int64_t)>& f) {
    auto a = t.accessor<int64_t, 1>();
    for (int64_t i = 0; i < t.size(0); ++i) f(a[i]);
  };
  each(eval.base, [&](int64_t x) { EXPECT_TRUE(job.split.IsHeldOut(x)) << x; });
  each(eval.source, [&](int64_t x) { EXPECT_TRUE(job.split.IsHeldOut(x)) << x; });
  each(eval.test, [&](int64_t x) { EXPECT_TRUE(job.split.IsHeldOut(x)) << x; });
  each(eval.train, [&](int64_t x) { EXPECT_FALSE(job.split.IsHeldOut(x)) << x; });

  ScopedTempDir dir;
  train::RunOptions options;
  options.out_dir = dir.path() + "/run";
  std::vector<int64_t> seen;
  options.on_training_inputs = [&](const std::vector<int64_t>& inputs) {
    seen.insert(seen.end(), inputs.begin(), inputs.end());
  };
  auto outcome = train::Train(job, options);
  ASSERT_TRUE(outcome.ok()) << outcome.status();
  // 6 steps x (64 bases + 64 independent sources).
  ASSERT_EQ(seen.size(), 6u * 128u);
  std::set<int64_t> distinct;
  for (int64_t x : seen) {
    EXPECT_FALSE(job.split.IsHeldOut(x)) << "trained on held-out input " << x;
    EXPECT_GE(x, 0);
    EXPECT_LT(x, 1000000000);
    distinct.insert(x);
  }
  EXPECT_GT(distinct.size(), 700u);  // uniform draws from 7.5e8 inputs hardly repeat

  const json result = json::parse(ReadFile(options.out_dir + "/result.json"));
  EXPECT_EQ(result["steps"], 6);
  EXPECT_EQ(result["iia_held_out"]["n"], 512);
  EXPECT_EQ(result["acc_held_out"]["n"], 512);
  EXPECT_EQ(result["control_random_units"]["iia_held_out"]["n"], 512);
  // A bound far from what a list would take (8 bytes per input: 8 GB): the process, LibTorch
  // included, stays under 1.5 GB.
  EXPECT_LT(result["peak_rss_mb"].get<double>(), 1500.0) << result["peak_rss_mb"];
  EXPECT_EQ(Lines(options.out_dir + "/metrics.jsonl").size(), 3u);  // steps 0, 3, 6
}

// Catches: a hashed run whose draws depend on anything but the seed (same seed, different
// curve), a checkpoint that loses the hashed stream's state (a resumed run that draws other
// batches), and a seed that does not change the draws.
TEST(HashedTraining, TheSameSeedGivesTheSameRunAlsoAfterAResume) {
  const config::ResolvedJob job = NineDigitsJob();
  ScopedTempDir dir;
  auto run = [&](const std::string& out, int64_t stop, const std::string& resume, const config::ResolvedJob& j) {
    train::RunOptions o;
    o.out_dir = out;
    o.stop_after_step = stop;
    o.resume_dir = resume;
    auto r = train::Train(j, o);
    EXPECT_TRUE(r.ok()) << r.status();
  };
  run(dir.path() + "/a", -1, "", job);
  run(dir.path() + "/b", 4, "", job);
  run(dir.path() + "/b", -1, dir.path() + "/b", job);
  const std::vector<json> a = Lines(dir.path() + "/a/metrics.jsonl");
  ASSERT_EQ(a.size(), 3u);
  EXPECT_EQ(a, Lines(dir.path() + "/b/metrics.jsonl"));
  EXPECT_EQ(ReadFile(dir.path() + "/a/weights.pt"), ReadFile(dir.path() + "/b/weights.pt"));
  auto other = config::LoadJobFromText(NineDigitsText(), "nine.yaml", {"training.sources=independent", "seed=6"});
  ASSERT_TRUE(other.ok()) << other.status();
  run(dir.path() + "/c", -1, "", *other);
  EXPECT_NE(ReadFile(dir.path() + "/a/weights.pt"), ReadFile(dir.path() + "/c/weights.pt"));
}

}  // namespace
}  // namespace graft
