// Adam and SGD (with momentum) over one flat buffer: every trainable parameter becomes a view
// into a single contiguous tensor and its gradient a view into another, so zeroing the
// gradients is one operation and an optimiser step one fused sweep over the buffers (split
// across torch's intra-op threads) instead of several tensor operations per parameter. The
// arithmetic is torch.optim.Adam's / torch.optim.SGD's (no amsgrad, no
// dampening, no Nesterov), which tests check against LibTorch's own optimisers.
// Includes torch: trainer sources only. Thread-safety: none (one training loop).
#ifndef GRAFT_TRAINER_TRAIN_FLAT_OPTIMIZER_H_
#define GRAFT_TRAINER_TRAIN_FLAT_OPTIMIZER_H_

#include <vector>

#include <torch/torch.h>

namespace graft::train {

struct FlatOptimizerOptions {
  bool adam = true;           // false: SGD with momentum
  double lr = 0.001;
  double weight_decay = 0.0;  // L2, added to the gradient as torch does
  double beta1 = 0.9, beta2 = 0.999, eps = 1e-8;  // Adam (torch's defaults)
  double momentum = 0.9;      // SGD
};

class FlatOptimizer {
 public:
  // Re-seats `params` (which must require grad) as views into one buffer, keeping their values,
  // and gives each a gradient that is a view into one gradient buffer.
  FlatOptimizer(const std::vector<torch::Tensor>& params, const FlatOptimizerOptions& options);

  void ZeroGrad();
  // One step with the gradients accumulated since ZeroGrad.
  void Step();

  // Optimiser state (step count and moments) for checkpoints.
  void Save(torch::serialize::OutputArchive& archive) const;
  void Load(torch::serialize::InputArchive& archive);

  int64_t steps() const { return step_; }

 private:
  FlatOptimizerOptions options_;
  torch::Tensor params_, grads_;  // flat
  torch::Tensor m_, v_;           // Adam moments, or m_ = SGD momentum buffer
  int64_t step_ = 0;
};

}  // namespace graft::train

#endif  // GRAFT_TRAINER_TRAIN_FLAT_OPTIMIZER_H_
