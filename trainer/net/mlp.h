// The MLP with per-input embeddings and intervention sites (a SiteNetworkImpl). Layer k's activation is the output
// of hidden layer k after its nonlinearity; an interchange intervention overwrites chosen units
// of chosen layers with a source run's activations and recomputes only the layers above the
// lowest one it touches. Includes torch: include it only from trainer sources.
// Thread-safety: as any torch::nn::Module (no concurrent training of one module).
#ifndef GRAFT_TRAINER_NET_MLP_H_
#define GRAFT_TRAINER_NET_MLP_H_

#include <string>
#include <vector>

#include <torch/torch.h>

#include "trainer/net/network.h"

namespace graft::net {

struct MlpOptions {
  std::vector<int> input_sizes;   // number of values of each input, in declaration order
  std::vector<std::string> input_names;
  int embedding_dim = 8;
  bool fixed_embedding = false;   // frozen N(0, 1) rows instead of learned ones
  std::vector<int> hidden = {64};
  ActivationKind activation = ActivationKind::kRelu;
  int num_classes = 2;
};

class MlpImpl : public SiteNetworkImpl {
 public:
  explicit MlpImpl(const MlpOptions& options);

  const MlpOptions& options() const { return options_; }
  int num_layers() const override { return static_cast<int>(layers_.size()); }
  int64_t layer_units(int k) const override { return options_.hidden[k]; }

  // Embeds input value indices [B, num_inputs] (int64) into [B, num_inputs * dim], the
  // embeddings concatenated in input order.
  torch::Tensor Embed(const torch::Tensor& inputs) override;
  torch::Tensor EmbedRows(const torch::Tensor& rows, int64_t batch) override;
  const torch::Tensor& offsets() const override { return offsets_; }
  torch::Tensor Layer(int k, const torch::Tensor& below) override;
  torch::Tensor Head(const torch::Tensor& last) override;

  // The parameters under the documented export names: embed.<input> [values, dim],
  // hidden.<k>.weight [out, in], hidden.<k>.bias, out.weight, out.bias.
  std::vector<std::pair<std::string, torch::Tensor>> NamedExport() const override;

 private:
  MlpOptions options_;
  torch::Tensor embed_;           // [sum of input sizes, dim], rows of all inputs stacked
  torch::Tensor offsets_;         // [num_inputs] int64: first row of each input
  std::vector<torch::nn::Linear> layers_;
  torch::nn::Linear out_{nullptr};
};
TORCH_MODULE(Mlp);

}  // namespace graft::net

#endif  // GRAFT_TRAINER_NET_MLP_H_
