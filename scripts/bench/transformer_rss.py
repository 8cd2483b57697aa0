#!/usr/bin/python3
"""Peak resident memory of a 9-input transformer job: configs/ferry-boarding.yaml (nine inputs,
8^9 inputs split by a hash) at --width (default 128, block MLP 4x as wide), trained for --steps
steps with its evaluations (4096 held-out triples each), --runs times, one at a time. Reads each
run's result.json peak_rss_mb (the process's getrusage maximum RSS, so start-up, training,
evaluation and the final controls are all inside it) and prints every run, the median and the
range.

Usage: /usr/bin/python3 scripts/bench/transformer_rss.py [--runs 3] [--width 128] [--steps 300]
"""
import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile

REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
GRAFT = os.path.join(REPO, "build", "bin", "graft-worker")
CONFIG = os.path.join(REPO, "configs", "ferry-boarding.yaml")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=3)
    ap.add_argument("--width", type=int, default=128)
    ap.add_argument("--steps", type=int, default=300)
    a = ap.parse_args()
    work = tempfile.mkdtemp(prefix="graft-transformer-rss-")
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
    peaks = []
    for i in range(a.runs):
        out = os.path.join(work, f"run{i}")
        cmd = [GRAFT, "run", CONFIG, "--out", out, "--set", f"network.width={a.width}",
               "--set", f"network.mlp_width={4 * a.width}", "--set", f"training.steps={a.steps}",
               "--set", f"evaluation.every={max(1, a.steps // 3)}"]
        p = subprocess.run(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
        if p.returncode != 0:
            sys.exit(f"run {i} failed ({p.returncode}):\n{p.stdout}")
        with open(os.path.join(out, "result.json")) as f:
            r = json.load(f)
        peaks.append(r["peak_rss_mb"])
        print(f"run {i + 1}: peak RSS {r['peak_rss_mb']:.1f} MB, iia_changed_held_out "
              f"{r['iia_changed_held_out']['value']:.3f}, {r['examples_per_s']:.0f} examples/s")
    print(f"width {a.width}, mlp_width {4 * a.width}, {a.steps} steps: peak RSS median {statistics.median(peaks):.1f} MB, "
          f"range {min(peaks):.1f}-{max(peaks):.1f} MB over {len(peaks)} runs; command: {' '.join(cmd[:3])} ...")


if __name__ == "__main__":
    main()
