#!/usr/bin/python3
"""Reference evaluator for graft's mechanism expression language.

Usage: /usr/bin/python3 check_expressions.py CASES_FILE

CASES_FILE is JSON lines. The first line describes the context:
  {"symbols": ["north", ...], "variables": {"x": "number", "lane": "symbol", ...}}
Every further line is one evaluation done by graft (C++, muParser):
  {"expr": "x % 3 - (lane == north)", "inputs": {"x": -7, "lane": "south"},
   "result": {"number": 2.0}}            or {"symbol": "north"} or {"error": "modulo by zero ..."}

Each expression is parsed here independently, following the grammar documented at the top of
trainer/causal/expression.cc (precedence from lowest: ?:, ||, &&, comparisons, + -, * / %,
prefix - !; binary operators left-associative, ?: right-associative), and translated to a fully
parenthesised Python expression, which Python evaluates with its own arithmetic:
  &&  -> and, || -> or, ! -> not (results as int 0/1; both operands of && and || are evaluated,
         as in graft), c ? a : b -> (a if c else b), mod(a, b) -> (a % b),
  comparisons -> int(a < b), true / false -> 1 / 0, min / max / abs -> Python's built-ins (min((a, b)) etc.),
  symbols -> Python strings (equal only to the same name).
Floored modulo is Python's `%` (Python language reference, 6.7 Binary arithmetic operations:
"The modulo operator always yields a result with the same sign as its second operand"; section
and quotation from memory).
A zero divisor must raise ZeroDivisionError in Python exactly where graft reports an error.

Prints a summary and exits 0 when every case agrees within 1e-9, 1 on any disagreement,
2 on a malformed file.
"""

import json
import math
import sys

TOLERANCE = 1e-9
FUNCTIONS = {"min", "max", "abs", "mod"}
TWO_CHAR = ("<=", ">=", "==", "!=", "&&", "||")
ONE_CHAR = "+-*/%<>!(),?:"


class Malformed(Exception):
    pass


def tokenize(text):
    tokens = []
    i = 0
    while i < len(text):
        c = text[i]
        if c.isspace():
            i += 1
        elif c.isdigit() or (c == "." and i + 1 < len(text) and text[i + 1].isdigit()):
            j = i
            while j < len(text) and (text[j].isdigit() or text[j] == "."):
                j += 1
            tokens.append(("num", text[i:j]))
            i = j
        elif c.isalpha() or c == "_":
            j = i
            while j < len(text) and (text[j].isalnum() or text[j] == "_"):
                j += 1
            tokens.append(("name", text[i:j]))
            i = j
        elif text[i:i + 2] in TWO_CHAR:
            tokens.append(("op", text[i:i + 2]))
            i += 2
        elif c in ONE_CHAR:
            tokens.append(("op", c))
            i += 1
        else:
            raise Malformed("unexpected character %r in %r" % (c, text))
    tokens.append(("end", ""))
    return tokens


class Translator:
    """Recursive descent over the documented grammar, emitting Python source."""

    def __init__(self, text, variables, symbols):
        self.tokens = tokenize(text)
        self.pos = 0
        self.variables = variables
        self.symbols = symbols
        self.text = text

    def peek(self):
        return self.tokens[self.pos]

    def take(self, value=None):
        tok = self.tokens[self.pos]
        if value is not None and tok[1] != value:
            raise Malformed("expected %r at token %d of %r, found %r"
                            % (value, self.pos, self.text, tok[1]))
        self.pos += 1
        return tok

    def is_op(self, *ops):
        kind, value = self.peek()
        return kind == "op" and value in ops

    def translate(self):
        out = self.ternary()
        if self.peek()[0] != "end":
            raise Malformed("trailing tokens in %r" % self.text)
        return out

    def ternary(self):
        cond = self.logical_or()
        if not self.is_op("?"):
            return cond
        self.take("?")
        then_branch = self.ternary()
        self.take(":")
        else_branch = self.ternary()
        return "(%s if %s else %s)" % (then_branch, cond, else_branch)

    def logical_or(self):
        left = self.logical_and()
        while self.is_op("||"):
            self.take()
            right = self.logical_and()
            left = "_or(%s, %s)" % (left, right)
        return left

    def logical_and(self):
        left = self.compare()
        while self.is_op("&&"):
            self.take()
            right = self.compare()
            left = "_and(%s, %s)" % (left, right)
        return left

    def compare(self):
        left = self.additive()
        while self.is_op("<", "<=", ">", ">=", "==", "!="):
            op = self.take()[1]
            right = self.additive()
            left = "int((%s) %s (%s))" % (left, op, right)
        return left

    def additive(self):
        left = self.multiplicative()
        while self.is_op("+", "-"):
            op = self.take()[1]
            right = self.multiplicative()
            left = "((%s) %s (%s))" % (left, op, right)
        return left

    def multiplicative(self):
        left = self.prefix()
        while self.is_op("*", "/", "%"):
            op = self.take()[1]
            right = self.prefix()
            left = "((%s) %s (%s))" % (left, op, right)
        return left

    def prefix(self):
        if self.is_op("-"):
            self.take()
            return "(-(%s))" % self.primary()
        if self.is_op("!"):
            self.take()
            return "int(not (%s))" % self.primary()
        return self.primary()

    def primary(self):
        kind, value = self.take()
        if kind == "num":
            return "float(%r)" % value
        if kind == "op" and value == "(":
            inner = self.ternary()
            self.take(")")
            return "(%s)" % inner
        if kind != "name":
            raise Malformed("unexpected token %r in %r" % (value, self.text))
        if value in FUNCTIONS:
            self.take("(")
            args = [self.ternary()]
            while self.is_op(","):
                self.take()
                args.append(self.ternary())
            self.take(")")
            if value == "mod":
                if len(args) != 2:
                    raise Malformed("mod needs 2 arguments in %r" % self.text)
                return "((%s) %% (%s))" % (args[0], args[1])
            if value == "abs":
                if len(args) != 1:
                    raise Malformed("abs needs 1 argument in %r" % self.text)
                return "abs(%s)" % args[0]
            # Python's min(x) with one argument wants an iterable, so pass a tuple.
            return "%s((%s,))" % (value, ", ".join(args))
        if value == "true":
            return "1"
        if value == "false":
            return "0"
        if value in self.variables:
            return "V[%r]" % value
        if value in self.symbols:
            return repr(value)
        raise Malformed("unknown name %r in %r" % (value, self.text))


def _and(a, b):
    return int(bool(a) and bool(b))


def _or(a, b):
    return int(bool(a) or bool(b))


def main(argv):
    if len(argv) != 2:
        print("usage: check_expressions.py CASES_FILE", file=sys.stderr)
        return 2
    try:
        with open(argv[1], encoding="utf-8") as f:
            lines = [line for line in f.read().splitlines() if line.strip()]
        header = json.loads(lines[0])
        symbols = set(header["symbols"])
        variables = header["variables"]
        cases = [json.loads(line) for line in lines[1:]]
    except (OSError, IndexError, KeyError, ValueError) as e:
        print("malformed cases file %s: %s" % (argv[1], e), file=sys.stderr)
        return 2
    if not cases:
        print("no cases in %s" % argv[1], file=sys.stderr)
        return 2

    env_builtins = {"min": min, "max": max, "abs": abs, "int": int, "float": float,
                    "_and": _and, "_or": _or}
    counts = {"number": 0, "symbol": 0, "error": 0}
    mismatches = []
    compiled = {}
    for n, case in enumerate(cases, start=2):
        try:
            text = case["expr"]
            if text not in compiled:
                source = Translator(text, variables, symbols).translate()
                compiled[text] = (source, compile(source, "<expr>", "eval"))
            source, code = compiled[text]
            V = {}
            for name, value in case["inputs"].items():
                if variables.get(name) == "symbol":
                    if value not in symbols:
                        raise Malformed("input %s=%r is not a symbol" % (name, value))
                    V[name] = value
                else:
                    V[name] = float(value)
            expected = case["result"]
        except (KeyError, TypeError, ValueError, Malformed, SyntaxError) as e:
            print("line %d: malformed case: %s" % (n, e), file=sys.stderr)
            return 2
        try:
            got = eval(code, {"__builtins__": env_builtins}, {"V": V})
            raised = None
        except ZeroDivisionError as e:
            got = None
            raised = str(e)
        except Exception as e:  # any other failure is a disagreement, never a skip
            mismatches.append("line %d: %s  [python: %s]: python failed: %r"
                              % (n, text, source, e))
            continue
        where = "line %d: %s  [python: %s]  inputs %s" % (n, text, source, case["inputs"])
        if "error" in expected:
            counts["error"] += 1
            if raised is None:
                mismatches.append("%s: graft reported %r, python gave %r"
                                  % (where, expected["error"], got))
            elif ("modulo" in raised) != ("modulo" in expected["error"]):
                mismatches.append("%s: graft reported %r, python raised %r"
                                  % (where, expected["error"], raised))
        elif raised is not None:
            mismatches.append("%s: graft gave %r, python raised ZeroDivisionError(%r)"
                              % (where, expected, raised))
        elif "symbol" in expected:
            counts["symbol"] += 1
            if got != expected["symbol"]:
                mismatches.append("%s: graft gave symbol %r, python gave %r"
                                  % (where, expected["symbol"], got))
        elif "number" in expected:
            counts["number"] += 1
            want = float(expected["number"])
            if (isinstance(got, str) or not math.isfinite(float(got))
                    or abs(float(got) - want) > TOLERANCE * max(1.0, abs(want))):
                mismatches.append("%s: graft gave %r, python gave %r" % (where, want, got))
        else:
            print("line %d: malformed result %r" % (n, expected), file=sys.stderr)
            return 2

    print("checked %d cases (%d numbers, %d symbols, %d zero divisors) over %d expressions"
          % (len(cases), counts["number"], counts["symbol"], counts["error"], len(compiled)))
    if mismatches:
        print("%d disagreements; first ones:" % len(mismatches))
        for m in mismatches[:25]:
            print("  " + m)
        return 1
    print("all agree")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
