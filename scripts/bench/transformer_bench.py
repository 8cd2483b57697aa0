#!/usr/bin/python3
"""Times graft's transformer IIT step against the eager-PyTorch peer
(scripts/bench/eager_transformer_iit.py) side by side: in each round graft-worker trains
configs/ferry-boarding.yaml for --steps steps, then the peer trains the same architecture and
task for the same steps, one process at a time, alternating which goes first. Both run with one
thread (OPENBLAS_NUM_THREADS=1 OMP_NUM_THREADS=1; the config's training.threads: 1; the peer's
torch.set_num_threads(1)).

Compared is time inside training steps: graft's result.json train_steps_s (evaluation and start-up
excluded) against the peer's timed loop (after one warm-up step). Prints each round's steps per
second and the ratio graft / peer, then the median and range of the ratios, and the machine's
load average before and after (other sessions share the machine).

Usage: /usr/bin/python3 scripts/bench/transformer_bench.py [--rounds 3] [--steps 200]
       [--width 64] [--layers 2] [--batch 256] [--work DIR]
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
PEER = os.path.join(REPO, "scripts", "bench", "eager_transformer_iit.py")
ENV = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")


def load_average():
    with open("/proc/loadavg") as f:
        return " ".join(f.read().split()[:3])


def run(cmd, log):
    with open(log, "w") as out:
        p = subprocess.run(cmd, env=ENV, stdout=out, stderr=subprocess.STDOUT, cwd=REPO)
    if p.returncode != 0:
        sys.exit(f"failed ({p.returncode}), see {log}: {' '.join(cmd)}")


def graft_round(work, i, a):
    out = os.path.join(work, f"graft{i}")
    run([GRAFT, "run", CONFIG, "--out", out, "--set", f"training.steps={a.steps}",
         "--set", f"evaluation.every={a.steps}", "--set", "evaluation.triples=256",
         "--set", f"training.checkpoint_every={a.steps}", "--set", f"network.width={a.width}",
         "--set", f"network.layers={a.layers}", "--set", f"training.batch_size={a.batch}"], out + ".log")
    with open(os.path.join(out, "result.json")) as f:
        r = json.load(f)
    return a.steps / r["train_steps_s"], r["provenance"]


def peer_round(work, i, a):
    log = os.path.join(work, f"peer{i}.log")
    run(["/usr/bin/python3", PEER, "--steps", str(a.steps), "--width", str(a.width), "--layers", str(a.layers),
         "--batch", str(a.batch)], log)
    with open(log) as f:
        r = json.loads(f.read().strip().splitlines()[-1])
    return r["steps_per_s"], r


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--steps", type=int, default=200)
    ap.add_argument("--width", type=int, default=64)
    ap.add_argument("--layers", type=int, default=2)
    ap.add_argument("--batch", type=int, default=256)
    ap.add_argument("--work")
    a = ap.parse_args()
    work = a.work or tempfile.mkdtemp(prefix="graft-transformer-bench-")
    os.makedirs(work, exist_ok=True)
    print(f"width {a.width}, {a.layers} layers, batch {a.batch}, {a.steps} steps per run, one thread each; "
          f"work dir {work}; load average before: {load_average()}")
    ratios = []
    for i in range(a.rounds):
        if i % 2 == 0:
            g, prov = graft_round(work, i, a)
            p, peer = peer_round(work, i, a)
        else:
            p, peer = peer_round(work, i, a)
            g, prov = graft_round(work, i, a)
        ratios.append(g / p)
        print(f"round {i + 1} ({'graft' if i % 2 == 0 else 'peer'} first): graft {g:.2f} steps/s, "
              f"peer {p:.2f} steps/s, ratio {g / p:.2f}")
    print(f"graft / peer: median {statistics.median(ratios):.2f}, range {min(ratios):.2f}-{max(ratios):.2f} "
          f"over {len(ratios)} rounds")
    print(f"graft: blas {prov.get('blas_library')}, {prov.get('blas_threads')} BLAS thread(s), "
          f"{prov.get('torch_threads')} torch thread(s); peer: torch {peer['torch']}, {peer['torch_threads']} thread(s)")
    print(f"load average after: {load_average()}")


if __name__ == "__main__":
    main()
