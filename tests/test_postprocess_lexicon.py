"""Lexicon correction: nearest match, confidence gate, digits untouched."""

from __future__ import annotations

import random
import string

import pytest
from hypothesis import given, settings, strategies as st
from rapidfuzz import process
from rapidfuzz.distance import Levenshtein

from ocrbench import synth
from ocrbench.errors import TextFileError
from ocrbench.postprocess.lexicon import Lexicon, LexiconOptions, correct_line, read_word_list, unknown_words


def wagner_fischer(a: str, b: str) -> int:
    """Textbook edit distance (Wagner & Fischer 1974): unit-cost insert, delete, substitute."""
    prev = list(range(len(b) + 1))
    for i, ca in enumerate(a, 1):
        cur = [i]
        for j, cb in enumerate(b, 1):
            cur.append(min(prev[j] + 1, cur[j - 1] + 1, prev[j - 1] + (ca != cb)))
        prev = cur
    return prev[-1]


def brute_nearest(word: str, words: list[str]) -> tuple[int, list[str]]:
    """Minimum distance over the whole word list and every word at that distance."""
    dists = {w: wagner_fischer(word, w) for w in words}
    best = min(dists.values())
    return best, sorted(w for w, d in dists.items() if d == best)


# An invented archive vocabulary: the demo generator's payee syllables, places and goods.
WORDS = sorted({a + b for a in synth._SYL_A for b in synth._SYL_B[:6]} | set(synth._PLACES) | set(synth._GOODS))


def _perturb(rng: random.Random, w: str, n: int) -> str:
    s = list(w)
    for _ in range(n):
        op = rng.randrange(3)
        i = rng.randrange(len(s) + (op == 1))
        if op == 0 and s:
            s[min(i, len(s) - 1)] = rng.choice(string.ascii_lowercase)
        elif op == 1:
            s.insert(i, rng.choice(string.ascii_lowercase))
        elif len(s) > 1:
            del s[min(i, len(s) - 1)]
    return "".join(s)


@pytest.mark.slow
def test_rapidfuzz_nearest_agrees_with_brute_force_search():
    lex = Lexicon.from_words(WORDS)
    keys = [w.casefold() for w in WORDS]
    rng = random.Random(3)
    queries = [_perturb(rng, rng.choice(WORDS).casefold(), rng.randint(0, 3)) for _ in range(300)]
    queries += ["".join(rng.choice(string.ascii_lowercase) for _ in range(rng.randint(3, 9))) for _ in range(100)]
    checked_hits = 0
    for q in queries:
        best, argmins = brute_nearest(q, keys)
        # rapidfuzz's extractOne with the Levenshtein distance finds the same minimum ...
        _, dist, _ = process.extractOne(q, keys, scorer=Levenshtein.distance)
        assert dist == best, q
        # ... and Lexicon.nearest returns the unique nearest word within the bound, else None.
        for bound in (1, 2, 3):
            got = lex.nearest(q, max_distance=bound)
            if best <= bound and len(argmins) == 1:
                assert got is not None and got[0].casefold() == argmins[0] and got[1] == best, (q, bound)
                checked_hits += 1
            else:
                assert got is None, (q, bound, best, argmins)
    assert checked_hits > 200


def test_correction_within_gate_and_bound():
    lex = Lexicon.from_words(["Tarnby", "Portley", "cordage"])
    text, _, fixes = correct_line("Portlcy Mill cordagc", lex, line_confidence=0.3)
    assert text == "Portley Mill cordage"
    assert [(f.old, f.new, f.distance) for f in fixes] == [("Portlcy", "Portley", 1), ("cordagc", "cordage", 1)]
    # the gate: a confident line is left alone
    assert correct_line("Portlcy Mill", lex, line_confidence=0.95)[0] == "Portlcy Mill"
    # the bound: two edits in a 7-letter word exceed max_share 0.25 (at most 1 edit)
    assert correct_line("Purtlcy", lex, line_confidence=0.1)[0] == "Purtlcy"
    # capitals kept when the token is in capitals
    assert correct_line("PORTLCY", lex, line_confidence=0.1)[0] == "PORTLEY"


def test_per_character_confidence_gates_each_token():
    lex = Lexicon.from_words(["Tarnby", "Portley"])
    text = "Tarnbv Portlcy"
    confs = [0.99] * 5 + [0.4] + [0.99] * 8          # only the 'v' of Tarnbv is doubtful
    new, new_confs, fixes = correct_line(text, lex, confidences=confs, line_confidence=0.1)
    assert new == "Tarnby Portlcy"
    assert len(new_confs) == len(new) and new_confs[5] == pytest.approx(0.4)
    # misaligned confidences are ignored: the line confidence decides
    assert correct_line(text, lex, confidences=[0.99] * 3, line_confidence=0.1)[0] == "Tarnby Portley"


def test_ties_and_short_words_left_alone():
    lex = Lexicon.from_words(["hemp", "help", "tar", "twine"])
    assert correct_line("hemq", lex, line_confidence=0.0)[0] == "hemp"
    assert correct_line("heap", lex, line_confidence=0.0)[0] == "heap"    # help or hemp: ambiguous
    assert correct_line("tor", lex, line_confidence=0.0)[0] == "tor"      # shorter than min_length


@settings(max_examples=200, deadline=None)
@given(st.lists(st.sampled_from(["Tarnb7", "12.50", "No.", "482", "Portlcy", "£12", "7s", "6½d", "1O",
                                 "cordagc", "hemp", "-", "Jan", "9", "l2", "Portl3y", "20/12/1890"]),
                min_size=1, max_size=12),
       st.integers(min_value=1, max_value=4))
def test_lexicon_never_changes_digits(tokens, max_distance):
    # Words in the list that hold digits must never be offered, and tokens with numerals never touched.
    lex = Lexicon.from_words(["Tarnby", "Portley", "cordage", "No1", "12.50", "lO", "l2s"])
    text = " ".join(tokens)
    opts = LexiconOptions(gate=1.01, max_distance=max_distance, max_share=1.0, min_length=1)
    new, _, _ = correct_line(text, lex, line_confidence=0.0, options=opts)
    assert [c for c in new if c.isnumeric()] == [c for c in text if c.isnumeric()]
    old_tokens, new_tokens = text.split(" "), new.split(" ")
    assert len(old_tokens) == len(new_tokens)
    for a, b in zip(old_tokens, new_tokens):
        if any(c.isnumeric() for c in a):
            assert a == b


def test_word_list_file(tmp_path):
    p = tmp_path / "words.txt"
    p.write_bytes("\ufeff# payees\nTarnby\n\nPortley Mill\n".encode("utf-8"))
    lex = read_word_list(p)
    assert "tarnby" in lex and "Mill" in lex and "payees" not in lex and len(lex) == 3
    assert lex.digest == Lexicon.from_words(["Mill", "Portley", "Tarnby"]).digest
    bad = tmp_path / "bad.txt"
    bad.write_bytes(b"Tarnby\n\xff\n")
    with pytest.raises(TextFileError, match="bad.txt.*offset 7"):
        read_word_list(bad)
    with pytest.raises(TextFileError, match="missing.txt"):
        read_word_list(tmp_path / "missing.txt")


def test_unknown_words():
    lex = Lexicon.from_words(["Tarnby", "hemp"])
    assert unknown_words("Jan 9 L. Tarnby hemp 12.50", lex) == (3, 1)     # Jan unknown; "L." too short


def test_an_initial_run_into_a_name_is_never_deleted():
    # Seen on the demo archive: "F.Wexham" (recogniser lost the space after the initial) was within two
    # edits of the listed "Wexham" and lost its initial. Only the part after an inner full stop is checked.
    lex = Lexicon.from_words(["Wexham", "Pencott"])
    assert correct_line("13 Dec F.Wexham freight", lex, line_confidence=0.1)[0] == "13 Dec F.Wexham freight"
    text, _, fixes = correct_line("May 18 G.Pencot soap", lex, line_confidence=0.1)
    assert text == "May 18 G.Pencott soap" and [(f.old, f.new) for f in fixes] == [("Pencot", "Pencott")]
    assert unknown_words("F.Wexham G.Pencott", lex) == (2, 0)
