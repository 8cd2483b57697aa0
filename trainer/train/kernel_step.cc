#include "trainer/train/kernel_step.h"

#include <algorithm>
#include <cmath>
#include <cstring>
#include <string>

#include "trainer/net/mlp.h"

namespace graft::train {
namespace {

using torch::Tensor;

// Same bounds as LabelTables' precomputed tables (evaluation.h).
constexpr int64_t kMaxTabulatedInputs = int64_t{1} << 20;
constexpr int64_t kMaxTabulatedTriples = int64_t{1} << 22;

Tensor Numbers(const std::vector<int64_t>& v) {
  return torch::from_blob(const_cast<int64_t*>(v.data()), {static_cast<int64_t>(v.size())}, torch::kInt64);
}

void CopyOut(const Tensor& t, std::vector<int64_t>* out) {
  Tensor c = t.to(torch::kInt64).contiguous();
  out->assign(c.data_ptr<int64_t>(), c.data_ptr<int64_t>() + c.numel());
}

net::KernelActivation KernelActivationOf(net::ActivationKind a) {
  switch (a) {
    case net::ActivationKind::kRelu: return net::KernelActivation::kRelu;
    case net::ActivationKind::kGelu: return net::KernelActivation::kGelu;
    case net::ActivationKind::kTanh: return net::KernelActivation::kTanh;
  }
  return net::KernelActivation::kRelu;
}

}  // namespace

std::unique_ptr<KernelStep> KernelStep::Create(const config::ResolvedJob& job, torch::nn::Module& network,
                                               const LabelTables& labels, FlatOptimizer& optimizer) {
  auto* mlp = dynamic_cast<net::MlpImpl*>(&network);
  if (mlp == nullptr) return nullptr;
  const net::MlpOptions& o = mlp->options();
  net::KernelShape shape;
  shape.num_inputs = static_cast<int>(o.input_sizes.size());
  shape.input_rows = o.input_sizes;
  shape.embedding_dim = o.embedding_dim;
  shape.hidden = o.hidden;
  shape.num_classes = o.num_classes;
  shape.activation = KernelActivationOf(o.activation);
  // Each set's units per layer: the union of its variables' sites, ascending.
  const std::vector<UnitSite> sites = AlignmentSites(job);
  std::vector<std::vector<std::vector<int>>> units(job.sets.size(), std::vector<std::vector<int>>(o.hidden.size()));
  for (size_t s = 0; s < job.sets.size(); ++s) {
    for (int v : job.sets[s].variables) {
      if (sites[v].layer < 0) continue;
      auto& layer = units[s][sites[v].layer];
      layer.insert(layer.end(), sites[v].units.begin(), sites[v].units.end());
    }
    for (auto& layer : units[s]) {
      std::sort(layer.begin(), layer.end());
      layer.erase(std::unique(layer.begin(), layer.end()), layer.end());
    }
  }
  std::unique_ptr<KernelStep> step(new KernelStep(job, shape, std::move(units), labels, optimizer, mlp->offsets()));
  // Parameter and gradient pointers, in LibTorch's layouts.
  auto find = [&](const std::string& name) -> Tensor {
    for (const auto& item : network.named_parameters(/*recurse=*/true)) {
      if (item.key() == name) return item.value();
    }
    return Tensor();
  };
  bool ok = true;
  auto data = [&](const Tensor& t) -> float* {
    ok = ok && t.defined() && t.is_contiguous() && t.scalar_type() == torch::kFloat32 && t.device().is_cpu();
    return ok ? t.data_ptr<float>() : nullptr;
  };
  auto grad = [&](const Tensor& t) -> float* {
    if (!t.requires_grad()) return nullptr;
    return data(t.grad());
  };
  Tensor embed = find("embed");
  step->params_.embed = data(embed);
  step->grads_.embed = embed.defined() ? grad(embed) : nullptr;
  for (size_t k = 0; k < o.hidden.size(); ++k) {
    Tensor w = find("hidden" + std::to_string(k) + ".weight"), b = find("hidden" + std::to_string(k) + ".bias");
    step->params_.weight.push_back(data(w));
    step->params_.bias.push_back(data(b));
    step->grads_.weight.push_back(data(w.defined() ? w.grad() : w));
    step->grads_.bias.push_back(data(b.defined() ? b.grad() : b));
  }
  Tensor ow = find("out.weight"), ob = find("out.bias");
  step->params_.out_weight = data(ow);
  step->params_.out_bias = data(ob);
  step->grads_.out_weight = data(ow.defined() ? ow.grad() : ow);
  step->grads_.out_bias = data(ob.defined() ? ob.grad() : ob);
  if (!ok) return nullptr;  // not the layout the kernel reads: the reference step runs instead
  return step;
}

KernelStep::KernelStep(const config::ResolvedJob& job, net::KernelShape shape,
                       std::vector<std::vector<std::vector<int>>> units, const LabelTables& labels,
                       FlatOptimizer& optimizer, Tensor offsets)
    : job_(job), labels_(labels), optimizer_(optimizer), kernel_(shape, std::move(units)), offsets_(offsets) {
  torch::NoGradGuard no_grad;
  num_inputs_ = shape.num_inputs;
  space_ = job.model->input_space_size();
  if (space_ <= kMaxTabulatedInputs) {
    Tensor numbers = torch::arange(space_, torch::kInt64);
    Tensor inputs = labels_.Inputs(numbers);
    CopyOut((inputs + offsets_).reshape({-1}), &all_rows_);
    CopyOut(labels_.OutputLabels(numbers, inputs), &all_labels_);
    const int64_t num_sets = static_cast<int64_t>(job.sets.size());
    if (num_sets > 0 && num_sets * space_ * space_ <= kMaxTabulatedTriples) {
      // Row (set, base) holds every source's counterfactual label, as LabelTables lays it out.
      all_counterfactuals_.reserve(num_sets * space_ * space_);
      Tensor source = numbers.repeat({space_});
      Tensor base = numbers.repeat_interleave(space_);
      Tensor base_in = labels_.Inputs(base), source_in = labels_.Inputs(source);
      std::vector<int64_t> part;
      for (int64_t s = 0; s < num_sets; ++s) {
        CopyOut(labels_.Counterfactual(base, source, torch::full({space_ * space_}, s, torch::kInt64), base_in, source_in),
                &part);
        all_counterfactuals_.insert(all_counterfactuals_.end(), part.begin(), part.end());
      }
    }
  }
}

void KernelStep::RowsAndLabels(const std::vector<int64_t>& numbers, std::vector<int64_t>* rows,
                               std::vector<int64_t>* labels) {
  const size_t n = numbers.size();
  rows->resize(n * num_inputs_);
  if (labels != nullptr) labels->resize(n);
  if (!all_rows_.empty()) {
    for (size_t i = 0; i < n; ++i) {
      std::memcpy(rows->data() + i * num_inputs_, all_rows_.data() + numbers[i] * num_inputs_,
                  sizeof(int64_t) * num_inputs_);
      if (labels != nullptr) (*labels)[i] = all_labels_[numbers[i]];
    }
    return;
  }
  torch::NoGradGuard no_grad;
  Tensor t = Numbers(numbers);
  Tensor inputs = labels_.Inputs(t);
  CopyOut((inputs + offsets_).reshape({-1}), rows);
  if (labels != nullptr) CopyOut(labels_.OutputLabels(t, inputs), labels);
}

std::pair<double, double> KernelStep::Step(const std::vector<int64_t>& base, const std::vector<int64_t>& sets,
                                           const std::vector<int64_t>& perm, const std::vector<int64_t>& sources) {
  const config::TrainingSpec& t = job_.spec.training;
  const int B = static_cast<int>(base.size());
  RowsAndLabels(base, &rows_, &labels_out_);
  net::KernelBatch batch;
  batch.batch = B;
  batch.rows = rows_.data();
  batch.labels = labels_out_.data();
  batch.task_weight = t.task_weight;
  batch.interchange_weight = t.interchange_weight;
  batch.source_gradients = t.source_gradients;
  if (!sets.empty()) {
    const bool in_batch = !perm.empty();
    source_numbers_.resize(B);
    for (int i = 0; i < B; ++i) source_numbers_[i] = in_batch ? base[perm[i]] : sources[i];
    if (!in_batch) {
      RowsAndLabels(sources, &source_rows_, nullptr);
      batch.source_rows = source_rows_.data();
    } else {
      batch.source_perm = perm.data();
    }
    counterfactual_.resize(B);
    if (!all_counterfactuals_.empty()) {
      for (int i = 0; i < B; ++i) {
        counterfactual_[i] = all_counterfactuals_[(sets[i] * space_ + base[i]) * space_ + source_numbers_[i]];
      }
    } else {
      torch::NoGradGuard no_grad;
      Tensor b = Numbers(base), s = Numbers(source_numbers_);
      CopyOut(labels_.Counterfactual(b, s, Numbers(sets), labels_.Inputs(b), labels_.Inputs(s)), &counterfactual_);
    }
    batch.sets = sets.data();
    batch.counterfactual = counterfactual_.data();
  }
  const net::MlpKernel::Losses losses = kernel_.Forward(params_, batch);
  if (!std::isfinite(losses.task) || !std::isfinite(losses.interchange)) return {losses.task, losses.interchange};
  // The kernel writes every trainable parameter's gradient, so no zeroing first.
  kernel_.Backward(params_, batch, grads_);
  optimizer_.Step();
  return {losses.task, losses.interchange};
}

}  // namespace graft::train
