// Tests for the mechanism expression language (trainer/causal/expression.h): one test per
// error kind with its message and offset, the semantics of symbols, modulo, functions and
// precedence, and a randomised cross-check of muParser's evaluation against Python.
#include "trainer/causal/expression.h"

#include <cstdio>
#include <map>
#include <random>
#include <set>
#include <string>
#include <vector>

#include "absl/status/status.h"
#include "gmock/gmock.h"
#include "gtest/gtest.h"
#include "tests/test_util.h"

namespace graft::causal {
namespace {

using ::testing::HasSubstr;
using ::testing::Not;

// A parcel-routing scenario: a parcel's weight and number of stops, and the lane and dock it
// is routed through (both symbolic, over the four compass symbols).
ExpressionContext RoutingContext() {
  ExpressionContext c;
  c.variables = {{"weight", ValueType::kNumber},
                 {"stops", ValueType::kNumber},
                 {"lane", ValueType::kSymbol},
                 {"dock", ValueType::kSymbol}};
  c.symbols = {"north", "south", "east", "west"};
  return c;
}

int SymbolIndex(const ExpressionContext& c, const std::string& name) {
  for (size_t i = 0; i < c.symbols.size(); ++i) {
    if (c.symbols[i] == name) return static_cast<int>(i);
  }
  ADD_FAILURE() << "no symbol " << name;
  return -1;
}

// Expects Create() to fail at `offset` with a message containing every part of `parts`, and
// the status message to equal the error's message.
void ExpectError(const std::string& text, int offset, const std::vector<std::string>& parts,
                 const ExpressionContext& context = RoutingContext()) {
  ExpressionError error;
  error.offset = -12345;
  absl::StatusOr<std::unique_ptr<CompiledExpression>> compiled =
      CompiledExpression::Create(text, context, &error);
  ASSERT_FALSE(compiled.ok()) << "'" << text << "' was accepted";
  EXPECT_EQ(compiled.status().code(), absl::StatusCode::kInvalidArgument) << text;
  EXPECT_EQ(std::string(compiled.status().message()), error.message) << text;
  EXPECT_EQ(error.offset, offset) << "'" << text << "': " << error.message;
  for (const std::string& part : parts) {
    EXPECT_THAT(error.message, HasSubstr(part)) << "'" << text << "'";
  }
}

std::unique_ptr<CompiledExpression> MustCompile(const std::string& text,
                                                const ExpressionContext& context) {
  ExpressionError error;
  absl::StatusOr<std::unique_ptr<CompiledExpression>> compiled =
      CompiledExpression::Create(text, context, &error);
  EXPECT_TRUE(compiled.ok()) << "'" << text << "' refused at offset " << error.offset << ": "
                             << compiled.status();
  if (!compiled.ok()) return nullptr;
  return std::move(*compiled);
}

// Evaluates an expression over no variables (literals only) to a number.
double Constant(const std::string& text) {
  std::unique_ptr<CompiledExpression> e = MustCompile(text, ExpressionContext{});
  if (e == nullptr) return -999999;
  EXPECT_TRUE(e->parents().empty()) << text;
  absl::StatusOr<Value> v = e->Evaluate({});
  EXPECT_TRUE(v.ok()) << text << ": " << v.status();
  if (!v.ok()) return -999999;
  EXPECT_EQ(v->type, ValueType::kNumber) << text;
  return v->number;
}

// ---- Errors, one kind per test ----------------------------------------------------------

TEST(Expression, ReportsUnknownNameWithSuggestion) {
  ExpectError("weigth + 1", 0, {"unknown name 'weigth'", "(did you mean 'weight'?)"});
  ExpectError("lane == nroth", 8, {"unknown name 'nroth'", "(did you mean 'north'?)"});
  ExpectError("stops * 2 + Stops", 12, {"unknown name 'Stops'", "(did you mean 'stops'?)"});
  ExpectError("ture", 0, {"unknown name 'ture'", "(did you mean 'true'?)"});
  // Nothing close: no suggestion.
  ExpectError("stops + conveyor", 8, {"unknown name 'conveyor'"});
  ExpressionError error;
  ASSERT_FALSE(CompiledExpression::Create("stops + conveyor", RoutingContext(), &error).ok());
  EXPECT_THAT(error.message, Not(HasSubstr("did you mean")));
}

TEST(Expression, RejectsUnknownFunction) {
  ExpectError("1 + sin(weight)", 4,
              {"unknown function 'sin'", "available functions: min, max, abs, mod"});
  ExpectError("sqrt(stops)", 0, {"unknown function 'sqrt'", "min, max, abs, mod"});
  ExpectError("sum(1, 2)", 0, {"unknown function 'sum'", "min, max, abs, mod"});
  ExpectError("weight(2)", 0, {"'weight' is not a function", "min, max, abs, mod"});
  ExpectError("min + 1", 0, {"'min' is a function", "min(a, b)"});
}

TEST(Expression, RejectsOperatorsOutsideLanguage) {
  ExpectError("weight ^ 2", 7, {"unknown operator '^'", "available operators: + - * / %",
                                "functions: min, max, abs, mod"});
  ExpectError("weight = 2", 7, {"unknown operator '='", "did you mean '=='?"});
  ExpectError("stops & 1", 6, {"unknown operator '&'", "did you mean '&&'?"});
  ExpectError("_pi * 2", 0, {"unknown name '_pi'"});  // muParser's built-in constant is off
  ExpectError("1e3", 0, {"malformed number '1e3'", "decimal literals"});
  ExpectError("2weight", 0, {"malformed number", "2 * x"});
}

TEST(Expression, ReportsSyntaxErrorWithOffset) {
  ExpectError("", 0, {"empty expression"});
  ExpectError("weight + * 2", 9, {"expected an operand", "'*'"});
  ExpectError("weight +", 8, {"ends where an operand"});
  ExpectError("(weight + 1", 11, {"missing ')' for the '(' at offset 0"});
  ExpectError("weight + 1)", 10, {"unmatched ')'"});
  ExpectError("weight 2", 7, {"expected an operator before '2'"});
  ExpectError("weight > 1 ? 2", 14, {"the '?' at offset 11 needs a ':'"});
  ExpectError("weight : 2", 7, {"':' without a matching '?'"});
  ExpectError("1, 2", 1, {"',' outside a function's argument list"});
  ExpectError("min()", 0, {"'min' needs at least 1 argument"});
  ExpectError("abs(1, 2)", 0, {"'abs' takes 1 argument, got 2"});
  ExpectError("mod(7)", 0, {"'mod' takes 2 arguments, got 1"});
  ExpectError("max(1 2)", 6, {"expected ',' or ')' in the arguments of 'max'"});
  // muParser refuses two prefix operators in a row; so does the checker, with advice.
  ExpectError("--weight", 1, {"two prefix operators in a row", "-(-x)"});
  ExpectError("!-weight", 1, {"two prefix operators in a row"});
}

TEST(Expression, RejectsSymbolInArithmetic) {
  ExpectError("weight + north", 9, {"symbol 'north' used in arithmetic ('+')",
                                    "may only be compared with == or !="});
  ExpectError("lane * 2", 0, {"symbolic variable 'lane' used in arithmetic ('*')"});
  ExpectError("stops % dock", 8, {"symbolic variable 'dock' used in arithmetic ('%')"});
  ExpectError("-north", 1, {"symbol 'north' used in arithmetic (prefix '-')"});
  // Precedence decides: this is lane == (dock + 1), so dock is in arithmetic.
  ExpectError("lane == dock + 1", 8, {"symbolic variable 'dock' used in arithmetic ('+')"});
  // A symbolic ?: is still symbolic: the error points at its first symbol.
  ExpectError("(stops > 1 ? east : west) + 1", 13, {"symbol 'east' used in arithmetic"});
}

TEST(Expression, RejectsSymbolInOrdering) {
  ExpectError("lane < north", 0, {"symbolic variable 'lane' cannot be ordered with '<'"});
  ExpectError("weight >= south", 10, {"symbol 'south' cannot be ordered with '>='"});
}

TEST(Expression, RejectsSymbolAsLogicalOperand) {
  ExpectError("weight > 1 && lane", 14, {"symbolic variable 'lane' used as an operand of '&&'"});
  ExpectError("east || 0", 0, {"symbol 'east' used as an operand of '||'"});
}

TEST(Expression, RejectsNotOnSymbol) {
  ExpectError("!lane", 1, {"symbolic variable 'lane' used as an operand of '!'"});
  ExpectError("stops + !(west)", 10, {"symbol 'west' used as an operand of '!'"});
}

TEST(Expression, RejectsSymbolComparedWithNumber) {
  ExpectError("lane == 3", 0, {"'==' at offset 5 compares symbolic variable 'lane' with a "
                               "number"});
  ExpectError("3 != north", 5, {"'!=' at offset 2 compares symbol 'north' with a number",
                                "both sides must be symbols or both numbers"});
  ExpectError("(lane == north) == dock", 19, {"compares symbolic variable 'dock'"});
}

TEST(Expression, RejectsTernaryWithMixedBranchTypes) {
  ExpectError("weight > 2 ? north : 0", 13,
              {"branches of the '?' at offset 11 differ in type", "symbol 'north' is symbolic"});
  ExpectError("weight > 2 ? 1 : south", 17, {"symbol 'south' is symbolic"});
  // Right-associative: lane == north ? dock : (east == west) -> symbol vs number.
  ExpectError("lane == north ? dock : east == west", 16,
              {"symbolic variable 'dock' is symbolic but the other branch is a number"});
}

TEST(Expression, RejectsSymbolAsTernaryCondition) {
  ExpectError("lane ? 1 : 2", 0, {"symbolic variable 'lane' used as the condition of '?:'"});
  ExpectError("(north) ? east : west", 1, {"symbol 'north' used as the condition"});
}

TEST(Expression, RejectsSymbolAsFunctionArgument) {
  ExpectError("min(weight, north)", 12, {"symbol 'north' used as an argument of 'min'"});
  ExpectError("abs(dock)", 4, {"symbolic variable 'dock' used as an argument of 'abs'"});
  ExpectError("mod(stops, stops > 1 ? lane : dock)", 23,
              {"symbolic variable 'lane' used as an argument of 'mod'"});
}

TEST(Expression, ReportsDivisionByZeroAtEvaluation) {
  const ExpressionContext c = RoutingContext();
  std::unique_ptr<CompiledExpression> div = MustCompile("weight / stops", c);
  ASSERT_NE(div, nullptr);
  absl::StatusOr<Value> v = div->Evaluate({Value::Number(3), Value::Number(0)});
  ASSERT_FALSE(v.ok());
  EXPECT_EQ(v.status().code(), absl::StatusCode::kInvalidArgument);
  EXPECT_THAT(v.status().message(), HasSubstr("division by zero"));
  EXPECT_THAT(v.status().message(), HasSubstr("stops=0"));
  // The same object still evaluates fine afterwards.
  v = div->Evaluate({Value::Number(3), Value::Number(2)});
  ASSERT_OK(v);
  EXPECT_EQ(v->number, 1.5);

  for (const char* text : {"weight % stops", "mod(weight, stops)"}) {
    std::unique_ptr<CompiledExpression> mod = MustCompile(text, c);
    ASSERT_NE(mod, nullptr);
    v = mod->Evaluate({Value::Number(3), Value::Number(0)});
    ASSERT_FALSE(v.ok()) << text;
    EXPECT_THAT(v.status().message(), HasSubstr("modulo by zero")) << text;
  }
  // A division hidden inside a comparison still counts (it does not become a quiet 0).
  std::unique_ptr<CompiledExpression> hidden = MustCompile("weight / stops > 1000", c);
  ASSERT_NE(hidden, nullptr);
  EXPECT_FALSE(hidden->Evaluate({Value::Number(3), Value::Number(0)}).ok());
  // Only the chosen branch of ?: is evaluated.
  std::unique_ptr<CompiledExpression> guarded = MustCompile("stops == 0 ? -1 : weight / stops", c);
  ASSERT_NE(guarded, nullptr);
  v = guarded->Evaluate({Value::Number(3), Value::Number(0)});
  ASSERT_OK(v);
  EXPECT_EQ(v->number, -1);
  // A constant zero divisor is not folded away at compile time.
  std::unique_ptr<CompiledExpression> literal = MustCompile("1 / 0", ExpressionContext{});
  ASSERT_NE(literal, nullptr);
  v = literal->Evaluate({});
  ASSERT_FALSE(v.ok());
  EXPECT_THAT(v.status().message(), HasSubstr("division by zero"));
}

TEST(Expression, EvaluateRejectsBadParentValues) {
  const ExpressionContext c = RoutingContext();
  std::unique_ptr<CompiledExpression> e = MustCompile("lane == dock ? weight : stops", c);
  ASSERT_NE(e, nullptr);
  ASSERT_EQ(e->parents(), (std::vector<int>{0, 1, 2, 3}));
  absl::StatusOr<Value> v = e->Evaluate({Value::Number(1)});
  ASSERT_FALSE(v.ok());
  EXPECT_THAT(v.status().message(), HasSubstr("needs 4 parent values (weight, stops, lane, dock)"));
  v = e->Evaluate({Value::Number(1), Value::Number(2), Value::Number(0), Value::Symbol(0)});
  ASSERT_FALSE(v.ok());
  EXPECT_THAT(v.status().message(), HasSubstr("value for 'lane' must be a symbol"));
  v = e->Evaluate({Value::Number(1), Value::Number(2), Value::Symbol(7), Value::Symbol(0)});
  ASSERT_FALSE(v.ok());
  EXPECT_THAT(v.status().message(), HasSubstr("symbol index 7, outside 0..3"));
  v = e->Evaluate({Value::Number(1), Value::Number(std::nan("")), Value::Symbol(0),
                   Value::Symbol(1)});
  ASSERT_FALSE(v.ok());
  EXPECT_THAT(v.status().message(), HasSubstr("'stops' is not a finite number"));
}

TEST(Expression, RefusesContextWithDuplicateOrReservedNames) {
  ExpressionContext c = RoutingContext();
  c.symbols.push_back("lane");
  ExpectError("1", 0, {"'lane' is defined twice"}, c);
  c = RoutingContext();
  c.variables.push_back({"max", ValueType::kNumber});
  ExpectError("1", 0, {"'max' is reserved"}, c);
}

// ---- Semantics --------------------------------------------------------------------------

TEST(Expression, SymbolsEqualOnlyTheSameSymbol) {
  // The same expressions over two orderings of the symbol list give the same truth values.
  for (bool reversed : {false, true}) {
    ExpressionContext c = RoutingContext();
    if (reversed) c.symbols = {"west", "east", "south", "north"};
    const int north = SymbolIndex(c, "north"), south = SymbolIndex(c, "south");
    std::unique_ptr<CompiledExpression> is_north = MustCompile("lane == north", c);
    std::unique_ptr<CompiledExpression> same = MustCompile("lane == dock", c);
    std::unique_ptr<CompiledExpression> differ = MustCompile("lane != dock", c);
    ASSERT_NE(is_north, nullptr);
    ASSERT_NE(same, nullptr);
    ASSERT_NE(differ, nullptr);
    EXPECT_EQ(is_north->result_type(), ValueType::kNumber);
    EXPECT_EQ(is_north->parents(), std::vector<int>{2});
    EXPECT_EQ(same->parents(), (std::vector<int>{2, 3}));
    for (int lane = 0; lane < 4; ++lane) {
      absl::StatusOr<Value> v = is_north->Evaluate({Value::Symbol(lane)});
      ASSERT_OK(v);
      EXPECT_EQ(v->number, lane == north ? 1.0 : 0.0) << "reversed=" << reversed;
      for (int dock = 0; dock < 4; ++dock) {
        absl::StatusOr<Value> s = same->Evaluate({Value::Symbol(lane), Value::Symbol(dock)});
        absl::StatusOr<Value> d = differ->Evaluate({Value::Symbol(lane), Value::Symbol(dock)});
        ASSERT_OK(s);
        ASSERT_OK(d);
        EXPECT_EQ(s->number, lane == dock ? 1.0 : 0.0);
        EXPECT_EQ(d->number, lane == dock ? 0.0 : 1.0);
      }
    }
    // Two symbol literals: only identical names are equal.
    std::unique_ptr<CompiledExpression> literals =
        MustCompile("(north == north) * 10 + (north == south) + (south != north) * 100", c);
    ASSERT_NE(literals, nullptr);
    absl::StatusOr<Value> v = literals->Evaluate({});
    ASSERT_OK(v);
    EXPECT_EQ(v->number, 110);
    (void)south;
  }
}

TEST(Expression, TernaryReturnsSymbols) {
  const ExpressionContext c = RoutingContext();
  std::unique_ptr<CompiledExpression> route =
      MustCompile("weight > 20 ? (north) : (stops > 3 ? lane : south)", c);
  ASSERT_NE(route, nullptr);
  EXPECT_EQ(route->result_type(), ValueType::kSymbol);
  EXPECT_EQ(route->parents(), (std::vector<int>{0, 1, 2}));
  const int north = SymbolIndex(c, "north"), south = SymbolIndex(c, "south"),
            west = SymbolIndex(c, "west");
  struct Case { double weight, stops; int lane, want; };
  for (const Case& k : {Case{25, 0, west, north}, Case{5, 4, west, west},
                        Case{5, 1, west, south}, Case{20, 9, north, north}}) {
    absl::StatusOr<Value> v =
        route->Evaluate({Value::Number(k.weight), Value::Number(k.stops), Value::Symbol(k.lane)});
    ASSERT_OK(v);
    EXPECT_EQ(*v, Value::Symbol(k.want)) << k.weight << " " << k.stops;
  }
  // A bare symbol, a bare symbolic variable, parenthesised.
  std::unique_ptr<CompiledExpression> bare = MustCompile("((east))", c);
  ASSERT_NE(bare, nullptr);
  EXPECT_EQ(bare->result_type(), ValueType::kSymbol);
  absl::StatusOr<Value> v = bare->Evaluate({});
  ASSERT_OK(v);
  EXPECT_EQ(*v, Value::Symbol(SymbolIndex(c, "east")));
  std::unique_ptr<CompiledExpression> copy = MustCompile("dock", c);
  ASSERT_NE(copy, nullptr);
  v = copy->Evaluate({Value::Symbol(2)});
  ASSERT_OK(v);
  EXPECT_EQ(*v, Value::Symbol(2));
}

TEST(Expression, FlooredModuloTakesTheDivisorsSign) {
  // Python language reference, 6.7 Binary arithmetic operations (section and wording from
  // memory): the result of % has the sign of the second operand. The values are those Python 3
  // gives for these, worked by hand; these four cases are not themselves run through Python, but
  // the random cross-check below runs random expressions with % and mod, on inputs from -4 to
  // 4, through Debian's /usr/bin/python3.
  EXPECT_EQ(Constant("-7 % 3"), 2);
  EXPECT_EQ(Constant("7 % -3"), -2);
  EXPECT_EQ(Constant("-7 % -3"), -1);
  EXPECT_EQ(Constant("7 % 3"), 1);
  EXPECT_EQ(Constant("mod(-7, 3)"), 2);
  EXPECT_EQ(Constant("mod(7, -3)"), -2);
  EXPECT_EQ(Constant("5.5 % 2"), 1.5);
  EXPECT_EQ(Constant("-5.5 % 2"), 0.5);
  EXPECT_EQ(Constant("-6 % 3"), 0);
}

TEST(Expression, MinMaxAbs) {
  EXPECT_EQ(Constant("min(3, -1, 2)"), -1);
  EXPECT_EQ(Constant("max(3, -1, 2)"), 3);
  EXPECT_EQ(Constant("min(4)"), 4);
  EXPECT_EQ(Constant("max(-4)"), -4);
  EXPECT_EQ(Constant("max(1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12) - min(0.5, 7)"), 11.5);
  EXPECT_EQ(Constant("abs(-2.5)"), 2.5);
  EXPECT_EQ(Constant("abs(2 - 5) + abs(0)"), 3);
  EXPECT_EQ(Constant("min(1 ? 5 : 6, 9)"), 5);
}

TEST(Expression, TrueAndFalse) {
  EXPECT_EQ(Constant("true"), 1);
  EXPECT_EQ(Constant("false"), 0);
  EXPECT_EQ(Constant("true + true"), 2);
  EXPECT_EQ(Constant("!false"), 1);
  EXPECT_EQ(Constant("!true"), 0);
  EXPECT_EQ(Constant("false || true"), 1);
  EXPECT_EQ(Constant("true && false"), 0);
  EXPECT_EQ(Constant("3 && 4"), 1);  // logic gives 0/1, not an operand
  EXPECT_EQ(Constant("0 || 7"), 1);
  EXPECT_EQ(Constant("!5"), 0);
  EXPECT_EQ(Constant("(2 < 3) + (3 <= 3) + (4 > 5) + (5 >= 5) + (1 == 1) + (1 != 1)"), 4);
}

TEST(Expression, OperatorPrecedence) {
  // Each case is chosen so that a different grouping gives a different value.
  EXPECT_EQ(Constant("1 + 2 * 3"), 7);
  EXPECT_EQ(Constant("10 - 4 - 3"), 3);    // left-associative
  EXPECT_EQ(Constant("12 / 3 / 2"), 2);    // left-associative
  EXPECT_EQ(Constant("7 / 2"), 3.5);       // true division
  EXPECT_EQ(Constant("2 * 7 % 4"), 2);     // (2*7)%4, not 2*(7%4)=6
  EXPECT_EQ(Constant("-7 % 3"), 2);        // (-7)%3, not -(7%3)=-1
  EXPECT_EQ(Constant("-2 * 3 % 4"), 2);    // ((-2)*3)%4, not -((2*3)%4)=-2
  EXPECT_EQ(Constant("!0 + 1"), 2);        // (!0)+1, not !(0+1)=0
  EXPECT_EQ(Constant("2 == 2 < 3"), 1);    // one comparison level: (2==2)<3; C would give 0
  EXPECT_EQ(Constant("3 > 2 > 1"), 0);     // (3>2)>1, no chaining as in Python
  EXPECT_EQ(Constant("1 + 1 == 2"), 1);    // (1+1)==2
  EXPECT_EQ(Constant("1 || 0 && 0"), 1);   // 1 || (0 && 0)
  EXPECT_EQ(Constant("0 && 0 || 1"), 1);   // (0 && 0) || 1
  EXPECT_EQ(Constant("2 < 1 || 1"), 1);    // (2<1) || 1
  EXPECT_EQ(Constant("1 ? 2 : 0 ? 3 : 4"), 2);  // right-associative; (1?2:0)?3:4 would be 3
  EXPECT_EQ(Constant("1 ? 0 ? 5 : 6 : 7"), 6);  // nested in the middle
  EXPECT_EQ(Constant("0 || 0 ? 5 : 6"), 6);     // (0||0) ? 5 : 6
  EXPECT_EQ(Constant("1 + 1 > 1 ? 5 : 6 + 10"), 5);  // else branch extends to the end
  EXPECT_EQ(Constant("0 ? 5 : 6 + 10"), 16);
  EXPECT_EQ(Constant("-(-3)"), 3);
  EXPECT_EQ(Constant("4--3"), 7);          // binary minus then prefix minus, no spaces
  EXPECT_EQ(Constant("2*-3"), -6);
  EXPECT_EQ(Constant("1==!0"), 1);
}

TEST(Expression, ParentsAreAscendingIndicesOfUsedVariables) {
  const ExpressionContext c = RoutingContext();
  std::unique_ptr<CompiledExpression> e = MustCompile("dock == lane && stops > weight * 2", c);
  ASSERT_NE(e, nullptr);
  EXPECT_EQ(e->parents(), (std::vector<int>{0, 1, 2, 3}));
  absl::StatusOr<Value> v =
      e->Evaluate({Value::Number(1), Value::Number(3), Value::Symbol(1), Value::Symbol(1)});
  ASSERT_OK(v);
  EXPECT_EQ(v->number, 1);
  v = e->Evaluate({Value::Number(2), Value::Number(3), Value::Symbol(1), Value::Symbol(1)});
  ASSERT_OK(v);
  EXPECT_EQ(v->number, 0);
  std::unique_ptr<CompiledExpression> partial = MustCompile("stops - 1 + stops", c);
  ASSERT_NE(partial, nullptr);
  EXPECT_EQ(partial->parents(), std::vector<int>{1});
  v = partial->Evaluate({Value::Number(4)});
  ASSERT_OK(v);
  EXPECT_EQ(v->number, 7);
}

// ---- External reference: Debian's Python evaluates the same random expressions ----------

// Writes random expressions with as few parentheses as the documented precedence allows.
class RandomExpressionWriter {
 public:
  static constexpr int kAtom = 9;  // precedence of literals, names, calls, parentheses

  struct Piece {
    std::string text;
    int precedence;
  };

  explicit RandomExpressionWriter(unsigned seed) : rng_(seed) {}

  Piece Numeric(int depth) {
    if (depth <= 0 || Chance(0.12)) return NumericLeaf(depth);
    switch (Uniform(0, 14)) {
      case 0: case 1: return Binary(depth, Pick({"+", "-"}), 5);
      case 2: case 3: return Binary(depth, Pick({"*", "/", "%"}), 6);
      case 4: case 5: return Comparison(depth);
      case 6: return Binary(depth, "&&", 2);
      case 7: return Binary(depth, "||", 1);
      case 8: case 9: {
        const std::string op = Pick({"-", "!"});
        Count(op == "-" ? "prefix -" : "!");
        return Maybe({op + Space() + Wrap(Numeric(depth - 1), kAtom), 7});
      }
      case 10: {
        Count("?:");
        Piece cond = Numeric(depth - 1), a = Numeric(depth - 1), b = Numeric(depth - 1);
        return Maybe({Wrap(cond, 1) + " ? " + a.text + " : " + b.text, 0});
      }
      case 11: case 12: {
        const std::string f = Pick({"min", "max"});
        Count(f);
        std::string args;
        const int n = Uniform(1, 3);
        for (int i = 0; i < n; ++i) args += (i ? ", " : "") + Numeric(depth - 1).text;
        return {f + "(" + args + ")", kAtom};
      }
      case 13: Count("abs"); return {"abs(" + Numeric(depth - 1).text + ")", kAtom};
      default:
        Count("mod");
        return {"mod(" + Numeric(depth - 1).text + ", " + Numeric(depth - 1).text + ")", kAtom};
    }
  }

  // `ternary_chance`: how often a symbolic ?: is written where depth allows.
  Piece Symbolic(int depth, double ternary_chance = 0.4) {
    if (depth > 0 && Chance(ternary_chance)) {
      Count("symbolic ?:");
      Piece cond = Numeric(depth - 1), a = Symbolic(depth - 1), b = Symbolic(depth - 1);
      return Maybe({Wrap(cond, 1) + " ? " + a.text + " : " + b.text, 0});
    }
    if (Chance(0.5)) {
      const std::string v = Pick({"lane", "dock"});
      used_.insert(v);
      return Maybe({v, kAtom});
    }
    return Maybe({Pick({"north", "south", "east", "west"}), kAtom});
  }

  // Names of the variables used since the last call.
  std::set<std::string> TakeUsed() { return std::exchange(used_, {}); }
  const std::map<std::string, int>& counts() const { return counts_; }
  int Uniform(int lo, int hi) { return std::uniform_int_distribution<int>(lo, hi)(rng_); }
  std::string Pick(const std::vector<std::string>& options) {
    return options[Uniform(0, static_cast<int>(options.size()) - 1)];
  }

 private:
  bool Chance(double p) { return std::bernoulli_distribution(p)(rng_); }
  void Count(const std::string& what) { ++counts_[what]; }
  // Sometimes omit the spaces, so tokenising without them is exercised too.
  std::string Space() { return Chance(0.5) ? "" : " "; }
  static std::string Wrap(const Piece& p, int min_precedence) {
    return p.precedence >= min_precedence ? p.text : "(" + p.text + ")";
  }
  // Occasionally adds redundant parentheses.
  Piece Maybe(Piece p) { return Chance(0.06) ? Piece{"(" + p.text + ")", kAtom} : p; }

  Piece NumericLeaf(int depth) {
    const int r = Uniform(0, 19);
    if (r < 10) {
      const std::string v = Pick({"x", "y", "z"});
      used_.insert(v);
      return {v, kAtom};
    }
    if (r < 14) return {std::to_string(Uniform(0, 5)), kAtom};
    if (r < 16) return {Pick({"0.5", "1.5", "2.25", ".5"}), kAtom};
    if (r < 17) { Count("true/false"); return {Pick({"true", "false"}), kAtom}; }
    // A symbol comparison is a numeric leaf; its operands sit above comparison precedence.
    Count("symbol ==");
    Piece a = Symbolic(depth - 1), b = Symbolic(depth - 1);
    return Maybe({Wrap(a, 5) + " " + Pick({"==", "!="}) + " " + Wrap(b, 5), 4});
  }

  Piece Binary(int depth, const std::string& op, int precedence) {
    Count(op);
    Piece a = Numeric(depth - 1), b = Numeric(depth - 1);
    const std::string sp = op == "&&" || op == "||" ? " " : Space();
    return Maybe({Wrap(a, precedence) + sp + op + sp + Wrap(b, precedence + 1), precedence});
  }

  // Comparisons inside comparisons are parenthesised so that Python's chaining never matters.
  Piece Comparison(int depth) {
    const std::string op = Pick({"<", "<=", ">", ">=", "==", "!="});
    Count(op);
    Piece a = Numeric(depth - 1), b = Numeric(depth - 1);
    const std::string sp = Space();
    return Maybe({Wrap(a, 5) + sp + op + sp + Wrap(b, 5), 4});
  }

  std::mt19937 rng_;
  std::set<std::string> used_;
  std::map<std::string, int> counts_;
};

std::string Json(double x) {
  char buf[64];
  std::snprintf(buf, sizeof(buf), "%.17g", x);
  return buf;
}

TEST(Expression, AgreesWithPythonOnRandomExpressions) {
  // External reference: Python language reference, 6.7 Binary arithmetic operations (section
  // from memory): floored modulo; evaluated by Debian's /usr/bin/python3 (tests/python/check_expressions.py parses
  // the documented grammar independently and lets Python do the arithmetic).
  ExpressionContext c;
  c.variables = {{"x", ValueType::kNumber},    {"y", ValueType::kNumber},
                 {"spare", ValueType::kNumber}, {"z", ValueType::kNumber},
                 {"lane", ValueType::kSymbol},  {"dock", ValueType::kSymbol}};
  c.symbols = {"north", "south", "east", "west"};
  constexpr int kExpressions = 600;
  constexpr int kInputsPerExpression = 4;

  RandomExpressionWriter writer(20240611);
  std::string cases =
      "{\"symbols\": [\"north\", \"south\", \"east\", \"west\"], \"variables\": {\"x\": "
      "\"number\", \"y\": \"number\", \"spare\": \"number\", \"z\": \"number\", \"lane\": "
      "\"symbol\", \"dock\": \"symbol\"}}\n";
  int numbers = 0, symbols = 0, zero_divisors = 0;
  for (int n = 0; n < kExpressions; ++n) {
    const bool symbolic = n % 5 == 4;
    const std::string text =
        symbolic ? writer.Symbolic(4, 0.85).text : writer.Numeric(1 + n % 5).text;
    const std::set<std::string> used = writer.TakeUsed();
    std::unique_ptr<CompiledExpression> e = MustCompile(text, c);
    ASSERT_NE(e, nullptr) << text;
    ASSERT_EQ(e->result_type(), symbolic ? ValueType::kSymbol : ValueType::kNumber) << text;
    std::vector<int> want_parents;
    for (size_t i = 0; i < c.variables.size(); ++i) {
      if (used.count(c.variables[i].name)) want_parents.push_back(static_cast<int>(i));
    }
    ASSERT_EQ(e->parents(), want_parents) << text;
    for (int k = 0; k < kInputsPerExpression; ++k) {
      std::vector<Value> inputs;
      std::string json_inputs;
      for (int p : e->parents()) {
        const ExpressionVariable& v = c.variables[p];
        std::string shown;
        if (v.type == ValueType::kSymbol) {
          const int s = writer.Uniform(0, 3);
          inputs.push_back(Value::Symbol(s));
          shown = "\"" + c.symbols[s] + "\"";
        } else {
          const int x = writer.Uniform(-4, 4);
          inputs.push_back(Value::Number(x));
          shown = std::to_string(x);
        }
        json_inputs += (json_inputs.empty() ? "\"" : ", \"") + v.name + "\": " + shown;
      }
      absl::StatusOr<Value> result = e->Evaluate(inputs);
      std::string json_result;
      if (!result.ok()) {
        const std::string message(result.status().message());
        ASSERT_TRUE(message.find("division by zero") == 0 || message.find("modulo by zero") == 0)
            << text << ": " << result.status();
        json_result = "{\"error\": \"" + message.substr(0, message.find(" by zero") + 8) + "\"}";
        ++zero_divisors;
      } else if (result->type == ValueType::kSymbol) {
        json_result = "{\"symbol\": \"" + c.symbols[result->symbol] + "\"}";
        ++symbols;
      } else {
        json_result = "{\"number\": " + Json(result->number) + "}";
        ++numbers;
      }
      cases += "{\"expr\": \"" + text + "\", \"inputs\": {" + json_inputs + "}, \"result\": " +
               json_result + "}\n";
    }
  }
  // The corpus exercises every operator and function, and all three kinds of outcome.
  for (const char* what : {"+", "-", "*", "/", "%", "<", "<=", ">", ">=", "==", "!=", "&&", "||",
                           "prefix -", "!", "?:", "min", "max", "abs", "mod", "true/false",
                           "symbol ==", "symbolic ?:"}) {
    EXPECT_GE(writer.counts().count(what) ? writer.counts().at(what) : 0, 5) << what;
  }
  EXPECT_GT(numbers, kExpressions);
  EXPECT_GT(symbols, 50);
  EXPECT_GT(zero_divisors, 5);

  testing::ScopedTempDir dir;
  const std::string file = dir.path() + "/cases.jsonl";
  testing::WriteFile(file, cases);
  const testing::CommandResult run =
      testing::RunCommand(std::string(testing::SystemPython()) + " " + testing::SourceDir() +
                          "/tests/python/check_expressions.py " + file);
  ASSERT_EQ(run.exit_code, 0) << run.output;
  EXPECT_THAT(run.output,
              HasSubstr("checked " + std::to_string(kExpressions * kInputsPerExpression) +
                        " cases (" + std::to_string(numbers) + " numbers, " +
                        std::to_string(symbols) + " symbols, " + std::to_string(zero_divisors) +
                        " zero divisors)"));
  EXPECT_THAT(run.output, HasSubstr("all agree"));
}

TEST(Expression, CheckerAcceptsOnlyWhatMuParserAccepts) {
  // Random token soups: whenever our checker accepts one, muParser must compile it too (a
  // refusal by muParser after the checker said yes shows up as "syntax error: ..."), and it
  // must evaluate without an internal error.
  const std::vector<std::string> pieces = {
      "weight", "stops", "lane", "north", "1", "0.5", "true", "+", "-", "*", "/", "%", "!",
      "<", "<=", "==", "!=", "&&", "||", "?", ":", "(", ")", ",", "min(", "abs(", "mod("};
  const ExpressionContext c = RoutingContext();
  std::mt19937 rng(7);
  int accepted = 0;
  for (int n = 0; n < 30000; ++n) {
    const int length = std::uniform_int_distribution<int>(1, 9)(rng);
    std::string text;
    for (int i = 0; i < length; ++i) {
      text += pieces[std::uniform_int_distribution<size_t>(0, pieces.size() - 1)(rng)];
      if (rng() % 2) text += " ";
    }
    ExpressionError error;
    absl::StatusOr<std::unique_ptr<CompiledExpression>> e =
        CompiledExpression::Create(text, c, &error);
    if (!e.ok()) {
      ASSERT_THAT(error.message, Not(HasSubstr("syntax error:"))) << "'" << text << "'";
      ASSERT_GE(error.offset, 0) << text;
      ASSERT_LE(error.offset, static_cast<int>(text.size())) << text;
      continue;
    }
    ++accepted;
    std::vector<Value> inputs;
    for (int p : (*e)->parents()) {
      inputs.push_back(c.variables[p].type == ValueType::kSymbol ? Value::Symbol(1)
                                                                 : Value::Number(2));
    }
    absl::StatusOr<Value> v = (*e)->Evaluate(inputs);
    ASSERT_NE(v.status().code(), absl::StatusCode::kInternal) << text << ": " << v.status();
  }
  EXPECT_GT(accepted, 500);
}

TEST(Expression, PythonCheckerCatchesTruncatedModulo) {
  // The checker itself must be able to fail: C's fmod gives -1 for -7 % 3, Python gives 2.
  testing::ScopedTempDir dir;
  const std::string file = dir.path() + "/cases.jsonl";
  testing::WriteFile(file,
                     "{\"symbols\": [], \"variables\": {\"x\": \"number\"}}\n"
                     "{\"expr\": \"x % 3\", \"inputs\": {\"x\": -7}, \"result\": {\"number\": -1}}\n");
  const testing::CommandResult run =
      testing::RunCommand(std::string(testing::SystemPython()) + " " + testing::SourceDir() +
                          "/tests/python/check_expressions.py " + file);
  EXPECT_EQ(run.exit_code, 1) << run.output;
  EXPECT_THAT(run.output, HasSubstr("1 disagreements"));
}

}  // namespace
}  // namespace graft::causal
