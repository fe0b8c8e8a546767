"""The repetition guard of seq decoding (ocrbench/recognisers/repeat.py): a line that keeps emitting one
n-gram stops early and is stored truncated; real ledger text with leaders, rules and repeated digits is
never cut; greedy and beam alike; the card can turn it off or change its limits.

The decoders here are real ONNX graphs run by onnxruntime: a scripted decoder that reads a fixed table of
log-probabilities whatever the image (tests/_tiny_models.py), the tiny random seq decoder, and the
Transformers-exported decoder of tests/fixtures/byo, whose greedy reading loops on one token.
"""

from __future__ import annotations

import json
import random
import shutil
import sqlite3
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from typer.testing import CliRunner

import _tiny_models as tm
from _scaleout_support import small_pages
from ocrbench.cli.app import app
from ocrbench.errors import CardError
from ocrbench.postprocess.review import review_queue
from ocrbench.recognisers.base import REPEATED_NGRAM, TOKEN_LIMIT, EngineOptions
from ocrbench.recognisers.card import load_card
from ocrbench.recognisers.registry import open_recogniser
from ocrbench.recognisers.repeat import RepeatGuard, RepeatState, advance, filler_tokens, repeat_period
from ocrbench.run.engine import RunOptions, run_pages
from ocrbench.store import TRUNCATED_CODES, RunStore

ROOT = Path(__file__).resolve().parents[1]
DECODINGS = ["greedy", "beam"]
LINES = [tm.block_line("ab ab ab"), tm.block_line("a"), tm.block_line(" abba a ab")]

#: Real ledger lines that repeat on purpose: dotted and spaced leaders, rules, totals, repeated digits.
LEDGER_LINES = [
    "Rent of yard ............................................ 12.50",
    "Carried forward . . . . . . . . . . . . . . . . . . . . . 1,204.17",
    "________________________________________________________________",
    "----------------------------------------------------------------",
    "Total ========================================== 3,398.75",
    "Jan 9 1111 Acct 0000 -- 111.11 paid",
    "do do do 7.10",
    "------",
    "....",
    "1111",
]


def reader(folder: Path, decoding: str, **kw):
    return open_recogniser(load_card(folder), options=EngineOptions(decoding=decoding, beam_width=3, **kw))


def ids(text: str) -> list[int]:
    return [tm.SCRIPT_VOCAB.index(c) for c in text]


# --------------------------------------------------------------------------- the rule itself


def test_incremental_counts_agree_with_the_reference_at_every_prefix():
    # advance() (beam) and RepeatState (greedy, numpy) keep counts step by step; repeat_period() reads the
    # whole tail. Random token strings with loops spliced in, several guard settings: all three agree.
    rng = random.Random(3)
    filler = filler_tokens(tm.SCRIPT_VOCAB)
    guards = [RepeatGuard(), RepeatGuard(max_ngram=3, min_copies=2, min_tokens=4, min_filler_tokens=6),
              RepeatGuard(max_ngram=5, min_copies=3, min_tokens=9, min_filler_tokens=9)]
    fired = 0
    for _ in range(200):
        toks: list[int] = []
        while len(toks) < 120:
            if rng.random() < 0.3:
                gram = [rng.choice([3, 4, 20, 21, 60]) for _ in range(rng.randint(1, 6))]
                toks += gram * rng.randint(1, 8)
            else:
                toks += [rng.randrange(3, len(tm.SCRIPT_VOCAB)) for _ in range(rng.randint(1, 5))]
        for g in guards:
            state, rows = None, RepeatState(1, g, filler)
            for i, t in enumerate(toks):
                want = repeat_period(toks[: i + 1], g, filler)
                state, got = advance(state, toks[:i], t, g, filler)
                hist = np.array([[1] + toks[:i]])
                cut = rows.step(hist, np.array([t]))
                assert got == want == (0 if cut is None else int(cut[0]))
                fired += bool(want)
                if want:
                    break
    assert fired > 100              # the loops spliced in do fire


def test_demo_archive_truth_never_triggers_the_defaults():
    # Every line of the demo archive's ground truth, one token per character (as the demo seq reads it),
    # checked at every prefix: the defaults cut none of them (677 lines when this was written).
    lines = [ln for p in sorted((ROOT / "scans_demo").glob("*.txt"))
             for ln in p.read_text(encoding="utf-8").splitlines() if ln]
    assert len(lines) > 500
    chars = sorted({c for ln in lines + LEDGER_LINES for c in ln})
    filler = filler_tokens(chars)
    g = RepeatGuard()
    for ln in lines + LEDGER_LINES:
        toks = [chars.index(c) for c in ln]
        for i in range(1, len(toks) + 1):
            assert repeat_period(toks[:i], g, filler) == 0, ln


def test_filler_tokens_are_those_without_letters_or_digits():
    assert filler_tokens(["", ".", " ", "_", "£", "a", "1", " ab", "—", "½"]).tolist() == \
        [False, True, True, True, True, False, False, False, True, False]      # "½".isalnum() is True in Python


# --------------------------------------------------------------------------- decoding


@pytest.mark.parametrize("decoding", DECODINGS)
@pytest.mark.parametrize("text", LEDGER_LINES)
def test_real_repetitive_ledger_text_is_not_cut(tmp_path, decoding, text):
    rec = reader(tm.write_scripted_seq(tmp_path / "s", tm.scripted_table(text)), decoding)
    res, _ = rec.recognise(LINES)
    for r in res:
        assert r.text == text and not r.truncated and r.cut_by is None
        assert r.steps == len(text) + 1 and r.confidence > 0


@pytest.mark.parametrize("decoding", DECODINGS)
@pytest.mark.parametrize("mode", ["drop", "mask"])
def test_a_looping_line_is_stopped_early_and_truncated(tmp_path, decoding, mode):
    # "Cash 12.50 " then "12.50 " for ever: 4 copies of the 6-token n-gram " 12.50" (24 tokens, the space
    # after "Cash" the first) fire the guard at the 28th token; the copy that fired is dropped, 3 stay
    table = tm.scripted_table("Cash " + "12.50 " * 60, end=False)
    rec = reader(tm.write_scripted_seq(tmp_path / "s", table, max_tokens=200), decoding, batch_mode=mode)
    res, timing = rec.recognise(LINES)
    for r in res:
        assert r.text == "Cash 12.50 12.50 12.50" and r.truncated and r.cut_by == REPEATED_NGRAM
        assert r.tokens == len(r.text) and r.steps == r.tokens + 6 < 200
        assert r.confidence == 0.0
    assert max(t.steps_max for t in timing) == 4 + 24


@pytest.mark.parametrize("decoding", DECODINGS)
def test_a_runaway_rule_is_cut_at_the_filler_limit(tmp_path, decoding):
    # a rule left in the crop: "_" until the token limit without the guard; with it, 96 underscores fire
    rec = reader(tm.write_scripted_seq(tmp_path / "s", tm.scripted_table("_", loop=True)), decoding)
    res, _ = rec.recognise(LINES[:1])
    assert res[0].text == "_" * 95 and res[0].truncated and res[0].cut_by == REPEATED_NGRAM
    assert res[0].steps == 96


@pytest.mark.parametrize("decoding", DECODINGS)
def test_guard_off_in_the_card_runs_to_max_tokens(tmp_path, decoding):
    table = tm.scripted_table("Cash " + "12.50 " * 60, end=False)
    folder = tm.write_scripted_seq(tmp_path / "s", table, max_tokens=40, extra="repeat_guard = false\n")
    res, _ = reader(folder, decoding).recognise(LINES[:2])
    for r in res:
        assert r.text == ("Cash " + "12.50 " * 60)[:40] and r.truncated and r.cut_by == TOKEN_LIMIT
        assert r.tokens == r.steps == 40


@pytest.mark.parametrize("decoding", DECODINGS)
def test_card_limits_change_where_the_guard_fires(tmp_path, decoding):
    table = tm.scripted_table("Cash " + "12.50 " * 60, end=False)
    # six copies of the 6-token n-gram and at least 40 tokens: fires at 7 copies (42 tokens), keeps 6
    folder = tm.write_scripted_seq(tmp_path / "s", table, extra="repeat_min_copies = 6\nrepeat_min_tokens = 40\n")
    assert load_card(folder).seq.repeat == RepeatGuard(min_copies=6, min_tokens=40)
    res, _ = reader(folder, decoding).recognise(LINES[:1])
    assert res[0].text == "Cash" + " 12.50" * 6 and res[0].cut_by == REPEATED_NGRAM
    # n-grams of at most 5 tokens: the 6-token loop is left to the token limit
    folder = tm.write_scripted_seq(tmp_path / "t", table, max_tokens=60, extra="repeat_max_ngram = 5\n")
    res, _ = reader(folder, decoding).recognise(LINES[:1])
    assert res[0].tokens == 60 and res[0].cut_by == TOKEN_LIMIT


@pytest.mark.parametrize("decoding", DECODINGS)
def test_a_line_ending_normally_is_untouched_beside_looping_ones(tmp_path, decoding):
    # the tiny random decoder: its lines on wide crops repeat one letter (c), the guard cuts those at 16 and
    # leaves the shorter ones; with the guard off every line is a prefix-extension of the guarded reading
    on = reader(tm.write_seq(tmp_path / "on", card=tm.SEQ_CARD.replace("max_tokens = 12", "max_tokens = 60")),
                decoding)
    off = reader(tm.write_seq(tmp_path / "off", card=tm.SEQ_CARD_NO_REPEAT_GUARD.replace(
        "max_tokens = 12", "max_tokens = 60")), decoding)
    crops = [tm.block_line("ab " * k) for k in (3, 5, 8, 10)]
    got, _ = on.recognise(crops)
    ref, _ = off.recognise(crops)
    assert any(r.cut_by == REPEATED_NGRAM for r in got) and any(not r.truncated for r in got)
    for g, r in zip(got, ref):
        if g.truncated:
            assert r.text.startswith(g.text) and len(r.text) > len(g.text) and g.text.endswith("c" * 15)
        else:
            assert (g.text, g.steps) == (r.text, r.steps)


def test_a_transformers_export_that_loops_is_cut(tmp_path):
    # tests/fixtures/byo/crosscache: generate() itself (no repetition control) loops on one token up to
    # max_length; the guard stops our reading of that line 16 tokens in, the rest of the lines unchanged
    folder = shutil.copytree(ROOT / "tests" / "fixtures" / "byo" / "crosscache", tmp_path / "byo")
    assert CliRunner().invoke(app, ["card", "draft", str(folder)]).exit_code == 0
    exp = json.loads((folder / "expected.json").read_text(encoding="utf-8"))
    rec = open_recogniser(load_card(folder), options=EngineOptions(decoding="greedy"))
    crops = [np.asarray(Image.open(folder / r["image"]).convert("L")) for r in exp["lines"]]
    cut = 0
    for pb in rec.prepare(crops):
        memory, mask = rec.encode(pb.tensor, pb.widths)
        for i, d in zip(pb.indices, rec.greedy(memory, mask)):
            want = exp["lines"][i]["greedy"]["ids"][1:]
            if d.cut_by == REPEATED_NGRAM:
                cut += 1
                assert want[: len(d.tokens) + d.dropped] == d.tokens + d.tokens[-d.dropped:]
                assert len(d.tokens) + d.dropped < len(want)
            else:
                assert d.tokens == want[: len(d.tokens)] and len(d.tokens) >= len(want) - 1   # end token aside
    assert cut >= 1


# --------------------------------------------------------------------------- card fields


@pytest.mark.parametrize("extra, message", [
    ("repeat_min_copy = 3\n", "seq.repeat_min_copies"),            # misspelt: the nearest name is given
    ("repeat_guard = 1\n", "seq.repeat_guard must be true/false"),
    ("repeat_min_copies = 1\n", "seq.repeat_min_copies must be >= 2"),
    ("repeat_max_ngram = 0\n", "seq.repeat_max_ngram must be >= 1"),
    ("repeat_min_tokens = \"16\"\n", "seq.repeat_min_tokens must be an integer"),
])
def test_bad_guard_fields_name_the_card_and_the_key(tmp_path, extra, message):
    folder = tm.write_scripted_seq(tmp_path / "s", tm.scripted_table("ab"), extra=extra)
    with pytest.raises(CardError) as e:
        load_card(folder)
    assert message in str(e.value) and "card.toml" in str(e.value)


def test_defaults_are_on():
    folder = ROOT / "models" / "ledger-seq"
    g = load_card(folder).seq.repeat if (folder / "card.toml").exists() else RepeatGuard()
    assert g.enabled and (g.max_ngram, g.min_copies, g.min_tokens, g.min_filler_tokens) == (8, 4, 16, 96)


# --------------------------------------------------------------------------- runner, store, review


def test_the_store_says_which_guard_cut_a_line(tmp_path):
    pages = small_pages(tmp_path / "pages", 2, seed=41)
    table = tm.scripted_table("Cash " + "12.50 " * 60, end=False)
    loop = load_card(tm.write_scripted_seq(tmp_path / "loop", table, max_tokens=200))
    db = tmp_path / "s.sqlite"
    s = run_pages(pages, [loop], store=db, options=RunOptions(prefetch=False))
    r = s.recognisers[0]
    assert r.lines > 0 and r.lines_truncated == r.lines_repeat_cut == r.lines
    assert any("cut by the repetition guard" in n for n in s.notes())
    con = sqlite3.connect(db)
    rows = con.execute("SELECT text, truncated, steps FROM lines").fetchall()
    assert {(t, c, n) for t, c, n in rows} == {("Cash 12.50 12.50 12.50", TRUNCATED_CODES["repeated n-gram"], 28)}
    # the token limit keeps code 1, and the review names each guard
    limit = load_card(tm.write_scripted_seq(tmp_path / "limit", table, max_tokens=10,
                                            extra="repeat_guard = false\n"))
    run_pages(pages, [limit], store=db, options=RunOptions(prefetch=False))
    with RunStore(db, read_only=True) as st:
        frames = st.read_frames([1, 2])
        assert st.run_totals(2)["lines_truncated"] == r.lines and st.run_totals(2)["lines_repeat_cut"] == 0
    ln = frames["lines"]
    assert sorted(set(ln["truncated"])) == [1, 2]
    q = review_queue(ln[["page_id", "line_no", "text", "confidence", "truncated", "error"]])
    reasons = " | ".join(q.table["reasons"].map(str))
    assert "repetition guard" in reasons and "length guard" in reasons
    assert bool(q.table["incomplete"].all())
