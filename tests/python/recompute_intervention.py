#!/usr/bin/python3
"""Independent float64 recomputation of a graft network's base and intervened logits (MLP or
transformer).

Usage: /usr/bin/python3 recompute_intervention.py RUN_DIR [--recount]

RUN_DIR holds what graft wrote after training:
  spec.yaml    the resolved job spec. Used: algorithm.inputs (name -> domain: a list of symbols,
               {range: [lo, hi]} or bool), algorithm.output (its classes, when listed),
               network.embedding.dim, network.hidden, network.activation (relu | gelu | tanh),
               alignment (variable -> {layer: K, units: [unit indices]}), and
               training.interventions (the intervention sets, each a list of aligned
               variables; a set's name is its variables in declaration order joined by '+').
               With --recount also algorithm.mechanisms and algorithm.output's expression.
  weights.pt   LibTorch's torch::pickle_save of a c10::Dict<std::string, Tensor>, which
               torch.load returns as a plain dict. Exactly these keys: embed.<input> [values, dim]
               for each input, hidden.<k>.weight [out, in] and hidden.<k>.bias [out] for each
               hidden layer k, out.weight [classes, last width], out.bias [classes].
  logits.json   {"inputs": [...], "sets": [...], "triples": [{"base": [value index per input],
               "source": [...], "set": name}], "base_logits": [[...]], "intervened_logits":
               [[...]]}, one logits row per triple. Its "sets" list is not read: which
               variables a set intervenes on comes from spec.yaml's training.interventions.
  result.json  only with --recount: the final held-out figures graft reported.

For a transformer (network.type: transformer) spec.yaml gives network.width, network.layers,
network.heads, network.mlp_width and network.activation, and each alignment entry
{layer: K, position: NAME or [NAMES], units: [...]}; weights.pt holds exactly embed.<input>
[values, width], pos [tokens, width], readout [width], block.<k>.ln1.weight|bias,
block.<k>.attn.in_proj.weight [3 width, width] and .bias [3 width], block.<k>.attn.out_proj.weight
[width, width] and .bias, block.<k>.ln2.weight|bias, block.<k>.mlp.fc.weight [mlp_width, width]
and .bias, block.<k>.mlp.proj.weight [width, mlp_width] and .bias, ln_final.weight|bias,
out.weight [classes, width], out.bias (the README's table).

The MLP, recomputed here with NumPy in float64 from the weights alone:
  x   = concatenation over inputs (in declaration order) of embed.<input>[value index]
  h_k = act(W_k h_{k-1} + b_k), h_{-1} = x;  logits = out.weight @ h_last + out.bias
  gelu is the exact form x * 0.5 * (1 + erf(x / sqrt(2))) (scipy.special.erf).
The transformer, from the same formulas written out (NumPy, float64):
  tokens t = 0..I-1 are the inputs in declaration order, token I is the readout:
  x_t = embed.<input t>[value index] + pos[t],  x_I = readout + pos[I]
  per block k:  x = x + Attn(LN1(x));  x = x + MLP(LN2(x)), where
    LN(z) = (z - mean(z)) / sqrt(var(z) + 1e-5) * weight + bias (population variance, per token)
    [q | k | v] = z @ in_proj.weight^T + in_proj.bias (rows of in_proj.weight: q, then k, then v)
    per head h of d = width / heads columns: A_h = softmax(q_h k_h^T / sqrt(d)) over all tokens
    Attn(z) = concat_h(A_h v_h) @ out_proj.weight^T + out_proj.bias
    MLP(z) = act(z @ fc.weight^T + fc.bias) @ proj.weight^T + proj.bias
  logits = out.weight @ LN_final(x_I) + out.bias
  Layer k is the residual stream after block k; an aligned site (position p, unit u) is
  x_p[u] there.
The interchange intervention (base b, source s, set V): run s and keep its activations h^s_k;
run b, and for k from 0 upward, after computing h_k overwrite the units of every variable of V
aligned at layer k with h^s_k at those units, then continue from the overwritten h_k.
Only the weights, the raw input value indices, the source choices, and the alignment and the
sets of the config are used; no activation graft computed is read.

Checks: weights match the spec exactly (keys and shapes); both logits agree with the dump's
within 1e-5 absolute; and at least one triple's intervened logits differ from its base logits
by more than 1e-3, so agreement is not vacuous.

--recount (the dump must hold every held-out evaluation triple, so run with
evaluation.triples <= the dump's 64): the labels are recomputed from the config's algorithm,
its expressions parsed by check_expressions.py's Translator (the documented grammar, evaluated
by Python) and run in dependency order: the base label is the output on the base input; the
counterfactual label is the output on the base input with the set's variables taking the
values they take on the source (an interchange intervention). A triple is changed when the two
labels differ, and correct when the argmax of the recomputed intervened logits is the
counterfactual label's class. The counts must equal result.json's iia_held_out,
iia_changed_held_out and iia_by_set (correct and n) and unchanged_floor (unchanged / n), so
the changed-case count is recounted from the labels, not derived from unchanged_floor.

Exit codes: 0 agreement, 1 any mismatch, failed assertion, malformed input or missing module.
"""

import json
import math
import os
import re
import sys

TOLERANCE = 1e-5       # |graft float32 logit - float64 recomputation|
MIN_EFFECT = 1e-3      # some intervention must move some logit by more than this


class CheckFailed(Exception):
    pass


def require(condition, message):
    if not condition:
        raise CheckFailed(message)


def import_modules():
    modules = {}
    for name in ("numpy", "scipy.special", "torch", "yaml"):
        try:
            modules[name] = __import__(name, fromlist=["_"])
        except ImportError as e:  # a missing module is a failure, never a skip
            print(f"recompute_intervention: cannot import {name} ({e}); install Debian's python3-numpy, "
                  f"python3-scipy, python3-torch and python3-yaml and run with /usr/bin/python3",
                  file=sys.stderr)
            sys.exit(1)
    return modules


def spec_loader(yaml):
    """A safe loader where only true/false are booleans (YAML 1.2 core schema), so symbols such
    as `yes`, `no`, `on` and `off` stay text as graft reads them."""

    class Loader(yaml.SafeLoader):
        pass

    Loader.yaml_implicit_resolvers = {
        first: [(tag, rx) for tag, rx in resolvers if tag != "tag:yaml.org,2002:bool"]
        for first, resolvers in yaml.SafeLoader.yaml_implicit_resolvers.items()
    }
    Loader.add_implicit_resolver("tag:yaml.org,2002:bool", re.compile(r"^(?:true|false)$"), list("tf"))
    return Loader


def domain_size(name, domain):
    if isinstance(domain, list):
        require(len(domain) > 0, f"spec.yaml: algorithm.inputs.{name}: empty list of values")
        return len(domain)
    if domain == "bool":
        return 2
    if isinstance(domain, dict) and set(domain) == {"range"}:
        r = domain["range"]
        require(isinstance(r, list) and len(r) == 2 and all(isinstance(v, int) for v in r) and r[0] <= r[1],
                f"spec.yaml: algorithm.inputs.{name}.range: expected [lo, hi] with lo <= hi, got {r!r}")
        return r[1] - r[0] + 1
    raise CheckFailed(f"spec.yaml: algorithm.inputs.{name}: unknown domain {domain!r}")


def parse_units(variable, units):
    if isinstance(units, int) and not isinstance(units, bool):
        return [units]
    if isinstance(units, str):
        m = re.fullmatch(r"(\d+)-(\d+)", units)
        require(m is not None, f"spec.yaml: alignment.{variable}.units: expected a list, got {units!r}")
        return list(range(int(m.group(1)), int(m.group(2)) + 1))
    require(isinstance(units, list) and units and all(isinstance(u, int) and not isinstance(u, bool) for u in units),
            f"spec.yaml: alignment.{variable}.units: expected a non-empty list of unit indices, got {units!r}")
    return list(units)


def read_spec(run_dir, yaml):
    path = os.path.join(run_dir, "spec.yaml")
    with open(path, encoding="utf-8") as f:
        spec = yaml.load(f, Loader=spec_loader(yaml))
    require(isinstance(spec, dict), f"{path}: expected a map")
    try:
        algo = spec["algorithm"]
        inputs = algo["inputs"]
        net = spec["network"]
        kind = net["type"]
        activation = net["activation"]
        transformer = None
        if kind == "transformer":
            transformer = {k: net[k] for k in ("width", "layers", "heads", "mlp_width")}
            dim = transformer["width"]
            hidden = None
        else:
            dim = net["embedding"]["dim"]
            hidden = net["hidden"]
    except (KeyError, TypeError) as e:
        raise CheckFailed(f"{path}: missing key {e}") from None
    require(kind in ("mlp", "transformer"), f"{path}: unknown network.type {kind!r}")
    require(isinstance(inputs, dict) and inputs, f"{path}: algorithm.inputs must be a non-empty map")
    require(isinstance(dim, int) and dim > 0, f"{path}: the embedding width must be a positive integer")
    if transformer is not None:
        require(all(isinstance(v, int) and v > 0 for v in transformer.values()),
                f"{path}: network.width, layers, heads and mlp_width must be positive integers")
        require(transformer["width"] % transformer["heads"] == 0, f"{path}: width not divisible by heads")
        # The site layers as columns of the flattened residual stream: tokens x width.
        hidden_columns = [(len(inputs) + 1) * dim] * transformer["layers"]
    else:
        require(isinstance(hidden, list) and hidden and all(isinstance(w, int) and w > 0 for w in hidden),
                f"{path}: network.hidden must be a non-empty list of positive widths")
        hidden_columns = hidden
    require(activation in ("relu", "gelu", "tanh"), f"{path}: unknown network.activation {activation!r}")
    names = [str(n) for n in inputs]
    sizes = [domain_size(str(n), d) for n, d in inputs.items()]

    classes = None
    output = algo.get("output")
    if isinstance(output, dict) and len(output) == 1:
        (_, out_decl), = output.items()
        if isinstance(out_decl, dict) and isinstance(out_decl.get("classes"), list):
            classes = len(out_decl["classes"])

    alignment = {}
    for variable, site in (spec.get("alignment") or {}).items():
        require(isinstance(site, dict) and "layer" in site and "units" in site,
                f"{path}: alignment.{variable}: expected {{layer, units}}")
        layer = site["layer"]
        require(isinstance(layer, int) and 0 <= layer < len(hidden_columns),
                f"{path}: alignment.{variable}.layer {layer!r} is not one of the network's {len(hidden_columns)} layers")
        units = parse_units(variable, site["units"])
        if transformer is not None:
            positions = site.get("position")
            positions = positions if isinstance(positions, list) else [positions]
            tokens = names + ["readout"]
            require(all(p in tokens for p in positions),
                    f"{path}: alignment.{variable}.position {positions!r} names no token of {tokens}")
            require(all(0 <= u < dim for u in units),
                    f"{path}: alignment.{variable}.units {units} fall outside the width {dim}")
            units = sorted(tokens.index(p) * dim + u for p in positions for u in units)
        require(all(0 <= u < hidden_columns[layer] for u in units),
                f"{path}: alignment.{variable}.units {units} fall outside layer {layer} (width {hidden_columns[layer]})")
        alignment[str(variable)] = (layer, units)

    # The algorithm's expressions and declaration order (inputs, then mechanisms).
    mechanisms = algo.get("mechanisms") or {}
    require(isinstance(mechanisms, dict), f"{path}: algorithm.mechanisms must be a map")
    exprs = {}
    symbols = set()
    for n, d in inputs.items():
        if isinstance(d, list):
            symbols.update(str(x) for x in d)
    for m, decl in mechanisms.items():
        expr = decl.get("expr") if isinstance(decl, dict) else decl
        require(isinstance(expr, str), f"{path}: algorithm.mechanisms.{m}: expected an expression")
        exprs[str(m)] = expr
        if isinstance(decl, dict) and isinstance(decl.get("domain"), list):
            symbols.update(str(x) for x in decl["domain"])
    declared = names + list(exprs)
    output_name, output_expr, class_names = None, None, None
    if isinstance(output, dict) and len(output) == 1:
        (output_name, out_decl), = output.items()
        output_name = str(output_name)
        output_expr = out_decl.get("expr") if isinstance(out_decl, dict) else out_decl
        if isinstance(out_decl, dict) and isinstance(out_decl.get("classes"), list):
            class_names = [str(c) for c in out_decl["classes"]]
            symbols.update(class_names)

    # The intervention sets, named as graft names them.
    interventions = (spec.get("training") or {}).get("interventions")
    require(isinstance(interventions, list) and interventions,
            f"{path}: training.interventions must be a non-empty list of lists of aligned variables")
    sets = {}
    for k, group in enumerate(interventions):
        require(isinstance(group, list) and group and all(isinstance(v, str) for v in group),
                f"{path}: training.interventions[{k}]: expected a non-empty list of variable names, got {group!r}")
        for v in group:
            require(v in alignment, f"{path}: training.interventions[{k}] names {v!r}, which is not aligned")
        ordered = sorted(set(group), key=declared.index)
        sets["+".join(ordered)] = ordered

    return {"names": names, "sizes": sizes, "dim": dim, "hidden": hidden, "activation": activation,
            "transformer": transformer,
            "classes": classes, "alignment": alignment, "sets": sets, "inputs": inputs, "exprs": exprs,
            "symbols": symbols, "output_name": output_name, "output_expr": output_expr,
            "class_names": class_names, "path": path}


def read_weights(run_dir, spec, np, torch):
    path = os.path.join(run_dir, "weights.pt")
    loaded = torch.load(path, map_location="cpu")
    require(type(loaded) is dict, f"{path}: torch.load gave {type(loaded).__name__}, expected a plain dict")
    for k, v in loaded.items():
        require(isinstance(k, str) and isinstance(v, torch.Tensor), f"{path}: entry {k!r} is not a named tensor")

    out_weight = loaded.get("out.weight")
    require(out_weight is not None and out_weight.dim() == 2, f"{path}: needs a 2-d 'out.weight'")
    num_classes = out_weight.shape[0]
    if spec["classes"] is not None:
        require(num_classes == spec["classes"],
                f"{path}: out.weight has {num_classes} classes, the spec's output lists {spec['classes']}")

    expected = {}
    for name, size in zip(spec["names"], spec["sizes"]):
        expected[f"embed.{name}"] = (size, spec["dim"])
    if spec["transformer"] is not None:
        t = spec["transformer"]
        w, m = t["width"], t["mlp_width"]
        expected["pos"] = (len(spec["names"]) + 1, w)
        expected["readout"] = (w,)
        for k in range(t["layers"]):
            p = f"block.{k}."
            expected.update({p + "ln1.weight": (w,), p + "ln1.bias": (w,),
                             p + "attn.in_proj.weight": (3 * w, w), p + "attn.in_proj.bias": (3 * w,),
                             p + "attn.out_proj.weight": (w, w), p + "attn.out_proj.bias": (w,),
                             p + "ln2.weight": (w,), p + "ln2.bias": (w,),
                             p + "mlp.fc.weight": (m, w), p + "mlp.fc.bias": (m,),
                             p + "mlp.proj.weight": (w, m), p + "mlp.proj.bias": (w,)})
        expected["ln_final.weight"] = (w,)
        expected["ln_final.bias"] = (w,)
        width_in = w
    else:
        width_in = len(spec["names"]) * spec["dim"]
        for k, width in enumerate(spec["hidden"]):
            expected[f"hidden.{k}.weight"] = (width, width_in)
            expected[f"hidden.{k}.bias"] = (width,)
            width_in = width
    expected["out.weight"] = (num_classes, width_in)
    expected["out.bias"] = (num_classes,)

    missing = sorted(set(expected) - set(loaded))
    extra = sorted(set(loaded) - set(expected))
    require(not missing and not extra, f"{path}: keys differ from the spec: missing {missing}, unexpected {extra}")
    for key, shape in expected.items():
        got = tuple(loaded[key].shape)
        require(got == shape, f"{path}: {key} has shape {list(got)}, expected {list(shape)}")
    return {k: loaded[k].detach().to(torch.float64).numpy().copy() for k in expected}, num_classes


def activation_function(kind, np, erf):
    if kind == "relu":
        return lambda x: np.maximum(x, 0.0)
    if kind == "tanh":
        return np.tanh
    return lambda x: x * 0.5 * (1.0 + erf(x / math.sqrt(2.0)))


def main(argv):
    recount = "--recount" in argv[1:]
    args = [a for a in argv[1:] if a != "--recount"]
    if len(args) != 1:
        print("usage: recompute_intervention.py RUN_DIR [--recount]", file=sys.stderr)
        return 1
    run_dir = args[0]
    mods = import_modules()
    np, torch, yaml = mods["numpy"], mods["torch"], mods["yaml"]
    erf = mods["scipy.special"].erf
    try:
        spec = read_spec(run_dir, yaml)
        weights, num_classes = read_weights(run_dir, spec, np, torch)
        with open(os.path.join(run_dir, "logits.json"), encoding="utf-8") as f:
            dump = json.load(f)
        status, inter_mine = check(spec, weights, num_classes, dump, np,
                                   activation_function(spec["activation"], np, erf))
        if recount:
            with open(os.path.join(run_dir, "result.json"), encoding="utf-8") as f:
                result = json.load(f)
            status = max(status, recount_labels(spec, dump, inter_mine, result, np))
        return status
    except CheckFailed as e:
        print(f"recompute_intervention: FAILED: {e}", file=sys.stderr)
        return 1
    except (OSError, ValueError, KeyError, TypeError, RuntimeError, yaml.YAMLError) as e:
        print(f"recompute_intervention: FAILED: {type(e).__name__}: {e}", file=sys.stderr)
        return 1


def check(spec, weights, num_classes, dump, np, act):
    names = spec["names"]
    require(dump.get("inputs") == names, f"logits.json: inputs {dump.get('inputs')} differ from the spec's {names}")
    sets = spec["sets"]  # from the config, not from the dump
    triples = dump["triples"]
    require(len(triples) > 0, "logits.json: no triples")
    base_dumped = np.asarray(dump["base_logits"], dtype=np.float64)
    inter_dumped = np.asarray(dump["intervened_logits"], dtype=np.float64)
    for label, arr in (("base_logits", base_dumped), ("intervened_logits", inter_dumped)):
        require(arr.shape == (len(triples), num_classes),
                f"logits.json: {label} has shape {list(arr.shape)}, expected [{len(triples)}, {num_classes}]")
        require(np.all(np.isfinite(arr)), f"logits.json: {label} has non-finite values")

    embed = [weights[f"embed.{n}"] for n in names]
    head_w, head_b = weights["out.weight"], weights["out.bias"]

    def indices(triple, key):
        values = triple[key]
        require(isinstance(values, list) and len(values) == len(names),
                f"logits.json: triple {key} {values!r} needs one value index per input")
        for v, size, n in zip(values, spec["sizes"], names):
            require(isinstance(v, int) and 0 <= v < size, f"logits.json: {key} value {v!r} of {n} is not in [0, {size})")
        return values

    def embed_row(values):
        return np.concatenate([e[v] for e, v in zip(embed, values)])

    def run_mlp(values, overwrite=None):
        """Activations of every layer and the logits; `overwrite[k]` = (units, values) at layer k."""
        layers = [(weights[f"hidden.{k}.weight"], weights[f"hidden.{k}.bias"]) for k in range(len(spec["hidden"]))]
        h = embed_row(values)
        acts = []
        for k, (w, b) in enumerate(layers):
            h = act(w @ h + b)
            if overwrite and k in overwrite:
                h = h.copy()
                for units, src in overwrite[k]:
                    h[units] = src[units]
            acts.append(h)
        return acts, head_w @ h + head_b

    def layer_norm(z, prefix):
        mean = z.mean(axis=-1, keepdims=True)
        var = ((z - mean) ** 2).mean(axis=-1, keepdims=True)
        return (z - mean) / np.sqrt(var + 1e-5) * weights[prefix + ".weight"] + weights[prefix + ".bias"]

    def softmax(z):
        e = np.exp(z - z.max(axis=-1, keepdims=True))
        return e / e.sum(axis=-1, keepdims=True)

    def run_transformer(values, overwrite=None):
        """The residual stream after every block, flattened [tokens * width], and the logits."""
        t = spec["transformer"]
        w, heads = t["width"], t["heads"]
        d = w // heads
        x = np.stack([e[v] for e, v in zip(embed, values)] + [weights["readout"]]) + weights["pos"]
        acts = []
        for k in range(t["layers"]):
            p = f"block.{k}."
            z = layer_norm(x, p + "ln1")
            qkv = z @ weights[p + "attn.in_proj.weight"].T + weights[p + "attn.in_proj.bias"]
            q, key, v = qkv[:, :w], qkv[:, w:2 * w], qkv[:, 2 * w:]
            context = np.concatenate([softmax(q[:, h * d:(h + 1) * d] @ key[:, h * d:(h + 1) * d].T / math.sqrt(d))
                                      @ v[:, h * d:(h + 1) * d] for h in range(heads)], axis=1)
            x = x + context @ weights[p + "attn.out_proj.weight"].T + weights[p + "attn.out_proj.bias"]
            z = layer_norm(x, p + "ln2")
            hidden = act(z @ weights[p + "mlp.fc.weight"].T + weights[p + "mlp.fc.bias"])
            x = x + hidden @ weights[p + "mlp.proj.weight"].T + weights[p + "mlp.proj.bias"]
            flat = x.reshape(-1).copy()
            if overwrite and k in overwrite:
                for units, src in overwrite[k]:
                    flat[units] = src[units]
                x = flat.reshape(x.shape)
            acts.append(flat)
        return acts, head_w @ layer_norm(x[-1], "ln_final") + head_b

    run = run_transformer if spec["transformer"] is not None else run_mlp

    base_mine = np.empty_like(base_dumped)
    inter_mine = np.empty_like(inter_dumped)
    for i, t in enumerate(triples):
        require(t["set"] in sets, f"logits.json: triple {i} uses set {t['set']!r}, which is not one of the "
                                  f"config's training.interventions {sorted(sets)}")
        b, s = indices(t, "base"), indices(t, "source")
        source_acts, _ = run(s)
        overwrite = {}
        for v in sets[t["set"]]:
            layer, units = spec["alignment"][v]
            overwrite.setdefault(layer, []).append((units, source_acts[layer]))
        _, base_mine[i] = run(b)
        _, inter_mine[i] = run(b, overwrite)

    d_base = np.abs(base_mine - base_dumped)
    d_inter = np.abs(inter_mine - inter_dumped)
    print(f"max |diff| base={d_base.max():.3g} intervened={d_inter.max():.3g} over {len(triples)} triples")
    ok = True
    for label, diff in (("base", d_base), ("intervened", d_inter)):
        bad = np.argwhere(diff > TOLERANCE)
        for i, c in bad[:10]:
            mine = base_mine if label == "base" else inter_mine
            theirs = base_dumped if label == "base" else inter_dumped
            print(f"  {label} logits of triple {i} class {c}: graft {theirs[i, c]!r}, recomputed {mine[i, c]!r}")
        if len(bad):
            print(f"MISMATCH: {len(bad)} {label} logits differ by more than {TOLERANCE}")
            ok = False
    effect = np.abs(inter_mine - base_mine).max(axis=1)
    moved = int(np.sum(effect > MIN_EFFECT))
    print(f"{moved} of {len(triples)} triples: the intervention moves a logit by more than {MIN_EFFECT}")
    if moved == 0:
        print("FAILED: no intervention changes any logit; the check would be vacuous")
        ok = False
    return (0 if ok else 1), inter_mine


def recount_labels(spec, dump, inter_mine, result, np):
    """Recounts result.json's held-out IIA figures from labels computed here (see --recount)."""
    import check_expressions as ce  # beside this script: the independent expression parser

    triples = dump["triples"]
    total = result["iia_held_out"]["n"]
    require(len(triples) == total,
            f"--recount: logits.json holds {len(triples)} of the {total} evaluation triples; run with "
            f"evaluation.triples <= {len(triples)} so it holds them all")
    require(spec["output_expr"] is not None and spec["class_names"] is not None,
            f"{spec['path']}: --recount needs algorithm.output with its expression and classes")
    names = spec["names"]
    values_of = []  # per input: the value of each value index
    for n in names:
        d = spec["inputs"][n]
        if isinstance(d, list):
            values_of.append([str(x) for x in d])
        elif d == "bool":
            values_of.append([0.0, 1.0])
        else:
            values_of.append([float(v) for v in range(d["range"][0], d["range"][1] + 1)])
    exprs = dict(spec["exprs"])
    exprs[spec["output_name"]] = spec["output_expr"]
    variables = {n: "symbol" if isinstance(v[0], str) else "number" for n, v in zip(names, values_of)}
    variables.update({m: "any" for m in exprs})
    try:
        code = {m: compile(ce.Translator(e, variables, spec["symbols"]).translate(), f"<{m}>", "eval")
                for m, e in exprs.items()}
    except ce.Malformed as e:
        raise CheckFailed(f"--recount: cannot parse the algorithm's expressions: {e}") from None
    env = {"__builtins__": {"min": min, "max": max, "abs": abs, "int": int, "float": float,
                            "_and": ce._and, "_or": ce._or}}

    def evaluate(indices, fixed):
        """All variables' values on the input with these value indices; `fixed` overrides."""
        V = {n: values_of[k][i] for k, (n, i) in enumerate(zip(names, indices))}
        V.update(fixed)
        pending = [m for m in exprs if m not in V]
        while pending:
            progress = False
            for m in list(pending):
                try:
                    V[m] = eval(code[m], env, {"V": V})
                except KeyError:  # a parent not computed yet
                    continue
                pending.remove(m)
                progress = True
            require(progress, f"--recount: cannot order the mechanisms {pending}")
        return V

    def class_of(value):
        if isinstance(value, str):
            require(value in spec["class_names"], f"--recount: output value {value!r} is not a class")
            return spec["class_names"].index(value)
        require(float(value) == int(value) and 0 <= int(value) < len(spec["class_names"]),
                f"--recount: output value {value!r} is not a class index")
        return int(value)

    out = spec["output_name"]
    predicted = np.argmax(inter_mine, axis=1)
    counts = {"correct": 0, "changed": 0, "changed_correct": 0}
    by_set = {}
    for i, t in enumerate(triples):
        base = evaluate(t["base"], {})
        source = evaluate(t["source"], {})
        counterfactual = evaluate(t["base"], {v: source[v] for v in spec["sets"][t["set"]]})
        changed = counterfactual[out] != base[out]
        correct = int(predicted[i]) == class_of(counterfactual[out])
        counts["correct"] += correct
        counts["changed"] += changed
        counts["changed_correct"] += changed and correct
        c, n = by_set.get(t["set"], (0, 0))
        by_set[t["set"]] = (c + correct, n + 1)
    unchanged_floor = (total - counts["changed"]) / total
    print(f"recounted from the labels: {counts['correct']}/{total} correct, {counts['changed']} changed "
          f"({counts['changed_correct']} of them correct), unchanged floor {unchanged_floor:.6g}")
    mismatches = []

    def compare(label, mine, theirs):
        if mine != theirs:
            mismatches.append(f"{label}: recounted {mine}, result.json says {theirs}")

    compare("iia_held_out (correct, n)", (counts["correct"], total),
            (result["iia_held_out"]["correct"], result["iia_held_out"]["n"]))
    compare("iia_changed_held_out (correct, n)", (counts["changed_correct"], counts["changed"]),
            (result["iia_changed_held_out"]["correct"], result["iia_changed_held_out"]["n"]))
    for name in sorted(set(by_set) | set(result["iia_by_set"])):
        theirs = result["iia_by_set"].get(name, {})
        compare(f"iia_by_set.{name} (correct, n)", by_set.get(name, (0, 0)), (theirs.get("correct"), theirs.get("n")))
    if abs(unchanged_floor - result["unchanged_floor"]) > 1e-12:
        mismatches.append(f"unchanged_floor: recounted {unchanged_floor!r}, result.json says "
                          f"{result['unchanged_floor']!r}")
    for m in mismatches:
        print("MISMATCH: " + m)
    return 1 if mismatches else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
