#!/usr/bin/python3
"""Goodness-of-fit checks of random draws made by graft, against SciPy's distributions.

Usage: /usr/bin/python3 check_draws.py DRAWS_JSON

DRAWS_JSON is {"alpha": A, "draws": [{"name": N, "kind": K, "low": L, "high": H,
"values": [...]}, ...]}, one entry per drawn quantity, where K is one of
  log_uniform    density proportional to 1/x on [L, H] (L > 0): scipy.stats.loguniform(L, H);
  uniform        constant density on [L, H]: scipy.stats.uniform(loc=L, scale=H - L);
  whole_uniform  each whole number L, L+1, ..., H (both ends included) equally likely.

Checks, per entry:
  - every value lies inside [L, H] (whole_uniform: is a whole number there);
  - continuous kinds: the one-sample Kolmogorov-Smirnov test, scipy.stats.kstest(values,
    dist.cdf), does not reject at level A (p >= A);
  - whole_uniform: Pearson's chi-square test of the counts of every value L..H against equal
    expected counts, scipy.stats.chisquare, does not reject at level A. Every expected count
    must be at least 5, the usual condition for the chi-square approximation (common practice),
    else the file is refused as malformed.

The draws come from a fixed seed, so a check gives the same answer on every run; A says how
unlucky a correct generator with some other seed would have to be to fail (with A = 0.001, one
seed in a thousand per entry), while a wrong distribution over thousands of draws gives p far
below any such level.

Exit codes: 0 every entry fits, 1 any entry does not (each is printed), 2 malformed input or a
missing module (never a skip).
"""

import json
import sys


class Malformed(Exception):
    pass


def load(path):
    with open(path, encoding="utf-8") as f:
        doc = json.load(f)
    if not isinstance(doc, dict) or not isinstance(doc.get("draws"), list) or not doc["draws"]:
        raise Malformed(f"{path}: expected {{\"alpha\": A, \"draws\": [...]}} with at least one entry")
    alpha = doc.get("alpha")
    if not isinstance(alpha, (int, float)) or not 0 < alpha < 0.5:
        raise Malformed(f"{path}: alpha must be a number in (0, 0.5), got {alpha!r}")
    for i, d in enumerate(doc["draws"]):
        for key in ("name", "kind", "low", "high", "values"):
            if key not in d:
                raise Malformed(f"{path}: draws[{i}] has no {key!r}")
        if d["kind"] not in ("log_uniform", "uniform", "whole_uniform"):
            raise Malformed(f"{path}: draws[{i}] ({d['name']}): unknown kind {d['kind']!r}")
        if not (isinstance(d["values"], list) and d["values"]):
            raise Malformed(f"{path}: draws[{i}] ({d['name']}): no values")
        if not d["low"] < d["high"] or (d["kind"] == "log_uniform" and d["low"] <= 0):
            raise Malformed(f"{path}: draws[{i}] ({d['name']}): bounds [{d['low']}, {d['high']}] do not fit {d['kind']}")
    return float(alpha), doc["draws"]


def check(entry, alpha, np, stats):
    """Returns a list of failure messages for one entry; prints its statistics."""
    name, kind, low, high = entry["name"], entry["kind"], entry["low"], entry["high"]
    values = np.asarray(entry["values"], dtype=np.float64)
    n = len(values)
    failures = []
    outside = values[(values < low) | (values > high) | ~np.isfinite(values)]
    if len(outside):
        failures.append(f"{name}: {len(outside)} of {n} values outside [{low}, {high}], e.g. {outside[0]!r}")
    if kind == "whole_uniform":
        if np.any(values != np.round(values)):
            failures.append(f"{name}: values that are not whole numbers, e.g. {values[values != np.round(values)][0]!r}")
        cells = np.arange(int(low), int(high) + 1)
        expected = n / len(cells)
        if expected < 5:
            raise Malformed(f"{name}: {n} draws over {len(cells)} values expect {expected:.2f} per value; "
                            f"the chi-square test needs at least 5")
        observed = np.array([np.sum(values == c) for c in cells])
        stat, p = stats.chisquare(observed)
        print(f"{name}: whole_uniform on [{int(low)}, {int(high)}], n={n}: chi-square {stat:.2f} "
              f"({len(cells) - 1} degrees of freedom), p={p:.3g}; counts min {observed.min()} max {observed.max()}")
        if p < alpha:
            failures.append(f"{name}: counts do not fit equal chances (chi-square p={p:.3g} < {alpha})")
    else:
        dist = stats.loguniform(low, high) if kind == "log_uniform" else stats.uniform(loc=low, scale=high - low)
        result = stats.kstest(values, dist.cdf)
        print(f"{name}: {kind} on [{low}, {high}], n={n}: Kolmogorov-Smirnov D={result.statistic:.4f}, "
              f"p={result.pvalue:.3g}")
        if result.pvalue < alpha:
            failures.append(f"{name}: values do not fit {kind} on [{low}, {high}] "
                            f"(Kolmogorov-Smirnov p={result.pvalue:.3g} < {alpha})")
    return failures


def main(argv):
    if len(argv) != 2:
        print("usage: check_draws.py DRAWS_JSON", file=sys.stderr)
        return 2
    try:
        import numpy as np
        import scipy.stats as stats
    except ImportError as e:  # a missing module is a failure, never a skip
        print(f"check_draws: cannot import ({e}); install Debian's python3-numpy and python3-scipy and run "
              f"with /usr/bin/python3", file=sys.stderr)
        return 2
    try:
        alpha, entries = load(argv[1])
        failures = []
        for entry in entries:
            failures += check(entry, alpha, np, stats)
    except (OSError, ValueError, TypeError, Malformed) as e:
        print(f"check_draws: malformed: {e}", file=sys.stderr)
        return 2
    for f in failures:
        print("check_draws: FAILED: " + f)
    print(f"checked {len(entries)} draws at level {alpha}")
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
