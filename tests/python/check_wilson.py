#!/usr/bin/python3
"""Reference check of graft's 95% Wilson score intervals.

Usage: /usr/bin/python3 check_wilson.py FILE

FILE has one case per line, whitespace-separated:  k n lo hi
where k successes out of n trials gave graft's interval [lo, hi] (printed with 17 significant
digits). Blank lines and lines starting with '#' are ignored.

Reference: statsmodels' Wilson interval,
  statsmodels.stats.proportion.proportion_confint(k, n, alpha=0.05, method="wilson"),
which implements the score interval of E. B. Wilson, "Probable inference, the law of
succession, and statistical inference", JASA 22 (1927) 209-212 (citation from memory).
Both bounds must agree within 1e-12 absolute.

Exit codes: 0 all intervals agree, 1 any disagreement (each one is printed),
2 malformed file or missing Python module.
"""

import math
import sys

TOLERANCE = 1e-12


def fail_import(name, error):
    print(f"check_wilson: cannot import {name} ({error}); install Debian's python3-statsmodels "
          f"and run this script with /usr/bin/python3", file=sys.stderr)
    sys.exit(2)


try:
    from statsmodels.stats.proportion import proportion_confint
except ImportError as e:  # a missing module is a failure, never a skip
    fail_import("statsmodels", e)


class Malformed(Exception):
    pass


def parse(path):
    cases = []
    with open(path, encoding="utf-8") as f:
        for number, line in enumerate(f, start=1):
            text = line.strip()
            if not text or text.startswith("#"):
                continue
            fields = text.split()
            if len(fields) != 4:
                raise Malformed(f"{path}:{number}: expected 'k n lo hi', got {len(fields)} fields")
            try:
                k, n = int(fields[0]), int(fields[1])
                lo, hi = float(fields[2]), float(fields[3])
            except ValueError as e:
                raise Malformed(f"{path}:{number}: {e}") from None
            if n <= 0 or k < 0 or k > n:
                raise Malformed(f"{path}:{number}: need 0 <= k <= n and n > 0, got k={k} n={n}")
            if not (math.isfinite(lo) and math.isfinite(hi)):
                raise Malformed(f"{path}:{number}: bounds must be finite, got {fields[2]} {fields[3]}")
            cases.append((number, k, n, lo, hi))
    if not cases:
        raise Malformed(f"{path}: no cases")
    return cases


def main(argv):
    if len(argv) != 2:
        print("usage: check_wilson.py FILE", file=sys.stderr)
        return 2
    try:
        cases = parse(argv[1])
    except OSError as e:
        print(f"check_wilson: {e}", file=sys.stderr)
        return 2
    except Malformed as e:
        print(f"check_wilson: malformed: {e}", file=sys.stderr)
        return 2

    mismatches = 0
    worst = 0.0
    for number, k, n, lo, hi in cases:
        lo_ref, hi_ref = proportion_confint(k, n, alpha=0.05, method="wilson")
        lo_ref, hi_ref = float(lo_ref), float(hi_ref)
        d_lo, d_hi = abs(lo - lo_ref), abs(hi - hi_ref)
        worst = max(worst, d_lo, d_hi)
        if not (d_lo <= TOLERANCE and d_hi <= TOLERANCE):
            mismatches += 1
            print(f"line {number}: k={k} n={n}: graft [{lo!r}, {hi!r}] vs statsmodels "
                  f"[{lo_ref!r}, {hi_ref!r}] (|diff| lo {d_lo:.3g}, hi {d_hi:.3g})")
    print(f"{mismatches} mismatches; max |diff| {worst:.3g}")
    print(f"checked {len(cases)} intervals")
    return 0 if mismatches == 0 else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv))
