"""CTC decoding: best path, prefix beam search, forced alignment, the CTC recogniser."""

from __future__ import annotations

import itertools
import math

import numpy as np
import onnx
import onnxruntime as ort
import pytest

from ocrbench.errors import OcrbenchError
from onnx.reference import ReferenceEvaluator

import _tiny_models as tm
from _runner_support import DEMO_CTC, demo_pages, direct_line_tensor, greedy_collapse, need_demo, read_symbols
from ocrbench.recognisers.base import EngineOptions
from ocrbench.recognisers.registry import open_recogniser
from ocrbench.recognisers.card import load_card
from ocrbench.recognisers.ctc import forced_alignment, greedy_path, log_softmax, path_confidences, prefix_beam_search


# --------------------------------------------------------------------------- references written for the tests


def ctc_forward(y: np.ndarray, labels, blank: int = 0) -> float:
    """p(labels | y) by the CTC forward recursion in probability space (Graves et al. 2006, eqs. 5-8)."""
    ext = [blank]
    for c in labels:
        ext += [c, blank]
    T, S = len(y), len(ext)
    a = np.zeros((T, S))
    a[0, 0] = y[0, blank]
    if S > 1:
        a[0, 1] = y[0, ext[1]]
    for t in range(1, T):
        for s in range(S):
            v = a[t - 1, s] + (a[t - 1, s - 1] if s >= 1 else 0.0)
            if s >= 2 and ext[s] != blank and ext[s] != ext[s - 2]:
                v += a[t - 1, s - 2]
            a[t, s] = v * y[t, ext[s]]
    return a[T - 1, S - 1] + (a[T - 1, S - 2] if S > 1 else 0.0)


def collapse(path, blank: int = 0) -> tuple[int, ...]:
    """The CTC many-to-one map B: merge repeats, then drop blanks (Graves et al. 2006, section 2)."""
    return tuple(k for k, _ in itertools.groupby(path) if k != blank)


def all_labellings(n_labels: int, max_len: int, blank: int = 0):
    symbols = [c for c in range(n_labels + 1) if c != blank]
    for n in range(max_len + 1):
        yield from itertools.product(symbols, repeat=n)


def random_posteriors(rng: np.random.Generator, T: int, C: int, sharp: float = 2.0) -> np.ndarray:
    return np.exp(log_softmax(rng.normal(0, sharp, (T, C))))


# --------------------------------------------------------------------------- reference self-checks


def test_forward_recursion_equals_sum_over_paths():
    # Definition (Graves et al. 2006, eq. 3): p(l|x) is the sum over all paths that collapse to l.
    rng = np.random.default_rng(0)
    y = random_posteriors(rng, 4, 3)
    sums: dict[tuple, float] = {}
    for path in itertools.product(range(3), repeat=4):
        p = math.prod(y[t, k] for t, k in enumerate(path))
        sums[collapse(path)] = sums.get(collapse(path), 0.0) + p
    for lab, p in sums.items():
        assert ctc_forward(y, lab) == pytest.approx(p, rel=1e-12)
    assert sum(sums.values()) == pytest.approx(1.0)


# --------------------------------------------------------------------------- decoding


@pytest.mark.parametrize("seed", range(12))
def test_prefix_beam_search_with_wide_beam_finds_most_probable_labelling(seed):
    # Exhaustive search over every labelling, probabilities from the forward recursion (Graves et al. 2006).
    rng = np.random.default_rng(seed)
    T = int(rng.integers(1, 7))
    C = int(rng.integers(2, 5))
    y = random_posteriors(rng, T, C, sharp=float(rng.uniform(0.5, 3.0)))
    probs = {lab: ctc_forward(y, lab) for lab in all_labellings(C - 1, T)}
    assert sum(probs.values()) == pytest.approx(1.0)        # the labelling distribution sums to one
    best = max(probs, key=probs.get)
    ranked = prefix_beam_search(np.log(y), beam_width=10_000, prune=0.0)
    assert ranked[0][0] == best
    assert math.exp(ranked[0][1]) == pytest.approx(probs[best], rel=1e-9)
    for lab, lp in ranked[:10]:                              # every returned score is exact
        assert math.exp(lp) == pytest.approx(probs[lab], rel=1e-9, abs=1e-15)


def test_beam_search_beats_best_path_on_the_textbook_case():
    # Two frames, one label 'a' (index 1), p(blank) = 0.6 at both frames. Best path: blank blank -> ""
    # with p = 0.36; but p("a") = 0.4*0.6 + 0.6*0.4 + 0.4*0.4 = 0.64 (sum over the three paths; worked by hand,
    # the situation Graves et al. 2006 section 3.2 warns about).
    y = np.array([[0.6, 0.4], [0.6, 0.4]])
    labels, _ = greedy_path(np.log(y))
    assert labels == []
    ranked = prefix_beam_search(np.log(y), beam_width=4)
    assert ranked[0][0] == (1,) and math.exp(ranked[0][1]) == pytest.approx(0.64)
    assert ranked[1][0] == () and math.exp(ranked[1][1]) == pytest.approx(0.36)


@pytest.mark.parametrize("seed", range(6))
def test_greedy_path_is_collapsed_argmax(seed):
    rng = np.random.default_rng(100 + seed)
    lp = log_softmax(rng.normal(0, 2, (30, 5)))
    labels, best = greedy_path(lp, blank=0)
    assert labels == list(collapse(np.argmax(lp, axis=1).tolist()))
    assert best.tolist() == np.argmax(lp, axis=1).tolist()


@pytest.mark.parametrize("seed", range(6))
def test_forced_alignment_is_the_best_path_for_the_labelling(seed):
    # Brute force over every path: the Viterbi path must collapse to the labels and be the most probable such path.
    rng = np.random.default_rng(200 + seed)
    T, C = 6, 3
    lp = log_softmax(rng.normal(0, 1.5, (T, C)))
    labels = [1, 2] if seed % 2 else [2, 2]
    path = forced_alignment(lp, labels)
    assert collapse(path.tolist()) == tuple(labels)
    best = max((p for p in itertools.product(range(C), repeat=T) if collapse(p) == tuple(labels)),
               key=lambda p: sum(lp[t, k] for t, k in enumerate(p)))
    assert sum(lp[t, k] for t, k in enumerate(path)) == pytest.approx(sum(lp[t, k] for t, k in enumerate(best)))


def test_path_confidences():
    y = np.array([[0.9, 0.1], [0.2, 0.8], [0.3, 0.7], [0.95, 0.05]])
    line, chars = path_confidences(np.log(y), np.array([0, 1, 1, 0]))
    assert line == pytest.approx((0.9 * 0.8 * 0.7 * 0.95) ** 0.25)     # geometric mean along the path
    assert chars == pytest.approx([0.8])                                # best posterior of the label's frames


# --------------------------------------------------------------------------- the recogniser (tiny model)


def softmax3(x: float) -> np.ndarray:
    z = np.array([0.0, 10 * x - 2, 20 * x - 9])                         # the tiny model's scores (see _tiny_models)
    return np.exp(z - z.max()) / np.exp(z - z.max()).sum()


def test_tiny_ctc_reads_the_blocks(tmp_path):
    rec = open_recogniser(load_card(tm.write_ctc(tmp_path / "m")))
    crops = [tm.block_line(" a b  aa bb "), tm.block_line("  b a "), tm.block_line("      ")]
    res, timings = rec.recognise(crops)
    assert [r.text for r in res] == ["abab", "ba", ""]
    x = (255 - 128) / 255                                               # mean ink of a grey block
    pa, pb, p0 = softmax3(x)[1], softmax3(1.0)[2], softmax3(0.0)[0]
    assert res[1].char_confidences == pytest.approx([pb, pa], rel=1e-5)
    # "  b a " = 12 frames: 4 paper, 2 ink, 2 paper, 2 grey, 2 paper
    assert res[1].confidence == pytest.approx((p0 ** 8 * pb ** 2 * pa ** 2) ** (1 / 12), rel=1e-5)
    assert res[1].steps == 12 and res[1].width_px == 48
    assert sum(t.n_lines for t in timings) == 3


def test_batching_keeps_line_order_and_text(tmp_path):
    card = load_card(tm.write_ctc(tmp_path / "m"))
    rng = np.random.default_rng(3)
    patterns = ["".join(rng.choice([" ", "a", "b"], int(rng.integers(2, 30)))) for _ in range(40)]
    crops = [tm.block_line(p) for p in patterns]
    one = open_recogniser(card, options=EngineOptions(batch_size=1)).recognise(crops)[0]
    many, timings = open_recogniser(card, options=EngineOptions(batch_size=16)).recognise(crops)
    # each block is two frames of one class (paper reads blank), so the expected text is the CTC collapse
    # of the block classes (Graves et al. 2006, section 2)
    code = {" ": 0, "a": 1, "b": 2}
    expect = ["".join(" ab"[k] for k in collapse([code[c] for c in p])) for p in patterns]
    assert [r.text for r in one] == expect
    assert [r.text for r in many] == expect
    assert max(t.n_lines for t in timings) <= 16 and len(timings) < 40


def test_beam_decoding_in_the_recogniser_agrees_on_confident_frames(tmp_path):
    card = load_card(tm.write_ctc(tmp_path / "m"))
    crops = [tm.block_line(" a b  aa bb "), tm.block_line("  b a ")]
    beam = open_recogniser(card, options=EngineOptions(decoding="beam", beam_width=4)).recognise(crops)[0]
    assert [r.text for r in beam] == ["abab", "ba"]
    assert all(len(r.char_confidences) == len(r.text) for r in beam)


def test_reference_evaluator_agrees_with_onnxruntime_tiny(tmp_path):
    # onnx.reference.ReferenceEvaluator: the reference implementation of the ONNX operator specification.
    folder = tm.write_ctc(tmp_path / "m")
    x = np.random.default_rng(0).random((2, 1, 8, 40), dtype=np.float32)
    want = ReferenceEvaluator(onnx.load(str(folder / "model.onnx"))).run(None, {"image": x})[0]
    got = ort.InferenceSession(str(folder / "model.onnx"), providers=["CPUExecutionProvider"]).run(None, {"image": x})[0]
    np.testing.assert_allclose(got, want, rtol=1e-5, atol=1e-5)


# --------------------------------------------------------------------------- the demo model


@pytest.mark.slow
def test_reference_evaluator_agrees_with_onnxruntime_demo():
    # onnx.reference.ReferenceEvaluator: the reference implementation of the ONNX operator specification.
    folder = need_demo(DEMO_CTC)
    card = load_card(folder)
    from ocrbench import synth
    import random

    img, _ = synth.line_sample(random.Random(11))
    rec = open_recogniser(card, warm_up=False)
    x = rec.prepare([np.asarray(img)])[0].tensor
    want = ReferenceEvaluator(onnx.load(str(card.ctc.model))).run(None, {"image": x})[0]
    got = rec.session.run(None, {"image": x})[0]
    np.testing.assert_allclose(got, want, rtol=1e-3, atol=1e-3)


@pytest.mark.slow
def test_demo_pages_equal_a_direct_onnxruntime_path(tmp_path):
    # The runner's text must equal a plain script: bare onnxruntime, one line at a time, best-path decoding.
    folder = need_demo(DEMO_CTC)
    from ocrbench.pages import analyse_page, list_pages, load_page
    from ocrbench.run.engine import run_pages
    from ocrbench.store import RunStore

    pages = demo_pages(tmp_path)
    symbols = read_symbols(folder / "alphabet.txt")
    sess = ort.InferenceSession(str(folder / "model.onnx"), providers=["CPUExecutionProvider"])
    direct = {}
    for ref in list_pages(pages):
        texts = []
        for lb in analyse_page(load_page(ref).gray).lines:
            x, w = direct_line_tensor(lb.crop)
            logits = sess.run(None, {"image": x})[0][0]
            frames = math.ceil(w / 4)
            texts.append(greedy_collapse(np.argmax(logits[:frames], axis=1).tolist(), 0, symbols))
        direct[ref.id] = texts
    with RunStore(tmp_path / "s.sqlite") as st:
        # The direct path reads the crops as cut, so the runner does too here (the card's flatten and trim off).
        import dataclasses
        card = load_card(folder)
        card = dataclasses.replace(card, input=dataclasses.replace(card.input, flatten=False, trim=False))
        summary = run_pages(pages, [card], store=st, options=EngineOptions(batch_size=1))
        got = st.page_texts(summary.recognisers[0].run_id)
    assert got == direct
    assert sum(len(v) for v in direct.values()) > 10


def test_session_options_reach_onnxruntime(tmp_path):
    import onnxruntime as ort_

    card = load_card(tm.write_ctc(tmp_path / "m"))
    lacking = next(p for p in ort_.get_all_providers() if p not in ort_.get_available_providers())
    opts = EngineOptions(intra_threads=2, inter_threads=3, graph_optimisation="basic",
                         providers=(lacking, "CPUExecutionProvider"), allow_cpu_fallback=True)
    rec = open_recogniser(card, options=opts)
    so = rec.session.get_session_options()
    assert (so.intra_op_num_threads, so.inter_op_num_threads) == (2, 3)
    assert so.graph_optimization_level == ort_.GraphOptimizationLevel.ORT_ENABLE_BASIC
    assert rec.providers == ["CPUExecutionProvider"]            # missing providers skipped (allowed), CPU as the fallback
    with pytest.raises(OcrbenchError, match="NoSuchExecutionProvider.*not one onnxruntime knows"):
        open_recogniser(card, options=EngineOptions(providers=("NoSuchExecutionProvider", "CPUExecutionProvider")))
    crops = [tm.block_line(" a b  aa bb ")]
    plain = open_recogniser(card, options=EngineOptions(graph_optimisation="disable")).recognise(crops)[0]
    assert [r.text for r in rec.recognise(crops)[0]] == [r.text for r in plain] == ["abab"]
