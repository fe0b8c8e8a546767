"""Normalisation profiles against Python's unicodedata and the examples of Unicode Standard Annex #15."""

from __future__ import annotations

import unicodedata

import pytest
from hypothesis import given, strategies as st

from ocrbench.accuracy.normalise import (DASHES, DOUBLE_QUOTES, PROFILES, SINGLE_QUOTES, apply, apply_lines,
                                         get_profile)
from ocrbench.accuracy.score import score_pages

E_COMPOSED = "\u00e9"          # é LATIN SMALL LETTER E WITH ACUTE
E_DECOMPOSED = "e\u0301"       # e + COMBINING ACUTE ACCENT


def test_uax15_e_acute_composed_vs_decomposed():
    # UAX #15 (Unicode Normalization Forms): é precomposed and e + U+0301 are
    # canonically equivalent; NFC yields the precomposed form.
    assert apply(E_DECOMPOSED, "nfc") == E_COMPOSED == unicodedata.normalize("NFC", E_DECOMPOSED)
    assert apply(E_COMPOSED, "nfc") == E_COMPOSED
    # Exact keeps the code points: two characters vs one.
    assert apply(E_DECOMPOSED, "exact") == E_DECOMPOSED
    # And CER sees the difference only under exact.
    pages = [("p", f"caf{E_COMPOSED}", f"caf{E_DECOMPOSED}")]
    assert score_pages(pages, profile="nfc", n_boot=100).summary["cer"] == 0
    assert score_pages(pages, profile="exact", n_boot=100).summary["cer"] == pytest.approx(2 / 4)


def test_uax15_fi_ligature_under_nfkc():
    # UAX #15: U+FB01 LATIN SMALL LIGATURE FI is compatibility-equivalent to "fi"
    # (NFKC decomposes it) but canonically distinct (NFC keeps it).
    assert unicodedata.normalize("NFKC", "\ufb01") == "fi"
    assert apply("\ufb01ne", "loose") == "fine"
    assert apply("\ufb01ne", "nfc") == "\ufb01ne"


@given(st.text(max_size=40))
def test_nfc_profile_is_unicodedata_nfc(text):
    # Reference: Python's unicodedata.normalize (Unicode Character Database).
    assert apply(text, "nfc") == unicodedata.normalize("NFC", text)


@given(st.text(max_size=40))
def test_exact_profile_changes_nothing(text):
    assert apply(text, "exact") == text


@pytest.mark.parametrize("name", list(PROFILES))
@given(text=st.text(max_size=40))
def test_profiles_are_idempotent(name, text):
    # Normalising twice must give the same as once, or two normalised texts
    # could still differ for reasons the profile means to hide.
    once = apply(text, name)
    assert apply(once, name) == once


@given(st.text(alphabet=st.characters(blacklist_characters="\n"), max_size=40))
def test_loose_line_is_nfkc_casefolded_and_collapsed(text):
    # Reference: unicodedata NFKC + str.casefold + str.split whitespace rules
    # (Python documentation), with the documented dash/quote table applied.
    want = unicodedata.normalize("NFKC", unicodedata.normalize("NFKC", text).casefold())
    want = want.translate(str.maketrans({**{c: "-" for c in DASHES}, **{c: "'" for c in SINGLE_QUOTES},
                                         **{c: '"' for c in DOUBLE_QUOTES}}))
    assert apply(text, "loose") == " ".join(want.split())


def test_dash_and_quote_tables_are_what_they_claim():
    # Every unified dash is a Unicode dash punctuation (Pd) or the minus sign or
    # the hyphen bullet; quotes are quotation marks, primes or the apostrophe
    # letter (names from unicodedata, Unicode Character Database).
    for c in DASHES:
        assert unicodedata.category(c) == "Pd" or c in "\u2212\u2043", unicodedata.name(c)
    for c in SINGLE_QUOTES + DOUBLE_QUOTES:
        name = unicodedata.name(c)
        assert "QUOTATION" in name or "PRIME" in name or "APOSTROPHE" in name, name
    assert apply("a\u2013b \u2014 \u201cq\u201d \u2018s\u2019 \u00abg\u00bb", "loose") == "a-b - \"q\" 's' \"g\""


def test_whitespace_collapse_under_loose():
    assert apply("  Paid\t\u00a0 to   A. Kestford  ", "loose") == "paid to a. kestford"
    # Lines stay lines: whitespace is collapsed within a line only.
    assert apply("a  b\n  c", "loose") == "a b\nc"


@pytest.mark.parametrize("raw,want", [
    ("£12 7s 6½d", "£12 7s 6½d"),            # already canonical
    ("£ 12 7s. 6½d.", "£12 7s 6½d"),         # space after £, stops after s and d
    ("12l. 7s. 6d.", "£12 7s 6d"),           # pounds as l. after the number
    ("cash 12l.", "cash £12"),               # ... at the end of the line
    ("Jan 12 L. Tarnby", "jan 12 l. tarnby"),  # a date and an initial: no amount
    ("₤5 0s 0d", "£5 0s 0d"),                # U+20A4 LIRA SIGN used for the pound
    ("3 1/2 cwt", "3 ½ cwt"),                # ASCII fraction standing alone
    ("6\u00bdd", "6½d"),                     # ½ survives NFKC's 1⁄2 expansion
    ("1\u20444", "¼"),                       # 1⁄4 with FRACTION SLASH
    ("01/02/1887", "01/02/1887"),            # dates untouched
    ("11/2", "11/2"),                        # digit before the slash form: untouched
])
def test_ledger_forms(raw, want):
    assert apply(raw, "ledger") == want


def test_ledger_restores_every_vulgar_fraction_nfkc_splits():
    # Reference: unicodedata — every vulgar fraction whose NFKC form contains
    # U+2044 FRACTION SLASH comes back as itself (except U+215F, no value of its own).
    for cp in range(0x10000):
        ch = chr(cp)
        if unicodedata.category(ch) == "No" and "\u2044" in unicodedata.normalize("NFKC", ch) and cp != 0x215F:
            assert apply(ch, "ledger") == ch, unicodedata.name(ch)


def test_profiles_apply_to_both_sides():
    # Hypothesis in different case and dash shapes: only loose/ledger forgive it.
    pages = [("p", "Rope \u2013 Hemp", "ROPE - hemp")]
    assert score_pages(pages, profile="nfc", n_boot=100).summary["cer"] > 0
    assert score_pages(pages, profile="loose", n_boot=100).summary["cer"] == 0


def test_lookup_and_lines():
    assert get_profile("ledger").tag == "ledger.1"
    assert apply_lines(["A  B", "C"], "loose") == ["a b", "c"]
    with pytest.raises(ValueError, match="unknown normalisation profile"):
        get_profile("strict")
