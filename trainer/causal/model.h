// The high-level causal model of a job (its "algorithm"): finite-domain input variables,
// intermediate variables computed by mechanisms, one output. Mechanisms are compiled once
// into lookup tables over their parents' joint domain, so interventions and counterfactual
// labels are table lookups on plain arrays. Torch-free.
// Thread-safety: a built CausalModel is immutable; all const methods are safe to call
// concurrently.
#ifndef GRAFT_TRAINER_CAUSAL_MODEL_H_
#define GRAFT_TRAINER_CAUSAL_MODEL_H_

#include <cstdint>
#include <memory>
#include <optional>
#include <string>
#include <vector>

#include "absl/status/statusor.h"
#include "trainer/causal/expression.h"

namespace graft::causal {

// Largest input space (product of input domain sizes) a model may have: input numbers stay within
// int64. Spaces above kMaxListedInputSpace (split.h) are never enumerated.
inline constexpr int64_t kMaxInputSpace = int64_t{1} << 62;
// Largest joint parent domain of one mechanism: its lookup table is enumerated.
inline constexpr int64_t kMaxParentSpace = int64_t{1} << 22;

enum class DomainKind { kSymbols, kRange, kBool, kNumbers };

// A finite domain. A value of a variable is an index into its domain.
struct Domain {
  DomainKind kind = DomainKind::kNumbers;
  std::vector<int> symbols;     // kSymbols: symbol ids, in declared order
  std::vector<double> numbers;  // kRange / kBool / kNumbers: the number of each index

  int size() const {
    return static_cast<int>(kind == DomainKind::kSymbols ? symbols.size() : numbers.size());
  }
};

enum class Role { kInput, kMechanism, kOutput };

// How a config declares a domain (before symbols get ids).
struct DomainDecl {
  DomainKind kind = DomainKind::kSymbols;  // kSymbols, kRange or kBool
  std::vector<std::string> symbols;        // kSymbols
  int64_t lo = 0, hi = 0;                  // kRange, inclusive
};

// One variable as the config declares it.
struct VariableDecl {
  std::string name;
  Role role = Role::kInput;
  std::optional<DomainDecl> domain;  // inputs: required; mechanism/output: optional
  std::string expr;                  // mechanism/output
};

// Which part of which declaration an error is about, so the caller can point at the line.
struct ModelError {
  enum class Part { kName, kDomain, kExpression };
  int variable = -1;  // index into the declarations, -1 for the model as a whole
  Part part = Part::kName;
  int offset = 0;     // kExpression: 0-based offset into the expression; kDomain: symbol index
  std::string message;
};

struct Variable {
  std::string name;
  Role role = Role::kInput;
  Domain domain;
  std::vector<int> parents;   // variable indices, ascending
  std::vector<int64_t> strides;  // mixed radix over parents: index = sum(value[p] * stride)
  std::vector<int32_t> table;    // value index for each joint parent index
  std::string expr;
};

class CausalModel {
 public:
  // Builds and compiles the model. On failure returns InvalidArgument and, if `error` is not
  // null, fills it with where the problem is. Variables keep the declaration order.
  // `max_table_entries` bounds the sum of all mechanisms' lookup tables; compiling stops at the
  // mechanism that would pass it, before evaluating it, with a message naming `limit_name` and the
  // limit. `max_parent_space` (at most kMaxParentSpace, which also applies when it is larger)
  // bounds each mechanism's joint parent domain, its table's size; the message names
  // `parent_limit_name` and the limit (or graft's own cap when the name is empty).
  static absl::StatusOr<std::unique_ptr<CausalModel>> Create(const std::vector<VariableDecl>& decls,
                                                             ModelError* error, int64_t max_table_entries = INT64_MAX,
                                                             const std::string& limit_name = "",
                                                             int64_t max_parent_space = kMaxParentSpace,
                                                             const std::string& parent_limit_name = "");

  int num_variables() const { return static_cast<int>(vars_.size()); }
  const Variable& variable(int i) const { return vars_[i]; }
  // Index of `name`, or -1.
  int Find(const std::string& name) const;
  const std::vector<int>& inputs() const { return inputs_; }
  int output() const { return output_; }
  const std::vector<int>& topological_order() const { return topo_; }
  const std::vector<std::string>& symbols() const { return symbols_; }
  // True when `ancestor` is a (transitive) parent of `v`.
  bool IsAncestor(int ancestor, int v) const;
  // The name of value `index` of variable `var`: the symbol, or the number as written.
  std::string ValueName(int var, int index) const;

  // The input space: every combination of input values, numbered in mixed radix with the first
  // declared input most significant.
  int64_t input_space_size() const { return input_space_; }
  // Input value indices (one per input, in declaration order) of input number `index`.
  void DecodeInput(int64_t index, int32_t* input_values) const;

  // Values of all variables (indexed by variable) for the input with value indices
  // `input_values`, with the variables flagged in `fixed` (size num_variables or empty) set to
  // `fixed_values[v]` instead of computed: an intervention do(V = x).
  void Evaluate(const int32_t* input_values, const std::vector<bool>& fixed,
                const int32_t* fixed_values, int32_t* all_values) const;
  // Convenience: values of all variables without intervention.
  std::vector<int32_t> Run(const std::vector<int32_t>& input_values) const;
  // The interchange intervention: run `base` with the variables in `set` taking the values
  // they take on `source`. Returns all variables' values.
  std::vector<int32_t> Interchange(const std::vector<int32_t>& base, const std::vector<int32_t>& source,
                                   const std::vector<int>& set) const;

 private:
  CausalModel() = default;
  std::vector<Variable> vars_;
  std::vector<int> inputs_;
  int output_ = -1;
  std::vector<int> topo_;
  std::vector<std::string> symbols_;
  std::vector<std::vector<bool>> ancestors_;  // ancestors_[v][a]
  int64_t input_space_ = 1;
};

}  // namespace graft::causal

#endif  // GRAFT_TRAINER_CAUSAL_MODEL_H_
