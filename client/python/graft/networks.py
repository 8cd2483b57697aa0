"""graft's networks rebuilt as torch.nn.Module from weights.pt, and interchange interventions on them.

A network kind is one builder in NETWORK_KINDS: it takes the resolved spec (a dict) and returns a
module whose state_dict keys are the names of graft's weights.pt (README, "The files in DIR"), so
`module.load_state_dict(weights)` fills it. Every module has:

    forward(inputs)                      logits [B, classes] from value indices [B, inputs] (int64)
    interchange(base, source, sites)     logits of base with the sites' units taken from source

A site is a dict as in the spec's alignment: {"layer": K, "units": [unit indices]} (a sequence
kind adds its own keys, e.g. a position). To add a kind: write its module with these two
methods, and register `NETWORK_KINDS["kind"] = builder`.
"""

import math

import torch


def _activation(name):
    if name == "relu":
        return torch.relu
    if name == "gelu":
        # graft uses LibTorch's default gelu, the exact erf form.
        return lambda x: torch.nn.functional.gelu(x)
    if name == "tanh":
        return torch.tanh
    raise ValueError(f"network.activation '{name}': expected relu, gelu or tanh")


class GraftMlp(torch.nn.Module):
    """graft's MLP: per-input embeddings concatenated in declaration order, hidden layers
    h_k = act(W_k h_{k-1} + b_k), and a linear head. Layer k's activation (after the
    nonlinearity) is what an alignment at layer k names."""

    def __init__(self, input_names, input_sizes, dim, hidden, activation, classes):
        super().__init__()
        self.input_names = list(input_names)
        self.embed = torch.nn.ParameterDict(
            {name: torch.nn.Parameter(torch.zeros(size, dim)) for name, size in zip(input_names, input_sizes)})
        widths = [dim * len(input_names)] + list(hidden)
        self.hidden = torch.nn.ModuleList(torch.nn.Linear(widths[k], widths[k + 1]) for k in range(len(hidden)))
        self.out = torch.nn.Linear(widths[-1], classes)
        self.activation_name = activation
        self._act = _activation(activation)

    def embed_inputs(self, inputs):
        inputs = torch.as_tensor(inputs, dtype=torch.long)
        if inputs.dim() == 1:
            inputs = inputs.unsqueeze(0)
        return torch.cat([self.embed[name][inputs[:, i]] for i, name in enumerate(self.input_names)], dim=1)

    def layers(self, inputs):
        """The activation of every hidden layer, in order."""
        h = self.embed_inputs(inputs)
        out = []
        for layer in self.hidden:
            h = self._act(layer(h))
            out.append(h)
        return out

    def forward(self, inputs):
        return self.out(self.layers(inputs)[-1])

    def interchange(self, base, source, sites):
        """Runs `source` and records its activations; runs `base` layer by layer and, after
        computing layer k, overwrites the units of every site at layer k with the source's,
        then goes on from the overwritten layer. Returns the intervened logits."""
        recorded = self.layers(source)
        by_layer = {}
        for site in sites:
            k = int(site["layer"])
            if not 0 <= k < len(self.hidden):
                raise ValueError(f"site layer {k}: the network has hidden layers 0-{len(self.hidden) - 1}")
            by_layer.setdefault(k, []).extend(int(u) for u in site["units"])
        h = self.embed_inputs(base)
        for k, layer in enumerate(self.hidden):
            h = self._act(layer(h))
            if k in by_layer:
                units = torch.tensor(sorted(set(by_layer[k])), dtype=torch.long)
                h = h.clone()
                h[:, units] = recorded[k][:, units]
        return self.out(h)


class _Attention(torch.nn.Module):
    def __init__(self, width, heads):
        super().__init__()
        self.heads = heads
        self.in_proj = torch.nn.Linear(width, 3 * width)   # rows: q, then k, then v
        self.out_proj = torch.nn.Linear(width, width)

    def forward(self, z):
        b, t, w = z.shape
        d = w // self.heads
        q, k, v = self.in_proj(z).split(w, dim=2)
        split = lambda x: x.view(b, t, self.heads, d).transpose(1, 2)  # noqa: E731
        scores = split(q) @ split(k).transpose(2, 3) / math.sqrt(d)
        context = (torch.softmax(scores, dim=3) @ split(v)).transpose(1, 2).reshape(b, t, w)
        return self.out_proj(context)


class _Mlp(torch.nn.Module):
    def __init__(self, width, mlp_width, act):
        super().__init__()
        self.fc = torch.nn.Linear(width, mlp_width)
        self.proj = torch.nn.Linear(mlp_width, width)
        self._act = act

    def forward(self, z):
        return self.proj(self._act(self.fc(z)))


class _Block(torch.nn.Module):
    def __init__(self, width, heads, mlp_width, act):
        super().__init__()
        self.ln1 = torch.nn.LayerNorm(width, eps=1e-5)
        self.attn = _Attention(width, heads)
        self.ln2 = torch.nn.LayerNorm(width, eps=1e-5)
        self.mlp = _Mlp(width, mlp_width, act)

    def forward(self, x):
        x = x + self.attn(self.ln1(x))
        return x + self.mlp(self.ln2(x))


class GraftTransformer(torch.nn.Module):
    """graft's transformer: one token per input (declaration order) and a readout token, each
    its embedding (the readout's learned vector) plus a learned position; pre-norm blocks
    x = x + Attn(LN1(x)); x = x + MLP(LN2(x)); logits from LN_final of the readout token. Layer k
    is the residual stream after block k; a site names tokens by `position` (an input's name or
    "readout", or a list of them) and units of that stream."""

    def __init__(self, input_names, input_sizes, width, layers, heads, mlp_width, activation, classes):
        super().__init__()
        self.input_names = list(input_names)
        act = _activation(activation)
        self.embed = torch.nn.ParameterDict(
            {name: torch.nn.Parameter(torch.zeros(size, width)) for name, size in zip(input_names, input_sizes)})
        self.pos = torch.nn.Parameter(torch.zeros(len(input_names) + 1, width))
        self.readout = torch.nn.Parameter(torch.zeros(width))
        self.block = torch.nn.ModuleList(_Block(width, heads, mlp_width, act) for _ in range(layers))
        self.ln_final = torch.nn.LayerNorm(width, eps=1e-5)
        self.out = torch.nn.Linear(width, classes)

    def _tokens(self, inputs):
        inputs = torch.as_tensor(inputs, dtype=torch.long)
        if inputs.dim() == 1:
            inputs = inputs.unsqueeze(0)
        rows = [self.embed[name][inputs[:, i]] for i, name in enumerate(self.input_names)]
        rows.append(self.readout.expand(inputs.shape[0], -1))
        return torch.stack(rows, dim=1) + self.pos

    def token_of(self, position):
        if position == "readout":
            return len(self.input_names)
        if position not in self.input_names:
            raise ValueError(f"position '{position}': expected an input ({self.input_names}) or readout")
        return self.input_names.index(position)

    def layers(self, inputs):
        x = self._tokens(inputs)
        out = []
        for block in self.block:
            x = block(x)
            out.append(x)
        return out

    def forward(self, inputs):
        return self.out(self.ln_final(self.layers(inputs)[-1][:, -1]))

    def interchange(self, base, source, sites):
        recorded = self.layers(source)
        by_layer = {}
        for site in sites:
            k = int(site["layer"])
            if not 0 <= k < len(self.block):
                raise ValueError(f"site layer {k}: the network has blocks 0-{len(self.block) - 1}")
            positions = site.get("positions", site.get("position", "readout"))
            positions = [positions] if isinstance(positions, str) else list(positions)
            for p in positions:
                by_layer.setdefault(k, []).append((self.token_of(p), [int(u) for u in site["units"]]))
        x = self._tokens(base)
        for k, block in enumerate(self.block):
            x = block(x)
            if k in by_layer:
                x = x.clone()
                for token, units in by_layer[k]:
                    u = torch.tensor(units, dtype=torch.long)
                    x[:, token, u] = recorded[k][:, token, u]
        return self.out(self.ln_final(x[:, -1]))


def domain_values(domain):
    """The values of an input's domain in graft's index order: symbols as listed, a range from
    lo to hi, bool false then true."""
    if isinstance(domain, list):
        return [str(v) for v in domain]
    if domain == "bool":
        return ["false", "true"]
    if isinstance(domain, dict) and "range" in domain:
        lo, hi = domain["range"]
        return [str(v) for v in range(int(lo), int(hi) + 1)]
    raise ValueError(f"unknown input domain {domain!r}")


def build_mlp(spec):
    net = spec["network"]
    inputs = spec["algorithm"]["inputs"]
    names = list(inputs)
    sizes = [len(domain_values(inputs[n])) for n in names]
    return GraftMlp(names, sizes, int(net["embedding"]["dim"]), [int(h) for h in net["hidden"]],
                    net.get("activation", "relu"), len(output_classes(spec)))


def build_transformer(spec):
    net = spec["network"]
    inputs = spec["algorithm"]["inputs"]
    names = list(inputs)
    sizes = [len(domain_values(inputs[n])) for n in names]
    return GraftTransformer(names, sizes, int(net["width"]), int(net["layers"]), int(net["heads"]),
                            int(net["mlp_width"]), net.get("activation", "gelu"), len(output_classes(spec)))


def output_classes(spec):
    """The output variable's classes in graft's order (the listed `classes`)."""
    output = spec["algorithm"]["output"]
    (name, body), = output.items()
    if isinstance(body, dict) and "classes" in body:
        return [str(c) for c in body["classes"]]
    raise ValueError(f"the output '{name}' lists no classes in spec.yaml; pass classes= explicitly")


# The network kinds this package rebuilds, by spec `network.type`. A kind graft adds is one more
# entry here with a module that has forward() and interchange().
NETWORK_KINDS = {"mlp": build_mlp, "transformer": build_transformer}


def build_network(spec):
    kind = spec["network"]["type"]
    if kind not in NETWORK_KINDS:
        raise NotImplementedError(
            f"network.type '{kind}': this graft package rebuilds {sorted(NETWORK_KINDS)}; "
            f"add a builder to graft.networks.NETWORK_KINDS")
    return NETWORK_KINDS[kind](spec)


def interchange(module, base, source, sites):
    """The interchange intervention on `module`: logits of the `base` inputs with the units of
    `sites` (a list of {"layer", "units"} dicts) set to their values on the `source` inputs.
    `base` and `source` are value indices [B, inputs] (int64) or one row."""
    with torch.no_grad():
        return module.interchange(torch.as_tensor(base, dtype=torch.long), torch.as_tensor(source, dtype=torch.long),
                                  list(sites))
