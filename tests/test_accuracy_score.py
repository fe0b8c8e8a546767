"""score_pages: CER/WER definitions, line pairing, empty references, classes, confusions, recipes."""

from __future__ import annotations

import json
import math
import random

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings, strategies as st

from _accuracy_reference import wagner_fischer
from ocrbench import synth
from ocrbench.accuracy.align import CLASSES
from ocrbench.accuracy.recipe import Recipe, differences
from ocrbench.accuracy.score import score_pages

_line = st.text(alphabet="ab1£ .", max_size=10)
_page = st.lists(_line.filter(lambda s: s.strip()), min_size=0, max_size=4)


def _noisy(rng: random.Random, s: str, p: float) -> str:
    out = []
    for c in s:
        r = rng.random()
        if r < p / 3:
            continue
        if r < 2 * p / 3:
            out.append(rng.choice(synth.ALPHABET))
        elif r < p:
            out.extend([c, rng.choice(synth.ALPHABET)])
        else:
            out.append(c)
    return "".join(out)


def _demo_pages(n: int, seed: int = 0, p: float = 0.05):
    rng = random.Random(seed)
    pages = []
    for k in range(n):
        ref = [" ".join(synth.ledger_line_fields(rng)) for _ in range(rng.randint(3, 8))]
        pages.append((f"page_{k:03d}", ref, [_noisy(rng, ln, p) for ln in ref]))
    return pages


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(_page, _page), min_size=1, max_size=4))
def test_cer_is_summed_edits_over_summed_reference_chars(page_pairs):
    # Definition (sum the counts, then divide; common practice for corpus CER),
    # against the Wagner & Fischer (1974) DP applied by the documented pairing rule.
    pages = [(f"p{i}", r, h) for i, (r, h) in enumerate(page_pairs)]
    got = score_pages(pages, profile="exact", n_boot=50)
    edits = chars = wedits = words = 0
    for _, r, h in pages:
        if len(r) == len(h):
            units = list(zip(r, h))
        else:
            units = [("\n".join(r), "\n".join(h))]
        for a, b in units:
            edits += wagner_fischer(a, b)
            chars += len(a)
            wedits += wagner_fischer(a.split(), b.split())
            words += len(a.split())
    s = got.summary
    assert (s["char_edits"], s["ref_chars"], s["word_edits"], s["ref_words"]) == (edits, chars, wedits, words)
    assert s["cer"] == (edits / chars if chars else None)
    assert s["wer"] == (wedits / words if words else None)
    # classes on and off agree on every count they share
    off = score_pages(pages, profile="exact", classes=False, n_boot=50)
    pd.testing.assert_frame_equal(off.pages[["ref_chars", "char_edits", "ref_words", "word_edits"]],
                                  got.pages[["ref_chars", "char_edits", "ref_words", "word_edits"]])


def test_corpus_differs_from_page_mean_and_both_are_labelled():
    # Page 1: 1 error in 2 chars; page 2: 0 errors in 98 chars.
    pages = [("short", "ab", "ax"), ("long", "c" * 98, "c" * 98)]
    s = score_pages(pages, n_boot=100).summary
    assert s["cer"] == pytest.approx(1 / 100)            # corpus: (1 + 0) / (2 + 98)
    assert s["cer_page_mean"] == pytest.approx(0.25)     # page mean: (0.5 + 0) / 2
    assert Recipe.parse(s["recipes"]["cer"]).agg == "corpus"
    assert Recipe.parse(s["recipes"]["cer_page_mean"]).agg == "page-mean"


def test_empty_reference_is_undefined_but_its_edits_count():
    pages = [("blank", "", "stray ink"), ("full", "abcd", "abcd")]
    sc = score_pages(pages, n_boot=100)
    row = sc.pages.set_index("page_id").loc["blank"]
    assert math.isnan(row["cer"]) and math.isnan(row["wer"])
    assert row["char_edits"] == len("stray ink")
    assert sc.summary["cer"] == pytest.approx(9 / 4)
    assert sc.summary["empty_reference"] == ["blank"]
    assert sc.summary["cer_page_mean"] == 0.0            # the undefined page is left out
    json.dumps(sc.summary, allow_nan=False)              # JSON-ready: None, never NaN


def test_nothing_at_all():
    sc = score_pages([], n_boot=100)
    assert sc.summary["cer"] is None and sc.summary["cer_low"] is None and sc.lines.empty and sc.pages.empty
    sc = score_pages([("p", "", "")], n_boot=100)
    assert sc.summary["cer"] is None and sc.summary["pages"] == 1
    json.dumps(sc.summary, allow_nan=False)


def test_line_pairing_and_whole_page_fallback():
    ref = "Date Payee\nA. Kestford 12.50\nTotal 12.50\n"
    same = "Date Payee\r\nA. Kestf0rd 12.50\r\nTotal 12.50"        # CRLF, no final newline, one error
    merged = "Date Payee A. Kestford 12.50\nTotal 12.50"            # two lines run together
    sc = score_pages([("a", ref, same), ("b", ref, merged)], n_boot=100)
    pages = sc.pages.set_index("page_id")
    assert pages.loc["a", "pairing"] == "line" and pages.loc["a", "char_edits"] == 1
    assert pages.loc["b", "pairing"] == "page" and (pages.loc["b", "ref_lines"], pages.loc["b", "hyp_lines"]) == (3, 2)
    # Joined with "\n", which counts as a character: 1 line break became a space.
    assert pages.loc["b", "char_edits"] == 1
    assert pages.loc["b", "ref_chars"] == len(ref) - 1                # two "\n" inside, final one dropped
    assert pages.loc["b", "err_space"] == 1
    assert sc.summary["line_count_mismatch"] == ["b"]
    lines = sc.lines
    assert lines.loc[lines.page_id == "a", "line_no"].tolist() == [1, 2, 3]
    assert lines.loc[lines.page_id == "b", "line_no"].isna().all()


def test_blank_lines_are_dropped_before_pairing():
    sc = score_pages([("p", "one\n\n   \ntwo\n", "one\ntwo")], n_boot=100)
    assert sc.pages.loc[0, "pairing"] == "line" and sc.summary["cer"] == 0


def test_list_and_string_pages_score_the_same():
    pages = _demo_pages(5)
    as_text = [(pid, "\n".join(r), "\n".join(h)) for pid, r, h in pages]
    a, b = score_pages(pages, n_boot=100), score_pages(as_text, n_boot=100)
    pd.testing.assert_frame_equal(a.pages, b.pages)
    assert a.summary == b.summary


def test_class_attribution_by_hand():
    # ref "ab1cd,efgh" -> hyp "ab7cdefgh!": substitute 1->7 (digit), delete ","
    # (punct), insert "!" (charged to the inserted character: punct, reported
    # apart). The matching runs between the edits make this the only minimal
    # alignment (worked by hand).
    sc = score_pages([("p", "ab1cd,efgh", "ab7cdefgh!")], n_boot=100)
    c = sc.summary["classes"]
    assert (c["digit"]["ref_chars"], c["digit"]["subs"], c["digit"]["dels"], c["digit"]["inserted"]) == (1, 1, 0, 0)
    assert (c["punct"]["ref_chars"], c["punct"]["subs"], c["punct"]["dels"], c["punct"]["inserted"]) == (1, 0, 1, 1)
    assert (c["letter"]["ref_chars"], c["letter"]["errors"], c["letter"]["inserted"]) == (8, 0, 0)
    assert c["digit"]["rate"] == 1.0 and c["punct"]["rate"] == 1.0 and c["punct"]["ins_rate"] == 1.0
    assert (sc.summary["subs"], sc.summary["dels"], sc.summary["ins"], sc.summary["hits"]) == (1, 1, 1, 8)
    conf = {(r["ref"], r["hyp"], r["op"]): r["count"] for r in sc.summary["confusions"]}
    assert conf == {("1", "7", "sub"): 1, (",", "", "del"): 1, ("", "!", "ins"): 1}


def test_space_and_other_classes_by_hand():
    # A no-break space read as a plain space: substitution charged to "space";
    # a zero-width space inserted: "other" (Cf), reported as an insertion.
    sc = score_pages([("p", "a\u00a0bcd", "a bc\u200bd")], profile="exact", n_boot=100)
    c = sc.summary["classes"]
    assert c["space"]["subs"] == 1 and c["other"]["inserted"] == 1 and c["other"]["ref_chars"] == 0


def test_class_figures_add_up_to_the_totals():
    sc = score_pages(_demo_pages(30, seed=3), n_boot=100)
    s, pages = sc.summary, sc.pages
    assert sum(v["ref_chars"] for v in s["classes"].values()) == s["ref_chars"]
    assert sum(v["errors"] + v["inserted"] for v in s["classes"].values()) == s["char_edits"]
    assert sum(pages[f"ref_{c}"].sum() for c in CLASSES) == s["ref_chars"]
    assert (pages["subs"] + pages["dels"] + pages["ins"] == pages["char_edits"]).all()
    lines = sc.lines
    assert (lines["subs"] + lines["dels"] + lines["ins"] == lines["char_edits"]).all()
    assert (lines["hits"] + lines["subs"] + lines["dels"] == lines["ref_chars"]).all()
    assert sc.confusions["count"].sum() == s["char_edits"]


def test_classes_off_leaves_alignment_counts_missing():
    sc = score_pages(_demo_pages(4), classes=False, n_boot=100)
    assert sc.summary["classes"] is None and sc.summary["subs"] is None and sc.summary["amounts"] is None
    assert sc.pages["subs"].isna().all() and sc.lines["hits"].isna().all()
    assert sc.confusions is None and sc.amounts is None


def test_interval_brackets_the_estimate_and_is_reproducible():
    pages = _demo_pages(40, seed=7)
    a = score_pages(pages, n_boot=500, seed=11).summary
    b = score_pages(pages, n_boot=500, seed=11).summary
    assert a["cer_low"] <= a["cer"] <= a["cer_high"] and a["wer_low"] <= a["wer"] <= a["wer_high"]
    assert (a["cer_low"], a["cer_high"]) == (b["cer_low"], b["cer_high"])


def test_amount_share_in_summary():
    ref = ["15 Jan 1887 A. Kestford rope 1,149.11", "Total £12 7s 6½d", "wages 12 - 6"]
    hyp = ["15 Jan 1887 A. Kestford rope 1,749.11", "Total £12 7s 6½d", "wages 12 - 6"]
    sc = score_pages([("p", ref, hyp)], n_boot=100)
    a = sc.summary["amounts"]
    assert (a["found"], a["right"]) == (3, 2)
    wrong = sc.amounts[~sc.amounts["right"]]
    assert wrong[["ref", "hyp"]].values.tolist() == [["1,149.11", "1,749.11"]]


def test_recipe_strings_carry_the_choices():
    sc = score_pages([("p", "abc", "abd")], profile="ledger", recogniser_hash="sha256:" + "ab" * 32,
                     n_boot=300, seed=5)
    r = Recipe.parse(sc.summary["recipe"])
    assert (r.metric, r.unit, r.profile, r.agg, r.rec) == ("cer", "codepoint", "ledger.1", "corpus", "ab" * 6)
    assert r.ci == "xboot-pages/300/95%/seed5" and r.tool.startswith("ocrbench-")
    assert Recipe.parse(sc.summary["recipes"]["wer"]).unit == "word"
    other = score_pages([("p", "abc", "abd")], profile="nfc", n_boot=300).summary["recipe"]
    assert differences(sc.summary["recipe"], other) == {"profile": ("ledger.1", "nfc.1")}
    assert str(Recipe.parse(sc.summary["recipe"])) == sc.summary["recipe"]


def test_tables_have_one_row_per_unit_and_page():
    pages = _demo_pages(6)
    sc = score_pages(pages, n_boot=100)
    assert len(sc.pages) == 6 and len(sc.lines) == sum(len(r) for _, r, _ in pages)
    assert sc.lines["ref"].tolist() == [ln for _, r, _ in pages for ln in r]
    assert np.allclose(sc.lines["cer"], sc.lines["char_edits"] / sc.lines["ref_chars"])
