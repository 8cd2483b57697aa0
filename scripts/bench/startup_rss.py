#!/usr/bin/python3
"""Peak RSS of the demo run and the time from process start to the first training step.

Usage: scripts/bench/startup_rss.py [--runs 3]
Runs `graft-worker run configs/parcel-routing.yaml` as shipped, RUNS times, and reports the
median and range of result.json's peak_rss_mb (getrusage maxrss) and first_step_s (process
age, from /proc, when the first step began: loading, validation, network set-up and the
step-0 evaluation).
"""
import argparse, json, os, statistics, subprocess, sys, tempfile

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--runs", type=int, default=3)
    a = ap.parse_args()
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1")
    rss, first = [], []
    for i in range(a.runs):
        with tempfile.TemporaryDirectory() as out:
            cmd = [os.path.join(ROOT, "build/bin/graft-worker"), "run",
                   os.path.join(ROOT, "configs/parcel-routing.yaml"), "--out", out]
            if i == 0:
                print("$", " ".join(cmd))
            subprocess.run(cmd, env=env, check=True, capture_output=True)
            r = json.load(open(os.path.join(out, "result.json")))
            rss.append(r["peak_rss_mb"])
            first.append(r["first_step_s"])
            print(f"run {i + 1}: peak_rss_mb {r['peak_rss_mb']:.1f}, first_step_s {r['first_step_s']:.2f}")
    print(f"peak RSS median {statistics.median(rss):.1f} MB (range {min(rss):.1f}-{max(rss):.1f}); "
          f"start to first step median {statistics.median(first):.2f} s (range {min(first):.2f}-{max(first):.2f}) "
          f"over {a.runs} runs")


if __name__ == "__main__":
    sys.exit(main())
