"""Autoregressive decoding: cached vs uncached, greedy vs beam, batch drop-out vs masking, guards."""

from __future__ import annotations

import itertools
import math
import random

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx.reference import ReferenceEvaluator

import _tiny_models as tm
from _runner_support import DEMO_SEQ, demo_pages, direct_line_tensor, need_demo, read_symbols
from ocrbench.recognisers.base import EngineOptions
from ocrbench.recognisers.registry import open_recogniser
from ocrbench.recognisers.card import load_card


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    return load_card(tm.write_seq(tmp_path_factory.mktemp("tiny") / "seq"))


def lines_of(n: int, seed: int = 1) -> list[np.ndarray]:
    rng = np.random.RandomState(seed)
    return [tm.block_line("".join(rng.choice([" ", "a", "b"], rng.randint(3, 12)))) for _ in range(n)]


def recognise(card, crops, **kw):
    return open_recogniser(card, options=EngineOptions(**kw)).recognise(crops)[0]


# --------------------------------------------------------------------------- tiny model


def test_tiny_lines_vary_in_length(tiny):
    # guards the other tests: lines must end at different steps for drop-out and masking to differ in work
    res = recognise(tiny, lines_of(12))
    assert len({r.steps for r in res}) >= 4


def test_cached_and_uncached_decoding_give_identical_text(tiny):
    crops = lines_of(16)
    a = recognise(tiny, crops, use_cache=True)
    b = recognise(tiny, crops, use_cache=False)
    assert [r.text for r in a] == [r.text for r in b]
    assert [r.steps for r in a] == [r.steps for r in b]
    assert [r.confidence for r in a] == pytest.approx([r.confidence for r in b], rel=1e-5)


def test_dropping_finished_lines_equals_masking_them(tiny):
    crops = lines_of(16, seed=2)
    a = recognise(tiny, crops, batch_mode="drop")
    b = recognise(tiny, crops, batch_mode="mask")
    assert [(r.text, r.steps) for r in a] == [(r.text, r.steps) for r in b]
    assert [r.confidence for r in a] == pytest.approx([r.confidence for r in b], rel=1e-5)


@pytest.mark.parametrize("use_cache", [True, False])
def test_beam_width_one_equals_greedy(tiny, use_cache):
    crops = lines_of(16, seed=3)
    g = recognise(tiny, crops, use_cache=use_cache)
    b = recognise(tiny, crops, use_cache=use_cache, decoding="beam", beam_width=1)
    assert [(r.text, r.steps, r.truncated) for r in g] == [(r.text, r.steps, r.truncated) for r in b]
    assert [r.confidence for r in g] == pytest.approx([r.confidence for r in b], rel=1e-5)


def test_batched_greedy_equals_one_line_at_a_time(tiny):
    crops = lines_of(10, seed=4)
    a = recognise(tiny, crops, batch_size=16)
    b = recognise(tiny, crops, batch_size=1)
    assert [r.text for r in a] == [r.text for r in b]


def direct_greedy(folder, crop: np.ndarray, max_tokens: int) -> tuple[list[int], bool]:
    """A plain greedy loop with bare onnxruntime on the uncached decoder, one line (written for this test)."""
    enc = ort.InferenceSession(str(folder / "encoder.onnx"), providers=["CPUExecutionProvider"])
    dec = ort.InferenceSession(str(folder / "decoder_full.onnx"), providers=["CPUExecutionProvider"])
    w = crop.shape[1]
    x = np.zeros((1, 1, 8, math.ceil(w / 4) * 4), np.float32)
    x[0, 0, :, :w] = (255.0 - crop) / 255.0
    mem = enc.run(None, {"image": x})[0]
    mask = np.zeros((1, mem.shape[1]), np.float32)
    mask[0, math.ceil(w / 4):] = -1e9
    toks = [1]
    for _ in range(max_tokens):
        lp = dec.run(None, {"tokens": np.array([toks]), "memory": mem, "memory_mask": mask})[0][0]
        k = int(np.argmax(lp))
        if k == 2:
            return toks[1:], True
        toks.append(k)
    return toks[1:], False


def test_greedy_equals_a_direct_loop(tiny):
    crops = lines_of(8, seed=5)
    res = recognise(tiny, crops)
    for crop, r in zip(crops, res):
        toks, ended = direct_greedy(tiny.folder, crop, 12)
        assert r.text == "".join(tm.SEQ_VOCAB[t] for t in toks if t > 2)
        assert r.steps == len(toks) + (1 if ended else 0)       # decoder steps: tokens + the end token
        assert r.truncated == (not ended)


def test_max_tokens_guard(tiny):
    res = recognise(tiny, lines_of(12), max_tokens=3)
    assert all(r.steps <= 3 for r in res)
    assert any(r.truncated and r.steps == 3 for r in res)
    for r in res:
        assert r.steps == r.tokens + (0 if r.truncated else 1)


@pytest.mark.parametrize("use_cache", [True, False])
def test_wide_beam_finds_the_most_probable_sequence(tiny, use_cache):
    # Exhaustive search: every token sequence up to max_tokens, scored with the decoder's own log-probabilities
    # through bare onnxruntime (uncached graph), compared with beam search holding every prefix.
    max_tokens = 3
    crops = lines_of(3, seed=6)
    rec = open_recogniser(tiny, options=EngineOptions(use_cache=use_cache, max_tokens=max_tokens))
    pb = rec.prepare(crops)[0]
    memory, mask = rec.encode(pb.tensor, pb.widths)
    decoded = rec.beam(memory, mask, beam_width=10 ** 3, max_tokens=max_tokens)
    dec = ort.InferenceSession(str(tiny.folder / "decoder_full.onnx"), providers=["CPUExecutionProvider"])
    V = len(tm.SEQ_VOCAB)
    for b, d in enumerate(decoded):
        line = pb.indices[b]
        mem, msk = memory[0][b: b + 1], mask[b: b + 1]
        cache: dict[tuple, np.ndarray] = {}

        def lp(prefix):
            if prefix not in cache:
                cache[prefix] = dec.run(None, {"tokens": np.array([[1, *prefix]]), "memory": mem,
                                               "memory_mask": msk})[0][0].astype(np.float64)
            return cache[prefix]
        best = (-math.inf, None)
        for n in range(max_tokens + 1):
            for seq in itertools.product([t for t in range(V) if t != 2], repeat=n):
                s = sum(lp(seq[:i])[seq[i]] for i in range(n))
                if n < max_tokens:
                    cand = (s + lp(seq)[2], seq)          # ends with the end token
                else:
                    cand = (s, seq)                       # stopped by the guard
                best = max(best, cand, key=lambda c: c[0])
        assert tuple(d.tokens) == best[1], f"line {line}"
        assert sum(d.log_probs) == pytest.approx(best[0], abs=1e-4)


def test_reference_evaluator_agrees_with_onnxruntime_tiny(tiny):
    # onnx.reference.ReferenceEvaluator: the reference implementation of the ONNX operator specification.
    folder = tiny.folder
    x = np.random.default_rng(0).random((2, 1, 8, 24), dtype=np.float32)
    feeds_enc = {"image": x}
    mem = ReferenceEvaluator(onnx.load(str(folder / "encoder.onnx"))).run(None, feeds_enc)[0]
    got = ort.InferenceSession(str(folder / "encoder.onnx")).run(None, feeds_enc)[0]
    np.testing.assert_allclose(got, mem, rtol=1e-5, atol=1e-5)
    mask = np.zeros((2, mem.shape[1]), np.float32)
    feeds = {"tokens": np.array([[1], [4]]), "step": np.array(2), "past": np.random.default_rng(1).random(
        (2, 2, tm.D), dtype=np.float32), "memory": mem, "memory_mask": mask}
    want = ReferenceEvaluator(onnx.load(str(folder / "decoder_step.onnx"))).run(None, feeds)
    got = ort.InferenceSession(str(folder / "decoder_step.onnx")).run(None, feeds)
    for g, w in zip(got, want):
        np.testing.assert_allclose(g, w, rtol=1e-5, atol=1e-5)


# --------------------------------------------------------------------------- demo model


def demo_lines(n: int, seed: int = 21) -> list[np.ndarray]:
    from ocrbench import synth

    rng = random.Random(seed)
    return [np.asarray(synth.line_sample(rng)[0]) for _ in range(n)]


@pytest.mark.slow
def test_demo_cached_uncached_and_beam_one(tmp_path):
    card = load_card(need_demo(DEMO_SEQ))
    crops = demo_lines(6)
    g = recognise(card, crops)
    assert [r.text for r in recognise(card, crops, use_cache=False)] == [r.text for r in g]
    assert [r.text for r in recognise(card, crops, decoding="beam", beam_width=1)] == [r.text for r in g]
    assert [r.text for r in recognise(card, crops, batch_mode="mask")] == [r.text for r in g]


@pytest.mark.slow
def test_demo_batched_equals_one_line_at_a_time(tmp_path):
    # A line must read the same whatever lines share its batch: with each line encoded alone the padding of
    # wider neighbours cannot reach its memory (masked frames get zero attention weight).
    card = load_card(need_demo(DEMO_SEQ))
    from ocrbench.pages import analyse_page, list_pages, load_page

    ref = list_pages(demo_pages(tmp_path, n=1))[0]
    crops = [lb.crop for lb in analyse_page(load_page(ref).gray).lines]
    one = [r.text for r in recognise(card, crops, batch_size=1)]
    assert [r.text for r in recognise(card, crops, batch_size=16)] == one
    assert len(one) > 10


@pytest.mark.slow
def test_reference_evaluator_agrees_with_onnxruntime_demo():
    # onnx.reference.ReferenceEvaluator: the reference implementation of the ONNX operator specification.
    card = load_card(need_demo(DEMO_SEQ))
    rec = open_recogniser(card, warm_up=False)
    pb = rec.prepare(demo_lines(1, seed=5))[0]
    s = card.seq
    feeds = {"image": pb.tensor}
    want = ReferenceEvaluator(onnx.load(str(s.encoder.model))).run(None, feeds)
    got = rec.encoder.run(None, feeds)
    for g, w in zip(got, want):
        np.testing.assert_allclose(g, w, rtol=1e-3, atol=1e-3)
    memory, mask = rec.encode(pb.tensor, pb.widths)
    step_feeds = {"tokens": np.array([[s.bos_index]]), "step": np.array(0), "memory_mask": mask,
                  "past_k": rec._init_cache(1)[0], "past_v": rec._init_cache(1)[1],
                  "cross_k": memory[0], "cross_v": memory[1]}
    want = ReferenceEvaluator(onnx.load(str(s.decoder_step.model))).run(None, step_feeds)
    got = rec.step_session.run(None, step_feeds)
    for g, w in zip(got, want):
        np.testing.assert_allclose(g, w, rtol=1e-3, atol=1e-3)


@pytest.mark.slow
def _ctc_prefix_loop(x: np.ndarray, blank: int, rn: np.ndarray, rb: np.ndarray, last: int | None):
    """Every class's CTC prefix score after the prefix whose forward variables are ``rn``/``rb``, written as
    the textbook loop over frames (Graves 2012, section 7.5; the form hybrid CTC/attention decoders use,
    common practice), one frame at a time in log space: (psi per class, rn per class, rb per class)."""
    T, C = x.shape
    phi = np.logaddexp(rb, rn)[:, None].repeat(C, axis=1)
    if last is not None:
        phi[:, last] = rb
    r_n = np.full((T, C), -np.inf)
    r_b = np.full((T, C), -np.inf)
    if last is None:
        r_n[0] = x[0]
    psi = r_n[0].copy()
    for t in range(1, T):
        r_n[t] = np.logaddexp(r_n[t - 1], phi[t - 1]) + x[t]
        r_b[t] = np.logaddexp(r_n[t - 1], r_b[t - 1]) + x[t, blank]
        psi = np.logaddexp(psi, phi[t - 1] + x[t])
    return psi, r_n, r_b


def test_demo_pages_equal_a_direct_onnxruntime_path(tmp_path):
    # The runner's text must equal a plain script: bare onnxruntime, one line at a time, uncached greedy loop,
    # joint with the encoder's CTC output as the card says (the CTC prefix scores by the frame-by-frame loop
    # above, not the runner's cumulative-sum solution), and with the decoder alone (--ctc-weight 0). The
    # runner runs the same graphs here (uncached, batch 1) so the two compute the very same numbers; cached
    # decoding is compared with uncached decoding in test_demo_cached_uncached_and_beam_one. With the CTC
    # weight the runner decodes drafted (recognisers/verify.py: the CTC best path checked in one pass of the
    # same graph), so this also checks that drafting reads what a token-by-token loop reads.
    folder = need_demo(DEMO_SEQ)
    from ocrbench.pages import analyse_page, list_pages, load_page
    from ocrbench.run.engine import run_pages
    from ocrbench.store import RunStore

    pages = demo_pages(tmp_path, n=1)
    vocab = read_symbols(folder / "vocab.txt")
    classes = read_symbols(folder / "ctc_alphabet.txt")
    cls_of = {t: classes.index(vocab[t]) for t in range(3, len(vocab))}       # token -> CTC class, by text
    weight = load_card(folder).seq.ctc.weight
    enc = ort.InferenceSession(str(folder / "encoder.onnx"), providers=["CPUExecutionProvider"])
    dec = ort.InferenceSession(str(folder / "decoder_full.onnx"), providers=["CPUExecutionProvider"])
    direct: dict[float, dict] = {0.0: {}, weight: {}}
    for ref in list_pages(pages):
        lines = analyse_page(load_page(ref).gray).lines
        for w_ctc in direct:
            texts = []
            for lb in lines:
                x, w = direct_line_tensor(lb.crop)
                ck, cv, ctc = enc.run(["cross_k", "cross_v", "ctc_log_probs"], {"image": x})
                frames = math.ceil(w / 4)
                mask = np.where(np.arange(ck.shape[3]) < frames, 0.0, -1e9).astype(np.float32)[None]
                xc = ctc[0, :frames].astype(np.float64)
                rn = np.full(frames, -np.inf)
                rb = np.cumsum(xc[:, 0])
                last, score = None, 0.0
                toks = [1]                                       # <bos>
                for _ in range(200):
                    lp = dec.run(None, {"tokens": np.array([toks]), "cross_k": ck, "cross_v": cv,
                                        "memory_mask": mask})[0][0, -1].astype(np.float64)
                    if w_ctc:
                        psi, r_n, r_b = _ctc_prefix_loop(xc, 0, rn, rb, last)
                        g = np.full(len(vocab), -np.inf)
                        for t, c in cls_of.items():
                            g[t] = psi[c]
                        g[2] = np.logaddexp(rn[-1], rb[-1])           # <eos>: the labelling is the prefix
                        lp = (1 - w_ctc) * lp + w_ctc * np.minimum(g - score, 0.0)
                    k = int(np.argmax(lp))
                    if k == 2:                                   # <eos>
                        break
                    toks.append(k)
                    if w_ctc:
                        c = cls_of[k]
                        rn, rb, last, score = r_n[:, c], r_b[:, c], c, psi[c]
                texts.append("".join(vocab[t] for t in toks[1:] if t > 2))
            direct[w_ctc][ref.id] = texts
    import dataclasses
    card = load_card(folder)
    # The direct path reads whole lines as cut, so the runner does too here (the card's flatten and trim off).
    card = dataclasses.replace(card, input=dataclasses.replace(card.input, split_gap=0.0, flatten=False, trim=False))
    for w_ctc in direct:
        with RunStore(tmp_path / f"s{w_ctc}.sqlite") as st:
            summary = run_pages(pages, [card], store=st,
                                options=EngineOptions(batch_size=1, use_cache=False, ctc_weight=w_ctc))
            got = st.page_texts(summary.recognisers[0].run_id)
        assert got == direct[w_ctc], w_ctc
    assert direct[0.0] != direct[weight]
