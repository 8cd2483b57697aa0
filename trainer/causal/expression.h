// A mechanism expression: a formula over other variables of the algorithm, written in a
// small language (arithmetic, comparison, logic, ternary, min/max/abs/mod, and symbolic
// value names), checked once for names and symbol misuse and evaluated with muParser.
// Thread-safety: a CompiledExpression is not safe for concurrent Evaluate() calls (it owns
// muParser's variable storage); distinct objects are independent.
#ifndef GRAFT_TRAINER_CAUSAL_EXPRESSION_H_
#define GRAFT_TRAINER_CAUSAL_EXPRESSION_H_

#include <memory>
#include <string>
#include <vector>

#include "absl/status/statusor.h"

namespace graft::causal {

// Whether a name, or the result of an expression, is a number or a symbol.
enum class ValueType { kNumber, kSymbol };

// A value in an expression: a number (range values, bools as 0/1, arithmetic results) or a
// symbol, identified by its index in the model's symbol list.
struct Value {
  ValueType type = ValueType::kNumber;
  double number = 0.0;  // meaningful when type == kNumber
  int symbol = -1;      // meaningful when type == kSymbol: index into ExpressionContext::symbols

  static Value Number(double x) { return Value{ValueType::kNumber, x, -1}; }
  static Value Symbol(int id) { return Value{ValueType::kSymbol, 0.0, id}; }
  bool operator==(const Value& o) const {
    return type == o.type && (type == ValueType::kNumber ? number == o.number : symbol == o.symbol);
  }
};

// A variable an expression may name.
struct ExpressionVariable {
  std::string name;
  ValueType type = ValueType::kNumber;
};

// Everything the expression may refer to. Names must be distinct across both lists and must
// not be a function name or `true` / `false` (the caller checks this and reports it).
struct ExpressionContext {
  std::vector<ExpressionVariable> variables;
  std::vector<std::string> symbols;  // every symbol name of the model; Value::symbol indexes it
};

// Where in the text an error is (0-based offset into the expression) and what it is.
struct ExpressionError {
  int offset = 0;
  std::string message;  // complete sentence fragment, e.g. "unknown name 'heavvy' (did you mean 'heavy'?)"
};

class CompiledExpression {
 public:
  // Parses `text` against `context`. On success the expression is ready to Evaluate(); on
  // failure returns InvalidArgument whose message is error->message and fills *error (if not
  // null) with the offset of the offending token. Errors: syntax, unknown names (nearest valid
  // name suggested), a symbol used other than as an operand of == / != or as a result (incl.
  // both branches of ?:), == / != between a symbol and a number, ?: branches of different types.
  static absl::StatusOr<std::unique_ptr<CompiledExpression>> Create(
      const std::string& text, const ExpressionContext& context, ExpressionError* error);

  ~CompiledExpression();
  CompiledExpression(const CompiledExpression&) = delete;
  CompiledExpression& operator=(const CompiledExpression&) = delete;

  // The variables the expression uses, as indices into context.variables, ascending.
  const std::vector<int>& parents() const;
  // Number or symbol: the static type of the result.
  ValueType result_type() const;

  // Evaluates with one value per parent (in the order of parents()). Types must match the
  // declared variable types. Division by zero and mod by zero give a failed status naming it.
  absl::StatusOr<Value> Evaluate(const std::vector<Value>& parent_values) const;

 private:
  struct Impl;
  explicit CompiledExpression(std::unique_ptr<Impl> impl);
  std::unique_ptr<Impl> impl_;
};

}  // namespace graft::causal

#endif  // GRAFT_TRAINER_CAUSAL_EXPRESSION_H_
