#include "trainer/net/network.h"

namespace graft::net {

torch::Tensor Activate(ActivationKind kind, const torch::Tensor& x) {
  switch (kind) {
    case ActivationKind::kRelu: return torch::relu(x);
    case ActivationKind::kGelu: return torch::gelu(x);
    case ActivationKind::kTanh: return torch::tanh(x);
  }
  return x;
}

torch::Tensor FirstRows(const std::vector<int>& input_sizes) {
  std::vector<int64_t> first;
  int64_t at = 0;
  for (int size : input_sizes) {
    first.push_back(at);
    at += size;
  }
  return torch::tensor(first, torch::kInt64);
}

std::vector<torch::Tensor> SiteNetworkImpl::Hidden(const torch::Tensor& embedded, int upto) {
  std::vector<torch::Tensor> acts;
  acts.reserve(upto + 1);
  torch::Tensor h = embedded;
  for (int k = 0; k <= upto; ++k) {
    h = Layer(k, h);
    acts.push_back(h);
  }
  return acts;
}

torch::Tensor SiteNetworkImpl::Logits(const torch::Tensor& embedded) {
  const int last = num_layers() - 1;
  torch::Tensor h = embedded;
  for (int k = 0; k < last; ++k) h = Layer(k, h);
  return LastLayerAndHead(last, h);
}

torch::Tensor SiteNetworkImpl::Intervened(const std::vector<torch::Tensor>& base,
                                          const std::vector<torch::Tensor>& source, const InterventionMasks& masks) {
  const int lo = masks.lowest_layer;
  const int last = num_layers() - 1;
  if (lo < 0) return Head(base.back());
  torch::Tensor h = base[lo];
  if (Masked(masks, lo)) h = torch::where(masks.per_layer[lo], source[lo], h);
  for (int k = lo + 1; k <= last; ++k) {
    if (k == last && !Masked(masks, k)) return LastLayerAndHead(k, h);
    h = Layer(k, h);
    if (Masked(masks, k)) h = torch::where(masks.per_layer[k], source[k], h);
  }
  return Head(h);
}

torch::Tensor SiteNetworkImpl::StackedForward(const torch::Tensor& embedded, const InterventionMasks& masks,
                                              const std::vector<torch::Tensor>& source,
                                              const torch::Tensor& source_perm, bool source_gradients) {
  const int lo = masks.lowest_layer;
  const int last = num_layers() - 1;
  const int64_t b = embedded.size(0);
  auto source_at = [&](int k, const torch::Tensor& base_k) {
    if (!source_perm.defined()) return source[k];
    torch::Tensor s = base_k.index_select(0, source_perm);
    return source_gradients ? s : s.detach();
  };
  torch::Tensor h = embedded;
  for (int k = 0; k <= lo; ++k) h = Layer(k, h);
  torch::Tensor stacked = torch::cat({h, torch::where(masks.per_layer[lo], source_at(lo, h), h)});
  for (int k = lo + 1; k <= last; ++k) {
    if (k == last && !Masked(masks, k)) return LastLayerAndHead(k, stacked);
    stacked = Layer(k, stacked);
    if (Masked(masks, k)) {
      torch::Tensor base_k = stacked.narrow(0, 0, b);
      torch::Tensor patched = torch::where(masks.per_layer[k], source_at(k, base_k), stacked.narrow(0, b, b));
      stacked = torch::cat({base_k, patched});
    }
  }
  return Head(stacked);
}

}  // namespace graft::net
