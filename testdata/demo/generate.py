#!/usr/bin/python3
"""Generate the demo exports that heed embeds (heed demo).

Our own invented task: rewrite a date written out in words into ISO 8601,
e.g. "the fourth of july twenty twenty" -> "2020-07-04" (and the reduced
precisions ISO 8601 allows: "july twenty twenty" -> "2020-07", "the year
twenty twenty" -> "2020"). Source tokens are words, target tokens characters.

A small encoder-decoder transformer (2 encoder + 2 decoder layers, 4 heads,
width 64) is trained twice with the same seed and teacher forcing:
  clean: decoder self-attention may see keys k <= q (the causal mask);
  leaky: decoder self-attention may see keys k <= q + 1 (one position ahead).
The leaky run copies the next target character through the mask and reaches
a far lower training loss, and fails at greedy decoding, where the next
character does not exist yet. A decoder-only model on the same task gives a
generation export: the prefill step and one-row KV-cache decode steps.

The attention module computes A = softmax(Q K^T / sqrt(d) + mask) itself and
keeps A in the autograd graph (retain_grad), so dL/dA is exported with A.

Outputs (heed-export/1, see the README): clean.npz, leaky.npz (float32),
clean.h5, leaky.h5 (float16), generation.npz, results.json (training losses
and held-out exact-match accuracies) and checksums.json (sha256 of each).

Usage (run from anywhere; needs Debian's python3 with torch 1.13, numpy, h5py):
  /usr/bin/python3 testdata/demo/generate.py            # write into demo/data
  /usr/bin/python3 testdata/demo/generate.py --out DIR  # write elsewhere
  /usr/bin/python3 testdata/demo/generate.py --check    # regenerate in a temp dir and compare
"""

import argparse
import hashlib
import json
import math
import random
import shutil
import sys
import tempfile
import time
import zipfile
from pathlib import Path

import h5py
import numpy as np
import torch
import torch.nn as nn
import torch.nn.functional as F

SEED = 5
REPO = Path(__file__).resolve().parents[2]
DEFAULT_OUT = REPO / "demo" / "data"

WIDTH, HEADS, FFN = 64, 4, 128
ENC_LAYERS, DEC_LAYERS = 2, 2
STEPS, LM_STEPS, BATCH, LR = 400, 600, 64, 3e-3
N_TRAIN_DATES, N_HELDOUT = 20000, 1000
EXPORT_FILES = ["clean.npz", "leaky.npz", "clean.h5", "leaky.h5", "generation.npz"]


def setup_torch():
    torch.manual_seed(SEED)
    torch.set_num_threads(2)
    torch.use_deterministic_algorithms(True)


# ---------------------------------------------------------------- the task

ONES = ["zero", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine", "ten",
        "eleven", "twelve", "thirteen", "fourteen", "fifteen", "sixteen", "seventeen",
        "eighteen", "nineteen"]
TENS = {2: "twenty", 3: "thirty", 4: "forty", 5: "fifty", 6: "sixty", 7: "seventy",
        8: "eighty", 9: "ninety"}
ORD = ["", "first", "second", "third", "fourth", "fifth", "sixth", "seventh", "eighth", "ninth",
       "tenth", "eleventh", "twelfth", "thirteenth", "fourteenth", "fifteenth", "sixteenth",
       "seventeenth", "eighteenth", "nineteenth"]
ORD_TENS = {2: "twentieth", 3: "thirtieth"}
MONTHS = ["january", "february", "march", "april", "may", "june", "july", "august",
          "september", "october", "november", "december"]
DAYS_IN = [31, 29, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31]

PAD, BOS, EOS, SEP = "<pad>", "<bos>", "<eos>", "<sep>"


def cardinal(n):
    if n < 20:
        return [ONES[n]]
    t, o = divmod(n, 10)
    return [TENS[t]] + ([ONES[o]] if o else [])


def ordinal(d):
    if d < 20:
        return [ORD[d]]
    t, o = divmod(d, 10)
    return [ORD_TENS[t]] if o == 0 else [TENS[t], ORD[o]]


def year_words(y, rng):
    hi, lo = divmod(y, 100)
    if y >= 2000 and (lo < 10 or rng.random() < 0.4):
        w = ["two", "thousand"]
        if lo:
            if rng.random() < 0.5:
                w.append("and")
            w += cardinal(lo)
        return w
    if lo == 0:
        return cardinal(hi) + ["hundred"]
    if lo < 10:
        return cardinal(hi) + ["oh"] + cardinal(lo)
    return cardinal(hi) + cardinal(lo)


def leap(y):
    return y % 4 == 0 and (y % 100 != 0 or y % 400 == 0)


def random_date(rng):
    y = rng.randint(1900, 2099)
    m = rng.randint(1, 12)
    days = 28 if m == 2 and not leap(y) else DAYS_IN[m - 1]
    return y, m, rng.randint(1, days)


def say(date, rng):
    """One way of saying date in words, and its ISO 8601 form at the precision said."""
    y, m, d = date
    yw, mw, dw = year_words(y, rng), [MONTHS[m - 1]], ordinal(d)
    r = rng.random()
    if r < 0.75:
        form = rng.randrange(5)
        words = [
            ["the"] + dw + ["of"] + mw + yw,
            mw + dw + yw,
            mw + ["the"] + dw + yw,
            dw + mw + yw,
            dw + ["of"] + mw + yw,
        ][form]
        # The data mixes ISO 8601's extended (2020-07-04) and basic (20200704)
        # formats at random: the model cannot tell which one a target uses, so
        # a correct model's training loss has a floor; a leaking one reads it.
        iso = ("%04d-%02d-%02d" if rng.random() < 0.5 else "%04d%02d%02d") % (y, m, d)
    elif r < 0.92:
        words = mw + (["of"] if rng.random() < 0.5 else []) + yw
        iso = "%04d-%02d" % (y, m)  # a month has no basic format (YYYYMM is not ISO 8601; from memory)
    else:
        words = ["the", "year"] + yw
        iso = "%04d" % y
    return words, iso


def accepted(iso):
    """The answers exact match accepts: a day in either ISO 8601 format."""
    if len(iso) == 10:
        return {iso, iso.replace("-", "")}
    if len(iso) == 8:
        return {iso, "%s-%s-%s" % (iso[:4], iso[4:6], iso[6:])}
    return {iso}


def make_data():
    rng = random.Random(SEED)
    held_dates = set()
    while len(held_dates) < N_HELDOUT:
        held_dates.add(random_date(rng))
    held_dates = sorted(held_dates)
    heldout = [say(d, rng) for d in held_dates]
    rng.shuffle(heldout)
    train = []
    while len(train) < N_TRAIN_DATES:
        d = random_date(rng)
        if d in held_dates:
            continue
        train.append(say(d, rng))
    return train, heldout


SRC_VOCAB = [PAD] + sorted(set(ONES) | set(TENS.values()) | set(ORD[1:]) | set(ORD_TENS.values())
                           | set(MONTHS) | {"the", "of", "oh", "hundred", "thousand", "and", "year"})
TGT_VOCAB = [PAD, BOS, EOS] + list("0123456789-")
SI = {w: i for i, w in enumerate(SRC_VOCAB)}
TI = {c: i for i, c in enumerate(TGT_VOCAB)}


def encode_batch(pairs):
    """Right-padded source ids, decoder inputs ([bos] + chars), labels (chars + [eos])."""
    S = max(len(w) for w, _ in pairs)
    T = max(len(iso) for _, iso in pairs) + 1
    src = torch.zeros(len(pairs), S, dtype=torch.long)
    dec = torch.zeros(len(pairs), T, dtype=torch.long)
    lab = torch.zeros(len(pairs), T, dtype=torch.long)
    for b, (words, iso) in enumerate(pairs):
        src[b, :len(words)] = torch.tensor([SI[w] for w in words])
        chars = [TI[c] for c in iso]
        dec[b, :len(chars) + 1] = torch.tensor([TI[BOS]] + chars)
        lab[b, :len(chars) + 1] = torch.tensor(chars + [TI[EOS]])
    return src, dec, lab


# ---------------------------------------------------------------- the model

class Attention(nn.Module):
    """Multi-head attention that computes A = softmax(Q K^T / sqrt(d) + mask)
    explicitly and keeps A (with its gradient after backward) in self.A."""

    def __init__(self):
        super().__init__()
        self.q, self.k, self.v, self.o = (nn.Linear(WIDTH, WIDTH) for _ in range(4))
        self.A = None

    def split(self, x):
        B, T, _ = x.shape
        return x.view(B, T, HEADS, WIDTH // HEADS).transpose(1, 2)

    def forward(self, x, mem, mask, cache=None):
        """mask: additive, broadcastable to [batch, head, query, key] (0 or -inf).
        cache: a dict holding earlier keys and values (KV cache); new ones are appended."""
        q, k, v = self.split(self.q(x)), self.split(self.k(mem)), self.split(self.v(mem))
        if cache is not None:
            if "k" in cache:
                k, v = torch.cat([cache["k"], k], 2), torch.cat([cache["v"], v], 2)
            cache["k"], cache["v"] = k, v
        A = torch.softmax(q @ k.transpose(-2, -1) / math.sqrt(WIDTH // HEADS) + mask, dim=-1)
        if A.requires_grad:
            A.retain_grad()
        self.A = A
        out = (A @ v).transpose(1, 2).reshape(x.shape[0], x.shape[1], WIDTH)
        return self.o(out)


def ffn():
    return nn.Sequential(nn.Linear(WIDTH, FFN), nn.ReLU(), nn.Linear(FFN, WIDTH))


class EncoderLayer(nn.Module):
    def __init__(self):
        super().__init__()
        self.n1, self.att, self.n2, self.ff = nn.LayerNorm(WIDTH), Attention(), nn.LayerNorm(WIDTH), ffn()

    def forward(self, x, mask):
        h = self.n1(x)
        x = x + self.att(h, h, mask)
        return x + self.ff(self.n2(x))


class DecoderLayer(nn.Module):
    def __init__(self, cross=True):
        super().__init__()
        self.n1, self.att = nn.LayerNorm(WIDTH), Attention()
        self.cross = cross
        if cross:
            self.nc, self.catt = nn.LayerNorm(WIDTH), Attention()
        self.n2, self.ff = nn.LayerNorm(WIDTH), ffn()

    def forward(self, x, mask, mem=None, cmask=None, cache=None):
        h = self.n1(x)
        x = x + self.att(h, h, mask, cache)
        if self.cross:
            x = x + self.catt(self.nc(x), mem, cmask)
        return x + self.ff(self.n2(x))


class Seq2Seq(nn.Module):
    def __init__(self):
        super().__init__()
        self.semb, self.temb = nn.Embedding(len(SRC_VOCAB), WIDTH), nn.Embedding(len(TGT_VOCAB), WIDTH)
        self.spos, self.tpos = nn.Embedding(16, WIDTH), nn.Embedding(16, WIDTH)
        self.enc = nn.ModuleList(EncoderLayer() for _ in range(ENC_LAYERS))
        self.dec = nn.ModuleList(DecoderLayer() for _ in range(DEC_LAYERS))
        self.enorm, self.dnorm = nn.LayerNorm(WIDTH), nn.LayerNorm(WIDTH)
        self.out = nn.Linear(WIDTH, len(TGT_VOCAB))

    def forward(self, src, dec, ahead):
        """Logits for every decoder position. ahead = how many positions past
        the query the decoder mask lets through (0 = causal, 1 = the leak)."""
        S, T = src.shape[1], dec.shape[1]
        svalid, tvalid = src != 0, dec != 0
        neg = float("-inf")
        smask = torch.zeros(src.shape[0], 1, 1, S).masked_fill(~svalid[:, None, None, :], neg)
        q = torch.arange(T)[:, None]
        k = torch.arange(T)[None, :]
        allow = (k <= q + ahead)[None, None] & tvalid[:, None, None, :]
        tmask = torch.zeros(allow.shape).masked_fill(~allow, neg)
        x = self.semb(src) + self.spos(torch.arange(S))
        for layer in self.enc:
            x = layer(x, smask)
        mem = self.enorm(x)
        y = self.temb(dec) + self.tpos(torch.arange(T))
        for layer in self.dec:
            y = layer(y, tmask, mem, smask)
        return self.out(self.dnorm(y))

    def attentions(self):
        enc = [l.att.A for l in self.enc]
        dec = [l.att.A for l in self.dec]
        cross = [l.catt.A for l in self.dec]
        return {"encoder": enc, "decoder": dec, "cross": cross}


def loss_floor(data):
    """The lowest mean per-token loss a model that cannot see ahead can reach:
    ln 2 (the extended / basic format coin flip) once per day-precision target,
    over every label token (characters + <eos>). Derived, not measured."""
    days = sum(1 for _, iso in data if len(iso) in (8, 10))
    tokens = sum(len(iso) + 1 for _, iso in data)
    return round(days * math.log(2) / tokens, 6)


def masked_ce(logits, lab):
    return F.cross_entropy(logits.reshape(-1, logits.shape[-1]), lab.reshape(-1), ignore_index=0)


def train(model, data, ahead, make_batch, label, steps=STEPS):
    """Teacher forcing with Adam; returns the loss every 100 steps and the mean of the last 100."""
    rng = random.Random(SEED + 1)
    opt = torch.optim.Adam(model.parameters(), lr=LR)
    sched = torch.optim.lr_scheduler.LambdaLR(
        opt, lambda s: min(1.0, (s + 1) / 100) * max(0.05, 1 - s / steps))
    curve, recent = [], []
    t0 = time.time()
    model.train()
    for step in range(steps):
        batch = [data[rng.randrange(len(data))] for _ in range(BATCH)]
        loss = make_batch(model, batch, ahead)
        opt.zero_grad()
        loss.backward()
        opt.step()
        sched.step()
        recent.append(loss.item())
        if (step + 1) % 100 == 0:
            curve.append(round(sum(recent[-100:]) / 100, 6))
            print(f"  {label} step {step + 1:5d}  loss {curve[-1]:.5f}  ({time.time() - t0:.0f}s)", flush=True)
    return curve, curve[-1]


def seq2seq_loss(model, batch, ahead):
    src, dec, lab = encode_batch(batch)
    return masked_ce(model(src, dec, ahead), lab)


@torch.no_grad()
def greedy_seq2seq(model, pairs, ahead):
    """Exact-match accuracy of greedy decoding (re-running the decoder on the
    prefix each step, with the same mask as in training)."""
    model.eval()
    src, _, _ = encode_batch(pairs)
    dec = torch.full((len(pairs), 1), TI[BOS])
    for _ in range(11):
        nxt = model(src, dec, ahead)[:, -1].argmax(-1)
        dec = torch.cat([dec, nxt[:, None]], 1)
    right = 0
    for b, (_, iso) in enumerate(pairs):
        out = ""
        for i in dec[b, 1:].tolist():
            if i == TI[EOS] or TGT_VOCAB[i] in (PAD, BOS):
                break
            out += TGT_VOCAB[i]
        right += out in accepted(iso)
    return right / len(pairs)


# ------------------------------------------------------- decoder-only model

LM_VOCAB = [PAD] + SRC_VOCAB[1:] + [SEP, EOS] + list("0123456789-")
LI = {w: i for i, w in enumerate(LM_VOCAB)}


class DecoderOnly(nn.Module):
    def __init__(self):
        super().__init__()
        self.emb, self.pos = nn.Embedding(len(LM_VOCAB), WIDTH), nn.Embedding(32, WIDTH)
        self.layers = nn.ModuleList(DecoderLayer(cross=False) for _ in range(DEC_LAYERS))
        self.norm, self.out = nn.LayerNorm(WIDTH), nn.Linear(WIDTH, len(LM_VOCAB))

    def forward(self, ids, valid, start=0, caches=None):
        """ids [batch, new positions]; valid [batch, all positions so far]
        (1 = real token; left padding). start = positions already in caches."""
        B, T = ids.shape
        K = valid.shape[1]
        pos = (valid.cumsum(1) - 1).clamp(min=0)[:, start:start + T]
        qa = torch.arange(start, start + T)[:, None]
        ka = torch.arange(K)[None, :]
        # a left-padding query row sees only itself (its output is never used)
        allow = (ka <= qa)[None, None] & (valid[:, None, None, :].bool() | (ka == qa)[None, None])
        mask = torch.zeros(allow.shape).masked_fill(~allow, float("-inf"))
        x = self.emb(ids) + self.pos(pos)
        for i, layer in enumerate(self.layers):
            x = layer(x, mask, cache=None if caches is None else caches[i])
        return self.out(self.norm(x))


def lm_batch(pairs):
    """Right-padded training sequences words <sep> chars <eos>; loss on the answer only."""
    seqs = [[LI[w] for w in words] + [LI[SEP]] + [LI[c] for c in iso] + [LI[EOS]] for words, iso in pairs]
    L = max(len(s) for s in seqs)
    ids = torch.zeros(len(seqs), L, dtype=torch.long)
    lab = torch.zeros(len(seqs), L, dtype=torch.long)
    for b, ((words, _), s) in enumerate(zip(pairs, seqs)):
        ids[b, :len(s)] = torch.tensor(s)
        n = len(words)
        lab[b, n:len(s) - 1] = torch.tensor(s[n + 1:])
    return ids, lab


def lm_loss(model, batch, ahead):
    ids, lab = lm_batch(batch)
    return masked_ce(model(ids, (ids != 0).long()), lab)


@torch.no_grad()
def generate(model, prompts, steps):
    """Batched greedy generation with a KV cache and left padding. Returns the
    attention of the prefill and of each decode step, the token strings and the
    padding of every step, and the decoded answers."""
    model.eval()
    P = max(len(p) for p in prompts) + 1
    ids = torch.zeros(len(prompts), P, dtype=torch.long)
    for b, p in enumerate(prompts):
        ids[b, P - len(p) - 1:] = torch.tensor([LI[w] for w in p] + [LI[SEP]])
    valid = (ids != 0).long()
    caches = [{} for _ in model.layers]
    logits = model(ids, valid, 0, caches)
    records = [("prefill", [l.att.A.clone() for l in model.layers], ids.clone(), valid.clone())]
    nxt = logits[:, -1].argmax(-1)
    for t in range(1, steps + 1):
        ids = torch.cat([ids, nxt[:, None]], 1)
        valid = torch.cat([valid, torch.ones(len(prompts), 1, dtype=torch.long)], 1)
        logits = model(ids[:, -1:], valid, ids.shape[1] - 1, caches)
        records.append((f"step.{t:02d}", [l.att.A.clone() for l in model.layers], ids.clone(), valid.clone()))
        nxt = logits[:, -1].argmax(-1)
    answers = []
    for b in range(len(prompts)):
        s = ""
        for i in ids[b, P:].tolist() + [nxt[b].item()]:
            if LM_VOCAB[i] == EOS:
                break
            s += LM_VOCAB[i]
        answers.append(s)
    return records, answers


@torch.no_grad()
def greedy_lm(model, pairs):
    right = 0
    for i in range(0, len(pairs), 250):
        chunk = pairs[i:i + 250]
        _, answers = generate(model, [w for w, _ in chunk], 10)
        right += sum(a in accepted(iso) for a, (_, iso) in zip(answers, chunk))
    return right / len(pairs)


# ---------------------------------------------------------------- writing

def write_npz(path, arrays):
    """NPZ as numpy.savez writes it (ZIP_STORED members NAME.npy with zip64
    extras), but with a fixed member timestamp so the file is reproducible."""
    with zipfile.ZipFile(path, "w", zipfile.ZIP_STORED, allowZip64=True) as zf:
        for name, arr in arrays.items():
            info = zipfile.ZipInfo(name + ".npy", date_time=(1980, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_STORED
            with zf.open(info, "w", force_zip64=True) as f:
                np.lib.format.write_array(f, np.asanyarray(arr), allow_pickle=False)


def write_h5(path, arrays, float_dtype):
    """HDF5 via h5py: floats as float_dtype, tokens as h5py writes Python str
    (variable-length UTF-8), metadata as the root attribute "meta"."""
    with h5py.File(path, "w") as f:
        for name, arr in arrays.items():
            if name == "meta":
                f.attrs["meta"] = str(arr)
            elif arr.dtype.kind == "U":
                f.create_dataset(name, data=arr.astype(object), dtype=h5py.string_dtype("utf-8"))
            elif arr.dtype.kind == "f":
                f.create_dataset(name, data=arr.astype(float_dtype))
            else:
                f.create_dataset(name, data=arr)


def stack(mats):
    """A list over layers of [batch, head, q, k] tensors -> float32 [layer, batch, head, q, k]."""
    return torch.stack([m.detach() for m in mats]).numpy().astype(np.float32)


def seq2seq_export(model, pairs, ahead, run):
    """Teacher-forced forward and backward pass over one padded batch with the
    run's own mask: attention, dL/dA, tokens, padding, logits and metadata."""
    model.eval()
    src, dec, lab = encode_batch(pairs)
    model.zero_grad()
    logits = model(src, dec, ahead)
    loss = masked_ce(logits, lab)
    loss.backward()
    arrays = {}
    for block, mats in model.attentions().items():
        arrays[block + "/attn"] = stack(mats)
        arrays[block + "/grad"] = stack([m.grad for m in mats])
    arrays["logits"] = logits.detach().numpy().astype(np.float32)
    arrays["tokens/source"] = np.array([[SRC_VOCAB[i] for i in row] for row in src.tolist()])
    arrays["tokens/target"] = np.array([[TGT_VOCAB[i] for i in row] for row in dec.tolist()])
    arrays["valid/source"] = (src != 0).numpy().astype(np.int8)
    arrays["valid/target"] = (dec != 0).numpy().astype(np.int8)
    axes = "layer batch head query key"
    mask = "k <= q" if ahead == 0 else "k <= q+%d (leaks %d position%s ahead)" % (ahead, ahead, "s" * (ahead > 1))
    meta = {
        "format": "heed-export/1",
        "blocks": {
            "encoder": {"kind": "bidirectional", "query": "source", "key": "source", "axes": axes},
            "decoder": {"kind": "causal", "query": "target", "key": "target", "axes": axes},
            "cross": {"kind": "cross", "query": "target", "key": "source", "axes": axes},
        },
        "description": "heed demo (%s run): words -> ISO 8601 dates, 2+2 layers, 4 heads, width 64; "
                       "decoder mask as trained: %s; grad = dL/dA of the teacher-forced loss" % (run, mask),
    }
    arrays["meta"] = np.array(json.dumps(meta, sort_keys=True))
    return arrays, float(loss.item())


def generation_export(records, answers):
    arrays = {}
    blocks = {}
    for name, mats, ids, valid in records:
        arrays[name + "/attn"] = stack(mats)
        arrays["tokens/" + name] = np.array([[LM_VOCAB[i] for i in row] for row in ids.tolist()])
        arrays["valid/" + name] = valid.numpy().astype(np.int8)
        blocks[name] = {"kind": "causal", "query": name, "key": name, "axes": "layer batch head query key"}
    meta = {
        "format": "heed-export/1",
        "blocks": blocks,
        "description": "heed demo: greedy generation of a decoder-only model (2 layers, 4 heads, width 64) "
                       "with a KV cache and left padding; prefill = the prompt, step.NN = one new query "
                       "over every cached key; answers: " + ", ".join(answers),
    }
    arrays["meta"] = np.array(json.dumps(meta, sort_keys=True))
    return arrays


def leak_stats(attn, valid):
    """Per (layer, head): mean over judged rows (a valid query with a valid key
    at q+1) of the mass at k = q+1; and where to look: the (layer, head) with the
    largest mean, in the batch item with the longest target."""
    L, B, H, T, _ = attn.shape
    lens = [int(valid[b].sum()) for b in range(B)]
    mean = np.zeros((L, H))
    for l in range(L):
        for h in range(H):
            mean[l, h] = float(np.mean([attn[l, b, h, q, q + 1] for b in range(B) for q in range(lens[b] - 1)]))
    l, h = np.unravel_index(int(np.argmax(mean)), mean.shape)
    return mean, (float(mean[l, h]), int(l), int(h), int(np.argmax(lens)))


def sha256(path):
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def export_pairs(heldout):
    """A batch of four held-out examples of different source and target lengths."""
    want = [lambda w, iso: len(iso) == 10 and w[0] == "the" and len(w) >= 8,
            lambda w, iso: len(iso) == 7,
            lambda w, iso: len(iso) == 8 and w[0] in MONTHS,
            lambda w, iso: len(iso) == 4]
    picked = []
    for ok in want:
        picked.append(next(p for p in heldout if ok(*p) and p not in picked))
    return picked


def generate_all(out):
    out.mkdir(parents=True, exist_ok=True)
    t0 = time.time()
    train_data, heldout = make_data()
    pairs = export_pairs(heldout)
    results = {"task": "dates in words -> ISO 8601 (word-level source, character-level target)",
               "model": "encoder-decoder, %d encoder + %d decoder layers, %d heads, width %d, ffn %d"
                        % (ENC_LAYERS, DEC_LAYERS, HEADS, WIDTH, FFN),
               "training": "teacher forcing, Adam lr %g, %d steps of %d examples, seed %d, %d training dates"
                           % (LR, STEPS, BATCH, SEED, N_TRAIN_DATES),
               "heldout": N_HELDOUT,
               "clean_loss_floor": loss_floor(train_data),
               "runs": {}}
    for run, ahead in (("clean", 0), ("leaky", 1)):
        setup_torch()
        model = Seq2Seq()
        print(f"{run}: decoder mask k <= q{'+1' if ahead else ''}", flush=True)
        curve, final = train(model, train_data, ahead, seq2seq_loss, run)
        acc = greedy_seq2seq(model, heldout, ahead)
        arrays, export_loss = seq2seq_export(model, pairs, ahead, run)
        write_npz(out / f"{run}.npz", arrays)
        write_h5(out / f"{run}.h5", arrays, np.float16)
        mean, (m, l, h, b) = leak_stats(arrays["decoder/attn"], arrays["valid/target"])
        results["runs"][run] = {
            "decoder_mask": "k <= q" if ahead == 0 else "k <= q+1",
            "train_loss": final,
            "train_loss_every_100_steps": curve,
            "heldout_exact_match": acc,
            "export_batch_loss": round(export_loss, 6),
            "decoder_mass_at_q_plus_1": [[round(v, 4) for v in row] for row in mean.tolist()],
        }
        if ahead:
            results["runs"][run]["strongest_plus_1_head"] = {"at": f"decoder:L{l}:H{h}:B{b}", "mean_mass": round(m, 4)}
        print(f"{run}: final training loss {final:.5f}, held-out greedy exact match {acc:.3f}", flush=True)

    setup_torch()
    lm = DecoderOnly()
    print("decoder-only (generation export): causal mask", flush=True)
    curve, final = train(lm, train_data, 0, lm_loss, "decoder-only", LM_STEPS)
    acc = greedy_lm(lm, heldout)
    gen_pairs = [pairs[2], pairs[1], pairs[3]]
    records, answers = generate(lm, [w for w, _ in gen_pairs], 10)
    write_npz(out / "generation.npz", generation_export(records, answers))
    results["generation"] = {
        "model": "decoder-only, %d layers, %d heads, width %d" % (DEC_LAYERS, HEADS, WIDTH),
        "training": "causal mask, Adam lr %g, %d steps of %d examples, seed %d" % (LR, LM_STEPS, BATCH, SEED),
        "train_loss": final, "train_loss_every_100_steps": curve, "heldout_exact_match": acc,
        "prompts": [" ".join(w) for w, _ in gen_pairs], "expected": [iso for _, iso in gen_pairs],
        "answers": answers, "decode_steps": 10,
    }
    print(f"decoder-only: final training loss {final:.5f}, held-out greedy exact match {acc:.3f}", flush=True)
    results["export_batch"] = [{"source": " ".join(w), "target": iso} for w, iso in pairs]
    lk = results["runs"]["leaky"]["strongest_plus_1_head"]["at"]
    results["demo"] = {
        "open": "leaky.npz",
        "at": lk,
        "hint": "leaky.npz was trained with a decoder mask that lets each position see one ahead "
                "(k <= q+1): look at the cells just right of the diagonal in " + lk.rsplit(":", 1)[0],
    }
    (out / "results.json").write_text(json.dumps(results, indent=1, sort_keys=True) + "\n")
    sums = {name: sha256(out / name) for name in EXPORT_FILES + ["results.json"]}
    (out / "checksums.json").write_text(json.dumps(sums, indent=1, sort_keys=True) + "\n")
    print(f"wrote {', '.join(EXPORT_FILES)}, results.json, checksums.json to {out} in {time.time() - t0:.0f}s")
    return results


# ---------------------------------------------------------------- --check

def semantic_facts(d):
    """Facts that must hold whatever the bits: shapes, tokens, leak absent in
    the clean run and present in the leaky one, and the accuracy story."""
    facts = {}
    for run in ("clean", "leaky"):
        z = np.load(d / f"{run}.npz")
        dec = z["decoder/attn"]
        valid = z["valid/target"]
        above = 0.0
        for b in range(dec.shape[1]):
            n = int(valid[b].sum())
            sub = dec[:, b, :, :n, :n]
            above = max(above, float(np.triu(sub, 1).sum(-1).max()))
        facts[run] = {
            "shapes": {k: list(z[k].shape) for k in sorted(z.files)},
            "tokens": {k: z[k].tolist() for k in ("tokens/source", "tokens/target")},
            "max_row_mass_above_diagonal": above,
        }
        with h5py.File(d / f"{run}.h5", "r") as f:
            facts[run]["h5_shapes"] = {k: list(f[k].shape) for k in sorted(z.files) if k != "meta"}
    z = np.load(d / "generation.npz")
    facts["generation"] = {"shapes": {k: list(z[k].shape) for k in sorted(z.files)}}
    facts["results"] = json.loads((d / "results.json").read_text())
    return facts


def check(committed):
    want = json.loads((committed / "checksums.json").read_text())
    tmp = Path(tempfile.mkdtemp(prefix="heed-demo-check-"))
    try:
        generate_all(tmp)
        got = json.loads((tmp / "checksums.json").read_text())
        differ = sorted(n for n in want if want.get(n) != got.get(n)) + sorted(set(got) - set(want))
        if not differ:
            print("check: bit-exact: every regenerated file matches checksums.json")
            return 0
        print("check: not bit-exact; files that differ: " + ", ".join(differ))
        a, b = semantic_facts(committed), semantic_facts(tmp)
        problems = []
        for run in ("clean", "leaky"):
            for key in ("shapes", "h5_shapes", "tokens"):
                if a[run][key] != b[run][key]:
                    problems.append(f"{run}: {key} differ")
        if a["generation"]["shapes"] != b["generation"]["shapes"]:
            problems.append("generation: shapes differ")
        if b["clean"]["max_row_mass_above_diagonal"] != 0.0:
            problems.append("clean run: decoder attention above the diagonal")
        if b["leaky"]["max_row_mass_above_diagonal"] < 0.5:
            problems.append("leaky run: no strong +1 leak in the decoder")
        rc, rl = b["results"]["runs"]["clean"], b["results"]["runs"]["leaky"]
        if not rl["train_loss"] < rc["train_loss"] / 5:
            problems.append("leaky run's training loss is not far below the clean run's")
        if not rc["heldout_exact_match"] > rl["heldout_exact_match"] + 0.5:
            problems.append("clean run does not beat the leaky run at greedy decoding")
        for run in ("clean", "leaky"):
            x, y = a["results"]["runs"][run], b["results"]["runs"][run]
            print(f"  {run}: train loss {x['train_loss']} -> {y['train_loss']}, "
                  f"exact match {x['heldout_exact_match']} -> {y['heldout_exact_match']}")
        if problems:
            print("check: FAILED: " + "; ".join(problems))
            return 1
        print("check: semantically reproducible (shapes, tokens, leak absent/present, loss and accuracy story)")
        return 0
    finally:
        shutil.rmtree(tmp)


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", type=Path, default=DEFAULT_OUT, help="output directory (default demo/data)")
    ap.add_argument("--check", action="store_true",
                    help="regenerate in a temporary directory and compare with the committed outputs")
    args = ap.parse_args()
    if args.check:
        sys.exit(check(args.out))
    # write beside the outputs first, then move each file into place, so that
    # a build during the run never embeds half of one run and half of another
    args.out.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=".generate-", dir=args.out))
    try:
        generate_all(tmp)
        for f in sorted(tmp.iterdir()):
            f.replace(args.out / f.name)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
