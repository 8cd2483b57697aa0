#!/usr/bin/python3
"""Checks Student-t quantiles computed by graft against SciPy's scipy.stats.t.ppf.

usage: check_t_quantile.py FILE
FILE has lines "p df q": graft's q = t_p(df). Two checks per line:
- q matches scipy.stats.t.ppf(p, df) within a relative 1e-8. (Debian's SciPy's ppf itself is only
  good to about 1e-9 here: scipy.stats.t.cdf of its own ppf(0.9, 30) gives 0.8999999995.)
- scipy.stats.t.cdf(q, df) gives back p within 1e-12, the tighter check of the two.
Prints the worst differences; exits 1 on any mismatch or missing module.
"""
import sys

from scipy import stats  # Debian: python3-scipy


def main():
    worst = 0.0
    worst_cdf = 0.0
    bad = []
    n = 0
    with open(sys.argv[1]) as f:
        for line in f:
            if not line.strip():
                continue
            p, df, q = (float(x) for x in line.split())
            ref = float(stats.t.ppf(p, df))
            rel = abs(q - ref) / max(1.0, abs(ref))
            back = abs(float(stats.t.cdf(q, df)) - p)
            worst = max(worst, rel)
            worst_cdf = max(worst_cdf, back)
            n += 1
            if rel > 1e-8 or back > 1e-12:
                bad.append(f"p={p} df={df}: graft {q!r}, scipy ppf {ref!r}, |cdf(graft) - p| {back:.3g}")
    print(f"{n} quantiles, worst relative difference to ppf {worst:.3g}, worst |cdf(q) - p| {worst_cdf:.3g}")
    for b in bad:
        print("MISMATCH " + b)
    return 1 if bad or n == 0 else 0


if __name__ == "__main__":
    sys.exit(main())
