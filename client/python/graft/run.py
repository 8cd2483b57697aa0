"""A run directory (written by `graft-worker run`, or fetched with `graft fetch` / Client.fetch)
loaded for a notebook: the resolved spec, the metrics, the result, the failing triples and the
trained network as a torch.nn.Module."""

import json
import os
import re

import torch
import yaml

from graft.networks import build_network, domain_values, output_classes


def _spec_loader():
    """A safe loader where only true/false are booleans (YAML 1.2's core schema, as graft reads
    YAML), so symbols such as `yes`, `no`, `on` and `off` stay text."""

    class Loader(yaml.SafeLoader):
        pass

    Loader.yaml_implicit_resolvers = {
        first: [(tag, rx) for tag, rx in resolvers if tag != "tag:yaml.org,2002:bool"]
        for first, resolvers in yaml.SafeLoader.yaml_implicit_resolvers.items()
    }
    Loader.add_implicit_resolver("tag:yaml.org,2002:bool", re.compile(r"^(?:true|false)$"), list("tf"))
    return Loader


def load_spec(text):
    """spec.yaml's text as a dict, read as graft reads it."""
    return yaml.load(text, Loader=_spec_loader())


def _read_jsonl(path):
    rows = []
    if not os.path.exists(path):
        return rows
    with open(path) as f:
        for number, line in enumerate(f, 1):
            line = line.strip()
            if not line:
                continue
            try:
                rows.append(json.loads(line))
            except json.JSONDecodeError as e:
                raise ValueError(f"{path}:{number}: not a JSON line ({e})") from None
    return rows


def metrics_frame(rows):
    """A pandas DataFrame of metrics rows with dotted columns ("acc_held_out.value",
    "iia_by_set.local.lo", ...), as `graft metrics` names them; ImportError without pandas."""
    import pandas
    return pandas.json_normalize(rows, sep=".")


class Run:
    """What a run directory holds.

    spec      the resolved spec (spec.yaml) as a dict
    metrics   one dict per evaluation (metrics.jsonl), or a pandas DataFrame (see load_run)
    result    result.json as a dict (None before the run finished)
    failures  failing held-out triples in symbols (failures.jsonl)
    module    the trained network (weights.pt) as a torch.nn.Module in eval mode
    """

    def __init__(self, directory, spec, metrics, result, failures, module):
        self.directory = directory
        self.spec = spec
        self.metrics = metrics
        self.result = result
        self.failures = failures
        self.module = module

    @property
    def input_names(self):
        return list(self.spec["algorithm"]["inputs"])

    @property
    def classes(self):
        return output_classes(self.spec)

    def encode(self, assignment):
        """Value indices (graft's order) of one input given as {input: symbol} (or already a list)."""
        if not isinstance(assignment, dict):
            return [int(v) for v in assignment]
        row = []
        for name in self.input_names:
            values = domain_values(self.spec["algorithm"]["inputs"][name])
            symbol = assignment[name]
            symbol = ("true" if symbol else "false") if isinstance(symbol, bool) else str(symbol)
            if symbol not in values:
                raise ValueError(f"input {name}: '{symbol}' is not one of {values}")
            row.append(values.index(symbol))
        return row

    def encode_many(self, assignments):
        return torch.tensor([self.encode(a) for a in assignments], dtype=torch.long)

    def sites(self, variables):
        """The alignment's sites of the given variables, as interchange() takes them."""
        alignment = self.spec["alignment"]
        return [dict(alignment[v]) for v in variables]

    def set_sites(self):
        """{set name: sites} for every intervention set of the spec, named as graft names them
        (the set's variables in declaration order joined by '+')."""
        order = list(self.spec["algorithm"]["inputs"]) + list(self.spec["algorithm"].get("mechanisms") or {})
        out = {}
        for variables in self.spec["training"]["interventions"]:
            ordered = sorted(variables, key=lambda v: order.index(v) if v in order else len(order))
            out["+".join(ordered)] = self.sites(ordered)
        return out

    def iia(self, triples):
        """graft.iia on this run's network, sites, classes and input encoding."""
        from graft.measures import iia
        return iia(self.module, triples, self.set_sites(), classes=self.classes, encode=self.encode)


def load_run(directory, frame=None, weights="weights.pt"):
    """Loads a run directory. `frame`: True gives metrics as a pandas DataFrame (pandas must be
    installed), False a list of dicts, None (default) a DataFrame when pandas can be imported.
    The network is rebuilt for spec `network.type` (graft.networks.NETWORK_KINDS) and given
    the weights of `weights` (a file name in the directory); it is None when that file is absent."""
    with open(os.path.join(directory, "spec.yaml")) as f:
        spec = load_spec(f.read())
    rows = _read_jsonl(os.path.join(directory, "metrics.jsonl"))
    if frame is None:
        try:
            metrics = metrics_frame(rows)
        except ImportError:
            metrics = rows
    elif frame:
        metrics = metrics_frame(rows)
    else:
        metrics = rows
    result = None
    result_path = os.path.join(directory, "result.json")
    if os.path.exists(result_path):
        with open(result_path) as f:
            result = json.load(f)
    failures = _read_jsonl(os.path.join(directory, "failures.jsonl"))
    module = None
    weights_path = os.path.join(directory, weights)
    if os.path.exists(weights_path):
        module = build_network(spec)
        # LibTorch's pickle needs the full unpickler (PyTorch 2.6 and later default to weights_only).
        state = torch.load(weights_path, weights_only=False)
        state = {k: v.to(torch.float32) for k, v in dict(state).items()}
        missing = set(module.state_dict()) - set(state)
        extra = set(state) - set(module.state_dict())
        if missing or extra:
            raise ValueError(f"{weights_path} does not fit spec.yaml's network: missing {sorted(missing)}, "
                             f"not part of it {sorted(extra)}")
        module.load_state_dict(state)
        module.eval()
    return Run(directory, spec, metrics, result, failures, module)
