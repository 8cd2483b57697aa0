// The hand-written MLP step (trainer/net/mlp_kernel.h) against the LibTorch reference: the same
// network, batch and masks through MlpImpl::StackedForward and LibTorch's autograd, as the
// trainer's reference step computes them, must give the same losses and every parameter's
// gradient to 1e-5 of that parameter's largest gradient entry, on randomised configurations.
#include <algorithm>
#include <cmath>
#include <random>
#include <sstream>
#include <string>
#include <vector>

#include <torch/torch.h>

#include "gtest/gtest.h"
#include "nlohmann/json.hpp"
#include "tests/test_util.h"
#include "trainer/net/mlp.h"
#include "trainer/net/mlp_kernel.h"

namespace graft {
namespace {

struct Case {
  net::ActivationKind activation = net::ActivationKind::kRelu;
  bool independent = false;
  bool source_gradients = true;
  bool fixed_embedding = false;
  bool interchange = true;
  bool big_table = false;  // more embedding rows than the batch has embeddings: layer 0 by matmuls
  std::vector<int> site_layers;  // layers the sets may touch
  int num_sets = 3;
  double task_weight = 1.0, interchange_weight = 1.0;
  uint32_t seed = 1;

  std::string Name() const {
    std::ostringstream s;
    s << "activation " << static_cast<int>(activation) << (independent ? " independent" : " in_batch")
      << (source_gradients ? " source_gradients" : " no_source_gradients") << (fixed_embedding ? " fixed_embedding" : "")
      << (interchange ? "" : " no_interchange") << (big_table ? " big_table" : "") << " layers";
    for (int k : site_layers) s << " " << k;
    s << " sets " << num_sets << " seed " << seed;
    return s.str();
  }
};

net::KernelActivation KernelActivationOf(net::ActivationKind a) {
  switch (a) {
    case net::ActivationKind::kRelu: return net::KernelActivation::kRelu;
    case net::ActivationKind::kGelu: return net::KernelActivation::kGelu;
    case net::ActivationKind::kTanh: return net::KernelActivation::kTanh;
  }
  return net::KernelActivation::kRelu;
}

// Runs one case through both paths and compares.
void Compare(const Case& c) {
  SCOPED_TRACE(c.Name());
  std::mt19937 gen(c.seed);
  auto uniform = [&](int n) { return static_cast<int>(std::uniform_int_distribution<int>(0, n - 1)(gen)); };
  torch::manual_seed(c.seed);
  net::MlpOptions o;
  o.input_sizes = c.big_table ? std::vector<int>{40, 30, 4} : std::vector<int>{5, 3, 4};
  o.input_names = {"a", "b", "c"};
  o.embedding_dim = 3;
  o.hidden = {11 + uniform(6), 9 + uniform(6), 10 + uniform(6)};
  o.num_classes = 3 + uniform(3);
  o.activation = c.activation;
  o.fixed_embedding = c.fixed_embedding;
  net::Mlp net(o);
  const int B = 17 + uniform(16);
  const int I = 3, L = 3;

  // The sets: each touches a random non-empty subset of the site layers' units (some layer
  // lists may come out empty for a set, as with a set of variables aligned elsewhere).
  std::vector<std::vector<std::vector<int>>> units(c.num_sets, std::vector<std::vector<int>>(L));
  for (int s = 0; s < c.num_sets; ++s) {
    for (int k : c.site_layers) {
      if (c.site_layers.size() > 1 && uniform(3) == 0) continue;
      for (int u = 0; u < o.hidden[k]; ++u) {
        if (uniform(3) == 0) units[s][k].push_back(u);
      }
    }
    bool any = false;
    for (const auto& layer : units[s]) any = any || !layer.empty();
    if (!any) units[s][c.site_layers[0]].push_back(uniform(o.hidden[c.site_layers[0]]));
  }
  // Inputs, labels, sets, sources.
  std::vector<int64_t> base_values(B * I), source_values(B * I), labels(B), cf(B), sets(B), perm(B);
  for (int i = 0; i < B; ++i) {
    for (int j = 0; j < I; ++j) {
      base_values[i * I + j] = uniform(o.input_sizes[j]);
      source_values[i * I + j] = uniform(o.input_sizes[j]);
    }
    labels[i] = uniform(o.num_classes);
    cf[i] = uniform(o.num_classes);
    sets[i] = uniform(c.num_sets);
    perm[i] = i;
  }
  std::shuffle(perm.begin(), perm.end(), gen);
  auto tensor = [](std::vector<int64_t>& v) { return torch::from_blob(v.data(), {static_cast<int64_t>(v.size())}, torch::kInt64); };
  torch::Tensor base_in = tensor(base_values).view({B, I});
  torch::Tensor source_in = tensor(source_values).view({B, I});
  torch::Tensor perm_t = tensor(perm), sets_t = tensor(sets), labels_t = tensor(labels), cf_t = tensor(cf);
  torch::Tensor base_rows = (base_in + net->offsets()).reshape({-1}).contiguous();
  torch::Tensor source_rows = (source_in + net->offsets()).reshape({-1}).contiguous();

  // The reference: what the trainer's LibTorch step computes.
  net::InterventionMasks masks;
  masks.per_layer.resize(L);
  int lo = -1, hi = -1;
  for (int k = 0; k < L; ++k) {
    bool any = false;
    for (int s = 0; s < c.num_sets; ++s) any = any || !units[s][k].empty();
    if (!any) continue;
    if (lo < 0) lo = k;
    hi = k;
    torch::Tensor m = torch::zeros({B, o.hidden[k]}, torch::kBool);
    for (int i = 0; i < B; ++i) {
      for (int u : units[sets[i]][k]) m[i][u] = true;
    }
    masks.per_layer[k] = m;
  }
  masks.lowest_layer = lo;
  ASSERT_GE(lo, 0);
  torch::Tensor embedded = net->EmbedRows(base_rows, B);
  torch::Tensor loss_task, loss_iit;
  if (c.interchange) {
    std::vector<torch::Tensor> source_acts;
    torch::Tensor p;
    if (c.independent) {
      if (c.source_gradients) {
        source_acts = net->Hidden(net->EmbedRows(source_rows, B), hi);
      } else {
        torch::NoGradGuard no_grad;
        source_acts = net->Hidden(net->EmbedRows(source_rows, B), hi);
      }
    } else {
      p = perm_t;
    }
    torch::Tensor logits = net->StackedForward(embedded, masks, source_acts, p, c.source_gradients);
    loss_task = torch::nn::functional::cross_entropy(logits.narrow(0, 0, B), labels_t);
    loss_iit = torch::nn::functional::cross_entropy(logits.narrow(0, B, B), cf_t);
  } else {
    torch::Tensor logits = net->Head(net->Hidden(embedded, L - 1).back());
    loss_task = torch::nn::functional::cross_entropy(logits, labels_t);
  }
  torch::Tensor loss = loss_task * c.task_weight;
  if (loss_iit.defined()) loss = loss + loss_iit * c.interchange_weight;
  for (auto& prm : net->parameters()) {
    if (prm.requires_grad()) prm.mutable_grad() = torch::Tensor();
  }
  loss.backward();

  // The kernel on the same parameters.
  auto param = [&](const std::string& name) {
    for (const auto& item : net->named_parameters(true)) {
      if (item.key() == name) return item.value();
    }
    ADD_FAILURE() << "no parameter " << name;
    return torch::Tensor();
  };
  std::vector<std::string> names = {"embed"};
  for (int k = 0; k < L; ++k) {
    names.push_back("hidden" + std::to_string(k) + ".weight");
    names.push_back("hidden" + std::to_string(k) + ".bias");
  }
  names.push_back("out.weight");
  names.push_back("out.bias");
  std::vector<torch::Tensor> values, grads;
  for (const auto& n : names) {
    torch::Tensor t = param(n);
    ASSERT_TRUE(t.is_contiguous()) << n;
    values.push_back(t.detach());
    // Poisoned: the kernel must write every entry, not add to what is there.
    grads.push_back(torch::full_like(t.detach(), 1e3f));
  }
  auto pointers = [&](std::vector<torch::Tensor>& ts, bool with_embed) {
    net::KernelParams kp;
    kp.embed = with_embed ? ts[0].data_ptr<float>() : nullptr;
    for (int k = 0; k < L; ++k) {
      kp.weight.push_back(ts[1 + 2 * k].data_ptr<float>());
      kp.bias.push_back(ts[2 + 2 * k].data_ptr<float>());
    }
    kp.out_weight = ts[1 + 2 * L].data_ptr<float>();
    kp.out_bias = ts[2 + 2 * L].data_ptr<float>();
    return kp;
  };
  net::KernelShape shape;
  shape.num_inputs = I;
  shape.input_rows = o.input_sizes;
  shape.embedding_dim = o.embedding_dim;
  shape.hidden = o.hidden;
  shape.num_classes = o.num_classes;
  shape.activation = KernelActivationOf(c.activation);
  net::MlpKernel kernel(shape, units);
  EXPECT_EQ(kernel.lowest_layer(), lo);
  EXPECT_EQ(kernel.highest_layer(), hi);
  net::KernelBatch kb;
  kb.batch = B;
  kb.rows = base_rows.data_ptr<int64_t>();
  kb.labels = labels.data();
  if (c.interchange) {
    kb.sets = sets.data();
    kb.counterfactual = cf.data();
    if (c.independent) {
      kb.source_rows = source_rows.data_ptr<int64_t>();
    } else {
      kb.source_perm = perm.data();
    }
  }
  kb.source_gradients = c.source_gradients;
  kb.task_weight = c.task_weight;
  kb.interchange_weight = c.interchange_weight;
  net::KernelParams kp = pointers(values, true);
  net::KernelParams kg = pointers(grads, !c.fixed_embedding);
  // Twice: the second step reuses the kernel's buffers and must give the same figures.
  for (int round = 0; round < 2; ++round) {
    SCOPED_TRACE("round " + std::to_string(round));
    net::MlpKernel::Losses losses = kernel.Forward(kp, kb);
    EXPECT_NEAR(losses.task, loss_task.item<double>(), 1e-5 * std::abs(loss_task.item<double>()));
    if (c.interchange) {
      EXPECT_NEAR(losses.interchange, loss_iit.item<double>(), 1e-5 * std::abs(loss_iit.item<double>()));
    } else {
      EXPECT_EQ(losses.interchange, 0.0);
    }
    kernel.Backward(kp, kb, kg);
    for (size_t i = 0; i < names.size(); ++i) {
      if (i == 0 && c.fixed_embedding) {
        EXPECT_FALSE(param("embed").grad().defined());
        EXPECT_EQ(grads[0].max().item<float>(), 1e3f) << "a frozen embedding's gradient buffer was written";
        continue;
      }
      torch::Tensor ref = param(names[i]).grad();
      ASSERT_TRUE(ref.defined()) << names[i];
      const double scale = ref.abs().max().item<double>();
      // Not a comparison of zeros: every parameter gets a gradient in these cases.
      EXPECT_GT(scale, 1e-6) << names[i];
      const double diff = (grads[i] - ref).abs().max().item<double>();
      EXPECT_LE(diff, 1e-5 * scale) << names[i] << ": largest difference " << diff << ", largest gradient " << scale;
    }
    for (auto& g : grads) g.fill_(1e3f);
  }
}

TEST(MlpKernel, GradientsMatchLibTorchAutogradOnRandomisedConfigs) {
  uint32_t seed = 11;
  int cases = 0;
  for (auto act : {net::ActivationKind::kRelu, net::ActivationKind::kGelu, net::ActivationKind::kTanh}) {
    for (bool independent : {false, true}) {
      for (bool source_gradients : {true, false}) {
        // Sites in one layer (the lowest, a middle one, the last) and in several.
        for (const std::vector<int>& layers : std::vector<std::vector<int>>{{0}, {1}, {2}, {0, 2}, {1, 2}, {0, 1, 2}}) {
          Case c;
          c.activation = act;
          c.independent = independent;
          c.source_gradients = source_gradients;
          c.site_layers = layers;
          c.num_sets = 1 + static_cast<int>(seed % 4);
          c.task_weight = seed % 3 == 0 ? 0.5 : 1.0;
          c.interchange_weight = seed % 5 == 0 ? 2.0 : 1.0;
          c.big_table = seed % 2 == 0;
          c.seed = seed++;
          Compare(c);
          ++cases;
        }
      }
    }
  }
  EXPECT_EQ(cases, 72);
}

TEST(MlpKernel, PlainTaskLossAndFrozenEmbeddingMatchLibTorch) {
  for (auto act : {net::ActivationKind::kRelu, net::ActivationKind::kGelu, net::ActivationKind::kTanh}) {
    Case plain;
    plain.activation = act;
    plain.interchange = false;
    plain.site_layers = {1};
    plain.seed = 100 + static_cast<int>(act);
    Compare(plain);
    Case frozen;
    frozen.activation = act;
    frozen.fixed_embedding = true;
    frozen.independent = true;
    frozen.site_layers = {0, 2};
    frozen.seed = 200 + static_cast<int>(act);
    Compare(frozen);
    frozen.big_table = true;
    Compare(frozen);
  }
}

// The trainer's choice and glue: a run of the shipped demo takes the kernel path by default and
// the LibTorch path with GRAFT_REFERENCE_STEP=1, and both train on the same batches, sets and
// sources (the same draws), so their losses agree closely after 60 steps and their held-out
// figures are the same or nearly so. A wrong set index, source or label table in the glue moves
// the losses by far more than float rounding does. (That the same seed gives the same run on the
// kernel path is Trainer.ResumeAfterInterruptionReproducesTheUninterruptedRun's check.)
TEST(MlpKernel, TrainerRunsOnTheKernelAndMatchesTheReferenceStep) {
  using ::graft::testing::BinaryDir;
  using ::graft::testing::ReadFile;
  using ::graft::testing::RunCommand;
  using ::graft::testing::ScopedTempDir;
  using ::graft::testing::SourceDir;
  ScopedTempDir dir;
  const std::string run = BinaryDir() + "/bin/graft-worker run " + SourceDir() + "/configs/parcel-routing.yaml" +
                          " --set training.steps=60 --set training.batch_size=64 --set evaluation.every=30"
                          " --set evaluation.triples=512 --set network.hidden=[32,32,32]";
  for (const char* variant : {"", " --set training.sources=independent --set network.activation=tanh"}) {
    SCOPED_TRACE(variant);
    auto k = RunCommand(run + variant + " --out " + dir.path() + "/k");
    ASSERT_EQ(k.exit_code, 0) << k.output;
    auto r = RunCommand("GRAFT_REFERENCE_STEP=1 " + run + variant + " --out " + dir.path() + "/r");
    ASSERT_EQ(r.exit_code, 0) << r.output;
    const nlohmann::json kj = nlohmann::json::parse(ReadFile(dir.path() + "/k/result.json"));
    const nlohmann::json rj = nlohmann::json::parse(ReadFile(dir.path() + "/r/result.json"));
    EXPECT_EQ(kj["provenance"]["training_step"], "kernel");
    EXPECT_EQ(rj["provenance"]["training_step"], "reference");
    for (const char* loss : {"loss_task", "loss_interchange"}) {
      const double a = kj[loss].get<double>(), b = rj[loss].get<double>();
      EXPECT_NEAR(a, b, 1e-3 * std::abs(b)) << loss;
    }
    for (const char* acc : {"acc_held_out", "iia_held_out", "iia_changed_held_out"}) {
      EXPECT_NEAR(kj[acc]["value"].get<double>(), rj[acc]["value"].get<double>(), 0.01) << acc;
    }
  }
}

}  // namespace
}  // namespace graft
