#!/usr/bin/python3
"""Exact binomial tests of counts made by graft, against SciPy.

Usage: /usr/bin/python3 check_binomial.py FILE ALPHA

FILE has one line per count: "NAME K N P" (NAME without spaces): K successes out of N trials
that should each succeed with probability P. Each line is checked with SciPy's exact two-sided
binomial test, scipy.stats.binomtest(K, N, P).pvalue, and passes when the p-value is at least
ALPHA. The counts come from fixed seeds, so the answer is the same on every run; ALPHA says how
unlucky a correct hash would have to be to fail, while a biased one over a million trials gives
p-values far below it.

Prints "NAME K N P pvalue" per line and "checked M counts at level ALPHA". Exit codes: 0 every
line passes, 1 any line fails, 2 malformed input or a missing module (never a skip).
"""

import sys


def main():
    if len(sys.argv) != 3:
        print(__doc__, file=sys.stderr)
        return 2
    try:
        from scipy import stats
    except ImportError as e:
        print(f"check_binomial.py: cannot import scipy ({e}); install Debian's python3-scipy", file=sys.stderr)
        return 2
    alpha = float(sys.argv[2])
    rows = []
    with open(sys.argv[1], encoding="utf-8") as f:
        for number, line in enumerate(f, 1):
            if not line.strip():
                continue
            parts = line.split()
            if len(parts) != 4:
                print(f"{sys.argv[1]}:{number}: expected NAME K N P, got {line.strip()!r}", file=sys.stderr)
                return 2
            name, k, n, p = parts[0], int(parts[1]), int(parts[2]), float(parts[3])
            if not (0 <= k <= n and n > 0 and 0 < p < 1):
                print(f"{sys.argv[1]}:{number}: out of range: {line.strip()!r}", file=sys.stderr)
                return 2
            rows.append((name, k, n, p))
    if not rows:
        print(f"{sys.argv[1]}: no counts", file=sys.stderr)
        return 2
    failed = 0
    for name, k, n, p in rows:
        pvalue = stats.binomtest(k, n, p).pvalue
        verdict = "ok" if pvalue >= alpha else "REJECTED"
        print(f"{name} {k} {n} {p} {pvalue:.6g} {verdict}")
        if pvalue < alpha:
            failed += 1
    print(f"checked {len(rows)} counts at level {alpha}")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
