// The config language: every mistake a person can make gets FILE:LINE:COL and a message that
// names the key and what was expected; valid configs resolve and round-trip.
#include <filesystem>
#include <fstream>
#include <set>
#include <sstream>

#include "gtest/gtest.h"
#include "tests/test_util.h"
#include "configs/reader/spec.h"
#include "configs/reader/suggest.h"
#include "configs/reader/sweep.h"
#include "trainer/worker/commands.h"

namespace graft::config {
namespace {

// The contract example; line numbers below refer to this text.
const char kBase[] = R"(name: parcel-routing
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
  type: mlp
  embedding: {dim: 8, init: learned}
  hidden: [64, 64, 64]
  activation: relu
alignment:
  local:   {layer: 1, units: 0-15}
  careful: {layer: 1, units: 16-31}
training:
  steps: 2000
  batch_size: 256
  optimizer: {type: adam, lr: 0.001, weight_decay: 0.0}
  loss_weights: {task: 1.0, interchange: 1.0}
  interventions: [[local], [careful], [local, careful]]
  sources: in_batch
  source_gradients: true
  threads: 1
  checkpoint_every: 500
evaluation:
  every: 250
  held_out: 0.2
  triples: 4096
)";

std::string Replace(std::string text, const std::string& from, const std::string& to) {
  const size_t at = text.find(from);
  EXPECT_NE(at, std::string::npos) << "test bug: '" << from << "' not in the config";
  if (at != std::string::npos) text.replace(at, from.size(), to);
  return text;
}

// The error message for `text`, or "" when it loads.
std::string ErrorOf(const std::string& text, const std::vector<std::string>& overrides = {}) {
  auto job = LoadJobFromText(text, "job.yaml", overrides);
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

TEST(Spec, LoadsTheContractExample) {
  auto job = LoadJobFromText(kBase, "job.yaml", {});
  ASSERT_OK(job);
  EXPECT_EQ(job->spec.name, "parcel-routing");
  EXPECT_EQ(job->spec.seed, 7u);
  EXPECT_EQ(job->spec.network.hidden, (std::vector<int>{64, 64, 64}));
  ASSERT_EQ(job->spec.alignment.size(), 2u);
  EXPECT_EQ(job->spec.alignment[1].units.front(), 16);
  EXPECT_EQ(job->spec.alignment[1].units.size(), 16u);
  ASSERT_EQ(job->sets.size(), 3u);
  EXPECT_EQ(job->sets[2].name, "local+careful");
  EXPECT_EQ(job->model->input_space_size(), 288);
  EXPECT_EQ(job->split.test.size(), 58u);
  EXPECT_EQ(job->distinct_eval_triples, 58u * 58u * 3u);
}

TEST(Spec, ShippedConfigsCheck) {
  for (const char* name : {"parcel-routing", "checksum-digits"}) {
    auto job = LoadJob(::graft::testing::SourceDir() + "/configs/" + name + ".yaml", {});
    EXPECT_OK(job);
  }
}

TEST(Spec, SummaryNamesDomainsParentsLayersAndSizes) {
  auto job = LoadJobFromText(kBase, "job.yaml", {});
  ASSERT_OK(job);
  const std::string s = Summarize(*job);
  EXPECT_NE(s.find("origin (input, 6 values: north, south, east, west, central, harbor)"), std::string::npos) << s;
  EXPECT_NE(s.find("local (mechanism, 2 values: 0, 1) <- origin, dest = origin == dest"), std::string::npos) << s;
  EXPECT_NE(s.find("layer 1: 64 units; local = units 0-15 (16); careful = units 16-31 (16)"), std::string::npos) << s;
  EXPECT_NE(s.find("input space: 288 inputs; held out: 58"), std::string::npos) << s;
  EXPECT_NE(s.find("evaluation triples: 10092 distinct; 4096 sampled"), std::string::npos) << s;
}

TEST(Spec, ResolvedSpecRoundTrips) {
  auto job = LoadJobFromText(kBase, "job.yaml", {"training.steps=30", "evaluation.held_out=0.25"});
  ASSERT_OK(job);
  const std::string yaml = ResolvedSpecYaml(job->spec);
  auto again = LoadJobFromText(yaml, "spec.yaml", {});
  ASSERT_TRUE(again.ok()) << again.status() << "\n" << yaml;
  EXPECT_EQ(ResolvedSpecYaml(again->spec), yaml);
  EXPECT_EQ(SpecHash(again->spec), SpecHash(job->spec));
  EXPECT_EQ(again->spec.training.steps, 30);
  EXPECT_EQ(again->split.test, job->split.test);
}

TEST(Spec, OverridesSetAnyKey) {
  auto job = LoadJobFromText(kBase, "job.yaml",
                             {"training.loss_weights.interchange=0", "network.hidden=[32, 32]",
                              "alignment.careful.units=[16, 17, 18]", "network.hidden.1=48"});
  ASSERT_OK(job);
  EXPECT_EQ(job->spec.training.interchange_weight, 0.0);
  EXPECT_EQ(job->spec.network.hidden, (std::vector<int>{32, 48}));
  EXPECT_EQ(job->spec.alignment[1].units, (std::vector<int>{16, 17, 18}));
}

TEST(Spec, DefaultInterventionsAreAllSubsetsOfTheAligned) {
  auto job = LoadJobFromText(Replace(kBase, "  interventions: [[local], [careful], [local, careful]]\n", ""),
                             "job.yaml", {});
  ASSERT_OK(job);
  ASSERT_EQ(job->sets.size(), 3u);
  EXPECT_EQ(job->sets[0].name, "local");
  EXPECT_EQ(job->sets[1].name, "careful");
  EXPECT_EQ(job->sets[2].name, "local+careful");
}

TEST(Spec, ZeroHeldOutEnumeratesWhenFewTriples) {
  auto job = LoadJobFromText(kBase, "job.yaml", {"evaluation.held_out=0", "evaluation.triples=300000"});
  ASSERT_OK(job);
  EXPECT_EQ(job->split.test.size(), 288u);
  EXPECT_EQ(job->distinct_eval_triples, 288u * 288u * 3u);
  EXPECT_NE(Summarize(*job).find("all are evaluated"), std::string::npos);
}

// One test per kind of mistake: the location and the message.

TEST(SpecErrors, UnknownKeySuggestsTheNearest) {
  EXPECT_ERROR(ErrorOf(Replace(kBase, "  steps: 2000", "  stepz: 2000")), "job.yaml:23:3:",
               "unknown key 'stepz' in 'training'; did you mean 'steps'?");
  EXPECT_ERROR(ErrorOf(Replace(kBase, "evaluation:", "evalution:")), "job.yaml:32:1:",
               "unknown key 'evalution' at the top level; did you mean 'evaluation'?");
}

TEST(SpecErrors, DuplicateKey) {
  EXPECT_ERROR(ErrorOf(Replace(kBase, "  steps: 2000\n", "  steps: 2000\n  steps: 10\n")), "job.yaml:24:3:",
               "duplicate key 'steps' (first written at line 23)");
}

TEST(SpecErrors, WrongType) {
  EXPECT_ERROR(ErrorOf(Replace(kBase, "steps: 2000", "steps: many")), "job.yaml:23:10:",
               "training.steps: expected a whole number >= 1, got 'many'");
  EXPECT_ERROR(ErrorOf(Replace(kBase, "source_gradients: true", "source_gradients: yes please")),
               "job.yaml:29:21:", "training.source_gradients: expected true or false, got 'yes please'");
  EXPECT_ERROR(ErrorOf(Replace(kBase, "activation: relu", "activation: relux")), "job.yaml:18:15:",
               "network.activation: expected one of relu | gelu | tanh, got 'relux'; did you mean 'relu'?");
  EXPECT_ERROR(ErrorOf(Replace(kBase, "held_out: 0.2", "held_out: 1.5")), "job.yaml:34:13:",
               "evaluation.held_out: expected a number in [0, 1), got 1.5");
}

TEST(SpecErrors, YamlSyntax) {
  const std::string msg = ErrorOf(Replace(kBase, "  hidden: [64, 64, 64]", "  hidden: [64, 64, 64"));
  EXPECT_EQ(msg.rfind("job.yaml:", 0), 0u) << msg;
  EXPECT_NE(msg.find("YAML syntax"), std::string::npos) << msg;
  EXPECT_ERROR(ErrorOf(Replace(kBase, "  type: mlp", " type: mlp\n  bad")), "job.yaml:", "YAML syntax");
}

TEST(SpecErrors, UnquotedNotIsAYamlTagAndSaysToQuote) {
  EXPECT_ERROR(ErrorOf(Replace(kBase, "careful: weight == heavy || weight == oversize || fragile",
                               "careful: !fragile")),
               "job.yaml:11:14:", "an expression starting with '!' must be quoted");
  EXPECT_EQ(ErrorOf(Replace(kBase, "careful: weight == heavy || weight == oversize || fragile",
                            "careful: \"!fragile\"")),
            "");
}

TEST(SpecErrors, OutputWithOneValue) {
  EXPECT_ERROR(ErrorOf(Replace(kBase, "route: {expr: \"2*local + careful\", classes: [van, truck, bike, courier]}",
                               "route: \"local * 0\"")),
               "job.yaml:13:13:", "the output 'route' takes only one value");
}

TEST(Spec, ResolvedSpecEscapesQuotesInText) {
  auto job = LoadJobFromText(kBase, "job.yaml", {"name='odd \"name\" \\ here'"});
  ASSERT_OK(job);
  auto again = LoadJobFromText(ResolvedSpecYaml(job->spec), "spec.yaml", {});
  ASSERT_OK(again);
  EXPECT_EQ(again->spec.name, "odd \"name\" \\ here");
}

TEST(SpecErrors, CycleIsNamed) {
  std::string text = Replace(kBase, "local:   origin == dest", "local:   origin == dest && careful");
  text = Replace(text, "|| fragile", "|| local");
  // The cycle is reported at the expression of its first declared variable: `local` on line 10,
  // whose expression starts at column 14 ("    local:   " is 13 characters).
  EXPECT_ERROR(ErrorOf(text), "job.yaml:10:14: ", "mechanisms form a cycle: local -> careful -> local");
}

TEST(SpecErrors, UnknownNameInExpressionPointsInsideIt) {
  // "    careful: " is 13 characters, so the expression starts at column 14; "heavvy" at +10.
  EXPECT_ERROR(ErrorOf(Replace(kBase, "weight == heavy ||", "weight == heavvy ||")), "job.yaml:11:24:",
               "unknown name 'heavvy'");
  EXPECT_NE(ErrorOf(Replace(kBase, "weight == heavy ||", "weight == heavvy ||")).find("did you mean 'heavy'?"),
            std::string::npos);
  // Inside quotes: `    route: {expr: "` is 19 characters; "carefull" is at +10 of the text.
  EXPECT_ERROR(ErrorOf(Replace(kBase, "2*local + careful\"", "2*local + carefull\"")), "job.yaml:13:30:",
               "unknown name 'carefull'");
}

TEST(SpecErrors, SymbolMisuse) {
  EXPECT_ERROR(ErrorOf(Replace(kBase, "local:   origin == dest", "local:   origin + 1 == dest")),
               "job.yaml:10:14:", "mechanism 'local': ");
  const std::string msg = ErrorOf(Replace(kBase, "local:   origin == dest", "local:   origin < dest"));
  EXPECT_EQ(msg.rfind("job.yaml:10:", 0), 0u) << msg;
  EXPECT_NE(msg.find("symbol"), std::string::npos) << msg;
}

TEST(SpecErrors, OutputValueOutOfRange) {
  EXPECT_ERROR(ErrorOf(Replace(kBase, "\"2*local + careful\"", "\"3*local + careful\"")), "job.yaml:13:20:",
               "output 'route' yields 4 when local=1, careful=1; expected an integer in [0, 4) or one of its "
               "classes: van, truck, bike, courier");
}

TEST(SpecErrors, AlignmentOfAnInputOrTheOutput) {
  EXPECT_ERROR(ErrorOf(Replace(kBase, "  local:   {layer: 1, units: 0-15}", "  origin:  {layer: 1, units: 0-15}")),
               "job.yaml:20:3:", "alignment.origin: 'origin' is an input");
  EXPECT_ERROR(ErrorOf(Replace(kBase, "  local:   {layer: 1, units: 0-15}", "  route:   {layer: 1, units: 0-15}")),
               "job.yaml:20:3:", "alignment.route: 'route' is the output");
  EXPECT_ERROR(ErrorOf(Replace(kBase, "  local:   {layer: 1, units: 0-15}", "  locale:  {layer: 1, units: 0-15}")),
               "job.yaml:20:3:", "'locale' is not a variable of the algorithm; did you mean 'local'?");
}

TEST(SpecErrors, UnitsOutsideTheLayer) {
  EXPECT_ERROR(ErrorOf(Replace(kBase, "units: 16-31", "units: 60-70")), "job.yaml:21:30:",
               "alignment.careful.units: unit 70 is outside layer 1, which has 64 units (0-63)");
}

TEST(SpecErrors, UnitsOverlapAnotherVariable) {
  EXPECT_ERROR(ErrorOf(Replace(kBase, "units: 16-31", "units: 10-20")), "job.yaml:21:30:",
               "unit 10 of layer 1 is also aligned to 'local'");
}

TEST(SpecErrors, LayerThatDoesNotExist) {
  EXPECT_ERROR(ErrorOf(Replace(kBase, "careful: {layer: 1", "careful: {layer: 3")), "job.yaml:21:20:",
               "alignment.careful.layer: layer 3 does not exist; network.hidden has 3 layers, numbered 0-2");
}

TEST(SpecErrors, InterventionSetNamesAnUnalignedVariable) {
  // `  interventions: [[local], [` is 28 characters: "careful" starts at column 29.
  EXPECT_ERROR(ErrorOf(Replace(kBase, "  careful: {layer: 1, units: 16-31}\n", "")), "job.yaml:26:29:",
               "training.interventions: 'careful' is not an aligned variable");
}

TEST(SpecErrors, HeldOutSplitThatRemovesAValue) {
  EXPECT_ERROR(ErrorOf(Replace(kBase, "held_out: 0.2", "held_out: 0.98")), "job.yaml:34:13:",
               "evaluation.held_out: held_out 0.98 removes every training input with");
}

TEST(SpecErrors, DescendantMustSitInALaterLayer) {
  // careful now depends on local; the set [local] moves local without careful, both in layer 1.
  const std::string text = Replace(kBase, "|| fragile", "|| fragile || local");
  EXPECT_ERROR(ErrorOf(text), "job.yaml:27:19:",
               "the set [local] moves 'local' without its descendant 'careful', but 'careful' is aligned in "
               "layer 1, not after 'local' (layer 1)");
  // With careful in layer 2 the network can recompute it: valid.
  std::string later = Replace(text, "careful: {layer: 1", "careful: {layer: 2");
  EXPECT_EQ(ErrorOf(later), "");
}

TEST(SpecErrors, OverrideErrorsNameTheOverride) {
  // "training.steps=" is 15 characters: the value starts at column 16.
  EXPECT_ERROR(ErrorOf(kBase, {"seed=3", "training.steps=abc"}), "--set #2:1:16:",
               "training.steps: expected a whole number >= 1, got 'abc'");
  EXPECT_ERROR(ErrorOf(kBase, {"training.stepz=5"}), "--set #1:1:10:",
               "unknown key 'stepz' in 'training'; did you mean 'steps'?");
  EXPECT_ERROR(ErrorOf(kBase, {"training.steps"}), "--set #1:1:1:", "expected key.path=value");
  EXPECT_ERROR(ErrorOf(kBase, {"network.hidden.7=3"}), "--set #1:1:16:", "'7' is not an index of the list");
}

TEST(SpecErrors, EveryErrorIsReportedNotOnlyTheFirst) {
  std::string text = Replace(kBase, "steps: 2000", "steps: -1");
  text = Replace(text, "batch_size: 256", "batchsize: 256");
  const std::string msg = ErrorOf(text);
  EXPECT_NE(msg.find("job.yaml:23:10: training.steps"), std::string::npos) << msg;
  EXPECT_NE(msg.find("job.yaml:24:3: unknown key 'batchsize'"), std::string::npos) << msg;
}

TEST(Suggest, EditDistanceAndNearest) {
  // Both worked examples are common practice, written from memory: "kitten" -> "sitting" is the
  // textbook example of Levenshtein distance (3), and "ca" -> "abc" the usual one that tells the
  // optimal string alignment distance (3) from the full Damerau-Levenshtein distance (2).
  EXPECT_EQ(EditDistance("kitten", "sitting"), 3);
  EXPECT_EQ(EditDistance("ca", "abc"), 3);
  EXPECT_EQ(Nearest("stpes", {"steps", "batch_size"}), "steps");
  EXPECT_EQ(Nearest("zzzzzz", {"steps", "batch_size"}), "");
}

TEST(CheckCommand, PrintsSummaryOrErrorsWithExitCodes) {
  ::graft::testing::ScopedTempDir dir;
  const std::string path = dir.path() + "/job.yaml";
  ::graft::testing::WriteFile(path, kBase);
  std::ostringstream out, err;
  EXPECT_EQ(worker::CheckCommand(path, {}, out, err), worker::kExitOk) << err.str();
  EXPECT_NE(out.str().find("input space: 288 inputs"), std::string::npos);
  std::ostringstream out2, err2;
  EXPECT_EQ(worker::CheckCommand(path, {"training.steps=0"}, out2, err2), worker::kExitInvalidConfig);
  EXPECT_NE(err2.str().find("--set #1:1:16: training.steps"), std::string::npos) << err2.str();
  // The real binary, as a user runs it.
  auto r = ::graft::testing::RunCommand(::graft::testing::BinaryDir() + "/bin/graft-worker check " + path +
                                        " --set evaluation.every=abc");
  EXPECT_EQ(r.exit_code, 2) << r.output;
  EXPECT_NE(r.output.find("--set #1:1:18: evaluation.every: expected a whole number"), std::string::npos) << r.output;
}

// A sweep over every kind of axis: 2 (grid) x 2 (together) x 2 (sample) x 2 (seeds) = 16 jobs.
const char kSweepBlock[] = R"(sweep:
  grid:
    training.loss_weights.interchange: [0.0, 1.0]
  together:
    - {alignment.local.layer: [1, 2], alignment.careful.layer: [1, 2]}
  sample:
    count: 2
    seed: 3
    params:
      training.optimizer.lr: {log_between: [0.0001, 0.01]}
  seeds: [1, 2]
)";

// `graft check` and `graft-worker check` are two programs over one library: on a sweep, on a
// sweep with a bad combination and on one above --max-sweep-jobs, both binaries exit alike and
// print the same bytes. Catches graft-worker refusing a sweep file graft accepts (it reported
// "unknown key 'sweep'") and the two summaries drifting apart.
TEST(CheckCommand, GraftAndGraftWorkerAcceptASweepAndSayTheSame) {
  ::graft::testing::ScopedTempDir dir;
  const std::string good = dir.path() + "/sweep.yaml";
  ::graft::testing::WriteFile(good, std::string(kBase) + kSweepBlock);
  const std::string bad = dir.path() + "/bad-sweep.yaml";
  ::graft::testing::WriteFile(bad, std::string(kBase) + "sweep:\n  grid:\n    alignment.local.layer: [1, 7]\n"
                                                        "  seeds: [1, 2]\n");
  const std::string bin = ::graft::testing::BinaryDir() + "/bin/";
  struct Case {
    std::string args;
    int exit_code;
    std::string expected;  // a piece of the output
  };
  const std::vector<Case> cases = {
      {good, 0, "sweep of 16 jobs:\n  parcel-routing/interchange=0,layer=1,lr="},
      {bad, 2, "sweep combination 3 of 4 (alignment.local.layer=7, seed=1) is invalid"},
      {good + " --max-sweep-jobs 15", 2, "the sweep makes more than 15 jobs"},
  };
  for (const Case& c : cases) {
    auto client = ::graft::testing::RunCommand(bin + "graft check " + c.args);
    auto worker = ::graft::testing::RunCommand(bin + "graft-worker check " + c.args);
    EXPECT_EQ(client.exit_code, c.exit_code) << c.args << "\n" << client.output;
    EXPECT_EQ(worker.exit_code, c.exit_code) << c.args << "\n" << worker.output;
    EXPECT_EQ(client.output, worker.output) << c.args;
    EXPECT_NE(worker.output.find(c.expected), std::string::npos) << c.args << "\n" << worker.output;
  }
  // Every job once: the count line and 16 distinct names, each ending in its seed.
  auto r = ::graft::testing::RunCommand(bin + "graft-worker check " + good);
  std::istringstream lines(r.output);
  std::string line;
  std::getline(lines, line);
  std::set<std::string> names;
  while (std::getline(lines, line)) {
    EXPECT_TRUE(line.size() > 7 && (line.compare(line.size() - 7, 7, "/seed=1") == 0 ||
                                    line.compare(line.size() - 7, 7, "/seed=2") == 0))
        << line;
    names.insert(line);
  }
  EXPECT_EQ(names.size(), 16u) << r.output;
}

// Without a `name`, a sweep's jobs are named after the file, as a lone job is. Catches the
// fixed "sweep/..." the names had before.
TEST(CheckCommand, JobsOfANamelessSweepAreNamedAfterItsFile) {
  const std::string text = Replace(std::string(kBase) + "sweep:\n  seeds: [1, 2]\n", "name: parcel-routing\n", "");
  auto lone = LoadJobFromText(Replace(text, "sweep:\n  seeds: [1, 2]\n", ""), "studies/route-study.yaml", {});
  ASSERT_TRUE(lone.ok()) << lone.status();
  EXPECT_EQ(lone->spec.name, "route-study");
  auto plan = PlanFromText(text, "studies/route-study.yaml", {}, kDefaultMaxSweepJobs);
  ASSERT_TRUE(plan.ok()) << plan.status();
  ASSERT_EQ(plan->jobs.size(), 2u);
  EXPECT_EQ(plan->jobs[0].name, "route-study/seed=1");
  EXPECT_EQ(plan->jobs[1].name, "route-study/seed=2");
  EXPECT_EQ(plan->jobs[1].job.spec.name, "route-study/seed=2");
}

// `graft-worker run` trains one job, so a sweep is refused before anything is written, and the
// message's `--set` values make exactly the sweep's first job (the sampled learning rate in full,
// not as the job name rounds it). Catches a worker that trains the base config of a sweep, and
// suggested values that differ from what graftd would run.
TEST(CheckCommand, RunRefusesASweepAndSaysHowToTrainOneOfItsJobs) {
  ::graft::testing::ScopedTempDir dir;
  const std::string file = dir.path() + "/sweep.yaml";
  ::graft::testing::WriteFile(file, std::string(kBase) + kSweepBlock);
  worker::RunArgs args;
  args.config = file;
  args.out_dir = dir.path() + "/run";
  std::ostringstream out, err;
  EXPECT_EQ(worker::RunCommand(args, nullptr, out, err, false), worker::kExitInvalidConfig);
  EXPECT_FALSE(std::filesystem::exists(args.out_dir));
  const std::string message = err.str();
  EXPECT_EQ(message.rfind(file + ":36:1: this config is a sweep of 16 jobs", 0), 0u) << message;
  EXPECT_NE(message.find("graft submit " + file), std::string::npos) << message;

  std::string text = std::string(kBase) + kSweepBlock;
  auto plan = PlanFromText(text, file, {}, kDefaultMaxSweepJobs);
  ASSERT_TRUE(plan.ok()) << plan.status();
  const PlannedJob& first = plan->jobs.front();
  ASSERT_EQ(first.overrides.size(), 5u);  // interchange, the two layers, lr, seed
  std::string suggested = "--set sweep=null";
  for (const auto& o : first.overrides) suggested += " --set " + o;
  EXPECT_NE(message.find(suggested + "\n"), std::string::npos) << message;

  std::vector<std::string> overrides = {"sweep=null"};
  overrides.insert(overrides.end(), first.overrides.begin(), first.overrides.end());
  overrides.push_back("name='" + first.name + "'");
  auto lone = LoadJob(file, overrides);
  ASSERT_TRUE(lone.ok()) << lone.status();
  EXPECT_EQ(ResolvedSpecYaml(lone->spec), ResolvedSpecYaml(first.job.spec));
  // The name rounds the sampled value; the override does not.
  const std::string lr = first.overrides[3].substr(first.overrides[3].find('=') + 1);
  EXPECT_EQ(first.overrides[3].rfind("training.optimizer.lr=", 0), 0u) << first.overrides[3];
  EXPECT_EQ(std::stod(lr), first.job.spec.training.optimizer.lr);
}

// The analysis blocks (issue 7): `scan:` and `das:`. Appended text starts at line 36 of kBase.
TEST(Spec, AnalysisBlocksRoundTripAndResolveDefaults) {
  auto job = LoadJobFromText(std::string(kBase) + "scan: {block: 8, random_subsets: 2}\ndas: {steps: 50}\n", "job.yaml", {});
  ASSERT_TRUE(job.ok()) << job.status();
  EXPECT_TRUE(job->spec.scan.present);
  EXPECT_EQ(job->spec.scan.block, 8);
  EXPECT_EQ(job->spec.das.layer, 1);  // the layer both aligned variables share
  auto again = LoadJobFromText(ResolvedSpecYaml(job->spec), "spec.yaml", {});
  ASSERT_TRUE(again.ok()) << again.status();
  EXPECT_EQ(ResolvedSpecYaml(again->spec), ResolvedSpecYaml(job->spec));
  // Without the blocks the resolved text (and so the spec hash of existing runs) has neither key.
  auto plain = LoadJobFromText(kBase, "job.yaml", {});
  ASSERT_TRUE(plain.ok());
  EXPECT_EQ(ResolvedSpecYaml(plain->spec).find("scan:"), std::string::npos);
  EXPECT_EQ(ResolvedSpecYaml(plain->spec).find("das:"), std::string::npos);
}

TEST(SpecErrors, ScanBlock) {
  EXPECT_ERROR(ErrorOf(std::string(kBase) + "scan:\n  blok: 8\n"), "job.yaml:37:3:",
               "unknown key 'blok' in 'scan'; did you mean 'block'?");
  EXPECT_ERROR(ErrorOf(std::string(kBase) + "scan:\n  layers: [0, 5]\n"), "job.yaml:37:15:",
               "scan.layers: layer 5 does not exist; network.hidden has 3 layers, numbered 0-2");
  EXPECT_ERROR(ErrorOf(std::string(kBase) + "scan:\n  block: 65\n"), "job.yaml:37:10:",
               "scan.block: 65 units do not fit in layer 0, which has 64");
  EXPECT_ERROR(ErrorOf(std::string(kBase) + "scan:\n  pairs: 0\n"), "job.yaml:37:10:",
               "scan.pairs: expected a whole number in [1, 16777216], got 0");
}

TEST(SpecErrors, DasBlock) {
  EXPECT_ERROR(ErrorOf(std::string(kBase) + "das:\n  dims: 40\n"), "job.yaml:37:9:",
               "das.dims: the 2 aligned variables need 80 rotated dimensions, but layer 1 has only 64 units");
  EXPECT_ERROR(ErrorOf(std::string(kBase) + "das:\n  layer: 3\n"), "job.yaml:37:10:",
               "das.layer: layer 3 does not exist");
  EXPECT_ERROR(ErrorOf(std::string(kBase) + "das:\n  lr: 0\n"), "job.yaml:37:7:",
               "das.lr: expected a number in (0, 10], got 0");
  EXPECT_ERROR(ErrorOf(Replace(kBase, "careful: {layer: 1, units: 16-31}", "careful: {layer: 2, units: 16-31}") +
                       "das:\n  steps: 10\n"),
               "job.yaml:37:3:", "das: the aligned variables sit in different layers");
}

}  // namespace
}  // namespace graft::config
