#!/usr/bin/python3
"""Eager-PyTorch version of the parcel-routing IIT job, the yardstick for graft's trainer speed.

The same job as `graft-worker run configs/parcel-routing.yaml --set training.sources=independent`,
written the way a careful researcher writes it in plain PyTorch: the causal model is hand-written
here (not read from the YAML), the network is an nn.Module, and one training step runs three
forward passes (base, source, intervened), where the intervened pass runs the base input from
the start and overwrites the aligned units of hidden layer 1 with the source's activations.
Counterfactual labels are computed with tensor ops; there are no per-example Python loops.

Run with /usr/bin/python3 (Debian's torch). Example:
    OPENBLAS_NUM_THREADS=1 OMP_NUM_THREADS=1 /usr/bin/python3 scripts/bench/eager_iit.py \
        --hidden 64,64,64 --steps 2000 --seed 7 --out /tmp/eager.json
"""
import time

T_START = time.perf_counter()

import argparse
import json
import math
import sys

import torch
import torch.nn as nn
import torch.nn.functional as F

# ---------------------------------------------------------------------------------------------
# The high-level causal model of parcel routing, by hand.
ORIGIN = ["north", "south", "east", "west", "central", "harbor"]
DEST = ORIGIN
WEIGHT = ["light", "medium", "heavy", "oversize"]
FRAGILE = [False, True]
DOMAIN_SIZES = [len(ORIGIN), len(DEST), len(WEIGHT), len(FRAGILE)]
HEAVY, OVERSIZE = WEIGHT.index("heavy"), WEIGHT.index("oversize")
CLASSES = ["van", "truck", "bike", "courier"]  # route = 2*local + careful


def all_inputs():
    """The input space, numbered with the first input most significant: (288, 4) value indices."""
    grids = torch.meshgrid(*[torch.arange(n) for n in DOMAIN_SIZES], indexing="ij")
    return torch.stack([g.reshape(-1) for g in grids], dim=1)


def mech_local(x):
    return (x[:, 0] == x[:, 1]).long()


def mech_careful(x):
    return ((x[:, 2] == HEAVY) | (x[:, 2] == OVERSIZE) | (x[:, 3] == 1)).long()


def mech_route(local, careful):
    return 2 * local + careful


# Intervention sets, by index: 0 = [local], 1 = [careful], 2 = [local, careful].
SET_NAMES = ["local", "careful", "local+careful"]
SET_HAS_LOCAL = torch.tensor([True, False, True])
SET_HAS_CAREFUL = torch.tensor([False, True, True])


def counterfactual_labels(local_tab, careful_tab, base_idx, source_idx, sets):
    """Route after setting the intervened variables to their values on the source input."""
    has_local, has_careful = SET_HAS_LOCAL[sets], SET_HAS_CAREFUL[sets]
    local_cf = torch.where(has_local, local_tab[source_idx], local_tab[base_idx])
    careful_cf = torch.where(has_careful, careful_tab[source_idx], careful_tab[base_idx])
    return mech_route(local_cf, careful_cf)


# ---------------------------------------------------------------------------------------------
# The network.
class EmbedMLP(nn.Module):
    def __init__(self, domain_sizes, dim, hidden, classes):
        super().__init__()
        self.embed = nn.ModuleList(nn.Embedding(n, dim) for n in domain_sizes)
        widths = [dim * len(domain_sizes)] + list(hidden)
        self.hidden = nn.ModuleList(nn.Linear(a, b) for a, b in zip(widths[:-1], widths[1:]))
        self.out = nn.Linear(widths[-1], classes)

    def forward(self, x, patch=None):
        """Returns (logits, [hidden activations after relu]). patch = (layer, mask, values):
        at that layer, the units where mask is true take the given values."""
        h = torch.cat([e(x[:, i]) for i, e in enumerate(self.embed)], dim=1)
        acts = []
        for k, lin in enumerate(self.hidden):
            h = F.relu(lin(h))
            if patch is not None and k == patch[0]:
                h = torch.where(patch[1], patch[2], h)
            acts.append(h)
        return self.out(h), acts


def parse_units(text):
    lo, _, hi = text.partition("-")
    return list(range(int(lo), int(hi or lo) + 1))


def wilson(correct, n, z=1.959963984540054):
    """95% Wilson score interval (the same formula as statsmodels' method="wilson")."""
    if n == 0:
        return 0.0, 1.0
    p = correct / n
    denom = 1.0 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    return max(0.0, centre - half), min(1.0, centre + half)


def accuracy(correct, n):
    lo, hi = wilson(correct, n)
    return {"value": correct / n if n else 0.0, "lo": lo, "hi": hi, "correct": correct, "n": n}


def split_inputs(n_inputs, held_out, inputs, gen):
    """Seeded permutation; the first round(held_out * n) are held out. Redrawn while some value
    of some input would be missing from training."""
    n_held = int(round(held_out * n_inputs))
    for attempt in range(1000):
        perm = torch.randperm(n_inputs, generator=gen)
        held, train = perm[:n_held], perm[n_held:]
        if all(inputs[train, i].unique().numel() == n for i, n in enumerate(DOMAIN_SIZES)):
            return train, held, attempt + 1
    raise SystemExit("no split keeps every value in training")


def loaded_blas():
    libs = set()
    with open("/proc/self/maps") as f:
        for line in f:
            path = line.split()[-1] if len(line.split()) >= 6 else ""
            if "blas" in path.lower():
                libs.add(path)
    return sorted(libs)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--hidden", default="64,64,64", help="hidden widths, comma-separated")
    ap.add_argument("--steps", type=int, default=2000)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--batch", type=int, default=256)
    ap.add_argument("--lr", type=float, default=0.001)
    ap.add_argument("--embed-dim", type=int, default=8)
    ap.add_argument("--units-local", default="0-15", help="units of hidden layer 1 for 'local'")
    ap.add_argument("--units-careful", default="16-31", help="units of hidden layer 1 for 'careful'")
    ap.add_argument("--eval-every", type=int, default=250)
    ap.add_argument("--triples", type=int, default=4096)
    ap.add_argument("--held-out", type=float, default=0.2)
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--out", help="write the final results as JSON here")
    args = ap.parse_args()

    torch.set_num_threads(args.threads)
    torch.manual_seed(args.seed)
    hidden = [int(w) for w in args.hidden.split(",")]
    site = 1
    units_local, units_careful = parse_units(args.units_local), parse_units(args.units_careful)
    width = hidden[site]
    assert max(units_local + units_careful) < width and not set(units_local) & set(units_careful)

    inputs = all_inputs()
    local_tab, careful_tab = mech_local(inputs), mech_careful(inputs)
    label_tab = mech_route(local_tab, careful_tab)
    gen = torch.Generator().manual_seed(args.seed)
    train_idx, held_idx, split_attempts = split_inputs(len(inputs), args.held_out, inputs, gen)

    is_local_unit = torch.zeros(width, dtype=torch.bool)
    is_local_unit[units_local] = True
    is_careful_unit = torch.zeros(width, dtype=torch.bool)
    is_careful_unit[units_careful] = True

    def unit_mask(sets):
        return ((SET_HAS_LOCAL[sets][:, None] & is_local_unit[None, :])
                | (SET_HAS_CAREFUL[sets][:, None] & is_careful_unit[None, :]))

    model = EmbedMLP(DOMAIN_SIZES, args.embed_dim, hidden, len(CLASSES))
    opt = torch.optim.Adam(model.parameters(), lr=args.lr)

    # Fixed evaluation triples from the held-out inputs: distinct (base, source, set) triples.
    n_held, n_sets = len(held_idx), len(SET_NAMES)
    n_distinct = n_held * n_held * n_sets
    pick = torch.randperm(n_distinct, generator=gen)[:min(args.triples, n_distinct)]
    ev_base = held_idx[pick // (n_held * n_sets)]
    ev_source = held_idx[(pick // n_sets) % n_held]
    ev_sets = pick % n_sets
    ev_cf = counterfactual_labels(local_tab, careful_tab, ev_base, ev_source, ev_sets)
    ev_changed = ev_cf != label_tab[ev_base]
    ev_mask = unit_mask(ev_sets)
    acc_train_idx = train_idx[:args.triples]

    def evaluate(step, wall):
        model.eval()
        with torch.no_grad():
            pred_test = model(inputs[held_idx])[0].argmax(1)
            pred_train = model(inputs[acc_train_idx])[0].argmax(1)
            src_acts = model(inputs[ev_source])[1][site]
            pred_iv = model(inputs[ev_base], patch=(site, ev_mask, src_acts))[0].argmax(1)
        model.train()
        ok = pred_iv == ev_cf
        rec = {
            "step": step,
            "wall_s": wall,
            "acc_train": accuracy(int((pred_train == label_tab[acc_train_idx]).sum()), len(acc_train_idx)),
            "acc_held_out": accuracy(int((pred_test == label_tab[held_idx]).sum()), len(held_idx)),
            "iia_held_out": accuracy(int(ok.sum()), len(ok)),
            "iia_changed_held_out": accuracy(int(ok[ev_changed].sum()), int(ev_changed.sum())),
            "iia_by_set": {name: accuracy(int(ok[ev_sets == k].sum()), int((ev_sets == k).sum()))
                           for k, name in enumerate(SET_NAMES)},
            "unchanged_floor": float((~ev_changed).float().mean()),
        }
        print(f"step {step}/{args.steps}  acc_held_out {rec['acc_held_out']['value']:.3f}  "
              f"iia_held_out {rec['iia_held_out']['value']:.3f} (changed {rec['iia_changed_held_out']['value']:.3f})",
              file=sys.stderr, flush=True)
        return rec

    n_train = len(train_idx)
    B = args.batch
    history = []
    t_loop = time.perf_counter()
    history.append(evaluate(0, 0.0))
    for step in range(1, args.steps + 1):
        base = train_idx[torch.randint(n_train, (B,))]
        source = train_idx[torch.randint(n_train, (B,))]
        sets = torch.randint(n_sets, (B,))
        cf = counterfactual_labels(local_tab, careful_tab, base, source, sets)
        x_base, x_source = inputs[base], inputs[source]

        logits_base, _ = model(x_base)
        _, acts_source = model(x_source)
        logits_iv, _ = model(x_base, patch=(site, unit_mask(sets), acts_source[site]))
        loss = F.cross_entropy(logits_base, label_tab[base]) + F.cross_entropy(logits_iv, cf)

        opt.zero_grad(set_to_none=True)
        loss.backward()
        opt.step()
        if step % args.eval_every == 0 or step == args.steps:
            history.append(evaluate(step, time.perf_counter() - t_loop))
    train_loop_s = time.perf_counter() - t_loop

    config_text = torch.__config__.show()
    blas_info = next((part.strip() for part in config_text.replace(",", "\n").splitlines()
                      if "BLAS_INFO" in part), "")
    result = dict(history[-1])
    result.update({
        "steps": args.steps,
        "hidden": hidden,
        "seed": args.seed,
        "split_attempts": split_attempts,
        "train_loop_s": train_loop_s,
        "total_s": time.perf_counter() - T_START,
        "torch_version": torch.__version__,
        "torch_threads": torch.get_num_threads(),
        "blas_info": blas_info,
        "blas_library": ", ".join(loaded_blas()),
        "parallel_info": torch.__config__.parallel_info().strip().splitlines(),
        "command": [sys.executable] + sys.argv,
        "history": history,
    })
    if args.out:
        with open(args.out, "w") as f:
            json.dump(result, f, indent=1)
    print(f"finished {args.steps} steps in {train_loop_s:.2f} s (training loop incl. evaluations)",
          file=sys.stderr)


if __name__ == "__main__":
    main()
