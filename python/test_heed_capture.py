"""Tests of heed_capture against PyTorch's own outputs and autograd.

Run: /usr/bin/python3 -m unittest discover -s python -v   (make pytest-capture)

The outside references, named beside each check:
- PyTorch's nn.MultiheadAttention called with need_weights=True,
  average_attn_weights=False (its per-head weights, torch docs);
- an unrecorded run of the same model (the output must not change);
- autograd of an explicit recomputation written here, whose forward is first
  checked against the model's own output;
- Michel, Levy & Neubig (2019), "Are Sixteen Heads Really Better than One?",
  NeurIPS, eq. 2: importance of head h is |dL/dxi_h| for a gate xi_h that
  multiplies the head's output; the head's output is linear in A, so
  dL/dxi_h = sum(A * dL/dA) (docs/methods.md, derived).
"""

import json
import math
import os
import sys
import tempfile
import unittest

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import heed_capture  # noqa: E402

V, D, HEADS = 23, 16, 4


def pads(lengths, n):
    """True = padding, as nn.MultiheadAttention's key_padding_mask."""
    return torch.arange(n)[None] >= torch.tensor(lengths)[:, None]


class Seq2Seq(nn.Module):
    """An nn.Transformer (batch_first) with embeddings and an output layer."""

    def __init__(self, batch_first=True):
        super().__init__()
        self.emb = nn.Embedding(V, D)
        self.transformer = nn.Transformer(D, HEADS, 2, 2, 32, dropout=0.0, batch_first=batch_first)
        self.out = nn.Linear(D, V)
        self.batch_first = batch_first

    def forward(self, src, tgt, tgt_mask, src_pad, tgt_pad):
        s, t = self.emb(src), self.emb(tgt)
        if not self.batch_first:
            s, t = s.transpose(0, 1), t.transpose(0, 1)
        y = self.transformer(s, t, tgt_mask=tgt_mask, src_key_padding_mask=src_pad, tgt_key_padding_mask=tgt_pad,
                             memory_key_padding_mask=src_pad)
        if not self.batch_first:
            y = y.transpose(0, 1)
        return self.out(y)


class DecoderOnly(nn.Module):
    """A decoder-only model built from nn.TransformerEncoderLayer, given a mask
    per layer (masks[i]) or one mask for every layer."""

    def __init__(self, layers=2):
        super().__init__()
        self.emb = nn.Embedding(V, D)
        self.layers = nn.ModuleList(nn.TransformerEncoderLayer(D, HEADS, 32, dropout=0.0, batch_first=True)
                                    for _ in range(layers))
        self.out = nn.Linear(D, V)

    def forward(self, ids, mask, pad=None):
        x = self.emb(ids)
        for i, layer in enumerate(self.layers):
            m = mask[i] if isinstance(mask, (list, tuple)) else mask
            x = layer(x, src_mask=m, src_key_padding_mask=pad)
        return self.out(x)


def explicit(model, ids, blocked, pad=None, gate=None, keep=None):
    """DecoderOnly's forward written out with plain tensor operations (no
    nn.MultiheadAttention): the reference for autograd. blocked: bool [L, S]
    True = blocked; gate: [batch, layer, head] multiplying each head's output
    before the out-projection; keep collects each layer's A (retain_grad)."""
    x = model.emb(ids)
    N, L, E = x.shape
    for i, layer in enumerate(model.layers):
        sa = layer.self_attn
        H = sa.num_heads
        Dh = E // H
        W, b = sa.in_proj_weight, sa.in_proj_bias
        q, k, v = (x @ W[j * E:(j + 1) * E].T + b[j * E:(j + 1) * E] for j in range(3))
        q, k, v = (t.reshape(N, L, H, Dh).transpose(1, 2) for t in (q, k, v))
        s = (q @ k.transpose(-1, -2)) / math.sqrt(Dh)
        s = s.masked_fill(blocked[None, None], float("-inf"))
        if pad is not None:
            s = s.masked_fill(pad[:, None, None, :], float("-inf"))
        A = torch.softmax(s, -1)
        if keep is not None:
            A.retain_grad()
            keep.append(A)
        o = A @ v
        if gate is not None:
            o = o * gate[:, i, :, None, None]
        o = o.transpose(1, 2).reshape(N, L, E) @ sa.out_proj.weight.T + sa.out_proj.bias
        x = layer.norm1(x + o)
        x = layer.norm2(x + layer.linear2(F.relu(layer.linear1(x))))
    return model.out(x)


def causal(n):
    return torch.triu(torch.ones(n, n, dtype=torch.bool), diagonal=1)


class Base(unittest.TestCase):
    def setUp(self):
        self.dir = tempfile.mkdtemp(prefix="heed-capture-test-")
        torch.manual_seed(5)

    def path(self, name):
        return os.path.join(self.dir, name)

    def load(self, name):
        z = np.load(self.path(name))
        arrays = {k: z[k] for k in z.files}
        return arrays, json.loads(str(arrays.pop("meta")))

    def assertRestored(self, model):
        for name, m in model.named_modules():
            self.assertNotIn("forward", m.__dict__, f"{name}: forward left patched")
            if isinstance(m, nn.TransformerEncoderLayer):
                self.assertTrue(m.activation_relu_or_gelu, f"{name}: fused-path flag left off")
        if hasattr(F, "scaled_dot_product_attention"):
            self.assertFalse(F.scaled_dot_product_attention.__module__ == "heed_capture")


class TestTransformer(Base):
    def setUp(self):
        super().setUp()
        self.model = Seq2Seq().double().eval()
        self.src_len, self.tgt_len = [7, 4, 5], [6, 3, 5]
        self.src = torch.randint(1, V, (3, 7))
        self.tgt = torch.randint(1, V, (3, 6))
        self.sp, self.tp = pads(self.src_len, 7), pads(self.tgt_len, 6)
        self.mask = nn.Transformer.generate_square_subsequent_mask(6).double()

    def run_model(self):
        return self.model(self.src, self.tgt, self.mask, self.sp, self.tp)

    def test_output_unchanged_and_weights_are_pytorchs(self):
        with torch.no_grad():
            ref = self.run_model()  # unrecorded run (reference)
        inputs = {}
        hooks = [m.register_forward_pre_hook(lambda mod, a, n=n: inputs.setdefault(n, a))
                 for n, m in self.model.named_modules() if isinstance(m, nn.MultiheadAttention)]
        self.run_model()  # with grad: PyTorch's slow path calls every attention module
        for h in hooks:
            h.remove()
        words = {"source": [["s%d" % i for i in r] for r in self.src.tolist()],
                 "target": [["t%d" % i for i in r] for r in self.tgt.tolist()]}
        with torch.no_grad(), heed_capture.record(self.model, self.path("run.npz"), tokens=words):
            out = self.run_model()
        # the recorded run gives the unrecorded output (float64 rounding)
        torch.testing.assert_close(out, ref, rtol=0, atol=1e-10)
        self.assertRestored(self.model)
        arrays, meta = self.load("run.npz")
        self.assertEqual(meta["format"], "heed-export/1")
        self.assertEqual(meta["producer"], "heed_capture 1")
        self.assertEqual(meta["compute_dtype"], "float64")
        want = {"encoder": ("bidirectional", "source", "source"), "decoder": ("causal", "target", "target"),
                "cross": ("cross", "target", "source")}
        self.assertEqual({b: (m["kind"], m["query"], m["key"]) for b, m in meta["blocks"].items()}, want)
        for m in meta["blocks"].values():
            self.assertEqual(m["axes"], "batch head query key")
            self.assertEqual(m["compute_dtype"], "float64")
        self.assertNotIn("decoder/allow", arrays)  # PyTorch's own causal mask is what the kind implies
        np.testing.assert_array_equal(arrays["valid/source"], (~self.sp).numpy().astype(np.int8))
        np.testing.assert_array_equal(arrays["valid/target"], (~self.tp).numpy().astype(np.int8))
        self.assertEqual(arrays["tokens/source"].dtype.kind, "U")
        self.assertEqual(arrays["tokens/target"].tolist(), words["target"])
        # each layer's weights = what nn.MultiheadAttention itself returns per head
        T = self.model.transformer
        cases = []
        for i in range(2):
            cases.append(("encoder", i, T.encoder.layers[i].self_attn, "encoder.layers.%d.self_attn" % i, None, self.sp))
            cases.append(("decoder", i, T.decoder.layers[i].self_attn, "decoder.layers.%d.self_attn" % i, self.mask, self.tp))
            cases.append(("cross", i, T.decoder.layers[i].multihead_attn, "decoder.layers.%d.multihead_attn" % i, None, self.sp))
        for block, i, mod, name, mask, kpm in cases:
            q, k, v = (t.detach() for t in inputs["transformer." + name])
            with torch.no_grad():
                _, w = mod(q, k, v, key_padding_mask=kpm, attn_mask=mask, need_weights=True,
                           average_attn_weights=False)
            np.testing.assert_allclose(arrays["%s/attn/%d" % (block, i)], w.numpy(), rtol=0, atol=1e-12,
                                       err_msg="%s layer %d" % (block, i))

    def test_off_by_one_decoder_is_causal_with_allow(self):
        self.mask = torch.triu(torch.full((6, 6), float("-inf")), diagonal=2).double()  # k <= q+1 allowed
        with heed_capture.record(self.model, self.path("leak.npz")):
            self.run_model()
        arrays, meta = self.load("leak.npz")
        self.assertEqual(meta["blocks"]["decoder"]["kind"], "causal")  # the role, not the mask
        allow = arrays["decoder/allow"]
        q, k = np.arange(6)[:, None], np.arange(6)[None, :]
        want = (k <= q + 1)[None, None] & (~self.tp.numpy())[:, None, None, :]
        np.testing.assert_array_equal(allow, want)
        # the model did attend at k = q+1 (PyTorch's mask let it)
        self.assertGreater(arrays["decoder/attn/0"][0, :, 0, 1].min(), 0)

    def test_seq_first_and_tokens_list(self):
        model = Seq2Seq(batch_first=False).double().eval()
        model.load_state_dict(self.model.state_dict())
        with torch.no_grad():
            ref = model(self.src, self.tgt, self.mask, self.sp, self.tp)
            a = self.model(self.src, self.tgt, self.mask, self.sp, self.tp)
        torch.testing.assert_close(ref, a, rtol=0, atol=1e-10)
        with heed_capture.record(model, self.path("sf.npz")):
            out = model(self.src, self.tgt, self.mask, self.sp, self.tp)
        torch.testing.assert_close(out, ref, rtol=0, atol=1e-10)
        with heed_capture.record(self.model, self.path("bf.npz")):
            self.run_model()
        sf, _ = self.load("sf.npz")
        bf, _ = self.load("bf.npz")
        for name in bf:
            np.testing.assert_allclose(sf[name], bf[name], rtol=0, atol=1e-12, err_msg=name)

    def test_exception_inside_block_writes_nothing(self):
        class Boom(Exception):
            pass
        with self.assertRaises(Boom) as cm:
            with heed_capture.record(self.model, self.path("no.npz")):
                self.run_model()
                raise Boom("the model failed")
        self.assertEqual(str(cm.exception), "the model failed")  # the original error
        if hasattr(cm.exception, "__notes__"):  # Python >= 3.11: a note says why nothing was written
            self.assertIn("nothing written", " ".join(cm.exception.__notes__))
        self.assertFalse(os.path.exists(self.path("no.npz")))
        self.assertEqual([f for f in os.listdir(self.dir)], [])  # no temporary file left either
        self.assertRestored(self.model)

    def test_exception_from_the_model(self):
        with self.assertRaises(RuntimeError):
            with heed_capture.record(self.model, self.path("no.npz")):
                self.model(self.src, self.tgt, torch.zeros(3, 3), self.sp, self.tp)  # wrong mask shape
        self.assertFalse(os.path.exists(self.path("no.npz")))
        self.assertRestored(self.model)

    def test_safetensors_by_hand(self):
        with heed_capture.record(self.model, self.path("run.safetensors")):
            self.run_model()
        with heed_capture.record(self.model, self.path("run.npz")):
            self.run_model()
        arrays, meta = self.load("run.npz")
        with open(self.path("run.safetensors"), "rb") as f:
            raw = f.read()
        n = int.from_bytes(raw[:8], "little")
        self.assertEqual(n % 8, 0)
        header = json.loads(raw[8:8 + n])
        self.assertEqual(json.loads(header.pop("__metadata__")["meta"]), meta)
        dt = {"F64": "<f8", "F32": "<f4", "BOOL": "|b1", "I8": "|i1"}
        end = 0
        for name, e in sorted(header.items(), key=lambda kv: kv[1]["data_offsets"][0]):
            a, b = e["data_offsets"]
            self.assertEqual(a, end)
            end = b
            got = np.frombuffer(raw[8 + n + a:8 + n + b], dtype=dt[e["dtype"]]).reshape(e["shape"])
            np.testing.assert_array_equal(got, arrays[name], err_msg=name)
        self.assertEqual(8 + n + end, len(raw))
        self.assertEqual(set(header), set(arrays))


class TestEncoderOnly(Base):
    def test_fused_path_eval_no_grad(self):
        enc = nn.TransformerEncoder(nn.TransformerEncoderLayer(D, HEADS, 32, dropout=0.0, batch_first=True), 2)
        model = nn.Sequential()
        model.encoder = enc
        model.eval()
        x = torch.randn(3, 7, D)
        pad = pads([7, 4, 5], 7)
        with torch.no_grad():
            ref = enc(x, src_key_padding_mask=pad)  # PyTorch's fused path (nested tensors)
        with torch.no_grad(), heed_capture.record(model, self.path("enc.npz")):
            out = enc(x, src_key_padding_mask=pad)
        self.assertRestored(model)
        # real positions agree; PyTorch's nested-tensor path writes 0 at padding
        # positions, the path heed_capture takes computes them (README: limits)
        valid = ~pad
        torch.testing.assert_close(out[valid], ref[valid], rtol=1e-5, atol=1e-5)
        self.assertTrue((ref[pad] == 0).all())
        arrays, meta = self.load("enc.npz")
        self.assertEqual(meta["blocks"], {"encoder": {"kind": "bidirectional", "query": "target", "key": "target",
                                                      "axes": "batch head query key", "compute_dtype": "float32"}})
        self.assertNotIn("encoder/grad/0", arrays)  # no backward in the block
        np.testing.assert_array_equal(arrays["valid/target"], valid.numpy().astype(np.int8))
        # layer 0's weights = nn.MultiheadAttention's own, on the same input
        with torch.no_grad():
            _, w = enc.layers[0].self_attn(x, x, x, key_padding_mask=pad, need_weights=True,
                                           average_attn_weights=False)
        np.testing.assert_allclose(arrays["encoder/attn/0"], w.numpy(), rtol=0, atol=1e-6)


class TestDecoderOnly(Base):
    def setUp(self):
        super().setUp()
        self.model = DecoderOnly().double().eval()
        self.ids = torch.randint(1, V, (3, 8))
        self.pad = pads([8, 5, 6], 8)
        self.tgt = torch.randint(0, V, (3, 8))

    def loss(self, logits):
        # cross-entropy of the real positions, summed over examples
        real = ~self.pad
        return F.cross_entropy(logits[real], self.tgt[real], reduction="sum")

    def test_causal_and_grad_equals_autograd(self):
        blocked = causal(8)
        with heed_capture.record(self.model, self.path("dec.npz")):
            logits = self.model(self.ids, blocked, self.pad)
            self.loss(logits).backward()
        arrays, meta = self.load("dec.npz")
        self.assertEqual(meta["blocks"]["layers"]["kind"], "causal")  # from the mask: exactly causal
        self.assertNotIn("layers/allow", arrays)
        grads = {n: p.grad.clone() for n, p in self.model.named_parameters()}
        self.model.zero_grad()
        # reference: autograd through the explicit recomputation
        keep = []
        ref = explicit(self.model, self.ids, blocked, self.pad, keep=keep)
        torch.testing.assert_close(ref, logits.detach(), rtol=0, atol=1e-10)  # the recomputation is the model
        self.loss(ref).backward()
        for i, A in enumerate(keep):
            np.testing.assert_allclose(arrays["layers/attn/%d" % i], A.detach().numpy(), rtol=0, atol=1e-12)
            np.testing.assert_allclose(arrays["layers/grad/%d" % i], A.grad.numpy(), rtol=1e-9, atol=1e-12)
        for n, p in self.model.named_parameters():  # the record did not change what backward computes
            torch.testing.assert_close(p.grad, grads[n], rtol=1e-9, atol=1e-12)

    def test_importance_equals_head_gate(self):
        blocked = causal(8)
        with heed_capture.record(self.model, self.path("dec.npz")):
            self.loss(self.model(self.ids, blocked, self.pad)).backward()
        arrays, _ = self.load("dec.npz")
        # Michel et al. (2019) eq. 2: a gate xi per example, layer and head
        gate = torch.ones(3, 2, HEADS, dtype=torch.float64, requires_grad=True)
        self.loss(explicit(self.model, self.ids, blocked, self.pad, gate=gate)).backward()
        for layer in range(2):
            a, g = arrays["layers/attn/%d" % layer], arrays["layers/grad/%d" % layer]
            imp = np.abs((a * g).sum(axis=(2, 3)))  # [batch, head]
            np.testing.assert_allclose(imp, gate.grad[:, layer].abs().numpy(), rtol=1e-9, atol=1e-12)

    def test_window_and_almost_causal(self):
        q, k = torch.arange(8)[:, None], torch.arange(8)[None, :]
        window = (k > q) | (k <= q - 3)  # causal with 3 keys
        shifted = k > q + 1  # one diagonal too many allowed
        with heed_capture.record(self.model, self.path("w.npz")):
            self.model(self.ids, window)
        arrays, meta = self.load("w.npz")
        self.assertEqual((meta["blocks"]["layers"]["kind"], meta["blocks"]["layers"].get("window")), ("causal", 3))
        self.assertNotIn("layers/allow", arrays)
        with heed_capture.record(self.model, self.path("s.npz")):
            self.model(self.ids, shifted)
        arrays, meta = self.load("s.npz")
        self.assertEqual(meta["blocks"]["layers"]["kind"], "causal")  # almost causal -> causal
        np.testing.assert_array_equal(arrays["layers/allow"], ~shifted.numpy()[None, None])
        # kinds= overrides
        with heed_capture.record(self.model, self.path("o.npz"), kinds={"layers": "bidirectional"}):
            self.model(self.ids, shifted)
        _, meta = self.load("o.npz")
        self.assertEqual(meta["blocks"]["layers"]["kind"], "bidirectional")

    def test_layers_given_different_masks_split(self):
        blocked = causal(8)
        with heed_capture.record(self.model, self.path("split.npz")):
            self.model(self.ids, [blocked, None])  # layer 1 lost its mask
        arrays, meta = self.load("split.npz")
        self.assertEqual(sorted(meta["blocks"]), ["layers.L0", "layers.L1"])
        self.assertEqual(meta["blocks"]["layers.L0"]["kind"], "causal")
        self.assertEqual(meta["blocks"]["layers.L1"]["kind"], "bidirectional")
        self.assertIn("layers.L1/attn/0", arrays)
        # prune understands the split names
        done = heed_capture.prune(self.model, {"layers.L1": {"0": [2]}})
        self.assertEqual(done, [("layers.L1", 0, 2, "layers.1.self_attn")])
        w = self.model.layers[1].self_attn.out_proj.weight
        self.assertTrue((w[:, 8:12] == 0).all())

    def test_padding_differs_per_layer(self):
        mhas = nn.Sequential()
        mhas.layers = nn.ModuleList(nn.MultiheadAttention(D, HEADS, batch_first=True) for _ in range(2))
        x = torch.randn(2, 5, D)
        p0, p1 = pads([5, 3], 5), pads([4, 5], 5)
        with torch.no_grad(), heed_capture.record(mhas, self.path("p.npz")):
            mhas.layers[0](x, x, x, key_padding_mask=p0)
            mhas.layers[1](x, x, x, key_padding_mask=p1)
        arrays, meta = self.load("p.npz")
        self.assertEqual(sorted(meta["blocks"]), ["layers.L0", "layers.L1"])
        side = meta["blocks"]["layers.L1"]["key"]
        self.assertEqual(side, "target.layers.L1")
        np.testing.assert_array_equal(arrays["valid/target"], (~p0).numpy().astype(np.int8))
        np.testing.assert_array_equal(arrays["valid/" + side], (~p1).numpy().astype(np.int8))
        # nn.MultiheadAttention's own per-head weights
        with torch.no_grad():
            _, w = mhas.layers[1](x, x, x, key_padding_mask=p1, average_attn_weights=False)
        np.testing.assert_allclose(arrays["layers.L1/attn/0"], w.numpy(), rtol=0, atol=1e-6)

    def test_kdim_vdim_seq_first_unbatched(self):
        mods = nn.Sequential()
        mods.attn = nn.MultiheadAttention(D, HEADS, kdim=6, vdim=10)  # separate projections, (seq, batch, E)
        mods.single = nn.MultiheadAttention(D, HEADS, batch_first=True)
        q, k, v = torch.randn(5, 2, D), torch.randn(7, 2, 6), torch.randn(7, 2, 10)
        x = torch.randn(4, D)  # unbatched
        kpm = pads([7, 3], 7)
        with torch.no_grad():
            ref, w_ref = mods.attn(q, k, v, key_padding_mask=kpm, average_attn_weights=False)
            ref1, w1_ref = mods.single(x, x, x)  # averaged over heads, as the caller asked
        with torch.no_grad(), heed_capture.record(mods, self.path("kv.npz")):
            out, w = mods.attn(q, k, v, key_padding_mask=kpm, average_attn_weights=False)
            out1, w1 = mods.single(x, x, x)
        # PyTorch's own outputs and weights, returned as the caller asked for them
        torch.testing.assert_close(out, ref, rtol=1e-5, atol=1e-6)
        torch.testing.assert_close(w, w_ref, rtol=1e-5, atol=1e-6)
        torch.testing.assert_close(out1, ref1, rtol=1e-5, atol=1e-6)
        torch.testing.assert_close(w1, w1_ref, rtol=1e-5, atol=1e-6)
        arrays, meta = self.load("kv.npz")
        self.assertEqual((meta["blocks"]["attn"]["kind"], meta["blocks"]["attn"]["key"]), ("cross", "source"))
        self.assertEqual(meta["blocks"]["single"]["kind"], "bidirectional")
        np.testing.assert_allclose(arrays["attn/attn/0"], w_ref.numpy(), rtol=0, atol=1e-6)
        self.assertEqual(arrays["single/attn/0"].shape, (1, HEADS, 4, 4))
        np.testing.assert_array_equal(arrays["valid/source"], (~kpm).numpy().astype(np.int8))

    def test_module_run_twice_refused(self):
        with self.assertRaises(RuntimeError) as cm:
            with heed_capture.record(self.model, self.path("twice.npz")):
                self.model(self.ids, causal(8))
                self.model(self.ids, causal(8))
        self.assertIn("second time", str(cm.exception))
        self.assertFalse(os.path.exists(self.path("twice.npz")))
        self.assertRestored(self.model)

    def test_prune(self):
        before = [l.self_attn.out_proj.weight.detach().clone() for l in self.model.layers]
        plan = {"metric": "importance_norm", "heads": {"layers": {"0": [1, 3], "1": [0]}}, "pruned": 3, "total": 8}
        path = self.path("rank.json")
        with open(path, "w") as f:
            json.dump({"plan": plan}, f)
        blocked = causal(8)
        with torch.no_grad():
            gate = torch.ones(3, 2, HEADS, dtype=torch.float64)
            gate[:, 0, 1] = gate[:, 0, 3] = gate[:, 1, 0] = 0
            ref = explicit(self.model, self.ids, blocked, self.pad, gate=gate)  # Michel et al.'s head mask
        done = heed_capture.prune(self.model, path)
        self.assertEqual(sorted(d[:3] for d in done), [("layers", 0, 1), ("layers", 0, 3), ("layers", 1, 0)])
        Dh = D // HEADS
        for i, l in enumerate(self.model.layers):
            w = l.self_attn.out_proj.weight.detach()
            for h in range(HEADS):
                cols = slice(h * Dh, (h + 1) * Dh)
                if (i, h) in {(0, 1), (0, 3), (1, 0)}:
                    self.assertTrue((w[:, cols] == 0).all())
                else:
                    torch.testing.assert_close(w[:, cols], before[i][:, cols], rtol=0, atol=0)
        with torch.no_grad():
            out = self.model(self.ids, blocked, self.pad)
        torch.testing.assert_close(out, ref, rtol=0, atol=1e-10)
        # refusals name what is wrong, and change nothing
        w0 = self.model.layers[1].self_attn.out_proj.weight.detach().clone()
        for bad, word in [({"decoder": {"0": [0]}}, "'decoder'"), ({"layers": {"2": [0]}}, "layer 2"),
                          ({"layers": {"1": [1, 4]}}, "head 4"), ({"layers.L5": {"0": [0]}}, "layers.L5")]:
            with self.assertRaises(ValueError) as cm:
                heed_capture.prune(self.model, {"heads": bad})
            self.assertIn(word, str(cm.exception))
        torch.testing.assert_close(self.model.layers[1].self_attn.out_proj.weight, w0, rtol=0, atol=0)

    def test_compute_dtype_bfloat16(self):
        model = DecoderOnly().to(torch.bfloat16).eval()
        with heed_capture.record(model, self.path("bf.npz")):
            model(self.ids, causal(8))
        arrays, meta = self.load("bf.npz")
        self.assertEqual(meta["compute_dtype"], "bfloat16")
        self.assertEqual(arrays["layers/attn/0"].dtype, np.float32)


class Custom(nn.Module):
    """Attention written by hand, recorded with rec.attention."""

    def __init__(self):
        super().__init__()
        self.qkv = nn.Linear(D, 3 * D)
        self.rec = None

    def forward(self, x):
        N, L, _ = x.shape
        q, k, v = self.qkv(x).reshape(N, L, 3, 2, D // 2).permute(2, 0, 3, 1, 4)
        s = q @ k.transpose(-1, -2) / math.sqrt(D // 2)
        s = s.masked_fill(causal(L), float("-inf"))
        p = torch.softmax(s, -1)
        if self.rec is not None:
            p = self.rec.attention("decoder", p, kind="causal")
        self.p = p
        p.retain_grad()
        return (p @ v).transpose(1, 2).reshape(N, L, D)


class TestCustom(Base):
    def test_rec_attention(self):
        model = Custom().double()
        x = torch.randn(2, 5, D, dtype=torch.float64)
        with heed_capture.record(model, self.path("c.npz"), tokens=[["a", "b", "c", "d", "e"]] * 2) as rec:
            model.rec = rec
            model(x).pow(2).sum().backward()
        arrays, meta = self.load("c.npz")
        self.assertEqual(meta["blocks"]["decoder"]["kind"], "causal")
        np.testing.assert_array_equal(arrays["decoder/attn/0"], model.p.detach().numpy())
        # autograd's own gradient of the tensor passed
        np.testing.assert_array_equal(arrays["decoder/grad/0"], model.p.grad.numpy())
        self.assertEqual(arrays["tokens/target"].shape, (2, 5))


class SDPACase(Base):
    """F.scaled_dot_product_attention replaced during the record."""

    def check_sdpa(self):
        class Layer(nn.Module):
            def __init__(self):
                super().__init__()
                self.lin = nn.Linear(D, 3 * D)

            def forward(self, x):
                q, k, v = self.lin(x).reshape(x.shape[0], x.shape[1], 3, 2, D // 2).permute(2, 0, 3, 1, 4)
                return F.scaled_dot_product_attention(q, k, v, is_causal=True).transpose(1, 2).reshape(x.shape)

        class M(nn.Module):
            def __init__(self):
                super().__init__()
                self.layers = nn.ModuleList(Layer() for _ in range(2))

            def forward(self, x):
                for layer in self.layers:
                    x = layer(x)
                return x

        model = M()
        x = torch.randn(2, 6, D)
        with torch.no_grad():
            ref = model(x)  # PyTorch's own kernel
        with heed_capture.record(model, self.path("s.npz")):
            out = model(x)
        torch.testing.assert_close(out, ref, rtol=1e-5, atol=1e-5)
        self.assertRestored(model)
        arrays, meta = self.load("s.npz")
        self.assertEqual(meta["blocks"]["layers"]["kind"], "causal")
        self.assertNotIn("layers/allow", arrays)
        a = arrays["layers/attn/1"]
        self.assertEqual(a.shape, (2, 2, 6, 6))
        self.assertTrue((np.triu(a, 1) == 0).all())  # is_causal: nothing after the query
        np.testing.assert_allclose(a.sum(-1), 1, rtol=0, atol=1e-5)


@unittest.skipIf(int(torch.__version__.split(".")[0]) < 2,
                 "torch %s has no F.scaled_dot_product_attention (torch >= 2.0)" % torch.__version__)
class TestSDPA(SDPACase):
    def test_sdpa_recorded(self):
        self.check_sdpa()


def sdpa_stand_in(query, key, value, attn_mask=None, dropout_p=0.0, is_causal=False, scale=None):
    """torch 2's reference implementation of scaled_dot_product_attention as
    its documentation writes it (from memory), for torch < 2, where the
    function does not exist: it lets the patching, naming and restoring run
    here; TestSDPA compares with PyTorch's own kernel on torch >= 2."""
    L, S = query.shape[-2], key.shape[-2]
    s = query @ key.transpose(-2, -1) * (1 / math.sqrt(query.shape[-1]) if scale is None else scale)
    if is_causal:
        s = s.masked_fill(~torch.ones(L, S, dtype=torch.bool).tril(0), float("-inf"))
    if attn_mask is not None:
        s = s.masked_fill(~attn_mask, float("-inf")) if attn_mask.dtype == torch.bool else s + attn_mask
    return torch.softmax(s, -1) @ value


@unittest.skipIf(hasattr(F, "scaled_dot_product_attention"), "torch >= 2.0: TestSDPA uses PyTorch's own kernel")
class TestSDPAStandIn(SDPACase):
    def test_sdpa_recorded(self):
        F.scaled_dot_product_attention = sdpa_stand_in
        try:
            self.check_sdpa()
            self.assertIs(F.scaled_dot_product_attention, sdpa_stand_in)  # restored
        finally:
            del F.scaled_dot_product_attention


if __name__ == "__main__":
    unittest.main()
