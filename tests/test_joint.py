"""Joint decoding of a seq recogniser with its encoder's CTC output (ocrbench/recognisers/joint.py).

* The prefix scorer against the definition, by brute force: the probability that a CTC output's
  labelling begins with ``h`` is the sum of the probabilities of every frame path whose collapse
  (merge repeats, then drop blanks: Graves et al. 2006, ICML, "Connectionist Temporal Classification",
  section 2) starts with ``h``; the end token's score is the sum over the paths that collapse to ``h``
  exactly. All 3^6 paths are enumerated for two lines, one with padded frames, over prefixes with a
  repeated label (which needs a blank between its copies).
* The shipped ledger-seq card declares ``[seq.ctc]``: the engine's greedy joint decoding equals beam
  search of width 1 (both take the best joint score each step); weight 0 is the decoder alone, the
  same texts as the card with its ``[seq.ctc]`` table removed; and the card checks name the field.
"""

from __future__ import annotations

import itertools
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from _browser_set import SET_DIR, read_truth
from ocrbench.errors import CardError, OcrbenchError
from ocrbench.recognisers.base import EngineOptions
from ocrbench.recognisers.card import load_card, token_classes
from ocrbench.recognisers.joint import PrefixScorer, class_scores
from ocrbench.recognisers.registry import open_recogniser

ROOT = Path(__file__).resolve().parents[1]
SEQ = ROOT / "models" / "ledger-seq"


def _collapse(path) -> list[int]:
    out, prev = [], None
    for c in path:
        if c != prev and c != 0:
            out.append(c)
        prev = c
    return out


def _brute(lp: np.ndarray, frames: int, h: list[int]) -> tuple[float, float]:
    """(P(labelling begins with h), P(labelling is h)) over every path of the first ``frames`` frames."""
    pre = full = 0.0
    for path in itertools.product(range(lp.shape[1]), repeat=frames):
        p = float(np.exp(sum(lp[t, c] for t, c in enumerate(path))))
        lab = _collapse(path)
        pre += p if lab[:len(h)] == h else 0.0
        full += p if lab == h else 0.0
    return pre, full


def test_prefix_scores_equal_the_sum_over_alignments():
    rng = np.random.default_rng(7)
    T, C = 6, 3
    x = rng.normal(size=(2, T, C)) * 2.0
    lp = x - np.log(np.exp(x).sum(-1, keepdims=True))
    valid = np.array([6, 4])                    # the second line's last two frames are padding
    # decoder tokens: 0 pad, 1 start, 2 end, 3 -> class 1, 4 -> class 2
    tc = token_classes(["", "", "", "a", "b"], ["", "a", "b"], blank=0)
    assert tc.tolist() == [-1, -1, -1, 1, 2]
    sc = PrefixScorer(lp, valid, 0, tc, eos=2)
    hist: list[list[int]] = [[], []]
    for step in [(3, 4), (3, 4), (4, 4)]:       # line 0: a a b, line 1: b b b (repeats)
        g = sc.next_scores(5)
        assert np.all(g <= 0.0)
        assert np.isneginf(g[:, :2]).all()      # start and padding tokens have no class
        for line in range(2):
            h = [int(tc[t]) for t in hist[line]]
            base, full = _brute(lp[line], valid[line], h)
            for tok in (3, 4):
                pre, _ = _brute(lp[line], valid[line], h + [int(tc[tok])])
                assert np.exp(g[line, tok]) == pytest.approx(pre / base, rel=1e-9, abs=1e-12)
            assert np.exp(g[line, 2]) == pytest.approx(full / base, rel=1e-9, abs=1e-12)
        sc.advance(np.array(step), g[np.arange(2), np.array(step)])
        for line in range(2):
            hist[line].append(step[line])
    # the running score is the prefix's log probability itself (the gains telescope)
    pre, _ = _brute(lp[0], 6, [1, 1, 2])
    assert np.exp(sc.score[0]) == pytest.approx(pre, rel=1e-9)


def test_scorer_rows_follow_take_and_score_kinds_agree():
    rng = np.random.default_rng(3)
    x = rng.normal(size=(2, 5, 3))
    tc = np.array([-1, -1, -1, 1, 2])
    a = PrefixScorer(class_scores(x, "logits"), np.array([5, 5]), 0, tc, 2)
    p = np.exp(class_scores(x, "logits"))
    b = PrefixScorer(class_scores(p, "probs"), np.array([5, 5]), 0, tc, 2)
    assert np.allclose(a.next_scores(5)[:, 2:], b.next_scores(5)[:, 2:])
    g = a.next_scores(5)
    a.take(np.array([1, 1, 0]))                 # beam search: rows copied from their parents
    assert a.rows.tolist() == [1, 1, 0]
    assert np.allclose(a.next_scores(5), g[[1, 1, 0]])


def _drop_joint_table(folder: Path) -> None:
    """Remove the [seq.ctc] table from the card in ``folder`` (the decoder alone)."""
    text = (folder / "card.toml").read_text(encoding="utf-8")
    (folder / "card.toml").write_text(re.sub(r"\[seq\.ctc\][^\[]*", "", text), encoding="utf-8")


def _crops(n: int) -> list[np.ndarray]:
    truth = read_truth()[:: max(1, len(read_truth()) // n)][:n]
    return [np.asarray(Image.open(SET_DIR / name).convert("L")) for name, _ in truth]


def _texts(card, **opts) -> list[str]:
    rec = open_recogniser(card, options=EngineOptions(batch_size=8, **opts))
    return [r.text for r in rec.recognise(_crops(12))[0]]


def test_shipped_seq_card_declares_joint_decoding():
    from typer.testing import CliRunner

    from ocrbench.cli.app import app

    card = load_card(SEQ)
    assert card.seq.ctc is not None and 0 < card.seq.ctc.weight < 1
    # every text token of the decoder is one class of the CTC alphabet
    assert all(c >= 0 for s, c in zip(card.seq.symbols, card.seq.ctc.token_class) if s)
    res = CliRunner().invoke(app, ["card", "check", str(SEQ)])
    assert res.exit_code == 0 and "decoding: joint with the encoder's CTC output 'ctc_log_probs'" in res.output


def test_a_ctc_weight_on_the_command_line_without_a_ctc_output_is_one_line(tmp_path):
    from typer.testing import CliRunner

    from ocrbench.cli.app import app

    alone = tmp_path / "alone"
    shutil.copytree(SEQ, alone)
    _drop_joint_table(alone)
    pages = tmp_path / "pages"
    pages.mkdir()
    Image.fromarray(np.full((200, 300), 255, np.uint8)).save(pages / "p1.png")
    res = CliRunner().invoke(app, ["run", str(pages), "--recogniser", str(alone), "--store",
                                   str(tmp_path / "s.sqlite"), "--ctc-weight", "0.3"])
    assert res.exit_code == 2 and "declares no [seq.ctc] output" in res.output
    assert "Traceback" not in res.output


@pytest.mark.slow
def test_greedy_joint_equals_beam_of_one_and_weight_zero_is_the_decoder_alone(tmp_path):
    card = load_card(SEQ)
    greedy = _texts(card, decoding="greedy")
    assert greedy == _texts(card, decoding="beam", beam_width=1)
    alone = tmp_path / "alone"
    shutil.copytree(SEQ, alone)
    _drop_joint_table(alone)
    assert load_card(alone).seq.ctc is None
    assert _texts(card, ctc_weight=0.0) == _texts(load_card(alone))


def _edit(tmp_path: Path, old: str, new: str) -> Path:
    d = tmp_path / "card"
    shutil.copytree(SEQ, d)
    text = (d / "card.toml").read_text(encoding="utf-8")
    assert old in text
    (d / "card.toml").write_text(text.replace(old, new), encoding="utf-8")
    return d


@pytest.mark.parametrize("old,new,field", [
    ('output = "ctc_log_probs"', 'output = "ctc_scores"', "seq.ctc.output"),
    ('output = "ctc_log_probs"', 'output = "cross_k"', "seq.ctc.output"),
    ("weight = 0.5", "weight = 1.0", "seq.ctc.weight"),
    ('alphabet = "ctc_alphabet.txt"', 'alphabet = "missing.txt"', "seq.ctc.alphabet"),
    ("blank_index = 0", "blank_index = 500", "seq.ctc.blank_index"),
])
def test_card_errors_name_the_field(tmp_path, old, new, field):
    with pytest.raises(CardError) as e:
        load_card(_edit(tmp_path, old, new))
    assert field in str(e.value)


def test_alphabet_lacking_tokens_or_of_the_wrong_size_is_refused(tmp_path):
    d = tmp_path / "card"
    shutil.copytree(SEQ, d)
    lines = (d / "ctc_alphabet.txt").read_text(encoding="utf-8").splitlines()
    for kept in (lines[:-1], lines + ['"\u2603"']):       # a token without a class; one class too many
        (d / "ctc_alphabet.txt").write_text("\n".join(kept) + "\n", encoding="utf-8")
        with pytest.raises(CardError) as e:
            open_recogniser(load_card(d), options=EngineOptions()).warm_up()
        assert "seq.ctc.alphabet" in str(e.value)


def test_ctc_weight_needs_a_ctc_output(tmp_path):
    alone = tmp_path / "alone"
    shutil.copytree(SEQ, alone)
    _drop_joint_table(alone)
    with pytest.raises(OcrbenchError, match="no \\[seq.ctc\\]"):
        open_recogniser(load_card(alone), options=EngineOptions(ctc_weight=0.5))
    with pytest.raises(OcrbenchError, match="CTC weight"):
        EngineOptions(ctc_weight=1.0)
