// Input splits (issue 14, section 3): listed splits unchanged, hashed splits above 2^24 inputs
// (seeded, the right fraction by SciPy's exact binomial test, never listed), draws that skip
// the other side, the validator's refusals with their places, and what `check` prints.
#include <algorithm>
#include <cmath>
#include <set>
#include <sstream>
#include <string>
#include <vector>

#include "gtest/gtest.h"
#include "configs/reader/spec.h"
#include "configs/reader/sweep.h"
#include "tests/test_util.h"
#include "trainer/causal/model.h"
#include "trainer/causal/rng.h"
#include "trainer/causal/split.h"

namespace graft::causal {
namespace {

VariableDecl Digit(const std::string& name, int64_t values) {
  VariableDecl d;
  d.name = name;
  d.role = Role::kInput;
  d.domain = DomainDecl{DomainKind::kRange, {}, 0, values - 1};
  return d;
}

// Inputs a, b, c, ... with the given sizes and output (sum of the first two) % 3.
std::unique_ptr<CausalModel> Model(const std::vector<int64_t>& sizes, const std::string& out = "(a + b) % 3") {
  std::vector<VariableDecl> decls;
  for (size_t i = 0; i < sizes.size(); ++i) decls.push_back(Digit(std::string(1, static_cast<char>('a' + i)), sizes[i]));
  VariableDecl o;
  o.name = "out";
  o.role = Role::kOutput;
  o.expr = out;
  decls.push_back(o);
  ModelError err;
  auto m = CausalModel::Create(decls, &err);
  EXPECT_TRUE(m.ok()) << err.message;
  return m.ok() ? std::move(*m) : nullptr;
}

// FNV-1a 64 over the little-endian bytes of each number.
uint64_t Fnv(const std::vector<int64_t>& v) {
  uint64_t h = 1469598103934665603ull;
  for (int64_t x : v) {
    for (int b = 0; b < 8; ++b) {
      h ^= (static_cast<uint64_t>(x) >> (8 * b)) & 0xff;
      h *= 1099511628211ull;
    }
  }
  return h;
}

// Recorded with the code before hashed splits existed (commit 7e3ead4: SplitInputs and
// MakeTriples of trainer/causal/model.cc, the BatchStream of trainer/train/trainer.cc, the
// evaluation inputs of CreateEvalInputs and DAS's draws of analysis.cc, copied into a small
// program), for inputs a..d of sizes {6,6,4,2} and {10,10,10,50}, held_out 0.2, seeds 7 and 8:
// space, seed, then the FNV-1a of the held-out list, the training list, 20 batches of 100 from
// the training stream, 4096 triples over 3 sets (base, source, set), the evaluation's training
// and held-out inputs (at most 4096 each) and 1000 DAS draws.
struct Recorded {
  int64_t space;
  uint64_t seed;
  uint64_t test, train, stream, triples, eval_train, eval_test, das;
};
constexpr Recorded kRecorded[] = {
    {288, 7ull, 0x8e177594fb487725ull, 0xe1d7f3919a786dc5ull, 0x35281dcc161cd453ull, 0x8cf21e8568d17e20ull,
     0xe1d7f3919a786dc5ull, 0x8e177594fb487725ull, 0xc39519d037d366e2ull},
    {288, 8ull, 0x0fffe7e95380c0e7ull, 0x2802414d97d7a5a7ull, 0x6348ea716bf60a6full, 0x00dd1667b9f3fa43ull,
     0x2802414d97d7a5a7ull, 0x0fffe7e95380c0e7ull, 0x3d5c779221fa17caull},
    {50000, 7ull, 0xa0323e1aeaf2d9d2ull, 0x70e8a8365de0a092ull, 0xc398d6b38e30919aull, 0x9e44273dd2b75949ull,
     0x03fd5498383d9c1dull, 0x5e2a8ca708b7b3b1ull, 0xe71cc0627638b1a1ull},
    {50000, 8ull, 0x76e22397da040769ull, 0x6fee1327b14eb4c1ull, 0x7f3a9f5ea5367cd5ull, 0x0db57ead3b2cc3c7ull,
     0xa3917b5aac59d60dull, 0x51b9799d44363c34ull, 0xa2ee61b07c66fab4ull},
};

// Catches: any change to the small-space path (split, the order training sees, triples,
// evaluation inputs, DAS draws), which would make an old seed give a different run.
TEST(ListedSplit, SequencesMatchTheRecordingMadeBeforeHashedSplits) {
  for (const Recorded& r : kRecorded) {
    auto m = Model(r.space == 288 ? std::vector<int64_t>{6, 6, 4, 2} : std::vector<int64_t>{10, 10, 10, 50},
                   "(a + b + c + d) % 3");
    ASSERT_NE(m, nullptr);
    ASSERT_EQ(m->input_space_size(), r.space);
    auto s = SplitInputs(*m, 0.2, r.seed);
    ASSERT_TRUE(s.ok()) << s.status();
    EXPECT_FALSE(s->hashed);
    SCOPED_TRACE(::testing::Message() << "space " << r.space << " seed " << r.seed);
    EXPECT_EQ(Fnv(s->test), r.test);
    EXPECT_EQ(Fnv(s->train), r.train);
    TrainingStream stream(*s, r.seed);
    std::vector<int64_t> drawn;
    for (int k = 0; k < 20; ++k) {
      std::vector<int64_t> b = stream.Next(100);
      drawn.insert(drawn.end(), b.begin(), b.end());
    }
    EXPECT_EQ(Fnv(drawn), r.stream);
    std::vector<int64_t> flat;
    for (const Triple& t : MakeTriples(*s, 3, 4096, r.seed)) {
      flat.push_back(t.base);
      flat.push_back(t.source);
      flat.push_back(t.set);
    }
    EXPECT_EQ(Fnv(flat), r.triples);
    EXPECT_EQ(Fnv(SampleInputs(*s, false, 4096, r.seed, 0xE1)), r.eval_train);
    EXPECT_EQ(Fnv(SampleInputs(*s, true, 4096, r.seed, 0xE2)), r.eval_test);
    Rng das(r.seed, 0xDA55);
    std::vector<int64_t> das_draws;
    for (int i = 0; i < 1000; ++i) das_draws.push_back(s->DrawTraining(das));
    EXPECT_EQ(Fnv(das_draws), r.das);
  }
}

// Catches: a threshold off by one (2^24 inputs must still be listed), a list built for a
// hashed space, and spaces that overflow int64 being accepted.
TEST(HashedSplit, IsChosenAboveTwoToThe24AndBuildsNoList) {
  auto listed = Model({4096, 4096}, "a % 3");  // exactly 2^24
  ASSERT_NE(listed, nullptr);
  auto a = SplitInputs(*listed, 0.2, 1);
  ASSERT_TRUE(a.ok()) << a.status();
  EXPECT_FALSE(a->hashed);
  EXPECT_EQ(a->test.size(), static_cast<size_t>(std::llround(0.2 * 16777216.0)));

  auto nine = Model(std::vector<int64_t>(9, 10));  // 10^9
  ASSERT_NE(nine, nullptr);
  EXPECT_EQ(nine->input_space_size(), 1000000000);
  auto h = SplitInputs(*nine, 0.2, 1);
  ASSERT_TRUE(h.ok()) << h.status();
  EXPECT_TRUE(h->hashed);
  EXPECT_TRUE(h->train.empty());
  EXPECT_TRUE(h->test.empty());
  EXPECT_EQ(h->train.capacity(), 0u);
  EXPECT_EQ(h->test.capacity(), 0u);
  EXPECT_DOUBLE_EQ(h->HeldOutCount(), 2e8);
  EXPECT_DOUBLE_EQ(h->TrainingCount(), 8e8);

  std::vector<VariableDecl> decls;
  for (int i = 0; i < 20; ++i) decls.push_back(Digit("x" + std::to_string(i), 10));  // 10^20 > 2^62
  VariableDecl o;
  o.name = "out";
  o.role = Role::kOutput;
  o.expr = "(x0 + x1) % 2";
  decls.push_back(o);
  ModelError err;
  auto huge = CausalModel::Create(decls, &err);
  ASSERT_FALSE(huge.ok());
  EXPECT_NE(err.message.find("the input space has more than 4611686018427387904 combinations (reached at input 'x18')"),
            std::string::npos)
      << err.message;
}

// Catches: a split that ignores the seed (every seed the same held-out set) or that is not a
// function of (seed, input) alone.
TEST(HashedSplit, IsDeterministicPerSeedAndDiffersAcrossSeeds) {
  auto m = Model(std::vector<int64_t>(9, 10));
  ASSERT_NE(m, nullptr);
  auto s7 = SplitInputs(*m, 0.2, 7);
  auto again = SplitInputs(*m, 0.2, 7);
  auto s8 = SplitInputs(*m, 0.2, 8);
  ASSERT_TRUE(s7.ok() && again.ok() && s8.ok());
  EXPECT_EQ(s7->key, again->key);
  EXPECT_NE(s7->key, s8->key);
  int64_t same_seed_differs = 0, other_seed_differs = 0;
  const int64_t n = 200000;
  for (int64_t i = 0; i < n; ++i) {
    const int64_t x = i * 4999;  // spread over the space
    if (s7->IsHeldOut(x) != again->IsHeldOut(x)) ++same_seed_differs;
    if (s7->IsHeldOut(x) != s8->IsHeldOut(x)) ++other_seed_differs;
  }
  EXPECT_EQ(same_seed_differs, 0);
  // Two independent splits disagree on 2 x 0.2 x 0.8 = 32% of inputs; allow 30-34% (the
  // standard deviation over 200000 inputs is 0.1%).
  EXPECT_GT(other_seed_differs, n * 30 / 100);
  EXPECT_LT(other_seed_differs, n * 34 / 100);
}

// Writes the counts to a file and runs tests/python/check_binomial.py on them.
::graft::testing::CommandResult Binomial(const std::string& dir, const std::string& lines, double alpha) {
  const std::string path = dir + "/counts.txt";
  ::graft::testing::WriteFile(path, lines);
  return ::graft::testing::RunCommand(std::string(::graft::testing::SystemPython()) + " " +
                                      ::graft::testing::SourceDir() + "/tests/python/check_binomial.py " + path + " " +
                                      std::to_string(alpha));
}

// The held-out fraction, by SciPy's exact two-sided binomial test (scipy.stats.binomtest, level
// 0.001) over a million consecutive input numbers and a million drawn over the whole space, for
// several held_out values and seeds. Catches: a biased comparison (say a coarse hash, or `<=`
// on few bits), a swapped side (the training fraction held out), and a hash that mixes
// consecutive numbers poorly, since blocks of neighbours then share a fate and the count
// strays. The same test rejects a count made with held_out 0.202 against 0.2, so it can fail.
TEST(HashedSplit, HeldOutFractionPassesAnExactBinomialTest) {
  auto m = Model(std::vector<int64_t>(9, 10));
  ASSERT_NE(m, nullptr);
  std::ostringstream lines;
  int64_t biased = 0;
  for (double held_out : {0.001, 0.2, 0.5, 0.999}) {
    for (uint64_t seed : {7ull, 1234567ull}) {
      auto s = SplitInputs(*m, held_out, seed);
      ASSERT_TRUE(s.ok()) << s.status();
      int64_t consecutive = 0, spread = 0;
      const int64_t n = 1000000;
      Rng rng(99, seed);
      for (int64_t i = 0; i < n; ++i) {
        if (s->IsHeldOut(i)) ++consecutive;
        if (s->IsHeldOut(static_cast<int64_t>(rng.Uniform(1000000000)))) ++spread;
        if (held_out == 0.2 && seed == 7 && HeldOutFraction(s->key, i) < 0.202) ++biased;
      }
      lines << "consecutive_" << held_out << "_" << seed << " " << consecutive << " " << n << " " << held_out << "\n";
      lines << "spread_" << held_out << "_" << seed << " " << spread << " " << n << " " << held_out << "\n";
    }
  }
  ::graft::testing::ScopedTempDir dir;
  auto ok = Binomial(dir.path(), lines.str(), 0.001);
  EXPECT_EQ(ok.exit_code, 0) << ok.output;
  EXPECT_NE(ok.output.find("checked 16 counts at level 0.001"), std::string::npos) << ok.output;
  auto rejected = Binomial(dir.path(), "biased " + std::to_string(biased) + " 1000000 0.2\n", 0.001);
  EXPECT_EQ(rejected.exit_code, 1) << rejected.output;
  EXPECT_NE(rejected.output.find("REJECTED"), std::string::npos) << rejected.output;
}

// Catches: training draws that do not skip held-out inputs, held-out draws that take training
// inputs, and draws confined to a corner of the space.
TEST(HashedSplit, DrawsStayOnTheirSideAndCoverTheSpace) {
  auto m = Model(std::vector<int64_t>(9, 10));
  ASSERT_NE(m, nullptr);
  auto s = SplitInputs(*m, 0.3, 3);
  ASSERT_TRUE(s.ok());
  TrainingStream stream(*s, 3);
  int64_t upper_half = 0, n = 0;
  for (int k = 0; k < 200; ++k) {
    for (int64_t x : stream.Next(256)) {
      ASSERT_FALSE(s->IsHeldOut(x)) << "training drew held-out input " << x;
      ASSERT_GE(x, 0);
      ASSERT_LT(x, 1000000000);
      if (x >= 500000000) ++upper_half;
      ++n;
    }
  }
  EXPECT_TRUE(stream.order().empty());
  Rng rng(3, 1);
  for (int i = 0; i < 20000; ++i) ASSERT_TRUE(s->IsHeldOut(s->DrawHeldOut(rng)));
  for (const Triple& t : MakeTriples(*s, 5, 3000, 3)) {
    ASSERT_TRUE(s->IsHeldOut(t.base));
    ASSERT_TRUE(s->IsHeldOut(t.source));
    ASSERT_GE(t.set, 0);
    ASSERT_LT(t.set, 5);
  }
  for (int64_t x : SampleInputs(*s, /*held_out_side=*/false, 2000, 3, 0xE1)) ASSERT_FALSE(s->IsHeldOut(x));
  for (int64_t x : SampleInputs(*s, /*held_out_side=*/true, 2000, 3, 0xE2)) ASSERT_TRUE(s->IsHeldOut(x));
  ::graft::testing::ScopedTempDir dir;
  auto half = Binomial(dir.path(), "upper_half " + std::to_string(upper_half) + " " + std::to_string(n) + " 0.5\n", 0.001);
  EXPECT_EQ(half.exit_code, 0) << half.output;
  // The same seed gives the same draws; another seed others.
  TrainingStream again(*s, 3), other(*s, 4);
  TrainingStream first(*s, 3);
  const std::vector<int64_t> a = first.Next(64);
  EXPECT_EQ(again.Next(64), a);
  EXPECT_NE(other.Next(64), a);
  // held_out 0: nothing is held out and evaluation draws from every input.
  auto none = SplitInputs(*m, 0.0, 3);
  ASSERT_TRUE(none.ok());
  EXPECT_FALSE(none->IsHeldOut(12345));
  EXPECT_DOUBLE_EQ(none->HeldOutCount(), 1e9);
}

// Catches: held_out values that would make draws loop for ages, and a hashed split that may
// drop every training input with some value, accepted silently.
TEST(HashedSplit, RefusesHeldOutItCannotDrawOrThatMayLoseAValue) {
  auto m = Model(std::vector<int64_t>(9, 10));
  ASSERT_NE(m, nullptr);
  for (double bad : {0.0005, 0.9995}) {
    auto s = SplitInputs(*m, bad, 1);
    ASSERT_FALSE(s.ok());
    EXPECT_NE(s.status().message().find("so its split is hashed, and a hashed split needs held_out 0 or within [0.001, 0.999]"),
              std::string::npos)
        << s.status();
  }
  // 2^25 inputs, one input with 2^21 values: each of its values is shared by 16 inputs, all held
  // out with probability 0.5^16.
  auto wide = Model({int64_t{1} << 21, 16}, "b % 2");
  ASSERT_NE(wide, nullptr);
  auto s = SplitInputs(*wide, 0.5, 1);
  ASSERT_FALSE(s.ok());
  EXPECT_NE(s.status().message().find("each value of a is shared by only 16 inputs"), std::string::npos) << s.status();
  EXPECT_NE(s.status().message().find("lower held_out below 0.17"), std::string::npos) << s.status();  // 1e-12^(1/16)
  EXPECT_TRUE(SplitInputs(*wide, 0.15, 1).ok());
}

// tests/data/nine-digit-tally.yaml: nine inputs of ten values (10^9 inputs), held_out 0.25.
std::string NineDigitsPath() { return ::graft::testing::SourceDir() + "/tests/data/nine-digit-tally.yaml"; }
std::string NineDigits() { return ::graft::testing::ReadFile(NineDigitsPath()); }

// Catches: `check` (graft-worker's and graft's, one function) not saying how the split is made,
// or printing counts for a hashed split as if they were exact.
TEST(HashedSplit, CheckSaysWhichWayTheSplitGoes) {
  const std::string path = NineDigitsPath();
  auto worker = ::graft::testing::RunCommand(::graft::testing::BinaryDir() + "/bin/graft-worker check " + path);
  ASSERT_EQ(worker.exit_code, 0) << worker.output;
  EXPECT_NE(worker.output.find("input space: 1000000000 inputs; held out: about 250000000 (0.25); training: about "
                               "750000000\n"
                               "split: hashed (more than 16777216 inputs, none listed): an input is held out when a "
                               "hash of its number seeded from the seed falls below 0.25"),
            std::string::npos)
      << worker.output;
  EXPECT_NE(worker.output.find("evaluation triples: 437500000000000000 distinct (about); 512 sampled"),
            std::string::npos)
      << worker.output;
  auto client = ::graft::testing::RunCommand(::graft::testing::BinaryDir() + "/bin/graft check " + path);
  ASSERT_EQ(client.exit_code, 0) << client.output;
  EXPECT_EQ(client.output, worker.output);
  auto small = config::CheckFile(::graft::testing::SourceDir() + "/configs/parcel-routing.yaml", {}, 1000);
  ASSERT_TRUE(small.ok()) << small.status();
  EXPECT_NE(small->find("input space: 288 inputs; held out: 58 (0.2); training: 230\nsplit: listed (at most 16777216 "
                        "inputs): exactly round(held_out x inputs) held out by a permutation seeded from the seed\n"),
            std::string::npos)
      << *small;
}

// Catches: a hashed held_out refusal without its place, and a mechanism whose table passes
// max_parent_space without a message naming the setting at the mechanism's FILE:LINE:COL.
TEST(HashedSplit, ValidatorNamesThePlaceAndTheLimit) {
  std::string text = NineDigits();
  text.replace(text.find("held_out: 0.25"), 14, "held_out: 0.0002");
  auto bad = config::LoadJobFromText(text, "nine.yaml", {});
  ASSERT_FALSE(bad.ok());
  EXPECT_NE(bad.status().message().find("nine.yaml:36:13: evaluation.held_out: held_out 0.0002: the input space has "
                                        "1000000000 inputs, more than 16777216, so its split is hashed"),
            std::string::npos)
      << bad.status();
  auto over = config::LoadJobFromText(NineDigits(), "nine.yaml", {"evaluation.held_out=0.9999"});
  ASSERT_FALSE(over.ok());
  EXPECT_NE(over.status().message().find("--set #1:1:21: evaluation.held_out: held_out 0.9999"), std::string::npos)
      << over.status();

  auto tree = config::ParseYaml(NineDigits(), "nine.yaml");
  ASSERT_TRUE(tree.ok()) << tree.status();
  config::SpecLimits limits;
  limits.max_parent_space = 999;
  auto limited = config::ResolveTree(*tree, limits);
  ASSERT_FALSE(limited.ok());
  EXPECT_NE(limited.status().message().find(
                "nine.yaml:17:11: mechanism 'left': its lookup table would hold 1000 entries, one per combination of "
                "its parents' values (d1 10 x d2 10 x d3 10); this coordinator accepts at most max_parent_space = 999 "
                "entries per mechanism; split it into smaller mechanisms"),
            std::string::npos)
      << limited.status();
  // Without graftd's settings, graft's own cap is named.
  std::string wide = NineDigits();
  wide.replace(wide.find("left: (d1 + d2 + d3) % 10"), 25, "left: (d1 + d2 + d3 + d4 + d5 + d6 + d7) % 10");
  auto capped = config::LoadJobFromText(wide, "nine.yaml", {});
  ASSERT_FALSE(capped.ok());
  EXPECT_NE(capped.status().message().find("nine.yaml:17:11: mechanism 'left': its lookup table would hold 10000000 "
                                           "entries, one per combination of its parents' values (d1 10 x d2 10 x d3 10 "
                                           "x d4 10 x d5 10 x d6 10 x d7 10); graft's cap is 4194304 entries per "
                                           "mechanism"),
            std::string::npos)
      << capped.status();
  // The default limits (graftd's) accept the 10^9-input config: nothing is listed.
  auto accepted = config::ResolveTree(*tree, config::SpecLimits{});
  ASSERT_TRUE(accepted.ok()) << accepted.status();
  EXPECT_TRUE(accepted->split.hashed);
}

}  // namespace
}  // namespace graft::causal
