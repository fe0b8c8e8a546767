"""Levenshtein alignment of a reference (ground truth) and a hypothesis (recognised text).

Unit costs: a substitution, a deletion (a reference character missing from the
hypothesis) and an insertion (an extra hypothesis character) each cost 1; the
distance is the least total cost. Characters are Unicode code points; words are
the tokens of ``str.split()`` (runs of non-whitespace).

The distance alone comes from ``rapidfuzz.distance.Levenshtein.distance``
(bit-parallel, several times cheaper than an alignment). The alignment, needed
only for character-class and confusion figures, comes from
``rapidfuzz.distance.Levenshtein.editops``; it is a minimal edit script, so the
number of edits equals the distance.

Character classes (decided by the Unicode general category, from
``unicodedata``):

* ``digit``  : N* (Nd decimal digits, Nl letter numbers, No other numbers such
  as ``½``, which is part of an amount in a ledger);
* ``letter`` : L* letters, plus M* combining marks (they belong to a letter);
* ``punct``  : P* punctuation and S* symbols (``. , - & / £ $ +``); for ASCII
  this is exactly Python's ``string.punctuation``;
* ``space``  : characters for which ``str.isspace()`` is true (includes ``\\n``
  when a page is aligned as one text);
* ``other``  : everything else (control, format, private-use, unassigned).

Attribution: a substitution or a deletion counts against the class of the
*reference* character; an insertion counts against the class of the *inserted*
character and is reported separately (there is no reference character to
charge it to).
"""

from __future__ import annotations

import unicodedata
from dataclasses import dataclass
from functools import lru_cache
from typing import Sequence

import numpy as np
from rapidfuzz.distance import Levenshtein

__all__ = ["CLASSES", "char_class", "class_codes", "Edit", "EditCounts", "distance", "edits",
           "apply_edits", "counts", "word_distance", "words", "class_counts", "class_codes_of"]

CLASSES: tuple[str, ...] = ("digit", "letter", "punct", "space", "other")
_CLASS_INDEX = {c: i for i, c in enumerate(CLASSES)}


def _classify(ch: str) -> int:
    if ch.isspace():
        return 3
    cat = unicodedata.category(ch)[0]
    if cat == "N":
        return 0
    if cat in "LM":
        return 1
    if cat in "PS":
        return 2
    return 4


class _ClassCache(dict):
    """Character → class index, filled on first sight (fast for repeated characters)."""

    def __missing__(self, ch: str) -> int:
        v = _classify(ch)
        self[ch] = v
        return v


CLASS_INDEX_OF = _ClassCache()


def char_class(ch: str) -> str:
    """The class name (one of :data:`CLASSES`) of a single character."""
    if len(ch) != 1:
        raise ValueError(f"char_class needs one character, got {ch!r}")
    return CLASSES[CLASS_INDEX_OF[ch]]


@lru_cache(maxsize=1)
def _bmp_table() -> np.ndarray:
    return np.fromiter((_classify(chr(cp)) for cp in range(0x10000)), dtype=np.uint8, count=0x10000)


def class_codes(text: str) -> np.ndarray:
    """Class index (position in :data:`CLASSES`) of every code point of ``text``, as uint8."""
    if not text:
        return np.zeros(0, dtype=np.uint8)
    return class_codes_of(np.frombuffer(text.encode("utf-32-le", "surrogatepass"), dtype=np.uint32))


def class_codes_of(cps: np.ndarray) -> np.ndarray:
    """Class index of every code point in a uint32 array (vectorised :func:`char_class`)."""
    cps = np.asarray(cps, dtype=np.uint32)
    if cps.size == 0:
        return np.zeros(0, dtype=np.uint8)
    big = cps >= 0x10000
    out = _bmp_table()[np.where(big, 0, cps)]
    if big.any():
        idx = np.flatnonzero(big)
        out[idx] = [CLASS_INDEX_OF[chr(int(c))] for c in cps[idx]]
    return out


def class_counts(text: str) -> np.ndarray:
    """How many code points of ``text`` fall in each class (array of len(CLASSES))."""
    return np.bincount(class_codes(text), minlength=len(CLASSES))


# --------------------------------------------------------------------------- distance and edits


def distance(ref: str | Sequence, hyp: str | Sequence) -> int:
    """Levenshtein distance with unit costs (strings: code points; lists: elements)."""
    return Levenshtein.distance(ref, hyp)


def words(text: str) -> list[str]:
    """Whitespace-separated words of ``text`` (``str.split()`` rules)."""
    return text.split()


def word_distance(ref: str, hyp: str) -> int:
    """Levenshtein distance over words (the numerator of WER)."""
    return Levenshtein.distance(ref.split(), hyp.split())


@dataclass(frozen=True, slots=True)
class Edit:
    """One step of a minimal edit script turning the reference into the hypothesis.

    ``op`` is ``"sub"``, ``"del"`` or ``"ins"``. ``ref_pos`` is the position in the
    reference (for ``ins``: the reference position the character is inserted
    before); ``hyp_pos`` likewise in the hypothesis. ``ref``/``hyp`` hold the
    characters involved ("" where there is none).
    """

    op: str
    ref_pos: int
    hyp_pos: int
    ref: str
    hyp: str


_TAG = {"replace": "sub", "delete": "del", "insert": "ins"}


def edits(ref: str, hyp: str) -> list[Edit]:
    """A minimal edit script from ``ref`` to ``hyp`` (len == :func:`distance`)."""
    out = []
    for tag, i, j in Levenshtein.editops(ref, hyp).as_list():
        op = _TAG[tag]
        out.append(Edit(op, i, j, ref[i] if op != "ins" else "", hyp[j] if op != "del" else ""))
    return out


def apply_edits(ref: str, script: Sequence[Edit]) -> str:
    """Apply an edit script to ``ref``; uses only ``ref`` and the characters in the script.

    Applying :func:`edits` (ref, hyp) this way gives back ``hyp`` exactly.
    """
    out: list[str] = []
    i = 0
    for e in sorted(script, key=lambda e: (e.ref_pos, e.op != "ins", e.hyp_pos)):
        if e.ref_pos > i:
            out.append(ref[i:e.ref_pos])
            i = e.ref_pos
        if e.op == "ins":
            out.append(e.hyp)
        elif e.op == "sub":
            if ref[i] != e.ref:
                raise ValueError(f"edit {e} does not match the reference at {i}")
            out.append(e.hyp)
            i += 1
        else:  # del
            if ref[i] != e.ref:
                raise ValueError(f"edit {e} does not match the reference at {i}")
            i += 1
    out.append(ref[i:])
    return "".join(out)


@dataclass(frozen=True, slots=True)
class EditCounts:
    """Counts of one alignment. ``ref_len`` = hits + subs + dels."""

    subs: int
    dels: int
    ins: int
    hits: int
    ref_len: int

    @property
    def edits(self) -> int:
        return self.subs + self.dels + self.ins


def counts(ref: str | Sequence, hyp: str | Sequence) -> EditCounts:
    """Substitutions, deletions, insertions and hits of a minimal alignment."""
    s = d = i = 0
    for tag, _, _ in Levenshtein.editops(ref, hyp).as_list():
        if tag == "replace":
            s += 1
        elif tag == "delete":
            d += 1
        else:
            i += 1
    n = len(ref)
    return EditCounts(s, d, i, n - s - d, n)
