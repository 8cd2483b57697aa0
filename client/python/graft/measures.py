"""IIA on given triples, with the 95% Wilson interval graft reports beside every accuracy."""

import math

import torch

from graft.networks import interchange

# The two-sided 95% normal quantile, as graft uses (trainer/eval/wilson.h).
Z95 = 1.9599639845400545


def wilson(correct, n, z=Z95):
    """{"value", "lo", "hi", "correct", "n"}: the proportion with its Wilson score interval
    (Wilson 1927); n = 0 gives value 0 and the interval [0, 1]."""
    if n == 0:
        return {"value": 0.0, "lo": 0.0, "hi": 1.0, "correct": 0, "n": 0}
    p = correct / n
    denom = 1 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    return {"value": p, "lo": max(0.0, centre - half), "hi": min(1.0, centre + half), "correct": correct, "n": n}


def _label_index(label, classes):
    if isinstance(label, int):
        return label
    if classes is None:
        raise ValueError(f"label {label!r} is a symbol; pass classes=")
    return classes.index(str(label))


def iia(module, triples, sites, classes=None, encode=None, batch=4096):
    """Interchange intervention accuracy of `module` on `triples`.

    triples: dicts with "base" and "source" (value indices per input, or {input: symbol} when
             `encode` turns one into indices, e.g. Run.encode), "set" (the intervention set's
             name), "expected" (the counterfactual label: a class index, or a symbol of
             `classes`) and optionally "base_label" (the base's own label), which gives the
             changed-case figure.
    sites:   {set name: [site, ...]}, e.g. Run.set_sites().
    Returns {"iia": accuracy, "changed": accuracy or None, "by_set": {set: accuracy},
    "predicted": [class index per triple]}, each accuracy as wilson() gives it.
    """
    triples = list(triples)
    predicted = [None] * len(triples)
    by_set = {}
    for i, t in enumerate(triples):
        by_set.setdefault(t["set"], []).append(i)
    for name, idx in by_set.items():
        if name not in sites:
            raise KeyError(f"set '{name}' has no sites; known: {sorted(sites)}")
        for start in range(0, len(idx), batch):
            chunk = idx[start:start + batch]
            rows = [triples[i] for i in chunk]
            enc = encode if encode is not None else (lambda x: x)
            base = torch.tensor([enc(t["base"]) for t in rows], dtype=torch.long)
            source = torch.tensor([enc(t["source"]) for t in rows], dtype=torch.long)
            logits = interchange(module, base, source, sites[name])
            for i, p in zip(chunk, logits.argmax(dim=1).tolist()):
                predicted[i] = p
    correct = [predicted[i] == _label_index(t["expected"], classes) for i, t in enumerate(triples)]
    out = {"iia": wilson(sum(correct), len(triples)), "by_set": {}, "predicted": predicted}
    for name, idx in by_set.items():
        out["by_set"][name] = wilson(sum(correct[i] for i in idx), len(idx))
    if triples and all("base_label" in t for t in triples):
        changed = [i for i, t in enumerate(triples)
                   if _label_index(t["base_label"], classes) != _label_index(t["expected"], classes)]
        out["changed"] = wilson(sum(correct[i] for i in changed), len(changed))
    else:
        out["changed"] = None
    return out
