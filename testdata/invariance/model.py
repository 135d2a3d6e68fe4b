"""A small transformer stack for heed's causal-invariance fixtures.

Attention goes through torch.nn.MultiheadAttention with need_weights=False, so
the forward pass never hands back attention probabilities: only layer outputs
(caught with forward hooks) and logits can be exported, which is the situation
the invariance check is for. A boolean attn_mask follows PyTorch's convention
(True = may NOT attend; a [batch*heads, L, L] mask gives each head its own).
"""

import torch
from torch import nn


class Layer(nn.Module):
    """Pre-norm transformer layer: x + attn(ln(x)), then x + mlp(ln(x))."""

    def __init__(self, d, heads, ff):
        super().__init__()
        self.ln1 = nn.LayerNorm(d)
        self.attn = nn.MultiheadAttention(d, heads, batch_first=True)
        self.ln2 = nn.LayerNorm(d)
        self.mlp = nn.Sequential(nn.Linear(d, ff), nn.GELU(), nn.Linear(ff, d))
        self.blocked = None  # set per call by Stack.forward
        self.want_weights = False
        self.weights = None

    def forward(self, x):
        h = self.ln1(x)
        a, w = self.attn(h, h, h, attn_mask=self.blocked, need_weights=self.want_weights,
                         average_attn_weights=False)
        self.weights = w
        x = x + a
        return x + self.mlp(self.ln2(x))


class Stack(nn.Module):
    """Token + position embeddings, layers, final norm and an output head.

    mask(layer, batch, length) returns the boolean attn_mask of one layer
    (True = blocked), either [L, L] or [batch*heads, L, L].
    """

    def __init__(self, vocab, d=16, heads=4, ff=32, layers=4, max_len=64, mask=None):
        super().__init__()
        self.heads = heads
        self.tok = nn.Embedding(vocab, d)
        self.pos = nn.Embedding(max_len, d)
        self.layers = nn.ModuleList(Layer(d, heads, ff) for _ in range(layers))
        self.ln = nn.LayerNorm(d)
        self.head = nn.Linear(d, vocab)
        self.mask = mask if mask is not None else causal_mask

    def forward(self, ids):
        b, n = ids.shape
        x = self.tok(ids) + self.pos(torch.arange(n, device=ids.device))[None]
        for i, layer in enumerate(self.layers):
            layer.blocked = self.mask(i, b, n, self.heads)
            x = layer(x)
        return self.head(self.ln(x))


def causal_mask(layer, batch, n, heads):
    """The correct causal mask: query q may see keys k <= q."""
    return torch.triu(torch.ones(n, n, dtype=torch.bool), diagonal=1)


def no_mask(layer, batch, n, heads):
    """Bidirectional (encoder) attention: every query sees every key."""
    return None


def leaky_mask(leak_layer, leak_head, ahead):
    """A causal mask that, in one layer and one head, lets query q also see
    the next `ahead` keys (k <= q + ahead): the kind of off-by-N bug a fused
    path's own mask construction can have while the eager path is correct."""

    def mask(layer, batch, n, heads):
        base = torch.triu(torch.ones(n, n, dtype=torch.bool), diagonal=1)
        if layer != leak_layer:
            return base
        per_head = base.repeat(batch * heads, 1, 1).view(batch, heads, n, n)
        per_head[:, leak_head] = torch.triu(torch.ones(n, n, dtype=torch.bool), diagonal=1 + ahead)
        return per_head.reshape(batch * heads, n, n)

    return mask


def run(model, ids, want_weights=False):
    """One forward pass without autograd: layer outputs [layer, batch, pos,
    feature] caught by forward hooks, logits [batch, pos, vocab] and, when
    asked, per-head attention [layer, batch, head, q, k] (None otherwise)."""
    outs = []
    hooks = [m.register_forward_hook(lambda mod, inp, out: outs.append(out.detach()))
             for m in model.layers]
    for m in model.layers:
        m.want_weights = want_weights
    try:
        with torch.no_grad():
            logits = model(ids)
    finally:
        for h in hooks:
            h.remove()
    attn = None
    if want_weights:
        attn = torch.stack([m.weights for m in model.layers])
    return torch.stack(outs), logits, attn
