// The trainer's fast training step: the hand-written MLP pass (trainer/net/mlp_kernel.h) on
// the network's own parameter and gradient buffers, then the flat optimiser's step. It computes
// what the trainer's LibTorch step computes (the reference, still used for other network kinds
// and with GRAFT_REFERENCE_STEP=1) from the same batch, sets and sources.
// Includes torch: trainer sources only. Thread-safety: one per training loop.
#ifndef GRAFT_TRAINER_TRAIN_KERNEL_STEP_H_
#define GRAFT_TRAINER_TRAIN_KERNEL_STEP_H_

#include <memory>
#include <utility>
#include <vector>

#include <torch/torch.h>

#include "configs/reader/spec.h"
#include "trainer/net/mlp_kernel.h"
#include "trainer/train/evaluation.h"
#include "trainer/train/flat_optimizer.h"

namespace graft::train {

class KernelStep {
 public:
  // The step for `network`, or null when the kernel does not cover it (not an MLP). Its
  // trainable parameters must already live in `optimizer`'s buffers (pointers are taken once;
  // loading a checkpoint into them in place is fine). `labels` must outlive the step.
  static std::unique_ptr<KernelStep> Create(const config::ResolvedJob& job, torch::nn::Module& network,
                                            const LabelTables& labels, FlatOptimizer& optimizer);

  // One optimiser step on the base inputs `base` (input numbers). With interchange, `sets`
  // holds each example's intervention set and either `perm` (in-batch sources: example i's
  // source is base[perm[i]]) or `sources` (independent: input numbers) is filled; without,
  // `sets` is empty. Returns the task and interchange losses; when either is not finite the
  // parameters are left as they were.
  std::pair<double, double> Step(const std::vector<int64_t>& base, const std::vector<int64_t>& sets,
                                 const std::vector<int64_t>& perm, const std::vector<int64_t>& sources);

 private:
  KernelStep(const config::ResolvedJob& job, net::KernelShape shape, std::vector<std::vector<std::vector<int>>> units,
             const LabelTables& labels, FlatOptimizer& optimizer, torch::Tensor offsets);
  // Embedding rows [B * num_inputs] and output labels of input numbers.
  void RowsAndLabels(const std::vector<int64_t>& numbers, std::vector<int64_t>* rows, std::vector<int64_t>* labels);

  const config::ResolvedJob& job_;
  const LabelTables& labels_;
  FlatOptimizer& optimizer_;
  net::MlpKernel kernel_;
  net::KernelParams params_, grads_;
  torch::Tensor offsets_;  // each input's first embedding row
  int num_inputs_ = 0;
  int64_t space_ = 0;
  // For a small input space: every input's embedding rows and label; for few enough triples,
  // every (set, base, source) triple's counterfactual label. Empty when too large.
  std::vector<int64_t> all_rows_, all_labels_, all_counterfactuals_;
  std::vector<int64_t> rows_, labels_out_, source_rows_, counterfactual_, source_numbers_;
};

}  // namespace graft::train

#endif  // GRAFT_TRAINER_TRAIN_KERNEL_STEP_H_
