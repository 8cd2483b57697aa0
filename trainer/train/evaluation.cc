#include "trainer/train/evaluation.h"

#include <algorithm>
#include <filesystem>
#include <fstream>
#include <set>

#include "absl/strings/str_cat.h"
#include "trainer/causal/rng.h"
#include "trainer/causal/split.h"
#include "trainer/net/transformer.h"

namespace graft::train {

using torch::Tensor;

std::vector<int> SiteColumns(const config::ResolvedJob& job, const config::SiteSpec& site) {
  if (!job.spec.network.is_transformer()) return site.units;
  std::vector<int> columns;
  for (const auto& p : site.positions) {
    const int token = config::TokenOf(*job.model, p);
    for (int u : site.units) columns.push_back(token * job.spec.network.width + u);
  }
  std::sort(columns.begin(), columns.end());
  return columns;
}

std::vector<int> LayerColumns(const config::ResolvedJob& job) {
  const config::NetworkSpec& n = job.spec.network;
  if (!n.is_transformer()) return n.hidden;
  const int tokens = static_cast<int>(job.model->inputs().size()) + 1;
  return std::vector<int>(n.layers, tokens * n.width);
}

std::vector<UnitSite> AlignmentSites(const config::ResolvedJob& job) {
  std::vector<UnitSite> sites(job.model->num_variables());
  for (int v = 0; v < job.model->num_variables(); ++v) {
    const int s = job.site_of_variable[v];
    if (s < 0) continue;
    sites[v].layer = job.spec.alignment[s].layer;
    sites[v].units = SiteColumns(job, job.spec.alignment[s]);
  }
  return sites;
}

UnitMasks::UnitMasks(const std::vector<config::InterventionSet>& sets, const std::vector<UnitSite>& sites,
                     const std::vector<int>& widths) {
  per_layer_.assign(widths.size(), Tensor());
  const int num_sets = static_cast<int>(sets.size());
  for (int s = 0; s < num_sets; ++s) {
    for (int v : sets[s].variables) {
      const UnitSite& site = sites[v];
      if (site.layer < 0) continue;
      Tensor& m = per_layer_[site.layer];
      if (!m.defined()) m = torch::zeros({num_sets, widths[site.layer]}, torch::kBool);
      for (int u : site.units) m[s][u] = true;
      lowest_ = lowest_ < 0 ? site.layer : std::min(lowest_, site.layer);
      highest_ = std::max(highest_, site.layer);
    }
  }
}

net::InterventionMasks UnitMasks::ForSets(const Tensor& set_index) const {
  net::InterventionMasks masks;
  masks.lowest_layer = lowest_;
  masks.per_layer.resize(per_layer_.size());
  for (size_t l = 0; l < per_layer_.size(); ++l) {
    if (per_layer_[l].defined()) masks.per_layer[l] = per_layer_[l].index_select(0, set_index);
  }
  return masks;
}

Tensor UnitMasks::Logits(net::SiteNetworkImpl& net, const Tensor& base_in, const Tensor& source_in, const Tensor& set_index,
                         Tensor* base_logits) const {
  const int last = net.num_layers() - 1;
  std::vector<Tensor> base = net.Hidden(net.Embed(base_in), last);
  if (base_logits) *base_logits = net.Head(base.back());
  if (lowest_ < 0) return net.Head(base.back());
  std::vector<Tensor> source = net.Hidden(net.Embed(source_in), highest_);
  return net.Intervened(base, source, ForSets(set_index));
}

net::Mlp CreateMlp(const config::ResolvedJob& job) {
  net::MlpOptions o;
  const auto& model = *job.model;
  for (int i : model.inputs()) {
    o.input_sizes.push_back(model.variable(i).domain.size());
    o.input_names.push_back(model.variable(i).name);
  }
  o.embedding_dim = job.spec.network.embedding_dim;
  o.fixed_embedding = job.spec.network.embedding_init == config::EmbeddingInit::kFixedRandom;
  o.hidden = job.spec.network.hidden;
  o.activation = static_cast<net::ActivationKind>(static_cast<int>(job.spec.network.activation));
  o.num_classes = model.variable(model.output()).domain.size();
  torch::manual_seed(job.spec.seed);
  return net::Mlp(o);
}

net::SiteNetwork CreateNetwork(const config::ResolvedJob& job) {
  if (!job.spec.network.is_transformer()) return CreateMlp(job).ptr();
  const auto& model = *job.model;
  const config::NetworkSpec& n = job.spec.network;
  net::TransformerOptions o;
  for (int i : model.inputs()) {
    o.input_sizes.push_back(model.variable(i).domain.size());
    o.input_names.push_back(model.variable(i).name);
  }
  o.width = n.width;
  o.layers = n.layers;
  o.heads = n.heads;
  o.mlp_width = n.mlp_width;
  o.activation = static_cast<net::ActivationKind>(static_cast<int>(n.activation));
  o.num_classes = model.variable(model.output()).domain.size();
  torch::manual_seed(job.spec.seed);
  return std::make_shared<net::TransformerImpl>(o);
}

EvalInputs CreateEvalInputs(const config::ResolvedJob& job) {
  const int64_t cap = job.spec.evaluation.triples;
  auto to_tensor = [](const std::vector<int64_t>& v) { return torch::tensor(v, torch::kInt64); };
  EvalInputs e;
  e.train = to_tensor(causal::SampleInputs(job.split, /*held_out_side=*/false, cap, job.spec.seed, 0xE1));
  e.test = to_tensor(causal::SampleInputs(job.split, /*held_out_side=*/true, cap, job.spec.seed, 0xE2));
  std::vector<causal::Triple> triples =
      causal::MakeTriples(job.split, static_cast<int>(job.sets.size()), cap, job.spec.seed);
  std::vector<int64_t> b, s, z;
  for (const auto& t : triples) {
    b.push_back(t.base);
    s.push_back(t.source);
    z.push_back(t.set);
  }
  e.base = to_tensor(b);
  e.source = to_tensor(s);
  e.set = to_tensor(z);
  return e;
}

ReportJson AccuracyReport(const eval::Accuracy& a) {
  return ReportJson{{"value", a.value}, {"lo", a.lo}, {"hi", a.hi}, {"correct", a.correct}, {"n", a.n}};
}

namespace {

// {input name: value name} of one decoded input row.
ReportJson NamedInputs(const causal::CausalModel& model, const Tensor& row) {
  ReportJson j = ReportJson::object();
  auto a = row.accessor<int64_t, 1>();
  for (size_t k = 0; k < model.inputs().size(); ++k) {
    const int v = model.inputs()[k];
    j[model.variable(v).name] = model.ValueName(v, static_cast<int>(a[k]));
  }
  return j;
}

}  // namespace

ReportJson EvaluateTriples(const causal::CausalModel& model, const std::vector<config::InterventionSet>& sets,
                           const LabelTables& labels, const Tensor& base, const Tensor& source, const Tensor& set,
                           const IntervenedLogitsFn& logits, const TripleDetail& detail,
                           std::vector<std::string>* failures) {
  const int out = model.output();
  const int num_sets = static_cast<int>(sets.size());
  const int classes = model.variable(out).domain.size();
  std::vector<int64_t> correct_by_set(num_sets, 0), n_by_set(num_sets, 0);
  int64_t correct = 0, n = 0, changed_correct = 0, changed_n = 0, unchanged = 0;
  Tensor confusion = torch::zeros({int64_t{num_sets} * classes * classes}, torch::kInt64);
  int written = 0;
  const int64_t total = base.size(0);
  const int64_t chunk = 8192;
  for (int64_t at = 0; at < total; at += chunk) {
    const int64_t len = std::min(chunk, total - at);
    Tensor b_in = labels.Decode(base.narrow(0, at, len));
    Tensor s_in = labels.Decode(source.narrow(0, at, len));
    Tensor z = set.narrow(0, at, len);
    Tensor pred = logits(b_in, s_in, z).argmax(1);
    std::vector<Tensor> base_vals = labels.Values(b_in);
    std::vector<Tensor> src_vals = labels.Values(s_in);
    Tensor cf = labels.Values(b_in, &src_vals, &z)[out];
    Tensor ok = pred.eq(cf);
    Tensor changed = cf.ne(base_vals[out]);
    correct += ok.sum().item<int64_t>();
    n += len;
    changed_correct += (ok & changed).sum().item<int64_t>();
    changed_n += changed.sum().item<int64_t>();
    unchanged += len - changed.sum().item<int64_t>();
    Tensor per_set_ok = torch::zeros({num_sets}, torch::kInt64).index_add_(0, z, ok.to(torch::kInt64));
    Tensor per_set_n = torch::bincount(z, {}, num_sets);
    for (int s = 0; s < num_sets; ++s) {
      correct_by_set[s] += per_set_ok[s].item<int64_t>();
      n_by_set[s] += per_set_n[s].item<int64_t>();
    }
    if (detail.confusion) {
      Tensor cell = (z * classes + cf) * classes + pred;
      confusion += torch::bincount(cell, {}, int64_t{num_sets} * classes * classes);
    }
    if (failures != nullptr && written < detail.max_failures) {
      Tensor wrong = (~ok).nonzero().reshape({-1});
      const int64_t take = std::min<int64_t>(wrong.size(0), detail.max_failures - written);
      for (int64_t i = 0; i < take; ++i) {
        const int64_t r = wrong[i].item<int64_t>();
        ReportJson f;
        f["base"] = NamedInputs(model, b_in[r]);
        f["source"] = NamedInputs(model, s_in[r]);
        f["set"] = sets[z[r].item<int64_t>()].name;
        f["base_label"] = model.ValueName(out, static_cast<int>(base_vals[out][r].item<int64_t>()));
        f["expected"] = model.ValueName(out, static_cast<int>(cf[r].item<int64_t>()));
        f["predicted"] = model.ValueName(out, static_cast<int>(pred[r].item<int64_t>()));
        failures->push_back(f.dump());
        ++written;
      }
    }
  }
  ReportJson m;
  m["iia_held_out"] = AccuracyReport(eval::WilsonAccuracy(correct, n));
  m["iia_changed_held_out"] = AccuracyReport(eval::WilsonAccuracy(changed_correct, changed_n));
  ReportJson by_set = ReportJson::object();
  for (int s = 0; s < num_sets; ++s) {
    by_set[sets[s].name] = AccuracyReport(eval::WilsonAccuracy(correct_by_set[s], n_by_set[s]));
  }
  m["iia_by_set"] = by_set;
  m["unchanged_floor"] = n > 0 ? static_cast<double>(unchanged) / static_cast<double>(n) : 0.0;
  if (detail.confusion) {
    ReportJson c;
    ReportJson names = ReportJson::array();
    for (int k = 0; k < classes; ++k) names.push_back(model.ValueName(out, k));
    c["classes"] = names;
    c["rows"] = "counterfactual label";
    c["columns"] = "predicted";
    ReportJson tables = ReportJson::object();
    auto a = confusion.accessor<int64_t, 1>();
    for (int s = 0; s < num_sets; ++s) {
      ReportJson rows = ReportJson::array();
      for (int e = 0; e < classes; ++e) {
        ReportJson row = ReportJson::array();
        for (int p = 0; p < classes; ++p) row.push_back(a[(int64_t{s} * classes + e) * classes + p]);
        rows.push_back(row);
      }
      tables[sets[s].name] = rows;
    }
    c["by_set"] = tables;
    m["confusion"] = c;
  }
  return m;
}

ReportJson EvaluateNetwork(const config::ResolvedJob& job, net::SiteNetworkImpl& net, const LabelTables& labels,
                           const EvalInputs& inputs, const IntervenedLogitsFn& logits) {
  const int out = job.model->output();
  auto task_accuracy = [&](const Tensor& numbers) {
    Tensor in = labels.Decode(numbers);
    Tensor pred = net.forward(in).argmax(1);
    const int64_t correct = pred.eq(labels.Values(in)[out]).sum().item<int64_t>();
    return eval::WilsonAccuracy(correct, numbers.size(0));
  };
  ReportJson m;
  m["acc_train"] = AccuracyReport(task_accuracy(inputs.train));
  m["acc_held_out"] = AccuracyReport(task_accuracy(inputs.test));
  ReportJson iia = EvaluateTriples(*job.model, job.sets, labels, inputs.base, inputs.source, inputs.set, logits,
                                   TripleDetail{}, nullptr);
  for (auto& [k, v] : iia.items()) m[k] = v;
  return m;
}

std::vector<UnitSite> RandomUnitSites(const config::ResolvedJob& job) {
  const config::JobSpec& spec = job.spec;
  const bool transformer = spec.network.is_transformer();
  const int layers = transformer ? spec.network.layers : static_cast<int>(spec.network.hidden.size());
  std::vector<UnitSite> control(job.model->num_variables());
  causal::Rng rng(spec.seed, 0xC047);
  // Units taken per (layer, token): an MLP has one token per layer.
  const int tokens = transformer ? static_cast<int>(job.model->inputs().size()) + 1 : 1;
  std::vector<std::set<int>> taken_real(layers * tokens), taken(layers * tokens);
  auto token_of = [&](const std::string& p) { return transformer ? config::TokenOf(*job.model, p) : 0; };
  for (const auto& site : spec.alignment) {
    const std::vector<std::string> ps = transformer ? site.positions : std::vector<std::string>{""};
    for (const auto& p : ps) taken_real[site.layer * tokens + token_of(p)].insert(site.units.begin(), site.units.end());
  }
  // In alignment order, so the draw does not depend on variable numbering.
  for (const auto& site : spec.alignment) {
    const int v = job.model->Find(site.variable);
    const int layer = site.layer;
    const int width = transformer ? spec.network.width : spec.network.hidden[layer];
    const std::vector<std::string> ps = transformer ? site.positions : std::vector<std::string>{""};
    // A unit is free when it is free at every one of the site's tokens.
    auto taken_at = [&](const std::vector<std::set<int>>& t, int u) {
      for (const auto& p : ps) {
        if (t[layer * tokens + token_of(p)].count(u)) return true;
      }
      return false;
    };
    std::vector<int> free, fallback;
    for (int u = 0; u < width; ++u) {
      if (taken_at(taken, u)) continue;
      fallback.push_back(u);
      if (!taken_at(taken_real, u)) free.push_back(u);
    }
    std::vector<int>& pool = free.size() >= site.units.size() ? free : fallback;
    rng.Shuffle(pool);
    std::vector<int> units(pool.begin(), pool.begin() + std::min(pool.size(), site.units.size()));
    std::sort(units.begin(), units.end());
    for (const auto& p : ps) taken[layer * tokens + token_of(p)].insert(units.begin(), units.end());
    config::SiteSpec drawn = site;
    drawn.units = units;
    control[v].layer = layer;
    control[v].units = SiteColumns(job, drawn);
  }
  return control;
}

ReportJson FinalControls(const config::ResolvedJob& job, net::SiteNetworkImpl& net, const LabelTables& labels,
                         const EvalInputs& inputs, std::vector<std::string>* failures) {
  c10::InferenceMode guard;
  ReportJson out;
  const UnitMasks real(job.sets, AlignmentSites(job), LayerColumns(job));
  TripleDetail detail;
  detail.confusion = true;
  detail.max_failures = 200;
  ReportJson r = EvaluateTriples(
      *job.model, job.sets, labels, inputs.base, inputs.source, inputs.set,
      [&](const Tensor& b, const Tensor& s, const Tensor& z) { return real.Logits(net, b, s, z, nullptr); }, detail,
      failures);
  out["confusion"] = r["confusion"];
  const std::vector<UnitSite> random_sites = RandomUnitSites(job);
  const UnitMasks random(job.sets, random_sites, LayerColumns(job));
  ReportJson c = EvaluateTriples(
      *job.model, job.sets, labels, inputs.base, inputs.source, inputs.set,
      [&](const Tensor& b, const Tensor& s, const Tensor& z) { return random.Logits(net, b, s, z, nullptr); },
      TripleDetail{}, nullptr);
  ReportJson sites = ReportJson::object();
  for (const auto& site : job.spec.alignment) {
    const UnitSite& u = random_sites[job.model->Find(site.variable)];
    if (job.spec.network.is_transformer()) {
      // The drawn units at each of the site's positions (the same units at every one).
      std::vector<int> units;
      for (int c : u.units) {
        if (c / job.spec.network.width == config::TokenOf(*job.model, site.positions.front())) {
          units.push_back(c % job.spec.network.width);
        }
      }
      sites[site.variable] = ReportJson{{"layer", u.layer}, {"position", site.positions}, {"units", units}};
    } else {
      sites[site.variable] = ReportJson{{"layer", u.layer}, {"units", u.units}};
    }
  }
  ReportJson control;
  control["sites"] = sites;
  control["iia_held_out"] = c["iia_held_out"];
  control["iia_changed_held_out"] = c["iia_changed_held_out"];
  control["iia_by_set"] = c["iia_by_set"];
  out["control_random_units"] = control;
  return out;
}

absl::Status WriteFileAtomically(const std::string& path, const std::string& text) {
  namespace fs = std::filesystem;
  const std::string tmp = path + ".tmp";
  {
    std::ofstream out(tmp, std::ios::binary | std::ios::trunc);
    if (!out) return absl::UnavailableError(absl::StrCat(tmp, ": cannot write"));
    out << text;
    out.flush();
    if (!out) return absl::UnavailableError(absl::StrCat(tmp, ": write failed"));
  }
  std::error_code ec;
  fs::rename(tmp, path, ec);
  if (ec) return absl::UnavailableError(absl::StrCat(path, ": ", ec.message()));
  return absl::OkStatus();
}

}  // namespace graft::train
