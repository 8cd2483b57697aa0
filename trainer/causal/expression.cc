// The mechanism expression language.
//
// An expression computes one variable's value from other variables of the algorithm.
//
//   Numbers    decimal literals: 3, 0.5, .5 (no exponents, no hex).
//   Names      a variable of the context (numeric or symbolic), a symbol of the context,
//              `true` (= 1) and `false` (= 0).
//   Operators  from lowest to highest precedence; binary operators are left-associative:
//                c ? a : b            ternary (right-associative; only the chosen branch is
//                                     evaluated; the condition is true when nonzero)
//                ||                   logical or   (gives 0/1; both operands are evaluated)
//                &&                   logical and  (gives 0/1; both operands are evaluated)
//                < <= > >= == !=      comparisons, all at one level (give 0/1);
//                                     `a < b < c` means `(a < b) < c`
//                + -                  addition, subtraction
//                * / %                multiplication, true division, floored modulo: the
//                                     result has the sign of the divisor (-7 % 3 == 2,
//                                     7 % -3 == -2), as in Python
//                - !                  prefix minus and logical not (gives 0/1); two prefix
//                                     operators in a row need parentheses: -(-x), !(!x)
//              and parentheses.
//   Functions  min(a, b, ...), max(a, b, ...) (one or more arguments), abs(x), mod(a, b)
//              (= a % b). Nothing else: `^`, `sin`, `sqrt`, `sum` and the other built-ins of
//              the evaluator are refused with a list of what is available.
//   Symbols    a symbolic value is the symbol itself. A symbol (a symbol name, or a variable
//              of type kSymbol) may appear only as an operand of == / != whose other operand
//              is symbolic too, or as the result of the expression, including both branches
//              of ?: (the branches must have the same type), possibly parenthesised. Symbols
//              are equal only to the same symbol (the same entry of the context's list).
//   Evaluation numeric results are finite: division by zero and modulo by zero are errors.
//
// Implementation: a small recursive-descent parser of our own checks names and types and
// gives errors with offsets (muParser has no public syntax tree); its precedence mirrors the
// muParser configuration below exactly. muParser then evaluates: its built-in binary operators,
// functions and constants are switched off and the language's own are defined, so nothing
// outside the language can be evaluated. Symbols are muParser constants whose value is their
// index in the context's symbol list; symbolic variables hold a symbol index.
#include "trainer/causal/expression.h"

#include <muParser.h>

#include <algorithm>
#include <cmath>
#include <limits>
#include <optional>
#include <utility>

#include "absl/status/status.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_join.h"

namespace graft::causal {
namespace {

constexpr int kMaxExpressionLength = 4000;  // muParser itself refuses beyond 10000
constexpr int kMaxNesting = 200;            // bounds the parser's recursion
constexpr const char* kFunctionList = "min, max, abs, mod";
constexpr const char* kOperatorList = "+ - * / % ! < <= > >= == != && || ?: ( )";
constexpr const char* kSymbolRule =
    "a symbol may only be compared with == or != to another symbol, or be the result";

// Precedences given to muParser. The parser below mirrors them: ternary lowest, then ||,
// &&, comparisons, + -, * / %, and prefix operators highest.
constexpr int kPrecOr = mu::prLOR;          // 1
constexpr int kPrecAnd = mu::prLAND;        // 2
constexpr int kPrecCompare = mu::prCMP;     // 4
constexpr int kPrecAdd = mu::prADD_SUB;     // 5
constexpr int kPrecMul = mu::prMUL_DIV;     // 6
constexpr int kPrecPrefix = mu::prMUL_DIV + 1;  // binds tighter than * / %

// ---- Evaluation faults ------------------------------------------------------------------
// muParser's operator callbacks are plain function pointers without user data, so division
// and modulo report a zero divisor through this per-thread slot. Evaluate() clears it before
// and reads it after muParser runs, on the calling thread, so distinct CompiledExpressions
// stay independent across threads.
enum class Fault { kNone, kDivisionByZero, kModuloByZero };

Fault& CurrentFault() {
  thread_local Fault fault = Fault::kNone;
  return fault;
}

void RecordFault(Fault f) {
  if (CurrentFault() == Fault::kNone) CurrentFault() = f;
}

double Truth(double x) { return x != 0 ? 1.0 : 0.0; }
double Add(double a, double b) { return a + b; }
double Subtract(double a, double b) { return a - b; }
double Multiply(double a, double b) { return a * b; }
double Divide(double a, double b) {
  if (b == 0) {
    RecordFault(Fault::kDivisionByZero);
    return std::numeric_limits<double>::quiet_NaN();
  }
  return a / b;
}
// Floored modulo, computed as Python computes it for floats (fmod, then moved into the
// divisor's sign; a zero result takes the divisor's sign).
double FlooredModulo(double a, double b) {
  if (b == 0) {
    RecordFault(Fault::kModuloByZero);
    return std::numeric_limits<double>::quiet_NaN();
  }
  double m = std::fmod(a, b);
  if (m != 0) {
    if ((b < 0) != (m < 0)) m += b;
  } else {
    m = std::copysign(0.0, b);
  }
  return m;
}
double Less(double a, double b) { return a < b ? 1.0 : 0.0; }
double LessEqual(double a, double b) { return a <= b ? 1.0 : 0.0; }
double Greater(double a, double b) { return a > b ? 1.0 : 0.0; }
double GreaterEqual(double a, double b) { return a >= b ? 1.0 : 0.0; }
double Equal(double a, double b) { return a == b ? 1.0 : 0.0; }
double NotEqual(double a, double b) { return a != b ? 1.0 : 0.0; }
double LogicalAnd(double a, double b) { return Truth(a) * Truth(b); }
double LogicalOr(double a, double b) { return (a != 0 || b != 0) ? 1.0 : 0.0; }
double Negate(double a) { return -a; }
double LogicalNot(double a) { return a == 0 ? 1.0 : 0.0; }
double Minimum(const double* args, int n) {
  double m = args[0];
  for (int i = 1; i < n; ++i) m = std::min(m, args[i]);
  return m;
}
double Maximum(const double* args, int n) {
  double m = args[0];
  for (int i = 1; i < n; ++i) m = std::max(m, args[i]);
  return m;
}
double Absolute(double a) { return std::fabs(a); }

// Restricts `parser` to the language: no built-in operators, functions, constants or prefix
// and postfix operators except ours.
void ConfigureLanguage(mu::Parser& parser) {
  parser.EnableBuiltInOprt(false);  // keeps ( ) , ?: ; drops + - * / ^ && || < ... and =
  parser.ClearOprt();
  parser.ClearInfixOprt();
  parser.ClearPostfixOprt();
  parser.ClearFun();
  parser.ClearConst();
  parser.DefineOprt("+", Add, kPrecAdd, mu::oaLEFT, true);
  parser.DefineOprt("-", Subtract, kPrecAdd, mu::oaLEFT, true);
  parser.DefineOprt("*", Multiply, kPrecMul, mu::oaLEFT, true);
  // Not constant-folded: a zero divisor must be reported when Evaluate() runs.
  parser.DefineOprt("/", Divide, kPrecMul, mu::oaLEFT, false);
  parser.DefineOprt("%", FlooredModulo, kPrecMul, mu::oaLEFT, false);
  parser.DefineOprt("<", Less, kPrecCompare, mu::oaLEFT, true);
  parser.DefineOprt("<=", LessEqual, kPrecCompare, mu::oaLEFT, true);
  parser.DefineOprt(">", Greater, kPrecCompare, mu::oaLEFT, true);
  parser.DefineOprt(">=", GreaterEqual, kPrecCompare, mu::oaLEFT, true);
  parser.DefineOprt("==", Equal, kPrecCompare, mu::oaLEFT, true);
  parser.DefineOprt("!=", NotEqual, kPrecCompare, mu::oaLEFT, true);
  parser.DefineOprt("&&", LogicalAnd, kPrecAnd, mu::oaLEFT, true);
  parser.DefineOprt("||", LogicalOr, kPrecOr, mu::oaLEFT, true);
  parser.DefineInfixOprt("-", Negate, kPrecPrefix, true);
  parser.DefineInfixOprt("!", LogicalNot, kPrecPrefix, true);
  parser.DefineFun("min", Minimum, true);
  parser.DefineFun("max", Maximum, true);
  parser.DefineFun("abs", Absolute, true);
  parser.DefineFun("mod", FlooredModulo, false);
  parser.DefineConst("true", 1.0);
  parser.DefineConst("false", 0.0);
}

bool IsFunctionName(const std::string& s) {
  return s == "min" || s == "max" || s == "abs" || s == "mod";
}

// Optimal string alignment distance (Levenshtein plus adjacent transpositions).
int EditDistance(const std::string& a, const std::string& b) {
  const size_t n = a.size(), m = b.size();
  std::vector<std::vector<int>> d(n + 1, std::vector<int>(m + 1, 0));
  for (size_t i = 0; i <= n; ++i) d[i][0] = static_cast<int>(i);
  for (size_t j = 0; j <= m; ++j) d[0][j] = static_cast<int>(j);
  for (size_t i = 1; i <= n; ++i) {
    for (size_t j = 1; j <= m; ++j) {
      const int cost = a[i - 1] == b[j - 1] ? 0 : 1;
      d[i][j] = std::min({d[i - 1][j] + 1, d[i][j - 1] + 1, d[i - 1][j - 1] + cost});
      if (i > 1 && j > 1 && a[i - 1] == b[j - 2] && a[i - 2] == b[j - 1]) {
        d[i][j] = std::min(d[i][j], d[i - 2][j - 2] + 1);
      }
    }
  }
  return d[n][m];
}

// ---- Tokens -----------------------------------------------------------------------------
enum class TokenKind { kNumber, kName, kOperator, kOpenParen, kCloseParen, kComma, kQuestion,
                       kColon, kEnd };

struct Token {
  TokenKind kind = TokenKind::kEnd;
  std::string text;
  int offset = 0;
};

bool IsNameStart(char c) {
  return (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || c == '_';
}
bool IsNameChar(char c) { return IsNameStart(c) || (c >= '0' && c <= '9'); }
bool IsDigit(char c) { return c >= '0' && c <= '9'; }

// Splits `text` into tokens. On failure fills *error and returns false.
bool Tokenize(const std::string& text, std::vector<Token>* tokens, ExpressionError* error) {
  static const char* const kTwoCharOperators[] = {"<=", ">=", "==", "!=", "&&", "||"};
  size_t i = 0;
  while (i < text.size()) {
    const char c = text[i];
    const int offset = static_cast<int>(i);
    if (c == ' ' || c == '\t' || c == '\n' || c == '\r') {
      ++i;
      continue;
    }
    if (IsDigit(c) || (c == '.' && i + 1 < text.size() && IsDigit(text[i + 1]))) {
      size_t j = i;
      while (j < text.size() && IsDigit(text[j])) ++j;
      if (j < text.size() && text[j] == '.') {
        ++j;
        while (j < text.size() && IsDigit(text[j])) ++j;
      }
      if (j < text.size() && (IsNameChar(text[j]) || text[j] == '.')) {
        size_t k = j;
        while (k < text.size() && (IsNameChar(text[k]) || text[k] == '.')) ++k;
        *error = {offset, absl::StrCat("malformed number '", text.substr(i, k - i),
                                       "'; numbers are decimal literals such as 3 or 0.5",
                                       IsNameStart(text[j]) ? " (put an operator between a "
                                                              "number and a name, e.g. 2 * x)"
                                                            : "")};
        return false;
      }
      tokens->push_back({TokenKind::kNumber, text.substr(i, j - i), offset});
      i = j;
      continue;
    }
    if (IsNameStart(c)) {
      size_t j = i;
      while (j < text.size() && IsNameChar(text[j])) ++j;
      tokens->push_back({TokenKind::kName, text.substr(i, j - i), offset});
      i = j;
      continue;
    }
    bool matched = false;
    for (const char* op : kTwoCharOperators) {
      if (text.compare(i, 2, op) == 0) {
        tokens->push_back({TokenKind::kOperator, op, offset});
        i += 2;
        matched = true;
        break;
      }
    }
    if (matched) continue;
    switch (c) {
      case '+': case '-': case '*': case '/': case '%': case '<': case '>': case '!':
        tokens->push_back({TokenKind::kOperator, std::string(1, c), offset});
        ++i;
        continue;
      case '(': tokens->push_back({TokenKind::kOpenParen, "(", offset}); ++i; continue;
      case ')': tokens->push_back({TokenKind::kCloseParen, ")", offset}); ++i; continue;
      case ',': tokens->push_back({TokenKind::kComma, ",", offset}); ++i; continue;
      case '?': tokens->push_back({TokenKind::kQuestion, "?", offset}); ++i; continue;
      case ':': tokens->push_back({TokenKind::kColon, ":", offset}); ++i; continue;
      default: break;
    }
    std::string hint;
    if (c == '=') hint = " (did you mean '=='?)";
    if (c == '&') hint = " (did you mean '&&'?)";
    if (c == '|') hint = " (did you mean '||'?)";
    if (c == '^') hint = " (there is no power operator; write x * x)";
    const unsigned char uc = static_cast<unsigned char>(c);
    if (uc < 0x20 || uc >= 0x7f) {
      *error = {offset, absl::StrCat("unexpected character (byte 0x",
                                     absl::Hex(uc, absl::kZeroPad2),
                                     "); expressions are plain ASCII")};
    } else {
      *error = {offset, absl::StrCat("unknown operator '", std::string(1, c), "'", hint,
                                     "; available operators: ", kOperatorList,
                                     "; functions: ", kFunctionList)};
    }
    return false;
  }
  tokens->push_back({TokenKind::kEnd, "", static_cast<int>(text.size())});
  return true;
}

// ---- Checker ----------------------------------------------------------------------------
// The static type of a subexpression. For symbolic ones, where a representative symbol token
// is (the one an error about misusing this subexpression points at) and how to name it.
struct Typed {
  ValueType type = ValueType::kNumber;
  int symbol_offset = 0;
  std::string symbol_label;  // e.g. "symbol 'heavy'" or "symbolic variable 'shape'"
};

class Checker {
 public:
  Checker(const std::vector<Token>& tokens, const ExpressionContext& context)
      : tokens_(tokens), context_(context) {}

  // Parses the whole token list. On failure returns nullopt and error() tells why.
  std::optional<Typed> Run() {
    if (tokens_.front().kind == TokenKind::kEnd) {
      return Fail(0, "empty expression; write a formula such as x + 1 or x == heavy");
    }
    std::optional<Typed> result = Ternary();
    if (!result) return std::nullopt;
    const Token& t = Peek();
    switch (t.kind) {
      case TokenKind::kEnd: return result;
      case TokenKind::kCloseParen: return Fail(t.offset, "unmatched ')'");
      case TokenKind::kComma:
        return Fail(t.offset, "',' outside a function's argument list");
      case TokenKind::kColon: return Fail(t.offset, "':' without a matching '?'");
      default:
        return Fail(t.offset, absl::StrCat("expected an operator before '", t.text, "'"));
    }
  }

  const ExpressionError& error() const { return error_; }
  const std::vector<bool>& used_variables() const { return used_variables_; }
  const std::vector<bool>& used_symbols() const { return used_symbols_; }

 private:
  const Token& Peek() const { return tokens_[pos_]; }
  const Token& Next() { return tokens_[pos_++]; }
  bool PeekOperator(const char* op) const {
    return Peek().kind == TokenKind::kOperator && Peek().text == op;
  }

  std::nullopt_t Fail(int offset, std::string message) {
    error_ = {offset, std::move(message)};
    return std::nullopt;
  }
  std::nullopt_t SymbolMisuse(const Typed& t, const std::string& how) {
    return Fail(t.symbol_offset, absl::StrCat(t.symbol_label, " ", how, "; ", kSymbolRule));
  }

  // ternary := or ( '?' ternary ':' ternary )?
  std::optional<Typed> Ternary() {
    if (++depth_ > kMaxNesting) {
      return Fail(Peek().offset, absl::StrCat("expression nested more than ", kMaxNesting,
                                              " levels deep"));
    }
    std::optional<Typed> cond = Or();
    if (!cond) return std::nullopt;
    if (Peek().kind != TokenKind::kQuestion) {
      --depth_;
      return cond;
    }
    const int question = Next().offset;
    if (cond->type == ValueType::kSymbol) {
      return SymbolMisuse(*cond, "used as the condition of '?:' (a condition is a number, "
                                 "e.g. a comparison such as shape == heavy)");
    }
    std::optional<Typed> then_branch = Ternary();
    if (!then_branch) return std::nullopt;
    if (Peek().kind != TokenKind::kColon) {
      return Fail(Peek().offset,
                  absl::StrCat("the '?' at offset ", question, " needs a ':' and an else branch",
                               Peek().kind == TokenKind::kEnd
                                   ? ""
                                   : absl::StrCat("; found '", Peek().text, "'")));
    }
    Next();
    std::optional<Typed> else_branch = Ternary();
    if (!else_branch) return std::nullopt;
    if (then_branch->type != else_branch->type) {
      const Typed& symbolic =
          then_branch->type == ValueType::kSymbol ? *then_branch : *else_branch;
      return Fail(symbolic.symbol_offset,
                  absl::StrCat("the branches of the '?' at offset ", question,
                               " differ in type: ", symbolic.symbol_label,
                               " is symbolic but the other branch is a number; both branches "
                               "must be symbols or both numbers"));
    }
    --depth_;
    return then_branch;
  }

  // Shared loop for the left-associative binary levels.
  template <typename Operand>
  std::optional<Typed> BinaryLevel(const std::vector<const char*>& ops, Operand operand,
                                   bool comparison) {
    std::optional<Typed> left = (this->*operand)();
    if (!left) return std::nullopt;
    while (true) {
      const char* op = nullptr;
      for (const char* candidate : ops) {
        if (PeekOperator(candidate)) op = candidate;
      }
      if (op == nullptr) return left;
      const int op_offset = Next().offset;
      std::optional<Typed> right = (this->*operand)();
      if (!right) return std::nullopt;
      const std::string op_text(op);
      if (comparison && (op_text == "==" || op_text == "!=")) {
        if (left->type != right->type) {
          const Typed& symbolic = left->type == ValueType::kSymbol ? *left : *right;
          return Fail(symbolic.symbol_offset,
                      absl::StrCat("'", op_text, "' at offset ", op_offset, " compares ",
                                   symbolic.symbol_label,
                                   " with a number; both sides must be symbols or both "
                                   "numbers"));
        }
      } else {
        for (const Typed* side : {&*left, &*right}) {
          if (side->type != ValueType::kSymbol) continue;
          if (comparison) {
            return SymbolMisuse(*side, absl::StrCat("cannot be ordered with '", op_text, "'"));
          }
          if (op_text == "&&" || op_text == "||") {
            return SymbolMisuse(*side, absl::StrCat("used as an operand of '", op_text, "'"));
          }
          return SymbolMisuse(*side, absl::StrCat("used in arithmetic ('", op_text, "')"));
        }
      }
      left = Typed{};  // every binary operator yields a number
    }
  }

  std::optional<Typed> Or() { return BinaryLevel({"||"}, &Checker::And, false); }
  std::optional<Typed> And() { return BinaryLevel({"&&"}, &Checker::Compare, false); }
  std::optional<Typed> Compare() {
    return BinaryLevel({"<", "<=", ">", ">=", "==", "!="}, &Checker::Sum, true);
  }
  std::optional<Typed> Sum() { return BinaryLevel({"+", "-"}, &Checker::Product, false); }
  std::optional<Typed> Product() {
    return BinaryLevel({"*", "/", "%"}, &Checker::Prefix, false);
  }

  // prefix := ('-' | '!') primary | primary      (muParser refuses two prefixes in a row)
  std::optional<Typed> Prefix() {
    if (!PeekOperator("-") && !PeekOperator("!")) return Primary();
    const Token op = Next();
    if (PeekOperator("-") || PeekOperator("!")) {
      return Fail(Peek().offset,
                  absl::StrCat("two prefix operators in a row; put the operand of '", op.text,
                               "' in parentheses, e.g. ", op.text, "(", Peek().text, "x)"));
    }
    std::optional<Typed> operand = Primary();
    if (!operand) return std::nullopt;
    if (operand->type == ValueType::kSymbol) {
      return SymbolMisuse(*operand, op.text == "-"
                                        ? std::string("used in arithmetic (prefix '-')")
                                        : std::string("used as an operand of '!'"));
    }
    return Typed{};
  }

  // primary := number | name | function '(' args ')' | '(' ternary ')'
  std::optional<Typed> Primary() {
    const Token& t = Peek();
    switch (t.kind) {
      case TokenKind::kNumber:
        Next();
        return Typed{};
      case TokenKind::kName:
        return Name();
      case TokenKind::kOpenParen: {
        const int open = Next().offset;
        std::optional<Typed> inner = Ternary();
        if (!inner) return std::nullopt;
        if (Peek().kind != TokenKind::kCloseParen) {
          return Fail(Peek().offset,
                      absl::StrCat("missing ')' for the '(' at offset ", open,
                                   Peek().kind == TokenKind::kEnd
                                       ? ""
                                       : absl::StrCat("; found '", Peek().text, "'")));
        }
        Next();
        return inner;
      }
      case TokenKind::kEnd:
        return Fail(t.offset, "the expression ends where an operand (a number, a name or '(') "
                              "is expected");
      default:
        return Fail(t.offset, absl::StrCat("expected an operand (a number, a name or '(') but "
                                           "found '", t.text, "'"));
    }
  }

  std::optional<Typed> Name() {
    const Token name = Next();
    const bool called = Peek().kind == TokenKind::kOpenParen;
    if (IsFunctionName(name.text)) {
      if (!called) {
        return Fail(name.offset, absl::StrCat("'", name.text, "' is a function; call it with "
                                              "arguments in parentheses, e.g. ",
                                              name.text == "abs" ? "abs(x)" : name.text + "(a, b)"));
      }
      return Call(name);
    }
    const int variable = FindVariable(name.text);
    const int symbol = variable < 0 ? FindSymbol(name.text) : -1;
    const bool known = variable >= 0 || symbol >= 0 || name.text == "true" ||
                       name.text == "false";
    if (called) {
      if (known) {
        return Fail(name.offset, absl::StrCat("'", name.text, "' is not a function; functions: ",
                                              kFunctionList));
      }
      return Fail(name.offset, absl::StrCat("unknown function '", name.text,
                                            "'; available functions: ", kFunctionList,
                                            "; operators: ", kOperatorList));
    }
    if (variable >= 0) {
      used_variables_[variable] = true;
      const ExpressionVariable& v = context_.variables[variable];
      if (v.type == ValueType::kNumber) return Typed{};
      return Typed{ValueType::kSymbol, name.offset,
                   absl::StrCat("symbolic variable '", name.text, "'")};
    }
    if (symbol >= 0) {
      used_symbols_[symbol] = true;
      return Typed{ValueType::kSymbol, name.offset, absl::StrCat("symbol '", name.text, "'")};
    }
    if (known) return Typed{};  // true / false
    return Fail(name.offset, absl::StrCat("unknown name '", name.text, "'", Suggest(name.text)));
  }

  std::optional<Typed> Call(const Token& name) {
    Next();  // '('
    int count = 0;
    if (Peek().kind == TokenKind::kCloseParen) {
      return Fail(name.offset, absl::StrCat("'", name.text, "' needs ",
                                            name.text == "abs" ? "1 argument" :
                                            name.text == "mod" ? "2 arguments" :
                                            "at least 1 argument"));
    }
    while (true) {
      std::optional<Typed> arg = Ternary();
      if (!arg) return std::nullopt;
      if (arg->type == ValueType::kSymbol) {
        return SymbolMisuse(*arg, absl::StrCat("used as an argument of '", name.text, "'"));
      }
      ++count;
      if (Peek().kind == TokenKind::kComma) {
        Next();
        continue;
      }
      if (Peek().kind == TokenKind::kCloseParen) {
        Next();
        break;
      }
      return Fail(Peek().offset,
                  absl::StrCat("expected ',' or ')' in the arguments of '", name.text, "'",
                               Peek().kind == TokenKind::kEnd
                                   ? ""
                                   : absl::StrCat(" but found '", Peek().text, "'")));
    }
    const int wanted = name.text == "abs" ? 1 : name.text == "mod" ? 2 : -1;
    if (wanted > 0 && count != wanted) {
      return Fail(name.offset, absl::StrCat("'", name.text, "' takes ", wanted,
                                            wanted == 1 ? " argument" : " arguments", ", got ",
                                            count));
    }
    return Typed{};
  }

  int FindVariable(const std::string& s) const {
    for (size_t i = 0; i < context_.variables.size(); ++i) {
      if (context_.variables[i].name == s) return static_cast<int>(i);
    }
    return -1;
  }
  int FindSymbol(const std::string& s) const {
    for (size_t i = 0; i < context_.symbols.size(); ++i) {
      if (context_.symbols[i] == s) return static_cast<int>(i);
    }
    return -1;
  }

  // " (did you mean 'x'?)" for the nearest valid name when it is close, else "".
  std::string Suggest(const std::string& wrong) const {
    std::vector<std::string> candidates;
    for (const ExpressionVariable& v : context_.variables) candidates.push_back(v.name);
    for (const std::string& s : context_.symbols) candidates.push_back(s);
    candidates.push_back("true");
    candidates.push_back("false");
    const int allowed = wrong.size() <= 3 ? 1 : 2;
    int best = allowed + 1;
    std::string best_name;
    for (const std::string& c : candidates) {
      const int d = EditDistance(wrong, c);
      if (d < best && d < static_cast<int>(c.size())) {
        best = d;
        best_name = c;
      }
    }
    if (best_name.empty()) return "";
    return absl::StrCat(" (did you mean '", best_name, "'?)");
  }

  const std::vector<Token>& tokens_;
  const ExpressionContext& context_;
  size_t pos_ = 0;
  int depth_ = 0;
  ExpressionError error_;
  std::vector<bool> used_variables_ = std::vector<bool>(context_.variables.size(), false);
  std::vector<bool> used_symbols_ = std::vector<bool>(context_.symbols.size(), false);
};

// Checks the context's own promise (distinct names, none reserved).
std::optional<std::string> CheckContext(const ExpressionContext& context) {
  std::vector<std::string> names;
  for (const ExpressionVariable& v : context.variables) names.push_back(v.name);
  for (const std::string& s : context.symbols) names.push_back(s);
  std::vector<std::string> sorted = names;
  std::sort(sorted.begin(), sorted.end());
  for (size_t i = 0; i + 1 < sorted.size(); ++i) {
    if (sorted[i] == sorted[i + 1]) {
      return absl::StrCat("the name '", sorted[i], "' is defined twice among variables and "
                          "symbols");
    }
  }
  for (const std::string& n : names) {
    if (IsFunctionName(n) || n == "true" || n == "false") {
      return absl::StrCat("'", n, "' is reserved and cannot name a variable or symbol");
    }
    if (n.empty() || !IsNameStart(n[0]) ||
        !std::all_of(n.begin(), n.end(), [](char c) { return IsNameChar(c); })) {
      return absl::StrCat("'", n, "' cannot be used in expressions: names are letters, digits "
                          "and '_', not starting with a digit");
    }
  }
  return std::nullopt;
}

absl::Status Refuse(ExpressionError e, ExpressionError* out) {
  absl::Status status = absl::InvalidArgumentError(e.message);
  if (out != nullptr) *out = std::move(e);
  return status;
}

}  // namespace

struct CompiledExpression::Impl {
  std::string text;
  std::vector<int> parents;
  std::vector<std::string> parent_names;
  std::vector<ValueType> parent_types;
  ValueType result_type = ValueType::kNumber;
  int num_symbols = 0;
  std::vector<std::string> symbols;
  // One slot per parent; muParser holds pointers into it, so it is sized once and never grows.
  std::vector<double> slots;
  mu::Parser parser;
};

CompiledExpression::CompiledExpression(std::unique_ptr<Impl> impl) : impl_(std::move(impl)) {}
CompiledExpression::~CompiledExpression() = default;

absl::StatusOr<std::unique_ptr<CompiledExpression>> CompiledExpression::Create(
    const std::string& text, const ExpressionContext& context, ExpressionError* error) {
  if (std::optional<std::string> bad = CheckContext(context)) {
    return Refuse({0, *bad}, error);
  }
  if (text.size() > static_cast<size_t>(kMaxExpressionLength)) {
    return Refuse({kMaxExpressionLength, absl::StrCat("expression longer than ",
                                                      kMaxExpressionLength, " characters")},
                  error);
  }
  std::vector<Token> tokens;
  ExpressionError tokenize_error;
  if (!Tokenize(text, &tokens, &tokenize_error)) return Refuse(tokenize_error, error);
  Checker checker(tokens, context);
  std::optional<Typed> typed = checker.Run();
  if (!typed) return Refuse(checker.error(), error);

  auto impl = std::make_unique<Impl>();
  impl->text = text;
  impl->result_type = typed->type;
  impl->num_symbols = static_cast<int>(context.symbols.size());
  impl->symbols = context.symbols;
  for (size_t i = 0; i < context.variables.size(); ++i) {
    if (!checker.used_variables()[i]) continue;
    impl->parents.push_back(static_cast<int>(i));
    impl->parent_names.push_back(context.variables[i].name);
    impl->parent_types.push_back(context.variables[i].type);
  }
  impl->slots.assign(impl->parents.size(), 0.0);
  try {
    ConfigureLanguage(impl->parser);
    for (size_t i = 0; i < impl->parents.size(); ++i) {
      impl->parser.DefineVar(impl->parent_names[i], &impl->slots[i]);
    }
    for (size_t s = 0; s < context.symbols.size(); ++s) {
      if (checker.used_symbols()[s]) {
        impl->parser.DefineConst(context.symbols[s], static_cast<double>(s));
      }
    }
    impl->parser.SetExpr(text);
    impl->parser.Eval();  // compiles now, so syntax problems surface here and not later
    CurrentFault() = Fault::kNone;  // a zero divisor at the all-zero trial inputs means nothing
  } catch (const mu::Parser::exception_type& e) {
    // Our checker accepted what muParser refused: report muParser's finding and position.
    return Refuse({std::max(0, e.GetPos()), absl::StrCat("syntax error: ", e.GetMsg())}, error);
  }
  return std::unique_ptr<CompiledExpression>(new CompiledExpression(std::move(impl)));
}

const std::vector<int>& CompiledExpression::parents() const { return impl_->parents; }

ValueType CompiledExpression::result_type() const { return impl_->result_type; }

absl::StatusOr<Value> CompiledExpression::Evaluate(const std::vector<Value>& parent_values) const {
  Impl& impl = *impl_;
  if (parent_values.size() != impl.parents.size()) {
    return absl::InvalidArgumentError(
        absl::StrCat("'", impl.text, "' needs ", impl.parents.size(), " parent values (",
                     absl::StrJoin(impl.parent_names, ", "), "), got ", parent_values.size()));
  }
  std::vector<std::string> shown;
  for (size_t i = 0; i < parent_values.size(); ++i) {
    const Value& v = parent_values[i];
    const std::string& name = impl.parent_names[i];
    if (v.type != impl.parent_types[i]) {
      return absl::InvalidArgumentError(absl::StrCat(
          "value for '", name, "' must be ",
          impl.parent_types[i] == ValueType::kSymbol ? "a symbol" : "a number"));
    }
    if (v.type == ValueType::kSymbol) {
      if (v.symbol < 0 || v.symbol >= impl.num_symbols) {
        return absl::InvalidArgumentError(absl::StrCat("value for '", name, "' is symbol index ",
                                                       v.symbol, ", outside 0..",
                                                       impl.num_symbols - 1));
      }
      impl.slots[i] = static_cast<double>(v.symbol);
      shown.push_back(absl::StrCat(name, "=", impl.symbols[v.symbol]));
    } else {
      if (!std::isfinite(v.number)) {
        return absl::InvalidArgumentError(
            absl::StrCat("value for '", name, "' is not a finite number"));
      }
      impl.slots[i] = v.number;
      shown.push_back(absl::StrCat(name, "=", v.number));
    }
  }
  const auto where = [&]() {
    return absl::StrCat(" evaluating '", impl.text, "'",
                        shown.empty() ? "" : absl::StrCat(" with ", absl::StrJoin(shown, ", ")));
  };
  CurrentFault() = Fault::kNone;
  double result = 0;
  try {
    result = impl.parser.Eval();
  } catch (const mu::Parser::exception_type& e) {
    return absl::InternalError(absl::StrCat("evaluator failed", where(), ": ", e.GetMsg()));
  }
  const Fault fault = CurrentFault();
  CurrentFault() = Fault::kNone;
  if (fault == Fault::kDivisionByZero) {
    return absl::InvalidArgumentError(absl::StrCat("division by zero", where()));
  }
  if (fault == Fault::kModuloByZero) {
    return absl::InvalidArgumentError(absl::StrCat("modulo by zero", where()));
  }
  if (impl.result_type == ValueType::kSymbol) {
    const int index = static_cast<int>(result);
    if (result != index || index < 0 || index >= impl.num_symbols) {
      return absl::InternalError(absl::StrCat("symbolic result ", result, " is not a symbol",
                                              where()));
    }
    return Value::Symbol(index);
  }
  if (!std::isfinite(result)) {
    return absl::InvalidArgumentError(absl::StrCat("result is not a finite number", where()));
  }
  return Value::Number(result);
}

}  // namespace graft::causal
