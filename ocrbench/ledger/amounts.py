"""The amount grammar: how money is written on a page, for scoring, normalisation and the balance check.

This module is the one home of the grammar of amounts (decimal and pounds,
shillings and pence): accuracy scoring finds amounts with :func:`find_amounts`,
the ``ledger`` normalisation profile rewrites ``12l.`` with :data:`POUNDS_AFTER`,
and the balance check (:mod:`ocrbench.ledger.balance`) builds its trailing-field
patterns from the pieces below (:data:`DASH`, :data:`FRACTION`,
:data:`POUNDS_AFTER_HEAD`, ...) and reads fractions with :data:`FRACTION_FORMS`.
So ``To Kettle for coals 12l. 7s. 6d.`` is £12 7s 6d to all three.

In a ledger the amounts matter most: one wrong digit changes a total. The
scoring figure is the share of reference amounts whose digits the hypothesis
reproduced exactly, at the place the alignment puts them.

In a ledger the amounts matter most: one wrong digit changes a total. The
figure reported is the share of reference amounts whose digits the hypothesis
reproduced exactly, at the place the alignment puts them.

Amount tokens are found in the *normalised reference* by these patterns, tried
in this order (later patterns skip text already taken):

1. **Marked pounds, shillings and pence**: ``£12 7s 6½d``, ``£12``, ``£ 3 -s 4d``,
   ``12l. 7s. 6d.`` — a ``£`` (or ``₤``) before the pounds, or ``l.`` directly
   after them (then shillings must follow or the line end, so that ``Jan 12 L.``,
   a date and an initial, is no amount), then optionally shillings ending in
   ``s`` and pence ending in ``d`` (either may carry a full stop, pence may carry
   ``¼ ½ ¾``, ``1/2`` or ``1⁄2``).
2. **Three trailing columns** at the end of a line: pounds, shillings, pence
   separated by spaces, ``-`` (or another dash) for a zero column, e.g.
   ``12 7 6``, ``- 15 4½``, ``1,204 - -`` (at least one column must hold a digit).
3. **Decimal amounts** with two decimals, with or without thousands commas:
   ``1,234.56``, ``1234.56``, ``0.50`` (not part of a longer number).

The digits of an amount are compared in a canonical form: the numbers of the
amount in order, separated by one space, thousands commas removed, a dash column
written ``0``, fractions as ``¼ ½ ¾`` attached to their pence (``£12 7s 6½d`` and
``12 7 6½`` both read ``12 7 6½``; ``1,234.56`` reads ``1234.56``). An amount is
right when the hypothesis text aligned to it has the same canonical form;
punctuation and the unit letters do not matter here (they count in the CER).
"""

from __future__ import annotations

import re
from bisect import bisect_left, bisect_right
from dataclasses import dataclass
from typing import Sequence

__all__ = ["Amount", "find_amounts", "find_amounts_in_lines", "canonical", "hyp_span", "check_amounts",
           "AMOUNT_PATTERNS", "SP", "DASH", "FRACTION", "FRACTION_FORMS", "POUND_SIGN", "POUNDS_AFTER_HEAD",
           "POUNDS_AFTER", "POUNDS_AFTER_NUMBER", "POUNDS_AFTER_MARK", "fraction_char"]

SP = r"[^\S\n]"                        # whitespace, but never across a line break
DASH = r"[-\u2010-\u2015\u2212]"        # a dash standing for a zero column
FRACTION = r"(?:[¼½¾]|[13][/\u2044][24])"   # a fraction of a penny: ¼ ½ ¾, 1/2 or 1⁄2
POUND_SIGN = "[£\u20a4]"                # £, or ₤ (lira sign, often used for the pound)
_SP, _DASH = SP, DASH
_PENCE = rf"(?:\d{{1,2}}[¼½¾]?|\d{{0,2}}[13][/\u2044][24]|[¼½¾]|{_DASH})"
_POUNDS = r"\d[\d,]*"
#: ``12l.``: pounds written after the number (libra). Only when shillings follow (``12l. 7s.``) or the line ends,
#: so that ``Jan 12 L. Tarnby`` (a date, then an initial) is no amount. Group 1 is the number.
POUNDS_AFTER_NUMBER = r"\d(?<![\w.,]\d)[\d,]*"
POUNDS_AFTER_MARK = rf"l\.(?={_SP}+(?:\d{{1,2}}|{_DASH}){_SP}?s|{_SP}*$)"
POUNDS_AFTER_HEAD = rf"({POUNDS_AFTER_NUMBER}){POUNDS_AFTER_MARK}"
POUNDS_AFTER = re.compile(POUNDS_AFTER_HEAD, re.MULTILINE)

# Written so that each pattern starts with a plain character class (the regex
# engine can then skip quickly to candidate positions); the conditions on the
# character before a match are look-behinds placed after its first character.
_SHILLINGS_PENCE = (rf"(?:{_SP}+(?:\d{{1,2}}|{_DASH}){_SP}?s\.?)?"
                    rf"(?:{_SP}+{_PENCE}{_SP}?d\.?)?"
                    r"(?!\w)")
MARKED = re.compile(rf"{POUND_SIGN}{_SP}?{_POUNDS}" + _SHILLINGS_PENCE)
MARKED_AFTER = re.compile(POUNDS_AFTER_HEAD + _SHILLINGS_PENCE, re.MULTILINE)
COLUMNS = re.compile(
    rf"[\d\-\u2010-\u2015\u2212](?<!\S.)(?:(?<=\d)[\d,]*)?"
    rf"{_SP}+(?:\d{{1,2}}|{_DASH}){_SP}+{_PENCE}(?={_SP}*$)",
    re.MULTILINE,
)
DECIMAL = re.compile(r"\d(?<![\d.,]\d)[\d,]*\.\d\d(?!\d)")
_DECIMAL_STRICT = re.compile(r"(?:\d{1,3}(?:,\d{3})+|\d+)\.\d{2}")

#: The patterns, in the order they are tried.
AMOUNT_PATTERNS: tuple[tuple[str, re.Pattern[str]], ...] = (
    ("lsd_marked", MARKED), ("lsd_marked", MARKED_AFTER), ("lsd_columns", COLUMNS), ("decimal", DECIMAL))

#: Written fractions of a penny and the character each stands for.
FRACTION_FORMS = {"1/4": "¼", "1/2": "½", "3/4": "¾", "1\u20444": "¼", "1\u20442": "½", "3\u20444": "¾"}
_FRACTION_FORMS = FRACTION_FORMS
_FRACTION_RE = re.compile(r"[13][/\u2044][24]")


def fraction_char(tok: str | None) -> str:
    """``'½'`` for any written half (``½``, ``1/2``, ``1⁄2``); ``''`` for none."""
    if not tok:
        return ""
    return FRACTION_FORMS.get(tok, tok)
_FRAC_JOIN = re.compile(rf"(?<=\d){_SP}+(?=[¼½¾])")
_NUMBER = re.compile(rf"\d[\d,]*(?:\.\d+)?[¼½¾]?|[¼½¾]|(?<!\S){_DASH}(?!\S)")
_DIGIT = re.compile(r"[\d¼½¾]")


@dataclass(frozen=True, slots=True)
class Amount:
    """An amount found in a reference text: ``text[start:end]`` and the pattern that found it."""

    start: int
    end: int
    kind: str
    text: str

    @property
    def digits(self) -> str:
        """The canonical digits (see :func:`canonical`)."""
        return canonical(self.text)


_PLAIN_DECIMAL = re.compile(r"\d[\d,]*\.\d+")


def canonical(text: str) -> str:
    """Canonical digits of an amount (see the module docstring): ``'£1,212 7s 6½d'`` → ``'1212 7 6½'``."""
    if _PLAIN_DECIMAL.fullmatch(text):
        return text.replace(",", "")
    s = _FRACTION_RE.sub(lambda m: _FRACTION_FORMS.get(m.group(0), m.group(0)), text)
    s = _FRAC_JOIN.sub("", s)
    out = []
    for tok in _NUMBER.findall(s):
        if tok[0] not in "0123456789¼½¾":
            out.append("0")          # a dash standing for a zero column
        else:
            out.append(tok.replace(",", ""))
    return " ".join(out)


def _scan(text: str) -> list[tuple[int, int, str, str]]:
    """(start, end, kind, text) of every amount, left to right, not overlapping."""
    if not _DIGIT.search(text):
        return []
    taken = bytearray(len(text))
    found: list[tuple[int, int, str, str]] = []
    for kind, pat in AMOUNT_PATTERNS:
        if pat is MARKED and "£" not in text and "\u20a4" not in text:
            continue
        if pat is MARKED_AFTER and "l." not in text:
            continue
        for m in pat.finditer(text):
            a, b = m.span()
            if found and 1 in taken[a:b]:
                continue
            t = m.group(0)
            if kind == "decimal":
                if "," in t and not _DECIMAL_STRICT.fullmatch(t):
                    continue       # misplaced thousands commas: not an amount
            elif not _DIGIT.search(t):
                continue           # "- - -" is no amount
            taken[a:b] = b"\x01" * (b - a)
            found.append((a, b, kind, t))
    found.sort()
    return found


def find_amounts(text: str) -> list[Amount]:
    """All amounts in ``text`` by the documented patterns, left to right, not overlapping."""
    return [Amount(a, b, k, t) for a, b, k, t in _scan(text)]


def find_amounts_in_lines(lines: Sequence[str]) -> list[tuple[int, Amount]]:
    """Amounts of several lines at once: ``(line index, amount with offsets within that line)``.

    Same result as calling :func:`find_amounts` on each line (no pattern crosses a
    line break), with one regex pass over the joined text instead of one per line.
    """
    if len(lines) == 1:
        return [(0, a) for a in find_amounts(lines[0])]
    found = _scan("\n".join(lines))
    if not found:
        return []
    starts = []
    pos = 0
    for ln in lines:
        starts.append(pos)
        pos += len(ln) + 1
    out = []
    for a, b, kind, t in found:
        k = bisect_right(starts, a) - 1
        off = starts[k]
        out.append((k, Amount(a - off, b - off, kind, t)))
    return out


def _edges(script: Sequence[tuple[str, int, int]]) -> tuple[list[int], list[int]]:
    return ([i for t, i, _ in script if t == "insert"], [i for t, i, _ in script if t == "delete"])


def hyp_span(script: Sequence[tuple[str, int, int]], start: int, end: int) -> tuple[int, int]:
    """Map the reference span ``[start, end)`` to the hypothesis through an edit script.

    ``script`` is a minimal edit script as ``(tag, ref_pos, hyp_pos)`` tuples with
    rapidfuzz tags (``replace``/``delete``/``insert``), sorted by position.
    Insertions inside the span are included; insertions exactly at its edges are
    not (they belong to the neighbouring text).
    """
    ins, dels = _edges(script)
    return _span(ins, dels, start, end)


def _span(ins: list[int], dels: list[int], start: int, end: int) -> tuple[int, int]:
    h0 = start + bisect_right(ins, start) - bisect_left(dels, start)
    h1 = end + bisect_left(ins, end) - bisect_left(dels, end)
    return h0, max(h0, h1)


def check_amounts(ref: str, hyp: str, script: Sequence[tuple[str, int, int]] | None,
                  found: Sequence[Amount] | None = None) -> list[tuple[Amount, str, bool]]:
    """For each amount of ``ref``: (amount, aligned hypothesis text, digits right?).

    ``script`` is the edit script from ``ref`` to ``hyp`` (``None`` when the two are equal).
    """
    found = find_amounts(ref) if found is None else found
    if script is None or not script:
        return [(am, am.text, True) for am in found]
    ins, dels = _edges(script)
    out = []
    for am in found:
        h0, h1 = _span(ins, dels, am.start, am.end)
        h = hyp[h0:h1]
        out.append((am, h, h == am.text or canonical(h) == canonical(am.text)))
    return out
