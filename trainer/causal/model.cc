#include "trainer/causal/model.h"

#include <algorithm>
#include <cctype>
#include <cmath>
#include <functional>
#include <map>
#include <set>

#include "absl/status/status.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_join.h"
#include "trainer/causal/rng.h"

namespace graft::causal {
namespace {

const std::set<std::string>& ReservedNames() {
  static const std::set<std::string>* names =
      new std::set<std::string>{"min", "max", "abs", "mod", "true", "false"};
  return *names;
}

bool IsIdentifier(const std::string& s) {
  if (s.empty() || !(std::isalpha(static_cast<unsigned char>(s[0])) || s[0] == '_')) return false;
  for (char c : s) {
    if (!(std::isalnum(static_cast<unsigned char>(c)) || c == '_')) return false;
  }
  return true;
}

// The identifiers in an expression, skipping number literals such as 1e5.
std::vector<std::string> ScanIdentifiers(const std::string& text) {
  std::vector<std::string> out;
  size_t i = 0;
  while (i < text.size()) {
    unsigned char c = static_cast<unsigned char>(text[i]);
    if (std::isdigit(c) || (c == '.' && i + 1 < text.size() && std::isdigit(static_cast<unsigned char>(text[i + 1])))) {
      while (i < text.size() && (std::isdigit(static_cast<unsigned char>(text[i])) || text[i] == '.')) ++i;
      if (i < text.size() && (text[i] == 'e' || text[i] == 'E')) {
        size_t j = i + 1;
        if (j < text.size() && (text[j] == '+' || text[j] == '-')) ++j;
        if (j < text.size() && std::isdigit(static_cast<unsigned char>(text[j]))) {
          i = j;
          while (i < text.size() && std::isdigit(static_cast<unsigned char>(text[i]))) ++i;
        }
      }
    } else if (std::isalpha(c) || c == '_') {
      size_t j = i;
      while (j < text.size() && (std::isalnum(static_cast<unsigned char>(text[j])) || text[j] == '_')) ++j;
      out.push_back(text.substr(i, j - i));
      i = j;
    } else {
      ++i;
    }
  }
  return out;
}

std::string FormatNumber(double x) {
  if (std::isfinite(x) && x == std::floor(x) && std::fabs(x) < 1e15) {
    return absl::StrCat(static_cast<int64_t>(x));
  }
  return absl::StrCat(x);
}

absl::Status Fail(ModelError* error, int variable, ModelError::Part part, int offset,
                  std::string message) {
  if (error != nullptr) *error = ModelError{variable, part, offset, message};
  return absl::InvalidArgumentError(message);
}

}  // namespace

absl::StatusOr<std::unique_ptr<CausalModel>> CausalModel::Create(
    const std::vector<VariableDecl>& decls, ModelError* error, int64_t max_table_entries, const std::string& limit_name,
    int64_t max_parent_space, const std::string& parent_limit_name) {
  using Part = ModelError::Part;
  const int64_t parent_cap = std::min(max_parent_space, kMaxParentSpace);
  std::unique_ptr<CausalModel> m(new CausalModel());
  const int n = static_cast<int>(decls.size());
  std::map<std::string, int> index;

  // Names.
  for (int i = 0; i < n; ++i) {
    const VariableDecl& d = decls[i];
    if (!IsIdentifier(d.name)) {
      return Fail(error, i, Part::kName, 0,
                  absl::StrCat("variable name '", d.name,
                               "' is not an identifier (letters, digits and _, not starting with a digit)"));
    }
    if (ReservedNames().count(d.name)) {
      return Fail(error, i, Part::kName, 0,
                  absl::StrCat("'", d.name, "' is reserved in the mechanism language; rename the variable"));
    }
    if (!index.emplace(d.name, i).second) {
      return Fail(error, i, Part::kName, 0,
                  absl::StrCat("variable '", d.name, "' is declared twice"));
    }
  }

  // Symbols: every symbolic domain and the output's classes.
  std::map<std::string, int> symbol_ids;
  for (int i = 0; i < n; ++i) {
    const VariableDecl& d = decls[i];
    if (!d.domain || d.domain->kind != DomainKind::kSymbols) continue;
    std::set<std::string> seen;
    for (size_t k = 0; k < d.domain->symbols.size(); ++k) {
      const std::string& s = d.domain->symbols[k];
      const int off = static_cast<int>(k);
      if (!IsIdentifier(s)) {
        return Fail(error, i, Part::kDomain, off,
                    absl::StrCat("value '", s, "' of '", d.name,
                                 "' is not an identifier; symbolic values are names such as north or heavy"));
      }
      if (ReservedNames().count(s)) {
        return Fail(error, i, Part::kDomain, off,
                    absl::StrCat("value '", s, "' of '", d.name, "' is reserved in the mechanism language"));
      }
      if (index.count(s)) {
        return Fail(error, i, Part::kDomain, off,
                    absl::StrCat("value '", s, "' of '", d.name,
                                 "' is also the name of a variable; symbols and variables need distinct names"));
      }
      if (!seen.insert(s).second) {
        return Fail(error, i, Part::kDomain, off,
                    absl::StrCat("value '", s, "' appears twice in the domain of '", d.name, "'"));
      }
      if (!symbol_ids.count(s)) {
        symbol_ids.emplace(s, static_cast<int>(m->symbols_.size()));
        m->symbols_.push_back(s);
      }
    }
  }

  // Variables, declared domains.
  m->vars_.resize(n);
  for (int i = 0; i < n; ++i) {
    const VariableDecl& d = decls[i];
    Variable& v = m->vars_[i];
    v.name = d.name;
    v.role = d.role;
    v.expr = d.expr;
    if (d.role == Role::kInput) {
      m->inputs_.push_back(i);
      if (!d.domain) {
        return Fail(error, i, Part::kName, 0, absl::StrCat("input '", d.name, "' needs a domain"));
      }
    } else if (d.role == Role::kOutput) {
      if (m->output_ >= 0) {
        return Fail(error, i, Part::kName, 0, "the algorithm has more than one output");
      }
      m->output_ = i;
    }
    if (d.domain) {
      Domain& dom = v.domain;
      dom.kind = d.domain->kind;
      switch (d.domain->kind) {
        case DomainKind::kSymbols:
          for (const auto& s : d.domain->symbols) dom.symbols.push_back(symbol_ids.at(s));
          break;
        case DomainKind::kRange:
          if (d.domain->hi < d.domain->lo) {
            return Fail(error, i, Part::kDomain, 0,
                        absl::StrCat("range of '", d.name, "' is empty: [", d.domain->lo, ", ",
                                     d.domain->hi, "]; write {range: [lo, hi]} with lo <= hi"));
          }
          if (d.domain->hi - d.domain->lo >= kMaxParentSpace) {
            return Fail(error, i, Part::kDomain, 0,
                        absl::StrCat("range of '", d.name, "' has more than ", kMaxParentSpace, " values"));
          }
          for (int64_t x = d.domain->lo; x <= d.domain->hi; ++x) dom.numbers.push_back(static_cast<double>(x));
          break;
        case DomainKind::kBool:
          dom.numbers = {0.0, 1.0};
          break;
        case DomainKind::kNumbers:
          break;
      }
      if (dom.size() == 0) {
        return Fail(error, i, Part::kDomain, 0, absl::StrCat("domain of '", d.name, "' is empty"));
      }
    }
    if (d.role != Role::kInput && d.expr.empty()) {
      return Fail(error, i, Part::kExpression, 0,
                  absl::StrCat("'", d.name, "' needs an expression"));
    }
  }
  if (m->inputs_.empty()) return Fail(error, -1, Part::kName, 0, "the algorithm has no inputs");
  if (m->output_ < 0) return Fail(error, -1, Part::kName, 0, "the algorithm has no output");

  // Parents by scanning names; then a topological order, or the cycle.
  std::vector<std::vector<int>> parents(n);
  for (int i = 0; i < n; ++i) {
    if (decls[i].role == Role::kInput) continue;
    std::set<int> ps;
    for (const std::string& id : ScanIdentifiers(decls[i].expr)) {
      auto it = index.find(id);
      if (it == index.end()) continue;  // a symbol, function or unknown name: the compiler decides
      if (it->second == m->output_) {
        size_t off = decls[i].expr.find(id);
        return Fail(error, i, Part::kExpression, static_cast<int>(off == std::string::npos ? 0 : off),
                    absl::StrCat("'", id, "' is the output; no mechanism can depend on it"));
      }
      ps.insert(it->second);
    }
    parents[i].assign(ps.begin(), ps.end());
  }
  {
    std::vector<int> state(n, 0);  // 0 new, 1 on stack, 2 done
    std::vector<int> stack;
    std::vector<int> cycle;
    std::function<bool(int)> visit = [&](int v) -> bool {
      state[v] = 1;
      stack.push_back(v);
      for (int p : parents[v]) {
        if (state[p] == 1) {
          auto it = std::find(stack.begin(), stack.end(), p);
          cycle.assign(it, stack.end());
          cycle.push_back(p);
          return true;
        }
        if (state[p] == 0 && visit(p)) return true;
      }
      stack.pop_back();
      state[v] = 2;
      m->topo_.push_back(v);
      return false;
    };
    for (int i = 0; i < n; ++i) {
      if (state[i] == 0 && visit(i)) {
        // The cycle runs child -> parent; print it in the direction of computation.
        std::reverse(cycle.begin(), cycle.end());
        std::vector<std::string> names;
        for (int v : cycle) names.push_back(decls[v].name);
        return Fail(error, cycle.front(), Part::kExpression, 0,
                    absl::StrCat("mechanisms form a cycle: ", absl::StrJoin(names, " -> "),
                                 "; an algorithm must be acyclic"));
      }
    }
  }

  // Compile each mechanism in topological order.
  ExpressionContext ctx;
  ctx.symbols = m->symbols_;
  for (int i = 0; i < n; ++i) {
    ExpressionVariable ev;
    ev.name = decls[i].name;
    ev.type = (decls[i].domain && decls[i].domain->kind == DomainKind::kSymbols) ? ValueType::kSymbol
                                                                                : ValueType::kNumber;
    ctx.variables.push_back(ev);
  }
  int64_t table_entries = 0;  // of the mechanisms compiled so far
  for (int i : m->topo_) {
    Variable& v = m->vars_[i];
    const VariableDecl& d = decls[i];
    if (d.role == Role::kInput) continue;
    ExpressionError ee;
    auto compiled = CompiledExpression::Create(d.expr, ctx, &ee);
    if (!compiled.ok()) {
      return Fail(error, i, Part::kExpression, ee.offset, ee.message);
    }
    const CompiledExpression& expr = **compiled;
    v.parents = expr.parents();
    int64_t space = 1;
    v.strides.assign(v.parents.size(), 1);
    for (int k = static_cast<int>(v.parents.size()) - 1; k >= 0; --k) {
      v.strides[k] = space;
      space *= m->vars_[v.parents[k]].domain.size();
      if (space > parent_cap) {
        std::vector<std::string> sizes;
        long double joint = 1;
        for (int p : v.parents) {
          sizes.push_back(absl::StrCat(m->vars_[p].name, " ", m->vars_[p].domain.size()));
          joint *= m->vars_[p].domain.size();
        }
        const bool named = !parent_limit_name.empty() && max_parent_space <= kMaxParentSpace;
        return Fail(error, i, Part::kExpression, 0,
                    absl::StrCat("its lookup table would hold ",
                                 joint < 9e18L ? absl::StrCat(static_cast<int64_t>(joint)) : std::string("over 9e18"),
                                 " entries, one per combination of its parents' values (", absl::StrJoin(sizes, " x "),
                                 "); ",
                                 named ? absl::StrCat("this coordinator accepts at most ", parent_limit_name, " = ")
                                       : std::string("graft's cap is "),
                                 parent_cap, " entries per mechanism; split it into smaller mechanisms"));
      }
    }
    table_entries += space;
    if (table_entries > max_table_entries) {
      return Fail(error, i, Part::kExpression, 0,
                  absl::StrCat("the mechanisms' lookup tables reach ", table_entries, " entries at '", d.name,
                               "' (", space, " combinations of its parents' values); this coordinator accepts at most ",
                               limit_name.empty() ? "" : limit_name + " = ", max_table_entries,
                               " entries in all; use smaller domains or fewer parents"));
    }
    const bool symbolic = expr.result_type() == ValueType::kSymbol;
    const bool declared = d.domain.has_value();
    if (declared && d.role != Role::kOutput && symbolic != (d.domain->kind == DomainKind::kSymbols)) {
      return Fail(error, i, Part::kExpression, 0,
                  absl::StrCat("'", d.name, "' computes ", symbolic ? "a symbol" : "a number",
                               " but its declared domain holds ", symbolic ? "numbers" : "symbols"));
    }
    // Evaluate over the joint parent domain.
    std::vector<Value> results(space);
    std::vector<Value> args(v.parents.size());
    std::vector<int32_t> pv(v.parents.size());
    auto describe = [&]() {
      std::vector<std::string> parts;
      for (size_t k = 0; k < v.parents.size(); ++k) {
        parts.push_back(absl::StrCat(m->vars_[v.parents[k]].name, "=", m->ValueName(v.parents[k], pv[k])));
      }
      return parts.empty() ? std::string("(no parents)") : absl::StrJoin(parts, ", ");
    };
    for (int64_t j = 0; j < space; ++j) {
      for (size_t k = 0; k < v.parents.size(); ++k) {
        pv[k] = static_cast<int32_t>((j / v.strides[k]) % m->vars_[v.parents[k]].domain.size());
        const Domain& pd = m->vars_[v.parents[k]].domain;
        args[k] = pd.kind == DomainKind::kSymbols ? Value::Symbol(pd.symbols[pv[k]])
                                                  : Value::Number(pd.numbers[pv[k]]);
      }
      auto r = expr.Evaluate(args);
      if (!r.ok()) {
        return Fail(error, i, Part::kExpression, 0,
                    absl::StrCat("'", d.name, "': ", r.status().message(), " when ", describe()));
      }
      results[j] = *r;
    }
    v.table.resize(space);
    if (d.role == Role::kOutput && declared) {
      const std::vector<int>& classes = v.domain.symbols;
      const int nc = static_cast<int>(classes.size());
      for (int64_t j = 0; j < space; ++j) {
        const Value& r = results[j];
        int cls = -1;
        if (r.type == ValueType::kSymbol) {
          auto it = std::find(classes.begin(), classes.end(), r.symbol);
          if (it != classes.end()) cls = static_cast<int>(it - classes.begin());
        } else if (r.number == std::floor(r.number) && r.number >= 0 && r.number < nc) {
          cls = static_cast<int>(r.number);
        }
        if (cls < 0) {
          for (size_t k = 0; k < v.parents.size(); ++k) {
            pv[k] = static_cast<int32_t>((j / v.strides[k]) % m->vars_[v.parents[k]].domain.size());
          }
          std::vector<std::string> names;
          for (int c : classes) names.push_back(m->symbols_[c]);
          const std::string got = r.type == ValueType::kSymbol ? m->symbols_[r.symbol] : FormatNumber(r.number);
          return Fail(error, i, Part::kExpression, 0,
                      absl::StrCat("output '", d.name, "' yields ", got, " when ", describe(),
                                   "; expected an integer in [0, ", nc, ") or one of its classes: ",
                                   absl::StrJoin(names, ", ")));
        }
        v.table[j] = cls;
      }
      continue;
    }
    if (!declared) {
      // The domain is the image of the expression over the parents.
      Domain& dom = v.domain;
      if (symbolic) {
        dom.kind = DomainKind::kSymbols;
        std::set<int> img;
        for (const Value& r : results) img.insert(r.symbol);
        dom.symbols.assign(img.begin(), img.end());
      } else {
        dom.kind = DomainKind::kNumbers;
        std::set<double> img;
        for (const Value& r : results) img.insert(r.number);
        dom.numbers.assign(img.begin(), img.end());
      }
      ctx.variables[i].type = symbolic ? ValueType::kSymbol : ValueType::kNumber;
    }
    const Domain& dom = v.domain;
    for (int64_t j = 0; j < space; ++j) {
      const Value& r = results[j];
      int idx = -1;
      if (dom.kind == DomainKind::kSymbols) {
        auto it = std::find(dom.symbols.begin(), dom.symbols.end(), r.symbol);
        if (it != dom.symbols.end()) idx = static_cast<int>(it - dom.symbols.begin());
      } else {
        auto it = std::lower_bound(dom.numbers.begin(), dom.numbers.end(), r.number);
        if (it != dom.numbers.end() && *it == r.number) idx = static_cast<int>(it - dom.numbers.begin());
      }
      if (idx < 0) {
        for (size_t k = 0; k < v.parents.size(); ++k) {
          pv[k] = static_cast<int32_t>((j / v.strides[k]) % m->vars_[v.parents[k]].domain.size());
        }
        const std::string got = r.type == ValueType::kSymbol ? m->symbols_[r.symbol] : FormatNumber(r.number);
        std::vector<std::string> allowed;
        for (int k = 0; k < dom.size(); ++k) allowed.push_back(m->ValueName(i, k));
        return Fail(error, i, Part::kExpression, 0,
                    absl::StrCat("'", d.name, "' yields ", got, " when ", describe(),
                                 ", outside its declared domain [", absl::StrJoin(allowed, ", "), "]"));
      }
      v.table[j] = idx;
    }
  }
  if (m->vars_[m->output_].domain.size() < 2) {
    return Fail(error, m->output_, decls[m->output_].domain ? Part::kDomain : Part::kExpression, 0,
                absl::StrCat("the output '", decls[m->output_].name, "' ",
                             decls[m->output_].domain ? "lists" : "takes", " only one value; a classifier needs at "
                             "least two classes"));
  }

  // Ancestors.
  m->ancestors_.assign(n, std::vector<bool>(n, false));
  for (int v : m->topo_) {
    for (int p : m->vars_[v].parents) {
      m->ancestors_[v][p] = true;
      for (int a = 0; a < n; ++a) {
        if (m->ancestors_[p][a]) m->ancestors_[v][a] = true;
      }
    }
  }

  // The input space.
  for (int i : m->inputs_) {
    const int64_t size = m->vars_[i].domain.size();
    if (size > 0 && m->input_space_ > kMaxInputSpace / size) {
      return Fail(error, i, Part::kDomain, 0,
                  absl::StrCat("the input space has more than ", kMaxInputSpace,
                               " combinations (reached at input '", decls[i].name,
                               "'); use fewer or smaller inputs"));
    }
    m->input_space_ *= size;
  }
  return m;
}

int CausalModel::Find(const std::string& name) const {
  for (int i = 0; i < num_variables(); ++i) {
    if (vars_[i].name == name) return i;
  }
  return -1;
}

bool CausalModel::IsAncestor(int ancestor, int v) const { return ancestors_[v][ancestor]; }

std::string CausalModel::ValueName(int var, int index) const {
  const Domain& d = vars_[var].domain;
  if (d.kind == DomainKind::kSymbols) return symbols_[d.symbols[index]];
  if (d.kind == DomainKind::kBool) return index ? "true" : "false";
  return FormatNumber(d.numbers[index]);
}

void CausalModel::DecodeInput(int64_t index, int32_t* input_values) const {
  for (int k = static_cast<int>(inputs_.size()) - 1; k >= 0; --k) {
    const int size = vars_[inputs_[k]].domain.size();
    input_values[k] = static_cast<int32_t>(index % size);
    index /= size;
  }
}

void CausalModel::Evaluate(const int32_t* input_values, const std::vector<bool>& fixed,
                           const int32_t* fixed_values, int32_t* all_values) const {
  for (size_t k = 0; k < inputs_.size(); ++k) all_values[inputs_[k]] = input_values[k];
  for (int v : topo_) {
    if (!fixed.empty() && fixed[v]) {
      all_values[v] = fixed_values[v];
      continue;
    }
    const Variable& var = vars_[v];
    if (var.role == Role::kInput) continue;
    int64_t j = 0;
    for (size_t k = 0; k < var.parents.size(); ++k) j += all_values[var.parents[k]] * var.strides[k];
    all_values[v] = var.table[j];
  }
}

std::vector<int32_t> CausalModel::Run(const std::vector<int32_t>& input_values) const {
  std::vector<int32_t> out(num_variables());
  Evaluate(input_values.data(), {}, nullptr, out.data());
  return out;
}

std::vector<int32_t> CausalModel::Interchange(const std::vector<int32_t>& base,
                                              const std::vector<int32_t>& source,
                                              const std::vector<int>& set) const {
  std::vector<int32_t> src = Run(source);
  std::vector<bool> fixed(num_variables(), false);
  for (int v : set) fixed[v] = true;
  std::vector<int32_t> out(num_variables());
  Evaluate(base.data(), fixed, src.data(), out.data());
  return out;
}

}  // namespace graft::causal
