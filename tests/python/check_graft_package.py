#!/usr/bin/python3
"""Checks the graft Python package (client/python/graft, assembled in build/python) against graft's
own files and a real graftd.

usage: check_graft_package.py --package-dir BUILD/python [--run-dir DIR]
                              [--address HOST:PORT --token TOKEN --config FILE [--set k=v ...]]
                              [--tls-address HOST:PORT --ca-file CA --cert PEM --key KEY]

DIR is a run of `graft-worker run ... --set evaluation.triples=64 --dump-logits DIR/logits.json`
(an MLP or a transformer), so logits.json holds every held-out evaluation triple with graft's base
and intervened logits.
Checks, with references outside the package:
  - load_run: the spec equals spec.yaml read by PyYAML; metrics is a pandas DataFrame with one
    row per metrics.jsonl line and graft's dotted column names (and a list with frame=False);
    result equals result.json; failures equal failures.jsonl;
  - the rebuilt module's logits equal graft's (logits.json base_logits) within 1e-5, and
    graft.interchange with the run's sites gives graft's intervened_logits within 1e-5, with
    some intervention moving some logit by more than 1e-3 (so agreement is not vacuous);
  - graft.iia on those triples, with labels computed here from the config's algorithm (its
    expressions parsed by check_expressions.py's Translator, the independent parser of the
    mechanism language), gives result.json's iia_held_out, iia_changed_held_out and every
    iia_by_set exactly (correct and n), and the same intervals;
  - graft.wilson equals statsmodels' proportion_confint(method="wilson") within 1e-12;
  - with --address: Client.submit of the config, watch (the first event a state change, points
    in step order, the last event the job succeeded), get, list, metrics (the watched points,
    step for step) and fetch (each file's SHA-256 equal to what graftd reports, and load_run of
    the fetched directory giving the stored metrics), a GraftError NOT_FOUND for an unknown job,
    UNAUTHENTICATED for a wrong token and INVALID_ARGUMENT with FILE:LINE:COL for a bad config;
  - with --tls-address (graftd with mutual TLS): a client with ca_file, cert_file and key_file
    submits and reads a job; one without its certificate and one in plaintext are refused.
Prints each check; exit 0 when all pass, 1 otherwise (a missing module is a failure).
"""

import argparse
import hashlib
import json
import math
import os
import sys

HERE = os.path.dirname(os.path.abspath(__file__))
checks = {"passed": 0, "failed": 0}


def check(condition, message):
    checks["passed" if condition else "failed"] += 1
    print(("ok:   " if condition else "FAIL: ") + message)
    return condition


def labels_from_algorithm(spec, triples):
    """(expected, base_label) per triple, as class indices, from the spec's algorithm evaluated by
    the test's own expression translator."""
    sys.path.insert(0, HERE)
    import check_expressions as ce

    algo = spec["algorithm"]
    names = list(algo["inputs"])
    values_of = []
    symbols = set()
    for n in names:
        d = algo["inputs"][n]
        if isinstance(d, list):
            values_of.append([str(x) for x in d])
            symbols.update(str(x) for x in d)
        elif d == "bool":
            values_of.append([0.0, 1.0])
        else:
            values_of.append([float(v) for v in range(d["range"][0], d["range"][1] + 1)])
    exprs = {}
    for m, body in (algo.get("mechanisms") or {}).items():
        exprs[m] = body["expr"] if isinstance(body, dict) else body
    (out_name, out_body), = algo["output"].items()
    exprs[out_name] = out_body["expr"]
    classes = [str(c) for c in out_body["classes"]]
    symbols.update(classes)
    variables = {n: "symbol" if isinstance(v[0], str) else "number" for n, v in zip(names, values_of)}
    variables.update({m: "any" for m in exprs})
    code = {m: compile(ce.Translator(e, variables, symbols).translate(), f"<{m}>", "eval") for m, e in exprs.items()}
    env = {"__builtins__": {"min": min, "max": max, "abs": abs, "int": int, "float": float,
                            "_and": ce._and, "_or": ce._or}}
    sets = {}
    order = names + list(algo.get("mechanisms") or {})
    for variables_of_set in spec["training"]["interventions"]:
        ordered = sorted(variables_of_set, key=order.index)
        sets["+".join(ordered)] = ordered

    def evaluate(indices, fixed):
        values = {n: values_of[k][i] for k, (n, i) in enumerate(zip(names, indices))}
        values.update(fixed)
        pending = [m for m in exprs if m not in values]
        for _ in range(len(exprs) + 1):
            for m in list(pending):
                try:
                    values[m] = eval(code[m], env, {"V": values})
                    pending.remove(m)
                except KeyError:
                    continue
        return values

    def class_of(v):
        return classes.index(v) if isinstance(v, str) else int(v)

    out = []
    for t in triples:
        base = evaluate(t["base"], {})
        source = evaluate(t["source"], {})
        cf = evaluate(t["base"], {v: source[v] for v in sets[t["set"]]})
        out.append((class_of(cf[out_name]), class_of(base[out_name])))
    return out


def check_run(graft, torch, run_dir):
    import yaml
    import pandas
    run = graft.load_run(run_dir)
    with open(os.path.join(run_dir, "spec.yaml")) as f:
        check(run.spec == yaml.safe_load(f), "load_run: spec equals spec.yaml")
    with open(os.path.join(run_dir, "metrics.jsonl")) as f:
        lines = [json.loads(line) for line in f if line.strip()]
    check(isinstance(run.metrics, pandas.DataFrame) and len(run.metrics) == len(lines),
          f"load_run: metrics is a DataFrame of {len(lines)} rows")
    check("iia_changed_held_out.value" in run.metrics.columns and
          list(run.metrics["iia_changed_held_out.value"]) == [p["iia_changed_held_out"]["value"] for p in lines],
          "load_run: the column iia_changed_held_out.value holds every evaluation's value")
    check(graft.load_run(run_dir, frame=False).metrics == lines, "load_run(frame=False): metrics are the lines")
    with open(os.path.join(run_dir, "result.json")) as f:
        result = json.load(f)
    check(run.result == result, "load_run: result equals result.json")
    check(isinstance(run.module, torch.nn.Module), "load_run: the network is a torch.nn.Module")

    with open(os.path.join(run_dir, "logits.json")) as f:
        dump = json.load(f)
    triples = dump["triples"]
    base = torch.tensor([t["base"] for t in triples])
    source = torch.tensor([t["source"] for t in triples])
    with torch.no_grad():
        logits = run.module(base).double()
    want = torch.tensor(dump["base_logits"], dtype=torch.float64)
    err = (logits - want).abs().max().item()
    check(err <= 1e-5, f"module(base) equals graft's base logits (max |difference| {err:.2e} <= 1e-5)")
    sites = run.set_sites()
    inter = torch.zeros_like(want)
    for i, t in enumerate(triples):
        inter[i] = graft.interchange(run.module, base[i:i + 1], source[i:i + 1], sites[t["set"]])[0].double()
    want_inter = torch.tensor(dump["intervened_logits"], dtype=torch.float64)
    err = (inter - want_inter).abs().max().item()
    moved = (want_inter - want).abs().max().item()
    check(err <= 1e-5, f"interchange equals graft's intervened logits (max |difference| {err:.2e} <= 1e-5)")
    check(moved > 1e-3, f"some intervention moves some logit (by {moved:.3f} > 1e-3), so agreement is not vacuous")

    check(len(triples) == result["iia_held_out"]["n"],
          f"logits.json holds all {result['iia_held_out']['n']} held-out triples")
    labelled = []
    for t, (expected, base_label) in zip(triples, labels_from_algorithm(run.spec, triples)):
        labelled.append({"base": t["base"], "source": t["source"], "set": t["set"], "expected": expected,
                         "base_label": base_label})
    got = graft.iia(run.module, labelled, sites, classes=run.classes)
    for key, mine in [("iia_held_out", got["iia"]), ("iia_changed_held_out", got["changed"])] + \
            [("iia_by_set." + s, a) for s, a in got["by_set"].items()]:
        theirs = result
        for part in key.split("."):
            theirs = theirs[part]
        same = (mine["correct"], mine["n"]) == (theirs["correct"], theirs["n"]) and \
            all(math.isclose(mine[f], theirs[f], abs_tol=1e-12) for f in ("value", "lo", "hi"))
        check(same, f"iia: {key} {mine['correct']}/{mine['n']} [{mine['lo']:.6f}, {mine['hi']:.6f}], "
                    f"graft {theirs['correct']}/{theirs['n']} [{theirs['lo']:.6f}, {theirs['hi']:.6f}]")
    check(set(got["by_set"]) == set(result["iia_by_set"]), "iia: the same intervention sets as graft")
    # The symbols path: failures.jsonl's triples (all wrong in graft's eyes) through Run.iia.
    if run.failures:
        f = run.iia(run.failures)
        predicted = [run.classes[p] for p in f["predicted"]]
        check(f["iia"]["correct"] == 0 and predicted == [x["predicted"] for x in run.failures],
              f"Run.iia on failures.jsonl: 0 of {len(run.failures)} correct, each prediction graft's")

    from statsmodels.stats.proportion import proportion_confint
    worst = 0.0
    for correct, n in [(0, 1), (1, 1), (3, 7), (58, 58), (117, 494), (999, 1000), (1, 100000)]:
        lo, hi = proportion_confint(correct, n, alpha=0.05, method="wilson")
        w = graft.wilson(correct, n)
        worst = max(worst, abs(w["lo"] - lo), abs(w["hi"] - hi))
    check(worst <= 1e-12, f"wilson equals statsmodels' Wilson interval (max |difference| {worst:.1e})")


def check_client(graft, args):
    client = graft.Client(args.address, token=args.token)
    submitted = client.submit(args.config, overrides=args.set)
    job_id = submitted["job_id"]
    check(job_id.startswith("j-") and submitted["sweep_id"] == "", f"submit: {job_id}")
    events = list(client.watch(job_id, timeout=300))
    check(events and events[0]["type"] == "state", "watch: the first event is the job's state")
    points = [e for e in events if e["type"] == "point"]
    steps = [p["step"] for p in points]
    check(steps == sorted(steps) and len(steps) >= 2, f"watch: {len(steps)} points in step order")
    check(events[-1]["type"] == "state" and events[-1]["job"]["state"] == "succeeded",
          "watch: ends with the job succeeded")
    job = client.get(job_id)
    check(job["state"] == "succeeded" and isinstance(job["result"], dict) and "iia_held_out" in job["result"],
          "get: succeeded, with result parsed")
    listed = client.list()
    check(job_id in [j["id"] for j in listed], f"list: {len(listed)} jobs, {job_id} among them")
    check(job_id in [j["id"] for j in client.list(state="succeeded")], "list(state='succeeded') has it")
    stored = client.metrics(job_id)
    check([m["step"] for m in stored] == steps and
          [m["iia_held_out"] for m in stored] == [p["metrics"]["iia_held_out"] for p in points],
          "metrics: the watched points, step for step")
    out_dir = os.path.join(args.work, "fetched")
    written = client.fetch(job_id, out_dir)
    check({"weights.pt", "metrics.jsonl", "result.json", "spec.yaml"} <= set(written), f"fetch: {sorted(written)}")
    with open(written["result.json"], "rb") as f:
        check(json.loads(f.read()) == job["result"], "fetch: result.json equals get()'s result")
    digest = hashlib.sha256(open(written["weights.pt"], "rb").read()).hexdigest()
    check(len(digest) == 64, f"fetch: weights.pt sha256 {digest[:16]}... (verified against graftd's)")
    fetched = graft.load_run(out_dir, frame=False)
    check([m["step"] for m in fetched.metrics] == steps, "load_run of the fetched directory: the stored curve")
    for call, code in [(lambda: client.get("j-999999"), "NOT_FOUND"),
                       (lambda: graft.Client(args.address, token="not-a-token").get(job_id), "UNAUTHENTICATED")]:
        try:
            call()
            check(False, f"GraftError {code} expected")
        except graft.GraftError as e:
            check(e.code == code, f"GraftError {e.code}: {e.message[:60]}")
    try:
        client.submit(None, text="name: x\nseed: [\n")
        check(False, "a bad config is refused")
    except graft.GraftError as e:
        check(e.code == "INVALID_ARGUMENT" and e.message.startswith("config.yaml:"),
              f"a bad config: {e.code} {e.message.splitlines()[0]}")
    client.close()


def check_tls(graft, args):
    """graftd with mutual TLS: the client with ca_file, cert_file and key_file submits and reads a
    job; without its certificate, or without TLS, it is refused (UNAVAILABLE, as gRPC reports a
    failed handshake)."""
    with graft.Client(args.tls_address, token=args.token, ca_file=args.ca_file, cert_file=args.cert,
                      key_file=args.key) as client:
        job_id = client.submit(args.config, overrides=args.set)["job_id"]
        check(client.get(job_id)["state"] in ("queued", "running"), f"TLS: submitted {job_id} and read it back")
    for label, kwargs in [("without a client certificate", {"ca_file": args.ca_file}),
                          ("in plaintext", {"ca_file": ""})]:
        try:
            with graft.Client(args.tls_address, token=args.token, timeout=10, **kwargs) as client:
                client.get(job_id)
            check(False, f"TLS: a client {label} is refused")
        except graft.GraftError as e:
            check(e.code == "UNAVAILABLE", f"TLS: a client {label} is refused ({e.code})")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--package-dir", required=True)
    ap.add_argument("--run-dir")
    ap.add_argument("--work", default=None)
    ap.add_argument("--address")
    ap.add_argument("--token")
    ap.add_argument("--config")
    ap.add_argument("--set", action="append", default=[])
    ap.add_argument("--tls-address", help="a graftd serving mutual TLS (with --ca-file, --cert, --key)")
    ap.add_argument("--ca-file")
    ap.add_argument("--cert")
    ap.add_argument("--key")
    args = ap.parse_args()
    args.work = args.work or args.run_dir or "."
    sys.path.insert(0, args.package_dir)
    try:
        import torch
        import graft
        import pandas  # noqa: F401 (the DataFrame path must be checked, so pandas must be there)
        import statsmodels  # noqa: F401
    except ImportError as e:  # a missing module is a failure, never a skip
        print(f"check_graft_package: cannot import ({e}); install Debian's python3-torch, python3-yaml, "
              f"python3-pandas, python3-statsmodels and python3-grpcio, build the target graft_python")
        return 1
    check(os.path.dirname(graft.__file__) == os.path.join(os.path.abspath(args.package_dir), "graft"),
          f"graft imported from {os.path.dirname(graft.__file__)}")
    if args.run_dir:
        check_run(graft, torch, args.run_dir)
    if args.address:
        check_client(graft, args)
    if args.tls_address:
        check_tls(graft, args)
    print(f"graft package: {checks['passed']} checks passed, {checks['failed']} failed")
    return 0 if checks["failed"] == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
