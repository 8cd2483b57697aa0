// The one interface every network kind implements, so the trainer, evaluation, scan and DAS
// never branch on the kind beyond building it. A network is a stack of layers whose outputs are
// the intervention sites: layer k's activation is a [B, layer_units(k)] tensor (an MLP's hidden
// layer; a transformer's residual stream after block k with its tokens laid end to end), and a
// site is a set of its columns. Includes torch: include it only from trainer sources.
// Thread-safety: as any torch::nn::Module (no concurrent training of one module).
#ifndef GRAFT_TRAINER_NET_NETWORK_H_
#define GRAFT_TRAINER_NET_NETWORK_H_

#include <cstdint>
#include <memory>
#include <string>
#include <utility>
#include <vector>

#include <torch/torch.h>

namespace graft::net {

enum class ActivationKind { kRelu, kGelu, kTanh };

// relu, exact (erf) gelu, or tanh.
torch::Tensor Activate(ActivationKind kind, const torch::Tensor& x);

// Each input's first row [num_inputs] (int64) in one embedding table holding every input's rows
// stacked in input order (input i has input_sizes[i] rows).
torch::Tensor FirstRows(const std::vector<int>& input_sizes);

// Which units of which layers an intervention overwrites, per example of a batch.
struct InterventionMasks {
  int lowest_layer = -1;                 // -1: nothing is intervened
  std::vector<torch::Tensor> per_layer;  // per layer: [B, units] bool, or undefined if untouched
};

class SiteNetworkImpl : public torch::nn::Module {
 public:
  ~SiteNetworkImpl() override = default;

  virtual int num_layers() const = 0;
  // Columns of layer k's activation (the units a site may name, flattened).
  virtual int64_t layer_units(int k) const = 0;

  // The representation layer 0 reads, for input value indices [B, num_inputs] (int64).
  virtual torch::Tensor Embed(const torch::Tensor& inputs) = 0;
  // The same from embedding rows (value index + the input's row offset), flattened
  // [B * num_inputs]: a caller that precomputes rows saves the addition.
  virtual torch::Tensor EmbedRows(const torch::Tensor& rows, int64_t batch) = 0;
  // Each input's first row in the embedding table [num_inputs] (int64).
  virtual const torch::Tensor& offsets() const = 0;
  // Layer k's activation from layer k-1's (k = 0: from the embedding).
  virtual torch::Tensor Layer(int k, const torch::Tensor& below) = 0;
  // Logits from the last layer's activation.
  virtual torch::Tensor Head(const torch::Tensor& last) = 0;
  // Head(Layer(k, below)) for the last layer k; a network may compute only what the head reads.
  virtual torch::Tensor LastLayerAndHead(int k, const torch::Tensor& below) { return Head(Layer(k, below)); }
  // The parameters under their documented export names (README, weights.pt).
  virtual std::vector<std::pair<std::string, torch::Tensor>> NamedExport() const = 0;

  // Activations of layers 0..upto (inclusive) for the embedded batch.
  std::vector<torch::Tensor> Hidden(const torch::Tensor& embedded, int upto);
  // Logits of the plain run from the embedding.
  torch::Tensor Logits(const torch::Tensor& embedded);
  // Logits of the plain run.
  torch::Tensor forward(const torch::Tensor& inputs) { return Logits(Embed(inputs)); }

  // Logits of the intervened run. `base` and `source` hold the activations of every layer
  // from 0 to at least the highest masked layer (base: all layers; layers below the lowest
  // intervened one are not read, so callers may leave them undefined). Units where the mask
  // is true take the source's activation; the rest are recomputed from the layer below.
  torch::Tensor Intervened(const std::vector<torch::Tensor>& base, const std::vector<torch::Tensor>& source,
                           const InterventionMasks& masks);

  // The base run and the intervened run of one batch in a single pass, as training uses them:
  // layers up to masks.lowest_layer run once on the base batch; from there on the base and
  // intervened rows are stacked [2B, units] so each layer is one pass. Sources for a masked
  // layer k are `source[k]`, or, when `source_perm` is defined (in-batch sources), the base's
  // own activation at k permuted by it (detached unless `source_gradients`). Returns logits
  // [2B, classes], base rows first. REQUIRES: masks.lowest_layer >= 0.
  torch::Tensor StackedForward(const torch::Tensor& embedded, const InterventionMasks& masks,
                               const std::vector<torch::Tensor>& source, const torch::Tensor& source_perm,
                               bool source_gradients);

 private:
  bool Masked(const InterventionMasks& masks, int k) const {
    return k < static_cast<int>(masks.per_layer.size()) && masks.per_layer[k].defined();
  }
};

using SiteNetwork = std::shared_ptr<SiteNetworkImpl>;

}  // namespace graft::net

#endif  // GRAFT_TRAINER_NET_NETWORK_H_
