#include "trainer/train/flat_optimizer.h"

#include <cmath>

#include <ATen/Parallel.h>

namespace graft::train {

FlatOptimizer::FlatOptimizer(const std::vector<torch::Tensor>& params, const FlatOptimizerOptions& options)
    : options_(options) {
  torch::NoGradGuard no_grad;
  int64_t total = 0;
  for (const auto& p : params) total += p.numel();
  params_ = torch::zeros({total}, torch::kFloat32);
  grads_ = torch::zeros({total}, torch::kFloat32);
  int64_t at = 0;
  for (auto p : params) {
    const int64_t n = p.numel();
    torch::Tensor view = params_.narrow(0, at, n).view(p.sizes());
    view.copy_(p);
    p.set_data(view);  // the parameter now lives in the flat buffer
    p.mutable_grad() = grads_.narrow(0, at, n).view(p.sizes());
    at += n;
  }
  m_ = torch::zeros_like(params_);
  if (options_.adam) v_ = torch::zeros_like(params_);
}

void FlatOptimizer::ZeroGrad() { grads_.zero_(); }

void FlatOptimizer::Step() {
  // One fused sweep over the flat buffers (split across torch's intra-op threads) instead of a
  // tensor operation per term: each entry's update is torch's formula, element by element.
  ++step_;
  float* p = params_.data_ptr<float>();
  const float* g = grads_.data_ptr<float>();
  float* m = m_.data_ptr<float>();
  const float wd = static_cast<float>(options_.weight_decay);
  const int64_t n = params_.numel();
  constexpr int64_t kGrain = 1 << 15;
  if (options_.adam) {
    float* v = v_.data_ptr<float>();
    const double b1 = options_.beta1, b2 = options_.beta2;
    const float fb1 = static_cast<float>(b1), fb2 = static_cast<float>(b2);
    const float one_minus_b1 = static_cast<float>(1 - b1), one_minus_b2 = static_cast<float>(1 - b2);
    const double bias1 = 1 - std::pow(b1, static_cast<double>(step_));
    const double bias2 = 1 - std::pow(b2, static_cast<double>(step_));
    const float inv_sqrt_bias2 = static_cast<float>(1 / std::sqrt(bias2));
    const float eps = static_cast<float>(options_.eps);
    const float step_size = static_cast<float>(options_.lr / bias1);
    at::parallel_for(0, n, kGrain, [&](int64_t begin, int64_t end) {
      for (int64_t i = begin; i < end; ++i) {
        const float gi = wd != 0.0f ? g[i] + wd * p[i] : g[i];
        m[i] = m[i] * fb1 + one_minus_b1 * gi;
        v[i] = v[i] * fb2 + one_minus_b2 * gi * gi;
        const float denom = std::sqrt(v[i]) * inv_sqrt_bias2 + eps;
        p[i] -= step_size * (m[i] / denom);
      }
    });
  } else {
    const float lr = static_cast<float>(options_.lr);
    const float momentum = static_cast<float>(options_.momentum);
    const bool first = step_ == 1;
    at::parallel_for(0, n, kGrain, [&](int64_t begin, int64_t end) {
      for (int64_t i = begin; i < end; ++i) {
        const float gi = wd != 0.0f ? g[i] + wd * p[i] : g[i];
        if (momentum != 0.0f) {
          m[i] = first ? gi : m[i] * momentum + gi;
          p[i] -= lr * m[i];
        } else {
          p[i] -= lr * gi;
        }
      }
    });
  }
}

void FlatOptimizer::Save(torch::serialize::OutputArchive& archive) const {
  archive.write("flat.step", torch::tensor(step_, torch::kInt64));
  archive.write("flat.m", m_);
  if (v_.defined()) archive.write("flat.v", v_);
}

void FlatOptimizer::Load(torch::serialize::InputArchive& archive) {
  torch::NoGradGuard no_grad;
  torch::Tensor step, m;
  archive.read("flat.step", step);
  archive.read("flat.m", m);
  step_ = step.item<int64_t>();
  m_.copy_(m);
  if (v_.defined()) {
    torch::Tensor v;
    archive.read("flat.v", v);
    v_.copy_(v);
  }
}

}  // namespace graft::train
