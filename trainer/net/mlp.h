// The MLP with per-input embeddings and intervention sites. Layer k's activation is the output
// of hidden layer k after its nonlinearity; an interchange intervention overwrites chosen units
// of chosen layers with a source run's activations and recomputes only the layers above the
// lowest one it touches. Includes torch: include it only from trainer sources.
// Thread-safety: as any torch::nn::Module (no concurrent training of one module).
#ifndef GRAFT_TRAINER_NET_MLP_H_
#define GRAFT_TRAINER_NET_MLP_H_

#include <string>
#include <vector>

#include <torch/torch.h>

namespace graft::net {

enum class ActivationKind { kRelu, kGelu, kTanh };

struct MlpOptions {
  std::vector<int> input_sizes;   // number of values of each input, in declaration order
  std::vector<std::string> input_names;
  int embedding_dim = 8;
  bool fixed_embedding = false;   // frozen N(0, 1) rows instead of learned ones
  std::vector<int> hidden = {64};
  ActivationKind activation = ActivationKind::kRelu;
  int num_classes = 2;
};

// Which units of which layers an intervention overwrites, per example of a batch.
struct InterventionMasks {
  int lowest_layer = -1;                 // -1: nothing is intervened
  std::vector<torch::Tensor> per_layer;  // per layer: [B, width] bool, or undefined if untouched
};

class MlpImpl : public torch::nn::Module {
 public:
  explicit MlpImpl(const MlpOptions& options);

  const MlpOptions& options() const { return options_; }
  int num_layers() const { return static_cast<int>(layers_.size()); }

  // Embeds input value indices [B, num_inputs] (int64) into [B, num_inputs * dim], the
  // embeddings concatenated in input order.
  torch::Tensor Embed(const torch::Tensor& inputs);
  // The same from embedding rows (value index + the input's row offset), flattened [B * num_inputs]:
  // a caller that precomputes rows saves the addition.
  torch::Tensor EmbedRows(const torch::Tensor& rows, int64_t batch);
  // Each input's first row in the embedding table [num_inputs] (int64).
  const torch::Tensor& offsets() const { return offsets_; }
  // Activations of layers 0..upto (inclusive) for the embedded batch.
  std::vector<torch::Tensor> Hidden(const torch::Tensor& embedded, int upto);
  // Layer k's activation from layer k-1's (k = 0: from the embedding).
  torch::Tensor Layer(int k, const torch::Tensor& below);
  // Logits from the last layer's activation.
  torch::Tensor Head(const torch::Tensor& last);
  // Logits of the plain run.
  torch::Tensor forward(const torch::Tensor& inputs);

  // Logits of the intervened run. `base` and `source` hold the activations of every layer
  // from 0 to at least the highest masked layer (base: all layers; layers below the lowest
  // intervened one are not read, so callers may leave them undefined). Units where the mask
  // is true take the source's activation; the rest are recomputed from the layer below.
  torch::Tensor Intervened(const std::vector<torch::Tensor>& base, const std::vector<torch::Tensor>& source,
                           const InterventionMasks& masks);

  // The base run and the intervened run of one batch in a single pass, as training uses them:
  // layers up to masks.lowest_layer run once on the base batch; from there on the base and
  // intervened rows are stacked [2B, width] so each layer is one matmul. Sources for a masked
  // layer k are `source[k]`, or, when `source_perm` is defined (in-batch sources), the base's
  // own activation at k permuted by it (detached unless `source_gradients`). Returns logits
  // [2B, classes], base rows first. REQUIRES: masks.lowest_layer >= 0.
  torch::Tensor StackedForward(const torch::Tensor& embedded, const InterventionMasks& masks,
                               const std::vector<torch::Tensor>& source, const torch::Tensor& source_perm,
                               bool source_gradients);

  // The parameters under the documented export names: embed.<input> [values, dim],
  // hidden.<k>.weight [out, in], hidden.<k>.bias, out.weight, out.bias.
  std::vector<std::pair<std::string, torch::Tensor>> NamedExport() const;

 private:
  torch::Tensor Activate(const torch::Tensor& x) const;

  MlpOptions options_;
  torch::Tensor embed_;           // [sum of input sizes, dim], rows of all inputs stacked
  torch::Tensor offsets_;         // [num_inputs] int64: first row of each input
  std::vector<torch::nn::Linear> layers_;
  torch::nn::Linear out_{nullptr};
};
TORCH_MODULE(Mlp);

}  // namespace graft::net

#endif  // GRAFT_TRAINER_NET_MLP_H_
