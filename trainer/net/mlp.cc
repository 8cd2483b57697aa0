#include "trainer/net/mlp.h"

#include <numeric>

namespace graft::net {

MlpImpl::MlpImpl(const MlpOptions& options) : options_(options) {
  const int total = std::accumulate(options.input_sizes.begin(), options.input_sizes.end(), 0);
  std::vector<int64_t> offsets;
  int64_t at = 0;
  for (int size : options.input_sizes) {
    offsets.push_back(at);
    at += size;
  }
  offsets_ = register_buffer("offsets", torch::tensor(offsets, torch::kInt64));
  embed_ = register_parameter("embed", torch::randn({total, options.embedding_dim}),
                              /*requires_grad=*/!options.fixed_embedding);
  int in = static_cast<int>(options.input_sizes.size()) * options.embedding_dim;
  for (size_t k = 0; k < options.hidden.size(); ++k) {
    layers_.push_back(register_module("hidden" + std::to_string(k),
                                      torch::nn::Linear(torch::nn::LinearOptions(in, options.hidden[k]))));
    in = options.hidden[k];
  }
  out_ = register_module("out", torch::nn::Linear(torch::nn::LinearOptions(in, options.num_classes)));
}

torch::Tensor MlpImpl::Activate(const torch::Tensor& x) const {
  switch (options_.activation) {
    case ActivationKind::kRelu: return torch::relu(x);
    case ActivationKind::kGelu: return torch::gelu(x);
    case ActivationKind::kTanh: return torch::tanh(x);
  }
  return x;
}

torch::Tensor MlpImpl::Embed(const torch::Tensor& inputs) {
  // One gather for all inputs: row = offset of the input + value index.
  torch::Tensor rows = (inputs + offsets_).reshape({-1});
  return embed_.index_select(0, rows).reshape({inputs.size(0), -1});
}

torch::Tensor MlpImpl::EmbedRows(const torch::Tensor& rows, int64_t batch) {
  return embed_.index_select(0, rows).reshape({batch, -1});
}

torch::Tensor MlpImpl::Layer(int k, const torch::Tensor& below) { return Activate(layers_[k]->forward(below)); }

std::vector<torch::Tensor> MlpImpl::Hidden(const torch::Tensor& embedded, int upto) {
  std::vector<torch::Tensor> acts;
  acts.reserve(upto + 1);
  torch::Tensor h = embedded;
  for (int k = 0; k <= upto; ++k) {
    h = Layer(k, h);
    acts.push_back(h);
  }
  return acts;
}

torch::Tensor MlpImpl::Head(const torch::Tensor& last) { return out_->forward(last); }

torch::Tensor MlpImpl::forward(const torch::Tensor& inputs) {
  return Head(Hidden(Embed(inputs), num_layers() - 1).back());
}

torch::Tensor MlpImpl::Intervened(const std::vector<torch::Tensor>& base, const std::vector<torch::Tensor>& source,
                                  const InterventionMasks& masks) {
  const int lo = masks.lowest_layer;
  if (lo < 0) return Head(base.back());
  torch::Tensor h;
  for (int k = lo; k < num_layers(); ++k) {
    h = k == lo ? base[k] : Layer(k, h);
    if (k < static_cast<int>(masks.per_layer.size()) && masks.per_layer[k].defined()) {
      h = torch::where(masks.per_layer[k], source[k], h);
    }
  }
  return Head(h);
}

torch::Tensor MlpImpl::StackedForward(const torch::Tensor& embedded, const InterventionMasks& masks,
                                      const std::vector<torch::Tensor>& source, const torch::Tensor& source_perm,
                                      bool source_gradients) {
  const int lo = masks.lowest_layer;
  const int64_t b = embedded.size(0);
  auto source_at = [&](int k, const torch::Tensor& base_k) {
    if (!source_perm.defined()) return source[k];
    torch::Tensor s = base_k.index_select(0, source_perm);
    return source_gradients ? s : s.detach();
  };
  torch::Tensor h = embedded;
  for (int k = 0; k <= lo; ++k) h = Layer(k, h);
  torch::Tensor stacked = torch::cat({h, torch::where(masks.per_layer[lo], source_at(lo, h), h)});
  for (int k = lo + 1; k < num_layers(); ++k) {
    stacked = Layer(k, stacked);
    if (k < static_cast<int>(masks.per_layer.size()) && masks.per_layer[k].defined()) {
      torch::Tensor base_k = stacked.narrow(0, 0, b);
      torch::Tensor patched = torch::where(masks.per_layer[k], source_at(k, base_k), stacked.narrow(0, b, b));
      stacked = torch::cat({base_k, patched});
    }
  }
  return Head(stacked);
}

std::vector<std::pair<std::string, torch::Tensor>> MlpImpl::NamedExport() const {
  std::vector<std::pair<std::string, torch::Tensor>> out;
  int64_t at = 0;
  for (size_t i = 0; i < options_.input_sizes.size(); ++i) {
    out.emplace_back("embed." + options_.input_names[i], embed_.narrow(0, at, options_.input_sizes[i]));
    at += options_.input_sizes[i];
  }
  for (size_t k = 0; k < layers_.size(); ++k) {
    out.emplace_back("hidden." + std::to_string(k) + ".weight", layers_[k]->weight);
    out.emplace_back("hidden." + std::to_string(k) + ".bias", layers_[k]->bias);
  }
  out.emplace_back("out.weight", out_->weight);
  out.emplace_back("out.bias", out_->bias);
  return out;
}

}  // namespace graft::net
