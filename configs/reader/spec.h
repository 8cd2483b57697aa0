// A job's specification: the typed form of a config file (algorithm, network, alignment,
// training, evaluation), loaded from YAML with --set overrides, validated completely, and
// resolved into a compiled causal model, an input split and intervention sets. Torch-free, so
// the client and the coordinator give exactly the worker's messages.
// Thread-safety: plain values; a ResolvedJob is immutable after LoadJob returns.
#ifndef GRAFT_CONFIGS_READER_SPEC_H_
#define GRAFT_CONFIGS_READER_SPEC_H_

#include <cstdint>
#include <memory>
#include <string>
#include <vector>

#include "absl/status/statusor.h"
#include "trainer/causal/model.h"
#include "trainer/causal/split.h"
#include "configs/reader/config_tree.h"

namespace graft::config {

enum class EmbeddingInit { kLearned, kFixedRandom };
enum class Activation { kRelu, kGelu, kTanh };
enum class OptimizerType { kAdam, kSgd };
enum class SourceMode { kInBatch, kIndependent };

struct NetworkSpec {
  std::string type = "mlp";           // "mlp" or "transformer"
  bool is_transformer() const { return type == "transformer"; }
  // mlp:
  int embedding_dim = 8;              // width of each input's embedding
  EmbeddingInit embedding_init = EmbeddingInit::kLearned;  // fixed_random: frozen N(0,1) rows
  std::vector<int> hidden = {64, 64, 64};                  // widths of the hidden layers
  // transformer: one token per input (declaration order), then the readout token.
  int width = 64;       // residual stream width (also each token's embedding width)
  int layers = 2;       // pre-norm blocks
  int heads = 4;        // attention heads; width must be divisible by heads
  int mlp_width = 256;  // hidden width of each block's MLP
  // Of the hidden layers (mlp) or of each block's MLP (transformer); default relu for an MLP,
  // gelu for a transformer.
  Activation activation = Activation::kRelu;
};

// One aligned variable. MLP: units of the output of hidden layer `layer` (after the
// activation). Transformer: units of the residual stream after block `layer`, at the token of
// each of `positions` (an input's name or "readout"; the same units at every listed token).
struct SiteSpec {
  std::string variable;
  int layer = 0;
  std::vector<std::string> positions;  // transformer only: as written, distinct
  std::vector<int> units;  // ascending, distinct
  Location loc;            // of the variable's key in `alignment`
};

struct OptimizerSpec {
  OptimizerType type = OptimizerType::kAdam;
  double lr = 0.001;          // learning rate
  double weight_decay = 0.0;  // L2 penalty
  double momentum = 0.9;      // sgd only
};

struct TrainingSpec {
  int64_t steps = 2000;      // optimiser steps
  int batch_size = 256;      // base inputs per step
  OptimizerSpec optimizer;
  double task_weight = 1.0;          // loss_weights.task
  double interchange_weight = 1.0;   // loss_weights.interchange; 0 is standard training
  // Intervention sets, each a list of aligned variable names; sampled uniformly per example.
  // Default: every non-empty subset of the aligned variables (up to 3), else each one alone
  // and all together.
  std::vector<std::vector<std::string>> interventions;
  SourceMode sources = SourceMode::kInBatch;  // in_batch: a permutation of the batch
  bool source_gradients = true;               // gradients through the source run
  int threads = 1;                            // intra-op and BLAS threads of the job
  int64_t checkpoint_every = 500;             // steps between checkpoints
};

struct EvaluationSpec {
  int64_t every = 250;     // steps between evaluations (also at step 0 and the last step)
  double held_out = 0.2;   // fraction of the input space never used in training
  int64_t triples = 4096;  // evaluation triples (all distinct ones when fewer exist)
};

// The `scan:` block: candidate sites searched by `graft-worker scan` (and by `run` after
// training when the block is present). For each aligned variable alone, every listed layer x
// contiguous unit blocks is evaluated on held-out triples, optionally plus random unit subsets.
struct ScanSpec {
  bool present = false;         // the config has a `scan:` block
  std::vector<int> layers;      // layers to search; empty (default): every hidden layer
  std::vector<std::string> positions;  // transformer: token positions to search; empty (default): all
  int block = 0;                // units per candidate; 0 (default): the variable's aligned unit count
  int stride = 0;               // step between block starts; 0 (default): the block size
  int random_subsets = 0;       // extra candidates per layer: random unit sets of the block size
  int64_t pairs = 1024;         // budget: held-out (base, source) pairs per candidate, each evaluated with
                                // the variable alone (trade-off: time vs interval width)
};

// The `das:` block: distributed alignment search (Geiger, Wu et al. 2023) with the network
// frozen. Every aligned variable gets `dims` consecutive dimensions of a learned rotation of
// one layer; run by `graft-worker das` (and by `run` after training when the block is present).
struct DasSpec {
  bool present = false;     // the config has a `das:` block
  int layer = -1;           // the rotated layer; -1 (default): the layer all aligned variables share
  std::string position;     // transformer: the rotated token; empty (default): the one all aligned
                            // variables share
  int dims = 0;             // rotated dimensions per variable; 0 (default): the aligned unit count
  int64_t steps = 400;      // optimiser steps of the rotation
  double lr = 0.01;         // Adam learning rate of the rotation's skew-symmetric generator
  int batch_size = 256;     // base inputs per step (sources: a permutation of the batch)
};

struct JobSpec {
  std::string name;
  uint64_t seed = 0;
  std::vector<causal::VariableDecl> variables;  // inputs, mechanisms, output: declaration order
  NetworkSpec network;
  std::vector<SiteSpec> alignment;  // in the order written
  TrainingSpec training;
  EvaluationSpec evaluation;
  ScanSpec scan;
  DasSpec das;
};

// One intervention set, resolved.
struct InterventionSet {
  std::string name;           // variables in declaration order joined by '+'
  std::vector<int> variables; // model variable indices, ascending
};

// A validated job, ready for the trainer.
struct ResolvedJob {
  JobSpec spec;
  std::shared_ptr<const causal::CausalModel> model;
  causal::InputSplit split;
  std::vector<InterventionSet> sets;
  std::vector<int> site_of_variable;  // model variable -> index into spec.alignment, or -1
  uint64_t distinct_eval_triples = 0;
};

// What one job may ask for. graftd refuses a config beyond its settings (configs/graftd.yaml;
// the defaults below are graftd's) with InvalidArgument naming the setting and its value; the
// client's and the worker's checks use None(), the hard caps of the causal model only, since only
// the coordinator knows its own settings.
struct SpecLimits {
  int64_t max_variables = 256;                 // inputs, mechanisms and the output together
  int64_t max_domain_values = 65536;           // values in one variable's domain (declared or inferred)
  int64_t max_table_entries = int64_t{1} << 22;  // entries of all mechanism lookup tables together
  // Combinations of input values (the product of the input domains). Spaces above 2^24 are split by
  // a hash and never listed, so they cost validation nothing.
  int64_t max_input_space = causal::kMaxInputSpace;
  // The largest listed input space (at most causal::kMaxListedInputSpace): validating a listed split
  // costs about 10 bytes and 0.2 microseconds per input (2^24: about 180 MB and 3 s).
  int64_t max_listed_input_space = int64_t{1} << 20;
  // Joint parent values of one mechanism: the entries of its lookup table (at most
  // causal::kMaxParentSpace).
  int64_t max_parent_space = causal::kMaxParentSpace;
  int64_t max_network_parameters = 100000000;  // the network's weights and biases (embeddings included)
  int64_t max_steps = 100000000;               // training.steps, and das.steps

  // No limits beyond the causal model's own caps (causal::kMaxInputSpace, causal::kMaxParentSpace).
  static SpecLimits None();
};

// The network's trainable parameters for `spec` with the model's domain sizes: the embedding rows
// (every input value), each hidden layer's weights and biases, and the output layer's.
int64_t NetworkParameters(const JobSpec& spec, const causal::CausalModel& model);

// The token of a transformer position: the input's place among the model's inputs (declaration
// order), or the number of inputs for "readout"; -1 when it is neither.
int TokenOf(const causal::CausalModel& model, const std::string& position);

// Loads, overrides (each `key.path=value`), validates and resolves a config. Every error is
// InvalidArgument with one line per problem: "FILE:LINE:COL: message" (or "--set #N:1:COL: ...").
// A missing file is NotFound.
absl::StatusOr<ResolvedJob> LoadJob(const std::string& path, const std::vector<std::string>& overrides);
absl::StatusOr<ResolvedJob> LoadJobFromText(const std::string& text, const std::string& source,
                                            const std::vector<std::string>& overrides);
// The same from an already parsed (and overridden) tree, within `limits`.
absl::StatusOr<ResolvedJob> ResolveTree(const ConfigNode& root, const SpecLimits& limits = SpecLimits::None());

// The fully resolved spec as YAML (every field, defaults filled in); loading it gives the same
// JobSpec. Stable: the same spec always gives the same text.
std::string ResolvedSpecYaml(const JobSpec& spec);
// A short hex hash (FNV-1a 64) of ResolvedSpecYaml.
std::string SpecHash(const JobSpec& spec);

// The human summary printed by `graft-worker check`.
std::string Summarize(const ResolvedJob& job);

const char* ToString(EmbeddingInit v);
const char* ToString(Activation v);
const char* ToString(OptimizerType v);
const char* ToString(SourceMode v);

}  // namespace graft::config

#endif  // GRAFT_CONFIGS_READER_SPEC_H_
