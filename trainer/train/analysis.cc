#include "trainer/train/analysis.h"

#include <dlfcn.h>

#include <algorithm>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <iomanip>
#include <map>
#include <set>
#include <sstream>

#include <torch/torch.h>

#include "absl/status/status.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_join.h"
#include "trainer/causal/rng.h"
#include "trainer/eval/wilson.h"
#include "trainer/net/network.h"
#include "trainer/net/rotation.h"
#include "trainer/train/evaluation.h"

namespace graft::train {
namespace {

namespace fs = std::filesystem;
using torch::Tensor;

std::string ShapeText(const Tensor& t) {
  std::vector<std::string> dims;
  for (int64_t d : t.sizes()) dims.push_back(absl::StrCat(d));
  return absl::StrCat("[", absl::StrJoin(dims, ", "), "]");
}

// Threads as training.threads asks (torch and OpenBLAS's own pool), so figures match the run's.
void SetThreads(int threads) {
  torch::set_num_threads(threads);
  using SetFn = void (*)(int);
  auto set = reinterpret_cast<SetFn>(dlsym(RTLD_DEFAULT, "openblas_set_num_threads"));
  if (set != nullptr) set(threads);
}

// Loads a dict of tensors (LibTorch's pickle_save or Python's torch.save) into `net`, whose
// parameters it must fit exactly.
absl::Status LoadWeights(const std::string& path, net::SiteNetworkImpl& net) {
  std::ifstream in(path, std::ios::binary);
  if (!in) return absl::NotFoundError(absl::StrCat(path, ": cannot open the weights file"));
  std::vector<char> bytes((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
  c10::IValue value;
  try {
    value = torch::pickle_load(bytes);
  } catch (const c10::Error& e) {
    return absl::InvalidArgumentError(absl::StrCat(path, ": not a readable dict of tensors (",
                                                   e.what_without_backtrace(),
                                                   "); expected a graft weights.pt or a Python torch.save(dict)"));
  }
  if (!value.isGenericDict()) {
    return absl::InvalidArgumentError(absl::StrCat(path, ": expected a dict of tensors, found a ", value.tagKind()));
  }
  std::map<std::string, Tensor> given;
  for (const auto& item : value.toGenericDict()) {
    if (!item.key().isString()) {
      return absl::InvalidArgumentError(absl::StrCat(path, ": a key of the dict is a ", item.key().tagKind(),
                                                     ", not a tensor name"));
    }
    const std::string name = item.key().toStringRef();
    if (!item.value().isTensor()) {
      return absl::InvalidArgumentError(absl::StrCat(path, ": '", name, "' is a ", item.value().tagKind(),
                                                     ", not a tensor"));
    }
    given[name] = item.value().toTensor();
  }
  std::vector<std::pair<std::string, Tensor>> wanted = net.NamedExport();
  std::vector<std::string> missing, extra, problems;
  std::set<std::string> wanted_names;
  for (const auto& [name, param] : wanted) {
    wanted_names.insert(name);
    auto it = given.find(name);
    if (it == given.end()) {
      missing.push_back(name);
      continue;
    }
    if (it->second.sizes() != param.sizes()) {
      problems.push_back(absl::StrCat("'", name, "' has shape ", ShapeText(it->second), " but the config needs ",
                                      ShapeText(param)));
    } else if (!it->second.is_floating_point()) {
      problems.push_back(absl::StrCat("'", name, "' holds ", std::string(c10::toString(it->second.scalar_type())),
                                      ", not floating-point numbers"));
    }
  }
  for (const auto& [name, t] : given) {
    if (!wanted_names.count(name)) extra.push_back(name);
  }
  if (!missing.empty()) problems.push_back(absl::StrCat("missing: ", absl::StrJoin(missing, ", ")));
  if (!extra.empty()) problems.push_back(absl::StrCat("not part of this config's network: ", absl::StrJoin(extra, ", ")));
  if (!problems.empty()) {
    return absl::InvalidArgumentError(absl::StrCat(path, ": the weights do not fit the config: ",
                                                   absl::StrJoin(problems, "; ")));
  }
  torch::NoGradGuard no_grad;
  for (auto& [name, param] : wanted) param.copy_(given[name].to(torch::kFloat32));
  return absl::OkStatus();
}

absl::Status MakeDir(const std::string& dir) {
  std::error_code ec;
  fs::create_directories(dir, ec);
  if (ec) return absl::UnavailableError(absl::StrCat(dir, ": cannot create: ", ec.message()));
  return absl::OkStatus();
}

std::string Fixed(double v, int digits = 3) {
  std::ostringstream s;
  s << std::fixed << std::setprecision(digits) << v;
  return s.str();
}
std::string AccuracyText(const ReportJson& a) {
  return absl::StrCat(Fixed(a["value"].get<double>()), " [", Fixed(a["lo"].get<double>()), ", ",
                      Fixed(a["hi"].get<double>()), "] n=", a["n"].get<int64_t>());
}
std::string UnitsText(const std::vector<int>& units) {
  bool contiguous = true;
  for (size_t i = 1; i < units.size(); ++i) contiguous = contiguous && units[i] == units[i - 1] + 1;
  if (units.size() > 1 && contiguous) return absl::StrCat(units.front(), "-", units.back());
  return absl::StrJoin(units, ",");
}

absl::StatusOr<net::SiteNetwork> LoadNetwork(const config::ResolvedJob& job, const AnalysisOptions& options) {
  if (options.weights_path.empty()) return absl::InvalidArgumentError("--weights FILE is required");
  SetThreads(job.spec.training.threads);
  net::SiteNetwork net = CreateNetwork(job);
  absl::Status st = LoadWeights(options.weights_path, *net);
  if (!st.ok()) return st;
  return net;
}

// ---------------------------------------------------------------------------------------------
// Scan.

struct Candidate {
  int layer = 0;
  std::string position;  // transformer: the token's name; empty for an MLP
  int token = 0;         // transformer: the token's index
  bool random = false;
  int block_index = -1;  // contiguous blocks: position in the layer; random subsets: -1
  std::vector<int> units;
  eval::Accuracy iia, changed;
};

std::string HeatColor(double v) {
  // White (0) to a dark blue (1), linear in each channel.
  const double t = std::clamp(v, 0.0, 1.0);
  const int r = static_cast<int>(255 - t * (255 - 16)), g = static_cast<int>(255 - t * (255 - 60)),
            b = static_cast<int>(255 - t * (255 - 140));
  char buf[8];
  std::snprintf(buf, sizeof(buf), "#%02x%02x%02x", r, g, b);
  return buf;
}

std::string XmlEscape(const std::string& s) {
  std::string out;
  for (char c : s) {
    switch (c) {
      case '&': out += "&amp;"; break;
      case '<': out += "&lt;"; break;
      case '>': out += "&gt;"; break;
      case '"': out += "&quot;"; break;
      default: out += c;
    }
  }
  return out;
}

// One panel per variable: rows are layers, columns contiguous blocks; the cell shows IIA on
// changed cases; the best candidate is outlined.
// A transformer's scan has one panel per variable and position ("VAR at POSITION: ...").
std::string ScanSvg(const std::vector<std::string>& variables, const std::vector<std::vector<Candidate>>& all,
                    const std::vector<int>& best) {
  const int cell = 36, left = 70, top = 40, panel_gap = 50;
  int width = 420, y = 10;
  std::ostringstream body;
  std::vector<std::pair<size_t, std::string>> panels;  // (variable, position) in candidate order
  for (size_t v = 0; v < variables.size(); ++v) {
    for (const auto& c : all[v]) {
      const std::pair<size_t, std::string> panel{v, c.position};
      if (!c.random && std::find(panels.begin(), panels.end(), panel) == panels.end()) panels.push_back(panel);
    }
  }
  for (const auto& [v, position] : panels) {
    std::vector<int> layers;
    int columns = 0;
    for (const auto& c : all[v]) {
      if (c.random || c.position != position) continue;
      if (std::find(layers.begin(), layers.end(), c.layer) == layers.end()) layers.push_back(c.layer);
      columns = std::max(columns, c.block_index + 1);
    }
    width = std::max(width, left + columns * cell + 20);
    body << "<text x=\"10\" y=\"" << y + 20 << "\" font-size=\"14\" font-weight=\"bold\">" << XmlEscape(variables[v])
         << (position.empty() ? std::string() : " at " + XmlEscape(position))
         << ": IIA on changed cases by layer and unit block</text>\n";
    const int y0 = y + top;
    for (size_t r = 0; r < layers.size(); ++r) {
      body << "<text x=\"10\" y=\"" << y0 + r * cell + cell / 2 + 4 << "\" font-size=\"11\">layer " << layers[r]
           << "</text>\n";
    }
    for (size_t i = 0; i < all[v].size(); ++i) {
      const Candidate& c = all[v][i];
      if (c.random || c.position != position) continue;
      const int row = static_cast<int>(std::find(layers.begin(), layers.end(), c.layer) - layers.begin());
      const int x = left + c.block_index * cell, yy = y0 + row * cell;
      const double value = c.changed.value;
      body << "<rect x=\"" << x << "\" y=\"" << yy << "\" width=\"" << cell << "\" height=\"" << cell
           << "\" fill=\"" << HeatColor(value) << "\" stroke=\""
           << (static_cast<int>(i) == best[v] ? "#d00000\" stroke-width=\"3" : "#888888\" stroke-width=\"0.5")
           << "\"><title>layer " << c.layer << " units " << UnitsText(c.units) << ": " << Fixed(value) << " ["
           << Fixed(c.changed.lo) << ", " << Fixed(c.changed.hi) << "] n=" << c.changed.n << "</title></rect>\n";
      body << "<text x=\"" << x + cell / 2 << "\" y=\"" << yy + cell / 2 + 4
           << "\" font-size=\"10\" text-anchor=\"middle\" fill=\"" << (value > 0.6 ? "#ffffff" : "#000000") << "\">"
           << Fixed(value, 2) << "</text>\n";
    }
    for (int col = 0; col < columns; ++col) {
      body << "<text x=\"" << left + col * cell + cell / 2 << "\" y=\"" << y0 + layers.size() * cell + 14
           << "\" font-size=\"10\" text-anchor=\"middle\">" << col << "</text>\n";
    }
    body << "<text x=\"" << left << "\" y=\"" << y0 + layers.size() * cell + 30
         << "\" font-size=\"11\">unit block (block i starts at unit i x stride); red outline: best site</text>\n";
    y = y0 + static_cast<int>(layers.size()) * cell + panel_gap;
  }
  std::ostringstream svg;
  svg << "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"" << width << "\" height=\"" << y
      << "\" font-family=\"sans-serif\">\n<rect width=\"100%\" height=\"100%\" fill=\"#ffffff\"/>\n"
      << body.str() << "</svg>\n";
  return svg.str();
}

absl::StatusOr<std::string> ScanNetwork(const config::ResolvedJob& job, net::SiteNetworkImpl& net, const std::string& out_dir,
                                        std::ostream* progress) {
  if (job.spec.alignment.empty()) {
    return absl::InvalidArgumentError("scan: the config aligns no variable; add the variables to scan to 'alignment'");
  }
  c10::InferenceMode guard;
  const config::ScanSpec& sc = job.spec.scan;
  const auto& model = *job.model;
  const std::vector<int> columns = LayerColumns(job);
  const bool transformer = job.spec.network.is_transformer();
  std::vector<int> layers = sc.layers;
  if (layers.empty()) {
    for (size_t l = 0; l < columns.size(); ++l) layers.push_back(static_cast<int>(l));
  }
  // The token positions searched (a transformer's; an MLP has one unnamed group per layer).
  std::vector<std::string> positions = {""};
  if (transformer) {
    positions = sc.positions;
    if (positions.empty()) {
      for (int i : model.inputs()) positions.push_back(model.variable(i).name);
      positions.push_back("readout");
    }
  }
  std::vector<std::string> variables;
  std::vector<std::vector<Candidate>> all;
  std::vector<int> best;
  ReportJson report;
  report["pairs_per_candidate"] = sc.pairs;
  report["ranked_by"] = "iia_changed_held_out";
  ReportJson by_var = ReportJson::object();
  std::ostringstream table, summary;
  table << "variable\tlayer\t" << (transformer ? "position\t" : "") << "kind\tunits\tiia\tiia_lo\tiia_hi\tn\tiia_changed\tchanged_lo\tchanged_hi\tchanged_n\n";
  for (size_t a = 0; a < job.spec.alignment.size(); ++a) {
    const config::SiteSpec& site = job.spec.alignment[a];
    const int v = model.Find(site.variable);
    std::vector<config::InterventionSet> sets = {config::InterventionSet{site.variable, {v}}};
    LabelTables labels(model, sets);
    std::vector<causal::Triple> triples = causal::MakeTriples(job.split, 1, sc.pairs, job.spec.seed + a);
    std::vector<int64_t> b, s;
    for (const auto& t : triples) {
      b.push_back(t.base);
      s.push_back(t.source);
    }
    Tensor b_in = labels.Decode(torch::tensor(b, torch::kInt64));
    Tensor s_in = labels.Decode(torch::tensor(s, torch::kInt64));
    Tensor z = torch::zeros({b_in.size(0)}, torch::kInt64);
    const int last = net.num_layers() - 1;
    std::vector<Tensor> hb = net.Hidden(net.Embed(b_in), last), hs = net.Hidden(net.Embed(s_in), last);
    std::vector<Tensor> src_vals = labels.Values(s_in);
    Tensor base_label = labels.Values(b_in)[model.output()];
    Tensor cf = labels.Values(b_in, &src_vals, &z)[model.output()];
    Tensor changed = cf.ne(base_label);
    const int64_t changed_n = changed.sum().item<int64_t>();

    std::vector<Candidate> cands;
    causal::Rng rng(job.spec.seed, 0x5CA7 + a);
    for (int layer : layers) {
     for (const std::string& position : positions) {
      // After the last block only the readout token reaches the logits (the validator refuses
      // other positions there), so the other tokens of the last layer are not candidates.
      if (transformer && layer == net.num_layers() - 1 && position != "readout") continue;
      const int width = transformer ? job.spec.network.width : columns[layer];
      const int block = std::min(width, sc.block > 0 ? sc.block : static_cast<int>(site.units.size()));
      const int stride = sc.stride > 0 ? sc.stride : block;
      const int token = transformer ? config::TokenOf(model, position) : 0;
      int index = 0;
      for (int start = 0; start + block <= width; start += stride) {
        Candidate c;
        c.layer = layer;
        c.position = position;
        c.token = token;
        c.block_index = index++;
        for (int u = start; u < start + block; ++u) c.units.push_back(u);
        cands.push_back(std::move(c));
      }
      for (int r = 0; r < sc.random_subsets; ++r) {
        std::vector<int> pool(width);
        for (int u = 0; u < width; ++u) pool[u] = u;
        rng.Shuffle(pool);
        Candidate c;
        c.layer = layer;
        c.position = position;
        c.token = token;
        c.random = true;
        c.units.assign(pool.begin(), pool.begin() + block);
        std::sort(c.units.begin(), c.units.end());
        cands.push_back(std::move(c));
      }
     }
    }
    if (cands.empty()) {
      return absl::InvalidArgumentError("scan: no candidate site: at the last layer only the readout token is "
                                        "searched; add readout or an earlier layer to the scan");
    }
    int best_index = -1;
    for (size_t i = 0; i < cands.size(); ++i) {
      Candidate& c = cands[i];
      net::InterventionMasks masks;
      masks.lowest_layer = c.layer;
      masks.per_layer.resize(columns.size());
      Tensor m = torch::zeros({columns[c.layer]}, torch::kBool);
      const int offset = transformer ? c.token * job.spec.network.width : 0;
      for (int u : c.units) m[offset + u] = true;
      masks.per_layer[c.layer] = m.unsqueeze(0).expand({b_in.size(0), columns[c.layer]});
      Tensor ok = net.Intervened(hb, hs, masks).argmax(1).eq(cf);
      c.iia = eval::WilsonAccuracy(ok.sum().item<int64_t>(), ok.size(0));
      c.changed = eval::WilsonAccuracy((ok & changed).sum().item<int64_t>(), changed_n);
      if (best_index < 0 || c.changed.value > cands[best_index].changed.value ||
          (c.changed.value == cands[best_index].changed.value && c.iia.value > cands[best_index].iia.value)) {
        best_index = static_cast<int>(i);
      }
      if (progress != nullptr && ((i + 1) % 16 == 0 || i + 1 == cands.size())) {
        *progress << "scan " << site.variable << ": " << i + 1 << "/" << cands.size() << " candidates; best so far layer "
                  << cands[best_index].layer << (transformer ? " at " + cands[best_index].position : std::string())
                  << " units " << UnitsText(cands[best_index].units) << " changed IIA "
                  << Fixed(cands[best_index].changed.value) << "\n"
                  << std::flush;
      }
      table << site.variable << "\t" << c.layer << "\t" << (transformer ? c.position + "\t" : std::string()) << (c.random ? "random" : "block") << "\t" << UnitsText(c.units)
            << "\t" << c.iia.value << "\t" << c.iia.lo << "\t" << c.iia.hi << "\t" << c.iia.n << "\t" << c.changed.value
            << "\t" << c.changed.lo << "\t" << c.changed.hi << "\t" << c.changed.n << "\n";
    }
    ReportJson list = ReportJson::array();
    for (const auto& c : cands) {
      ReportJson j{{"layer", c.layer}};
      if (transformer) j["position"] = c.position;
      j["kind"] = c.random ? "random" : "block";
      j["units"] = c.units;
      j["iia"] = AccuracyReport(c.iia);
      j["iia_changed"] = AccuracyReport(c.changed);
      list.push_back(std::move(j));
    }
    const Candidate& top = cands[best_index];
    ReportJson entry;
    entry["aligned_site"] = ReportJson{{"layer", site.layer}, {"units", site.units}};
    if (transformer) entry["aligned_site"]["position"] = site.positions;
    entry["best"] = list[best_index];
    entry["candidates"] = list;
    by_var[site.variable] = entry;
    summary << site.variable << ": best site layer " << top.layer
            << (transformer ? " at " + top.position : std::string()) << " units " << UnitsText(top.units)
            << (top.random ? " (random subset)" : "") << ", IIA on changed cases "
            << AccuracyText(AccuracyReport(top.changed)) << ", overall " << AccuracyText(AccuracyReport(top.iia))
            << " (" << cands.size() << " candidates)\n";
    variables.push_back(site.variable);
    all.push_back(std::move(cands));
    best.push_back(best_index);
  }
  report["variables"] = by_var;
  absl::Status st = MakeDir(out_dir);
  if (!st.ok()) return st;
  st = WriteFileAtomically((fs::path(out_dir) / "scan.json").string(), report.dump(2) + "\n");
  if (!st.ok()) return st;
  st = WriteFileAtomically((fs::path(out_dir) / "scan.tsv").string(), table.str());
  if (!st.ok()) return st;
  st = WriteFileAtomically((fs::path(out_dir) / "scan.svg").string(), ScanSvg(variables, all, best));
  if (!st.ok()) return st;
  return summary.str();
}

// ---------------------------------------------------------------------------------------------
// DAS.

struct DasOutcome {
  net::Rotation rotation{nullptr};
  double final_loss = 0;
  ReportJson metrics;
};

// Trains a rotation of `layer` with `net` frozen, then evaluates it on the held-out triples.
// A transformer's rotation turns the residual stream of one token (das.position): the columns
// token * width ... + width of the layer's activation.
DasOutcome SearchRotation(const config::ResolvedJob& job, net::SiteNetworkImpl& net, const std::vector<int>& offsets,
                          const std::vector<int>& dims, const std::string& label, std::ostream* progress) {
  const config::DasSpec& d = job.spec.das;
  const auto& model = *job.model;
  const int layer = d.layer;
  const bool transformer = job.spec.network.is_transformer();
  const int width = transformer ? job.spec.network.width : job.spec.network.hidden[layer];
  const int64_t first = transformer ? int64_t{config::TokenOf(model, d.position)} * width : 0;
  const int64_t columns = LayerColumns(job)[layer];
  const int num_sets = static_cast<int>(job.sets.size());
  for (auto& p : net.parameters()) p.set_requires_grad(false);
  // Rotated dimensions of each set.
  Tensor set_masks = torch::zeros({num_sets, width}, torch::kBool);
  for (int s = 0; s < num_sets; ++s) {
    for (int v : job.sets[s].variables) {
      const int a = job.site_of_variable[v];
      for (int k = 0; k < dims[a]; ++k) set_masks[s][offsets[a] + k] = true;
    }
  }
  LabelTables labels(model, job.sets);
  auto intervened = [&](net::RotationImpl& rot, const Tensor& b_in, const Tensor& s_in, const Tensor& z) {
    std::vector<Tensor> hb, hs;
    {
      torch::NoGradGuard no_grad;
      hb = net.Hidden(net.Embed(b_in), layer);
      hs = net.Hidden(net.Embed(s_in), layer);
    }
    Tensor turned = rot.Interchange(hb[layer].narrow(1, first, width), hs[layer].narrow(1, first, width),
                                    set_masks.index_select(0, z));
    Tensor h = first == 0 && width == columns
                   ? turned
                   : torch::cat({hb[layer].narrow(1, 0, first), turned,
                                 hb[layer].narrow(1, first + width, columns - first - width)},
                                1);
    for (int k = layer + 1; k < net.num_layers(); ++k) h = net.Layer(k, h);
    return net.Head(h);
  };
  DasOutcome outcome;
  torch::manual_seed(job.spec.seed ^ 0xDA5);
  outcome.rotation = net::Rotation(width);
  torch::optim::Adam opt(outcome.rotation->parameters(), torch::optim::AdamOptions(d.lr));
  causal::Rng rng(job.spec.seed, 0xDA55);
  const int out = model.output();
  double loss_sum = 0;
  int64_t loss_n = 0;
  for (int64_t step = 1; step <= d.steps; ++step) {
    std::vector<int64_t> base(d.batch_size), perm(d.batch_size), z(d.batch_size);
    for (int i = 0; i < d.batch_size; ++i) {
      base[i] = job.split.DrawTraining(rng);
      perm[i] = i;
      z[i] = static_cast<int64_t>(rng.Uniform(num_sets));
    }
    rng.Shuffle(perm);
    Tensor b_in = labels.Decode(torch::tensor(base, torch::kInt64));
    Tensor s_in = b_in.index_select(0, torch::tensor(perm, torch::kInt64));
    Tensor zt = torch::tensor(z, torch::kInt64);
    std::vector<Tensor> src_vals = labels.Values(s_in);
    Tensor cf = labels.Values(b_in, &src_vals, &zt)[out];
    Tensor loss = torch::nn::functional::cross_entropy(intervened(*outcome.rotation, b_in, s_in, zt), cf);
    opt.zero_grad();
    loss.backward();
    opt.step();
    loss_sum += loss.item<double>();
    ++loss_n;
    if (step % 50 == 0 || step == d.steps) {
      outcome.final_loss = loss_sum / loss_n;
      if (progress != nullptr) {
        *progress << "das " << label << ": step " << step << "/" << d.steps << "  loss " << Fixed(outcome.final_loss, 4)
                  << "\n"
                  << std::flush;
      }
      loss_sum = 0;
      loss_n = 0;
    }
  }
  c10::InferenceMode guard;
  EvalInputs inputs = CreateEvalInputs(job);
  outcome.metrics = EvaluateTriples(
      model, job.sets, labels, inputs.base, inputs.source, inputs.set,
      [&](const Tensor& b, const Tensor& s, const Tensor& zz) { return intervened(*outcome.rotation, b, s, zz); },
      TripleDetail{}, nullptr);
  outcome.metrics["loss_final"] = outcome.final_loss;
  return outcome;
}

}  // namespace

absl::StatusOr<std::string> EvaluateStored(const config::ResolvedJob& job, const AnalysisOptions& options) {
  try {
    if (options.weights_path.empty()) return absl::InvalidArgumentError("--weights FILE is required");
    SetThreads(job.spec.training.threads);
    LabelTables labels(*job.model, job.sets);
    EvalInputs inputs = CreateEvalInputs(job);
    net::SiteNetwork net = CreateNetwork(job);
    const std::vector<UnitSite> sites = AlignmentSites(job);
    const UnitMasks masks(job.sets, sites, LayerColumns(job));
    auto logits = [&](const Tensor& b, const Tensor& s, const Tensor& z) { return masks.Logits(*net, b, s, z, nullptr); };
    ReportJson step0;
    {
      c10::InferenceMode guard;
      step0 = EvaluateNetwork(job, *net, labels, inputs, logits);  // the untrained network of this spec
    }
    absl::Status st = LoadWeights(options.weights_path, *net);
    if (!st.ok()) return st;
    ReportJson m;
    m["weights"] = options.weights_path;
    {
      c10::InferenceMode guard;
      ReportJson metrics = EvaluateNetwork(job, *net, labels, inputs, logits);
      for (auto& [k, v] : metrics.items()) m[k] = v;
    }
    m["control_untrained_network"] = ReportJson{{"iia_held_out", step0["iia_held_out"]}, {"iia_changed_held_out", step0["iia_changed_held_out"]}};
    std::vector<std::string> failures;
    ReportJson controls = FinalControls(job, *net, labels, inputs, &failures);
    for (auto& [k, v] : controls.items()) m[k] = v;
    st = MakeDir(options.out_dir);
    if (!st.ok()) return st;
    st = WriteFileAtomically((fs::path(options.out_dir) / "evaluation.json").string(), m.dump(2) + "\n");
    if (!st.ok()) return st;
    std::string text;
    for (const auto& f : failures) text += f + "\n";
    st = WriteFileAtomically((fs::path(options.out_dir) / "failures.jsonl").string(), text);
    if (!st.ok()) return st;
    std::ostringstream s;
    s << "task accuracy, held out   " << AccuracyText(m["acc_held_out"]) << "\n";
    s << "IIA, held out             " << AccuracyText(m["iia_held_out"]) << "\n";
    s << "IIA, changed cases only   " << AccuracyText(m["iia_changed_held_out"]) << "\n";
    for (auto& [name, a] : m["iia_by_set"].items()) s << "IIA, set " << name << "  " << AccuracyText(a) << "\n";
    s << "unchanged floor           " << Fixed(m["unchanged_floor"].get<double>()) << "\n";
    s << "control, random units     " << AccuracyText(m["control_random_units"]["iia_held_out"]) << " (changed "
      << AccuracyText(m["control_random_units"]["iia_changed_held_out"]) << ")\n";
    s << "control, untrained net    " << AccuracyText(step0["iia_held_out"]) << "\n";
    return s.str();
  } catch (const c10::Error& e) {
    return absl::InternalError(absl::StrCat("LibTorch: ", e.what_without_backtrace()));
  }
}

absl::StatusOr<std::string> ScanStored(const config::ResolvedJob& job, const AnalysisOptions& options) {
  try {
    auto net = LoadNetwork(job, options);
    if (!net.ok()) return net.status();
    return ScanNetwork(job, **net, options.out_dir, options.progress);
  } catch (const c10::Error& e) {
    return absl::InternalError(absl::StrCat("LibTorch: ", e.what_without_backtrace()));
  }
}

absl::StatusOr<std::string> DasStored(const config::ResolvedJob& job, const AnalysisOptions& options) {
  try {
    if (job.spec.alignment.empty()) {
      return absl::InvalidArgumentError("das: the config aligns no variable; add the variables to search for to 'alignment'");
    }
    auto trained = LoadNetwork(job, options);
    if (!trained.ok()) return trained.status();
    config::ResolvedJob resolved = job;
    config::DasSpec& d = resolved.spec.das;
    if (d.layer < 0) {  // no das: block: the layer every aligned variable shares
      for (const auto& site : job.spec.alignment) {
        if (site.layer != job.spec.alignment.front().layer) {
          return absl::InvalidArgumentError(
              "das: the aligned variables sit in different layers; add a das: block with das.layer");
        }
      }
      d.layer = job.spec.alignment.front().layer;
    }
    if (job.spec.network.is_transformer() && d.position.empty()) {  // no das: block: the position all share
      for (const auto& site : job.spec.alignment) {
        if (site.positions.size() != 1 || site.positions != job.spec.alignment.front().positions) {
          return absl::InvalidArgumentError(
              "das: the aligned variables do not sit at one position; add a das: block with das.position");
        }
      }
      d.position = job.spec.alignment.front().positions.front();
    }
    const int width = job.spec.network.is_transformer() ? job.spec.network.width : job.spec.network.hidden[d.layer];
    std::vector<int> offsets, dims;
    int at = 0;
    for (const auto& site : job.spec.alignment) {
      const int k = d.dims > 0 ? d.dims : static_cast<int>(site.units.size());
      offsets.push_back(at);
      dims.push_back(k);
      at += k;
    }
    if (at > width) {
      return absl::InvalidArgumentError(absl::StrCat("das: ", at, " rotated dimensions do not fit in layer ", d.layer,
                                                     " (", width, " units)"));
    }
    DasOutcome real = SearchRotation(resolved, **trained, offsets, dims, "trained network", options.progress);
    net::SiteNetwork untrained = CreateNetwork(job);
    DasOutcome control = SearchRotation(resolved, *untrained, offsets, dims, "untrained network (control)",
                                        options.progress);
    ReportJson r;
    r["weights"] = options.weights_path;
    r["layer"] = d.layer;
    if (!d.position.empty()) r["position"] = d.position;
    ReportJson slices = ReportJson::object();
    for (size_t a = 0; a < job.spec.alignment.size(); ++a) {
      slices[job.spec.alignment[a].variable] = ReportJson{{"first", offsets[a]}, {"count", dims[a]}};
    }
    r["rotated_dims"] = slices;
    r["steps"] = d.steps;
    r["lr"] = d.lr;
    r["network"] = real.metrics;
    r["control_untrained_network"] = control.metrics;
    absl::Status st = MakeDir(options.out_dir);
    if (!st.ok()) return st;
    st = WriteFileAtomically((fs::path(options.out_dir) / "das.json").string(), r.dump(2) + "\n");
    if (!st.ok()) return st;
    c10::Dict<std::string, Tensor> dict;
    {
      torch::NoGradGuard no_grad;
      dict.insert("rotation", real.rotation->MatrixDouble().contiguous());
      dict.insert("skew", real.rotation->Skew().contiguous());
      dict.insert("control.rotation", control.rotation->MatrixDouble().contiguous());
      dict.insert("control.skew", control.rotation->Skew().contiguous());
    }
    std::vector<char> bytes = torch::pickle_save(c10::IValue(dict));
    st = WriteFileAtomically((fs::path(options.out_dir) / "rotation.pt").string(), std::string(bytes.begin(), bytes.end()));
    if (!st.ok()) return st;
    std::ostringstream s;
    s << "DAS at layer " << d.layer << (d.position.empty() ? std::string() : " at " + d.position) << ", " << d.steps
      << " steps\n";
    s << "trained network:   IIA " << AccuracyText(real.metrics["iia_held_out"]) << ", changed "
      << AccuracyText(real.metrics["iia_changed_held_out"]) << "\n";
    s << "untrained control: IIA " << AccuracyText(control.metrics["iia_held_out"]) << ", changed "
      << AccuracyText(control.metrics["iia_changed_held_out"]) << "\n";
    return s.str();
  } catch (const c10::Error& e) {
    return absl::InternalError(absl::StrCat("LibTorch: ", e.what_without_backtrace()));
  }
}

}  // namespace graft::train
