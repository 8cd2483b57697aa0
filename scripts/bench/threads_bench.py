#!/usr/bin/python3
"""Times one graft job with training.threads: 1 and with training.threads: 2, alternating which
goes first in each round, and prints the per-round speed-up of the training steps (result.json's
train_steps_s, threads 1 / threads 2) and of the whole process, with the median and range.

graft sets torch's and OpenBLAS's threads together from training.threads, so no environment
variable is set here (OPENBLAS_NUM_THREADS and OMP_NUM_THREADS are removed from the children's
environment, so neither can cap the count).

Usage (run with /usr/bin/python3):
  scripts/bench/threads_bench.py [--rounds 3] [--width 1024] [--steps 300] [--work DIR]
"""
import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time

REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
GRAFT = os.path.join(REPO, "build", "bin", "graft-worker")
CONFIG = os.path.join(REPO, "configs", "parcel-routing.yaml")


def load_average():
    with open("/proc/loadavg") as f:
        return " ".join(f.read().split()[:3])


def med_range(xs, fmt="{:.2f}"):
    return f"{fmt.format(statistics.median(xs))} [{fmt.format(min(xs))}-{fmt.format(max(xs))}]"


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--width", type=int, default=1024, help="width of each of the 3 hidden layers")
    ap.add_argument("--steps", type=int, default=300)
    ap.add_argument("--work", help="directory for the run outputs (default: a new temporary one)")
    args = ap.parse_args()
    if not os.access(GRAFT, os.X_OK):
        sys.exit(f"{GRAFT} is missing; build graft first")
    work = args.work or tempfile.mkdtemp(prefix="graft-threads-")
    env = {k: v for k, v in os.environ.items() if k not in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS")}
    w = args.width
    # Evaluation once at the end only: this measures the training step.
    common = [GRAFT, "run", CONFIG, "--set", f"network.hidden=[{w},{w},{w}]", "--set", f"training.steps={args.steps}",
              "--set", f"evaluation.every={args.steps}", "--set", f"training.checkpoint_every={args.steps}"]
    print(f"# hidden [{w}]x3, {args.steps} steps, batch 256, {args.rounds} rounds; work dir {work};"
          f" load average before: {load_average()}")
    steps_s = {1: [], 2: []}
    walls = {1: [], 2: []}
    for r in range(args.rounds):
        order = (1, 2) if r % 2 == 0 else (2, 1)
        for threads in order:
            out = os.path.join(work, f"r{r}-t{threads}")
            cmd = common + ["--set", f"training.threads={threads}", "--out", out]
            t0 = time.perf_counter()
            proc = subprocess.run(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
            wall = time.perf_counter() - t0
            if proc.returncode != 0:
                sys.exit(f"failed ({proc.returncode}): {' '.join(cmd)}\n{proc.stderr}")
            with open(os.path.join(out, "result.json")) as f:
                res = json.load(f)
            p = res["provenance"]
            steps_s[threads].append(res["train_steps_s"])
            walls[threads].append(wall)
            print(f"  round {r} threads {threads}: steps {res['train_steps_s']:.2f} s, process {wall:.2f} s"
                  f" (torch_threads {p['torch_threads']}, blas_threads {p['blas_threads']},"
                  f" step {p.get('training_step', '?')})", flush=True)
    print(f"# load average after: {load_average()}")
    step_ratio = [a / b for a, b in zip(steps_s[1], steps_s[2])]
    wall_ratio = [a / b for a, b in zip(walls[1], walls[2])]
    print(f"training steps: threads 1 {med_range(steps_s[1])} s, threads 2 {med_range(steps_s[2])} s;"
          f" speed-up (1 / 2, per round) {med_range(step_ratio)}")
    print(f"whole process: threads 1 {med_range(walls[1])} s, threads 2 {med_range(walls[2])} s;"
          f" speed-up {med_range(wall_ratio)}")


if __name__ == "__main__":
    main()
