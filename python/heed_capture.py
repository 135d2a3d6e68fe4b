"""heed_capture: record a live PyTorch model's attention into a heed export.

One file, needing only torch (1.13 or later) and numpy. `heed capture-py DIR`
writes this file out of the heed binary.

    import heed_capture
    with heed_capture.record(model, "run.npz", tokens={"target": words}) as rec:
        out = model(ids, mask=...)     # forward
        loss.backward()                 # optional: dL/dA for head importance
    heed_capture.prune(model, plan)     # plan from `heed rank --json --prune N`

What it records, for every torch.nn.MultiheadAttention in the model:
- the attention probabilities per head, [batch, head, query, key], computed
  explicitly during the record with the module's own weights, so they are
  also there where PyTorch's fused path would not return them, and they are
  the very tensor multiplied with the values: its gradient is dL/dA;
- dL/dA when backward runs inside the `with` block (BLOCK/grad/N);
- the masks the model passed: attn_mask as BLOCK/allow when it is not
  exactly what the block's kind implies (so heed judges the rule against the
  mask: an off-by-one triu shows as a causal leak), key padding masks as
  valid/SIDE;
- the dtype the attention was computed in (metadata compute_dtype), tokens
  per side when given, and logits through rec.logits(t).

Blocks and layers come from module paths: the modules that differ only by a
layer index (encoder.layers.3.self_attn) are the layers of one block. The
kind of a block is its role where the role is standard (nn.Transformer,
TransformerEncoder/DecoderLayer: encoder self-attention bidirectional,
decoder self-attention causal, decoder cross-attention cross); otherwise,
and for encoder layers given a causal mask (a decoder-only model built from
encoder layers), the mask decides: one that blocks no key before the query
(beyond a window) and at least half of the keys after it is causal, with a
window W when it blocks exactly the keys k <= q - W. `kinds=` overrides
(block name or module path -> kind). The rule is ours.

Every number heed derives from these exports (leaks, heads to prune) is
evidence to confirm by re-evaluating the model, not a verdict.
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

FORMAT = "heed-export/1"
PRODUCER = "heed_capture 1"
_DTYPES = {torch.float32: "float32", torch.float16: "float16", torch.bfloat16: "bfloat16", torch.float64: "float64"}


class CaptureError(RuntimeError):
    """A model or a call heed_capture cannot record faithfully."""


def _role(model, path):
    """The standard role of the MultiheadAttention at path, or None."""
    if "." not in path:
        return None
    parent_path, attr = path.rsplit(".", 1)
    parent = model.get_submodule(parent_path)
    if isinstance(parent, torch.nn.TransformerDecoderLayer):
        return {"self_attn": "decoder", "multihead_attn": "cross"}.get(attr)
    if isinstance(parent, torch.nn.TransformerEncoderLayer) and attr == "self_attn":
        return "encoder"
    return None


def _group(path):
    """(group key, layer index) of a module path: the last all-digit
    component is the layer; the rest names the group."""
    parts = path.split(".")
    for i in range(len(parts) - 1, -1, -1):
        if parts[i].isdigit():
            return ".".join(parts[:i] + ["#"] + parts[i + 1:]), int(parts[i])
    return path, 0


def _blocked_from(attn_mask, L, S, bsz, heads):
    """attn_mask as a bool tensor of blocked cells [bsz, heads, L, S] or
    [L, S] (None when there is none). PyTorch's polarity: bool True =
    blocked; float masks are added to the scores (-inf, or very negative,
    blocks)."""
    if attn_mask is None:
        return None
    m = attn_mask
    if m.dtype == torch.bool:
        b = m
    else:
        b = m.float() <= -1e4
    if b.dim() == 3:
        b = b.reshape(bsz, heads, L, S)
    return b.detach().cpu()


def _shape_kind(blocked, L, S):
    """What a [L, S] blocked pattern looks like: ("causal", W or 0) when it
    blocks nothing before the query except k <= q - W and at least half of
    the cells after it; ("none", 0) when it blocks nothing; else ("other", 0).
    Queries are the last L of S positions."""
    if blocked is None or not bool(blocked.any()):
        return "none", 0
    off = S - L
    q = torch.arange(L)[:, None] + off
    k = torch.arange(S)[None, :]
    upper = k > q
    lower = k <= q
    n_up = int(upper.sum())
    if n_up and 2 * int((blocked & upper).sum()) < n_up:
        return "other", 0
    low_blocked = blocked & lower
    if not bool(low_blocked.any()):
        return "causal", 0
    # a window: blocked below exactly where k <= q - W
    for w in range(1, S + 1):
        if torch.equal(low_blocked, lower & (k <= q - w)):
            return "causal", w
    return "other", 0


def _exact(blocked, kind, window, L, S):
    """Whether blocked is exactly the mask the kind implies."""
    if kind in ("bidirectional", "cross"):
        return blocked is None or not bool(blocked.any())
    q = torch.arange(L)[:, None] + (S - L)
    k = torch.arange(S)[None, :]
    want = k > q
    if window:
        want = want | (k <= q - window)
    if blocked is None:
        return False
    b = blocked
    while b.dim() > 2:
        if not bool((b == b[:1]).all()):
            return False
        b = b[0]
    return torch.equal(b, want)


class _Call:
    """One recorded call of one module."""

    def __init__(self, path, probs, blocked, kpm, dtype):
        self.path = path
        self.probs = probs  # the tensor in the graph, [bsz, heads, L, S]
        self.weights = probs.detach().float().cpu()
        self.blocked = blocked
        self.kpm = None if kpm is None else kpm.detach().cpu()
        self.dtype = dtype
        self.grad = None
        if probs.requires_grad:
            probs.register_hook(self._keep)

    def _keep(self, g):
        self.grad = g.detach().float().cpu()


def attention_probs(mod, query, key, value, key_padding_mask=None, attn_mask=None, is_causal=False):
    """Runs nn.MultiheadAttention mod explicitly (torch 1.13's
    F.multi_head_attention_forward, without dropout when not training) and
    returns (output in the caller's layout, probabilities [bsz, heads, L,
    S] as used in the value product, blocked cells, key padding mask)."""
    if mod.bias_k is not None or mod.add_zero_attn:
        raise CaptureError("heed_capture: MultiheadAttention with bias_k/bias_v or add_zero_attn is not supported")
    batched = query.dim() == 3
    if not batched:
        query, key, value = query.unsqueeze(1), key.unsqueeze(1), value.unsqueeze(1)
        if key_padding_mask is not None:
            key_padding_mask = key_padding_mask.unsqueeze(0)
        if mod.batch_first:
            query, key, value = query.transpose(0, 1), key.transpose(0, 1), value.transpose(0, 1)
    if mod.batch_first:
        query, key, value = query.transpose(0, 1), key.transpose(0, 1), value.transpose(0, 1)
    L, bsz, E = query.shape
    S = key.shape[0]
    H = mod.num_heads
    hd = E // H
    if mod._qkv_same_embed_dim:
        w = mod.in_proj_weight
        b = mod.in_proj_bias
        wq, wk, wv = w[:E], w[E:2 * E], w[2 * E:]
    else:
        wq, wk, wv = mod.q_proj_weight, mod.k_proj_weight, mod.v_proj_weight
        b = mod.in_proj_bias
    bq = bk = bv = None
    if b is not None:
        bq, bk, bv = b[:E], b[E:2 * E], b[2 * E:]
    q = F.linear(query, wq, bq)
    k = F.linear(key, wk, bk)
    v = F.linear(value, wv, bv)
    q = q.reshape(L, bsz * H, hd).transpose(0, 1)
    k = k.reshape(S, bsz * H, hd).transpose(0, 1)
    v = v.reshape(S, bsz * H, hd).transpose(0, 1)
    if is_causal and attn_mask is None:
        attn_mask = torch.triu(torch.ones(L, S, dtype=torch.bool, device=query.device), diagonal=1 + S - L)
    blocked = _blocked_from(attn_mask, L, S, bsz, H)
    scores = torch.bmm(q / math.sqrt(hd), k.transpose(1, 2))
    if attn_mask is not None:
        m = attn_mask
        if m.dim() == 2:
            m = m.unsqueeze(0)
        if m.dtype == torch.bool:
            scores = scores.masked_fill(m, float("-inf"))
        else:
            scores = scores + m.to(scores.dtype)
    if key_padding_mask is not None:
        kpm = key_padding_mask
        if kpm.dtype != torch.bool:
            kpm = kpm.float() <= -1e4 if kpm.is_floating_point() else kpm.bool()
        scores = scores.view(bsz, H, L, S).masked_fill(kpm[:, None, None, :], float("-inf")).view(bsz * H, L, S)
    probs = torch.softmax(scores, dim=-1)
    if mod.training and mod.dropout > 0:
        probs_used = F.dropout(probs, p=mod.dropout)
    else:
        probs_used = probs
    # the [bsz, heads, L, S] tensor itself enters the value product, so a
    # hook on it sees dL/dA
    p4 = probs_used.view(bsz, H, L, S)
    out = torch.bmm(p4.reshape(bsz * H, L, S), v)
    out = out.transpose(0, 1).reshape(L * bsz, E)
    out = F.linear(out, mod.out_proj.weight, mod.out_proj.bias).view(L, bsz, E)
    if mod.batch_first:
        out = out.transpose(0, 1)
    if not batched:
        out = out.squeeze(1) if not mod.batch_first else out.squeeze(0)
    kp = key_padding_mask
    if kp is not None and kp.dtype != torch.bool:
        kp = kp.float() <= -1e4 if kp.is_floating_point() else kp.bool()
    return out, p4, blocked, kp


class Recorder:
    """What record() yields: rec.attention() for custom attention code,
    rec.logits() for the model's output logits."""

    def __init__(self, model, path, tokens, kinds):
        self.model = model
        self.path = os.fspath(path)
        self.kinds = dict(kinds or {})
        if tokens is not None and not isinstance(tokens, dict):
            tokens = {"target": tokens}
        self.tokens = tokens or {}
        self.calls = []
        self.custom = []  # (name, kind, layer, query, key, _Call)
        self._logits = None
        self._patched = []
        self._fastpath = []
        self._sdpa = None

    # --- user API -----------------------------------------------------------
    def attention(self, name, probs, kind=None, layer=None, query="target", key=None):
        """Records probabilities of custom attention code: probs [batch,
        heads, query, key] (or [heads, query, key]) as used in the value
        product (its gradient is recorded too). name is the block; layers
        are numbered in call order unless layer is given."""
        if probs.dim() == 3:
            probs = probs.unsqueeze(0)
        if probs.dim() != 4:
            raise CaptureError(f"heed_capture: {name}: probabilities must be [batch, heads, query, key], got {tuple(probs.shape)}")
        if layer is None:
            layer = sum(1 for c in self.custom if c[0] == name)
        call = _Call(name, probs, None, None, probs.dtype)
        self.custom.append((name, kind, layer, query, key or query, call))
        return probs

    def logits(self, t):
        """Records the model's logits [batch, position, vocab]."""
        self._logits = t.detach().float().cpu()
        return t

    # --- patching ------------------------------------------------------------
    def _start(self):
        for path, mod in self.model.named_modules():
            if isinstance(mod, torch.nn.MultiheadAttention):
                self._patch(path, mod)
            # torch's fused encoder path (eval, no grad) never calls its
            # attention module; one of the conditions it checks is this
            # flag, which changes nothing else in the layer's computation
            if isinstance(mod, torch.nn.TransformerEncoderLayer) and getattr(mod, "activation_relu_or_gelu", False):
                mod.activation_relu_or_gelu = False
                self._fastpath.append(mod)
        if hasattr(F, "scaled_dot_product_attention"):
            self._patch_sdpa()

    def _patch(self, path, mod):
        rec = self

        def forward(query, key, value, key_padding_mask=None, need_weights=True, attn_mask=None,
                    average_attn_weights=True, is_causal=False):
            out, probs, blocked, kpm = attention_probs(mod, query, key, value, key_padding_mask, attn_mask, is_causal)
            rec.calls.append(_Call(path, probs, blocked, kpm, probs.dtype))
            if not need_weights:
                return out, None
            w = probs.mean(dim=1) if average_attn_weights else probs
            if query.dim() == 2:
                w = w.squeeze(0)
            return out, w

        mod.forward = forward
        self._patched.append(mod)

    def _patch_sdpa(self):
        # torch >= 2.0: F.scaled_dot_product_attention returns no
        # probabilities; during the record it is computed explicitly
        # (softmax(QK^T / sqrt(d) + mask) V, its documented definition) and
        # recorded as a block named "sdpa" (layers in call order).
        orig = F.scaled_dot_product_attention
        rec = self

        def sdpa(query, key, value, attn_mask=None, dropout_p=0.0, is_causal=False, scale=None, **kw):
            L, S = query.shape[-2], key.shape[-2]
            s = scale if scale is not None else 1.0 / math.sqrt(query.shape[-1])
            scores = (query @ key.transpose(-2, -1)) * s
            if is_causal:
                scores = scores.masked_fill(torch.ones(L, S, dtype=torch.bool, device=query.device).triu(1 + S - L), float("-inf"))
            if attn_mask is not None:
                scores = scores.masked_fill(~attn_mask, float("-inf")) if attn_mask.dtype == torch.bool else scores + attn_mask
            probs = torch.softmax(scores, dim=-1)
            if dropout_p > 0:
                probs = F.dropout(probs, p=dropout_p)
            p4 = probs if probs.dim() == 4 else probs.reshape(-1, *probs.shape[-3:]) if probs.dim() > 4 else probs.unsqueeze(0)
            rec.attention("sdpa", p4, kind="causal" if is_causal else None)
            return probs @ value

        self._sdpa = orig
        F.scaled_dot_product_attention = sdpa

    def _stop(self):
        for mod in self._patched:
            mod.__dict__.pop("forward", None)
        self._patched = []
        for mod in self._fastpath:
            mod.activation_relu_or_gelu = True
        self._fastpath = []
        if self._sdpa is not None:
            F.scaled_dot_product_attention = self._sdpa
            self._sdpa = None

    # --- assembling ----------------------------------------------------------
    def _arrays(self):
        arrays, blocks = {}, {}
        compute = set()
        seen = {}
        for c in self.calls:
            if c.path in seen:
                raise CaptureError(f"heed_capture: {c.path} was called more than once inside the record: record one forward pass (a generation step each)")
            seen[c.path] = c
        groups = {}
        for c in self.calls:
            key, idx = _group(c.path)
            groups.setdefault(key, []).append((idx, c))
        names = {}
        for key, calls in groups.items():
            calls.sort(key=lambda x: x[0])
            role = _role(self.model, calls[0][1].path)
            first = calls[0][1]
            bsz, H, L, S = first.weights.shape
            shape, window = _shape_kind(None if first.blocked is None else _two_d(first.blocked), L, S)
            kind = {"decoder": "causal", "cross": "cross"}.get(role)
            if kind is None:
                kind = "causal" if shape == "causal" else "bidirectional"
            if role == "encoder" and shape != "causal":
                kind = "bidirectional"
            name = {"encoder": "encoder", "decoder": "decoder", "cross": "cross"}.get(role) if role else None
            if role == "encoder" and kind == "causal":
                name = "decoder"
            if name is None or name in names.values():
                name = re.sub(r"\.?#\.?", ".", key).strip(".") or "attn"
            for k in (key.replace("#", str(calls[0][0])), key, name):
                if k in self.kinds:
                    kind = self.kinds[k]
            names[key] = name
            qside, kside = ("target", "source") if role == "cross" else (("source", "source") if kind == "bidirectional" and role == "encoder" else ("target", "target"))
            if role is None and kind == "cross":
                qside, kside = "target", "source"
            win = window if kind == "causal" and shape == "causal" else 0
            meta = {"kind": kind, "query": qside, "key": kside, "axes": "batch head query key"}
            if win:
                meta["window"] = win
            # masks of every layer must agree to be one block's allow
            masks = [c.blocked for _, c in calls]
            same = all(_same(masks[0], m) for m in masks[1:])
            if not same:
                warnings.warn(f"heed_capture: the layers of {name} were given different masks: each is written as a block of its own ({name}.L<n>)")
            for li, (idx, c) in enumerate(calls):
                bname, layer = (name, li) if same else (f"{name}.L{li}", 0)
                arrays[f"{bname}/attn/{layer}"] = c.weights.numpy()
                if c.grad is not None:
                    arrays[f"{bname}/grad/{layer}"] = c.grad.numpy()
                if bname not in blocks:
                    m = dict(meta)
                    blocks[bname] = m
                    if c.blocked is not None and not _exact(c.blocked, kind, win, L, S):
                        allow = ~c.blocked
                        arrays[f"{bname}/allow"] = allow.numpy()
                    compute.add(_DTYPES.get(c.dtype, "float32"))
                    m["compute_dtype"] = _DTYPES.get(c.dtype, "float32")
                if c.kpm is not None:
                    side = kside
                    v = (~c.kpm).to(torch.int8).numpy()
                    prev = arrays.get(f"valid/{side}")
                    if prev is not None and not np.array_equal(prev, v):
                        raise CaptureError(f"heed_capture: {c.path}: its key padding mask differs from another module's for side {side!r}")
                    arrays[f"valid/{side}"] = v
            if not any(c.grad is not None for _, c in calls) and any(c.probs.requires_grad for _, c in calls):
                pass  # no backward inside the block: no gradients, nothing to say
        for name, kind, layer, qside, kside, c in self.custom:
            arrays[f"{name}/attn/{layer}"] = c.weights.numpy()
            if c.grad is not None:
                arrays[f"{name}/grad/{layer}"] = c.grad.numpy()
            if name not in blocks:
                _, _, L, S = c.weights.shape
                if kind is None:
                    z = (c.weights == 0).all(dim=0).all(dim=0)
                    kind = "causal" if _shape_kind(z, L, S)[0] == "causal" else ("bidirectional" if L == S else "cross")
                blocks[name] = {"kind": kind, "query": qside, "key": kside, "axes": "batch head query key",
                                "compute_dtype": _DTYPES.get(c.dtype, "float32")}
            compute.add(_DTYPES.get(c.dtype, "float32"))
        if not blocks:
            raise CaptureError("heed_capture: no attention was recorded: the model called no nn.MultiheadAttention and no rec.attention() inside the record")
        for side, t in self.tokens.items():
            arrays[f"tokens/{side}"] = np.array(t, dtype=str)
        if self._logits is not None:
            arrays["logits"] = self._logits.numpy()
        meta = {"format": FORMAT, "producer": PRODUCER, "blocks": blocks}
        if len(compute) == 1:
            meta["compute_dtype"] = compute.pop()
        return arrays, meta


def _two_d(blocked):
    b = blocked
    while b.dim() > 2:
        b = b[0]
    return b


def _same(a, b):
    if a is None or b is None:
        return a is None and b is None
    return a.shape == b.shape and torch.equal(a, b)


class record:
    """Context manager: records every nn.MultiheadAttention of model (and
    rec.attention() calls) while the block runs, and writes a heed-export/1
    file at path when it ends (NPZ, or safetensors when path ends
    .safetensors), atomically. When the block raises, nothing is written and
    the error propagates. tokens: {side: [batch][seq] strings}, or one
    [batch][seq] list for the side "target". kinds: {block name or module
    path: kind} to override the kinds heed_capture decides."""

    def __init__(self, model, path, tokens=None, kinds=None):
        self.rec = Recorder(model, path, tokens, kinds)

    def __enter__(self):
        self.rec._start()
        return self.rec

    def __exit__(self, et, ev, tb):
        self.rec._stop()
        if et is not None:
            return False
        arrays, meta = self.rec._arrays()
        _write(self.rec.path, arrays, meta)
        return False


def _write(path, arrays, meta):
    d = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix=".heed-capture-", dir=d)
    try:
        with os.fdopen(fd, "wb") as f:
            if path.endswith(".safetensors"):
                _write_safetensors(f, arrays, meta)
            else:
                arrays = dict(arrays)
                arrays["meta"] = np.array(json.dumps(meta))
                np.savez(f, **arrays)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


_ST = {np.dtype("float32"): "F32", np.dtype("float64"): "F64", np.dtype("float16"): "F16", np.dtype("bool"): "BOOL",
       np.dtype("int8"): "I8", np.dtype("int16"): "I16", np.dtype("int32"): "I32", np.dtype("int64"): "I64", np.dtype("uint8"): "U8"}


def _write_safetensors(f, arrays, meta):
    """safetensors as its format document describes it: an 8-byte
    little-endian header size, a JSON header (padded with spaces to a
    multiple of 8), then the tensors' little-endian bytes, in order. Strings
    have no safetensors dtype: tokens are left out (with a warning)."""
    header, blobs, off = {}, [], 0
    for name in sorted(arrays):
        a = np.ascontiguousarray(arrays[name])
        if a.dtype.kind == "U":
            warnings.warn(f"heed_capture: {name}: safetensors holds no strings; write an NPZ to keep tokens")
            continue
        a = a.astype(a.dtype.newbyteorder("<"), copy=False)
        b = a.tobytes()
        header[name] = {"dtype": _ST[a.dtype], "shape": list(a.shape), "data_offsets": [off, off + len(b)]}
        blobs.append(b)
        off += len(b)
    header["__metadata__"] = {"meta": json.dumps(meta)}
    h = json.dumps(header).encode()
    h += b" " * (-len(h) % 8)
    f.write(len(h).to_bytes(8, "little"))
    f.write(h)
    for b in blobs:
        f.write(b)


def _attention_modules(model):
    """Block name -> list of (layer, module) as record() names them."""
    groups = {}
    for path, mod in model.named_modules():
        if isinstance(mod, torch.nn.MultiheadAttention):
            key, idx = _group(path)
            groups.setdefault(key, []).append((idx, path, mod))
    out, roles = {}, {}
    for key, mods in groups.items():
        mods.sort(key=lambda x: x[0])
        role = _role(model, mods[0][1])
        name = {"encoder": "encoder", "decoder": "decoder", "cross": "cross"}.get(role) if role else None
        if name is None or name in out:
            name = re.sub(r"\.?#\.?", ".", key).strip(".") or "attn"
        out[name] = [m for _, _, m in mods]
        roles[name] = role
    # an encoder stack run with a causal mask is recorded as "decoder"
    if "encoder" in out and "decoder" not in out:
        out["decoder"] = out["encoder"]
    return out


def prune(model, plan):
    """Zeroes the planned heads' columns of each attention's output
    projection: the head mask of Michel, Levy & Neubig (2019), "Are Sixteen
    Heads Really Better than One?", NeurIPS: head h contributes
    out_proj.weight[:, h*d:(h+1)*d] @ head_h, so zeroing those columns
    removes it (the bias stays). plan: {block: {layer: [heads]}} (the "heads"
    of the "plan" object of `heed rank --json --prune N`), that plan object,
    the whole rank JSON, or a path to a JSON file of any of them. Returns
    [(block, layer, head)] pruned. Refuses a plan naming a block, layer or
    head the model does not have. A pruned model is a hypothesis to
    confirm by re-evaluating it, and saves no compute until it is rebuilt
    smaller."""
    if isinstance(plan, (str, os.PathLike)):
        with open(plan) as f:
            plan = json.load(f)
    if "plan" in plan and isinstance(plan["plan"], dict):
        plan = plan["plan"]
    if "heads" in plan and isinstance(plan["heads"], dict):
        plan = plan["heads"]
    mods = _attention_modules(model)
    todo = []
    for block, layers in plan.items():
        if block not in mods:
            raise ValueError(f"heed_capture.prune: the model has no attention block {block!r} (it has {sorted(mods)})")
        for layer, heads in layers.items():
            li = int(layer)
            if not 0 <= li < len(mods[block]):
                raise ValueError(f"heed_capture.prune: block {block!r} has {len(mods[block])} layers, not layer {li}")
            mod = mods[block][li]
            for h in heads:
                if not 0 <= int(h) < mod.num_heads:
                    raise ValueError(f"heed_capture.prune: {block} layer {li} has {mod.num_heads} heads, not head {h}")
                todo.append((block, li, int(h), mod))
    with torch.no_grad():
        for block, li, h, mod in todo:
            d = mod.embed_dim // mod.num_heads
            mod.out_proj.weight[:, h * d:(h + 1) * d] = 0
    return [(b, li, h) for b, li, h, _ in todo]
