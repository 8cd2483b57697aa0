// A pre-norm transformer over one token per input (in declaration order) and a final readout
// token, as a SiteNetworkImpl: layer k is the residual stream after block k, its [B, T, width]
// tokens laid end to end as [B, T * width] columns, so a site (position p, unit u) is column
// p * width + u. Full (unmasked) multi-head attention; LayerNorm eps 1e-5; the logits are
// out(LN_final(x[readout])). Includes torch: include it only from trainer sources.
// Thread-safety: as any torch::nn::Module (no concurrent training of one module).
#ifndef GRAFT_TRAINER_NET_TRANSFORMER_H_
#define GRAFT_TRAINER_NET_TRANSFORMER_H_

#include <string>
#include <vector>

#include <torch/torch.h>

#include "trainer/net/network.h"

namespace graft::net {

struct TransformerOptions {
  std::vector<int> input_sizes;  // number of values of each input, in declaration order
  std::vector<std::string> input_names;
  int width = 64;       // residual stream width
  int layers = 2;       // blocks
  int heads = 4;        // REQUIRES: width % heads == 0
  int mlp_width = 256;  // hidden width of each block's MLP
  ActivationKind activation = ActivationKind::kGelu;
  int num_classes = 2;
};

class TransformerImpl : public SiteNetworkImpl {
 public:
  explicit TransformerImpl(const TransformerOptions& options);

  const TransformerOptions& options() const { return options_; }
  int tokens() const { return static_cast<int>(options_.input_sizes.size()) + 1; }
  int num_layers() const override { return options_.layers; }
  int64_t layer_units(int) const override { return int64_t{tokens()} * options_.width; }

  // Token embeddings [B, T * width]: each input's row of embed.<input> plus its position row,
  // then the readout vector plus the last position row.
  torch::Tensor Embed(const torch::Tensor& inputs) override;
  torch::Tensor EmbedRows(const torch::Tensor& rows, int64_t batch) override;
  const torch::Tensor& offsets() const override { return offsets_; }
  // Block k: x = x + Attn(LN1(x)); x = x + MLP(LN2(x)).
  torch::Tensor Layer(int k, const torch::Tensor& below) override;
  torch::Tensor Head(const torch::Tensor& last) override;
  // The last block for the readout token only (its keys and values from every token): the
  // other tokens' outputs of the last block are never read.
  torch::Tensor LastLayerAndHead(int k, const torch::Tensor& below) override;

  // embed.<input> [values, width], pos [T, width], readout [width], block.<k>.ln1.weight|bias,
  // block.<k>.attn.in_proj.weight [3 width, width] (rows q, k, v) and .bias,
  // block.<k>.attn.out_proj.weight|bias, block.<k>.ln2.weight|bias, block.<k>.mlp.fc.weight
  // [mlp_width, width] and .bias, block.<k>.mlp.proj.weight [width, mlp_width] and .bias,
  // ln_final.weight|bias, out.weight [classes, width], out.bias.
  std::vector<std::pair<std::string, torch::Tensor>> NamedExport() const override;

 private:
  struct Block {
    torch::nn::LayerNorm ln1{nullptr}, ln2{nullptr};
    torch::Tensor in_proj_weight, in_proj_bias;
    torch::nn::Linear out_proj{nullptr}, fc{nullptr}, proj{nullptr};
  };
  torch::Tensor FromEmbeddings(const torch::Tensor& e, int64_t batch);
  // Block k on the flattened stream `below` [B, T * width], all rows at once.
  torch::Tensor RunBlock(int k, const torch::Tensor& below);
  // Attention over `normed` [B, T, width] (LN1 of the stream): every token queries, or only
  // the readout token (the last).
  torch::Tensor Attention(Block& b, const torch::Tensor& normed, bool readout_only);
  torch::Tensor BlockMlp(Block& b, const torch::Tensor& x);

  TransformerOptions options_;
  torch::Tensor embed_;    // [sum of input sizes, width], rows of all inputs stacked
  torch::Tensor offsets_;  // [num_inputs] int64: first row of each input
  torch::Tensor pos_;      // [T, width]
  torch::Tensor readout_;  // [width]
  std::vector<Block> blocks_;
  torch::nn::LayerNorm ln_final_{nullptr};
  torch::nn::Linear out_{nullptr};
};
TORCH_MODULE(Transformer);

}  // namespace graft::net

#endif  // GRAFT_TRAINER_NET_TRANSFORMER_H_
