"""Edit distance, edit scripts and character classes against textbook references."""

from __future__ import annotations

import string

import editdistance
import pytest
from hypothesis import given, settings, strategies as st

from _accuracy_reference import wagner_fischer
from ocrbench.accuracy.align import (CLASSES, apply_edits, char_class, class_codes, class_counts, counts,
                                     distance, edits, word_distance)

# Small alphabets make equal characters (and so non-trivial alignments) likely;
# the second strategy adds arbitrary code points including astral ones.
_small = st.text(alphabet="ab£½ 1.", max_size=14)
_any = st.text(max_size=12)
texts = st.one_of(_small, _any)


def test_kitten_sitting():
    # kitten -> sitting needs 3 edits: the common textbook example (from memory).
    assert distance("kitten", "sitting") == 3
    assert wagner_fischer("kitten", "sitting") == 3
    c = counts("kitten", "sitting")
    assert (c.subs, c.dels, c.ins, c.hits, c.ref_len) == (2, 0, 1, 4, 6)


@given(texts)
def test_identity(a):
    # Metric axiom d(a, a) = 0 (Levenshtein distance is a metric; common practice).
    assert distance(a, a) == 0
    assert edits(a, a) == []


@given(texts, texts)
def test_symmetry(a, b):
    # Unit costs make insertion and deletion mirror images, so d(a, b) = d(b, a).
    assert distance(a, b) == distance(b, a)


@given(texts, texts, texts)
def test_triangle_inequality(a, b, c):
    # Metric axiom: d(a, c) <= d(a, b) + d(b, c).
    assert distance(a, c) <= distance(a, b) + distance(b, c)


@given(texts, texts)
def test_bounds(a, b):
    # |len a - len b| <= d <= max(len a, len b): length difference needs that many
    # insertions or deletions; substituting the overlap and inserting/deleting the
    # rest is always possible (common practice).
    d = distance(a, b)
    assert abs(len(a) - len(b)) <= d <= max(len(a), len(b))


@given(texts, texts)
def test_fast_path_agrees_with_wagner_fischer_and_editdistance(a, b):
    # Reference: Wagner & Fischer (1974) DP in tests/_accuracy_reference.py, and
    # the independent `editdistance` package (over code points as int lists).
    d = distance(a, b)
    assert d == wagner_fischer(a, b)
    assert d == editdistance.eval([ord(c) for c in a], [ord(c) for c in b])


@settings(max_examples=60)
@given(st.lists(st.sampled_from(["the", "cat", "£12", "7s", "6½d", "Kettle"]), max_size=8),
       st.lists(st.sampled_from(["the", "cat", "£12", "7s", "6½d", "Kettle"]), max_size=8))
def test_word_distance_agrees_with_references(wa, wb):
    # WER numerator: edit distance over word tokens; references as above.
    a, b = " ".join(wa), "  ".join(wb)   # extra spaces must not create empty words
    assert word_distance(a, b) == wagner_fischer(wa, wb) == editdistance.eval(wa, wb)


@given(texts, texts)
def test_applying_the_edit_script_gives_the_hypothesis(a, b):
    # The script must be a real alignment: replaying it on the reference,
    # using only the characters it carries, reproduces the hypothesis.
    script = edits(a, b)
    assert apply_edits(a, script) == b
    assert len(script) == wagner_fischer(a, b)   # minimal (Wagner & Fischer 1974)


@given(texts, texts)
def test_counts_are_consistent(a, b):
    # S + D + I = d; hits + S + D = len(ref); I - D = len(hyp) - len(ref)
    # (bookkeeping identities of any alignment; common practice).
    c = counts(a, b)
    assert c.edits == wagner_fischer(a, b)
    assert c.hits + c.subs + c.dels == len(a)
    assert c.ins - c.dels == len(b) - len(a)


def test_class_of_ascii_matches_python_string_module():
    # For ASCII, the classes agree with Python's str predicates and
    # string.punctuation (Python standard library documentation).
    for cp in range(128):
        ch = chr(cp)
        expected = ("space" if ch.isspace() else "digit" if ch.isdigit() else "letter" if ch.isalpha()
                    else "punct" if ch in string.punctuation else "other")
        assert char_class(ch) == expected, repr(ch)


@pytest.mark.parametrize("ch,cls", [
    ("½", "digit"),        # U+00BD VULGAR FRACTION ONE HALF, category No (unicodedata)
    ("٣", "digit"),        # ARABIC-INDIC DIGIT THREE, Nd
    ("é", "letter"),       # Ll
    ("\u0301", "letter"),  # COMBINING ACUTE ACCENT, Mn: belongs to its letter
    ("£", "punct"),        # POUND SIGN, Sc (symbols count with punctuation)
    ("—", "punct"),        # EM DASH, Pd
    ("\u00a0", "space"),   # NO-BREAK SPACE, Zs
    ("\u200b", "other"),   # ZERO WIDTH SPACE, Cf (not whitespace to str.isspace)
    ("\U0001d7d8", "digit"),  # MATHEMATICAL DOUBLE-STRUCK DIGIT ZERO, Nd, astral plane
])
def test_class_of_unicode_examples(ch, cls):
    # General categories as given by Python's unicodedata (Unicode Character Database).
    assert char_class(ch) == cls


@given(st.text(max_size=30))
def test_vectorised_classes_match_per_character(text):
    codes = class_codes(text)
    assert [CLASSES[c] for c in codes] == [char_class(ch) for ch in text]
    assert class_counts(text).sum() == len(text)
