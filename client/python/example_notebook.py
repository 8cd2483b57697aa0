#!/usr/bin/python3
"""A notebook-style walk through graft's Python package (run it cell by cell, or as a script).

    PYTHONPATH=build/python /usr/bin/python3 client/python/example_notebook.py RUN_DIR \
        [--server 127.0.0.1:7070 --token TOKEN --job j-4]

RUN_DIR is a run directory of the parcel-routing demo (`graft-worker run
configs/parcel-routing.yaml --out RUN_DIR`, or `graft fetch j-N --out RUN_DIR`). With --server
the last cell follows a job on graftd and fetches it.
"""
import argparse

import torch

import graft

torch.set_grad_enabled(False)  # inference only

ap = argparse.ArgumentParser()
ap.add_argument("run_dir")
ap.add_argument("--server")
ap.add_argument("--token")
ap.add_argument("--job")
args = ap.parse_args()

# %% Load a run: the resolved spec, the curve, the result and the trained network.
run = graft.load_run(args.run_dir)
print(run.spec["name"], "-", len(run.metrics), "evaluations")
metrics = run.metrics
if hasattr(metrics, "columns"):  # a pandas DataFrame when pandas is installed
    print(metrics[["step", "acc_held_out.value", "iia_changed_held_out.value", "iia_changed_held_out.lo"]].to_string(index=False))
r = run.result
print(f"final changed-case IIA {r['iia_changed_held_out']['value']:.3f} "
      f"[{r['iia_changed_held_out']['lo']:.3f}, {r['iia_changed_held_out']['hi']:.3f}], "
      f"unchanged floor {r['unchanged_floor']:.3f}")

# %% Ask the network about one parcel, in symbols.
parcel = {"origin": "north", "dest": "north", "weight": "light", "fragile": "false"}
logits = run.module(run.encode_many([parcel]))
print("route:", run.classes[int(logits.argmax())], "logits", [round(x, 2) for x in logits[0].tolist()])

# %% An interchange intervention: take `local` from a parcel going elsewhere.
elsewhere = {"origin": "north", "dest": "harbor", "weight": "light", "fragile": "false"}
out = graft.interchange(run.module, run.encode_many([parcel]), run.encode_many([elsewhere]), run.sites(["local"]))
print("route with local taken from a parcel going elsewhere:", run.classes[int(out.argmax())])

# %% IIA on triples of your own: the counterfactual labels come from the algorithm (here worked
# out by hand: local becomes false, careful stays false, so route = 2*0 + 0 = van).
triples = [{"base": parcel, "source": elsewhere, "set": "local", "expected": "van", "base_label": "bike"}]
print("IIA on one hand-made triple:", run.iia(triples)["iia"])

# %% The failing held-out triples graft kept, re-run here: every one is wrong here too.
if run.failures:
    again = run.iia(run.failures)
    print(f"{again['iia']['n']} failing triples re-run: {again['iia']['correct']} correct")

# %% Follow a job on graftd and fetch it (the same API `graft` uses).
if args.server and args.job:
    with graft.Client(args.server, token=args.token) as client:
        for event in client.watch(args.job):
            if event["type"] == "point":
                m = event["metrics"]
                print(f"step {event['step']}: changed-case IIA {m['iia_changed_held_out']['value']:.3f}")
        client.fetch(args.job, "fetched-" + args.job)
        print(graft.load_run("fetched-" + args.job).result["iia_held_out"])
