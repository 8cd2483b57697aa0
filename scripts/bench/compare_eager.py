#!/usr/bin/python3
"""Times graft-worker against the eager-PyTorch yardstick (scripts/bench/eager_iit.py), both as
whole processes, one at a time, in alternating rounds, and prints the per-pair wall-time ratios,
the BLAS each side loaded, the final held-out IIA of both sides and the FLOP-count ceiling of the
ratio.

One round runs, in this order:
  graft (sources: independent)   the like-for-like figure against eager
  eager
  graft (defaults: sources: in_batch)
  graft (in_batch, source_gradients: false)
Each graft variant's ratio in a round is that round's eager wall time / the variant's wall time.
Every process gets OPENBLAS_NUM_THREADS=1 OMP_NUM_THREADS=1; graft's config has threads: 1 and
the eager script calls torch.set_num_threads(1).

Usage (from anywhere; run with /usr/bin/python3):
  scripts/bench/compare_eager.py [--pairs 5] [--width 64] [--steps N] [--work DIR]
"""
import argparse
import json
import os
import resource
import shlex
import statistics
import subprocess
import sys
import tempfile
import time

REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
GRAFT = os.path.join(REPO, "build", "bin", "graft-worker")
CONFIG = os.path.join(REPO, "configs", "parcel-routing.yaml")
EAGER = os.path.join(REPO, "scripts", "bench", "eager_iit.py")
PYTHON = "/usr/bin/python3"
ENV_SET = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1"}

GRAFT_VARIANTS = [
    ("graft independent", ["--set", "training.sources=independent"]),
    ("graft in_batch (defaults)", []),
    ("graft in_batch, source_gradients=false", ["--set", "training.source_gradients=false"]),
]

# Fixed by configs/parcel-routing.yaml (and by the eager script's defaults).
BATCH, INPUTS, EMBED_DIM, CLASSES, SITE = 256, 4, 8, 4, 1


def machine_busy_s():
    """CPU seconds spent by the whole machine (all cores, all processes) since boot."""
    with open("/proc/stat") as f:
        fields = [int(x) for x in f.readline().split()[1:]]
    user, nice, system, idle, iowait, irq, softirq, steal = (fields + [0] * 8)[:8]
    return (user + nice + system + irq + softirq + steal) / os.sysconf("SC_CLK_TCK")


def children_cpu_s():
    ru = resource.getrusage(resource.RUSAGE_CHILDREN)
    return ru.ru_utime + ru.ru_stime


def run_timed(cmd, log_path):
    """Returns (wall seconds, CPU seconds used by other processes meanwhile)."""
    env = dict(os.environ, **ENV_SET)
    with open(log_path, "w") as log:
        busy0, own0 = machine_busy_s(), children_cpu_s()
        t0 = time.perf_counter()
        proc = subprocess.run(cmd, env=env, stdout=log, stderr=subprocess.STDOUT, cwd=REPO)
        wall = time.perf_counter() - t0
        foreign = (machine_busy_s() - busy0) - (children_cpu_s() - own0)
    if proc.returncode != 0:
        sys.exit(f"command failed with exit code {proc.returncode} (log {log_path}):\n  {shown(cmd)}")
    return wall, max(0.0, foreign)


def shown(cmd):
    return " ".join(f"{k}={v}" for k, v in ENV_SET.items()) + " " + " ".join(shlex.quote(c) for c in cmd)


def load_average():
    with open("/proc/loadavg") as f:
        return " ".join(f.read().split()[:3])


def cell(a):
    return f"{a['value']:.4f} [{a['lo']:.4f}, {a['hi']:.4f}] {a['correct']}/{a['n']}"


def within(a, b, eps=1e-9):
    # eps: Wilson bounds of 0 or n correct come out as 1 - 1e-16 and the like
    return "yes" if b["lo"] - eps <= a["value"] <= b["hi"] + eps else "no"


def med_range(xs, fmt="{:.2f}"):
    return f"{fmt.format(statistics.median(xs))} [{fmt.format(min(xs))}-{fmt.format(max(xs))}]"


def flop_ceiling(widths):
    """Matmul FLOPs per training step. A linear layer's forward is 2*B*in*out; its backward
    (grad input and grad weight) is twice that."""
    dims = [INPUTS * EMBED_DIM] + widths + [CLASSES]
    fwd = [2 * BATCH * a * b for a, b in zip(dims[:-1], dims[1:])]  # layers 0..n-1, head
    full = sum(fwd)
    upto_site = sum(fwd[:SITE + 1])           # layers 0..1
    above_site = sum(fwd[SITE + 1:])          # layers 2.. and head
    peer = 3 * full + 2 * 3 * full            # 3 full forwards, backward through all three
    # What autograd actually runs for the peer: the source's layers 2.. and head are computed
    # but do not reach the loss, so its backward covers only layers 0-1.
    peer_autograd = 3 * full + 2 * (2 * full + upto_site)
    graft_in_batch = full + above_site + 2 * (full + above_site)
    graft_indep = graft_in_batch + upto_site + 2 * upto_site
    return {
        "dims": dims, "fwd_per_layer": fwd, "full_forward": full,
        "layers_0_1": upto_site, "layers_2_on_and_head": above_site,
        "peer": peer, "peer_autograd": peer_autograd,
        "graft_in_batch": graft_in_batch, "graft_independent": graft_indep,
    }


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pairs", type=int, default=5, help="rounds (graft/eager pairs), >= 1")
    ap.add_argument("--width", type=int, default=64, help="width of each of the 3 hidden layers")
    ap.add_argument("--steps", type=int, help="training steps on both sides (default: 2000, the config's)")
    ap.add_argument("--work", help="directory for the run outputs (default: a new temporary one)")
    args = ap.parse_args()
    if args.pairs < 1:
        sys.exit("--pairs must be >= 1")
    if not os.access(GRAFT, os.X_OK):
        sys.exit(f"{GRAFT} is missing; build graft first")
    work = args.work or tempfile.mkdtemp(prefix="graft-bench-")
    os.makedirs(work, exist_ok=True)
    widths = [args.width] * 3
    steps = args.steps or 2000

    graft_common = [GRAFT, "run", CONFIG]
    graft_extra = ["--set", f"network.hidden=[{','.join(map(str, widths))}]"]
    if args.steps:
        graft_extra += ["--set", f"training.steps={args.steps}"]
    eager_base = [PYTHON, EAGER, "--hidden", ",".join(map(str, widths)), "--steps", str(steps),
                  "--seed", "7", "--units-local", "0-15", "--units-careful", "16-31",
                  "--eval-every", "250"]

    print(f"# graft vs eager PyTorch, hidden {widths}, {steps} steps, batch {BATCH}, {args.pairs} rounds")
    print(f"# work dir {work}; load average before: {load_average()}")
    print("# measured runs, in order (wall = whole process, timed by this script; other CPU ="
          " machine-wide busy CPU seconds during the run minus the run's own)")
    walls = {name: [] for name, _ in GRAFT_VARIANTS}
    walls["eager"] = []
    results = {name: [] for name in walls}
    foreign_all = []
    for r in range(args.pairs):
        order = [GRAFT_VARIANTS[0], ("eager", None)] + GRAFT_VARIANTS[1:]
        for name, extra in order:
            tag = f"r{r}-" + ("eager" if extra is None else f"graft{GRAFT_VARIANTS.index((name, extra))}")
            if extra is None:
                out = os.path.join(work, tag + ".json")
                cmd = eager_base + ["--out", out]
            else:
                out = os.path.join(work, tag)
                cmd = graft_common + ["--out", out] + graft_extra + extra
            wall, foreign = run_timed(cmd, os.path.join(work, tag + ".log"))
            foreign_all.append(foreign)
            walls[name].append(wall)
            with open(out if extra is None else os.path.join(out, "result.json")) as f:
                results[name].append(json.load(f))
            print(f"  round {r} {name:40} {wall:8.2f} s  other CPU {foreign:5.2f} s  $ {shown(cmd)}",
                  flush=True)
    print(f"# load average after: {load_average()}; CPU seconds used by other processes during the"
          f" measured runs: total {sum(foreign_all):.2f}, max in one run {max(foreign_all):.2f}")

    eager_walls = walls["eager"]
    eager_loop = [res["train_loop_s"] for res in results["eager"]]
    print()
    print(f"## wall time, hidden {widths}, {steps} steps, {args.pairs} rounds: median [min-max]")
    print(f"{'graft variant':40} {'ratio eager/graft':22} {'graft wall s':22} {'eager wall s':22}"
          f" {'loop-only ratio':22}")
    for name, _ in GRAFT_VARIANTS:
        ratios = [e / g for e, g in zip(eager_walls, walls[name])]
        loop_ratios = [e / res["wall_s"] for e, res in zip(eager_loop, results[name])]
        print(f"{name:40} {med_range(ratios):22} {med_range(walls[name]):22} {med_range(eager_walls):22}"
              f" {med_range(loop_ratios):22}")
    print("(ratio: per round, eager process wall / graft process wall. loop-only ratio: eager's"
          " training-loop seconds (incl. evaluations) / graft's result.json 'seconds')")
    print()
    print("## graft's time outside the training steps, as a share of the whole process: median [min-max]")
    for name, _ in GRAFT_VARIANTS:
        # result.json wall_s - train_steps_s: every evaluation (the shipped cadence), checkpoints,
        # the final controls and the artifacts; an upper bound on what evaluation costs.
        outside = [(res["wall_s"] - res["train_steps_s"]) / w for res, w in zip(results[name], walls[name])]
        steps = [res["train_steps_s"] / w for res, w in zip(results[name], walls[name])]
        print(f"{name:40} outside the steps {med_range([100 * x for x in outside], '{:.1f}%')};"
              f" training steps {med_range([100 * x for x in steps], '{:.1f}%')}; the rest is process start-up")

    print()
    print("## BLAS and threads")
    for name, _ in GRAFT_VARIANTS[:1]:
        p = results[name][0]["provenance"]
        print(f"graft: blas_library {p['blas_library']}; blas_threads {p['blas_threads']};"
              f" torch_threads {p['torch_threads']}; libtorch {p['libtorch_version']}; cpu {p['cpu_model']}")
        commits = sorted({res["provenance"]["graft_commit"] for v, _ in GRAFT_VARIANTS for res in results[v]})
        print(f"graft: graft_commit {', '.join(commits)} (over all graft runs); binary {GRAFT}")
    e = results["eager"][0]
    print(f"eager: loaded {e['blas_library']}; {e['blas_info'].strip('- ')}; torch_threads"
          f" {e['torch_threads']}; torch {e['torch_version']}")

    print()
    print("## final held-out accuracy, value [95% Wilson] correct/n (first round; 'same in all'"
          " compares every round)")
    print(f"{'side':40} {'acc_held_out':34} {'iia_held_out':36} {'iia_changed_held_out':36} same in all")
    for name in [n for n, _ in GRAFT_VARIANTS] + ["eager"]:
        first = results[name][0]
        same = all(all(res[k] == first[k] for k in ("acc_held_out", "iia_held_out", "iia_changed_held_out"))
                   for res in results[name])
        print(f"{name:40} {cell(first['acc_held_out']):34} {cell(first['iia_held_out']):36}"
              f" {cell(first['iia_changed_held_out']):36} {'yes' if same else 'no'}")
    ec = e["iia_changed_held_out"]
    for name, _ in GRAFT_VARIANTS:
        gc = results[name][0]["iia_changed_held_out"]
        print(f"iia_changed_held_out: {name} value within eager's interval: {within(gc, ec)};"
              f" eager's value within {name}'s interval: {within(ec, gc)}")

    f = flop_ceiling(widths)
    print()
    print(f"## FLOP-count ceiling of the ratio, hidden {widths} (matmul FLOPs per training step)")
    print(f"inputs: B={BATCH}, layer dims {f['dims']} (input = {INPUTS} embeddings x {EMBED_DIM}),"
          f" aligned layer {SITE}; linear forward = 2*B*in*out, backward = 2 x forward")
    print(f"forward FLOPs per layer (0..{len(widths) - 1}, head): {f['fwd_per_layer']};"
          f" full forward F = {f['full_forward']:,}; layers 0-1 F01 = {f['layers_0_1']:,};"
          f" layers 2.. + head F2h = {f['layers_2_on_and_head']:,}")
    print(f"eager (3 full forwards + backward through all three) = 9F = {f['peer']:,}")
    print(f"eager as autograd runs it (source backward only through layers 0-1) = 7F + 2*F01"
          f" = {f['peer_autograd']:,}")
    print(f"graft in_batch (base forward + layers 2.. and head again, backward through both)"
          f" = 3F + 3*F2h = {f['graft_in_batch']:,}")
    print(f"graft independent (in_batch + source layers 0-1 forward and backward)"
          f" = 3F + 3*F2h + 3*F01 = {f['graft_independent']:,}")
    print(f"ceiling eager/graft: independent {f['peer'] / f['graft_independent']:.3f}"
          f" (autograd count {f['peer_autograd'] / f['graft_independent']:.3f});"
          f" in_batch and in_batch without source gradients {f['peer'] / f['graft_in_batch']:.3f}"
          f" (autograd count {f['peer_autograd'] / f['graft_in_batch']:.3f})")
    print("(evaluation passes are not counted; both sides evaluate at the same steps)")

    summary = {"widths": widths, "steps": steps, "pairs": args.pairs, "walls": walls,
               "flops": f, "work": work}
    with open(os.path.join(work, "summary.json"), "w") as fh:
        json.dump(summary, fh, indent=1)


if __name__ == "__main__":
    main()
