#include "trainer/net/mlp.h"

#include <numeric>

namespace graft::net {

MlpImpl::MlpImpl(const MlpOptions& options) : options_(options) {
  const int total = std::accumulate(options.input_sizes.begin(), options.input_sizes.end(), 0);
  offsets_ = register_buffer("offsets", FirstRows(options.input_sizes));
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

torch::Tensor MlpImpl::Embed(const torch::Tensor& inputs) {
  // One gather for all inputs: row = offset of the input + value index.
  torch::Tensor rows = (inputs + offsets_).reshape({-1});
  return embed_.index_select(0, rows).reshape({inputs.size(0), -1});
}

torch::Tensor MlpImpl::EmbedRows(const torch::Tensor& rows, int64_t batch) {
  return embed_.index_select(0, rows).reshape({batch, -1});
}

torch::Tensor MlpImpl::Layer(int k, const torch::Tensor& below) {
  return Activate(options_.activation, layers_[k]->forward(below));
}

torch::Tensor MlpImpl::Head(const torch::Tensor& last) { return out_->forward(last); }

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
