"""Tests of heed_capture against PyTorch's own outputs and autograd.

Run: /usr/bin/python3 -m unittest discover -s python -v   (make pycapture)

References: torch.nn.MultiheadAttention's own need_weights=True,
average_attn_weights=False output (its docstring: per-head weights [N,
heads, L, S]); the model's output without recording; torch.autograd for
dL/dA and for the head gate of Michel, Levy & Neubig (2019), whose
derivative is sum_{q,k} A * dL/dA for one example (notes on the derivation
in docs/methods.md).
"""
import json
import os
import sys
import tempfile
import unittest

import numpy as np
import torch

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import heed_capture as hc  # noqa: E402

D, V, S, T, H = 32, 20, 7, 6, 4


class Seq2Seq(torch.nn.Module):
    def __init__(self):
        super().__init__()
        self.emb = torch.nn.Embedding(V, D)
        self.tr = torch.nn.Transformer(D, H, 2, 2, 64, dropout=0.0, batch_first=True)
        self.out = torch.nn.Linear(D, V)

    def forward(self, src, tgt, sp, tp, tm):
        return self.out(self.tr(self.emb(src), self.emb(tgt), tgt_mask=tm, src_key_padding_mask=sp,
                                tgt_key_padding_mask=tp, memory_key_padding_mask=sp))


class DecoderOnly(torch.nn.Module):
    """A decoder-only model built from encoder layers and a causal mask."""

    def __init__(self, layers=2):
        super().__init__()
        self.emb = torch.nn.Embedding(V, D)
        layer = torch.nn.TransformerEncoderLayer(D, H, 64, dropout=0.0, batch_first=True)
        self.body = torch.nn.TransformerEncoder(layer, layers)
        self.out = torch.nn.Linear(D, V)

    def forward(self, ids, mask):
        return self.out(self.body(self.emb(ids), mask=mask))


def batch(seed=0):
    g = torch.Generator().manual_seed(seed)
    src = torch.randint(1, V, (3, S), generator=g)
    tgt = torch.randint(1, V, (3, T), generator=g)
    sp = torch.arange(S)[None] >= torch.tensor([7, 5, 4])[:, None]
    tp = torch.arange(T)[None] >= torch.tensor([6, 6, 3])[:, None]
    return src, tgt, sp, tp


def causal(n):
    return torch.nn.Transformer.generate_square_subsequent_mask(n)


class TestRecord(unittest.TestCase):
    def setUp(self):
        torch.manual_seed(0)
        self.dir = tempfile.mkdtemp()

    def path(self, name):
        return os.path.join(self.dir, name)

    def test_transformer_padded(self):
        m = Seq2Seq().eval()
        src, tgt, sp, tp = batch()
        ref = m(src, tgt, sp, tp, causal(T))
        with hc.record(m, self.path("run.npz"), tokens={"source": [["s"] * S] * 3, "target": [["t"] * T] * 3}):
            out = m(src, tgt, sp, tp, causal(T))
        # the model's output is unchanged by the record (float32 rounding)
        torch.testing.assert_close(out, ref, rtol=1e-5, atol=1e-5)
        z = np.load(self.path("run.npz"))
        meta = json.loads(str(z["meta"]))
        self.assertEqual(meta["format"], "heed-export/1")
        self.assertEqual({b: v["kind"] for b, v in meta["blocks"].items()},
                         {"encoder": "bidirectional", "decoder": "causal", "cross": "cross"})
        self.assertEqual(meta["compute_dtype"], "float32")
        np.testing.assert_array_equal(z["valid/source"], (~sp).numpy().astype(np.int8))
        np.testing.assert_array_equal(z["valid/target"], (~tp).numpy().astype(np.int8))
        # the weights equal the module's own need_weights output (PyTorch)
        with torch.no_grad():
            x = m.emb(src)
            _, w = m.tr.encoder.layers[0].self_attn(x, x, x, key_padding_mask=sp, need_weights=True,
                                                    average_attn_weights=False)
        np.testing.assert_allclose(z["encoder/attn/0"], w.numpy(), rtol=1e-5, atol=1e-6)
        # the exact causal mask is the kind's rule: no allow array
        self.assertNotIn("decoder/allow", z.files)
        # every patched forward and flag is restored
        self.assertTrue(all("forward" not in mm.__dict__ for mm in m.modules()))

    def test_fused_path_no_grad(self):
        # in eval mode without gradients nn.TransformerEncoderLayer takes a
        # fused path that never calls its attention module
        m = DecoderOnly().eval()
        ids = torch.randint(1, V, (2, T))
        with torch.no_grad():
            ref = m(ids, causal(T))
            with hc.record(m, self.path("fused.npz")):
                out = m(ids, causal(T))
        torch.testing.assert_close(out, ref, rtol=1e-5, atol=1e-5)
        z = np.load(self.path("fused.npz"))
        meta = json.loads(str(z["meta"]))
        self.assertEqual(meta["blocks"]["decoder"]["kind"], "causal")  # encoder layers given a causal mask
        self.assertEqual(z["decoder/attn/0"].shape, (2, H, T, T))
        self.assertTrue(all(l.activation_relu_or_gelu for l in m.body.layers))

    def test_off_by_one_recorded_as_given(self):
        m = Seq2Seq().eval()
        src, tgt, sp, tp = batch()
        leak = torch.triu(torch.full((T, T), float("-inf")), diagonal=2)  # k <= q+1 allowed
        with hc.record(m, self.path("leak.npz")):
            m(src, tgt, sp, tp, leak)
        z = np.load(self.path("leak.npz"))
        meta = json.loads(str(z["meta"]))
        self.assertEqual(meta["blocks"]["decoder"]["kind"], "causal")
        allow = z["decoder/allow"]
        q, k = np.indices((T, T))
        np.testing.assert_array_equal(allow, k <= q + 1)
        # the leak is in the data: mass at k = q+1
        self.assertGreater(z["decoder/attn/0"][:, :, 0, 1].min(), 0)

    def test_grad_is_dl_da(self):
        # dL/dA recorded = autograd of the loss with respect to an explicit
        # recomputation's probabilities, and per head |sum A*G| = |dL/dxi|
        # of a gate xi multiplying that head before out_proj (Michel et al.
        # 2019, eq. 2, for one example)
        m = DecoderOnly(layers=1).eval()
        ids = torch.randint(1, V, (1, T))
        tgt = torch.randint(1, V, (1, T))
        with hc.record(m, self.path("grad.npz")):
            out = m(ids, causal(T))
            loss = torch.nn.functional.cross_entropy(out.reshape(-1, V), tgt.reshape(-1))
            loss.backward()
        z = np.load(self.path("grad.npz"))
        A, G = z["decoder/attn/0"][0], z["decoder/grad/0"][0]
        attn = m.body.layers[0].self_attn
        gate = torch.ones(H, requires_grad=True)
        x = m.emb(ids)
        _, probs, _, _ = hc.attention_probs(attn, x, x, x, attn_mask=causal(T))
        probs.retain_grad()
        # the rest of the layer, with the gate on each head's output
        hd = D // H
        wv = attn.in_proj_weight[2 * D:]
        bv = attn.in_proj_bias[2 * D:]
        v = torch.nn.functional.linear(x, wv, bv).view(1, T, H, hd).transpose(1, 2)
        heads = (probs @ v) * gate[None, :, None, None]
        o = attn.out_proj(heads.transpose(1, 2).reshape(1, T, D))
        layer = m.body.layers[0]
        h = layer.norm1(x + o)
        h = layer.norm2(h + layer.linear2(layer.activation(layer.linear1(h))))
        out2 = m.out(h)
        torch.testing.assert_close(out2, out, rtol=1e-5, atol=1e-5)
        loss2 = torch.nn.functional.cross_entropy(out2.reshape(-1, V), tgt.reshape(-1))
        loss2.backward()
        np.testing.assert_allclose(G, probs.grad[0].numpy(), rtol=1e-4, atol=1e-7)
        imp = np.abs((A * G).sum(axis=(1, 2)))
        np.testing.assert_allclose(imp, gate.grad.abs().numpy(), rtol=1e-4, atol=1e-8)

    def test_custom_attention(self):
        m = torch.nn.Linear(4, 4)
        q = torch.randn(2, 3, 5, 8, requires_grad=True)
        k = torch.randn(2, 3, 5, 8)
        with hc.record(m, self.path("custom.npz")) as rec:
            scores = q @ k.transpose(-1, -2) / 8 ** 0.5
            scores = scores.masked_fill(torch.ones(5, 5, dtype=torch.bool).triu(1), float("-inf"))
            a = rec.attention("mine", torch.softmax(scores, -1))
            (a @ torch.randn(2, 3, 5, 8)).sum().backward()
        z = np.load(self.path("custom.npz"))
        meta = json.loads(str(z["meta"]))
        self.assertEqual(meta["blocks"]["mine"]["kind"], "causal")  # from its zeros
        self.assertEqual(z["mine/attn/0"].shape, (2, 3, 5, 5))
        self.assertIn("mine/grad/0", z.files)

    def test_error_writes_nothing(self):
        m = Seq2Seq().eval()
        src, tgt, sp, tp = batch()
        with self.assertRaises(ZeroDivisionError):
            with hc.record(m, self.path("bad.npz")):
                m(src, tgt, sp, tp, causal(T))
                1 / 0
        self.assertFalse(os.path.exists(self.path("bad.npz")))
        self.assertEqual([f for f in os.listdir(self.dir) if f.startswith(".heed-capture")], [])
        self.assertTrue(all("forward" not in mm.__dict__ for mm in m.modules()))

    def test_safetensors(self):
        m = DecoderOnly().eval()
        ids = torch.randint(1, V, (2, T))
        with hc.record(m, self.path("run.safetensors")):
            m(ids, causal(T))
        with open(self.path("run.safetensors"), "rb") as f:
            n = int.from_bytes(f.read(8), "little")
            header = json.loads(f.read(n))
            data = f.read()
        # safetensors format document: offsets relative to the data start,
        # contiguous, the last one ending at the file's end
        e = header["decoder/attn/0"]
        self.assertEqual(e["dtype"], "F32")
        self.assertEqual(n % 8, 0)
        b, end = e["data_offsets"]
        got = np.frombuffer(data[b:end], dtype="<f4").reshape(e["shape"])
        self.assertEqual(got.shape, (2, H, T, T))
        self.assertEqual(max(v["data_offsets"][1] for k, v in header.items() if k != "__metadata__"), len(data))


class TestPrune(unittest.TestCase):
    def test_prune_zeroes_planned_columns(self):
        torch.manual_seed(1)
        m = Seq2Seq().eval()
        before = {n: p.clone() for n, p in m.named_parameters()}
        plan = {"plan": {"heads": {"decoder": {"1": [0, 2]}, "encoder": {"0": [3]}}}}
        done = hc.prune(m, plan)
        self.assertEqual(sorted(done), [("decoder", 1, 0), ("decoder", 1, 2), ("encoder", 0, 3)])
        hd = D // H
        w = m.tr.decoder.layers[1].self_attn.out_proj.weight
        self.assertTrue(bool((w[:, 0:hd] == 0).all()) and bool((w[:, 2 * hd:3 * hd] == 0).all()))
        self.assertTrue(torch.equal(w[:, hd:2 * hd], before["tr.decoder.layers.1.self_attn.out_proj.weight"][:, hd:2 * hd]))
        we = m.tr.encoder.layers[0].self_attn.out_proj.weight
        self.assertTrue(bool((we[:, 3 * hd:] == 0).all()))
        # nothing else changed
        changed = [n for n, p in m.named_parameters() if not torch.equal(p, before[n])]
        self.assertEqual(sorted(changed), ["tr.decoder.layers.1.self_attn.out_proj.weight",
                                           "tr.encoder.layers.0.self_attn.out_proj.weight"])

    def test_prune_equals_head_gate(self):
        # zeroing the columns = gating the head to 0 (Michel et al. 2019)
        torch.manual_seed(2)
        m = DecoderOnly(layers=1).eval()
        ids = torch.randint(1, V, (1, T))
        x = m.emb(ids)
        attn = m.body.layers[0].self_attn
        _, probs, _, _ = hc.attention_probs(attn, x, x, x, attn_mask=causal(T))
        hd = D // H
        v = torch.nn.functional.linear(x, attn.in_proj_weight[2 * D:], attn.in_proj_bias[2 * D:]).view(1, T, H, hd).transpose(1, 2)
        heads = probs @ v
        heads[:, 1] = 0
        want = attn.out_proj(heads.transpose(1, 2).reshape(1, T, D))
        hc.prune(m, {"decoder": {"0": [1]}})
        got, _ = attn(x, x, x, attn_mask=causal(T))
        torch.testing.assert_close(got, want, rtol=1e-5, atol=1e-6)

    def test_prune_refuses(self):
        m = Seq2Seq().eval()
        for plan in ({"nope": {"0": [0]}}, {"decoder": {"5": [0]}}, {"decoder": {"0": [9]}}):
            with self.assertRaises(ValueError):
                hc.prune(m, plan)


@unittest.skipUnless(hasattr(torch.nn.functional, "scaled_dot_product_attention"),
                     "torch < 2.0 has no F.scaled_dot_product_attention")
class TestSDPA(unittest.TestCase):
    def test_sdpa_recorded(self):
        q, k, v = torch.randn(1, 2, 5, 8), torch.randn(1, 2, 5, 8), torch.randn(1, 2, 5, 8)
        ref = torch.nn.functional.scaled_dot_product_attention(q, k, v, is_causal=True)
        d = tempfile.mkdtemp()
        with hc.record(torch.nn.Linear(1, 1), os.path.join(d, "s.npz")):
            out = torch.nn.functional.scaled_dot_product_attention(q, k, v, is_causal=True)
        torch.testing.assert_close(out, ref, rtol=1e-5, atol=1e-6)
        z = np.load(os.path.join(d, "s.npz"))
        self.assertEqual(z["sdpa/attn/0"].shape, (1, 2, 5, 5))


if __name__ == "__main__":
    unittest.main()
