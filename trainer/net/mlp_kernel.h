// The training step of the MLP written out by hand: forward pass, cross-entropy losses and
// backward pass over flat float buffers, each linear layer one call of OpenBLAS's cblas_sgemm,
// with the bias, the activation and the interchange overwrite fused into one sweep per layer.
// No autograd graph and no tensor allocation per step. It computes what MlpImpl::StackedForward
// (trainer/net/mlp.h) with LibTorch's autograd computes, which stays the reference: the
// gradients of both agree to float rounding (tests/mlp_kernel_test.cc).
//
// Rows of a step. Below and at the lowest intervened layer `lo` the base rows run once (with
// `sources: independent` the source rows are stacked under them, [2B]); from layer lo on the
// base and intervened rows are stacked [2B], base first; with independent sources and a site
// above lo, the source rows of layers lo+1..hi run on their own [B].
//
// No torch here: include it anywhere. Thread-safety: one kernel per training loop; the sgemm
// calls use OpenBLAS's own thread pool (openblas_set_num_threads).
#ifndef GRAFT_TRAINER_NET_MLP_KERNEL_H_
#define GRAFT_TRAINER_NET_MLP_KERNEL_H_

#include <cstdint>
#include <vector>

namespace graft::net {

enum class KernelActivation { kRelu, kGelu, kTanh };  // gelu: the exact (erf) form, as torch's

struct KernelShape {
  int num_inputs = 0;     // embeddings per example, concatenated in input order
  // Rows of each input in the embedding table, in input order (the table stacks them).
  std::vector<int> input_rows;
  int embedding_dim = 0;
  std::vector<int> hidden;
  int num_classes = 0;
  KernelActivation activation = KernelActivation::kRelu;
};

// Pointers into parameter storage in LibTorch's layouts (row-major): the embedding table
// [rows, dim], hidden layer k's weight [out, in] and bias [out], the head's weight and bias.
// As gradients, `embed` may be null (a frozen embedding gets none).
struct KernelParams {
  float* embed = nullptr;
  std::vector<float*> weight, bias;
  float* out_weight = nullptr;
  float* out_bias = nullptr;
};

// One training batch. `rows` are embedding-table rows (an input's value index plus its row
// offset), num_inputs per example. Without `sets` the step is the plain task loss.
struct KernelBatch {
  int batch = 0;
  const int64_t* rows = nullptr;            // [B * num_inputs]
  const int64_t* labels = nullptr;          // [B] output class of each base
  const int64_t* sets = nullptr;            // [B] intervention set of each example, or null
  const int64_t* source_perm = nullptr;     // sources: in_batch: example i's source is base perm[i]
  const int64_t* source_rows = nullptr;     // sources: independent: [B * num_inputs]
  const int64_t* counterfactual = nullptr;  // [B] counterfactual class of each triple
  bool source_gradients = true;             // gradients flow through the source activations
  double task_weight = 1.0, interchange_weight = 1.0;
};

class MlpKernel {
 public:
  // units[set][layer]: the units (ascending, each below the layer's width) the set overwrites
  // in that layer; a layer with none may be an empty list or missing.
  MlpKernel(KernelShape shape, std::vector<std::vector<std::vector<int>>> units);

  struct Losses {
    double task = 0, interchange = 0;  // mean cross-entropies (interchange 0 without sets)
  };
  // The forward pass and both losses. Keeps what Backward needs.
  Losses Forward(const KernelParams& params, const KernelBatch& batch);
  // The gradient of task_weight * task + interchange_weight * interchange of the last Forward
  // (same params and batch), written over `grads` (not added).
  void Backward(const KernelParams& params, const KernelBatch& batch, const KernelParams& grads);

  // The lowest and highest layer any set overwrites (-1 when none does).
  int lowest_layer() const { return lo_; }
  int highest_layer() const { return hi_; }

 private:
  void Dense(int k, const float* x, int rows, const KernelParams& p, float* z, float* a) const;
  // Bias and activation over layer k's pre-activation (in z for gelu, else in a).
  void Activate(int k, int rows, const KernelParams& p, float* z, float* a) const;
  // Whether layer 0 goes through the projected table (below) for `rows` examples.
  bool Projects(int rows) const { return 2 * embedding_rows_ <= static_cast<int64_t>(rows) * shape_.num_inputs; }
  void ActivationBackward(float* d, const float* a, const float* z, int64_t n) const;
  void LayerBackward(int k, float* d, const float* x, int rows, const KernelParams& p, const KernelParams& g,
                     bool accumulate, float* dx, bool accumulate_dx) const;

  KernelShape shape_;
  std::vector<std::vector<std::vector<int>>> units_;
  int layers_ = 0, lo_ = -1, hi_ = -1;
  int64_t embedding_rows_ = 0;
  std::vector<int> first_row_;  // each input's first table row
  // Layer 0 through the table: when the table has fewer rows than the batch has embeddings,
  // layer 0's pre-activation is the sum of each example's rows of the projected table
  // P = E_j W0_j^T (one small matmul per input j), and its gradients go through the per-row
  // sums of dZ0, instead of three matmuls over the whole batch.
  std::vector<float> projected_, row_grad_;
  bool interchange_ = false;  // the last Forward had sets
  bool independent_ = false;  // ... with independent sources
  int batch_ = 0;
  // Activations (post overwrite) and, for gelu, pre-activations of each layer; the stacked
  // [2B] input of layer lo+1; the independent sources' layers lo+1..hi; logits' gradient.
  std::vector<std::vector<float>> a_, z_, as_, zs_, d_, ds_;
  std::vector<float> x0_, dx0_, stacked_, dstacked_, dlogits_, logits_;
};

}  // namespace graft::net

#endif  // GRAFT_TRAINER_NET_MLP_KERNEL_H_
