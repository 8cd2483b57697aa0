// libFuzzer target: the mechanism compiler. The input is one or two expressions (split at the
// first newline), compiled as mechanisms `m` and `n` of a fixed algorithm (inputs a: 0..3,
// b: {red, green, blue}, c: bool; `n` may use `m`). Promises checked: Create returns OK or
// InvalidArgument, an error's offset lies within its expression, and a compiled table holds only
// value indices inside the mechanism's domain.
#include <cstddef>
#include <cstdint>
#include <string>
#include <vector>

#include "absl/strings/str_cat.h"
#include "tests/fuzz/fuzz_util.h"
#include "trainer/causal/model.h"

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  using namespace graft;
  using causal::DomainDecl;
  using causal::DomainKind;
  using causal::Role;
  using causal::VariableDecl;
  if (size > 4096) return 0;  // mechanisms are short; longer inputs only slow the search
  const std::string input(reinterpret_cast<const char*>(data), size);
  const size_t nl = input.find('\n');
  const std::string m_expr = input.substr(0, nl);
  const std::string n_expr = nl == std::string::npos ? "" : input.substr(nl + 1);

  std::vector<VariableDecl> decls;
  VariableDecl a{"a", Role::kInput, DomainDecl{DomainKind::kRange, {}, 0, 3}, ""};
  VariableDecl b{"b", Role::kInput, DomainDecl{DomainKind::kSymbols, {"red", "green", "blue"}, 0, 0}, ""};
  VariableDecl c{"c", Role::kInput, DomainDecl{DomainKind::kBool, {}, 0, 0}, ""};
  decls = {a, b, c};
  decls.push_back(VariableDecl{"m", Role::kMechanism, std::nullopt, m_expr});
  if (!n_expr.empty()) decls.push_back(VariableDecl{"n", Role::kMechanism, std::nullopt, n_expr});
  decls.push_back(VariableDecl{"out", Role::kOutput, DomainDecl{DomainKind::kSymbols, {"k0", "k1", "k2", "k3"}, 0, 0},
                               "a"});
  causal::ModelError error;
  auto model = causal::CausalModel::Create(decls, &error, /*max_table_entries=*/int64_t{1} << 16, "max_table_entries");
  if (!model.ok()) {
    fuzz::Require(model.status().code() == absl::StatusCode::kInvalidArgument, model.status().ToString());
    if (error.variable >= 0 && error.part == causal::ModelError::Part::kExpression) {
      const std::string& expr = decls[error.variable].expr;
      fuzz::Require(error.offset >= 0 && error.offset <= static_cast<int>(expr.size()),
                    absl::StrCat("error offset ", error.offset, " outside the expression of ", expr.size(),
                                 " characters: ", error.message));
    }
    return 0;
  }
  for (int v = 0; v < (*model)->num_variables(); ++v) {
    const causal::Variable& var = (*model)->variable(v);
    for (int32_t value : var.table) {
      fuzz::Require(value >= 0 && value < var.domain.size(),
                    absl::StrCat("table of '", var.name, "' holds index ", value, " of a domain of ", var.domain.size()));
    }
  }
  // Every input runs, with and without an interchange on m.
  const int64_t n = (*model)->input_space_size();
  std::vector<int32_t> base(3), source(3);
  for (int64_t i = 0; i < n; ++i) {
    (*model)->DecodeInput(i, base.data());
    (*model)->DecodeInput(n - 1 - i, source.data());
    const std::vector<int32_t> values = (*model)->Interchange(base, source, {(*model)->Find("m")});
    fuzz::Require(static_cast<int>(values.size()) == (*model)->num_variables(), "interchange lost variables");
  }
  return 0;
}
