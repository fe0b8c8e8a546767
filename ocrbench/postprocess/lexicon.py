"""Lexicon correction: replace doubtful words by the nearest word of the archive's own word list.

Why: ledgers repeat a small vocabulary (payees, places, commodities). A
recognised word that is not in that vocabulary, that the recogniser was unsure
of, and that lies within a few edits of exactly one listed word is most likely
that word misread.

Rules, in order (each a reason a token is left alone):

1. Only letter tokens are touched. A token holding any numeric character
   (digits, ``½ ¼ ¾``) is never changed, and listed words holding numerals are
   never offered as replacements, so the lexicon cannot alter a digit.
2. Tokens already in the lexicon (case-insensitively by default) stay.
3. Short tokens (``min_length``) stay: a one-edit neighbour of a short word is
   too often a different word.
4. The confidence gate: only tokens whose confidence is below ``gate`` are
   touched. Token confidence is the *lowest* per-character confidence over the
   token when the recogniser gives per-character confidences (one misread letter
   is what a correction repairs, and it hides in a mean), else the line's.
   Unknown confidence (plain text files) counts as below the gate.
5. The nearest listed word (rapidfuzz ``process.extract`` with Levenshtein
   distance) must be within ``max_distance`` edits and within ``max_share`` of
   the token's length, and must be the only word at that distance (a tie is
   ambiguous, so nothing changes).
6. In a token with a full stop inside (``F.Wexham``: an initial run into the
   name, ``Co.Ltd``), only the part after the last inner full stop is a word
   to check; what precedes it is never changed. Matched whole, the initial
   would count as two edits and could be deleted to reach a listed name.
"""

from __future__ import annotations

import hashlib
import math
import re
import unicodedata
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable, Sequence

from rapidfuzz import process
from rapidfuzz.distance import Levenshtein

from ocrbench.errors import TextFileError
from ocrbench.io.text import read_text

_EDGE_PUNCT = ".,;:!?()[]{}\"'“”‘’«»"


def has_numeral(s: str) -> bool:
    """True when ``s`` holds a numeric character (digits 0-9, other scripts' digits, ½ ¼ ¾ ...)."""
    return any(ch.isnumeric() for ch in s)


def core_span(token: str) -> tuple[int, int]:
    """Span of ``token`` without the punctuation at its edges ("(Tarnby)," -> "Tarnby")."""
    a, b = 0, len(token)
    while a < b and token[a] in _EDGE_PUNCT:
        a += 1
    while b > a and token[b - 1] in _EDGE_PUNCT:
        b -= 1
    return a, b


def is_word(core: str) -> bool:
    """A token core made of letters (with inner apostrophes, hyphens or full stops)."""
    return bool(core) and any(ch.isalpha() for ch in core) and all(
        ch.isalpha() or ch in "'’-." for ch in core) and not has_numeral(core)


@dataclass(frozen=True)
class Lexicon:
    """A user word list. Entries of several words are split into words."""

    words: frozenset[str]
    case_sensitive: bool = False
    _keys: dict[str, str] = field(default_factory=dict, repr=False, compare=False)
    _choices: tuple[str, ...] = field(default=(), repr=False, compare=False)

    @classmethod
    def from_words(cls, entries: Iterable[str], *, case_sensitive: bool = False) -> "Lexicon":
        words: set[str] = set()
        for entry in entries:
            for tok in entry.split():
                a, b = core_span(tok)
                if b > a:
                    words.add(unicodedata.normalize("NFC", tok[a:b]))
        keys: dict[str, str] = {}
        for w in sorted(words):
            keys.setdefault(w if case_sensitive else w.casefold(), w)
        choices = tuple(k for k, w in keys.items() if is_word(w))
        return cls(frozenset(words), case_sensitive, keys, choices)

    @classmethod
    def from_text(cls, text: str, *, case_sensitive: bool = False) -> "Lexicon":
        """One entry per line; blank lines and lines starting with ``#`` are ignored."""
        entries = [ln.strip() for ln in text.splitlines()]
        return cls.from_words([e for e in entries if e and not e.startswith("#")], case_sensitive=case_sensitive)

    def key(self, word: str) -> str:
        w = unicodedata.normalize("NFC", word)
        return w if self.case_sensitive else w.casefold()

    def __contains__(self, word: str) -> bool:
        return self.key(word) in self._keys

    def __len__(self) -> int:
        return len(self._keys)

    def canonical(self, word: str) -> str | None:
        """The listed spelling of ``word`` (case as listed), or None."""
        return self._keys.get(self.key(word))

    @property
    def digest(self) -> str:
        """Short content hash, for recipes: two runs with the same digest used the same list."""
        h = hashlib.sha256("\n".join(sorted(self._keys)).encode("utf-8")).hexdigest()
        return h[:12]

    def nearest(self, word: str, *, max_distance: int) -> tuple[str, int] | None:
        """The unique listed word nearest to ``word`` within ``max_distance`` edits, with its distance.

        None when nothing is that close, or when two listed words tie for nearest.
        Candidates are letter words only (see module notes).
        """
        if not self._choices or max_distance < 0:
            return None
        found = process.extract(self.key(word), self._choices, scorer=Levenshtein.distance,
                                score_cutoff=max_distance, limit=2)
        if not found:
            return None
        if len(found) > 1 and found[1][1] == found[0][1]:
            return None
        key, dist, _ = found[0]
        return self._keys[key], int(dist)


def read_word_list(path: str | Path, *, case_sensitive: bool = False) -> Lexicon:
    """Read a UTF-8 word list file (one entry per line, ``#`` comments). Raises TextFileError."""
    p = Path(path)
    try:
        text = read_text(p)
    except TextFileError as e:
        raise TextFileError(p, f"word list {e.reason}") from None
    return Lexicon.from_text(text, case_sensitive=case_sensitive)


# --------------------------------------------------------------------------- correction


@dataclass(frozen=True)
class Token:
    """A whitespace-separated token of a line: its span and the span of its core."""

    start: int
    end: int
    core_start: int
    core_end: int


def tokens(text: str) -> list[Token]:
    """Whitespace-separated tokens; a token's core starts after its last inner full stop (rule 6)."""
    out = []
    for m in re.finditer(r"\S+", text):
        tok = m.group(0)
        a, b = core_span(tok)
        stop = tok.rfind(".", a, b)
        if stop >= 0:
            a = stop + 1
        out.append(Token(m.start(), m.end(), m.start() + a, m.start() + b))
    return out


def token_confidence(tok: Token, confidences: Sequence[float] | None, line_confidence: float | None) -> float | None:
    """Lowest per-character confidence over the token's core, else the line confidence, else None."""
    if confidences is not None and tok.core_end > tok.core_start:
        return float(min(confidences[tok.core_start:tok.core_end]))
    return line_confidence


def _match_case(source: str, target: str) -> str:
    if source.isupper() and len(source) > 1:
        return target.upper()
    return target


@dataclass(frozen=True)
class WordFix:
    """One replacement made by :func:`correct_line`."""

    start: int            # span of the replaced core in the *input* text
    end: int
    old: str
    new: str
    distance: int
    confidence: float | None


@dataclass(frozen=True)
class LexiconOptions:
    """Settings of lexicon correction (see the module notes for what each guards against)."""

    gate: float = 0.8
    max_distance: int = 2
    max_share: float = 0.25     # at most this share of the token's letters may change
    min_length: int = 4

    def bound(self, length: int) -> int:
        return min(self.max_distance, math.floor(length * self.max_share + 1e-9))


def correct_line(text: str, lexicon: Lexicon, *, confidences: Sequence[float] | None = None,
                 line_confidence: float | None = None,
                 options: LexiconOptions = LexiconOptions()) -> tuple[str, list[float] | None, list[WordFix]]:
    """Correct the doubtful words of one line against ``lexicon``.

    Returns the new text, the per-character confidences carried over to it
    (replaced characters get the token's confidence; None if none were given)
    and the list of fixes. ``confidences`` must have one value per character of
    ``text``; otherwise they are ignored and the line confidence is used.
    """
    if confidences is not None and len(confidences) != len(text):
        confidences = None
    fixes: list[WordFix] = []
    for tok in tokens(text):
        core = text[tok.core_start:tok.core_end]
        if not is_word(core) or len(core) < options.min_length or core in lexicon:
            continue
        conf = token_confidence(tok, confidences, line_confidence)
        if conf is not None and conf >= options.gate:
            continue
        bound = options.bound(len(core))
        if bound < 1:
            continue
        hit = lexicon.nearest(core, max_distance=bound)
        if hit is None:
            continue
        new, dist = hit
        new = _match_case(core, new)
        if new != core:
            fixes.append(WordFix(tok.core_start, tok.core_end, core, new, dist, conf))
    if not fixes:
        return text, (list(confidences) if confidences is not None else None), []
    parts: list[str] = []
    confs: list[float] = []
    pos = 0
    for fx in fixes:
        parts.append(text[pos:fx.start])
        parts.append(fx.new)
        if confidences is not None:
            confs.extend(confidences[pos:fx.start])
            confs.extend([fx.confidence if fx.confidence is not None else 0.0] * len(fx.new))
        pos = fx.end
    parts.append(text[pos:])
    if confidences is not None:
        confs.extend(confidences[pos:])
    return "".join(parts), (confs if confidences is not None else None), fixes


def unknown_words(text: str, lexicon: Lexicon, *, min_length: int = 3) -> tuple[int, int]:
    """(letter words of at least ``min_length`` letters, how many of them are not in the lexicon)."""
    n = unknown = 0
    for tok in tokens(text):
        core = text[tok.core_start:tok.core_end]
        if is_word(core) and len(core) >= min_length:
            n += 1
            unknown += core not in lexicon
    return n, unknown
