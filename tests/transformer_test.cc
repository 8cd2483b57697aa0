// The transformer network (trainer/net/transformer.h): intervention semantics at token sites,
// the readout-only last block, the stacked IIT pass, a float64 recomputation in Python from
// weights.pt's documented names (tests/python/recompute_intervention.py), and resume.
#include <cstdio>
#include <filesystem>
#include <string>
#include <vector>

#include <torch/torch.h>

#include "gtest/gtest.h"
#include "nlohmann/json.hpp"
#include "tests/test_util.h"
#include "trainer/net/transformer.h"

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


constexpr int kWidth = 12, kTokens = 4;  // three inputs and the readout

net::Transformer SmallTransformer() {
  torch::manual_seed(9);
  net::TransformerOptions o;
  o.input_sizes = {5, 3, 4};
  o.input_names = {"a", "b", "c"};
  o.width = kWidth;
  o.layers = 3;
  o.heads = 3;
  o.mlp_width = 20;
  o.num_classes = 4;
  return net::Transformer(o);
}

torch::Tensor RandomInputs(int64_t n) {
  return torch::stack({torch::randint(5, {n}, torch::kInt64), torch::randint(3, {n}, torch::kInt64),
                       torch::randint(4, {n}, torch::kInt64)},
                      1);
}

// Columns of (token, units) in a layer's flattened residual stream.
torch::Tensor TokenMask(int64_t batch, int token, int first, int count) {
  torch::Tensor m = torch::zeros({batch, kTokens * kWidth}, torch::kBool);
  m.index_put_({torch::indexing::Slice(), torch::indexing::Slice(token * kWidth + first, token * kWidth + first + count)},
               true);
  return m;
}

// Catches a readout-only last block that reads the wrong token, skips a residual, or uses
// the wrong slices of in_proj for queries, keys or values.
TEST(Transformer, ReadoutOnlyLastBlockEqualsTheFullBlock) {
  net::Transformer net = SmallTransformer();
  torch::NoGradGuard no_grad;
  torch::Tensor x = RandomInputs(40);
  std::vector<torch::Tensor> h = net->Hidden(net->Embed(x), 2);
  torch::Tensor full = net->Head(h[2]);
  torch::Tensor shortcut = net->LastLayerAndHead(2, h[1]);
  EXPECT_TRUE(torch::allclose(full, shortcut, 1e-5, 1e-6)) << (full - shortcut).abs().max();
  EXPECT_TRUE(torch::allclose(net->forward(x), full, 1e-5, 1e-6));
  // The layer activation is the tokens laid end to end.
  EXPECT_EQ(h[0].sizes(), (std::vector<int64_t>{40, kTokens * kWidth}));
}

// An intervention at one token of layer 0 reaches the readout through attention, and equals a
// patch made by hand; rows not intervened keep the base logits.
TEST(Transformer, InterventionAtATokenEqualsAHandBuiltPatch) {
  net::Transformer net = SmallTransformer();
  torch::NoGradGuard no_grad;
  torch::Tensor b = RandomInputs(32), s = RandomInputs(32);
  std::vector<torch::Tensor> hb = net->Hidden(net->Embed(b), 2), hs = net->Hidden(net->Embed(s), 2);
  net::InterventionMasks masks;
  masks.lowest_layer = 0;
  masks.per_layer.resize(3);
  torch::Tensor m = TokenMask(32, /*token=*/1, 2, 6);
  m.index_put_({torch::indexing::Slice(1, 32, 2)}, false);  // odd rows untouched
  masks.per_layer[0] = m;
  torch::Tensor got = net->Intervened(hb, hs, masks);
  torch::Tensor h0 = hb[0].clone();
  for (int i = 0; i < 32; i += 2) {
    for (int u = 2; u < 8; ++u) h0[i][kWidth + u] = hs[0][i][kWidth + u];
  }
  torch::Tensor expected = net->Head(net->Layer(2, net->Layer(1, h0)));
  EXPECT_TRUE(torch::allclose(got, expected, 1e-5, 1e-6));
  torch::Tensor base_logits = net->Head(hb[2]);
  EXPECT_TRUE(torch::allclose(got.slice(0, 1, 32, 2), base_logits.slice(0, 1, 32, 2), 1e-5, 1e-6));
  EXPECT_FALSE(torch::allclose(got.slice(0, 0, 32, 2), base_logits.slice(0, 0, 32, 2), 1e-3, 1e-3));
}

// Catches a stacked pass that mixes base and intervened rows (attention over the wrong batch
// rows), or patches the wrong layer.
TEST(Transformer, StackedForwardEqualsSeparateBaseAndIntervenedRuns) {
  net::Transformer net = SmallTransformer();
  torch::NoGradGuard no_grad;
  torch::Tensor b = RandomInputs(48);
  torch::Tensor perm = torch::randperm(48, torch::kInt64);
  net::InterventionMasks masks;
  masks.lowest_layer = 0;
  masks.per_layer.resize(3);
  masks.per_layer[0] = TokenMask(48, 0, 0, 6) & (torch::rand({48, 1}) < 0.5);
  masks.per_layer[1] = TokenMask(48, 3, 4, 8) & (torch::rand({48, 1}) < 0.5);
  torch::Tensor stacked = net->StackedForward(net->Embed(b), masks, {}, perm, true);
  std::vector<torch::Tensor> hb = net->Hidden(net->Embed(b), 2);
  std::vector<torch::Tensor> hs = net->Hidden(net->Embed(b.index_select(0, perm)), 2);
  EXPECT_TRUE(torch::allclose(stacked.narrow(0, 0, 48), net->Head(hb[2]), 1e-5, 1e-6));
  EXPECT_TRUE(torch::allclose(stacked.narrow(0, 48, 48), net->Intervened(hb, hs, masks), 1e-5, 1e-6));
}

// Catches evaluation's row slices (a batch above 1024 rows without autograd runs in slices)
// dropping, repeating or reordering rows: the sliced result equals the one-batch result.
TEST(Transformer, SlicedInferenceEqualsOneBatch) {
  net::Transformer net = SmallTransformer();
  torch::Tensor x = RandomInputs(2500);
  torch::Tensor whole;
  {
    torch::AutoGradMode grad(true);  // one batch: autograd on
    whole = net->Layer(1, net->Layer(0, net->Embed(x))).detach();
  }
  torch::NoGradGuard no_grad;
  torch::Tensor sliced = net->Layer(1, net->Layer(0, net->Embed(x)));
  ASSERT_EQ(sliced.sizes(), whole.sizes());
  EXPECT_TRUE(torch::allclose(sliced, whole, 1e-5, 1e-6)) << (sliced - whole).abs().max();
}

// A small invented task: two digit sums at two tokens. Line numbers do not matter here.
const char kLedger[] = R"(name: ledger-check
seed: 5
algorithm:
  inputs:
    a: {range: [0, 4]}
    b: {range: [0, 4]}
    c: {range: [0, 4]}
    d: {range: [0, 4]}
  mechanisms:
    s: (a + b) % 5
    t: (c + d) % 5
  output:
    y: {expr: "(s + 2*t) % 5", classes: [nil, one, two, three, four]}
network:
  type: transformer
  width: 16
  layers: 2
  heads: 2
  mlp_width: 32
  activation: gelu
alignment:
  s: {layer: 0, position: b, units: 0-7}
  t: {layer: 0, position: [c, d], units: 4-11}
training:
  steps: 60
  batch_size: 64
  optimizer: {type: adam, lr: 0.003}
  interventions: [[s], [t], [s, t]]
  checkpoint_every: 25
evaluation:
  every: 20
  held_out: 0.2
  triples: 64
)";

std::string WriteLedger(const ScopedTempDir& dir) {
  const std::string path = dir.path() + "/ledger.yaml";
  ::graft::testing::WriteFile(path, kLedger);
  return path;
}

// NumPy in float64 rebuilds the transformer from weights.pt's names alone (the formulas in the
// script's docstring: pre-norm blocks, LayerNorm eps 1e-5, q/k/v rows in that order, scaled
// dot-product attention over every token, the readout head) and recomputes the base and
// intervened logits of every dumped triple within 1e-5, then recounts result.json's figures from
// labels it computes itself. Catches any departure from the documented architecture or names.
TEST(Transformer, NumpyRecomputesTheIntervenedLogitsFromWeights) {
  ScopedTempDir dir;
  const std::string config = WriteLedger(dir);
  auto r = RunCommand(WorkerBinary() + " run " + config + " --out " + dir.path() + "/run --dump-logits " + dir.path() +
                      "/run/logits.json");
  ASSERT_EQ(r.exit_code, 0) << r.output;
  auto py = RunCommand(std::string(SystemPython()) + " " + SourceDir() + "/tests/python/recompute_intervention.py " +
                       dir.path() + "/run --recount");
  EXPECT_EQ(py.exit_code, 0) << py.output;
  EXPECT_NE(py.output.find("max |diff|"), std::string::npos) << py.output;
  EXPECT_NE(py.output.find("recounted from the labels: "), std::string::npos) << py.output;
  // A weights file with one tensor changed must fail the recomputation (the check can fail).
  auto broken = RunCommand(std::string(SystemPython()) + " -c \"import torch; d = torch.load('" + dir.path() +
                           "/run/weights.pt'); d['block.1.ln2.bias'] += 0.05; torch.save(d, '" + dir.path() +
                           "/run/weights.pt')\"");
  ASSERT_EQ(broken.exit_code, 0) << broken.output;
  auto py2 = RunCommand(std::string(SystemPython()) + " " + SourceDir() + "/tests/python/recompute_intervention.py " +
                        dir.path() + "/run");
  EXPECT_EQ(py2.exit_code, 1) << py2.output;
  EXPECT_NE(py2.output.find("MISMATCH"), std::string::npos) << py2.output;
}

// Catches a parameter outside the checkpoint (pos, readout, a block's packed projection): the
// resumed run would start from fresh values and its metrics and weights would differ.
TEST(Transformer, ResumeAfterInterruptionReproducesTheUninterruptedRun) {
  ScopedTempDir dir;
  const std::string config = WriteLedger(dir);
  const std::string a = dir.path() + "/a", b = dir.path() + "/b";
  auto ra = RunCommand(WorkerBinary() + " run " + config + " --out " + a);
  ASSERT_EQ(ra.exit_code, 0) << ra.output;
  auto rb = RunCommand(WorkerBinary() + " run " + config + " --out " + b + " --stop-after-step 30");
  ASSERT_EQ(rb.exit_code, 8) << rb.output;
  auto rb2 = RunCommand(WorkerBinary() + " run " + config + " --out " + b + " --resume " + b);
  ASSERT_EQ(rb2.exit_code, 0) << rb2.output;
  const json resumed = json::parse(ReadFile(b + "/result.json"));
  EXPECT_EQ(resumed["resumed_from_step"], 30);
  EXPECT_EQ(ReadFile(a + "/weights.pt"), ReadFile(b + "/weights.pt"));
  const json fresh = json::parse(ReadFile(a + "/result.json"));
  EXPECT_EQ(fresh["iia_changed_held_out"], resumed["iia_changed_held_out"]);
  EXPECT_EQ(fresh["acc_held_out"], resumed["acc_held_out"]);
}

}  // namespace
}  // namespace graft
