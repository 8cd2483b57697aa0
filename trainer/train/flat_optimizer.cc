#include "trainer/train/flat_optimizer.h"

#include <cmath>

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
  torch::NoGradGuard no_grad;
  ++step_;
  torch::Tensor g = grads_;
  if (options_.weight_decay != 0) g = g.add(params_, options_.weight_decay);
  if (options_.adam) {
    const double b1 = options_.beta1, b2 = options_.beta2;
    m_.mul_(b1).add_(g, 1 - b1);
    v_.mul_(b2).addcmul_(g, g, 1 - b2);
    const double bias1 = 1 - std::pow(b1, static_cast<double>(step_));
    const double bias2 = 1 - std::pow(b2, static_cast<double>(step_));
    torch::Tensor denom = (v_.sqrt() / std::sqrt(bias2)).add_(options_.eps);
    params_.addcdiv_(m_, denom, -options_.lr / bias1);
  } else {
    if (options_.momentum != 0) {
      if (step_ == 1) {
        m_.copy_(g);
      } else {
        m_.mul_(options_.momentum).add_(g);
      }
      params_.add_(m_, -options_.lr);
    } else {
      params_.add_(g, -options_.lr);
    }
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
