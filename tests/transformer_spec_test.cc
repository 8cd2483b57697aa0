// The config language for transformers: the network block, sites at token positions, the
// generalised validity rule, scan and DAS positions. Each refusal names FILE:LINE:COL and the
// key; valid configs resolve and round-trip.
#include <algorithm>
#include <string>
#include <vector>

#include "gtest/gtest.h"
#include "tests/test_util.h"
#include "configs/reader/spec.h"

namespace graft::config {
namespace {

// Line numbers below refer to this text.
const char kTransformer[] = R"(name: ledger-audit
seed: 3
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
    y: {expr: "(s + 2*t) % 5"}
network:
  type: transformer
  width: 16
  layers: 2
  heads: 2
  mlp_width: 32
  activation: gelu
alignment:
  s: {layer: 0, position: b, units: 0-7}
  t: {layer: 0, position: d, units: 0-7}
training:
  steps: 100
  interventions: [[s], [t], [s, t]]
)";

std::string Replace(std::string text, const std::string& from, const std::string& to) {
  const size_t at = text.find(from);
  EXPECT_NE(at, std::string::npos) << "test bug: '" << from << "' not in the config";
  if (at != std::string::npos) text.replace(at, from.size(), to);
  return text;
}

std::string ErrorOf(const std::string& text) {
  auto job = LoadJobFromText(text, "job.yaml", {});
  if (job.ok()) return "";
  EXPECT_TRUE(absl::IsInvalidArgument(job.status())) << job.status();
  return std::string(job.status().message());
}

#define EXPECT_ERROR(text, where, what)                                                   \
  do {                                                                                    \
    const std::string _msg = (text);                                                      \
    EXPECT_EQ(_msg.rfind(where, 0), 0u) << "expected at " << (where) << ", got:\n" << _msg; \
    EXPECT_NE(_msg.find(what), std::string::npos) << "expected '" << (what) << "' in:\n" << _msg; \
  } while (0)

TEST(TransformerSpec, ResolvesAndRoundTrips) {
  auto job = LoadJobFromText(kTransformer, "job.yaml", {});
  ASSERT_OK(job);
  EXPECT_TRUE(job->spec.network.is_transformer());
  EXPECT_EQ(job->spec.network.width, 16);
  EXPECT_EQ(job->spec.network.heads, 2);
  ASSERT_EQ(job->spec.alignment.size(), 2u);
  EXPECT_EQ(job->spec.alignment[0].positions, std::vector<std::string>{"b"});
  EXPECT_EQ(TokenOf(*job->model, "a"), 0);
  EXPECT_EQ(TokenOf(*job->model, "d"), 3);
  EXPECT_EQ(TokenOf(*job->model, "readout"), 4);
  EXPECT_EQ(TokenOf(*job->model, "s"), -1);  // a mechanism has no token
  const std::string yaml = ResolvedSpecYaml(job->spec);
  EXPECT_EQ(yaml.find("hidden"), std::string::npos) << yaml;  // no MLP keys in a transformer's spec
  auto again = LoadJobFromText(yaml, "spec.yaml", {});
  ASSERT_OK(again);
  EXPECT_EQ(ResolvedSpecYaml(again->spec), yaml);
  // A list of positions round-trips too.
  auto listed = LoadJobFromText(Replace(kTransformer, "position: b,", "position: [a, b],"), "job.yaml", {});
  ASSERT_OK(listed);
  EXPECT_EQ(listed->spec.alignment[0].positions, (std::vector<std::string>{"a", "b"}));
  auto listed_again = LoadJobFromText(ResolvedSpecYaml(listed->spec), "spec.yaml", {});
  ASSERT_OK(listed_again);
  EXPECT_EQ(listed_again->spec.alignment[0].positions, (std::vector<std::string>{"a", "b"}));
  const std::string summary = Summarize(*job);
  EXPECT_NE(summary.find("network: transformer, 5 tokens (one per input, then readout), width 16, 2 heads"),
            std::string::npos)
      << summary;
  EXPECT_NE(summary.find("layer 0: residual stream after block 0; s = b units 0-7 (8); t = d units 0-7 (8)"),
            std::string::npos)
      << summary;
  // The MLP keeps its spec text (and so its hash): no transformer keys.
  auto mlp = LoadJobFromText(Replace(Replace(Replace(kTransformer, "  type: transformer\n  width: 16\n  layers: 2\n"
                                                                   "  heads: 2\n  mlp_width: 32\n",
                                                     "  hidden: [16, 16]\n"),
                                             "{layer: 0, position: b, units: 0-7}", "{layer: 0, units: 0-7}"),
                                     "{layer: 0, position: d, units: 0-7}", "{layer: 0, units: 8-15}"),
                             "job.yaml", {});
  ASSERT_OK(mlp);
  const std::string mlp_yaml = ResolvedSpecYaml(mlp->spec);
  EXPECT_EQ(mlp_yaml.find("width"), std::string::npos) << mlp_yaml;
  EXPECT_EQ(mlp_yaml.find("position"), std::string::npos) << mlp_yaml;
}

// Counted by hand from the architecture: embeddings 4 inputs x 5 values x 16 = 320, pos 5 x 16
// = 80, readout 16; per block ln1 32, in_proj 3*16*16 + 48 = 816, out_proj 256 + 16 = 272, ln2
// 32, fc 32*16 + 32 = 544, proj 16*32 + 16 = 528 (2224 per block, 4448 for two); ln_final 32;
// out 16*5 + 5 = 85. Total 320 + 80 + 16 + 4448 + 32 + 85 = 4981.
TEST(TransformerSpec, ParameterCountByHand) {
  auto job = LoadJobFromText(kTransformer, "job.yaml", {});
  ASSERT_OK(job);
  EXPECT_EQ(NetworkParameters(job->spec, *job->model), 4981);
  auto tree = ParseYaml(kTransformer, "job.yaml");
  ASSERT_OK(tree);
  SpecLimits limits;
  limits.max_network_parameters = 4980;
  auto refused = ResolveTree(*tree, limits);
  ASSERT_FALSE(refused.ok());
  EXPECT_NE(refused.status().message().find(
                "job.yaml:15:3: network: 4981 parameters; this coordinator accepts at most max_network_parameters = "
                "4980; use a narrower width or mlp_width, or fewer layers"),
            std::string::npos)
      << refused.status();
}

// The shipped transformer demo: over 10^8 inputs (split by a hash, never listed), three
// intermediate variables at three different tokens; its sweep file holds the same job.
TEST(TransformerSpec, ShippedFerryBoardingDemoChecks) {
  auto job = LoadJob(::graft::testing::SourceDir() + "/configs/ferry-boarding.yaml", {});
  ASSERT_OK(job);
  EXPECT_TRUE(job->spec.network.is_transformer());
  EXPECT_GE(job->model->input_space_size(), 100000000);
  EXPECT_TRUE(job->split.hashed);
  ASSERT_EQ(job->spec.alignment.size(), 3u);
  std::vector<std::string> positions;
  for (const auto& site : job->spec.alignment) {
    ASSERT_EQ(site.positions.size(), 1u);
    EXPECT_EQ(std::count(positions.begin(), positions.end(), site.positions[0]), 0) << site.positions[0];
    positions.push_back(site.positions[0]);
  }
  auto swept = LoadJob(::graft::testing::SourceDir() + "/configs/ferry-boarding-sweep.yaml", {"sweep=null"});
  ASSERT_OK(swept);
  EXPECT_EQ(ResolvedSpecYaml(swept->spec), ResolvedSpecYaml(job->spec));
}

TEST(TransformerSpecErrors, NetworkBlock) {
  EXPECT_ERROR(ErrorOf(Replace(kTransformer, "heads: 2", "heads: 3")), "job.yaml:18:10:",
               "network.heads: width 16 is not divisible by 3 heads");
  EXPECT_ERROR(ErrorOf(Replace(kTransformer, "mlp_width: 32", "mlp_width: 32\n  hidden: [8]")), "job.yaml:20:3:",
               "network.hidden: a transformer has no 'hidden'");
  EXPECT_ERROR(ErrorOf(Replace(kTransformer, "mlp_width: 32", "mlp_widht: 32")), "job.yaml:19:3:",
               "unknown key 'mlp_widht' in 'network'; did you mean 'mlp_width'?");
  EXPECT_ERROR(ErrorOf(Replace(kTransformer, "type: transformer", "type: transfomer")), "job.yaml:15:9:",
               "network.type: expected one of mlp | transformer, got 'transfomer'; did you mean 'transformer'?");
  EXPECT_ERROR(ErrorOf(Replace(kTransformer, "width: 16", "width: 0")), "job.yaml:16:10:",
               "network.width: expected a whole number in [1, 65536], got 0");
}

TEST(TransformerSpecErrors, Sites) {
  // A position on an MLP.
  const std::string mlp = Replace(Replace(kTransformer, "  type: transformer\n  width: 16\n  layers: 2\n"
                                                        "  heads: 2\n  mlp_width: 32\n",
                                          "  hidden: [16, 16]\n"),
                                  "t: {layer: 0, position: d, units: 0-7}", "t: {layer: 0, units: 8-15}");
  EXPECT_ERROR(ErrorOf(mlp), "job.yaml:18:17:", "alignment.s.position: only a transformer has token positions");
  // A transformer's site needs a position.
  EXPECT_ERROR(ErrorOf(Replace(kTransformer, "{layer: 0, position: b, units: 0-7}", "{layer: 0, units: 0-7}")),
               "job.yaml:22:6:", "alignment.s: needs 'layer', 'position' and 'units'");
  EXPECT_ERROR(ErrorOf(Replace(kTransformer, "position: b,", "position: bb,")), "job.yaml:22:27:",
               "alignment.s.position: 'bb' is not a token position; the positions are the inputs (a, b, c, d) and "
               "readout; did you mean 'b'?");
  EXPECT_ERROR(ErrorOf(Replace(kTransformer, "position: b,", "position: [a, a],")), "job.yaml:22:31:",
               "alignment.s.position: position 'a' is listed twice");
  EXPECT_ERROR(ErrorOf(Replace(kTransformer, "units: 0-7}\n  t", "units: 10-17}\n  t")), "job.yaml:22:37:",
               "alignment.s.units: unit 17 is outside layer 0, which has 16 units at each token (0-15)");
  EXPECT_ERROR(ErrorOf(Replace(kTransformer, "{layer: 0, position: b", "{layer: 2, position: b")), "job.yaml:22:14:",
               "alignment.s.layer: layer 2 does not exist; network.layers is 2, so layers are numbered 0-1");
  // After the last block only the readout token reaches the logits.
  EXPECT_ERROR(ErrorOf(Replace(kTransformer, "t: {layer: 0, position: d", "t: {layer: 1, position: d")),
               "job.yaml:23:27:",
               "alignment.t.position: layer 1 is the last; after it only the readout token reaches the logits, so "
               "units at 'd' could never change the output");
  // The same units at the same token and layer stand for one variable only; at another token
  // they are other units.
  EXPECT_ERROR(ErrorOf(Replace(kTransformer, "position: d,", "position: [c, b],")), "job.yaml:23:42:",
               "alignment.t.units: unit 0 of layer 0 at b is also aligned to 's'");
  EXPECT_EQ(ErrorOf(Replace(kTransformer, "position: d,", "position: [c, d],")), "");
}

// The validity rule: a set that moves X but not its descendant Y needs Y in a later layer,
// whatever the positions: a transformer computes layer K from layer K-1 at every token.
TEST(TransformerSpecErrors, DescendantMustSitInALaterLayerWhateverThePosition) {
  const std::string chain = Replace(Replace(Replace(kTransformer, "t: (c + d) % 5", "t: (s + c + d) % 5"),
                                            "    y: {expr: \"(s + 2*t) % 5\"}", "    y: {expr: \"t\"}"),
                                    "interventions: [[s], [t], [s, t]]", "interventions: [[s]]");
  // s at b (layer 0) and t at d (layer 0): the same layer, other positions, still refused.
  EXPECT_ERROR(ErrorOf(chain), "job.yaml:26:19:",
               "training.interventions: the set [s] moves 's' without its descendant 't', but 't' is aligned in "
               "layer 0, not after 's' (layer 0), and a transformer computes layer K from layer K-1 only (at every "
               "position), so the network could not recompute it");
  // t at a later layer (at readout, another position than s's) is accepted.
  EXPECT_EQ(ErrorOf(Replace(chain, "t: {layer: 0, position: d", "t: {layer: 1, position: readout")), "");
  // Intervening on both together is accepted at one layer.
  EXPECT_EQ(ErrorOf(Replace(chain, "interventions: [[s]]", "interventions: [[s, t]]")), "");
}

TEST(TransformerSpecErrors, ScanAndDasPositions) {
  EXPECT_ERROR(ErrorOf(std::string(kTransformer) + "scan:\n  positions: [b, redout]\n"), "job.yaml:28:18:",
               "scan.positions: 'redout' is not a token position; the positions are the inputs (a, b, c, d) and "
               "readout; did you mean 'readout'?");
  EXPECT_ERROR(ErrorOf(std::string(kTransformer) + "das: {steps: 10}\n"), "job.yaml:27:6:",
               "das: DAS rotates the residual stream at one token, but the aligned variables do not all sit at one "
               "position");
  EXPECT_ERROR(ErrorOf(std::string(kTransformer) + "das: {position: e}\n"), "job.yaml:27:17:",
               "das.position: 'e' is neither an input nor readout");
  auto job = LoadJobFromText(std::string(kTransformer) + "das: {position: b, steps: 10}\nscan: {positions: [b, d]}\n",
                             "job.yaml", {});
  ASSERT_OK(job);
  EXPECT_EQ(job->spec.das.position, "b");
  EXPECT_EQ(job->spec.scan.positions, (std::vector<std::string>{"b", "d"}));
  auto again = LoadJobFromText(ResolvedSpecYaml(job->spec), "spec.yaml", {});
  ASSERT_OK(again);
  EXPECT_EQ(ResolvedSpecYaml(again->spec), ResolvedSpecYaml(job->spec));
  // An MLP has no positions to scan.
  const std::string mlp = Replace(Replace(Replace(kTransformer, "  type: transformer\n  width: 16\n  layers: 2\n"
                                                                "  heads: 2\n  mlp_width: 32\n",
                                                  "  hidden: [16, 16]\n"),
                                          "s: {layer: 0, position: b, units: 0-7}", "s: {layer: 0, units: 0-7}"),
                                  "t: {layer: 0, position: d, units: 0-7}", "t: {layer: 0, units: 8-15}");
  EXPECT_ERROR(ErrorOf(mlp + "scan:\n  positions: [b]\n"), "job.yaml:24:3:",
               "unknown key 'positions' in 'scan'");
}

}  // namespace
}  // namespace graft::config
