"""Ledger amounts: the documented patterns find the demo forms; digits are compared through the alignment."""

from __future__ import annotations

import json
import random
from pathlib import Path

import pytest
from hypothesis import given, strategies as st
from rapidfuzz.distance import Levenshtein

from ocrbench import synth
from ocrbench.ledger.amounts import (canonical, check_amounts, find_amounts, find_amounts_in_lines, hyp_span)
from ocrbench.accuracy.normalise import apply


def _lsd_digits(farthings: int) -> str:
    # Pounds, shillings, pence by the old British system: 12 pence to the
    # shilling, 20 shillings to the pound, 4 farthings to the penny (fact of the
    # trade), computed here with divmod, independently of synth.lsd_parts.
    pence, q = divmod(farthings, 4)
    pounds, rest = divmod(pence, 240)
    s, d = divmod(rest, 12)
    frac = {0: "", 1: "¼", 2: "½", 3: "¾"}[q]
    return f"{pounds} {s} {d}{frac}"


@given(st.integers(min_value=1, max_value=4 * 240 * 5000))
def test_marked_lsd_from_the_demo_generator(f):
    text = f"15 Jan 1887 A. Kestford rope {synth.format_lsd_marked(f)}"
    found = find_amounts(text)
    assert [a.kind for a in found] == ["lsd_marked"]
    assert found[0].digits == _lsd_digits(f)


@given(st.integers(min_value=1, max_value=4 * 240 * 5000))
def test_three_trailing_columns_from_the_demo_generator(f):
    text = "Carried forward " + " ".join(synth.format_lsd_columns(f))
    found = find_amounts(text)
    assert [a.kind for a in found] == ["lsd_columns"]
    assert found[0].digits == _lsd_digits(f)       # "-" columns read as 0


@given(st.integers(min_value=0, max_value=10**9), st.booleans())
def test_decimal_amounts(cents, thousands):
    # Reference: Python's own number formatting ("{:,}" thousands separators).
    text = f"rope {cents // 100:,}.{cents % 100:02d} paid" if thousands else f"rope {cents // 100}.{cents % 100:02d}"
    found = find_amounts(text)
    assert [a.kind for a in found] == ["decimal"]
    assert found[0].digits == f"{cents // 100}.{cents % 100:02d}"


@pytest.mark.parametrize("text", [
    "Marrowby & Kettle Cash Book Folio 12",
    "Date Payee Particulars £ s d",
    "15/01/1887 bill No. 5636",
    "1887-03-04 wages week 20",
    "12,34.56",                        # misplaced thousands comma
])
def test_non_amounts(text):
    assert find_amounts(text) == []


def test_forms_written_by_hand():
    assert [a.text for a in find_amounts("to cash 12l. 7s. 6d. and 3.50")] == ["12l. 7s. 6d.", "3.50"]
    assert canonical("12l. 7s. 6d.") == "12 7 6"
    assert canonical("£1,212 7s 6 1/2d") == canonical("1212 7 6½") == "1212 7 6½"
    # NFKC (loose profile) splits ½ into 1⁄2; the pattern still takes the amount whole.
    loose = apply("£12 7s 6½d", "loose")
    assert [a.digits for a in find_amounts(loose)] == ["12 7 6½"]


DEMO = Path(__file__).resolve().parents[1] / "scans_demo"


@pytest.mark.parametrize("profile", ["exact", "nfc", "loose", "ledger"])
def test_demo_archive_one_amount_per_entry_line(profile):
    # The demo archive's .json files record each line's kind: entry, total and
    # brought-forward lines carry exactly one amount, headers and headings none
    # (dates, folio numbers and "Jan 12 L. Tarnby"-style initials are no amounts).
    files = sorted(DEMO.glob("*.json"))
    assert files, "scans_demo/ holds the demo archive's ground truth"
    checked = 0
    for f in files:
        doc = json.loads(f.read_text(encoding="utf-8"))
        for line, kind in zip((ln["text"] for ln in doc["lines"]), doc["meta"]["kinds"]):
            want = 1 if kind in ("entry", "total", "brought") else 0
            assert len(find_amounts(apply(line, profile))) == want, (f.name, line)
            checked += 1
    assert checked > 500


def test_lines_at_once_equals_line_by_line():
    rng = random.Random(5)
    lines = [" ".join(synth.ledger_line_fields(rng)) for _ in range(40)]
    one_pass = find_amounts_in_lines(lines)
    each = [(i, a) for i, ln in enumerate(lines) for a in find_amounts(ln)]
    assert one_pass == each


@pytest.mark.parametrize("ref,hyp,right", [
    ("rope £12 7s 6½d", "rope £12 7s 6½d", True),
    ("rope £12 7s 6½d", "rope £12 1s 6½d", False),       # a shilling digit misread
    ("rope £12 7s 6½d", "rope £12 7s. 6½d", True),       # punctuation only: digits right
    ("rope 1,234.56 paid", "rope 1234.56 paid", True),   # separator dropped, digits right
    ("rope 1,234.56 paid", "rope 1,234,56 paid", False),  # decimal point lost: value changes
    ("wages 12 - 6", "wages 12 6", False),               # a zero column lost
    ("wages 12 - 6", "wages 12 – 6", True),              # dash shape only
])
def test_digits_right_through_the_alignment(ref, hyp, right):
    script = Levenshtein.editops(ref, hyp).as_list() if ref != hyp else None
    [(amount, aligned, ok)] = check_amounts(ref, hyp, script)
    assert ok is right, aligned


@given(st.text(alphabet="ab12 .£", max_size=16), st.text(alphabet="ab12 .£", max_size=16), st.data())
def test_span_mapping_is_the_alignment_restricted_to_the_span(ref, hyp, data):
    # The hypothesis span of a reference span holds exactly the edits inside it:
    # its length is len(span) - deletions + insertions inside, and the restricted
    # edits align the two pieces (so their distance is at most that many).
    a = data.draw(st.integers(0, len(ref)))
    b = data.draw(st.integers(a, len(ref)))
    script = Levenshtein.editops(ref, hyp).as_list()
    h0, h1 = hyp_span(script, a, b)
    inside = [(t, i) for t, i, _ in script if (a <= i < b if t != "insert" else a < i < b)]
    dels = sum(t == "delete" for t, _ in inside)
    ins = sum(t == "insert" for t, _ in inside)
    assert 0 <= h0 <= h1 <= len(hyp)
    assert h1 - h0 == (b - a) - dels + ins
    assert Levenshtein.distance(ref[a:b], hyp[h0:h1]) <= len(inside)
