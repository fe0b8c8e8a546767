"""Measured effect of post-processing (CER per class before/after) and the arithmetic check's detection rate."""

from __future__ import annotations

import random

import editdistance
import pytest

from ocrbench import synth
from ocrbench.ledger import balance as ledger
from ocrbench.postprocess.effect import (alter_amount_digit, amount_misread_detection, cer_before_after,
                                         misread_amount_lines, simulate_misreads)
from ocrbench.postprocess.lexicon import Lexicon
from ocrbench.postprocess.steps import build_pipeline


@pytest.fixture(scope="module")
def truth_pages(tmp_path_factory):
    d = tmp_path_factory.mktemp("effect_archive")
    synth.write_archive(d, synth.ArchiveSpec(n_pages=6))
    return {p.stem: p.read_text(encoding="utf-8").splitlines() for p in sorted(d.glob("*.txt"))}


def test_single_misreads_are_all_detected_and_located(truth_pages):
    truth = list(truth_pages.values())
    for seed in range(5):
        sims = simulate_misreads(truth, per_page=1, seed=seed)
        hyp = [lines for lines, _ in sims]
        for (lines, altered), t in zip(sims, truth):
            assert misread_amount_lines(t, lines) == altered and len(altered) == 1
        det = amount_misread_detection(truth, hyp)
        # one changed digit always changes the sum (or makes the amount unreadable): all caught
        assert det.misread_lines == 6 and det.detected == 6 and det.detection_rate == 1.0
        assert det.located == 6                        # and the line itself is pointed at
        assert det.detection_low < 1.0 == det.detection_high
    clean = amount_misread_detection(truth, truth)
    assert clean.misread_lines == 0 and clean.detection_rate is None and clean.false_alarms == 0
    assert clean.clean_pages == 6


def test_detection_with_several_misreads_and_skipped_pages(truth_pages):
    truth = list(truth_pages.values())
    sims = []
    for seed in range(10):
        sims += simulate_misreads(truth, per_page=3, seed=seed)
    det = amount_misread_detection(truth * 10, [s for s, _ in sims])
    assert det.misread_lines == 180
    assert det.detection_rate >= 0.95                  # only cancelling misreads can hide
    assert det.detection_low <= det.detection_rate <= det.detection_high
    short = amount_misread_detection([truth[0]], [truth[0][:-1]])
    assert short.pages_skipped == 1 and short.misread_lines == 0
    with pytest.raises(ValueError):
        amount_misread_detection([], [truth[0]])


def test_alter_amount_digit_changes_exactly_one_digit():
    rng = random.Random(0)
    line = "Jan 9 H. Brem wages week 14 1,540.85"
    for _ in range(50):
        new = alter_amount_digit(line, ledger.DECIMAL, rng)
        diffs = [(a, b) for a, b in zip(line, new) if a != b]
        assert len(new) == len(line) and len(diffs) == 1 and diffs[0][1].isdigit()
        assert new.startswith("Jan 9 H. Brem wages week 14 ")     # the week number is not the amount
    assert alter_amount_digit("Folio 12", ledger.DECIMAL, rng) is None


def _corrupt(line: str, rng: random.Random) -> str:
    """Recogniser-like slips in the words only: long s for s, doubled spaces, a letter misread."""
    out = line.replace("s", "ſ", 1) if rng.random() < 0.5 else line
    out = out.replace(" ", "  ", 1) if rng.random() < 0.5 else out
    return out.replace("o", "c", 1) if rng.random() < 0.4 else out


def test_cer_before_after_by_class(truth_pages):
    rng = random.Random(5)
    truth = list(truth_pages.values())
    raw = [[_corrupt(t, rng) for t in page] for page in truth]
    words = sorted({w.strip(".,&") for page in truth for t in page for w in t.split()
                    if w.strip(".,&").isalpha()})
    lex = Lexicon.from_words(words)
    pipe = build_pipeline(["unicode", "whitespace", "variants", "lexicon"], lexicon=lex)
    post = [pipe.apply_texts(page) for page in raw]
    ids = list(truth_pages)
    table = cer_before_after(list(zip(ids, truth, raw, post)), n_boot=300).set_index("class")
    # overall CER agrees with a direct count (reference: the editdistance package)
    ref_chars = sum(len(t) for page in truth for t in page)
    edits_before = sum(editdistance.eval(t, h) for tp, hp in zip(truth, raw) for t, h in zip(tp, hp))
    edits_after = sum(editdistance.eval(t, h) for tp, hp in zip(truth, post) for t, h in zip(tp, hp))
    assert table.loc["all", "ref_chars"] == ref_chars
    assert table.loc["all", "cer_before"] == pytest.approx(edits_before / ref_chars)
    assert table.loc["all", "cer_after"] == pytest.approx(edits_after / ref_chars)
    assert table.loc["all", "cer_after"] < table.loc["all", "cer_before"]
    assert table.loc["all", "high"] < 0                       # a real improvement, beyond chance
    # classes add up to the whole; digits untouched by this pipeline; no class made worse
    assert table.drop(index="all")["edits_after"].sum() == table.loc["all", "edits_after"]
    assert table.loc["digit", "edits_before"] == table.loc["digit", "edits_after"] == 0
    assert not table["raised"].any()


def test_cer_check_flags_a_class_made_worse(truth_pages):
    truth = list(truth_pages.values())
    # a harmful "post-processing" that turns every 0 into O: digits must be flagged as raised
    harmed = [[t.replace("0", "O") for t in page] for page in truth]
    table = cer_before_after([(str(i), t, t, h) for i, (t, h) in enumerate(zip(truth, harmed))],
                             n_boot=300).set_index("class")
    assert bool(table.loc["digit", "raised"]) and table.loc["digit", "low"] > 0
    assert table.loc["digit", "cer_before"] == 0.0
    assert not table.loc["space", "raised"]
