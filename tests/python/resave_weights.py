#!/usr/bin/python3
"""Writes a network's weights the way a PyTorch user would: a dict of tensors saved by Python's
torch.save (its default zip-archive format), for graft-worker evaluate to load.

Usage: /usr/bin/python3 resave_weights.py IN_WEIGHTS OUT_FILE [--break]

IN_WEIGHTS is a graft weights.pt (torch.load gives a plain dict). The tensors are copied into
fresh Python tensors (float64, so the file differs from graft's in format and dtype; float32
values convert to float64 and back exactly) and saved with torch.save. With --break, the file
is made not to fit: hidden.0.weight loses its last column, out.bias is left out and an extra
tensor 'decoder.weight' is added, to check graft's refusal messages.

Exit codes: 0 written, 1 failure or missing module.
"""

import sys
import zipfile


def main():
    try:
        import torch
    except ImportError as e:  # a missing module is a failure, never a skip
        print(f"resave_weights: cannot import torch ({e}); install Debian's python3-torch and run with "
              f"/usr/bin/python3", file=sys.stderr)
        return 1
    args = sys.argv[1:]
    broken = "--break" in args
    args = [a for a in args if a != "--break"]
    if len(args) != 2:
        print(__doc__, file=sys.stderr)
        return 1
    src = torch.load(args[0])
    out = {name: torch.tensor(t.numpy().tolist(), dtype=torch.float64) for name, t in src.items()}
    if broken:
        out["hidden.0.weight"] = out["hidden.0.weight"][:, :-1].clone()
        del out["out.bias"]
        out["decoder.weight"] = torch.zeros(3, 3)
    torch.save(out, args[1])
    if not zipfile.is_zipfile(args[1]):
        print(f"resave_weights: {args[1]} is not torch.save's zip format", file=sys.stderr)
        return 1
    print(f"wrote {len(out)} tensors to {args[1]} (torch {torch.__version__}, zip format)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
