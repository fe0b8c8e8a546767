"""Build the two demo recognisers: train with torch, export to ONNX, write cards.

Usage (needs the ``train`` extra: ``pip install -e .[train]``)::

    python models/build.py train ctc --minutes 35 --threads 1
    python models/build.py train seq --minutes 90 --threads 1
    python models/build.py export            # ONNX, parity checks, cards, figures

On a machine with an accelerator and many cores (one drawing core feeds neither)::

    python models/build.py train ctc --minutes 8 --device cuda --workers 14 --batch 64

Training is deterministic by seed for a given number of steps; the time budget
decides how many steps are run, so the figures of a rebuild may differ slightly.
Checkpoints go to ``models/_work/`` (ignored by git) so training can resume.

The data generator (``ocrbench.synth.line_samples``) and the batching
(``ocrbench.recognisers.preprocess``) are the ones the runner uses; with ``train --clean`` the lines are
also cleaned as the demo cards clean crops (flatten, trim), so the models see at training time exactly
the preprocessing they get at run time.
This module imports torch lazily: ``make_batch_lines`` runs without it.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import math
import os
import random
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

from ocrbench import synth  # noqa: E402
import linegen  # noqa: E402  (models/linegen.py: many typefaces, held-out design families)
from ocrbench.pages.crops import clean_crop  # noqa: E402
from ocrbench.recognisers.preprocess import InputSpec, make_batch, resize_line  # noqa: E402

WORK = Path(os.environ.get("OCRBENCH_BUILD_WORK", HERE / "_work"))
# Weights-only checkpoints committed to git, so training can resume in a later session.
CKPT_DIR = Path(os.environ.get("OCRBENCH_BUILD_CKPT", HERE / "checkpoints"))
MAX_TRAIN_WIDTH = 2400          # resized training lines wider than this are drawn again (cost bound)
OUT = Path(os.environ.get("OCRBENCH_BUILD_OUT", HERE))
SPEC = InputSpec(height=32, width_multiple=4)
CTC_NAME = "ledger-ctc"
SEQ_NAME = "ledger-seq"

# Vocabularies. CTC: blank at 0, then the alphabet. Seq: pad, bos, eos, then the alphabet.
CTC_CLASSES = ["<blank>"] + list(synth.ALPHABET)
SEQ_VOCAB = ["<pad>", "<bos>", "<eos>"] + list(synth.ALPHABET)
PAD, BOS, EOS = 0, 1, 2
D_MODEL, N_HEADS, N_LAYERS, D_FF = 192, 4, 3, 576
MAX_TOKENS = 200
JOINT_WEIGHT = 0.5              # the seq card's seq.ctc.weight (chosen on training-family lines: models/README.md)


# --------------------------------------------------------------------------- data (no torch)


def make_batch_lines(rng: random.Random, n: int):
    """n training lines as training draws them (linegen.train_line): (batch (n,1,32,W) float32, widths, texts)."""
    imgs, texts = [], []
    for _ in range(n):
        img, text = linegen.train_line(rng)
        imgs.append(resize_line(np.asarray(img), SPEC))
        texts.append(text)
    batch, widths = make_batch(imgs, SPEC)
    return batch, widths, texts


def heldout_lines(n: int = 300, seed: int = 987654, *, kinds=("ledger", "prose", "numbers", "chars")):
    """Held-out lines: unseen seeds, every other line in a face held out of training.

    ``kinds`` filters the content: the accuracy targets are stated on text lines
    (ledger, prose, numbers); strings of random characters are reported apart,
    since several glyph pairs (I/l, O/0) are near-identical in these faces.
    """
    rng = random.Random(seed)
    out = []
    i = 0
    while len(out) < n:
        fonts = synth.HELDOUT_FONTS if i % 2 else synth.TRAIN_FONTS
        img, text, kind = synth.line_sample_with_kind(rng, fonts)
        i += 1
        if kind in kinds:
            out.append((resize_line(np.asarray(img), SPEC), text))
    return out


TEXT_KINDS = ("ledger", "prose", "numbers")


#: ``train --clean``: training lines are cleaned as the demo cards clean crops at run time ([input] flatten and
#: trim: ocrbench.pages.crops.clean_crop) before they are resized.
CLEAN_AS_CARDS = {"on": False}


def draw_pool(key, n: int, clean: bool | None = None) -> list[tuple[np.ndarray, str]]:
    """``n`` training lines drawn from the seed ``key`` (resized to the model's height, none wider than
    MAX_TRAIN_WIDTH), sorted by width so batches cut from it carry little padding. ``clean``: clean them
    as the cards clean crops (``train --clean``; by default as ``CLEAN_AS_CARDS`` says). No torch."""
    rng = random.Random(key)
    pool = []
    if clean is None:
        clean = CLEAN_AS_CARDS["on"]
    while len(pool) < n:
        im, t = linegen.train_line(rng)
        a = np.asarray(im)
        if clean:
            a = clean_crop(a, flatten=True, trim=True)
        r = resize_line(a, SPEC)
        if r.shape[1] <= MAX_TRAIN_WIDTH and t:
            pool.append((r, t))
    pool.sort(key=lambda p: p[0].shape[1])
    return pool


class LineFeed:
    """Batches of training lines, drawn in this process (``workers`` 0) or by worker processes.

    Line drawing costs about 5 ms a line on one core; on a machine whose accelerator trains far faster
    than one core draws, ``workers`` processes keep ``2 x workers`` pools in flight. Every pool is a
    function of its seed alone, so a run is reproducible for a given seed, start step and worker count."""

    def __init__(self, seed: int, start_step: int, batch_size: int, workers: int = 0):
        self.seed, self.start, self.batch, self.workers = seed, start_step, batch_size, workers
        self.queue: list = []
        self.drawn = 0
        self.pending: list = []
        self.pool = None
        if workers > 0:
            # fresh interpreters, not forks: a fork copies whatever lock another thread (a BLAS pool, the
            # font loader) held at that moment, and a worker waiting on it never returns its pool
            import multiprocessing
            self.pool = multiprocessing.get_context("spawn").Pool(workers)

    def _key(self, step: int):
        if self.pool is None:
            return self.seed * 1_000_003 + step
        self.drawn += 1
        return f"{self.seed}:{self.start}:{self.drawn}"

    def next(self, step: int) -> list[tuple[np.ndarray, str]]:
        if not self.queue:
            if self.pool is None:
                key = self._key(step)
                pool = draw_pool(key, self.batch * 4)
            else:
                while len(self.pending) < 2 * self.workers:
                    key = self._key(step)
                    self.pending.append((key, self.pool.apply_async(draw_pool,
                                                                    (key, self.batch * 4, CLEAN_AS_CARDS["on"]))))
                key, res = self.pending.pop(0)
                pool = res.get()
            self.queue = [pool[i:i + self.batch] for i in range(0, len(pool), self.batch)]
            random.Random(str(key)).shuffle(self.queue)
        return self.queue.pop()

    def close(self) -> None:
        """Let the workers finish the pools in flight, then end them (rather than ``Pool.terminate``). With
        forked workers the build-script test, which ends a feed with pools in flight, ran into its 120 s
        timeout in 2 of about 14 runs on 2026-12-03; the workers are spawned since."""
        if self.pool is not None:
            self.pending.clear()
            self.pool.close()
            self.pool.join()
            self.pool = None


def collapse_ws(s: str) -> str:
    return " ".join(s.split())


def cer(refs, hyps) -> float:
    from rapidfuzz.distance import Levenshtein
    e = sum(Levenshtein.distance(r, h) for r, h in zip(refs, hyps))
    n = sum(len(r) for r in refs)
    return e / max(1, n)


# --------------------------------------------------------------------------- models


def build_modules():
    import torch
    from torch import nn

    def conv_stack(channels=(16, 32, 64, 96, 128, 128)):
        pools = [(2, 2), (2, 2), None, (2, 1), (2, 1), (2, 1)]
        layers, cin = [], 1
        for cout, p in zip(channels, pools):
            layers += [nn.Conv2d(cin, cout, 3, padding=1, bias=False), nn.BatchNorm2d(cout), nn.ReLU(inplace=True)]
            if p:
                layers.append(nn.MaxPool2d(p, p))
            cin = cout
        return nn.Sequential(*layers), cin

    class CRNN(nn.Module):
        """Convolutions (height 32 -> 1, width / 4), two BiLSTM layers, a linear classifier."""

        def __init__(self, n_classes: int):
            super().__init__()
            self.conv, c = conv_stack()
            self.rnn = nn.LSTM(c, 128, num_layers=2, bidirectional=True, batch_first=True)
            self.fc = nn.Linear(256, n_classes)

        def forward(self, image):                      # (B,1,32,W)
            f = self.conv(image).squeeze(2).transpose(1, 2)  # (B,T,C)
            f, _ = self.rnn(f)
            return self.fc(f)                         # (B,T,classes) logits

    def sinusoid(positions, d):
        # positions: float tensor (...,); returns (..., d)
        i = torch.arange(d // 2, dtype=torch.float32, device=positions.device)
        freq = torch.exp(-math.log(10000.0) * 2 * i / d)
        ang = positions.unsqueeze(-1) * freq
        return torch.cat([torch.sin(ang), torch.cos(ang)], dim=-1)

    class Encoder(nn.Module):
        """The CRNN's convolutions and two BiLSTM layers, then a projection to the
        decoder width with sinusoidal positions; emits the cross-attention keys/values.
        Its convolutions and LSTM are initialised from the trained CTC model
        (CTC pre-training of the encoder), then trained jointly with the decoder."""

        def __init__(self):
            super().__init__()
            self.conv, c = conv_stack()
            self.rnn = nn.LSTM(c, 128, num_layers=2, bidirectional=True, batch_first=True)
            self.proj = nn.Linear(256, D_MODEL)
            self.norm = nn.LayerNorm(D_MODEL)
            self.k = nn.ModuleList([nn.Linear(D_MODEL, D_MODEL) for _ in range(N_LAYERS)])
            self.v = nn.ModuleList([nn.Linear(D_MODEL, D_MODEL) for _ in range(N_LAYERS)])

        def features(self, image):
            f = self.conv(image).squeeze(2).transpose(1, 2)
            f, _ = self.rnn(f)
            return f                                   # (B,T,256)

        def memory_from(self, f):
            T = f.shape[1]
            pos = sinusoid(torch.arange(T, dtype=torch.float32, device=f.device), D_MODEL)
            return self.norm(self.proj(f) + pos)

        def memory(self, image):
            return self.memory_from(self.features(image))

        def forward(self, image):
            return self.kv(self.memory(image))

        def kv(self, m):
            B, S, _ = m.shape
            ks = [self.k[l](m).view(B, S, N_HEADS, D_MODEL // N_HEADS).transpose(1, 2) for l in range(N_LAYERS)]
            vs = [self.v[l](m).view(B, S, N_HEADS, D_MODEL // N_HEADS).transpose(1, 2) for l in range(N_LAYERS)]
            return torch.stack(ks), torch.stack(vs)   # (L,B,H,S,dh) each

    class DecoderLayer(nn.Module):
        def __init__(self):
            super().__init__()
            self.ln1, self.ln2, self.ln3 = nn.LayerNorm(D_MODEL), nn.LayerNorm(D_MODEL), nn.LayerNorm(D_MODEL)
            self.qkv = nn.Linear(D_MODEL, 3 * D_MODEL)
            self.proj = nn.Linear(D_MODEL, D_MODEL)
            self.q_cross = nn.Linear(D_MODEL, D_MODEL)
            self.proj_cross = nn.Linear(D_MODEL, D_MODEL)
            self.ff = nn.Sequential(nn.Linear(D_MODEL, D_FF), nn.GELU(), nn.Linear(D_FF, D_MODEL))

        @staticmethod
        def heads(x):
            B, T, _ = x.shape
            return x.view(B, T, N_HEADS, D_MODEL // N_HEADS).transpose(1, 2)

        def forward(self, x, past_k, past_v, self_mask, cross_k, cross_v, mem_mask):
            """x (B,t,d) new positions; past_k/v (B,H,tp,dh); masks additive."""
            B, t, _ = x.shape
            scale = 1.0 / math.sqrt(D_MODEL // N_HEADS)
            q, k, v = self.qkv(self.ln1(x)).split(D_MODEL, dim=-1)
            q, k, v = self.heads(q), self.heads(k), self.heads(v)
            k = torch.cat([past_k, k], dim=2)
            v = torch.cat([past_v, v], dim=2)
            att = torch.matmul(q, k.transpose(-1, -2)) * scale + self_mask
            att = torch.softmax(att, dim=-1)
            y = torch.matmul(att, v).transpose(1, 2).reshape(B, t, D_MODEL)
            x = x + self.proj(y)
            qc = self.heads(self.q_cross(self.ln2(x)))
            att = torch.matmul(qc, cross_k.transpose(-1, -2)) * scale + mem_mask[:, None, None, :]
            att = torch.softmax(att, dim=-1)
            y = torch.matmul(att, cross_v).transpose(1, 2).reshape(B, t, D_MODEL)
            x = x + self.proj_cross(y)
            x = x + self.ff(self.ln3(x))
            return x, k, v

    class Decoder(nn.Module):
        def __init__(self, vocab: int):
            super().__init__()
            self.emb = nn.Embedding(vocab, D_MODEL)
            self.layers = nn.ModuleList([DecoderLayer() for _ in range(N_LAYERS)])
            self.ln = nn.LayerNorm(D_MODEL)
            self.out = nn.Linear(D_MODEL, vocab)

        def run(self, tokens, start, past_k, past_v, cross_k, cross_v, mem_mask):
            """tokens (B,t) at positions start..start+t-1; past (L,B,H,start,dh)."""
            B, t = tokens.shape
            dev = tokens.device
            pos = torch.arange(t, dtype=torch.float32, device=dev) + start.to(torch.float32)
            x = self.emb(tokens) * math.sqrt(D_MODEL) + sinusoid(pos, D_MODEL)
            tp = past_k.shape[3]
            # causal mask over [past + new]: new position i sees past and new j <= i
            qi = torch.arange(t, device=dev).unsqueeze(1)
            kj = torch.arange(tp + t, device=dev).unsqueeze(0) - tp
            self_mask = torch.where(kj <= qi, torch.zeros((), dtype=torch.float32, device=dev),
                                    torch.full((), -1e9, dtype=torch.float32, device=dev))
            ks, vs = [], []
            for l, layer in enumerate(self.layers):
                x, k, v = layer(x, past_k[l], past_v[l], self_mask, cross_k[l], cross_v[l], mem_mask)
                ks.append(k)
                vs.append(v)
            return self.out(self.ln(x)), torch.stack(ks), torch.stack(vs)

    class Seq2Seq(nn.Module):
        """Encoder-decoder. During training an auxiliary CTC head on the encoder features
        (joint CTC-attention training) speeds up learning where to attend; it is exported
        as a third encoder output, and the card's [seq.ctc] table lets ocrbench decode
        jointly with its prefix scores (ocrbench/recognisers/joint.py)."""

        def __init__(self, vocab: int):
            super().__init__()
            self.encoder = Encoder()
            self.decoder = Decoder(vocab)
            self.ctc_head = nn.Linear(256, len(CTC_CLASSES))

        def forward(self, image, mem_mask, tokens_in, with_ctc: bool = False, features=None):
            f = self.encoder.features(image) if features is None else features
            m = self.encoder.memory_from(f)
            ck, cv = self.encoder.kv(m)
            B = image.shape[0]
            empty = torch.zeros(N_LAYERS, B, N_HEADS, 0, D_MODEL // N_HEADS, device=image.device)
            logits, _, _ = self.decoder.run(tokens_in, torch.zeros((), dtype=torch.int64, device=image.device),
                                            empty, empty, ck, cv, mem_mask)
            if with_ctc:
                return logits, self.ctc_head(f)
            return logits

    class EncoderExport(nn.Module):
        """The encoder graph as shipped: cross-attention keys/values and the CTC head's log-probabilities."""

        def __init__(self, model):
            super().__init__()
            self.m = model

        def forward(self, image):
            f = self.m.encoder.features(image)
            ck, cv = self.m.encoder.kv(self.m.encoder.memory_from(f))
            return ck, cv, torch.log_softmax(self.m.ctc_head(f), dim=-1)

    class StepWrapper(nn.Module):
        """Decoder step graph: one token per line, with the key/value cache in and out."""

        def __init__(self, dec):
            super().__init__()
            self.dec = dec

        def forward(self, tokens, step, past_k, past_v, cross_k, cross_v, memory_mask):
            logits, k, v = self.dec.run(tokens, step, past_k, past_v, cross_k, cross_v, memory_mask)
            return torch.log_softmax(logits[:, -1, :], dim=-1), k, v

    class FullWrapper(nn.Module):
        """Uncached decoder graph: the whole prefix in one pass, the next-token log-probabilities after every
        position (batch, length, vocabulary): read at its last position it decodes a step; read at every
        position it checks a drafted reading in one pass (ocrbench's drafted greedy decoding)."""

        def __init__(self, dec):
            super().__init__()
            self.dec = dec

        def forward(self, tokens, cross_k, cross_v, memory_mask):
            B = tokens.shape[0]
            empty = torch.zeros(N_LAYERS, B, N_HEADS, 0, D_MODEL // N_HEADS)
            logits, _, _ = self.dec.run(tokens, torch.zeros((), dtype=torch.int64), empty, empty, cross_k, cross_v, memory_mask)
            return torch.log_softmax(logits, dim=-1)

    Seq2Seq.Export = EncoderExport
    return CRNN, Seq2Seq, StepWrapper, FullWrapper


# --------------------------------------------------------------------------- training


def mem_mask_for(widths, W):
    S = W // SPEC.width_multiple
    valid = np.ceil(np.asarray(widths) / SPEC.width_multiple).astype(int)
    m = np.where(np.arange(S)[None, :] < valid[:, None], 0.0, -1e9).astype(np.float32)
    return m


def ctc_targets(texts, widths, dev):
    """CTC loss arguments after the scores: (targets, input lengths, target lengths); targets on ``dev``."""
    import torch
    targets = encode_ctc(texts)
    in_len = torch.from_numpy(np.ceil(widths / SPEC.width_multiple).astype(np.int64))
    tgt_len = torch.tensor([len(t) for t in targets])
    flat = torch.tensor([c for t in targets for c in t], dtype=torch.long).to(dev)
    return flat, in_len, tgt_len


def encode_ctc(texts):
    idx = {c: i + 1 for i, c in enumerate(synth.ALPHABET)}
    return [[idx[c] for c in t if c in idx] for t in texts]


def encode_seq(texts):
    idx = {c: i + 3 for i, c in enumerate(synth.ALPHABET)}
    return [[idx[c] for c in t if c in idx] for t in texts]


def greedy_ctc(logits: np.ndarray, widths) -> list[str]:
    out = []
    for b in range(logits.shape[0]):
        T = int(math.ceil(widths[b] / SPEC.width_multiple))
        best = logits[b, :T].argmax(-1)
        prev, s = 0, []
        for k in best:
            if k != prev and k != 0:
                s.append(CTC_CLASSES[k])
            prev = k
        out.append("".join(s))
    return out


# --------------------------------------------------------------------------- warm start


def _onnx_tensors(path: Path):
    """Weights of an exported graph: {module.param: array} for named and MatMul weights,
    plus the Conv (weight, bias) and LSTM (W, R, B) triples in graph order."""
    import onnx
    from onnx import numpy_helper
    m = onnx.load(str(path))
    init = {i.name: numpy_helper.to_array(i) for i in m.graph.initializer}
    named = {k: v for k, v in init.items() if not k.startswith("onnx::")}
    convs, lstms = [], []
    for n in m.graph.node:
        if n.op_type == "Conv":
            convs.append((init[n.input[1]], init[n.input[2]]))
        elif n.op_type == "LSTM":
            lstms.append((init[n.input[1]], init[n.input[2]], init[n.input[3]]))
        elif n.op_type == "MatMul" and n.input[1] in init:
            parts = n.name.strip("/").split("/")[:-1]        # "/layers.0/ff/ff.0/MatMul": ff.0 repeats ff
            parts = [p for i, p in enumerate(parts) if not (i + 1 < len(parts) and parts[i + 1].startswith(p + "."))]
            module = ".".join(parts)
            named[module + ".weight"] = init[n.input[1]].T
    return named, convs, lstms


def _load_convs_lstms(state: dict, prefix: str, convs, lstms) -> None:
    """Exported convolutions carry their batch norm folded in: load the folded weight and bias
    and make the batch norm an identity (mean 0, variance 1 - eps, scale 1, shift = folded bias).
    ONNX LSTM gates are ordered i, o, f, c; torch's are i, f, g(=c), o."""
    import torch
    conv_keys = sorted({k.rsplit(".", 1)[0] for k in state if k.startswith(prefix + "conv.") and k.endswith(".weight")
                        and state[k].dim() == 4}, key=lambda k: int(k.split(".")[-1]))
    assert len(conv_keys) == len(convs), (conv_keys, len(convs))
    for key, (w, b) in zip(conv_keys, convs):
        i = int(key.split(".")[-1])
        bn = f"{prefix}conv.{i + 1}"
        state[key + ".weight"] = torch.from_numpy(w.copy())
        state[bn + ".weight"] = torch.ones(len(b))
        state[bn + ".bias"] = torch.from_numpy(b.copy())
        state[bn + ".running_mean"] = torch.zeros(len(b))
        state[bn + ".running_var"] = torch.full((len(b),), 1.0 - 1e-5)

    def reorder(a):
        i, o, f, c = np.split(a, 4, axis=0)
        return torch.from_numpy(np.concatenate([i, f, c, o], axis=0).copy())

    for layer, (W, R, B) in enumerate(lstms):
        for d, sfx in enumerate(("", "_reverse")):
            state[f"{prefix}rnn.weight_ih_l{layer}{sfx}"] = reorder(W[d])
            state[f"{prefix}rnn.weight_hh_l{layer}{sfx}"] = reorder(R[d])
            half = B.shape[1] // 2
            state[f"{prefix}rnn.bias_ih_l{layer}{sfx}"] = reorder(B[d, :half])
            state[f"{prefix}rnn.bias_hh_l{layer}{sfx}"] = reorder(B[d, half:])


def warm_start(kind: str, model) -> None:
    """Start from the shipped ONNX weights (the previous build) instead of from scratch.
    The result is checked against onnxruntime on a batch before training begins."""
    import torch
    import onnxruntime as ort
    state = {k: v.clone() for k, v in model.state_dict().items()}
    if kind == "ctc":
        named, convs, lstms = _onnx_tensors(OUT / CTC_NAME / "model.onnx")
        _load_convs_lstms(state, "", convs, lstms)
        for k, v in named.items():
            state[k] = torch.from_numpy(np.ascontiguousarray(v))
    else:
        named, convs, lstms = _onnx_tensors(OUT / SEQ_NAME / "encoder.onnx")
        _load_convs_lstms(state, "encoder.", convs, lstms)
        for k, v in named.items():
            state["encoder." + k] = torch.from_numpy(np.ascontiguousarray(v))
        dnamed, _, _ = _onnx_tensors(OUT / SEQ_NAME / "decoder_step.onnx")
        for k, v in dnamed.items():     # named parameters keep the wrapper's "dec." prefix, MatMul scopes do not
            state["decoder." + (k[4:] if k.startswith("dec.") else k)] = torch.from_numpy(np.ascontiguousarray(v))
        cnamed, _, _ = _onnx_tensors(OUT / CTC_NAME / "model.onnx")
        state["ctc_head.weight"] = torch.from_numpy(np.ascontiguousarray(cnamed["fc.weight"]))
        state["ctc_head.bias"] = torch.from_numpy(cnamed["fc.bias"].copy())
    unknown = set(state) - set(model.state_dict())
    assert not unknown, unknown
    model.load_state_dict(state)
    model.eval()
    lines = heldout_lines(4)
    b, w = make_batch([l[0] for l in lines], SPEC)
    x = torch.from_numpy(b)
    with torch.no_grad():
        if kind == "ctc":
            ref = ort.InferenceSession(str(OUT / CTC_NAME / "model.onnx")).run(None, {"image": b})[0]
            got = model(x).numpy()
        else:
            ref = ort.InferenceSession(str(OUT / SEQ_NAME / "encoder.onnx")).run(None, {"image": b})[0]
            got = model.encoder(x)[0].numpy()
            es = ort.InferenceSession(str(OUT / SEQ_NAME / "encoder.onnx"))
            ss = ort.InferenceSession(str(OUT / SEQ_NAME / "decoder_step.onnx"))
            mm = mem_mask_for(w, b.shape[-1])
            same = greedy_seq_ort(es, ss, b, mm) == greedy_seq_torch(model, x, mm)
            print(f"seq: greedy texts of torch and onnxruntime agree on {len(lines)} lines: {same}", flush=True)
            assert same
    diff = float(np.abs(ref - got).max())
    print(f"{kind}: warm start from the shipped ONNX weights, max abs diff vs onnxruntime {diff:.2e}", flush=True)
    assert diff < 1e-3, diff


def freeze_batch_norm(model) -> None:
    """Batch norms keep their (folded) statistics while fine-tuning."""
    from torch import nn
    for m in model.modules():
        if isinstance(m, nn.BatchNorm2d):
            m.eval()



CTC_PART = ("encoder.conv", "encoder.rnn", "ctc_head")     # the seq parameters a CTC model also has


def transplant_encoder(model, ctc_ckpt: Path) -> None:
    """Give the seq model the convolutions and LSTM of a trained CTC model (and its classifier as
    the auxiliary CTC head): the encoder then reads exactly what the CTC recogniser reads."""
    import torch
    st = torch.load(ctc_ckpt, weights_only=False, map_location="cpu")["model"]
    state = model.state_dict()
    for k, v in st.items():
        if k.startswith(("conv.", "rnn.")):
            state["encoder." + k] = v.clone()
        elif k.startswith("fc."):
            state["ctc_head." + k[3:]] = v.clone()
    model.load_state_dict(state)


def ctc_from_seq(seq_ckpt: Path, out_ckpt: Path, new_schedule: bool = False) -> tuple[int, float]:
    """A CTC checkpoint from a seq model's encoder and auxiliary CTC head (the reverse of
    ``transplant_encoder``): the seq encoder is ledger-ctc's architecture, so its convolutions, LSTM and
    head are a CTC recogniser of their own, exported by ``export --only ctc``. With ``new_schedule`` the
    checkpoint starts a training stage of its own (``train ctc`` then fine-tunes it on the CTC loss alone,
    with a fresh warm-up and cosine over its ``--minutes``). Returns the seq model's step and training
    minutes."""
    import torch
    st = torch.load(seq_ckpt, weights_only=False, map_location="cpu")
    ctc = {}
    for k, v in st["model"].items():
        if k.startswith(("encoder.conv.", "encoder.rnn.")):
            ctc[k[len("encoder."):]] = v.clone()
        elif k.startswith("ctc_head."):
            ctc["fc." + k[len("ctc_head."):]] = v.clone()
    CRNN, _, _, _ = build_modules()
    CRNN(len(CTC_CLASSES)).load_state_dict(ctc)             # every tensor of a CTC model, no other
    out_ckpt.parent.mkdir(parents=True, exist_ok=True)
    elapsed = 0.0 if new_schedule else st.get("elapsed", 0.0)
    torch.save({"model": ctc, "step": st["step"], "elapsed": elapsed, "from_seq": str(seq_ckpt),
                "warm_from": st["step"] if new_schedule else 0}, out_ckpt)
    return st["step"], st.get("elapsed", 0.0) / 60


def new_stage(meta: dict) -> dict:
    """The bookkeeping of a checkpoint that starts a new training stage (``train --new-stage``): a fresh
    warm-up and cosine from its step, its clock at zero. The minutes of the stages before it are kept in
    ``minutes_before`` and the step where CTC-only training began in ``stage_from``, so the figures of the
    finished model count every stage. ``meta`` holds a checkpoint's fields (``step``, ``elapsed``,
    ``warm_from``, ``from_seq``, and ``stage_from``/``minutes_before`` when an earlier stage set them);
    the weights and optimiser are not touched."""
    out = dict(meta)
    out["minutes_before"] = meta.get("minutes_before", 0.0) + meta.get("elapsed", 0.0) / 60
    if meta.get("from_seq") and meta.get("stage_from") is None:
        out["stage_from"] = meta.get("warm_from", 0)          # the first CTC-only stage began here
    out["elapsed"], out["warm_from"] = 0.0, meta["step"]
    return out


def train(kind: str, minutes: float, threads: int, seed: int, batch_size: int, lr: float,
          device: str = "cpu", workers: int = 0, encoder_from: Path | None = None, unfreeze: bool = False,
          clean: bool = False, start_stage: bool = False):
    import torch
    from torch import nn
    torch.manual_seed(seed)
    torch.set_num_threads(threads)
    dev = torch.device(device)
    CRNN, Seq2Seq, _, _ = build_modules()
    WORK.mkdir(parents=True, exist_ok=True)
    ckpt = WORK / f"{kind}.pt"
    model = CRNN(len(CTC_CLASSES)) if kind == "ctc" else Seq2Seq(len(SEQ_VOCAB))
    committed = CKPT_DIR / f"{kind}.pt"
    if not ckpt.exists() and not committed.exists():
        # the previous build's weights (read back from the shipped ONNX graphs) are the start
        warm_start(kind, model)
    ctc_part = [p for n, p in model.named_parameters() if n.startswith(CTC_PART)]   # (empty for a CTC model)
    other = [p for n, p in model.named_parameters() if not n.startswith(CTC_PART)]
    groups = [{"params": other, "lr_scale": 1.0}] + ([{"params": ctc_part, "lr_scale": 0.5}] if ctc_part else [])
    opt = torch.optim.AdamW(groups, lr=lr, weight_decay=1e-4)
    step, elapsed0, warm_from, frozen, taken, from_seq = 0, 0.0, 0, False, False, None
    history = {}                                  # stage_from, minutes_before: what earlier stages did
    source = ckpt if ckpt.exists() else committed if committed.exists() else None
    if start_stage and source is None:
        raise SystemExit(f"train --new-stage: no checkpoint to start from ({ckpt} or {committed})")
    if source is not None:
        st = torch.load(source, weights_only=False, map_location="cpu")
        if start_stage:
            st = new_stage(st)
            print(f"{kind}: new stage from step {st['step']} ({st['minutes_before']:.1f} min trained before)",
                  flush=True)
        history = {k: st[k] for k in ("stage_from", "minutes_before") if st.get(k) is not None}
        model.load_state_dict(st["model"])
        if "opt" in st:
            opt.load_state_dict(st["opt"])
        step, elapsed0 = st["step"], st["elapsed"]
        warm_from, frozen = st.get("warm_from", 0), st.get("frozen_encoder", False)
        taken = st.get("encoder_taken", frozen)
        from_seq = st.get("from_seq")                 # a CTC stage started from a seq model (ctc-from-seq)
        clean = clean or st.get("clean", False)       # a stage on cleaned lines stays on them when resumed
        print(f"resumed {kind} from {source} at step {step}, {elapsed0 / 60:.1f} min", flush=True)
    if kind == "seq" and encoder_from is not None and not taken:
        # a new stage: the encoder becomes the CTC model's and stays frozen; the decoder (and the
        # projection to it) keep their weights and start a new warm-up and cosine schedule
        transplant_encoder(model, encoder_from)
        frozen, taken, elapsed0, warm_from = True, True, 0.0, step
        print(f"seq: encoder taken from {encoder_from} and frozen; new schedule from step {step}", flush=True)
    if frozen and unfreeze:
        # the taken encoder trains on with the decoder (joint CTC-attention, the auxiliary CTC loss
        # keeps it a CTC reader); moments left from before it was taken are dropped
        frozen = False
        for p in ctc_part:
            opt.state.pop(p, None)
        print(f"seq: encoder unfrozen at step {step}", flush=True)
    if frozen:
        for p in ctc_part:
            p.requires_grad_(False)
    extra = {"warm_from": warm_from, "frozen_encoder": frozen, "encoder_taken": taken, "from_seq": from_seq,
             "clean": clean, **history}
    CLEAN_AS_CARDS["on"] = clean
    budget = minutes * 60
    heldout = heldout_lines(100, kinds=TEXT_KINDS)
    def as_trained(im):
        a = np.asarray(im)
        return resize_line(clean_crop(a, flatten=True, trim=True) if clean else a, SPEC)
    heldout_fam = [(as_trained(im), t) for im, t, _ in linegen.heldout_family_lines(100, degraded=True)]
    ctc_loss = nn.CTCLoss(blank=0, zero_infinity=True)
    ce = nn.CrossEntropyLoss(ignore_index=PAD, label_smoothing=0.1)
    model.to(dev)
    for state in opt.state.values():                     # optimiser moments follow the weights
        for k, v in state.items():
            if torch.is_tensor(v) and k != "step":
                state[k] = v.to(dev)
    t0 = time.time() - elapsed0
    last_ck = time.time()
    last_eval = time.time()
    warm = 100
    last_commit = time.time()
    feed = LineFeed(seed, step, batch_size, workers)
    log = open(WORK / f"{kind}.log", "a")
    if start_stage:                  # written at once: a resume (without --new-stage) continues this stage
        save_ckpt(ckpt, model, opt, step, 0.0, extra)
        print(f"{kind}: new stage from step {step}, lr {lr:.1e}, {minutes:.0f} min", file=log, flush=True)
    if device != "cpu" or workers:
        print(f"{kind}: training on {dev}, {workers} line-drawing processes", file=log, flush=True)
    if clean:
        print(f"{kind}: training lines cleaned as the demo cards clean crops (flatten, trim)", file=log, flush=True)
    while True:
        elapsed = time.time() - t0
        if elapsed > budget:
            break
        frac = min(1.0, elapsed / budget)
        cur_lr = lr * min(1.0, (step + 1 - warm_from) / warm) * (0.05 + 0.95 * 0.5 * (1 + math.cos(math.pi * frac)))
        for g in opt.param_groups:
            g["lr"] = cur_lr * g.get("lr_scale", 1.0)
        chunk = feed.next(step)
        batch, widths = make_batch([c[0] for c in chunk], SPEC)
        texts = [c[1] for c in chunk]
        x = torch.from_numpy(batch).to(dev)
        model.train()
        freeze_batch_norm(model)
        if kind == "ctc":
            logits = model(x)                                  # (B,T,C)
            lp = logits.log_softmax(-1).transpose(0, 1)        # (T,B,C)
            loss = ctc_loss(lp, *ctc_targets(texts, widths, dev))
        else:
            seqs = encode_seq(texts)
            L = max(len(s) for s in seqs) + 1
            tin = np.full((len(seqs), L), PAD, np.int64)
            tout = np.full((len(seqs), L), PAD, np.int64)
            for i, s in enumerate(seqs):
                tin[i, : len(s) + 1] = [BOS] + s
                tout[i, : len(s) + 1] = s + [EOS]
            mm = torch.from_numpy(mem_mask_for(widths, batch.shape[-1])).to(dev)
            if frozen:                                         # no gradient through the CTC encoder
                with torch.no_grad():
                    f = model.encoder.features(x)
                logits = model(x, mm, torch.from_numpy(tin).to(dev), features=f)
                loss = ce(logits.reshape(-1, logits.shape[-1]), torch.from_numpy(tout).to(dev).reshape(-1))
            else:
                logits, aux = model(x, mm, torch.from_numpy(tin).to(dev), with_ctc=True)
                loss = ce(logits.reshape(-1, logits.shape[-1]), torch.from_numpy(tout).to(dev).reshape(-1))
                loss = loss + 0.3 * ctc_loss(aux.log_softmax(-1).transpose(0, 1), *ctc_targets(texts, widths, dev))
        opt.zero_grad()
        loss.backward()
        nn.utils.clip_grad_norm_(model.parameters(), 5.0)
        opt.step()
        step += 1
        if step % 25 == 0:
            print(f"{kind} step {step} {elapsed / 60:.1f}min loss {loss.item():.4f} lr {cur_lr:.2e}", file=log, flush=True)
        if time.time() - last_eval > 600:
            c = evaluate(kind, model, heldout)
            cf = evaluate(kind, model, heldout_fam)
            print(f"{kind} step {step} {elapsed / 60:.1f}min CER(ws collapsed) DejaVu {c:.4f} held-out families {cf:.4f}",
                  file=log, flush=True)
            last_eval = time.time()
        if time.time() - last_commit > 600:
            save_ckpt(committed, model, None, step, time.time() - t0, extra)
            last_commit = time.time()
        if time.time() - last_ck > 120:
            save_ckpt(ckpt, model, opt, step, time.time() - t0, extra)
            last_ck = time.time()
        if kind == "seq" and threads == 1 and (WORK / "ctc.done").exists() and os.environ.get("OCRBENCH_BUILD_GROW", "1") == "1":
            torch.set_num_threads(2)
            threads = 2
            print("seq: ctc finished, now 2 threads", file=log, flush=True)
    feed.close()
    save_ckpt(ckpt, model, opt, step, time.time() - t0, extra)
    save_ckpt(committed, model, None, step, time.time() - t0, extra)
    c = evaluate(kind, model, heldout)
    cf = evaluate(kind, model, heldout_fam)
    print(f"{kind} FINAL step {step} CER(ws collapsed) DejaVu {c:.4f} held-out families {cf:.4f}", file=log, flush=True)
    stage = {"from_seq": True, "stage_from": history.get("stage_from", warm_from)} if kind == "ctc" and from_seq else {}
    minutes_all = history.get("minutes_before", 0.0) + (time.time() - t0) / 60
    (WORK / f"{kind}.done").write_text(json.dumps({"step": step, "minutes": minutes_all,
                                                   "heldout_cer": c, "heldout_families_cer": cf, **stage}))


def save_ckpt(path, model, opt, step, elapsed, extra=None):
    """Full checkpoint (with the optimiser) in the work folder; weights only (opt None) for git."""
    import torch
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(".tmp")
    st = {"model": {k: v.cpu() for k, v in model.state_dict().items()}, "step": step, "elapsed": elapsed,
          **(extra or {})}
    if opt is not None:
        st["opt"] = opt.state_dict()            # (loaded with map_location="cpu", moved on resume)
    torch.save(st, tmp)
    os.replace(tmp, path)


def evaluate(kind, model, lines, batch=32) -> float:
    import torch
    model.eval()
    refs, hyps = [], []
    dev = next(model.parameters()).device
    with torch.no_grad():
        for i in range(0, len(lines), batch):
            chunk = lines[i: i + batch]
            b, widths = make_batch([c[0] for c in chunk], SPEC)
            x = torch.from_numpy(b).to(dev)
            if kind == "ctc":
                hyps += greedy_ctc(model(x).cpu().numpy(), widths)
            else:
                hyps += greedy_seq_torch(model, x, mem_mask_for(widths, b.shape[-1]))
            refs += [c[1] for c in chunk]
    model.train()
    return cer([collapse_ws(r) for r in refs], [collapse_ws(h) for h in hyps])


def greedy_seq_torch(model, x, mm):
    import torch
    dev = x.device
    mm = torch.from_numpy(mm).to(dev)
    ck, cv = model.encoder(x)
    B = x.shape[0]
    dh = D_MODEL // N_HEADS
    pk = torch.zeros(N_LAYERS, B, N_HEADS, 0, dh, device=dev)
    pv = torch.zeros(N_LAYERS, B, N_HEADS, 0, dh, device=dev)
    tok = torch.full((B, 1), BOS, dtype=torch.long, device=dev)
    done = torch.zeros(B, dtype=torch.bool)
    out = [[] for _ in range(B)]
    for step in range(MAX_TOKENS):
        logits, pk, pv = model.decoder.run(tok, torch.tensor(step, device=dev), pk, pv, ck, cv, mm)
        nxt = logits[:, -1].argmax(-1).cpu()
        for b in range(B):
            if not done[b]:
                if nxt[b].item() == EOS:
                    done[b] = True
                else:
                    out[b].append(SEQ_VOCAB[nxt[b].item()])
        if done.all():
            break
        tok = nxt.unsqueeze(1).to(dev)
    return ["".join(o) for o in out]


# --------------------------------------------------------------------------- export


def sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def export(opset: int = 17, only: str | None = None):
    import torch
    import onnx
    import onnxruntime as ort
    CRNN, Seq2Seq, StepWrapper, FullWrapper = build_modules()
    heldout = heldout_lines(300, kinds=TEXT_KINDS)
    heldout_any = heldout_lines(300)
    fam = {d: [(resize_line(np.asarray(im), SPEC), t) for im, t, _ in linegen.heldout_family_lines(200, degraded=d)]
           for d in (False, True)}
    figures = {}

    # ---- CTC
    if (WORK / "ctc.pt").exists() and only in (None, "ctc"):
        m = CRNN(len(CTC_CLASSES))
        m.load_state_dict(torch.load(WORK / "ctc.pt", weights_only=False, map_location="cpu")["model"])
        m.eval()
        out = OUT / CTC_NAME
        out.mkdir(exist_ok=True)
        x = torch.from_numpy(make_batch([heldout[0][0], heldout[1][0]], SPEC)[0])
        path = out / "model.onnx"
        torch.onnx.export(m, (x,), str(path), input_names=["image"], output_names=["logits"],
                          dynamic_axes={"image": {0: "batch", 3: "width"}, "logits": {0: "batch", 1: "frames"}},
                          opset_version=opset, dynamo=False, external_data=False)
        onnx.checker.check_model(onnx.load(str(path)))
        sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
        with torch.no_grad():
            diff = float(np.abs(sess.run(None, {"image": x.numpy()})[0] - m(x).numpy()).max())
        print(f"ctc: onnxruntime vs torch max abs diff {diff:.2e}")
        def dec_ctc(b, w):
            return greedy_ctc(sess.run(None, {"image": b})[0], w)
        c_raw, c_ws = cer_on(heldout, dec_ctc)
        _, c_any = cer_on(heldout_any, dec_ctc)
        fam_cer = {d: cer_on(fam[d], dec_ctc)[1] for d in (False, True)}
        (out / "alphabet.txt").write_text("\n".join(json.dumps(c, ensure_ascii=False) for c in CTC_CLASSES) + "\n", encoding="utf-8")
        done = json.loads((WORK / "ctc.done").read_text()) if (WORK / "ctc.done").exists() else {}
        figures[CTC_NAME] = {"parameters": sum(p.numel() for p in m.parameters()),
                             "onnx_bytes": path.stat().st_size, "parity_max_abs_diff": diff,
                             "heldout_lines": len(heldout), "heldout_cer_raw": c_raw,
                             "heldout_cer_ws_collapsed": c_ws,
                             "heldout_cer_ws_collapsed_with_random_chars": c_any,
                             "heldout_families_cer_clean": fam_cer[False], "heldout_families_cer_degraded": fam_cer[True],
                             "heldout_families_lines": len(fam[False]), "train_steps": done.get("step"),
                             "train_minutes": done.get("minutes"), "from_seq": done.get("from_seq", False),
                             "stage_from": done.get("stage_from")}
        print(json.dumps(figures[CTC_NAME], indent=1))

    # ---- seq
    if (WORK / "seq.pt").exists() and only in (None, "seq"):
        m = Seq2Seq(len(SEQ_VOCAB))
        m.load_state_dict(torch.load(WORK / "seq.pt", weights_only=False, map_location="cpu")["model"])
        m.eval()
        enc = Seq2Seq.Export(m).eval()
        step_w = StepWrapper(m.decoder).eval()
        full_w = FullWrapper(m.decoder).eval()
        out = OUT / SEQ_NAME
        out.mkdir(exist_ok=True)
        b, w = make_batch([heldout[0][0], heldout[1][0]], SPEC)
        x = torch.from_numpy(b)
        mm = torch.from_numpy(mem_mask_for(w, b.shape[-1]))
        torch.onnx.export(enc, (x,), str(out / "encoder.onnx"), input_names=["image"],
                          output_names=["cross_k", "cross_v", "ctc_log_probs"],
                          dynamic_axes={"image": {0: "batch", 3: "width"},
                                        "cross_k": {1: "batch", 3: "frames"}, "cross_v": {1: "batch", 3: "frames"},
                                        "ctc_log_probs": {0: "batch", 1: "frames"}},
                          opset_version=opset, dynamo=False, external_data=False)
        with torch.no_grad():
            ck, cv, clp = enc(x)
        B = 2
        dh = D_MODEL // N_HEADS
        pk = torch.randn(N_LAYERS, B, N_HEADS, 3, dh)
        pv = torch.randn(N_LAYERS, B, N_HEADS, 3, dh)
        tok = torch.tensor([[5], [7]], dtype=torch.long)
        stp = torch.tensor(3, dtype=torch.long)
        torch.onnx.export(step_w, (tok, stp, pk, pv, ck, cv, mm), str(out / "decoder_step.onnx"),
                          input_names=["tokens", "step", "past_k", "past_v", "cross_k", "cross_v", "memory_mask"],
                          output_names=["log_probs", "present_k", "present_v"],
                          dynamic_axes={"tokens": {0: "batch"}, "past_k": {1: "batch", 3: "past"},
                                        "past_v": {1: "batch", 3: "past"}, "cross_k": {1: "batch", 3: "frames"},
                                        "cross_v": {1: "batch", 3: "frames"}, "memory_mask": {0: "batch", 1: "frames"},
                                        "log_probs": {0: "batch"}, "present_k": {1: "batch", 3: "total"},
                                        "present_v": {1: "batch", 3: "total"}},
                          opset_version=opset, dynamo=False, external_data=False)
        toks = torch.tensor([[1, 5, 9], [1, 7, 8]], dtype=torch.long)
        torch.onnx.export(full_w, (toks, ck, cv, mm), str(out / "decoder_full.onnx"),
                          input_names=["tokens", "cross_k", "cross_v", "memory_mask"], output_names=["log_probs"],
                          dynamic_axes={"tokens": {0: "batch", 1: "length"}, "cross_k": {1: "batch", 3: "frames"},
                                        "cross_v": {1: "batch", 3: "frames"}, "memory_mask": {0: "batch", 1: "frames"},
                                        "log_probs": {0: "batch", 1: "length"}},
                          opset_version=opset, dynamo=False, external_data=False)
        diffs = {}
        for name in ["encoder", "decoder_step", "decoder_full"]:
            onnx.checker.check_model(onnx.load(str(out / f"{name}.onnx")))
        so = ort.SessionOptions()
        es = ort.InferenceSession(str(out / "encoder.onnx"), so, providers=["CPUExecutionProvider"])
        ss = ort.InferenceSession(str(out / "decoder_step.onnx"), so, providers=["CPUExecutionProvider"])
        fs = ort.InferenceSession(str(out / "decoder_full.onnx"), so, providers=["CPUExecutionProvider"])
        ok, ov, oc = es.run(None, {"image": x.numpy()})
        diffs["encoder"] = float(max(np.abs(ok - ck.numpy()).max(), np.abs(ov - cv.numpy()).max(),
                                     np.abs(oc - clp.numpy()).max()))
        with torch.no_grad():
            ref = step_w(tok, stp, pk, pv, ck, cv, mm)
            reff = full_w(toks, ck, cv, mm)
        got = ss.run(None, {"tokens": tok.numpy(), "step": stp.numpy(), "past_k": pk.numpy(), "past_v": pv.numpy(),
                            "cross_k": ck.numpy(), "cross_v": cv.numpy(), "memory_mask": mm.numpy()})
        diffs["decoder_step"] = float(max(np.abs(g - r.numpy()).max() for g, r in zip(got, ref)))
        gotf = fs.run(None, {"tokens": toks.numpy(), "cross_k": ck.numpy(), "cross_v": cv.numpy(), "memory_mask": mm.numpy()})
        diffs["decoder_full"] = float(np.abs(gotf[0] - reff.numpy()).max())
        print("seq: onnxruntime vs torch max abs diff", diffs)
        # held-out CER with onnxruntime, cached greedy
        def dec_seq(b, w):
            return greedy_seq_ort(es, ss, b, mem_mask_for(w, b.shape[-1]))
        c_raw, c_ws = cer_on(heldout, dec_seq)
        _, c_any = cer_on(heldout_any, dec_seq)
        fam_cer = {d: cer_on(fam[d], dec_seq)[1] for d in (False, True)}
        (out / "vocab.txt").write_text("\n".join(json.dumps(c, ensure_ascii=False) for c in SEQ_VOCAB) + "\n", encoding="utf-8")
        (out / "ctc_alphabet.txt").write_text("\n".join(json.dumps(c, ensure_ascii=False) for c in CTC_CLASSES) + "\n",
                                              encoding="utf-8")
        done = json.loads((WORK / "seq.done").read_text()) if (WORK / "seq.done").exists() else {}
        figures[SEQ_NAME] = {"parameters": sum(p.numel() for p in m.parameters()),
                             "onnx_bytes": sum((out / f"{n}.onnx").stat().st_size for n in ["encoder", "decoder_step", "decoder_full"]),
                             "parity_max_abs_diff": diffs, "heldout_lines": len(heldout),
                             "heldout_cer_raw": c_raw, "heldout_cer_ws_collapsed": c_ws,
                             "heldout_cer_ws_collapsed_with_random_chars": c_any,
                             "heldout_families_cer_clean": fam_cer[False], "heldout_families_cer_degraded": fam_cer[True],
                             "heldout_families_lines": len(fam[False]),
                             "train_steps": done.get("step"), "train_minutes": done.get("minutes")}
        # the figures above are the decoder alone (greedy); the card decodes jointly with the CTC output:
        # the same lines through ocrbench's own seq recogniser as the card ships it
        (out / "card.toml").write_text(SEQ_CARD.format(name=SEQ_NAME, weight=JOINT_WEIGHT))
        figures[SEQ_NAME]["decoding"] = "figures without a suffix: the decoder alone, greedy"
        for suffix, lines in (("heldout_cer_ws_collapsed_joint", heldout),
                              ("heldout_families_cer_clean_joint", fam[False]),
                              ("heldout_families_cer_degraded_joint", fam[True])):
            figures[SEQ_NAME][suffix] = joint_cer(out, lines)
        print(json.dumps(figures[SEQ_NAME], indent=1))

    for name, fig in figures.items():
        (OUT / name / "figures.json").write_text(json.dumps(fig, indent=1) + "\n")
    write_cards()


def joint_cer(card_dir: Path, lines) -> float:
    """Whitespace-collapsed CER of the card in ``card_dir`` as ocrbench runs it (greedy, the card's joint
    decoding), over already-resized held-out lines (the card's own resize then leaves them as they are)."""
    from ocrbench.recognisers.base import EngineOptions
    from ocrbench.recognisers.registry import open_recogniser
    import dataclasses
    from ocrbench.recognisers.card import load_card

    card = load_card(card_dir)
    card = dataclasses.replace(card, input=dataclasses.replace(card.input, flatten=False, split_gap=0.0))
    rec = open_recogniser(card, options=EngineOptions(batch_size=16, decoding="greedy"))
    results, _ = rec.recognise([c[0] for c in lines])
    return cer([collapse_ws(c[1]) for c in lines], [collapse_ws(r.text) for r in results])


def cer_on(lines, decode, batch: int = 32):
    """(raw CER, whitespace-collapsed CER) of ``decode(batch, widths)`` over held-out lines."""
    refs, hyps = [], []
    for i in range(0, len(lines), batch):
        chunk = lines[i:i + batch]
        b, w = make_batch([c[0] for c in chunk], SPEC)
        hyps += decode(b, w)
        refs += [c[1] for c in chunk]
    return cer(refs, hyps), cer([collapse_ws(r) for r in refs], [collapse_ws(h) for h in hyps])


def greedy_seq_ort(es, ss, batch, mm):
    ck, cv = es.run(["cross_k", "cross_v"], {"image": batch})
    B = batch.shape[0]
    dh = D_MODEL // N_HEADS
    pk = np.zeros((N_LAYERS, B, N_HEADS, 0, dh), np.float32)
    pv = np.zeros_like(pk)
    tok = np.full((B, 1), BOS, np.int64)
    done = np.zeros(B, bool)
    out = [[] for _ in range(B)]
    for step in range(MAX_TOKENS):
        lp, pk, pv = ss.run(None, {"tokens": tok, "step": np.array(step, np.int64), "past_k": pk, "past_v": pv,
                                   "cross_k": ck, "cross_v": cv, "memory_mask": mm})
        nxt = lp.argmax(-1)
        for b in range(B):
            if not done[b]:
                if nxt[b] == EOS:
                    done[b] = True
                else:
                    out[b].append(SEQ_VOCAB[nxt[b]])
        if done.all():
            break
        tok = nxt[:, None].astype(np.int64)
    return ["".join(o) for o in out]


CTC_CARD = """# Recogniser card: see models/README.md for every field.
name = "{name}"
kind = "ctc"
description = "Demo CTC line recogniser (CRNN: 6 convolutions, 2 BiLSTM layers), trained by ocrbench on synthetic ledger and prose lines."
version = "1"

[input]
height = 32
width_multiple = 4
invert = true
scale = 0.00392156862745098
mean = 0.0
std = 1.0
flatten = true          # the paper's shading divided out of each crop (measured on the demo pages: see models/README.md)
trim = true             # paper above and below the text cut to a fixed margin (measured: see models/README.md)

[ctc]
model = "model.onnx"
input = "image"
output = "logits"
layout = "BTC"          # batch, frames, classes
output_is_log_probs = false
frames_per_pixel = 0.25 # width / 4
blank_index = 0
alphabet = "alphabet.txt"
"""

SEQ_CARD = """# Recogniser card: see models/README.md for every field.
name = "{name}"
kind = "seq"
description = "Demo autoregressive recogniser: convolutional + BiLSTM encoder, 3-layer transformer decoder (d=192, 4 heads) with a key/value cache, trained by ocrbench on synthetic ledger and prose lines."
version = "1"

[input]
height = 32
width_multiple = 4
invert = true
scale = 0.00392156862745098
mean = 0.0
std = 1.0
flatten = true          # the paper's shading divided out of each crop (measured on the demo pages: see models/README.md)
trim = true             # paper above and below the text cut to a fixed margin (measured: see models/README.md)
split_gap = 0.0         # whole lines: joint decoding reads across table gaps (1.0 cuts lines at gaps wider than one line height)

[seq]
vocab = "vocab.txt"
bos_index = 1
eos_index = 2
pad_index = 0
max_tokens = 200
frames_per_pixel = 0.25     # memory frames = width / 4
memory_mask_valid = 0.0     # additive mask: 0 where a frame is real,
memory_mask_padded = -1e9   # a large negative number where it is padding

[seq.encoder]
model = "encoder.onnx"
input = "image"
outputs = ["cross_k", "cross_v"]
layout = "LBHTD"            # layers, batch, heads, frames, head size

[seq.ctc]                   # the encoder's CTC head: joint decoding (see models/README.md)
output = "ctc_log_probs"
layout = "BTC"
output_kind = "log_probs"
alphabet = "ctc_alphabet.txt"
blank_index = 0
weight = {weight}

[seq.decoder_step]
model = "decoder_step.onnx"
tokens = "tokens"
step = "step"
past = ["past_k", "past_v"]
present = ["present_k", "present_v"]
memory = ["cross_k", "cross_v"]
memory_mask = "memory_mask"
log_probs = "log_probs"
cache_layout = "LBHTD"      # layers, batch, heads, positions, head size

[seq.decoder_full]
model = "decoder_full.onnx"
tokens = "tokens"
memory = ["cross_k", "cross_v"]
memory_mask = "memory_mask"
log_probs = "log_probs"
"""


def write_cards():
    if (OUT / CTC_NAME / "model.onnx").exists():
        (OUT / CTC_NAME / "card.toml").write_text(CTC_CARD.format(name=CTC_NAME))
    if (OUT / SEQ_NAME / "encoder.onnx").exists():
        (OUT / SEQ_NAME / "card.toml").write_text(SEQ_CARD.format(name=SEQ_NAME, weight=JOINT_WEIGHT))


README_START = "<!-- build-figures:start (written by models/build.py readme) -->"
README_END = "<!-- build-figures:end -->"


def write_readme_block():
    """Rewrite the measured figures and sha256 block of models/README.md."""
    lines = [README_START, "", "### Measured at build time", ""]
    lines.append("| figure | " + " | ".join(n for n in (CTC_NAME, SEQ_NAME)) + " |")
    lines.append("|---|---|---|")
    figs = {n: json.loads((OUT / n / "figures.json").read_text()) for n in (CTC_NAME, SEQ_NAME)
            if (OUT / n / "figures.json").exists()}

    def row(label, fn):
        cells = []
        for n in (CTC_NAME, SEQ_NAME):
            try:
                cells.append(fn(figs[n]))
            except (KeyError, TypeError):
                cells.append("–")
        lines.append(f"| {label} | " + " | ".join(cells) + " |")

    row("parameters", lambda f: f"{f['parameters']:,}")
    row("ONNX bytes (all graphs)", lambda f: f"{f['onnx_bytes']:,}")
    row("held-out DejaVu text lines: CER, greedy, whitespace collapsed",
        lambda f: f"{100 * f['heldout_cer_ws_collapsed']:.2f}% ({f['heldout_lines']} lines)")
    row("same, raw (no whitespace collapsing)", lambda f: f"{100 * f['heldout_cer_raw']:.2f}%")
    row("held-out lines incl. random-character strings", lambda f: f"{100 * f['heldout_cer_ws_collapsed_with_random_chars']:.2f}%")
    row("held-out design families, clean: CER, greedy, whitespace collapsed",
        lambda f: f"{100 * f['heldout_families_cer_clean']:.2f}% ({f['heldout_families_lines']} lines)")
    row("held-out design families, degraded", lambda f: f"{100 * f['heldout_families_cer_degraded']:.2f}%")
    row("seq as its card decodes (joint with its CTC output): held-out DejaVu / families clean / degraded",
        lambda f: (f"{100 * f['heldout_cer_ws_collapsed_joint']:.2f}% / {100 * f['heldout_families_cer_clean_joint']:.2f}%"
                   f" / {100 * f['heldout_families_cer_degraded_joint']:.2f}%"))
    row("onnxruntime vs torch, max abs diff",
        lambda f: (f"{f['parity_max_abs_diff']:.1e}" if not isinstance(f['parity_max_abs_diff'], dict)
                   else ", ".join(f"{k} {v:.1e}" for k, v in f['parity_max_abs_diff'].items())))
    def steps(f):
        if f.get("stage_from"):
            return (f"{f['train_steps']:,} (the seq model's encoder and CTC head to step {f['stage_from']:,}, then "
                    f"{f['train_steps'] - f['stage_from']:,} on the CTC loss alone)")
        return f"{f['train_steps']:,}" + (" (the seq model's: its encoder and CTC head)" if f.get("from_seq") else "")
    row("training steps (32 lines each)", steps)
    row("training wall-clock minutes (2 shared cores)",
        lambda f: f"{f['train_minutes']:.0f}" + (" (CTC-only training)" if f.get("stage_from") else ""))
    lines += ["", "### sha256 of the shipped files", ""]
    for n in (CTC_NAME, SEQ_NAME):
        for p in sorted((OUT / n).glob("*")):
            if p.suffix in (".onnx", ".txt"):
                lines.append(f"- `{sha256(p)}`  `{n}/{p.name}`")
    lines += ["", README_END]
    readme = OUT / "README.md"
    text = readme.read_text(encoding="utf-8")
    block = "\n".join(lines)
    if README_START in text:
        a = text.index(README_START)
        b = text.index(README_END) + len(README_END)
        text = text[:a] + block + text[b:]
    else:
        text = text.rstrip("\n") + "\n\n" + block + "\n"
    readme.write_text(text, encoding="utf-8")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    sub = ap.add_subparsers(dest="cmd", required=True)
    t = sub.add_parser("train")
    t.add_argument("kind", choices=["ctc", "seq"])
    t.add_argument("--minutes", type=float, default=35)
    t.add_argument("--threads", type=int, default=1)
    t.add_argument("--seed", type=int, default=7)
    t.add_argument("--batch", type=int, default=32)
    t.add_argument("--lr", type=float, default=None)
    t.add_argument("--device", default="cpu", help="torch device to train on (cpu, cuda)")
    t.add_argument("--workers", type=int, default=0,
                   help="processes drawing training lines (0: in the training process)")
    t.add_argument("--encoder-from", type=Path, default=None,
                   help="seq: take the encoder from this CTC checkpoint, freeze it and start a new schedule")
    t.add_argument("--unfreeze", action="store_true",
                   help="seq: train a taken (frozen) encoder on with the decoder from here")
    t.add_argument("--new-stage", action="store_true",
                   help="start a new stage from the checkpoint: fresh warm-up and cosine over --minutes, the "
                        "earlier stages' minutes kept for the figures (give it once; resume without it)")
    t.add_argument("--clean", action="store_true",
                   help="clean training lines as the demo cards clean crops ([input] flatten, trim) before resizing")
    e = sub.add_parser("export")
    e.add_argument("--opset", type=int, default=17)
    e.add_argument("--only", choices=["ctc", "seq"], default=None)
    sub.add_parser("readme", help="rewrite the figures and sha256 block of models/README.md")
    c = sub.add_parser("ctc-from-seq", help="write WORK/ctc.pt from the seq model's encoder and CTC head")
    c.add_argument("seq_checkpoint", type=Path)
    c.add_argument("--new-schedule", action="store_true",
                   help="start a CTC-only fine-tuning stage (train ctc) with its own warm-up and cosine")
    a = ap.parse_args(argv)
    if a.cmd == "train":
        lr = a.lr or (6e-4 if a.kind == "ctc" else 3e-4)     # fine-tuning from the previous build
        train(a.kind, a.minutes, a.threads, a.seed, a.batch, lr, a.device, a.workers, a.encoder_from, a.unfreeze,
              a.clean, a.new_stage)
    elif a.cmd == "readme":
        write_readme_block()
    elif a.cmd == "ctc-from-seq":
        step, minutes = ctc_from_seq(a.seq_checkpoint, WORK / "ctc.pt", a.new_schedule)
        if not a.new_schedule:                               # (a stage to train is not done)
            (WORK / "ctc.done").write_text(json.dumps({"step": step, "minutes": minutes, "from_seq": True}))
        print(f"{WORK / 'ctc.pt'}: the CTC part of {a.seq_checkpoint} (step {step})")
    else:
        export(a.opset, a.only)
        write_readme_block()


if __name__ == "__main__":
    main()
