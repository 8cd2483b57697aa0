#include "configs/reader/spec.h"

#include <algorithm>
#include <cctype>
#include <cerrno>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <map>
#include <optional>
#include <set>
#include <sstream>

#include "absl/status/status.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_join.h"
#include "absl/strings/str_split.h"
#include "configs/reader/suggest.h"

namespace graft::config {
namespace {

using causal::DomainDecl;
using causal::DomainKind;
using causal::Role;
using causal::VariableDecl;


// Parse-time positions of things validated after the model exists.
struct SiteLocations {
  Location layer, units;
  std::vector<Location> positions;  // transformer: per listed position
};
struct Positions {
  std::vector<Location> var_name;         // per declaration
  std::vector<Location> var_expr;         // per declaration: first character of the expression
  std::vector<std::vector<Location>> var_domain_items;  // per declaration, per symbol
  std::vector<Location> var_domain;       // per declaration
  std::vector<SiteLocations> sites;       // per alignment entry
  std::vector<std::vector<Location>> set_items;  // per intervention set, per name
  std::vector<Location> sets;             // per intervention set
  Location interventions, held_out, hidden, root;
  Location scan_block, das, das_layer, das_dims, das_position;
  std::vector<Location> scan_positions;
  Location algorithm, steps, das_steps;
};

// Reads typed values out of a ConfigNode tree, collecting every error with its location.
class Reader {
 public:
  void Error(const Location& loc, const std::string& message) {
    errors_.push_back(absl::StrCat(loc.ToString(), ": ", message));
  }
  bool ok() const { return errors_.empty(); }
  const std::vector<std::string>& errors() const { return errors_; }

  // Reports keys of `map` not in `allowed`, suggesting the nearest one.
  void CheckKeys(const ConfigNode& map, const std::string& path, const std::vector<std::string>& allowed) {
    for (const auto& [k, v] : map.entries) {
      if (std::find(allowed.begin(), allowed.end(), k.scalar) != allowed.end()) continue;
      std::string where = path.empty() ? "at the top level" : absl::StrCat("in '", path, "'");
      std::string msg = absl::StrCat("unknown key '", k.scalar, "' ", where);
      std::string near = Nearest(k.scalar, allowed);
      if (!near.empty()) {
        absl::StrAppend(&msg, "; did you mean '", near, "'?");
      } else {
        absl::StrAppend(&msg, "; valid keys: ", absl::StrJoin(allowed, ", "));
      }
      Error(k.loc, msg);
    }
  }

  // A map, or an error; null counts as absent (returns nullptr without error).
  const ConfigNode* Map(const ConfigNode* node, const std::string& path) {
    if (node == nullptr || node->IsNull()) return nullptr;
    if (!node->IsMap()) {
      Error(node->loc, absl::StrCat(path, ": expected a map of keys, got ", node->Describe()));
      return nullptr;
    }
    return node;
  }

  std::optional<int64_t> Int(const ConfigNode& node, const std::string& path, int64_t lo, int64_t hi) {
    std::string expected = hi >= (int64_t{1} << 30) ? absl::StrCat("a whole number >= ", lo)
                                           : absl::StrCat("a whole number in [", lo, ", ", hi, "]");
    if (!node.IsScalar() || node.quoted) {
      Error(node.loc, absl::StrCat(path, ": expected ", expected, ", got ", node.Describe()));
      return std::nullopt;
    }
    errno = 0;
    char* end = nullptr;
    long long v = std::strtoll(node.scalar.c_str(), &end, 10);
    if (node.scalar.empty() || *end != '\0' || errno == ERANGE) {
      Error(node.loc, absl::StrCat(path, ": expected ", expected, ", got ", node.Describe()));
      return std::nullopt;
    }
    if (v < lo || v > hi) {
      Error(node.loc, absl::StrCat(path, ": expected ", expected, ", got ", v));
      return std::nullopt;
    }
    return v;
  }

  std::optional<double> Number(const ConfigNode& node, const std::string& path, double lo, double hi,
                               bool hi_open = false, bool lo_open = false) {
    std::string expected = absl::StrCat("a number in ", lo_open ? "(" : "[", FormatDouble(lo), ", ",
                                        std::isinf(hi) ? "inf" : FormatDouble(hi), hi_open ? ")" : "]");
    if (!node.IsScalar() || node.quoted) {
      Error(node.loc, absl::StrCat(path, ": expected ", expected, ", got ", node.Describe()));
      return std::nullopt;
    }
    char* end = nullptr;
    double v = std::strtod(node.scalar.c_str(), &end);
    if (node.scalar.empty() || *end != '\0' || !std::isfinite(v)) {
      // YAML spells not-a-number and infinity .nan and .inf; strtod reads nan, inf and 1e999.
      std::string lower = node.scalar;
      for (char& c : lower) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
      const bool special = lower == ".nan" || lower == ".inf" || lower == "+.inf" || lower == "-.inf" ||
                           (!node.scalar.empty() && *end == '\0');
      Error(node.loc, absl::StrCat(path, ": expected ", expected, ", got ", node.Describe(),
                                   special ? " (not-a-number and infinities are not numbers graft accepts)" : ""));
      return std::nullopt;
    }
    if (v < lo || v > hi || (hi_open && v == hi) || (lo_open && v == lo)) {
      Error(node.loc, absl::StrCat(path, ": expected ", expected, ", got ", node.scalar));
      return std::nullopt;
    }
    return v;
  }

  std::optional<bool> Bool(const ConfigNode& node, const std::string& path) {
    if (node.IsScalar() && !node.quoted) {
      if (node.scalar == "true") return true;
      if (node.scalar == "false") return false;
    }
    Error(node.loc, absl::StrCat(path, ": expected true or false, got ", node.Describe()));
    return std::nullopt;
  }

  std::optional<std::string> String(const ConfigNode& node, const std::string& path) {
    if (!node.IsScalar()) {
      Error(node.loc, absl::StrCat(path, ": expected text, got ", node.Describe()));
      return std::nullopt;
    }
    return node.scalar;
  }

  // One of `allowed` (index), or an error with a suggestion.
  std::optional<int> Choice(const ConfigNode& node, const std::string& path,
                            const std::vector<std::string>& allowed) {
    if (node.IsScalar()) {
      for (size_t i = 0; i < allowed.size(); ++i) {
        if (node.scalar == allowed[i]) return static_cast<int>(i);
      }
    }
    std::string msg = absl::StrCat(path, ": expected one of ", absl::StrJoin(allowed, " | "), ", got ",
                                   node.Describe());
    if (node.IsScalar()) {
      std::string near = Nearest(node.scalar, allowed);
      if (!near.empty()) absl::StrAppend(&msg, "; did you mean '", near, "'?");
    }
    Error(node.loc, msg);
    return std::nullopt;
  }

 private:
  std::vector<std::string> errors_;
};

// The first character of an expression written as `node`.
Location ExprStart(const ConfigNode& node) { return node.quoted ? node.loc.Advance(1) : node.loc; }

std::optional<DomainDecl> ReadDomain(Reader& r, const ConfigNode& node, const std::string& path,
                                     std::vector<Location>* item_locs, bool classes = false) {
  DomainDecl d;
  if (node.IsSequence()) {
    d.kind = DomainKind::kSymbols;
    for (const auto& item : node.items) {
      if (!item.IsScalar() || item.scalar.empty()) {
        r.Error(item.loc, absl::StrCat(path, ": each value must be a name, got ", item.Describe()));
        return std::nullopt;
      }
      if (!item.scalar.empty() && (std::isdigit(static_cast<unsigned char>(item.scalar[0])) || item.scalar[0] == '-')) {
        r.Error(item.loc, absl::StrCat(path, ": value ", item.Describe(), " is a number; list names",
                                       classes ? "" : ", or write numbers as {range: [lo, hi]}"));
        return std::nullopt;
      }
      d.symbols.push_back(item.scalar);
      if (item_locs) item_locs->push_back(item.loc);
    }
    if (d.symbols.empty()) {
      r.Error(node.loc, absl::StrCat(path, ": the list of values is empty"));
      return std::nullopt;
    }
    return d;
  }
  if (classes) {
    r.Error(node.loc, absl::StrCat(path, ": expected a list of class names, got ", node.Describe()));
    return std::nullopt;
  }
  if (node.IsScalar() && !node.quoted && node.scalar == "bool") {
    d.kind = DomainKind::kBool;
    return d;
  }
  if (node.IsMap()) {
    r.CheckKeys(node, path, {"range"});
    const ConfigNode* range = node.Find("range");
    if (range == nullptr) {
      if (node.entries.empty()) r.Error(node.loc, absl::StrCat(path, ": expected {range: [lo, hi]}"));
      return std::nullopt;
    }
    if (!range->IsSequence() || range->items.size() != 2) {
      r.Error(range->loc, absl::StrCat(path, ".range: expected [lo, hi] (two whole numbers), got ",
                                       range->Describe()));
      return std::nullopt;
    }
    auto lo = r.Int(range->items[0], path + ".range[0]", -1000000000, 1000000000);
    auto hi = r.Int(range->items[1], path + ".range[1]", -1000000000, 1000000000);
    if (!lo || !hi) return std::nullopt;
    if (*hi < *lo) {
      r.Error(range->loc, absl::StrCat(path, ".range: lo ", *lo, " is above hi ", *hi));
      return std::nullopt;
    }
    d.kind = DomainKind::kRange;
    d.lo = *lo;
    d.hi = *hi;
    return d;
  }
  r.Error(node.loc, absl::StrCat(path, ": expected a list of values, {range: [lo, hi]} or bool, got ",
                                 node.Describe()));
  return std::nullopt;
}

// "0-15", "7", or a list of whole numbers.
std::optional<std::vector<int>> ReadUnits(Reader& r, const ConfigNode& node, const std::string& path) {
  std::vector<int> units;
  const std::string expected = "an inclusive range such as 0-15, or a list of unit indices";
  if (node.IsScalar() && !node.quoted) {
    std::vector<std::string> parts = absl::StrSplit(node.scalar, '-');
    auto whole = [](const std::string& s, int* out) {
      if (s.empty() || s.size() > 9) return false;
      for (char c : s) {
        if (!std::isdigit(static_cast<unsigned char>(c))) return false;
      }
      *out = std::atoi(s.c_str());
      return true;
    };
    int a = 0, b = 0;
    if (parts.size() == 1 && whole(parts[0], &a)) {
      units.push_back(a);
    } else if (parts.size() == 2 && whole(parts[0], &a) && whole(parts[1], &b)) {
      if (b < a) {
        r.Error(node.loc, absl::StrCat(path, ": range ", node.scalar, " is empty; write lo-hi with lo <= hi"));
        return std::nullopt;
      }
      for (int u = a; u <= b; ++u) units.push_back(u);
    } else {
      r.Error(node.loc, absl::StrCat(path, ": expected ", expected, ", got ", node.Describe()));
      return std::nullopt;
    }
  } else if (node.IsSequence()) {
    for (const auto& item : node.items) {
      auto u = r.Int(item, path + "[]", 0, 1 << 20);
      if (!u) return std::nullopt;
      units.push_back(static_cast<int>(*u));
    }
    if (units.empty()) {
      r.Error(node.loc, absl::StrCat(path, ": the list of units is empty"));
      return std::nullopt;
    }
  } else {
    r.Error(node.loc, absl::StrCat(path, ": expected ", expected, ", got ", node.Describe()));
    return std::nullopt;
  }
  std::vector<int> sorted = units;
  std::sort(sorted.begin(), sorted.end());
  if (std::adjacent_find(sorted.begin(), sorted.end()) != sorted.end()) {
    r.Error(node.loc, absl::StrCat(path, ": a unit is listed twice"));
    return std::nullopt;
  }
  return sorted;
}

void ReadAlgorithm(Reader& r, const ConfigNode& algo, JobSpec& spec, Positions& pos) {
  r.CheckKeys(algo, "algorithm", {"inputs", "mechanisms", "output"});
  auto add = [&](VariableDecl d, const Location& name_loc, const Location& expr_loc,
                 const Location& dom_loc, std::vector<Location> items) {
    spec.variables.push_back(std::move(d));
    pos.var_name.push_back(name_loc);
    pos.var_expr.push_back(expr_loc);
    pos.var_domain.push_back(dom_loc);
    pos.var_domain_items.push_back(std::move(items));
  };
  const ConfigNode* inputs = r.Map(algo.Find("inputs"), "algorithm.inputs");
  if (inputs == nullptr) {
    if (algo.Find("inputs") == nullptr) r.Error(algo.loc, "algorithm: needs 'inputs' (a map from input name to domain)");
  } else {
    for (const auto& [k, v] : inputs->entries) {
      VariableDecl d;
      d.name = k.scalar;
      d.role = Role::kInput;
      std::vector<Location> items;
      d.domain = ReadDomain(r, v, absl::StrCat("algorithm.inputs.", k.scalar), &items);
      if (!d.domain) continue;
      add(std::move(d), k.loc, v.loc, v.loc, std::move(items));
    }
    if (inputs->entries.empty()) r.Error(inputs->loc, "algorithm.inputs: declare at least one input");
  }
  const ConfigNode* mechs = r.Map(algo.Find("mechanisms"), "algorithm.mechanisms");
  if (mechs != nullptr) {
    for (const auto& [k, v] : mechs->entries) {
      const std::string path = absl::StrCat("algorithm.mechanisms.", k.scalar);
      VariableDecl d;
      d.name = k.scalar;
      d.role = Role::kMechanism;
      std::vector<Location> items;
      Location expr_loc = v.loc, dom_loc = v.loc;
      if (v.IsScalar()) {
        d.expr = v.scalar;
        expr_loc = ExprStart(v);
      } else if (v.IsMap()) {
        r.CheckKeys(v, path, {"expr", "domain"});
        const ConfigNode* e = v.Find("expr");
        if (e == nullptr || !e->IsScalar()) {
          r.Error(e ? e->loc : v.loc, absl::StrCat(path, ".expr: expected the mechanism's expression as text"));
          continue;
        }
        d.expr = e->scalar;
        expr_loc = ExprStart(*e);
        if (const ConfigNode* dom = v.Find("domain")) {
          d.domain = ReadDomain(r, *dom, path + ".domain", &items);
          dom_loc = dom->loc;
          if (!d.domain) continue;
        }
      } else {
        r.Error(v.loc, absl::StrCat(path, ": expected an expression, or {expr: ..., domain: ...}, got ",
                                    v.Describe()));
        continue;
      }
      add(std::move(d), k.loc, expr_loc, dom_loc, std::move(items));
    }
  }
  const ConfigNode* out = r.Map(algo.Find("output"), "algorithm.output");
  if (out == nullptr) {
    if (algo.Find("output") == nullptr) r.Error(algo.loc, "algorithm: needs 'output' (name: {expr: ..., classes: [...]})");
    return;
  }
  if (out->entries.size() != 1) {
    r.Error(out->loc, absl::StrCat("algorithm.output: expected exactly one output variable, got ",
                                   out->entries.size()));
    return;
  }
  const auto& [k, v] = out->entries[0];
  const std::string path = absl::StrCat("algorithm.output.", k.scalar);
  VariableDecl d;
  d.name = k.scalar;
  d.role = Role::kOutput;
  std::vector<Location> items;
  Location expr_loc = v.loc, dom_loc = v.loc;
  if (v.IsScalar()) {
    d.expr = v.scalar;
    expr_loc = ExprStart(v);
  } else if (v.IsMap()) {
    r.CheckKeys(v, path, {"expr", "classes"});
    const ConfigNode* e = v.Find("expr");
    if (e == nullptr || !e->IsScalar()) {
      r.Error(e ? e->loc : v.loc, absl::StrCat(path, ".expr: expected the output's expression as text"));
      return;
    }
    d.expr = e->scalar;
    expr_loc = ExprStart(*e);
    if (const ConfigNode* cls = v.Find("classes")) {
      d.domain = ReadDomain(r, *cls, path + ".classes", &items, /*classes=*/true);
      dom_loc = cls->loc;
      if (!d.domain) return;
    }
  } else {
    r.Error(v.loc, absl::StrCat(path, ": expected an expression, or {expr: ..., classes: [...]}"));
    return;
  }
  add(std::move(d), k.loc, expr_loc, dom_loc, std::move(items));
}

// The key node of `key` in `map` (its location is the key's), or nullptr.
const ConfigNode* KeyNode(const ConfigNode& map, const std::string& key) {
  for (const auto& [k, v] : map.entries) {
    if (k.scalar == key) return &k;
  }
  return nullptr;
}

// network: {type: transformer, width, layers, heads, mlp_width, activation}.
void ReadTransformer(Reader& r, const ConfigNode& net, JobSpec& spec) {
  NetworkSpec& n = spec.network;
  n.activation = Activation::kGelu;
  for (const char* mlp_key : {"hidden", "embedding"}) {
    if (const ConfigNode* k = KeyNode(net, mlp_key)) {
      r.Error(k->loc, absl::StrCat("network.", mlp_key, ": a transformer has no '", mlp_key,
                                   "'; its tokens are 'width' wide and it has 'layers' blocks (keys: type, width, "
                                   "layers, heads, mlp_width, activation)"));
    }
  }
  r.CheckKeys(net, "network", {"type", "width", "layers", "heads", "mlp_width", "activation", "hidden", "embedding"});
  const ConfigNode* width = net.Find("width");
  if (width != nullptr) {
    if (auto v = r.Int(*width, "network.width", 1, 65536)) n.width = static_cast<int>(*v);
  }
  if (const ConfigNode* x = net.Find("layers")) {
    if (auto v = r.Int(*x, "network.layers", 1, 1024)) n.layers = static_cast<int>(*v);
  }
  const ConfigNode* heads = net.Find("heads");
  if (heads != nullptr) {
    if (auto v = r.Int(*heads, "network.heads", 1, 65536)) n.heads = static_cast<int>(*v);
  }
  if (const ConfigNode* x = net.Find("mlp_width")) {
    if (auto v = r.Int(*x, "network.mlp_width", 1, 1 << 20)) n.mlp_width = static_cast<int>(*v);
  }
  if (const ConfigNode* a = net.Find("activation")) {
    if (auto c = r.Choice(*a, "network.activation", {"relu", "gelu", "tanh"})) n.activation = static_cast<Activation>(*c);
  }
  if (r.ok() && n.width % n.heads != 0) {
    const ConfigNode* at = heads != nullptr ? heads : width != nullptr ? width : &net;
    r.Error(at->loc, absl::StrCat("network.heads: width ", n.width, " is not divisible by ", n.heads,
                                  " heads; each head gets width / heads dimensions, so choose heads that divide ",
                                  n.width));
  }
}

// A position (an input's name or `readout`) or a non-empty list of distinct ones, as written.
std::optional<std::vector<std::string>> ReadPositions(Reader& r, const ConfigNode& node, const std::string& path,
                                                      std::vector<Location>* locs) {
  std::vector<const ConfigNode*> items;
  if (node.IsSequence()) {
    for (const auto& item : node.items) items.push_back(&item);
  } else {
    items.push_back(&node);
  }
  if (items.empty()) {
    r.Error(node.loc, absl::StrCat(path, ": expected an input's name, readout, or a non-empty list of them, got []"));
    return std::nullopt;
  }
  std::vector<std::string> out;
  bool bad = false;
  for (const ConfigNode* item : items) {
    if (!item->IsScalar() || item->scalar.empty()) {
      r.Error(item->loc, absl::StrCat(path, ": expected an input's name or readout, got ", item->Describe()));
      bad = true;
      continue;
    }
    if (std::find(out.begin(), out.end(), item->scalar) != out.end()) {
      r.Error(item->loc, absl::StrCat(path, ": position '", item->scalar, "' is listed twice"));
      bad = true;
      continue;
    }
    out.push_back(item->scalar);
    if (locs != nullptr) locs->push_back(item->loc);
  }
  if (bad) return std::nullopt;
  return out;
}

void ReadNetwork(Reader& r, const ConfigNode* net, JobSpec& spec, Positions& pos) {
  pos.hidden = pos.root;
  if (net == nullptr) return;
  pos.hidden = net->loc;
  if (const ConfigNode* t = net->Find("type")) {
    auto c = r.Choice(*t, "network.type", {"mlp", "transformer"});
    if (!c) return;  // the other keys depend on the type
    spec.network.type = *c == 0 ? "mlp" : "transformer";
  }
  if (spec.network.is_transformer()) {
    ReadTransformer(r, *net, spec);
    return;
  }
  r.CheckKeys(*net, "network", {"type", "embedding", "hidden", "activation"});
  if (const ConfigNode* e = r.Map(net->Find("embedding"), "network.embedding")) {
    r.CheckKeys(*e, "network.embedding", {"dim", "init"});
    if (const ConfigNode* d = e->Find("dim")) {
      if (auto v = r.Int(*d, "network.embedding.dim", 1, 4096)) spec.network.embedding_dim = static_cast<int>(*v);
    }
    if (const ConfigNode* i = e->Find("init")) {
      if (auto c = r.Choice(*i, "network.embedding.init", {"learned", "fixed_random"})) {
        spec.network.embedding_init = static_cast<EmbeddingInit>(*c);
      }
    }
  }
  if (const ConfigNode* h = net->Find("hidden")) {
    pos.hidden = h->loc;
    if (!h->IsSequence() || h->items.empty()) {
      r.Error(h->loc, absl::StrCat("network.hidden: expected a non-empty list of layer widths, got ", h->Describe()));
    } else {
      spec.network.hidden.clear();
      for (const auto& item : h->items) {
        if (auto w = r.Int(item, "network.hidden[]", 1, 65536)) spec.network.hidden.push_back(static_cast<int>(*w));
      }
    }
  }
  if (const ConfigNode* a = net->Find("activation")) {
    if (auto c = r.Choice(*a, "network.activation", {"relu", "gelu", "tanh"})) {
      spec.network.activation = static_cast<Activation>(*c);
    }
  }
}

void ReadAlignment(Reader& r, const ConfigNode* al, JobSpec& spec, Positions& pos) {
  if (al == nullptr) return;
  const bool transformer = spec.network.is_transformer();
  for (const auto& [k, v] : al->entries) {
    const std::string path = absl::StrCat("alignment.", k.scalar);
    if (!v.IsMap()) {
      r.Error(v.loc, absl::StrCat(path, transformer ? ": expected {layer: K, position: NAME, units: A-B}, got "
                                                    : ": expected {layer: K, units: A-B}, got ",
                                  v.Describe()));
      continue;
    }
    if (transformer) {
      r.CheckKeys(v, path, {"layer", "position", "units"});
    } else if (const ConfigNode* p = KeyNode(v, "position")) {
      r.Error(p->loc, absl::StrCat(path, ".position: only a transformer has token positions; an MLP's site is a "
                                   "layer and units (set network.type: transformer to align at tokens)"));
    } else {
      r.CheckKeys(v, path, {"layer", "units"});
    }
    const ConfigNode* layer = v.Find("layer");
    const ConfigNode* units = v.Find("units");
    const ConfigNode* position = v.Find("position");
    if (layer == nullptr || units == nullptr || (transformer && position == nullptr)) {
      r.Error(v.loc, absl::StrCat(path, transformer ? ": needs 'layer', 'position' and 'units'"
                                                    : ": needs both 'layer' and 'units'"));
      continue;
    }
    auto l = r.Int(*layer, path + ".layer", 0, 1 << 20);
    auto u = ReadUnits(r, *units, path + ".units");
    SiteLocations where{layer->loc, units->loc, {}};
    std::optional<std::vector<std::string>> positions = std::vector<std::string>{};
    if (transformer) positions = ReadPositions(r, *position, path + ".position", &where.positions);
    if (!l || !u || !positions) continue;
    SiteSpec s;
    s.variable = k.scalar;
    s.layer = static_cast<int>(*l);
    s.positions = std::move(*positions);
    s.units = std::move(*u);
    s.loc = k.loc;
    spec.alignment.push_back(std::move(s));
    pos.sites.push_back(std::move(where));
  }
}

void ReadTraining(Reader& r, const ConfigNode* tr, JobSpec& spec, Positions& pos) {
  pos.interventions = pos.root;
  if (tr == nullptr) return;
  pos.interventions = tr->loc;
  TrainingSpec& t = spec.training;
  r.CheckKeys(*tr, "training", {"steps", "batch_size", "optimizer", "loss_weights", "interventions", "sources",
                                "source_gradients", "threads", "checkpoint_every"});
  if (const ConfigNode* n = tr->Find("steps")) {
    pos.steps = n->loc;
    if (auto v = r.Int(*n, "training.steps", 1, int64_t{1} << 40)) t.steps = *v;
  }
  if (const ConfigNode* n = tr->Find("batch_size")) {
    if (auto v = r.Int(*n, "training.batch_size", 1, 65536)) t.batch_size = static_cast<int>(*v);
  }
  if (const ConfigNode* o = r.Map(tr->Find("optimizer"), "training.optimizer")) {
    r.CheckKeys(*o, "training.optimizer", {"type", "lr", "weight_decay", "momentum"});
    if (const ConfigNode* n = o->Find("type")) {
      if (auto c = r.Choice(*n, "training.optimizer.type", {"adam", "sgd"})) t.optimizer.type = static_cast<OptimizerType>(*c);
    }
    if (const ConfigNode* n = o->Find("lr")) {
      if (auto v = r.Number(*n, "training.optimizer.lr", 0, 10, false, /*lo_open=*/true)) t.optimizer.lr = *v;
    }
    if (const ConfigNode* n = o->Find("weight_decay")) {
      if (auto v = r.Number(*n, "training.optimizer.weight_decay", 0, 1)) t.optimizer.weight_decay = *v;
    }
    if (const ConfigNode* n = o->Find("momentum")) {
      if (auto v = r.Number(*n, "training.optimizer.momentum", 0, 1, /*hi_open=*/true)) t.optimizer.momentum = *v;
    }
  }
  if (const ConfigNode* w = r.Map(tr->Find("loss_weights"), "training.loss_weights")) {
    r.CheckKeys(*w, "training.loss_weights", {"task", "interchange"});
    if (const ConfigNode* n = w->Find("task")) {
      if (auto v = r.Number(*n, "training.loss_weights.task", 0, 1e6)) t.task_weight = *v;
    }
    if (const ConfigNode* n = w->Find("interchange")) {
      if (auto v = r.Number(*n, "training.loss_weights.interchange", 0, 1e6)) t.interchange_weight = *v;
    }
    if (t.task_weight == 0 && t.interchange_weight == 0) {
      r.Error(w->loc, "training.loss_weights: task and interchange are both 0; nothing would be trained");
    }
  }
  if (const ConfigNode* iv = tr->Find("interventions")) {
    pos.interventions = iv->loc;
    if (!iv->IsSequence() || iv->items.empty()) {
      r.Error(iv->loc, absl::StrCat("training.interventions: expected a list of variable lists such as "
                                    "[[local], [careful]], got ", iv->Describe()));
    } else {
      for (const auto& set : iv->items) {
        std::vector<std::string> names;
        std::vector<Location> locs;
        if (set.IsScalar()) {  // a single name is a set of one
          names.push_back(set.scalar);
          locs.push_back(set.loc);
        } else if (set.IsSequence() && !set.items.empty()) {
          for (const auto& item : set.items) {
            if (!item.IsScalar()) {
              r.Error(item.loc, "training.interventions: each entry must be a variable name");
              continue;
            }
            names.push_back(item.scalar);
            locs.push_back(item.loc);
          }
        } else {
          r.Error(set.loc, absl::StrCat("training.interventions: each set is a non-empty list of aligned "
                                        "variables, got ", set.Describe()));
          continue;
        }
        t.interventions.push_back(std::move(names));
        pos.set_items.push_back(std::move(locs));
        pos.sets.push_back(set.loc);
      }
    }
  }
  if (const ConfigNode* n = tr->Find("sources")) {
    if (auto c = r.Choice(*n, "training.sources", {"in_batch", "independent"})) t.sources = static_cast<SourceMode>(*c);
  }
  if (const ConfigNode* n = tr->Find("source_gradients")) {
    if (auto v = r.Bool(*n, "training.source_gradients")) t.source_gradients = *v;
  }
  if (const ConfigNode* n = tr->Find("threads")) {
    if (auto v = r.Int(*n, "training.threads", 1, 256)) t.threads = static_cast<int>(*v);
  }
  if (const ConfigNode* n = tr->Find("checkpoint_every")) {
    if (auto v = r.Int(*n, "training.checkpoint_every", 1, int64_t{1} << 40)) t.checkpoint_every = *v;
  }
}

void ReadEvaluation(Reader& r, const ConfigNode* ev, JobSpec& spec, Positions& pos) {
  pos.held_out = pos.root;
  if (ev == nullptr) return;
  pos.held_out = ev->loc;
  r.CheckKeys(*ev, "evaluation", {"every", "held_out", "triples"});
  if (const ConfigNode* n = ev->Find("every")) {
    if (auto v = r.Int(*n, "evaluation.every", 1, int64_t{1} << 40)) spec.evaluation.every = *v;
  }
  if (const ConfigNode* n = ev->Find("held_out")) {
    pos.held_out = n->loc;
    if (auto v = r.Number(*n, "evaluation.held_out", 0, 1, /*hi_open=*/true)) spec.evaluation.held_out = *v;
  }
  if (const ConfigNode* n = ev->Find("triples")) {
    if (auto v = r.Int(*n, "evaluation.triples", 1, int64_t{1} << 26)) spec.evaluation.triples = *v;
  }
}

// The network's site layers: an MLP's hidden layers, a transformer's blocks.
int NumLayers(const JobSpec& spec) {
  return spec.network.is_transformer() ? spec.network.layers : static_cast<int>(spec.network.hidden.size());
}
// Units a site may name in `layer`: the hidden layer's width, or the residual stream's width
// (at each token).
int LayerWidth(const JobSpec& spec, int layer) {
  return spec.network.is_transformer() ? spec.network.width : spec.network.hidden[layer];
}
// "network.hidden has 3 layers, numbered 0-2" or the transformer's equivalent.
std::string LayersText(const JobSpec& spec) {
  const int n = NumLayers(spec);
  if (spec.network.is_transformer()) {
    return absl::StrCat("network.layers is ", n, ", so layers are numbered 0-", n - 1,
                        " (layer K is the residual stream after block K)");
  }
  return absl::StrCat("network.hidden has ", n, " layers, numbered 0-", n - 1);
}

void ReadScan(Reader& r, const ConfigNode* sc, JobSpec& spec, Positions& pos) {
  if (sc == nullptr) return;
  ScanSpec& s = spec.scan;
  s.present = true;
  pos.scan_block = sc->loc;
  if (spec.network.is_transformer()) {
    r.CheckKeys(*sc, "scan", {"layers", "positions", "block", "stride", "random_subsets", "pairs"});
    if (const ConfigNode* p = sc->Find("positions")) {
      if (auto v = ReadPositions(r, *p, "scan.positions", &pos.scan_positions)) s.positions = std::move(*v);
    }
  } else {
    r.CheckKeys(*sc, "scan", {"layers", "block", "stride", "random_subsets", "pairs"});
  }
  const int layers = NumLayers(spec);
  if (const ConfigNode* l = sc->Find("layers")) {
    std::vector<const ConfigNode*> items;
    if (l->IsSequence()) {
      for (const auto& item : l->items) items.push_back(&item);
    } else {
      items.push_back(l);
    }
    if (items.empty()) r.Error(l->loc, "scan.layers: expected a layer number or a non-empty list of them, got []");
    for (const ConfigNode* item : items) {
      auto v = r.Int(*item, "scan.layers[]", 0, 1 << 20);
      if (!v) continue;
      if (*v >= layers) {
        r.Error(item->loc, absl::StrCat("scan.layers: layer ", *v, " does not exist; ", LayersText(spec)));
      } else if (std::find(s.layers.begin(), s.layers.end(), *v) != s.layers.end()) {
        r.Error(item->loc, absl::StrCat("scan.layers: layer ", *v, " is listed twice"));
      } else {
        s.layers.push_back(static_cast<int>(*v));
      }
    }
    std::sort(s.layers.begin(), s.layers.end());
  }
  if (const ConfigNode* n = sc->Find("block")) {
    pos.scan_block = n->loc;
    if (auto v = r.Int(*n, "scan.block", 0, 65536)) s.block = static_cast<int>(*v);
  }
  if (const ConfigNode* n = sc->Find("stride")) {
    if (auto v = r.Int(*n, "scan.stride", 0, 65536)) s.stride = static_cast<int>(*v);
  }
  if (const ConfigNode* n = sc->Find("random_subsets")) {
    if (auto v = r.Int(*n, "scan.random_subsets", 0, 1000)) s.random_subsets = static_cast<int>(*v);
  }
  if (const ConfigNode* n = sc->Find("pairs")) {
    if (auto v = r.Int(*n, "scan.pairs", 1, int64_t{1} << 24)) s.pairs = *v;
  }
  for (int l = 0; l < layers; ++l) {
    if (!s.layers.empty() && std::find(s.layers.begin(), s.layers.end(), l) == s.layers.end()) continue;
    if (s.block > LayerWidth(spec, l)) {
      r.Error(pos.scan_block, absl::StrCat("scan.block: ", s.block, " units do not fit in layer ", l, ", which has ",
                                           LayerWidth(spec, l),
                                           spec.network.is_transformer() ? " units at each token; lower scan.block"
                                                                         : "; lower scan.block or leave that layer out of "
                                                                           "scan.layers"));
      break;
    }
  }
}

void ReadDas(Reader& r, const ConfigNode* da, JobSpec& spec, Positions& pos) {
  if (da == nullptr) return;
  DasSpec& d = spec.das;
  d.present = true;
  pos.das = pos.das_layer = pos.das_dims = da->loc;
  if (spec.network.is_transformer()) {
    r.CheckKeys(*da, "das", {"layer", "position", "dims", "steps", "lr", "batch_size"});
    if (const ConfigNode* n = da->Find("position")) {
      pos.das_position = n->loc;
      if (!n->IsScalar() || n->scalar.empty()) {
        r.Error(n->loc, absl::StrCat("das.position: expected one input's name or readout (DAS rotates the "
                                     "residual stream at one token), got ", n->Describe()));
      } else {
        d.position = n->scalar;
      }
    }
  } else {
    r.CheckKeys(*da, "das", {"layer", "dims", "steps", "lr", "batch_size"});
  }
  if (const ConfigNode* n = da->Find("layer")) {
    pos.das_layer = n->loc;
    if (auto v = r.Int(*n, "das.layer", 0, 1 << 20)) d.layer = static_cast<int>(*v);
  }
  if (const ConfigNode* n = da->Find("dims")) {
    pos.das_dims = n->loc;
    if (auto v = r.Int(*n, "das.dims", 1, 65536)) d.dims = static_cast<int>(*v);
  }
  if (const ConfigNode* n = da->Find("steps")) {
    pos.das_steps = n->loc;
    if (auto v = r.Int(*n, "das.steps", 1, int64_t{1} << 40)) d.steps = *v;
  }
  if (const ConfigNode* n = da->Find("lr")) {
    if (auto v = r.Number(*n, "das.lr", 0, 10, /*hi_open=*/false, /*lo_open=*/true)) d.lr = *v;
  }
  if (const ConfigNode* n = da->Find("batch_size")) {
    if (auto v = r.Int(*n, "das.batch_size", 1, 65536)) d.batch_size = static_cast<int>(*v);
  }
}

// The `das:` block against the alignment and the intervention sets; resolves the defaults.
void ValidateDas(Reader& r, const Positions& pos, const std::vector<std::vector<int>>& sets, ResolvedJob& job) {
  DasSpec& d = job.spec.das;
  const JobSpec& spec = job.spec;
  const causal::CausalModel& model = *job.model;
  if (!d.present) return;
  if (spec.alignment.empty()) {
    r.Error(pos.das, "das: needs at least one aligned variable in 'alignment' (its units give the default "
                     "das.dims; its layer the default das.layer)");
    return;
  }
  const int layers = NumLayers(spec);
  if (d.layer < 0) {
    for (const auto& site : spec.alignment) {
      if (site.layer != spec.alignment.front().layer) {
        r.Error(pos.das, absl::StrCat("das: the aligned variables sit in different layers (", spec.alignment.front().variable,
                                      " in ", spec.alignment.front().layer, ", ", site.variable, " in ", site.layer,
                                      "); set das.layer to the layer to rotate"));
        return;
      }
    }
    d.layer = spec.alignment.front().layer;
  } else if (d.layer >= layers) {
    r.Error(pos.das_layer, absl::StrCat("das.layer: layer ", d.layer, " does not exist; ", LayersText(spec)));
    return;
  }
  if (spec.network.is_transformer()) {
    if (d.position.empty()) {
      for (const auto& site : spec.alignment) {
        if (site.positions.size() != 1 || site.positions != spec.alignment.front().positions) {
          r.Error(pos.das, absl::StrCat("das: DAS rotates the residual stream at one token, but the aligned variables "
                                        "do not all sit at one position (", site.variable, " at ",
                                        absl::StrJoin(site.positions, ", "), "); set das.position"));
          return;
        }
      }
      d.position = spec.alignment.front().positions.front();
    } else if (TokenOf(model, d.position) < 0) {
      r.Error(pos.das_position, absl::StrCat("das.position: '", d.position, "' is neither an input nor readout"));
      return;
    }
  }
  const int width = LayerWidth(spec, d.layer);
  int needed = 0;
  for (const auto& site : spec.alignment) needed += d.dims > 0 ? d.dims : static_cast<int>(site.units.size());
  if (needed > width) {
    r.Error(pos.das_dims, absl::StrCat("das.dims: the ", spec.alignment.size(), " aligned variables need ", needed,
                                       " rotated dimensions, but layer ", d.layer, " has only ", width,
                                       spec.network.is_transformer() ? " units at a token" : " units",
                                       "; lower das.dims"));
    return;
  }
  // All DAS variables share one layer: a set that moves X without its descendant Y cannot work.
  for (const auto& set : sets) {
    for (int x : set) {
      for (int y = 0; y < model.num_variables(); ++y) {
        if (job.site_of_variable[y] < 0 || !model.IsAncestor(x, y)) continue;
        if (std::find(set.begin(), set.end(), y) != set.end()) continue;
        r.Error(pos.das, absl::StrCat("das: the intervention set with '", model.variable(x).name,
                                      "' but not its descendant '", model.variable(y).name,
                                      "' cannot be searched in one layer; intervene on both together in "
                                      "training.interventions"));
        return;
      }
    }
  }
}

std::string Combine(const std::vector<std::string>& errors) { return absl::StrJoin(errors, "\n"); }

int64_t DeclaredSize(const causal::DomainDecl& d) {
  switch (d.kind) {
    case DomainKind::kSymbols: return static_cast<int64_t>(d.symbols.size());
    case DomainKind::kRange: return d.hi >= d.lo ? d.hi - d.lo + 1 : 0;
    case DomainKind::kBool: return 2;
    case DomainKind::kNumbers: return 0;
  }
  return 0;
}

// The limits that can be checked before the model is compiled (which enumerates domains and
// tables): variables, declared domain sizes, the input space and the step counts.
void CheckLimitsBeforeCompiling(Reader& r, const Positions& pos, const JobSpec& spec, const SpecLimits& limits) {
  if (static_cast<int64_t>(spec.variables.size()) > limits.max_variables) {
    r.Error(pos.algorithm, absl::StrCat("algorithm: ", spec.variables.size(),
                                        " variables; this coordinator accepts at most max_variables = ",
                                        limits.max_variables));
  }
  long double space = 1;
  bool space_reported = false;
  for (size_t i = 0; i < spec.variables.size(); ++i) {
    const VariableDecl& d = spec.variables[i];
    if (!d.domain) continue;
    const int64_t size = DeclaredSize(*d.domain);
    if (size > limits.max_domain_values) {
      r.Error(pos.var_domain[i], absl::StrCat("the domain of '", d.name, "' has ", size,
                                              " values; this coordinator accepts at most max_domain_values = ",
                                              limits.max_domain_values));
    }
    if (d.role != Role::kInput) continue;
    space *= static_cast<long double>(std::max<int64_t>(size, 1));
    if (!space_reported && space > static_cast<long double>(limits.max_input_space)) {
      r.Error(pos.var_domain[i], absl::StrCat("the input space passes ", limits.max_input_space,
                                              " combinations of input values at '", d.name,
                                              "'; this coordinator accepts at most max_input_space = ",
                                              limits.max_input_space));
      space_reported = true;
    }
  }
  // A listed space (2^24 inputs or fewer) is enumerated while it is validated; a hashed one is not.
  if (!space_reported && space <= static_cast<long double>(causal::kMaxListedInputSpace) &&
      space > static_cast<long double>(limits.max_listed_input_space)) {
    long double listed = 1;
    for (size_t i = 0; i < spec.variables.size(); ++i) {
      const VariableDecl& d = spec.variables[i];
      if (d.role != Role::kInput || !d.domain) continue;
      listed *= static_cast<long double>(std::max<int64_t>(DeclaredSize(*d.domain), 1));
      if (listed > static_cast<long double>(limits.max_listed_input_space)) {
        r.Error(pos.var_domain[i],
                absl::StrCat("the input space passes ", limits.max_listed_input_space, " combinations of input values at '",
                             d.name, "'; a space of at most ", causal::kMaxListedInputSpace,
                             " inputs is listed, and this coordinator lists at most max_listed_input_space = ",
                             limits.max_listed_input_space, " (larger spaces are split by a hash, without a list)"));
        break;
      }
    }
  }
  if (spec.training.steps > limits.max_steps) {
    r.Error(pos.steps, absl::StrCat("training.steps: ", spec.training.steps,
                                    " steps; this coordinator accepts at most max_steps = ", limits.max_steps));
  }
  if (spec.das.present && spec.das.steps > limits.max_steps) {
    r.Error(pos.das_steps, absl::StrCat("das.steps: ", spec.das.steps,
                                        " steps; this coordinator accepts at most max_steps = ", limits.max_steps));
  }
}

// Limits that need the compiled model: inferred domain sizes and the network's size.
void CheckLimitsOfModel(Reader& r, const Positions& pos, const JobSpec& spec, const causal::CausalModel& model,
                        const SpecLimits& limits) {
  for (int v = 0; v < model.num_variables(); ++v) {
    const int64_t size = model.variable(v).domain.size();
    if (size > limits.max_domain_values && !spec.variables[v].domain) {
      r.Error(pos.var_name[v], absl::StrCat("'", model.variable(v).name, "' takes ", size,
                                            " values over its parents; this coordinator accepts at most "
                                            "max_domain_values = ",
                                            limits.max_domain_values, " per domain; declare a smaller domain"));
    }
  }
  const int64_t parameters = NetworkParameters(spec, model);
  if (parameters > limits.max_network_parameters) {
    r.Error(pos.hidden, absl::StrCat("network: ", parameters,
                                     " parameters; this coordinator accepts at most max_network_parameters = ",
                                     limits.max_network_parameters,
                                     spec.network.is_transformer() ? "; use a narrower width or mlp_width, or fewer layers"
                                                                   : "; use narrower or fewer hidden layers"));
  }
}

// Checks everything that needs the compiled model; fills the resolved parts of `job`.
void Validate(Reader& r, const Positions& pos, ResolvedJob& job) {
  const JobSpec& spec = job.spec;
  const causal::CausalModel& model = *job.model;
  const int layers = NumLayers(spec);
  const bool transformer = spec.network.is_transformer();
  job.site_of_variable.assign(model.num_variables(), -1);
  std::vector<std::string> position_names;
  for (int i : model.inputs()) position_names.push_back(model.variable(i).name);
  auto unknown_position = [&](const std::string& what, const std::string& name) {
    std::vector<std::string> shown(position_names.begin(),
                                   position_names.begin() + std::min<size_t>(position_names.size(), 8));
    if (shown.size() < position_names.size()) shown.push_back("...");
    std::vector<std::string> all = position_names;
    all.push_back("readout");
    std::string msg = absl::StrCat(what, ": '", name, "' is not a token position; the positions are the inputs (",
                                   absl::StrJoin(shown, ", "), ") and readout");
    std::string near = Nearest(name, all);
    if (!near.empty()) absl::StrAppend(&msg, "; did you mean '", near, "'?");
    return msg;
  };
  for (size_t i = 0; i < spec.scan.positions.size(); ++i) {
    if (TokenOf(model, spec.scan.positions[i]) < 0) {
      r.Error(pos.scan_positions[i], unknown_position("scan.positions", spec.scan.positions[i]));
    }
  }
  std::vector<std::string> var_names;
  for (int i = 0; i < model.num_variables(); ++i) var_names.push_back(model.variable(i).name);

  std::vector<std::string> aligned_names;
  for (size_t s = 0; s < spec.alignment.size(); ++s) {
    const SiteSpec& site = spec.alignment[s];
    const std::string path = absl::StrCat("alignment.", site.variable);
    const int v = model.Find(site.variable);
    if (v < 0) {
      std::string msg = absl::StrCat("alignment: '", site.variable, "' is not a variable of the algorithm");
      std::string near = Nearest(site.variable, var_names);
      if (!near.empty()) absl::StrAppend(&msg, "; did you mean '", near, "'?");
      r.Error(site.loc, msg);
      continue;
    }
    if (model.variable(v).role == Role::kInput) {
      r.Error(site.loc, absl::StrCat(path, ": '", site.variable,
                                     "' is an input; only intermediate variables (mechanisms) can be aligned"));
      continue;
    }
    if (model.variable(v).role == Role::kOutput) {
      r.Error(site.loc, absl::StrCat(path, ": '", site.variable,
                                     "' is the output; only intermediate variables (mechanisms) can be aligned"));
      continue;
    }
    if (site.layer >= layers) {
      r.Error(pos.sites[s].layer, absl::StrCat(path, ".layer: layer ", site.layer, " does not exist; ",
                                               LayersText(spec)));
      continue;
    }
    const int width = LayerWidth(spec, site.layer);
    if (site.units.back() >= width) {
      r.Error(pos.sites[s].units, absl::StrCat(path, ".units: unit ", site.units.back(), " is outside layer ", site.layer,
                                               ", which has ", width, transformer ? " units at each token (0-" : " units (0-",
                                               width - 1, ")"));
      continue;
    }
    bool bad_position = false;
    for (size_t p = 0; p < site.positions.size(); ++p) {
      const std::string& name = site.positions[p];
      if (TokenOf(model, name) < 0) {
        r.Error(pos.sites[s].positions[p], unknown_position(path + ".position", name));
        bad_position = true;
      } else if (site.layer == layers - 1 && name != "readout") {
        // The logits read only the readout token after the last block.
        r.Error(pos.sites[s].positions[p],
                absl::StrCat(path, ".position: layer ", site.layer, " is the last; after it only the readout token "
                             "reaches the logits, so units at '", name, "' could never change the output; align '",
                             site.variable, "' at readout or in an earlier layer"));
        bad_position = true;
      }
    }
    if (bad_position) continue;
    bool overlap = false;
    for (size_t o = 0; o < s && !overlap; ++o) {
      const SiteSpec& other = spec.alignment[o];
      const int ov = model.Find(other.variable);
      if (other.layer != site.layer || ov < 0 || job.site_of_variable[ov] != static_cast<int>(o)) continue;
      std::string shared;  // a position both sites list (transformer)
      for (const auto& p : site.positions) {
        if (shared.empty() && std::find(other.positions.begin(), other.positions.end(), p) != other.positions.end()) {
          shared = p;
        }
      }
      if (transformer && shared.empty()) continue;
      std::vector<int> common;
      std::set_intersection(site.units.begin(), site.units.end(), other.units.begin(), other.units.end(),
                            std::back_inserter(common));
      if (!common.empty()) {
        r.Error(pos.sites[s].units, absl::StrCat(path, ".units: unit ", common.front(), " of layer ", site.layer,
                                                 transformer ? absl::StrCat(" at ", shared) : std::string(),
                                                 " is also aligned to '", other.variable,
                                                 "'; each unit can stand for one variable only"));
        overlap = true;
      }
    }
    if (overlap) continue;
    if (job.site_of_variable[v] >= 0) {
      r.Error(site.loc, absl::StrCat(path, ": aligned twice"));
      continue;
    }
    job.site_of_variable[v] = static_cast<int>(s);
    aligned_names.push_back(site.variable);
  }
  if (spec.alignment.empty() && spec.training.interchange_weight > 0) {
    r.Error(pos.root, "alignment: no variable is aligned, so there is nothing to intervene on; align at least "
                      "one mechanism, or set training.loss_weights.interchange: 0 for standard training");
  }
  if (!r.ok()) return;

  // Intervention sets.
  std::vector<std::vector<int>> sets;
  std::vector<size_t> set_pos;
  if (spec.training.interventions.empty()) {
    std::vector<int> aligned;
    for (int v = 0; v < model.num_variables(); ++v) {
      if (job.site_of_variable[v] >= 0) aligned.push_back(v);
    }
    const int k = static_cast<int>(aligned.size());
    if (k > 0 && k <= 3) {
      for (int mask = 1; mask < (1 << k); ++mask) {
        std::vector<int> s;
        for (int b = 0; b < k; ++b) {
          if (mask & (1 << b)) s.push_back(aligned[b]);
        }
        sets.push_back(s);
      }
      std::stable_sort(sets.begin(), sets.end(), [](const auto& a, const auto& b) { return a.size() < b.size(); });
    } else if (k > 3) {
      for (int v : aligned) sets.push_back({v});
      sets.push_back(aligned);
    }
    set_pos.assign(sets.size(), SIZE_MAX);
  } else {
    for (size_t i = 0; i < spec.training.interventions.size(); ++i) {
      std::vector<int> s;
      bool bad = false;
      for (size_t j = 0; j < spec.training.interventions[i].size(); ++j) {
        const std::string& name = spec.training.interventions[i][j];
        const int v = model.Find(name);
        if (v < 0 || job.site_of_variable[v] < 0) {
          std::string msg = absl::StrCat("training.interventions: '", name, "' is not an aligned variable");
          std::string near = Nearest(name, aligned_names);
          if (!near.empty()) absl::StrAppend(&msg, "; did you mean '", near, "'?");
          else if (!aligned_names.empty()) absl::StrAppend(&msg, "; aligned: ", absl::StrJoin(aligned_names, ", "));
          if (v >= 0) absl::StrAppend(&msg, " (add it to 'alignment' to intervene on it)");
          r.Error(pos.set_items[i][j], msg);
          bad = true;
          continue;
        }
        if (std::find(s.begin(), s.end(), v) != s.end()) {
          r.Error(pos.set_items[i][j], absl::StrCat("training.interventions: '", name, "' is listed twice in one set"));
          bad = true;
          continue;
        }
        s.push_back(v);
      }
      if (bad) continue;
      std::sort(s.begin(), s.end());
      if (std::find(sets.begin(), sets.end(), s) != sets.end()) {
        r.Error(pos.sets[i], "training.interventions: this set is listed twice");
        continue;
      }
      sets.push_back(s);
      set_pos.push_back(i);
    }
  }
  if (!r.ok()) return;

  // A set that moves X but not its descendant Y needs Y's units in a later layer than X's.
  for (size_t i = 0; i < sets.size(); ++i) {
    for (int x : sets[i]) {
      for (int y = 0; y < model.num_variables(); ++y) {
        if (job.site_of_variable[y] < 0 || !model.IsAncestor(x, y)) continue;
        if (std::find(sets[i].begin(), sets[i].end(), y) != sets[i].end()) continue;
        const SiteSpec& sx = spec.alignment[job.site_of_variable[x]];
        const SiteSpec& sy = spec.alignment[job.site_of_variable[y]];
        if (sy.layer > sx.layer) continue;
        const Location loc = set_pos[i] == SIZE_MAX ? pos.interventions : pos.sets[set_pos[i]];
        std::vector<std::string> names;
        for (int v : sets[i]) names.push_back(model.variable(v).name);
        // A transformer's layer K is computed from layer K-1 at every token (attention mixes them),
        // so a later layer can recompute Y from X whatever their positions; the same layer cannot.
        r.Error(loc, absl::StrCat("training.interventions: the set [", absl::StrJoin(names, ", "), "] moves '",
                                  model.variable(x).name, "' without its descendant '", model.variable(y).name,
                                  "', but '", model.variable(y).name, "' is aligned in layer ", sy.layer,
                                  ", not after '", model.variable(x).name, "' (layer ", sx.layer,
                                  transformer ? "), and a transformer computes layer K from layer K-1 only (at "
                                                "every position), so the network could not recompute it; align '"
                                              : "), so the network could not recompute it; align '",
                                  model.variable(y).name, "' in a later layer or intervene on both together"));
      }
    }
  }
  if (!r.ok()) return;
  ValidateDas(r, pos, sets, job);
  if (!r.ok()) return;
  for (const auto& s : sets) {
    InterventionSet is;
    is.variables = s;
    std::vector<std::string> names;
    for (int v : s) names.push_back(model.variable(v).name);
    is.name = absl::StrJoin(names, "+");
    job.sets.push_back(std::move(is));
  }

  // The split.
  auto split = causal::SplitInputs(model, spec.evaluation.held_out, spec.seed);
  if (!split.ok()) {
    r.Error(pos.held_out, absl::StrCat("evaluation.held_out: ", split.status().message()));
    return;
  }
  job.split = std::move(*split);
  job.distinct_eval_triples = causal::DistinctTriples(job.split, job.sets.size());
}

}  // namespace

int TokenOf(const causal::CausalModel& model, const std::string& position) {
  const auto& inputs = model.inputs();
  if (position == "readout") return static_cast<int>(inputs.size());
  for (size_t k = 0; k < inputs.size(); ++k) {
    if (model.variable(inputs[k]).name == position) return static_cast<int>(k);
  }
  return -1;
}

SpecLimits SpecLimits::None() {
  SpecLimits l;
  l.max_variables = INT64_MAX;
  l.max_domain_values = INT64_MAX;
  l.max_table_entries = INT64_MAX;
  l.max_input_space = INT64_MAX;  // the model itself stops at causal::kMaxInputSpace
  l.max_parent_space = INT64_MAX;  // the model itself stops at causal::kMaxParentSpace
  l.max_listed_input_space = INT64_MAX;
  l.max_network_parameters = INT64_MAX;
  l.max_steps = INT64_MAX;
  return l;
}

int64_t NetworkParameters(const JobSpec& spec, const causal::CausalModel& model) {
  // Saturating: a network this large is refused whatever the exact count.
  long double total = 0;
  int64_t input_values = 0;
  for (int i : model.inputs()) input_values += model.variable(i).domain.size();
  const long double classes = model.output() >= 0 ? model.variable(model.output()).domain.size() : 0;
  if (spec.network.is_transformer()) {
    const long double w = spec.network.width, m = spec.network.mlp_width;
    const long double tokens = static_cast<long double>(model.inputs().size()) + 1;
    total += static_cast<long double>(input_values) * w + tokens * w + w;  // embed.*, pos, readout
    // ln1, in_proj, out_proj, ln2, mlp.fc, mlp.proj
    const long double block = 2 * w + (3 * w * w + 3 * w) + (w * w + w) + 2 * w + (m * w + m) + (w * m + w);
    total += block * spec.network.layers + 2 * w + w * classes + classes;  // ln_final, out
    return total >= static_cast<long double>(INT64_MAX) ? INT64_MAX : static_cast<int64_t>(total);
  }
  total += static_cast<long double>(input_values) * spec.network.embedding_dim;
  long double in = static_cast<long double>(model.inputs().size()) * spec.network.embedding_dim;
  for (int width : spec.network.hidden) {
    total += in * width + width;
    in = width;
  }
  total += in * classes + classes;
  return total >= static_cast<long double>(INT64_MAX) ? INT64_MAX : static_cast<int64_t>(total);
}

absl::StatusOr<ResolvedJob> ResolveTree(const ConfigNode& root, const SpecLimits& limits) {
  Reader r;
  Positions pos;
  pos.root = root.loc;
  pos.algorithm = pos.steps = pos.das_steps = root.loc;
  ResolvedJob job;
  JobSpec& spec = job.spec;
  if (!root.IsMap()) {
    return absl::InvalidArgumentError(
        absl::StrCat(root.loc.ToString(), ": expected a config (a map with algorithm, network, alignment, ...), got ",
                     root.Describe()));
  }
  r.CheckKeys(root, "", {"name", "seed", "algorithm", "network", "alignment", "training", "evaluation", "scan", "das",
                         "sweep"});
  // A sweep is many jobs, expanded by ExpandConfig (configs/reader/sweep.h), which hands each one
  // here without its block; `sweep: null` turns it off.
  if (const ConfigNode* n = root.Find("sweep"); n != nullptr && !n->IsNull()) {
    r.Error(n->loc, "sweep: this config is a sweep of many jobs, not one job; expand it with the sweep reader "
                    "(graft check, graft submit), or turn it off with sweep: null");
  }
  if (const ConfigNode* n = root.Find("name")) {
    if (auto s = r.String(*n, "name")) spec.name = *s;
  }
  if (spec.name.empty()) {
    spec.name = std::filesystem::path(root.loc.source).stem().string();
  }
  if (const ConfigNode* n = root.Find("seed")) {
    if (auto v = r.Int(*n, "seed", 0, INT64_MAX)) spec.seed = static_cast<uint64_t>(*v);
  }
  const ConfigNode* algo = r.Map(root.Find("algorithm"), "algorithm");
  if (algo == nullptr) {
    if (root.Find("algorithm") == nullptr) r.Error(root.loc, "needs an 'algorithm' (inputs, mechanisms, output)");
  } else {
    pos.algorithm = algo->loc;
    ReadAlgorithm(r, *algo, spec, pos);
  }
  ReadNetwork(r, r.Map(root.Find("network"), "network"), spec, pos);
  ReadAlignment(r, r.Map(root.Find("alignment"), "alignment"), spec, pos);
  ReadTraining(r, r.Map(root.Find("training"), "training"), spec, pos);
  ReadEvaluation(r, r.Map(root.Find("evaluation"), "evaluation"), spec, pos);
  ReadScan(r, r.Map(root.Find("scan"), "scan"), spec, pos);
  ReadDas(r, r.Map(root.Find("das"), "das"), spec, pos);
  if (!r.ok()) return absl::InvalidArgumentError(Combine(r.errors()));
  CheckLimitsBeforeCompiling(r, pos, spec, limits);
  if (!r.ok()) return absl::InvalidArgumentError(Combine(r.errors()));

  causal::ModelError me;
  auto model = causal::CausalModel::Create(spec.variables, &me, limits.max_table_entries, "max_table_entries",
                                           limits.max_parent_space, "max_parent_space");
  if (!model.ok()) {
    Location loc = pos.root;
    std::string message = me.message;
    if (me.variable >= 0) {
      const VariableDecl& d = spec.variables[me.variable];
      switch (me.part) {
        case causal::ModelError::Part::kName: loc = pos.var_name[me.variable]; break;
        case causal::ModelError::Part::kDomain: {
          const auto& items = pos.var_domain_items[me.variable];
          loc = me.offset >= 0 && me.offset < static_cast<int>(items.size()) ? items[me.offset]
                                                                             : pos.var_domain[me.variable];
          break;
        }
        case causal::ModelError::Part::kExpression: {
          loc = pos.var_expr[me.variable].Advance(me.offset);
          const char* what = d.role == Role::kOutput ? "output" : "mechanism";
          if (message.rfind("'" + d.name + "'", 0) != 0 && message.rfind("output '", 0) != 0 &&
              message.rfind("mechanisms form", 0) != 0) {
            message = absl::StrCat(what, " '", d.name, "': ", message);
          }
          // Show the expression with a caret under the offending character.
          if (d.expr.find('\n') == std::string::npos) {
            absl::StrAppend(&message, "\n    ", d.expr, "\n    ", std::string(std::max(0, me.offset), ' '), "^");
          }
          break;
        }
      }
    }
    return absl::InvalidArgumentError(absl::StrCat(loc.ToString(), ": ", message));
  }
  job.model = std::move(*model);
  CheckLimitsOfModel(r, pos, spec, *job.model, limits);
  if (!r.ok()) return absl::InvalidArgumentError(Combine(r.errors()));
  Validate(r, pos, job);
  if (!r.ok()) return absl::InvalidArgumentError(Combine(r.errors()));
  return job;
}

absl::StatusOr<ResolvedJob> LoadJobFromText(const std::string& text, const std::string& source,
                                            const std::vector<std::string>& overrides) {
  auto tree = ParseYaml(text, source);
  if (!tree.ok()) return tree.status();
  for (size_t i = 0; i < overrides.size(); ++i) {
    absl::Status st = ApplyOverride(*tree, overrides[i], static_cast<int>(i + 1));
    if (!st.ok()) return st;
  }
  return ResolveTree(*tree);
}

absl::StatusOr<ResolvedJob> LoadJob(const std::string& path, const std::vector<std::string>& overrides) {
  auto tree = ParseYamlFile(path);
  if (!tree.ok()) return tree.status();
  for (size_t i = 0; i < overrides.size(); ++i) {
    absl::Status st = ApplyOverride(*tree, overrides[i], static_cast<int>(i + 1));
    if (!st.ok()) return st;
  }
  return ResolveTree(*tree);
}

const char* ToString(EmbeddingInit v) { return v == EmbeddingInit::kLearned ? "learned" : "fixed_random"; }
const char* ToString(Activation v) {
  switch (v) {
    case Activation::kRelu: return "relu";
    case Activation::kGelu: return "gelu";
    case Activation::kTanh: return "tanh";
  }
  return "?";
}
const char* ToString(OptimizerType v) { return v == OptimizerType::kAdam ? "adam" : "sgd"; }
const char* ToString(SourceMode v) { return v == SourceMode::kInBatch ? "in_batch" : "independent"; }

namespace {

ConfigNode Scalar(const std::string& s, bool quoted = false) {
  ConfigNode n;
  n.kind = ConfigNode::Kind::kScalar;
  n.scalar = s;
  n.quoted = quoted;
  return n;
}
ConfigNode MapNode() {
  ConfigNode n;
  n.kind = ConfigNode::Kind::kMap;
  return n;
}
ConfigNode SeqNode() {
  ConfigNode n;
  n.kind = ConfigNode::Kind::kSequence;
  return n;
}
void Put(ConfigNode& map, const std::string& key, ConfigNode value) {
  map.entries.emplace_back(Scalar(key), std::move(value));
}
ConfigNode DomainNode(const DomainDecl& d) {
  switch (d.kind) {
    case DomainKind::kSymbols: {
      ConfigNode s = SeqNode();
      for (const auto& x : d.symbols) s.items.push_back(Scalar(x));
      return s;
    }
    case DomainKind::kRange: {
      ConfigNode m = MapNode();
      ConfigNode r = SeqNode();
      r.items.push_back(Scalar(absl::StrCat(d.lo)));
      r.items.push_back(Scalar(absl::StrCat(d.hi)));
      Put(m, "range", std::move(r));
      return m;
    }
    default:
      return Scalar("bool");
  }
}

}  // namespace

std::string ResolvedSpecYaml(const JobSpec& spec) {
  ConfigNode root = MapNode();
  Put(root, "name", Scalar(spec.name, true));
  Put(root, "seed", Scalar(absl::StrCat(spec.seed)));
  ConfigNode algo = MapNode(), inputs = MapNode(), mechs = MapNode(), output = MapNode();
  for (const auto& v : spec.variables) {
    if (v.role == Role::kInput) {
      Put(inputs, v.name, DomainNode(*v.domain));
    } else if (v.role == Role::kMechanism) {
      ConfigNode m = MapNode();
      Put(m, "expr", Scalar(v.expr, true));
      if (v.domain) Put(m, "domain", DomainNode(*v.domain));
      Put(mechs, v.name, std::move(m));
    } else {
      ConfigNode m = MapNode();
      Put(m, "expr", Scalar(v.expr, true));
      if (v.domain) Put(m, "classes", DomainNode(*v.domain));
      Put(output, v.name, std::move(m));
    }
  }
  Put(algo, "inputs", std::move(inputs));
  Put(algo, "mechanisms", std::move(mechs));
  Put(algo, "output", std::move(output));
  Put(root, "algorithm", std::move(algo));

  ConfigNode net = MapNode(), emb = MapNode(), hidden = SeqNode();
  Put(net, "type", Scalar(spec.network.type));
  if (spec.network.is_transformer()) {
    Put(net, "width", Scalar(absl::StrCat(spec.network.width)));
    Put(net, "layers", Scalar(absl::StrCat(spec.network.layers)));
    Put(net, "heads", Scalar(absl::StrCat(spec.network.heads)));
    Put(net, "mlp_width", Scalar(absl::StrCat(spec.network.mlp_width)));
  } else {
    Put(emb, "dim", Scalar(absl::StrCat(spec.network.embedding_dim)));
    Put(emb, "init", Scalar(ToString(spec.network.embedding_init)));
    Put(net, "embedding", std::move(emb));
    for (int w : spec.network.hidden) hidden.items.push_back(Scalar(absl::StrCat(w)));
    Put(net, "hidden", std::move(hidden));
  }
  Put(net, "activation", Scalar(ToString(spec.network.activation)));
  Put(root, "network", std::move(net));

  ConfigNode al = MapNode();
  for (const auto& s : spec.alignment) {
    ConfigNode site = MapNode(), units = SeqNode();
    Put(site, "layer", Scalar(absl::StrCat(s.layer)));
    if (s.positions.size() == 1) {
      Put(site, "position", Scalar(s.positions.front(), true));
    } else if (!s.positions.empty()) {
      ConfigNode ps = SeqNode();
      for (const auto& p : s.positions) ps.items.push_back(Scalar(p, true));
      Put(site, "position", std::move(ps));
    }
    for (int u : s.units) units.items.push_back(Scalar(absl::StrCat(u)));
    Put(site, "units", std::move(units));
    Put(al, s.variable, std::move(site));
  }
  Put(root, "alignment", std::move(al));

  const TrainingSpec& t = spec.training;
  ConfigNode tr = MapNode(), opt = MapNode(), lw = MapNode(), iv = SeqNode();
  Put(tr, "steps", Scalar(absl::StrCat(t.steps)));
  Put(tr, "batch_size", Scalar(absl::StrCat(t.batch_size)));
  Put(opt, "type", Scalar(ToString(t.optimizer.type)));
  Put(opt, "lr", Scalar(FormatDouble(t.optimizer.lr)));
  Put(opt, "weight_decay", Scalar(FormatDouble(t.optimizer.weight_decay)));
  Put(opt, "momentum", Scalar(FormatDouble(t.optimizer.momentum)));
  Put(tr, "optimizer", std::move(opt));
  Put(lw, "task", Scalar(FormatDouble(t.task_weight)));
  Put(lw, "interchange", Scalar(FormatDouble(t.interchange_weight)));
  Put(tr, "loss_weights", std::move(lw));
  for (const auto& set : t.interventions) {
    ConfigNode s = SeqNode();
    for (const auto& name : set) s.items.push_back(Scalar(name));
    iv.items.push_back(std::move(s));
  }
  if (!iv.items.empty()) Put(tr, "interventions", std::move(iv));
  Put(tr, "sources", Scalar(ToString(t.sources)));
  Put(tr, "source_gradients", Scalar(t.source_gradients ? "true" : "false"));
  Put(tr, "threads", Scalar(absl::StrCat(t.threads)));
  Put(tr, "checkpoint_every", Scalar(absl::StrCat(t.checkpoint_every)));
  Put(root, "training", std::move(tr));

  ConfigNode ev = MapNode();
  Put(ev, "every", Scalar(absl::StrCat(spec.evaluation.every)));
  Put(ev, "held_out", Scalar(FormatDouble(spec.evaluation.held_out)));
  Put(ev, "triples", Scalar(absl::StrCat(spec.evaluation.triples)));
  Put(root, "evaluation", std::move(ev));
  // The analysis blocks only when the config has them, so configs without them keep their hash.
  if (spec.scan.present) {
    ConfigNode sc = MapNode();
    if (!spec.scan.layers.empty()) {
      ConfigNode ls = SeqNode();
      for (int l : spec.scan.layers) ls.items.push_back(Scalar(absl::StrCat(l)));
      Put(sc, "layers", std::move(ls));
    }
    if (!spec.scan.positions.empty()) {
      ConfigNode ps = SeqNode();
      for (const auto& p : spec.scan.positions) ps.items.push_back(Scalar(p, true));
      Put(sc, "positions", std::move(ps));
    }
    Put(sc, "block", Scalar(absl::StrCat(spec.scan.block)));
    Put(sc, "stride", Scalar(absl::StrCat(spec.scan.stride)));
    Put(sc, "random_subsets", Scalar(absl::StrCat(spec.scan.random_subsets)));
    Put(sc, "pairs", Scalar(absl::StrCat(spec.scan.pairs)));
    Put(root, "scan", std::move(sc));
  }
  if (spec.das.present) {
    ConfigNode da = MapNode();
    if (spec.das.layer >= 0) Put(da, "layer", Scalar(absl::StrCat(spec.das.layer)));
    if (!spec.das.position.empty()) Put(da, "position", Scalar(spec.das.position, true));
    if (spec.das.dims > 0) Put(da, "dims", Scalar(absl::StrCat(spec.das.dims)));
    Put(da, "steps", Scalar(absl::StrCat(spec.das.steps)));
    Put(da, "lr", Scalar(FormatDouble(spec.das.lr)));
    Put(da, "batch_size", Scalar(absl::StrCat(spec.das.batch_size)));
    Put(root, "das", std::move(da));
  }
  return ToYaml(root);
}

std::string SpecHash(const JobSpec& spec) {
  const std::string text = ResolvedSpecYaml(spec);
  uint64_t h = 0xcbf29ce484222325ull;
  for (unsigned char c : text) {
    h ^= c;
    h *= 0x100000001b3ull;
  }
  char buf[17];
  std::snprintf(buf, sizeof(buf), "%016llx", static_cast<unsigned long long>(h));
  return buf;
}

std::string Summarize(const ResolvedJob& job) {
  const JobSpec& spec = job.spec;
  const causal::CausalModel& m = *job.model;
  std::ostringstream out;
  out << "job " << spec.name << " (seed " << spec.seed << ")\n";
  out << "algorithm: " << m.num_variables() << " variables\n";
  for (int v : m.topological_order()) {
    const causal::Variable& var = m.variable(v);
    const char* role = var.role == Role::kInput ? "input" : var.role == Role::kOutput ? "output" : "mechanism";
    std::vector<std::string> values;
    for (int k = 0; k < var.domain.size() && k < 12; ++k) values.push_back(m.ValueName(v, k));
    if (var.domain.size() > 12) values.push_back("...");
    out << "  " << var.name << " (" << role << ", " << var.domain.size() << " values: "
        << absl::StrJoin(values, ", ") << ")";
    if (!var.parents.empty()) {
      std::vector<std::string> ps;
      for (int p : var.parents) ps.push_back(m.variable(p).name);
      out << " <- " << absl::StrJoin(ps, ", ") << " = " << var.expr;
    }
    out << "\n";
  }
  auto units_text = [](const std::vector<int>& units) {
    return units.size() > 1 && units.back() - units.front() + 1 == static_cast<int>(units.size())
               ? absl::StrCat(units.front(), "-", units.back())
               : absl::StrCat("[", absl::StrJoin(units, ","), "]");
  };
  if (spec.network.is_transformer()) {
    out << "network: transformer, " << m.inputs().size() + 1 << " tokens (one per input, then readout), width "
        << spec.network.width << ", " << spec.network.heads << " heads, block MLP " << spec.network.mlp_width
        << " (" << ToString(spec.network.activation) << ")\n";
    for (int l = 0; l < spec.network.layers; ++l) {
      out << "  layer " << l << ": residual stream after block " << l;
      std::vector<std::string> here;
      for (const auto& s : spec.alignment) {
        if (s.layer != l) continue;
        here.push_back(absl::StrCat(s.variable, " = ", absl::StrJoin(s.positions, ", "), " units ",
                                    units_text(s.units), " (", s.units.size() * s.positions.size(), ")"));
      }
      if (!here.empty()) out << "; " << absl::StrJoin(here, "; ");
      out << "\n";
    }
  } else {
    const int in_width = static_cast<int>(m.inputs().size()) * spec.network.embedding_dim;
    out << "network: mlp, embeddings " << m.inputs().size() << " x " << spec.network.embedding_dim << " = "
        << in_width << " (" << ToString(spec.network.embedding_init) << "), activation "
        << ToString(spec.network.activation) << "\n";
    for (size_t l = 0; l < spec.network.hidden.size(); ++l) {
      out << "  layer " << l << ": " << spec.network.hidden[l] << " units";
      std::vector<std::string> here;
      for (const auto& s : spec.alignment) {
        if (s.layer != static_cast<int>(l)) continue;
        here.push_back(absl::StrCat(s.variable, " = units ", units_text(s.units), " (", s.units.size(), ")"));
      }
      if (!here.empty()) out << "; " << absl::StrJoin(here, "; ");
      out << "\n";
    }
  }
  out << "  output: " << m.variable(m.output()).domain.size() << " classes (" << m.variable(m.output()).name << ")\n";
  std::vector<std::string> set_names;
  for (const auto& s : job.sets) set_names.push_back(s.name);
  out << "interventions: " << (set_names.empty() ? "none" : absl::StrJoin(set_names, ", ")) << "\n";
  const causal::InputSplit& split = job.split;
  if (!split.hashed) {
    out << "input space: " << m.input_space_size() << " inputs; held out: " << split.test.size() << " ("
        << spec.evaluation.held_out << "); training: " << split.train.size() << "\n";
    out << "split: listed (at most " << causal::kMaxListedInputSpace << " inputs): "
        << (spec.evaluation.held_out > 0 ? "exactly round(held_out x inputs) held out by a permutation seeded from the seed"
                                         : "nothing held out; training and evaluation use every input")
        << "\n";
  } else {
    out << "input space: " << m.input_space_size() << " inputs; held out: about "
        << static_cast<int64_t>(std::llround(split.HeldOutCount())) << " (" << spec.evaluation.held_out
        << "); training: about " << static_cast<int64_t>(std::llround(split.TrainingCount())) << "\n";
    out << "split: hashed (more than " << causal::kMaxListedInputSpace << " inputs, none listed): "
        << (spec.evaluation.held_out > 0
                ? absl::StrCat("an input is held out when a hash of its number seeded from the seed falls below ",
                               FormatDouble(spec.evaluation.held_out),
                               "; training batches draw uniformly and skip held-out inputs, evaluation draws only "
                               "held-out ones")
                : std::string("nothing held out; training and evaluation draw uniformly from every input"))
        << "\n";
  }
  out << "evaluation triples: " << job.distinct_eval_triples << (split.hashed ? " distinct (about)" : " distinct")
      << "; ";
  if (!split.hashed && job.distinct_eval_triples <= static_cast<uint64_t>(spec.evaluation.triples)) {
    out << "all are evaluated\n";
  } else {
    out << spec.evaluation.triples << " sampled\n";
  }
  out << "training: " << spec.training.steps << " steps x batch " << spec.training.batch_size << ", "
      << ToString(spec.training.optimizer.type) << " lr " << FormatDouble(spec.training.optimizer.lr)
      << ", loss weights task " << FormatDouble(spec.training.task_weight) << " interchange "
      << FormatDouble(spec.training.interchange_weight)
      << (spec.training.interchange_weight == 0 ? " (standard training)" : "") << ", sources "
      << ToString(spec.training.sources) << "\n";
  return out.str();
}

}  // namespace graft::config
