#include "trainer/net/transformer.h"

#include <cmath>
#include <numeric>

namespace graft::net {

namespace F = torch::nn::functional;

TransformerImpl::TransformerImpl(const TransformerOptions& options) : options_(options) {
  const int w = options.width;
  const int total = std::accumulate(options.input_sizes.begin(), options.input_sizes.end(), 0);
  offsets_ = register_buffer("offsets", FirstRows(options.input_sizes));
  // Unit-variance token vectors: the first LayerNorm rescales them anyway, and the residual
  // stream starts at the scale its blocks' outputs have.
  embed_ = register_parameter("embed", torch::randn({total, w}));
  pos_ = register_parameter("pos", torch::randn({tokens(), w}));
  readout_ = register_parameter("readout", torch::randn({w}));
  const auto ln = torch::nn::LayerNormOptions({w}).eps(1e-5);
  for (int k = 0; k < options.layers; ++k) {
    const std::string p = "block" + std::to_string(k) + "_";
    Block b;
    b.ln1 = register_module(p + "ln1", torch::nn::LayerNorm(ln));
    // As torch.nn.MultiheadAttention initialises its packed projection: Xavier uniform, zero bias.
    b.in_proj_weight = register_parameter(p + "in_proj_weight", torch::empty({3 * w, w}));
    torch::nn::init::xavier_uniform_(b.in_proj_weight);
    b.in_proj_bias = register_parameter(p + "in_proj_bias", torch::zeros({3 * w}));
    b.out_proj = register_module(p + "out_proj", torch::nn::Linear(w, w));
    b.ln2 = register_module(p + "ln2", torch::nn::LayerNorm(ln));
    b.fc = register_module(p + "fc", torch::nn::Linear(w, options.mlp_width));
    b.proj = register_module(p + "proj", torch::nn::Linear(options.mlp_width, w));
    blocks_.push_back(b);
  }
  ln_final_ = register_module("ln_final", torch::nn::LayerNorm(ln));
  out_ = register_module("out", torch::nn::Linear(w, options.num_classes));
}

torch::Tensor TransformerImpl::FromEmbeddings(const torch::Tensor& e, int64_t batch) {
  const int w = options_.width;
  torch::Tensor tokens = torch::cat({e.view({batch, -1, w}), readout_.view({1, 1, w}).expand({batch, 1, w})}, 1);
  return (tokens + pos_).view({batch, -1});
}

torch::Tensor TransformerImpl::Embed(const torch::Tensor& inputs) {
  torch::Tensor rows = (inputs + offsets_).reshape({-1});
  return FromEmbeddings(embed_.index_select(0, rows), inputs.size(0));
}

torch::Tensor TransformerImpl::EmbedRows(const torch::Tensor& rows, int64_t batch) {
  return FromEmbeddings(embed_.index_select(0, rows), batch);
}

torch::Tensor TransformerImpl::Attention(Block& b, const torch::Tensor& normed, bool readout_only) {
  const int w = options_.width, h = options_.heads, d = w / h;
  const int64_t batch = normed.size(0), t = normed.size(1);
  torch::Tensor q, k, v;
  if (readout_only) {
    torch::Tensor kv = F::linear(normed, b.in_proj_weight.narrow(0, w, 2 * w), b.in_proj_bias.narrow(0, w, 2 * w));
    k = kv.narrow(2, 0, w);
    v = kv.narrow(2, w, w);
    q = F::linear(normed.narrow(1, t - 1, 1), b.in_proj_weight.narrow(0, 0, w), b.in_proj_bias.narrow(0, 0, w));
  } else {
    torch::Tensor qkv = F::linear(normed, b.in_proj_weight, b.in_proj_bias);
    q = qkv.narrow(2, 0, w);
    k = qkv.narrow(2, w, w);
    v = qkv.narrow(2, 2 * w, w);
  }
  const int64_t tq = q.size(1);
  auto heads = [&](const torch::Tensor& x, int64_t len) { return x.reshape({batch, len, h, d}).transpose(1, 2); };
  // Scaled dot-product attention over every token, scores [B, heads, Tq, T].
  torch::Tensor scores = torch::matmul(heads(q, tq), heads(k, t).transpose(2, 3)) * (1.0 / std::sqrt(double(d)));
  torch::Tensor context = torch::matmul(torch::softmax(scores, -1), heads(v, t));
  return b.out_proj->forward(context.transpose(1, 2).reshape({batch, tq, w}));
}

torch::Tensor TransformerImpl::BlockMlp(Block& b, const torch::Tensor& x) {
  return b.proj->forward(Activate(options_.activation, b.fc->forward(x)));
}

torch::Tensor TransformerImpl::Layer(int k, const torch::Tensor& below) {
  const int64_t batch = below.size(0);
  // Without autograd (evaluation) the rows are independent, so a large batch runs in slices:
  // the block's [rows, tokens, mlp_width] intermediates stay small (a 9-input job at width 128
  // evaluates 8192 triples at a time).
  constexpr int64_t kInferenceRows = 1024;
  if (!torch::GradMode::is_enabled() && batch > kInferenceRows) {
    std::vector<torch::Tensor> parts;
    for (int64_t at = 0; at < batch; at += kInferenceRows) {
      parts.push_back(RunBlock(k, below.narrow(0, at, std::min(kInferenceRows, batch - at))));
    }
    return torch::cat(parts);
  }
  return RunBlock(k, below);
}

torch::Tensor TransformerImpl::RunBlock(int k, const torch::Tensor& below) {
  Block& b = blocks_[k];
  const int64_t batch = below.size(0);
  torch::Tensor x = below.reshape({batch, tokens(), options_.width});
  x = x + Attention(b, b.ln1->forward(x), /*readout_only=*/false);
  x = x + BlockMlp(b, b.ln2->forward(x));
  return x.view({batch, -1});
}

torch::Tensor TransformerImpl::Head(const torch::Tensor& last) {
  const int64_t batch = last.size(0);
  torch::Tensor r = last.reshape({batch, tokens(), options_.width}).select(1, tokens() - 1);
  return out_->forward(ln_final_->forward(r));
}

torch::Tensor TransformerImpl::LastLayerAndHead(int k, const torch::Tensor& below) {
  Block& b = blocks_[k];
  const int64_t batch = below.size(0);
  torch::Tensor x = below.reshape({batch, tokens(), options_.width});
  torch::Tensor r = x.narrow(1, tokens() - 1, 1) + Attention(b, b.ln1->forward(x), /*readout_only=*/true);
  r = r + BlockMlp(b, b.ln2->forward(r));
  return out_->forward(ln_final_->forward(r.squeeze(1)));
}

std::vector<std::pair<std::string, torch::Tensor>> TransformerImpl::NamedExport() const {
  std::vector<std::pair<std::string, torch::Tensor>> out;
  int64_t at = 0;
  for (size_t i = 0; i < options_.input_sizes.size(); ++i) {
    out.emplace_back("embed." + options_.input_names[i], embed_.narrow(0, at, options_.input_sizes[i]));
    at += options_.input_sizes[i];
  }
  out.emplace_back("pos", pos_);
  out.emplace_back("readout", readout_);
  for (size_t k = 0; k < blocks_.size(); ++k) {
    const Block& b = blocks_[k];
    const std::string p = "block." + std::to_string(k) + ".";
    out.emplace_back(p + "ln1.weight", b.ln1->weight);
    out.emplace_back(p + "ln1.bias", b.ln1->bias);
    out.emplace_back(p + "attn.in_proj.weight", b.in_proj_weight);
    out.emplace_back(p + "attn.in_proj.bias", b.in_proj_bias);
    out.emplace_back(p + "attn.out_proj.weight", b.out_proj->weight);
    out.emplace_back(p + "attn.out_proj.bias", b.out_proj->bias);
    out.emplace_back(p + "ln2.weight", b.ln2->weight);
    out.emplace_back(p + "ln2.bias", b.ln2->bias);
    out.emplace_back(p + "mlp.fc.weight", b.fc->weight);
    out.emplace_back(p + "mlp.fc.bias", b.fc->bias);
    out.emplace_back(p + "mlp.proj.weight", b.proj->weight);
    out.emplace_back(p + "mlp.proj.bias", b.proj->bias);
  }
  out.emplace_back("ln_final.weight", ln_final_->weight);
  out.emplace_back("ln_final.bias", ln_final_->bias);
  out.emplace_back("out.weight", out_->weight);
  out.emplace_back("out.bias", out_->bias);
  return out;
}

}  // namespace graft::net
