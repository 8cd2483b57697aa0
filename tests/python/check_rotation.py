#!/usr/bin/python3
"""Checks DAS rotations written by graft against SciPy.

Usage: /usr/bin/python3 check_rotation.py ROTATION_PT [--min-turn X]

ROTATION_PT is a dict of float64 tensors saved by LibTorch's torch::pickle_save (torch.load
returns a plain dict): for each prefix P in ("", "control.") that is present, P + "skew" is the
skew-symmetric generator S and P + "rotation" is graft's R = matrix_exp(S).

Checks, per rotation:
  - both tensors are float64 (graft computes the rotation in float64; a float32 tensor here
    is a regression, so it is refused rather than widened);
  - S is skew-symmetric: max |S + S^T| <= 1e-12 (it is built as A - A^T, so exactly 0);
  - R is orthogonal: max |R^T R - I| <= 1e-12 (definition of an orthogonal matrix);
  - R equals scipy.linalg.expm(S) within 1e-12 (SciPy's Pade approximation with scaling and
    squaring, Al-Mohy and Higham 2009 by SciPy's documentation as remembered, is the reference);
  - with --min-turn X: max |R - I| >= X, so a check of a barely moved rotation is not passed
    off as a learned one.

Why 1e-12: float64 rounds at u = 2^-53 = 1.1e-16, and an exponential by scaling and squaring
of an n x n matrix with norm ||S|| loses roughly a factor n * ||S|| of that (a rule of thumb
of floating-point error analysis, from memory; not a derived bound). Measured when this was
written: 12 x 12 with ||S||_2 about 6, both errors 2e-15 to 7e-15; DAS's learned 64 x 64
rotations 8e-15 to 3e-14. The same computations in float32 (u = 6e-8) give 4e-7 to 3e-6. So
1e-12 leaves a factor of about 40 over float64 at width 64 and fails any float32 step by five
orders of magnitude.

Exit codes: 0 all checks pass, 1 any failure, malformed input or missing module.
"""

import sys

TOLERANCE = 1e-12  # float64 precision; see the docstring


def main():
    try:
        import numpy as np
        import scipy.linalg
        import torch
    except ImportError as e:  # a missing module is a failure, never a skip
        print(f"check_rotation: cannot import ({e}); install Debian's python3-numpy, python3-scipy and "
              f"python3-torch and run with /usr/bin/python3", file=sys.stderr)
        return 1
    args = sys.argv[1:]
    min_turn = 0.0
    if "--min-turn" in args:
        i = args.index("--min-turn")
        min_turn = float(args[i + 1])
        del args[i:i + 2]
    if len(args) != 1:
        print(__doc__, file=sys.stderr)
        return 1
    d = torch.load(args[0])
    if not isinstance(d, dict):
        print(f"check_rotation: {args[0]}: expected a dict, got {type(d).__name__}", file=sys.stderr)
        return 1
    checked = 0
    failures = []
    for prefix in ("", "control."):
        if prefix + "rotation" not in d:
            continue
        if prefix + "skew" not in d:
            failures.append(f"{prefix}rotation has no {prefix}skew beside it")
            continue
        dtypes = (d[prefix + "skew"].dtype, d[prefix + "rotation"].dtype)
        if dtypes != (torch.float64, torch.float64):
            failures.append(f"{prefix}skew and {prefix}rotation are {dtypes[0]} and {dtypes[1]}, expected float64")
        s = d[prefix + "skew"].numpy().astype(np.float64)
        r = d[prefix + "rotation"].numpy().astype(np.float64)
        n = s.shape[0]
        skew_err = np.abs(s + s.T).max()
        orth_err = np.abs(r.T @ r - np.eye(n)).max()
        expm_err = np.abs(r - scipy.linalg.expm(s)).max()
        turn = np.abs(r - np.eye(n)).max()
        print(f"{prefix or 'network.'}rotation {n}x{n}: max|S+S^T| {skew_err:.2e}, max|R^T R - I| {orth_err:.2e}, "
              f"max|R - expm(S)| {expm_err:.2e}, max|R - I| {turn:.3f}")
        if skew_err > TOLERANCE:
            failures.append(f"{prefix}skew is not skew-symmetric ({skew_err:.3e})")
        if orth_err > TOLERANCE:
            failures.append(f"{prefix}rotation is not orthogonal to float64 precision ({orth_err:.3e} > {TOLERANCE})")
        if expm_err > TOLERANCE:
            failures.append(f"{prefix}rotation differs from scipy.linalg.expm ({expm_err:.3e} > {TOLERANCE})")
        if turn < min_turn:
            failures.append(f"{prefix}rotation is within {turn:.3e} of the identity (< {min_turn})")
        checked += 1
    if checked == 0:
        failures.append("no rotation in the file")
    for f in failures:
        print("check_rotation: " + f, file=sys.stderr)
    print(f"checked {checked} rotations")
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
