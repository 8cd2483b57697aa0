#!/usr/bin/python3
"""The eager-PyTorch peer of graft's transformer IIT step, written the way a researcher would:
torch.nn modules (nn.Embedding, nn.LayerNorm, nn.MultiheadAttention, nn.Linear), a forward that
can patch the residual stream after a block, and three forward passes per step (base, source,
intervened), Adam, one thread.

The task is configs/ferry-boarding.yaml's (nine inputs of 8 levels; heavy = cargo > deck at
deck's token, rough = wave > hull or tide == 7 at hull's token, late = arrival > cutoff at
cutoff's token, all in layer 0, units 0-15; the decision from them, crew and priority), with the
same architecture as graft's (one token per input then a readout token, learned position rows,
pre-norm blocks, LayerNorm eps 1e-5, logits from the readout token). Base inputs are drawn
uniformly from the 8^9 space, sources are the batch permuted, each example's intervention set is
one of the 7 non-empty subsets, and gradients flow through the source run, as in graft's defaults.

Prints one JSON line: steps, seconds spent in the training loop (after one untimed warm-up step),
steps per second, the final losses and torch's thread count.

Usage: /usr/bin/python3 eager_transformer_iit.py [--steps 300] [--width 64] [--layers 2]
       [--heads 4] [--mlp-width 256] [--batch 256] [--seed 1]
"""
import argparse
import itertools
import json
import time

import torch
from torch import nn

INPUTS = ["cargo", "deck", "wave", "hull", "tide", "arrival", "cutoff", "crew", "priority"]
LEVELS = 8
CLASSES = 5  # board, wait, escort, next, hold
SITES = {"heavy": INPUTS.index("deck"), "rough": INPUTS.index("hull"), "late": INPUTS.index("cutoff")}
UNITS = slice(0, 16)


class Block(nn.Module):
    def __init__(self, width, heads, mlp_width):
        super().__init__()
        self.ln1 = nn.LayerNorm(width, eps=1e-5)
        self.attn = nn.MultiheadAttention(width, heads, batch_first=True)
        self.ln2 = nn.LayerNorm(width, eps=1e-5)
        self.fc = nn.Linear(width, mlp_width)
        self.proj = nn.Linear(mlp_width, width)

    def forward(self, x):
        h = self.ln1(x)
        x = x + self.attn(h, h, h, need_weights=False)[0]
        return x + self.proj(nn.functional.gelu(self.fc(self.ln2(x))))


class TokenTransformer(nn.Module):
    def __init__(self, width, layers, heads, mlp_width):
        super().__init__()
        self.embed = nn.ModuleList(nn.Embedding(LEVELS, width) for _ in INPUTS)
        self.pos = nn.Parameter(torch.randn(len(INPUTS) + 1, width))
        self.readout = nn.Parameter(torch.randn(width))
        self.blocks = nn.ModuleList(Block(width, heads, mlp_width) for _ in range(layers))
        self.ln_final = nn.LayerNorm(width, eps=1e-5)
        self.out = nn.Linear(width, CLASSES)

    def forward(self, x, patch=None, keep=None):
        """x: [B, 9] value indices. patch: (layer, mask [B, T, W], values [B, T, W]) overwrites
        the residual stream after that block; keep: a layer whose stream is returned too."""
        tokens = [e(x[:, i]) for i, e in enumerate(self.embed)]
        tokens.append(self.readout.expand(x.shape[0], -1))
        h = torch.stack(tokens, 1) + self.pos
        kept = None
        for k, block in enumerate(self.blocks):
            h = block(h)
            if patch is not None and patch[0] == k:
                h = torch.where(patch[1], patch[2], h)
            if keep == k:
                kept = h
        return self.out(self.ln_final(h[:, -1])), kept


def mechanisms(x):
    c = {n: x[:, i] for i, n in enumerate(INPUTS)}
    return {"heavy": c["cargo"] > c["deck"], "rough": (c["wave"] > c["hull"]) | (c["tide"] == 7),
            "late": c["arrival"] > c["cutoff"]}


def decide(v, x):
    crew, priority = x[:, INPUTS.index("crew")], x[:, INPUTS.index("priority")]
    board, wait, escort, nxt, hold = range(5)
    late = torch.where(priority >= 5, board, nxt)
    rough = torch.where(crew >= 4, escort, wait)
    calm = torch.where(v["late"], late, torch.full_like(late, board))
    return torch.where(v["heavy"], torch.full_like(calm, hold), torch.where(v["rough"], rough, calm))


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--steps", type=int, default=300)
    ap.add_argument("--width", type=int, default=64)
    ap.add_argument("--layers", type=int, default=2)
    ap.add_argument("--heads", type=int, default=4)
    ap.add_argument("--mlp-width", type=int, default=256)
    ap.add_argument("--batch", type=int, default=256)
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args()
    torch.set_num_threads(1)
    torch.manual_seed(args.seed)
    net = TokenTransformer(args.width, args.layers, args.heads, args.mlp_width)
    opt = torch.optim.Adam(net.parameters(), lr=1e-3)
    names = list(SITES)
    subsets = [s for r in (1, 2, 3) for s in itertools.combinations(names, r)]
    tokens = len(INPUTS) + 1
    # Per set: which [T, W] entries the intervention overwrites.
    set_masks = torch.zeros(len(subsets), tokens, args.width, dtype=torch.bool)
    for i, s in enumerate(subsets):
        for n in s:
            set_masks[i, SITES[n], UNITS] = True
    member = torch.tensor([[n in s for n in names] for s in subsets])
    ce = nn.CrossEntropyLoss()

    def step():
        x = torch.randint(LEVELS, (args.batch, len(INPUTS)))
        perm = torch.randperm(args.batch)
        src = x[perm]
        sets = torch.randint(len(subsets), (args.batch,))
        vb, vs = mechanisms(x), mechanisms(src)
        mixed = {n: torch.where(member[sets, j], vs[n], vb[n]) for j, n in enumerate(names)}
        y, y_cf = decide(vb, x), decide(mixed, x)
        base_logits, _ = net(x)                              # pass 1: base
        _, source_stream = net(src, keep=0)                  # pass 2: source
        iit_logits, _ = net(x, patch=(0, set_masks[sets], source_stream))  # pass 3: intervened
        loss_task, loss_iit = ce(base_logits, y), ce(iit_logits, y_cf)
        opt.zero_grad()
        (loss_task + loss_iit).backward()
        opt.step()
        return loss_task.item(), loss_iit.item()

    step()  # warm-up, untimed
    t0 = time.perf_counter()
    for _ in range(args.steps):
        losses = step()
    seconds = time.perf_counter() - t0
    print(json.dumps({"steps": args.steps, "loop_s": seconds, "steps_per_s": args.steps / seconds,
                      "loss_task": losses[0], "loss_interchange": losses[1], "torch_threads": torch.get_num_threads(),
                      "torch": torch.__version__}))


if __name__ == "__main__":
    main()
