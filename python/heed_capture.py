"""heed_capture: record a live PyTorch model's attention as a heed-export/1 file.

One file; needs torch (1.13 or later) and numpy. Usage:

    import heed_capture
    with heed_capture.record(model, "run.npz", tokens={"source": src_words, "target": tgt_words}) as rec:
        out = model(src, tgt, ...)     # the forward
        loss.backward()                # optional: dL/dA of every head, for head importance
    # then: heed check run.npz ; heed rank run.npz --json --prune 4 > rank.json
    heed_capture.prune(model, "rank.json")   # masks the planned heads (Michel et al. 2019)

What happens inside the block:
- every torch.nn.MultiheadAttention computes its attention explicitly (the steps
  of torch 1.13's F.multi_head_attention_forward: in-projection, scaled scores,
  masks, softmax, dropout only in train mode, A @ V, out-projection), so its
  output is unchanged within float rounding and the per-head probabilities A
  are the very tensor that enters the value product; a hook on A keeps dL/dA
  when backward runs inside the block;
- nn.TransformerEncoderLayer's fused path (eval and no grad) is turned off for
  the block, since it never calls the attention module;
- on torch >= 2.0, torch.nn.functional.scaled_dot_product_attention is replaced
  by an explicit computation for the block (attention code that imported the
  function under another name before the block is not seen);
- at the end of the block the export is written atomically (a temporary file in
  the same directory, then os.replace). When the block raises, nothing is
  written and the error propagates. Everything patched is restored in all cases.

Blocks, layers and kinds: see layout() and the README ("Export from your
model"). Pruning: prune(). heed's suggestions, including the heads a plan
prunes, are evidence to confirm by re-evaluating the model, not verdicts.
"""

import json
import math
import os
import re
import tempfile
import warnings

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

__all__ = ["record", "Recorder", "prune", "layout", "FORMAT", "PRODUCER"]

FORMAT = "heed-export/1"
PRODUCER = "heed_capture 1"
KINDS = ("causal", "bidirectional", "cross")
# A float mask value at or below this blocks the key (heed's convention for an
# additive mask: 0 = allowed, <= -1e4 or -inf = blocked).
BLOCKED_BELOW = -1e4
# Names of module lists that hold a stack of layers; dropped from block names.
_LIST_NAMES = ("layers", "layer", "h", "blocks", "block")
_DTYPE_NAMES = {torch.float32: "float32", torch.float64: "float64", torch.float16: "float16",
                torch.bfloat16: "bfloat16"}


def _torch_major():
    m = re.match(r"(\d+)", torch.__version__)
    return int(m.group(1)) if m else 0


# ---------------------------------------------------------------------------
# Layout: block and layer names from module paths (shared by record and prune)


class _Site:
    """Where one attention module sits: its block, layer and standard role."""

    def __init__(self, path, module, block, layer, role, side_q, side_k):
        self.path, self.module, self.block, self.layer = path, module, block, layer
        self.role, self.side_q, self.side_k = role, side_q, side_k

    def __repr__(self):
        return f"_Site({self.path!r} -> {self.block}:L{self.layer}, role={self.role})"


def layout(model):
    """Returns {module path: _Site} for every nn.MultiheadAttention of model.

    Rules (the README documents them):
    - the last all-digit component of a module path is its layer number: in
      `encoder.layers.3.self_attn` the container is `encoder.layers` and the
      layer 3; a trailing list name (layers, layer, h, blocks, block) is
      dropped, so the block is `encoder`; a bare list at the top of the model
      is named `encoder` / `decoder` when the model is an nn.TransformerEncoder
      / nn.TransformerDecoder, else by the list's own name;
    - when two containers get the same short name, both keep their full path;
    - a layer holding several attention modules: `self_attn` (or the first)
      names the block itself; `multihead_attn` of an nn.TransformerDecoderLayer
      is `cross` when its block is `decoder`, else `BLOCK.cross`; any other is
      `BLOCK.ATTR`;
    - a module without a layer number is the block named by its path (layer 0);
    - layers are numbered 0.. in the order of the path's layer numbers.
    Roles: `decoder_self` (nn.TransformerDecoderLayer.self_attn), `cross`
    (nn.TransformerDecoderLayer.multihead_attn), `encoder_self`
    (nn.TransformerEncoderLayer.self_attn inside an nn.Transformer's encoder),
    None otherwise (kind then follows the mask the module was given).
    """
    mods = dict(model.named_modules())
    found = [(p, m) for p, m in mods.items() if isinstance(m, nn.MultiheadAttention)]
    transformers = [p for p, m in mods.items() if isinstance(m, nn.Transformer)]
    raw = []  # (path, module, container, layer number, attr, parent)
    for path, m in found:
        parts = path.split(".") if path else []
        idx = max((i for i, p in enumerate(parts) if p.isdigit()), default=None)
        parent = mods.get(".".join(parts[:-1])) if parts else None
        if idx is None:
            raw.append((path, m, None, 0, path, parent))
            continue
        raw.append((path, m, ".".join(parts[:idx]), int(parts[idx]), ".".join(parts[idx + 1:]), parent))

    def short(container):
        parts = container.split(".") if container else []
        if len(parts) > 1 and parts[-1] in _LIST_NAMES:
            parts = parts[:-1]
        if len(parts) == 1 and parts[0] in _LIST_NAMES:
            if isinstance(model, nn.TransformerDecoder):
                return "decoder"
            if isinstance(model, nn.TransformerEncoder):
                return "encoder"
        return parts[-1] if parts else "attention"

    containers = sorted({r[2] for r in raw if r[2] is not None})
    names = {}
    for c in containers:
        s = short(c)
        clash = [o for o in containers if o != c and short(o) == s]
        names[c] = s if not clash else c
    per_layer = {}
    for path, m, c, n, attr, parent in raw:
        per_layer.setdefault((c, n), []).append(attr)
    sites = {}
    for path, m, c, n, attr, parent in raw:
        role = None
        if isinstance(parent, nn.TransformerDecoderLayer):
            role = {"self_attn": "decoder_self", "multihead_attn": "cross"}.get(attr.split(".")[-1])
        elif isinstance(parent, nn.TransformerEncoderLayer) and attr.endswith("self_attn"):
            if any(path.startswith((t + "." if t else "") + "encoder.") for t in transformers):
                role = "encoder_self"
        if c is None:
            block = path or "attention"
        else:
            block = names[c]
            attrs = per_layer[(c, n)]
            first = "self_attn" if "self_attn" in attrs else attrs[0]
            if attr != first:
                if role == "cross":
                    block = "cross" if block == "decoder" else block + ".cross"
                else:
                    block = block + "." + attr
        sites[path] = _Site(path, m, block, n, role, None, None)
    # layer numbers 0.. per block, in path order
    byblock = {}
    for s in sites.values():
        byblock.setdefault(s.block, set()).add(s.layer)
    for s in sites.values():
        s.layer = sorted(byblock[s.block]).index(s.layer)
    # sides: encoder-decoder models put the encoder on `source`
    encdec = any(s.role == "cross" for s in sites.values())
    for s in sites.values():
        if s.role == "cross":
            s.side_q, s.side_k = "target", "source"
        elif encdec and s.role == "encoder_self":
            s.side_q = s.side_k = "source"
        else:
            s.side_q = s.side_k = "target"
    return sites


_SPLIT = re.compile(r"^(.*)\.L(\d+)(?:-(\d+))?$")


def _resolve_block(name, blocks):
    """Maps a block name of an export to (base block, first layer, last layer
    or None): the name itself, or a part `BASE.La-b` / `BASE.La` written when
    the layers of BASE were given different masks."""
    if name in blocks:
        return name, 0, None
    m = _SPLIT.match(name)
    if m and m.group(1) in blocks:
        a = int(m.group(2))
        b = int(m.group(3)) if m.group(3) is not None else a
        return m.group(1), a, b
    return None


# ---------------------------------------------------------------------------
# Masks


def _blocked_of(mask, allowed_true=False):
    """A mask as a bool numpy array, True = blocked. Bool masks: True =
    blocked (nn.MultiheadAttention) or True = allowed (allowed_true, SDPA);
    uint8 as bool; float masks: <= BLOCKED_BELOW or -inf blocks."""
    m = mask.detach()
    if m.dtype == torch.uint8:
        m = m.to(torch.bool)
    if m.dtype == torch.bool:
        b = m.cpu().numpy()
        return ~b if allowed_true else b.copy()
    f = m.float().cpu().numpy()
    return (f <= BLOCKED_BELOW) | np.isneginf(f) | np.isnan(f)


def _causal_blocked(L, S, window=0):
    """True where a causal mask (queries the last L of S positions) blocks;
    with window W also keys at or before q - W."""
    q = np.arange(L)[:, None] + (S - L)
    k = np.arange(S)[None, :]
    b = k > q
    if window:
        b |= k <= q - window
    return b


def _classify(blocked):
    """Kind a [.., L, S] blocked mask shows: ("causal", W) for exactly causal
    (W = 0) or causal with a window of W keys; ("almost", 0) for a mask that
    blocks nothing at or before the query and at least half of the cells after
    it (a causal mask with a wrong offset or a hole); (None, 0) otherwise."""
    L, S = blocked.shape[-2:]
    if L != S or L < 2:
        return None, 0
    flat = blocked.reshape(-1, L, S)
    first = flat[0]
    if not (flat == first).all():
        kinds = {_classify(x) for x in flat}
        if len(kinds) == 1:
            k = kinds.pop()
            return (k[0], 0) if k[0] == "causal" and k[1] else k
        return None, 0
    causal = _causal_blocked(L, S)
    if (first == causal).all():
        return "causal", 0
    w = int((~first[-1]).sum())
    if 0 < w < L and (first == _causal_blocked(L, S, w)).all():
        return "causal", w
    upper = causal
    lower = ~causal
    if not first[lower].any() and first[upper].sum() * 2 >= upper.sum() and first[upper].any():
        return "almost", 0
    return None, 0


# ---------------------------------------------------------------------------
# The recording


class _Call:
    """One recorded attention: probabilities, gradient and what it was given."""

    def __init__(self, site, block, layer, probs, dtype):
        self.site, self.block, self.layer = site, block, layer
        self.attn = probs  # numpy [N, H, L, S]
        self.grad = None
        self.dtype = dtype  # compute dtype name
        self.blocked = None  # numpy bool [n, h, L, S] from attn_mask (n in 1, N; h in 1, H)
        self.pad = None  # numpy bool [N, S], True = padding key
        self.is_causal = False
        self.is_self = True
        self.kind = None  # given (rec.attention) or decided at write time
        self.window = None
        self.query_start = None
        self.side_q = self.side_k = "target"


class Recorder:
    """The object `with record(...) as rec` gives. See record()."""

    def __init__(self, model, path, tokens=None, kinds=None):
        if not isinstance(model, nn.Module):
            raise TypeError("heed_capture.record: model must be a torch.nn.Module")
        self.model, self.path = model, os.fspath(path)
        if tokens is not None and not isinstance(tokens, dict):
            tokens = {"target": tokens}
        self.tokens = tokens or {}
        self.kinds = dict(kinds or {})
        for k, v in self.kinds.items():
            if v not in KINDS:
                raise ValueError(f"heed_capture.record: kinds[{k!r}] = {v!r}: want one of {', '.join(KINDS)}")
        self.calls = []
        self._seen = set()
        self._custom_layers = {}
        self._restore = []
        self._stack = []
        self._logits = None
        self.written = None

    # -- public helpers --------------------------------------------------
    def attention(self, name, probs, kind=None, layer=None, query="target", key=None, allow=None,
                  window=None, query_start=None):
        """Records probabilities of custom attention code as layer `layer`
        (default: the next one) of block `name`, and returns probs unchanged.
        probs must be the tensor multiplied with the values ([batch, head,
        query, key], [head, query, key] or [query, key]) so that its gradient
        is recorded too. allow (optional, True = may attend, broadcastable to
        probs) is the mask the code used; it is written as BLOCK/allow when it
        is not exactly what the kind implies (and decides the kind when kind is
        None, as for modules without a standard role)."""
        if kind is not None and kind not in KINDS:
            raise ValueError(f"heed_capture: attention({name!r}): kind {kind!r}: want one of {', '.join(KINDS)}")
        p = probs
        while p.dim() < 4:
            p = p.unsqueeze(0)
        if p.dim() != 4:
            raise ValueError(f"heed_capture: attention({name!r}): probabilities of shape {tuple(probs.shape)}: "
                             "want [batch, head, query, key]")
        if layer is None:
            layer = self._custom_layers.get(name, 0)
        self._custom_layers[name] = max(self._custom_layers.get(name, 0), layer + 1)
        if any(c.block == name and c.layer == layer for c in self.calls):
            raise ValueError(f"heed_capture: attention({name!r}, layer={layer}) recorded twice")
        call = _Call(None, name, layer, _np(p), _DTYPE_NAMES.get(p.dtype, "float32"))
        call.kind, call.window, call.query_start = kind, window, query_start
        call.side_q, call.side_k = query, key or query
        call.is_self = (key or query) == query
        if allow is not None:
            a = torch.as_tensor(allow)
            call.blocked = _blocked_of(a, allowed_true=True)
            while call.blocked.ndim < 4:
                call.blocked = call.blocked[None]
        self._hook(p, call)
        self.calls.append(call)
        return probs

    def logits(self, t):
        """Records output logits [batch, position, vocab] as `logits`; returns t."""
        x = t.detach()
        while x.dim() < 3:
            x = x.unsqueeze(0)
        self._logits = _np(x)
        return t

    # -- context manager -------------------------------------------------
    def __enter__(self):
        sites = layout(self.model)
        self.sites = sites
        try:
            for site in sites.values():
                self._patch_mha(site)
            for m in self.model.modules():
                if isinstance(m, nn.TransformerEncoderLayer) and hasattr(m, "activation_relu_or_gelu"):
                    # its fused path (eval, no grad) never calls self_attn; the
                    # flag only decides that path
                    old = m.__dict__.get("activation_relu_or_gelu")
                    m.activation_relu_or_gelu = False
                    self._restore.append(lambda m=m, old=old: setattr(m, "activation_relu_or_gelu", old))
            if hasattr(F, "scaled_dot_product_attention"):
                self._patch_sdpa()
        except BaseException:
            self._undo()
            raise
        return self

    def __exit__(self, etype, exc, tb):
        self._undo()
        if etype is not None:
            note = f"heed_capture: nothing written to {self.path}: the recorded block raised"
            if hasattr(exc, "add_note"):
                exc.add_note(note)
            else:
                warnings.warn(note)
            return False
        self.written = self._write()
        return False

    def _undo(self):
        while self._restore:
            f = self._restore.pop()
            f()

    # -- hooks ---------------------------------------------------------------
    def _hook(self, p, call):
        if p.requires_grad:
            def keep(g, call=call):
                g = _np(g)
                call.grad = g if call.grad is None else call.grad + g
            p.register_hook(keep)

    def _patch_mha(self, site):
        mod = self.model.get_submodule(site.path) if site.path else self.model
        had = "forward" in mod.__dict__
        old = mod.__dict__.get("forward")
        rec = self

        def forward(query, key, value, key_padding_mask=None, need_weights=True, attn_mask=None,
                    average_attn_weights=True, is_causal=False):
            return rec._mha(site, mod, query, key, value, key_padding_mask, need_weights, attn_mask,
                            average_attn_weights, is_causal)

        mod.forward = forward

        def undo():
            if had:
                mod.forward = old
            else:
                del mod.forward
        self._restore.append(undo)

    def _patch_sdpa(self):
        orig = F.scaled_dot_product_attention
        rec = self
        handles = []
        def enter(mod, inp, path):
            rec._stack.append(path)  # returns None: the input is unchanged

        def leave(mod, inp, out):
            if rec._stack:
                rec._stack.pop()  # returns None: the output is unchanged

        for path, m in self.model.named_modules():
            handles.append(m.register_forward_pre_hook(lambda mod, inp, path=path: enter(mod, inp, path)))
            handles.append(m.register_forward_hook(leave))

        def sdpa(query, key, value, attn_mask=None, dropout_p=0.0, is_causal=False, scale=None, **kw):
            return rec._sdpa(query, key, value, attn_mask, dropout_p, is_causal, scale, kw)

        F.scaled_dot_product_attention = sdpa

        def undo():
            F.scaled_dot_product_attention = orig
            for h in handles:
                h.remove()
            rec._stack.clear()
        self._restore.append(undo)

    def _claim(self, key, what):
        if key in self._seen:
            raise RuntimeError(f"heed_capture: {what} ran a second time inside one record; record one forward "
                               "per `with heed_capture.record(...)` block")
        self._seen.add(key)

    # -- nn.MultiheadAttention, computed explicitly -----------------------
    def _mha(self, site, mod, query, key, value, key_padding_mask, need_weights, attn_mask,
             average_attn_weights, is_causal):
        where = site.path or "(the model)"
        if mod.bias_k is not None or mod.bias_v is not None or mod.add_zero_attn:
            raise NotImplementedError(
                f"heed_capture: {where}: bias_k/bias_v and add_zero_attn add a key that is no token of any side; "
                "heed_capture does not record such modules (record without them, or use rec.attention in your own code)")
        self._claim(("mha", site.path), f"attention module {where}")
        batched = query.dim() == 3
        bf = getattr(mod, "batch_first", False)

        def first(x):  # -> [N, seq, E]
            if not batched:
                return x.unsqueeze(0)
            return x if bf else x.transpose(0, 1)

        same_qk, same_kv = query is key, key is value
        q_in, k_in, v_in = first(query), first(key), first(value)
        kpm = key_padding_mask
        if kpm is not None and kpm.dim() == 1:
            kpm = kpm.unsqueeze(0)
        E, H = mod.embed_dim, mod.num_heads
        D = E // H
        w, b = mod.in_proj_weight, mod.in_proj_bias
        # in-projection, as torch 1.13's _in_projection_packed / _in_projection
        if mod._qkv_same_embed_dim:
            if same_qk and same_kv:
                qkv = F.linear(q_in, w, b)
                q, k, v = qkv.unflatten(-1, (3, E)).unsqueeze(0).transpose(0, -2).squeeze(-2)
            else:
                w_q, w_kv = w.split([E, 2 * E])
                b_q, b_kv = (None, None) if b is None else b.split([E, 2 * E])
                q = F.linear(q_in, w_q, b_q)
                if same_kv:
                    k, v = F.linear(k_in, w_kv, b_kv).unflatten(-1, (2, E)).unsqueeze(0).transpose(0, -2).squeeze(-2)
                else:
                    w_k, w_v = w_kv.chunk(2)
                    b_k, b_v = (None, None) if b_kv is None else b_kv.chunk(2)
                    k, v = F.linear(k_in, w_k, b_k), F.linear(v_in, w_v, b_v)
        else:
            b_q, b_k, b_v = (None, None, None) if b is None else b.chunk(3)
            q = F.linear(q_in, mod.q_proj_weight, b_q)
            k = F.linear(k_in, mod.k_proj_weight, b_k)
            v = F.linear(v_in, mod.v_proj_weight, b_v)
        N, L, _ = q.shape
        S = k.shape[1]
        q = q.reshape(N, L, H, D).transpose(1, 2)
        k = k.reshape(N, S, H, D).transpose(1, 2)
        v = v.reshape(N, S, H, D).transpose(1, 2)
        scores = torch.matmul(q / math.sqrt(D), k.transpose(-2, -1))  # [N, H, L, S]
        bias = None
        blocked = None
        if attn_mask is not None:
            m = attn_mask
            if m.dtype == torch.uint8:
                m = m.to(torch.bool)
            if m.dim() == 2:
                m4 = m.reshape(1, 1, L, S)
            elif m.dim() == 3:
                m4 = m.reshape(N, H, L, S)
            else:
                raise RuntimeError(f"heed_capture: {where}: attn_mask of {m.dim()} dimensions is not supported")
            blocked = _blocked_of(m4)
            if m4.dtype == torch.bool:
                bias = torch.zeros(m4.shape, dtype=scores.dtype, device=scores.device).masked_fill(m4, float("-inf"))
            else:
                bias = m4.to(scores.dtype)
        elif is_causal:
            blocked = _causal_blocked(L, S)[None, None]
            bias = torch.zeros((1, 1, L, S), dtype=scores.dtype, device=scores.device).masked_fill(
                torch.from_numpy(blocked).to(scores.device), float("-inf"))
        pad = None
        if kpm is not None:
            pad = _blocked_of(kpm)
            if kpm.dtype == torch.bool or kpm.dtype == torch.uint8:
                kb = torch.zeros((N, 1, 1, S), dtype=scores.dtype, device=scores.device).masked_fill(
                    kpm.to(torch.bool).reshape(N, 1, 1, S), float("-inf"))
            else:
                kb = kpm.to(scores.dtype).reshape(N, 1, 1, S)
            bias = kb if bias is None else bias + kb
        if bias is not None:
            scores = scores + bias
        A = F.softmax(scores, dim=-1)
        if mod.training and mod.dropout > 0:
            A = F.dropout(A, p=mod.dropout, training=True)
        out = torch.matmul(A, v).transpose(1, 2).reshape(N, L, E)
        out = F.linear(out, mod.out_proj.weight, mod.out_proj.bias)
        if not batched:
            out = out.squeeze(0)
        elif not bf:
            out = out.transpose(0, 1)

        call = _Call(site, site.block, site.layer, _np(A), _DTYPE_NAMES.get(scores.dtype, str(scores.dtype)))
        call.blocked, call.pad = blocked, pad
        call.is_causal = bool(is_causal) and attn_mask is None
        call.is_self = same_qk
        self._hook(A, call)
        self.calls.append(call)

        weights = None
        if need_weights:
            weights = A.sum(dim=1) / H if average_attn_weights else A
            if not batched:
                weights = weights.squeeze(0)
        return out, weights

    # -- torch >= 2.0: F.scaled_dot_product_attention, computed explicitly ---
    def _sdpa(self, query, key, value, attn_mask, dropout_p, is_causal, scale, kw):
        enable_gqa = kw.pop("enable_gqa", False)
        if kw:
            raise TypeError(f"heed_capture: scaled_dot_product_attention: unknown arguments {sorted(kw)}")
        path = self._stack[-1] if self._stack else ""
        sites = getattr(self, "_sdpa_sites", None)
        if sites is None:
            sites = self._sdpa_sites = {}
        n = sites.setdefault(path, 0)
        sites[path] = n + 1
        block, layer = _sdpa_site(path, n)
        L, S, Eq = query.shape[-2], key.shape[-2], query.shape[-1]
        k, v = key, value
        if enable_gqa and key.dim() >= 3 and key.shape[-3] != query.shape[-3]:
            rep = query.shape[-3] // key.shape[-3]
            k = key.repeat_interleave(rep, dim=-3)
            v = value.repeat_interleave(rep, dim=-3)
        sc = 1 / math.sqrt(Eq) if scale is None else scale
        scores = torch.matmul(query, k.transpose(-2, -1)) * sc
        blocked = None
        if is_causal:
            c = torch.ones(L, S, dtype=torch.bool, device=query.device).tril(diagonal=0)
            scores = scores.masked_fill(~c, float("-inf"))
            blocked = ~c.cpu().numpy()
        if attn_mask is not None:
            if attn_mask.dtype == torch.bool:
                scores = scores.masked_fill(~attn_mask, float("-inf"))
            else:
                scores = scores + attn_mask
            b = _blocked_of(attn_mask, allowed_true=True)
            blocked = b if blocked is None else (b | blocked)
        A = F.softmax(scores, dim=-1)
        if dropout_p > 0:
            A = F.dropout(A, p=dropout_p, training=True)
        out = torch.matmul(A, v)
        p4 = A
        while p4.dim() < 4:
            p4 = p4.unsqueeze(0)
        call = _Call(None, block, layer, _np(p4), _DTYPE_NAMES.get(scores.dtype, str(scores.dtype)))
        call.sdpa_path = path
        if blocked is not None:
            while blocked.ndim < 4:
                blocked = blocked[None]
            call.blocked = blocked
        call.is_causal = bool(is_causal) and attn_mask is None
        call.is_self = L == S
        self._hook(A, call)
        self.calls.append(call)
        return out

    # -- writing -------------------------------------------------------------
    def _decide(self, call):
        """Sets kind, window, sides and whether BLOCK/allow is needed."""
        site = call.site
        if site is not None:
            call.side_q, call.side_k = site.side_q, site.side_k
        L, S = call.attn.shape[-2:]
        over = None
        for key in ([site.path, site.block] if site is not None else []) + [call.block]:
            if key in self.kinds:
                over = self.kinds[key]
                break
        shown, win = (None, 0)
        if call.blocked is not None:
            shown, win = _classify(call.blocked)
        role = {"decoder_self": "causal", "cross": "cross", "encoder_self": "bidirectional"}.get(
            site.role if site is not None else None)
        if over is not None:
            kind = over
        elif call.kind is not None:
            kind = call.kind
        elif role is not None:
            kind = role
        elif call.is_causal or shown in ("causal", "almost"):
            kind = "causal"
        elif call.is_self and L == S:
            kind = "bidirectional"
        else:
            kind = "cross"
        call.kind = kind
        if call.window is None and kind == "causal" and shown == "causal" and win:
            call.window = win
        if kind == "cross" and site is not None and site.role is None:
            call.side_k = "source"
        # what the kind implies, against what the model was given
        implied = _causal_blocked(L, S, call.window or 0) if kind == "causal" else np.zeros((L, S), bool)
        if call.blocked is None:
            given = None if kind != "causal" or call.is_causal else np.zeros((1, 1, L, S), bool)
            call.need_allow = given is not None
            call.given = given
        else:
            call.given = call.blocked
            call.need_allow = not (call.blocked == implied).all()

    def _arrays(self):
        if not self.calls:
            raise RuntimeError(f"heed_capture: nothing to write to {self.path}: no attention ran inside the block "
                               "(no nn.MultiheadAttention called, no rec.attention)")
        for c in self.calls:
            self._decide(c)
        # group by block, then split where layers differ in what they were given
        byblock = {}
        for c in self.calls:
            byblock.setdefault(c.block, []).append(c)
        arrays, blocks = {}, {}
        sides_valid = {}
        dtypes = []
        side_alias = {}
        for name, calls in byblock.items():
            calls.sort(key=lambda c: c.layer)
            runs, cur = [], []
            for c in calls:
                if cur and (c.layer != cur[-1].layer + 1 or _sig(c) != _sig(cur[0])):
                    runs.append(cur)
                    cur = []
                cur.append(c)
            runs.append(cur)
            total = max(c.layer for c in calls) + 1
            for run in runs:
                a, z = run[0].layer, run[-1].layer
                bname = name
                if len(runs) > 1 or a != 0 or z != total - 1 or (run[0].site is not None and _layers_of(self.sites, name) != z + 1):
                    bname = f"{name}.L{a}" if a == z else f"{name}.L{a}-{z}"
                c0 = run[0]
                side_q, side_k = c0.side_q, c0.side_k
                # valid/SIDE from the padding the keys were given
                if c0.pad is not None:
                    valid = (~c0.pad).astype(np.int8)
                    prev = sides_valid.get(side_k)
                    if prev is not None and not np.array_equal(prev, valid):
                        alias = f"{side_k}.{bname}"
                        side_alias[alias] = side_k
                        if side_q == side_k:
                            side_q = alias
                        side_k = alias
                    sides_valid.setdefault(side_k, valid)
                store = np.float64 if c0.dtype == "float64" else np.float32
                for i, c in enumerate(run):
                    arrays[f"{bname}/attn/{i}"] = c.attn.astype(store)
                if all(c.grad is not None for c in run):
                    for i, c in enumerate(run):
                        arrays[f"{bname}/grad/{i}"] = c.grad.astype(store)
                elif any(c.grad is not None for c in run):
                    warnings.warn(f"heed_capture: {bname}: gradients reached only some layers; none written for it")
                if c0.need_allow:
                    blocked = c0.given
                    if c0.pad is not None:
                        blocked = blocked | c0.pad[:, None, None, :]
                    arrays[f"{bname}/allow"] = ~blocked
                meta = {"kind": c0.kind, "query": side_q, "key": side_k, "axes": "batch head query key",
                        "compute_dtype": c0.dtype}
                if c0.window:
                    meta["window"] = int(c0.window)
                if c0.query_start is not None:
                    meta["query_start"] = c0.query_start
                blocks[bname] = meta
                dtypes.append(c0.dtype)
        for side, valid in sides_valid.items():
            arrays[f"valid/{side}"] = valid
        for side, toks in self.tokens.items():
            arr = _tokens(side, toks)
            arrays[f"tokens/{side}"] = arr
            for alias, base in side_alias.items():
                if base == side:
                    arrays[f"tokens/{alias}"] = arr
        for side, valid in sides_valid.items():
            t = arrays.get(f"tokens/{side}")
            if t is not None and t.ndim == 2 and t.shape != valid.shape:
                raise ValueError(f"heed_capture: tokens[{side!r}] has shape {t.shape}, the model's padding mask of "
                                 f"that side {valid.shape}: give padded [batch][seq] tokens")
        if self._logits is not None:
            arrays["logits"] = self._logits
        top = max(set(dtypes), key=dtypes.count)
        meta = {"format": FORMAT, "producer": PRODUCER, "compute_dtype": top, "blocks": blocks}
        return arrays, meta

    def _write(self):
        arrays, meta = self._arrays()
        path = self.path
        d = os.path.dirname(os.path.abspath(path))
        fd, tmp = tempfile.mkstemp(prefix=".heed-capture-", suffix=".tmp", dir=d)
        try:
            with os.fdopen(fd, "wb") as f:
                if path.endswith(".safetensors"):
                    _write_safetensors(f, arrays, meta)
                else:
                    arrays = dict(arrays)
                    arrays["meta"] = np.array(json.dumps(meta))
                    np.savez(f, **arrays)
                f.flush()
                os.fsync(f.fileno())
            # mkstemp makes the file 0600; give it the mode a plain open()
            # would (0666 less the umask), so that colleagues can read it
            mask = os.umask(0)
            os.umask(mask)
            os.chmod(tmp, 0o666 & ~mask)
            os.replace(tmp, path)
        except BaseException:
            try:
                os.unlink(tmp)
            except OSError:
                pass
            raise
        return meta


def _layers_of(sites, block):
    n = {s.layer for s in sites.values() if s.block == block}
    return len(n) if n else None


def _sig(c):
    """What a layer was given; layers of a block that differ here are written
    as separate blocks."""
    def b(x):
        return None if x is None else (x.shape, x.tobytes())
    return (c.kind, c.window, c.side_q, c.side_k, c.dtype, c.attn.shape, c.need_allow,
            b(c.given) if c.need_allow else None, b(c.pad), json.dumps(c.query_start))


def _sdpa_site(path, n):
    """Block and layer of the n-th F.scaled_dot_product_attention call made
    inside the module at path: named like an attention module at that path."""
    parts = path.split(".") if path else []
    idx = max((i for i, p in enumerate(parts) if p.isdigit()), default=None)
    if idx is None:
        return (path or "attention"), n
    c = parts[:idx]
    if len(c) > 1 and c[-1] in _LIST_NAMES:
        c = c[:-1]
    block = ".".join(c) if c else "layers"
    rest = ".".join(parts[idx + 1:])
    if n:
        block = f"{block}.{rest}.{n}" if rest else f"{block}.{n}"
    return block, int(parts[idx])


def _np(t):
    t = t.detach()
    if t.dtype in (torch.bfloat16, torch.float16):
        t = t.float()
    return t.cpu().numpy().copy()


def _tokens(side, toks):
    try:
        arr = np.array(toks, dtype=str)
    except ValueError as e:
        raise ValueError(f"heed_capture: tokens[{side!r}]: {e}: give padded [batch][seq] or [seq] strings") from e
    if arr.ndim not in (1, 2):
        raise ValueError(f"heed_capture: tokens[{side!r}] has {arr.ndim} dimensions: want [seq] or [batch, seq]")
    return arr


_ST_DTYPES = {np.dtype(np.float32): "F32", np.dtype(np.float64): "F64", np.dtype(np.bool_): "BOOL",
              np.dtype(np.int8): "I8", np.dtype(np.int64): "I64", np.dtype(np.float16): "F16"}


def _write_safetensors(f, arrays, meta):
    """safetensors by hand (its format documentation): u64 LE header length,
    JSON header padded with spaces to 8 bytes, raw little-endian C-order data.
    It has no string dtype: tokens are left out (with a warning)."""
    header, blobs, off = {}, [], 0
    for name in sorted(arrays):
        a = arrays[name]
        if a.dtype.kind == "U":
            warnings.warn(f"heed_capture: safetensors has no strings: {name} not written (use .npz to keep tokens)")
            continue
        st = _ST_DTYPES.get(a.dtype)
        if st is None:
            a = a.astype(np.float32)
            st = "F32"
        raw = np.ascontiguousarray(a).astype(a.dtype.newbyteorder("<"), copy=False).tobytes()
        header[name] = {"dtype": st, "shape": list(a.shape), "data_offsets": [off, off + len(raw)]}
        blobs.append(raw)
        off += len(raw)
    header["__metadata__"] = {"meta": json.dumps(meta)}
    h = json.dumps(header).encode("utf-8")
    h += b" " * (-len(h) % 8)
    f.write(len(h).to_bytes(8, "little"))
    f.write(h)
    for b in blobs:
        f.write(b)


def record(model, path, tokens=None, kinds=None):
    """Records the attention of model inside a `with` block into path
    (heed-export/1; NPZ, or safetensors when path ends in .safetensors).

    tokens: {"source": [[...]], "target": [[...]]} (padded, per batch item), or
    a list for the one side `target`. kinds: {block name or module path: kind}
    overrides the kind (causal, bidirectional, cross)."""
    return Recorder(model, path, tokens=tokens, kinds=kinds)


# ---------------------------------------------------------------------------
# Pruning


def prune(model, plan):
    """Masks the heads a plan names: zeroes their columns of each attention's
    output projection, the head mask of Michel, Levy & Neubig (2019), "Are
    Sixteen Heads Really Better than One?", NeurIPS (xi_h = 0 multiplies head
    h's output before the out-projection).

    plan: the "plan" object of `heed rank --json --prune N` (or the whole
    report, or the path of a JSON file holding either), or {block: {layer:
    [heads]}}. Block and layer names are those record() writes (layout()).
    Every name is checked before anything changes: a block, layer or head the
    model does not have raises ValueError naming it.
    Returns [(block, layer, head, module path)] of what was masked.

    A plan is a hypothesis: re-evaluate the model after pruning. Masking saves
    no compute until the model is rebuilt without the heads."""
    if isinstance(plan, (str, os.PathLike)):
        with open(plan) as f:
            plan = json.load(f)
    if not isinstance(plan, dict):
        raise ValueError("heed_capture.prune: plan must be a JSON object")
    if "plan" in plan and isinstance(plan["plan"], dict):
        plan = plan["plan"]
    heads = plan.get("heads", plan) if isinstance(plan.get("heads", None), dict) else plan
    sites = layout(model)
    blocks = {}
    for s in sites.values():
        blocks.setdefault(s.block, {})[s.layer] = s
    todo = []
    for bname, layers in heads.items():
        r = _resolve_block(bname, blocks)
        if r is None:
            raise ValueError(f"heed_capture.prune: block {bname!r} is not in the model (its blocks: "
                             f"{', '.join(sorted(blocks)) or 'none'})")
        base, a, z = r
        if not isinstance(layers, dict):
            raise ValueError(f"heed_capture.prune: block {bname!r}: want {{layer: [heads]}}")
        for lk, hs in layers.items():
            try:
                layer = int(lk)
            except (TypeError, ValueError):
                raise ValueError(f"heed_capture.prune: block {bname!r}: layer {lk!r} is not a number") from None
            real = a + layer
            if layer < 0 or (z is not None and real > z) or real not in blocks[base]:
                raise ValueError(f"heed_capture.prune: block {bname!r} has no layer {lk} (the model's "
                                 f"{base} has layers 0..{len(blocks[base]) - 1})")
            site = blocks[base][real]
            H = site.module.num_heads
            for h in hs:
                if not isinstance(h, int) or h < 0 or h >= H:
                    raise ValueError(f"heed_capture.prune: block {bname!r} layer {lk}: no head {h!r} "
                                     f"({site.path} has {H} heads)")
                todo.append((bname, layer, h, site))
    done = []
    with torch.no_grad():
        for bname, layer, h, site in todo:
            mod = site.module
            D = mod.embed_dim // mod.num_heads
            mod.out_proj.weight[:, h * D:(h + 1) * D] = 0
            done.append((bname, layer, h, site.path))
    return done
