#!/usr/bin/python3
"""Achieved GFLOP/s of graft's training step at a given width, against the single-thread
peak of torch::mm for the same layer shape, measured in the same run.

Usage: scripts/bench/width_flops.py [--width 1024] [--steps 60] [--runs 3]

graft's FLOPs are counted from the matmuls it executes per step with the shipped
parcel-routing alignment (sites in hidden layer 1, sources in_batch): the base forward of
every layer and the head; the intervened pass recomputes layers 2.. and the head (layer 1 and
below are reused); backward costs twice each forward matmul (grad input and grad weight).
Non-matmul work (activations, gathers, the optimiser) is not counted, so it counts against
the achieved figure. Time is graft's `train_steps_s` (inside training steps, no evaluation).
"""
import argparse, json, os, statistics, subprocess, sys, tempfile

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
BIN = os.path.join(ROOT, "build", "bin")


def graft_flops_per_step(batch, width, inputs=4, dim=8, classes=4, layers=3, site_layer=1):
    widths = [inputs * dim] + [width] * layers
    fwd_layers = [2 * batch * widths[k] * widths[k + 1] for k in range(layers)]
    head = 2 * batch * width * classes
    base = sum(fwd_layers) + head
    intervened = sum(fwd_layers[site_layer + 1:]) + head
    return 3 * (base + intervened), {"base_forward": base, "intervened_forward": intervened}


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--width", type=int, default=1024)
    ap.add_argument("--batch", type=int, default=256)
    ap.add_argument("--steps", type=int, default=60)
    ap.add_argument("--runs", type=int, default=3)
    a = ap.parse_args()
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
    mm_cmd = [os.path.join(BIN, "graft-mm-peak"), str(a.batch), str(a.width), "50"]
    per_step, parts = graft_flops_per_step(a.batch, a.width)
    print("FLOPs per graft step:", per_step, parts)
    achieved, peaks = [], []
    for run in range(a.runs):
        peak = json.loads(subprocess.run(mm_cmd, env=env, check=True, capture_output=True, text=True).stdout)
        peaks.append(peak["forward_gflops"]["median"])
        with tempfile.TemporaryDirectory() as out:
            cmd = [os.path.join(BIN, "graft-worker"), "run", os.path.join(ROOT, "configs/parcel-routing.yaml"),
                   "--out", out, "--set", f"network.hidden=[{a.width},{a.width},{a.width}]",
                   "--set", f"training.steps={a.steps}", "--set", f"training.batch_size={a.batch}",
                   "--set", f"evaluation.every={a.steps}", "--set", "evaluation.triples=512",
                   "--set", f"training.checkpoint_every={a.steps}"]
            if run == 0:
                print("$", " ".join(mm_cmd))
                print("$ OPENBLAS_NUM_THREADS=1", " ".join(cmd))
            subprocess.run(cmd, env=env, check=True, capture_output=True)
            res = json.load(open(os.path.join(out, "result.json")))
        g = per_step * a.steps / res["train_steps_s"] / 1e9
        achieved.append(g)
        print(f"run {run + 1}: torch::mm peak {peak['forward_gflops']['median']:.1f} GFLOP/s "
              f"(grad input {peak['grad_input_gflops']['median']:.1f}, grad weight "
              f"{peak['grad_weight_gflops']['median']:.1f}); graft {g:.1f} GFLOP/s over {a.steps} steps "
              f"in {res["train_steps_s"]:.2f} s; BLAS {res['provenance']['blas_library']} "
              f"threads {res['provenance']['blas_threads']}")
    ratios = [x / p for x, p in zip(achieved, peaks)]
    print(f"width {a.width}, batch {a.batch}: graft {statistics.median(achieved):.1f} GFLOP/s "
          f"(range {min(achieved):.1f}-{max(achieved):.1f}); mm peak {statistics.median(peaks):.1f} "
          f"(range {min(peaks):.1f}-{max(peaks):.1f}); achieved/peak median {statistics.median(ratios):.2f} "
          f"(range {min(ratios):.2f}-{max(ratios):.2f}) over {a.runs} runs")


if __name__ == "__main__":
    sys.exit(main())
