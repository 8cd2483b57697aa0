// Evaluation pieces shared by the trainer (trainer.cc) and the analysis commands (analysis.cc):
// counterfactual labels by batched gathers, the network a spec starts from, the held-out
// triples, unit-site masks, IIA with intervals, the confusion table, failing triples and the
// random-units control. Private to graft_train: includes torch and nlohmann/json.
// Thread-safety: values and functions on caller-owned data; no shared state.
#ifndef GRAFT_TRAINER_TRAIN_EVALUATION_H_
#define GRAFT_TRAINER_TRAIN_EVALUATION_H_

#include <functional>
#include <string>
#include <vector>

#include <torch/torch.h>

#include "absl/status/status.h"
#include "nlohmann/json.hpp"
#include "trainer/causal/model.h"
#include "trainer/eval/wilson.h"
#include "trainer/net/mlp.h"
#include "trainer/net/network.h"
#include "configs/reader/spec.h"

namespace graft::train {

using ReportJson = nlohmann::ordered_json;  // keys in the order written

// Counterfactual labels by batched gathers over the compiled tables. Holds a reference to
// `model`, which must outlive it.
class LabelTables {
 public:
  LabelTables(const causal::CausalModel& model, const std::vector<config::InterventionSet>& sets) : model_(model) {
    const int n = model.num_variables();
    tables_.resize(n);
    strides_.resize(n);
    in_set_.resize(n);
    for (int v = 0; v < n; ++v) {
      const causal::Variable& var = model.variable(v);
      if (var.role == causal::Role::kInput) continue;
      std::vector<int64_t> table(var.table.begin(), var.table.end());
      tables_[v] = torch::tensor(table, torch::kInt64);
      strides_[v] = var.strides;
      std::vector<uint8_t> member(sets.size(), 0);
      bool any = false;
      for (size_t s = 0; s < sets.size(); ++s) {
        if (std::find(sets[s].variables.begin(), sets[s].variables.end(), v) != sets[s].variables.end()) {
          member[s] = 1;
          any = true;
        }
      }
      if (any) in_set_[v] = torch::tensor(std::vector<int64_t>(member.begin(), member.end()), torch::kInt64).to(torch::kBool);
    }
    std::vector<int64_t> sizes, strides;
    int64_t stride = 1;
    for (int k = static_cast<int>(model.inputs().size()) - 1; k >= 0; --k) {
      sizes.insert(sizes.begin(), model.variable(model.inputs()[k]).domain.size());
      strides.insert(strides.begin(), stride);
      stride *= sizes.front();
    }
    input_sizes_ = torch::tensor(sizes, torch::kInt64);
    input_strides_ = torch::tensor(strides, torch::kInt64);
    num_sets_ = static_cast<int64_t>(sets.size());
    Precompute();
  }

  // Input value indices [B, num_inputs] of input numbers [B]: one gather from the precomputed
  // table when the input space is small, else decoded.
  torch::Tensor Inputs(const torch::Tensor& numbers) const {
    return all_inputs_.defined() ? all_inputs_.index_select(0, numbers) : Decode(numbers);
  }
  // The output's value index [B] for input numbers [B] (with their value indices `inputs`).
  torch::Tensor OutputLabels(const torch::Tensor& numbers, const torch::Tensor& inputs) const {
    return all_labels_.defined() ? all_labels_.index_select(0, numbers) : Values(inputs)[model_.output()];
  }
  // Counterfactual output labels [B] of (base, source, set) triples: one gather from the
  // precomputed table of every triple when it is small enough, else the mechanism tables.
  torch::Tensor Counterfactual(const torch::Tensor& base, const torch::Tensor& source, const torch::Tensor& set_index,
                               const torch::Tensor& base_inputs, const torch::Tensor& source_inputs) const {
    if (all_counterfactuals_.defined()) {
      const int64_t n = model_.input_space_size();
      return all_counterfactuals_.index_select(0, (set_index * n + base) * n + source);
    }
    std::vector<torch::Tensor> src = Values(source_inputs);
    return Values(base_inputs, &src, &set_index)[model_.output()];
  }

  // Input value indices [B, num_inputs] of input numbers [B].
  torch::Tensor Decode(const torch::Tensor& numbers) const {
    return torch::remainder(torch::floor_divide(numbers.unsqueeze(1), input_strides_), input_sizes_);
  }

  // Values of every variable (one [B] tensor per variable) for inputs [B, num_inputs]; with
  // `source` and `set_index` given, the variables of each example's set take the source's values.
  std::vector<torch::Tensor> Values(const torch::Tensor& inputs, const std::vector<torch::Tensor>* source = nullptr,
                             const torch::Tensor* set_index = nullptr) const {
    const int n = model_.num_variables();
    std::vector<torch::Tensor> cols(n);
    for (size_t k = 0; k < model_.inputs().size(); ++k) cols[model_.inputs()[k]] = inputs.select(1, k);
    for (int v : model_.topological_order()) {
      const causal::Variable& var = model_.variable(v);
      if (var.role == causal::Role::kInput) continue;
      torch::Tensor idx;
      for (size_t p = 0; p < var.parents.size(); ++p) {
        torch::Tensor term = strides_[v][p] == 1 ? cols[var.parents[p]] : cols[var.parents[p]] * strides_[v][p];
        idx = idx.defined() ? idx + term : term;
      }
      torch::Tensor value = idx.defined() ? tables_[v].index_select(0, idx)
                                   : tables_[v].expand({inputs.size(0)});
      if (source != nullptr && in_set_[v].defined()) {
        value = torch::where(in_set_[v].index_select(0, *set_index), (*source)[v], value);
      }
      cols[v] = value;
    }
    return cols;
  }

 private:
  // Largest tables kept in memory: inputs x num_inputs and sets x inputs^2 entries (int64).
  static constexpr int64_t kMaxPrecomputedInputs = int64_t{1} << 20;
  static constexpr int64_t kMaxPrecomputedTriples = int64_t{1} << 22;

  void Precompute() {
    torch::NoGradGuard no_grad;
    const int64_t n = model_.input_space_size();
    if (n > kMaxPrecomputedInputs) return;
    torch::Tensor numbers = torch::arange(n, torch::kInt64);
    all_inputs_ = Decode(numbers);
    std::vector<torch::Tensor> vals = Values(all_inputs_);
    all_labels_ = vals[model_.output()].contiguous();
    if (num_sets_ == 0 || num_sets_ * n * n > kMaxPrecomputedTriples) return;
    // Row (set, base) holds the counterfactual label for every source.
    std::vector<torch::Tensor> rows;
    for (int64_t s = 0; s < num_sets_; ++s) {
      torch::Tensor set_index = torch::full({n * n}, s, torch::kInt64);
      torch::Tensor base = numbers.repeat_interleave(n);
      torch::Tensor source = numbers.repeat({n});
      std::vector<torch::Tensor> src;
      for (const auto& v : vals) src.push_back(v.index_select(0, source));
      rows.push_back(Values(all_inputs_.index_select(0, base), &src, &set_index)[model_.output()]);
    }
    all_counterfactuals_ = torch::cat(rows).contiguous();
  }

  const causal::CausalModel& model_;
  std::vector<torch::Tensor> tables_;
  std::vector<std::vector<int64_t>> strides_;
  std::vector<torch::Tensor> in_set_;
  torch::Tensor input_sizes_, input_strides_;
  int64_t num_sets_ = 0;
  torch::Tensor all_inputs_;           // [N, num_inputs], or undefined when N is large
  torch::Tensor all_labels_;           // [N]
  torch::Tensor all_counterfactuals_;  // [sets * N * N], or undefined when too large
};

// Where one variable's units are: a layer and columns of its activation (layer -1: not
// aligned). A transformer's column of (token t, unit u) is t * width + u.
struct UnitSite {
  int layer = -1;
  std::vector<int> units;
};

// The config's alignment, indexed by model variable.
std::vector<UnitSite> AlignmentSites(const config::ResolvedJob& job);
// The columns of `site`'s units at its positions (an MLP's units as they are), ascending.
std::vector<int> SiteColumns(const config::ResolvedJob& job, const config::SiteSpec& site);
// Columns of each layer's activation (net::SiteNetworkImpl::layer_units of the job's network).
std::vector<int> LayerColumns(const config::ResolvedJob& job);

// Per-layer unit masks of a list of intervention sets over given sites.
class UnitMasks {
 public:
  UnitMasks(const std::vector<config::InterventionSet>& sets, const std::vector<UnitSite>& sites,
            const std::vector<int>& widths);
  int lowest_layer() const { return lowest_; }
  int highest_layer() const { return highest_; }
  // The masks of each example's set, set_index [B] (int64 indices into the sets).
  net::InterventionMasks ForSets(const torch::Tensor& set_index) const;
  // Intervened logits for base and source inputs [B, I] (value indices); `base_logits` (may be
  // null) receives the base run's logits.
  torch::Tensor Logits(net::SiteNetworkImpl& net, const torch::Tensor& base_in, const torch::Tensor& source_in,
                       const torch::Tensor& set_index, torch::Tensor* base_logits) const;

 private:
  std::vector<torch::Tensor> per_layer_;  // [num_sets, width] bool, or undefined
  int lowest_ = -1, highest_ = -1;
};

// The job's network before training: torch::manual_seed(spec.seed), then the network of
// network.type, exactly as the trainer builds it, so its IIA is the run's step-0 IIA.
net::SiteNetwork CreateNetwork(const config::ResolvedJob& job);
// The same for an MLP job (REQUIRES: network.type mlp).
net::Mlp CreateMlp(const config::ResolvedJob& job);

// The fixed evaluation data of a job: input numbers for task accuracy on training and held-out
// inputs (each capped at evaluation.triples, seeded) and the held-out (base, source, set) triples.
struct EvalInputs {
  torch::Tensor train, test;         // input numbers
  torch::Tensor base, source, set;   // triples: input numbers and set indices
};
EvalInputs CreateEvalInputs(const config::ResolvedJob& job);

// Intervened logits for decoded base and source inputs [B, I] and set indices [B].
using IntervenedLogitsFn =
    std::function<torch::Tensor(const torch::Tensor& base_in, const torch::Tensor& source_in, const torch::Tensor& set)>;

// What EvaluateTriples adds beyond the accuracies.
struct TripleDetail {
  bool confusion = false;  // add "confusion": per set, counterfactual class x predicted class
  int max_failures = 0;    // append up to this many failing triples as JSON lines to `failures`
};

// IIA over the triples (base, source: input numbers; set: indices into `sets`): "iia_held_out",
// "iia_changed_held_out", "iia_by_set" (keyed by set name), "unchanged_floor", and "confusion"
// when asked. Each accuracy is {"value", "lo", "hi", "correct", "n"} with 95% Wilson bounds.
ReportJson EvaluateTriples(const causal::CausalModel& model, const std::vector<config::InterventionSet>& sets,
                           const LabelTables& labels, const torch::Tensor& base, const torch::Tensor& source,
                           const torch::Tensor& set, const IntervenedLogitsFn& logits, const TripleDetail& detail,
                           std::vector<std::string>* failures);

// Everything an evaluation line reports about the network: "acc_train", "acc_held_out", then the
// keys of EvaluateTriples over the job's held-out triples and sets.
ReportJson EvaluateNetwork(const config::ResolvedJob& job, net::SiteNetworkImpl& net, const LabelTables& labels,
                           const EvalInputs& inputs, const IntervenedLogitsFn& logits);

// The random-units control: per aligned variable the same number of units in the same layer
// (a transformer's: at the same positions, the same drawn units at each), drawn (seeded by
// spec.seed) from the layer's units outside the real alignment when enough are free, else from
// units no other control variable took. Indexed by model variable; units are columns.
std::vector<UnitSite> RandomUnitSites(const config::ResolvedJob& job);

// The controls of a final report for the network as it is now: "confusion" (real alignment),
// "control_random_units" ({"sites", "iia_held_out", "iia_changed_held_out", "iia_by_set"}), and up to 200
// failing triples of the real alignment appended to `failures` as JSON lines.
ReportJson FinalControls(const config::ResolvedJob& job, net::SiteNetworkImpl& net, const LabelTables& labels,
                         const EvalInputs& inputs, std::vector<std::string>* failures);

// Writes `text` to `path` through a temporary file and a rename. Errors name the file.
absl::Status WriteFileAtomically(const std::string& path, const std::string& text);

ReportJson AccuracyReport(const eval::Accuracy& a);

}  // namespace graft::train

#endif  // GRAFT_TRAINER_TRAIN_EVALUATION_H_
