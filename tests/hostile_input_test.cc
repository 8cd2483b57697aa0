// The config reader against input written to hurt it: YAML aliases that expand exponentially,
// deep nesting, huge numbers, NaN and infinity, invalid UTF-8 and NUL bytes, in a file and in
// --set overrides; and the job limits graftd sets (SpecLimits), each refused with its name and
// value. Every case must come back as a clear InvalidArgument "SOURCE:LINE:COL: ..." error, not a
// crash, a hang or gigabytes of memory.
#include <string>
#include <vector>

#include "absl/strings/str_cat.h"
#include "configs/reader/config_tree.h"
#include "configs/reader/spec.h"
#include "configs/reader/sweep.h"
#include "gtest/gtest.h"
#include "tests/test_util.h"

namespace graft::config {
namespace {

using ::graft::testing::ReadFile;
using ::graft::testing::SourceDir;

std::string Parcel() { return ReadFile(SourceDir() + "/configs/parcel-routing.yaml"); }

std::string Replace(std::string text, const std::string& from, const std::string& to) {
  const size_t at = text.find(from);
  EXPECT_NE(at, std::string::npos) << "test bug: '" << from << "' not in the config";
  if (at != std::string::npos) text.replace(at, from.size(), to);
  return text;
}

// The message of a refused config, or "" (and a test failure) when it was accepted or refused
// with another code.
std::string Refusal(const absl::Status& st) {
  EXPECT_EQ(st.code(), absl::StatusCode::kInvalidArgument) << st;
  return std::string(st.message());
}

// Nine levels of nine aliases each: 9^9 (about 3.9e8) scalars if expanded, from about 700 bytes.
std::string AliasBomb() {
  std::string text = "a0: &a0 [x, x, x, x, x, x, x, x, x]\n";
  for (int level = 1; level <= 8; ++level) {
    const std::string prev = absl::StrCat("*a", level - 1);
    absl::StrAppend(&text, "a", level, ": &a", level, " [");
    for (int k = 0; k < 9; ++k) absl::StrAppend(&text, k ? ", " : "", prev);
    absl::StrAppend(&text, "]\n");
  }
  return text;
}

// Before the node budget the tree builder copied every alias in full: this config made graftd
// grow past 15 GB. Now it stops at the alias that passes the budget, before copying it.
TEST(HostileYaml, AnAliasBombIsRefusedAtTheAliasThatPassesTheBudget) {
  const std::string bomb = AliasBomb();
  EXPECT_LT(bomb.size(), 800u);
  auto tree = ParseYaml(bomb, "bomb.yaml");
  ASSERT_FALSE(tree.ok());
  const std::string m = Refusal(tree.status());
  // Level k (line k + 1) holds 9^(k+1) scalars plus its lists: levels 0-4 make about 74000
  // nodes, a copy of level 4 about 66000, so the second alias of level 5 (line 6, column 15) passes
  // the budget of 200000.
  EXPECT_EQ(m.rfind("bomb.yaml:6:15: ", 0), 0u) << m;
  EXPECT_NE(m.find("more than 200000 nodes (each alias counting the nodes it copies)"), std::string::npos) << m;
  // The same through the job reader, as graftd and graft check read a submission.
  auto plan = PlanFromText(bomb, "bomb.yaml", {}, 1000);
  ASSERT_FALSE(plan.ok());
  EXPECT_NE(Refusal(plan.status()).find("more than 200000 nodes"), std::string::npos);
  // And as a --set value: the bomb as one flow mapping.
  std::string inline_bomb = bomb;
  for (size_t at = inline_bomb.find('\n'); at != std::string::npos; at = inline_bomb.find('\n', at)) {
    inline_bomb.replace(at, 1, ", ");
  }
  auto over = PlanFromText(Parcel(), "p.yaml", {"scan={" + inline_bomb + "}"}, 1000);
  ASSERT_FALSE(over.ok());
  EXPECT_NE(Refusal(over.status()).find("--set #1:1:"), std::string::npos) << over.status();
  EXPECT_NE(Refusal(over.status()).find("more than 200000 nodes"), std::string::npos) << over.status();
}

// Aliases used within the budget still work as YAML says: the copy, at the alias's place.
TEST(HostileYaml, ModestAliasesStillWork) {
  auto tree = ParseYaml("base: &w [64, 64]\nother: *w\n", "ok.yaml");
  ASSERT_TRUE(tree.ok()) << tree.status();
  const ConfigNode* other = tree->Find("other");
  ASSERT_NE(other, nullptr);
  ASSERT_TRUE(other->IsSequence());
  ASSERT_EQ(other->items.size(), 2u);
  EXPECT_EQ(other->items[1].scalar, "64");
  EXPECT_EQ(other->loc.ToString(), "ok.yaml:2:8");
}

TEST(HostileYaml, DeepNestingIsRefusedWithoutExhaustingTheStack) {
  // Flow style, 100000 levels: yaml-cpp parses recursively, so the builder stops it at level 65.
  const std::string flow = std::string(100000, '[') + std::string(100000, ']') + "\n";
  auto tree = ParseYaml(flow, "deep.yaml");
  ASSERT_FALSE(tree.ok());
  std::string m = Refusal(tree.status());
  EXPECT_EQ(m, "deep.yaml:1:65: the YAML nests deeper than 64 levels; a config nests at most 64");
  // Block maps, 70 levels.
  std::string block;
  for (int i = 0; i < 70; ++i) absl::StrAppend(&block, std::string(i, ' '), "k", i, ":\n");
  tree = ParseYaml(block, "block.yaml");
  ASSERT_FALSE(tree.ok());
  m = Refusal(tree.status());
  EXPECT_NE(m.find("nests deeper than 64 levels"), std::string::npos) << m;
  // Depth made by aliases counts too: an anchored 40-level list placed 40 levels down.
  const std::string deep40 = std::string(40, '[') + std::string(40, ']');
  const std::string by_alias = "a: &d " + deep40 + "\nb: " + std::string(40, '[') + "*d" + std::string(40, ']') + "\n";
  tree = ParseYaml(by_alias, "alias-deep.yaml");
  ASSERT_FALSE(tree.ok());
  EXPECT_NE(Refusal(tree.status()).find("nests deeper than 64 levels"), std::string::npos);
  // 64 levels are fine.
  EXPECT_TRUE(ParseYaml(std::string(63, '[') + std::string(63, ']'), "ok.yaml").ok());
}

TEST(HostileYaml, HugeNumbersNanAndInfinityGetClearErrors) {
  struct Case {
    std::string from, to, message;
  };
  const std::vector<Case> cases = {
      {"lr: 0.001", "lr: 1e400",
       "training.optimizer.lr: expected a number in (0, 10], got '1e400' (not-a-number and infinities are not numbers "
       "graft accepts)"},
      {"lr: 0.001", "lr: .nan", "training.optimizer.lr: expected a number in (0, 10], got '.nan' (not-a-number"},
      {"lr: 0.001", "lr: .inf", "got '.inf' (not-a-number"},
      {"lr: 0.001", "lr: -.Inf", "got '-.Inf' (not-a-number"},
      {"lr: 0.001", "lr: nan", "got 'nan' (not-a-number"},
      {"seed: 7", "seed: 99999999999999999999999999", "seed: expected a whole number >= 0, got '99999999999999999999999999'"},
      {"steps: 2000", "steps: 1e12", "training.steps: expected a whole number >= 1, got '1e12'"},
      {"every: 250", "every: " + std::string(5000, '9'), "evaluation.every: expected a whole number >= 1, got '99999"},
  };
  for (const Case& c : cases) {
    auto job = LoadJobFromText(Replace(Parcel(), c.from, c.to), "p.yaml", {});
    ASSERT_FALSE(job.ok()) << c.to;
    const std::string m = Refusal(job.status());
    EXPECT_NE(m.find(c.message), std::string::npos) << m;
    EXPECT_EQ(m.rfind("p.yaml:", 0), 0u) << m;
    EXPECT_LT(m.size(), 400u) << "a huge scalar is cut in the message";
  }
  // The same as --set values.
  auto job = LoadJobFromText(Parcel(), "p.yaml", {"training.optimizer.lr=.nan"});
  ASSERT_FALSE(job.ok());
  EXPECT_NE(Refusal(job.status()).find("--set #1:1:23: training.optimizer.lr: expected a number"), std::string::npos)
      << job.status();
}

TEST(HostileYaml, InvalidUtf8AndNulBytesAreRefusedWithTheirPlace) {
  auto tree = ParseYaml("name: caf\xe9\nseed: 1\n", "latin1.yaml");
  ASSERT_FALSE(tree.ok());
  EXPECT_EQ(Refusal(tree.status()), "latin1.yaml:1:10: byte 0xE9 is not valid UTF-8; a config is UTF-8 text");
  tree = ParseYaml(std::string("seed: 1\nname: a\0b\n", 17), "nul.yaml");
  ASSERT_FALSE(tree.ok());
  EXPECT_EQ(Refusal(tree.status()), "nul.yaml:2:8: a NUL byte; a config is UTF-8 text");
  // Overlong forms and surrogates are not UTF-8 either; real UTF-8 (two columns in) is fine.
  for (const std::string bad : {"a: \xc0\xaf\n", "a: \xed\xa0\x80\n", "a: \xf4\x90\x80\x80\n", "a: \xe2\x82\n"}) {
    auto t = ParseYaml(bad, "bad.yaml");
    ASSERT_FALSE(t.ok()) << bad;
    EXPECT_NE(Refusal(t.status()).find("bad.yaml:1:4: byte 0x"), std::string::npos) << t.status();
  }
  tree = ParseYaml("name: \xc3\xa9t\xc3\xa9 # \xe2\x9c\x93\n", "utf8.yaml");
  ASSERT_TRUE(tree.ok()) << tree.status();
  EXPECT_EQ(tree->Find("name")->scalar, "\xc3\xa9t\xc3\xa9");
  // UTF-16 text (NUL bytes) would have been guessed as UTF-16 by yaml-cpp: refused instead.
  tree = ParseYaml(std::string("n\0a\0m\0e\0", 8), "utf16.yaml");
  ASSERT_FALSE(tree.ok());
  EXPECT_EQ(Refusal(tree.status()), "utf16.yaml:1:2: a NUL byte; a config is UTF-8 text");
  // In an override, the column counts from the start of the whole argument.
  auto job = LoadJobFromText(Parcel(), "p.yaml", {std::string("name=ab\xff")});
  ASSERT_FALSE(job.ok());
  EXPECT_EQ(Refusal(job.status()), "--set #1:1:8: byte 0xFF is not valid UTF-8; a config is UTF-8 text");
}

// Each job limit of graftd (SpecLimits) refuses a config past it, naming the setting and its
// value at the place in the file; the same config passes with SpecLimits::None(), which the
// client and the worker use. Catches a limit that is not checked, or checked with the wrong bound.
TEST(SpecLimits, EachLimitIsRefusedByNameAtItsPlace) {
  const std::string base = Parcel();
  ASSERT_TRUE(LoadJobFromText(base, "p.yaml", {}).ok());
  struct Case {
    std::string label;
    std::vector<std::string> overrides;
    std::function<void(SpecLimits&)> tighten;
    std::string message;
  };
  const std::vector<Case> cases = {
      {"variables", {}, [](SpecLimits& l) { l.max_variables = 6; },
       "algorithm: 7 variables; this coordinator accepts at most max_variables = 6"},
      {"domain values", {}, [](SpecLimits& l) { l.max_domain_values = 5; },
       "the domain of 'origin' has 6 values; this coordinator accepts at most max_domain_values = 5"},
      {"input space", {}, [](SpecLimits& l) { l.max_input_space = 100; },
       "the input space passes 100 combinations of input values at 'weight'; this coordinator accepts at most "
       "max_input_space = 100"},
      {"table entries", {}, [](SpecLimits& l) { l.max_table_entries = 40; },
       "this coordinator accepts at most max_table_entries = 40 entries in all"},
      {"listed input space", {}, [](SpecLimits& l) { l.max_listed_input_space = 100; },
       "p.yaml:10:14: the input space passes 100 combinations of input values at 'weight'; a space of at most 16777216 "
       "inputs is listed, and this coordinator lists at most max_listed_input_space = 100 (larger spaces are split by "
       "a hash, without a list)"},
      {"parent space", {}, [](SpecLimits& l) { l.max_parent_space = 30; },
       "p.yaml:13:14: mechanism 'local': its lookup table would hold 36 entries, one per combination of its parents' "
       "values (origin 6 x dest 6); this coordinator accepts at most max_parent_space = 30 entries per mechanism"},
      {"network parameters", {"network.hidden=[64,64,64]"}, [](SpecLimits& l) { l.max_network_parameters = 10000; },
       "network: "},
      {"steps", {"training.steps=5000"}, [](SpecLimits& l) { l.max_steps = 4000; },
       "--set #1:1:16: training.steps: 5000 steps; this coordinator accepts at most max_steps = 4000"},
  };
  for (const Case& c : cases) {
    SpecLimits limits;  // graftd's defaults
    c.tighten(limits);
    auto plan = PlanFromText(base, "p.yaml", c.overrides, 1000, limits);
    ASSERT_FALSE(plan.ok()) << c.label;
    const std::string m = Refusal(plan.status());
    EXPECT_NE(m.find(c.message), std::string::npos) << c.label << ": " << m;
    EXPECT_TRUE(PlanFromText(base, "p.yaml", c.overrides, 1000).ok()) << c.label;  // SpecLimits::None()
    EXPECT_TRUE(PlanFromText(base, "p.yaml", c.overrides, 1000, SpecLimits()).ok()) << c.label << " (defaults)";
  }
}

// The network parameter count matches the layers' sizes by hand: embedding rows (6 + 6 + 4 + 2
// input values, 8 wide), 32 -> 64 -> 64 -> 64 with biases, 64 -> 4 classes with biases. A network
// of about 4e9 parameters is refused by graftd's default limit (it was accepted before).
TEST(SpecLimits, NetworkParametersCountEveryWeightAndBias) {
  auto job = LoadJobFromText(Parcel(), "p.yaml", {"network.hidden=[64,64,64]", "network.embedding.dim=8"});
  ASSERT_TRUE(job.ok()) << job.status();
  const int64_t by_hand = (6 + 6 + 4 + 2) * 8 + (32 * 64 + 64) + 2 * (64 * 64 + 64) + (64 * 4 + 4);
  EXPECT_EQ(NetworkParameters(job->spec, *job->model), by_hand);
  auto huge = PlanFromText(Parcel(), "p.yaml", {"network.hidden=[65536,65536]", "alignment.local.layer=0",
                                                "alignment.careful.layer=0"},
                           1000, SpecLimits());
  ASSERT_FALSE(huge.ok());
  const std::string m = Refusal(huge.status());
  // 32*65536+65536 + 65536*65536+65536 + 65536*4+4 + 144 embedding weights.
  EXPECT_NE(m.find("network: 4297457812 parameters; this coordinator accepts at most max_network_parameters = "
                   "100000000"),
            std::string::npos)
      << m;
}

}  // namespace
}  // namespace graft::config
