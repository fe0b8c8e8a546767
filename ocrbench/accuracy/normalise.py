"""Named text-normalisation profiles, applied identically to reference and hypothesis.

Why: the same page can be scored strictly (every code point counts) or leniently
(case, dash shapes and quote shapes do not count). A figure is only comparable
with another figure made under the same profile, so every profile has a name and
a version that go into the recipe string of each reported number.

Profiles (each works on one line of text; multi-line text is normalised line by
line, so line breaks are never merged or moved):

``exact`` (v1)
    Nothing changes. Characters are compared as the Unicode code points found.
``nfc`` (v1)
    Unicode canonical composition (NFC, Unicode Standard Annex #15): an ``é``
    typed as ``e`` + COMBINING ACUTE ACCENT becomes the single code point U+00E9.
    Nothing a reader would call a different text is changed. Default profile.
``loose`` (v1)
    NFKC (compatibility composition: the ``ﬁ`` ligature becomes ``fi``,
    full-width forms become ASCII, ``½`` becomes ``1⁄2``), then case folding
    (``str.casefold``), then NFKC again (case folding can leave text that is not
    NFKC; this makes the profile idempotent), then

    * dash variants → ``-`` : U+2010 HYPHEN, U+2011 NON-BREAKING HYPHEN,
      U+2012 FIGURE DASH, U+2013 EN DASH, U+2014 EM DASH, U+2015 HORIZONTAL BAR,
      U+2043 HYPHEN BULLET, U+2212 MINUS SIGN, U+2E3A TWO-EM DASH,
      U+2E3B THREE-EM DASH, U+FE58 SMALL EM DASH;
    * single-quote variants → ``'`` : U+2018, U+2019, U+201A, U+201B, U+2032
      PRIME, U+2035 REVERSED PRIME, U+2039, U+203A, U+02BC MODIFIER LETTER
      APOSTROPHE;
    * double-quote variants → ``"`` : U+201C, U+201D, U+201E, U+201F,
      U+00AB, U+00BB, U+2033 DOUBLE PRIME (already split by NFKC into two
      primes, which become ``''``), U+2036, U+301D, U+301E, U+301F;
    * whitespace: every run of whitespace (``str.split`` rules) becomes one
      space; leading and trailing whitespace is removed.
``ledger`` (v1)
    ``loose``, then forms of money and fractions seen in British cash books are
    unified:

    * vulgar fractions: NFKC writes ``½`` as ``1⁄2`` (with U+2044 FRACTION
      SLASH); every such sequence that is the NFKC form of a vulgar-fraction
      character is turned back into that single character (``1⁄2`` → ``½``,
      ``6 1⁄4`` stays ``6 ¼``, ``61⁄2`` → ``6½``); the ASCII forms ``1/4``,
      ``1/2`` and ``3/4`` become ``¼ ½ ¾`` when they stand alone (no digit or
      ``/`` directly before or after, so dates such as ``01/02/1887`` are
      untouched);
    * ``₤`` (U+20A4 LIRA SIGN, often used for the pound) → ``£``;
      ``£`` followed by spaces and a digit loses the spaces (``£ 12`` → ``£12``);
    * pounds written after the number as ``l.`` (libra) become a leading ``£``:
      ``12l. 7s. 6d.`` → ``£12 7s 6d`` — only with no space before ``l.`` and
      only when shillings follow or the line ends there, so a date followed by
      an initial (``Jan 12 L. Tarnby``) is left alone;
    * the abbreviation stop after shillings and pence is dropped: ``7s.`` →
      ``7s``, ``6½d.`` → ``6½d``.

    Not handled (ambiguous with misread digits): ``L`` before a number,
    ``/-`` shilling forms, ditto marks.

All profiles keep the text a ``str`` of code points; CER is counted over the
code points of the normalised text.
"""

from __future__ import annotations

import re
import unicodedata
from dataclasses import dataclass, field
from functools import lru_cache
from typing import Callable, Iterable

from ocrbench.ledger.amounts import POUNDS_AFTER

__all__ = ["Profile", "PROFILES", "DEFAULT_PROFILE", "get_profile", "apply", "apply_lines",
           "DASHES", "SINGLE_QUOTES", "DOUBLE_QUOTES"]

DEFAULT_PROFILE = "nfc"

DASHES = "\u2010\u2011\u2012\u2013\u2014\u2015\u2043\u2212\u2e3a\u2e3b\ufe58"
SINGLE_QUOTES = "\u2018\u2019\u201a\u201b\u2032\u2035\u2039\u203a\u02bc"
DOUBLE_QUOTES = "\u201c\u201d\u201e\u201f\u00ab\u00bb\u2033\u2036\u301d\u301e\u301f"

_PUNCT_MAP = str.maketrans({**{c: "-" for c in DASHES},
                            **{c: "'" for c in SINGLE_QUOTES},
                            **{c: '"' for c in DOUBLE_QUOTES}})


@dataclass(frozen=True)
class Profile:
    """A named normalisation. ``line`` maps one line of text to its normal form."""

    name: str
    version: int
    summary: str
    line: Callable[[str], str] = field(repr=False, compare=False)
    #: Optional faster whole-text function; must equal applying ``line`` to each
    #: ``\\n``-separated line. ``None`` means: apply ``line`` line by line.
    text: Callable[[str], str] | None = field(default=None, repr=False, compare=False)

    @property
    def tag(self) -> str:
        """Name and version as they appear in recipe strings, e.g. ``ledger.1``."""
        return f"{self.name}.{self.version}"

    def apply_text(self, text: str) -> str:
        """Normalise a multi-line text line by line (``\\n`` separates lines)."""
        if self.text is not None:
            return self.text(text)
        if "\n" not in text:
            return self.line(text)
        return "\n".join(map(self.line, text.split("\n")))


# --------------------------------------------------------------------------- exact / nfc


def _identity(text: str) -> str:
    return text


def _nfc(text: str) -> str:
    # "\n" is a starter that composes with nothing, so NFC of a whole page equals
    # NFC line by line; one call per page is much cheaper than one per line.
    return unicodedata.normalize("NFC", text)


# --------------------------------------------------------------------------- loose


def _loose_line(line: str) -> str:
    if line.isascii():
        # NFKC is the identity on ASCII and casefold equals lower there.
        return " ".join(line.lower().split())
    s = unicodedata.normalize("NFKC", line)
    s = unicodedata.normalize("NFKC", s.casefold())
    s = s.translate(_PUNCT_MAP)
    return " ".join(s.split())


# --------------------------------------------------------------------------- ledger


@lru_cache(maxsize=1)
def _vulgar_fractions() -> dict[str, str]:
    """NFKC expansion (``1⁄2``) → vulgar-fraction character (``½``), from unicodedata."""
    out: dict[str, str] = {}
    for cp in range(0x10000):  # all vulgar fractions are in the Basic Multilingual Plane
        ch = chr(cp)
        if unicodedata.category(ch) != "No":
            continue
        k = unicodedata.normalize("NFKC", ch)
        # "1⁄" (U+215F FRACTION NUMERATOR ONE) is not a value of its own: skip it.
        if "\u2044" in k and k != ch and not k.endswith("\u2044"):
            out[k] = ch
    return out


@lru_cache(maxsize=1)
def _fraction_slash_re() -> re.Pattern[str]:
    keys = sorted(_vulgar_fractions(), key=len, reverse=True)
    # A fraction written as 1⁄2 after NFKC may follow the whole number directly
    # ("61⁄2" came from "6½"): the numerator is the last digit(s) before ⁄ that
    # form a known fraction, longest first.
    return re.compile("|".join(re.escape(k) for k in keys))


_ASCII_FRACTION = re.compile(r"(?<![\d/])([13])/([24])(?![\d/])")
_ASCII_FRACTION_MAP = {("1", "4"): "¼", ("1", "2"): "½", ("3", "4"): "¾"}
_POUND_SPACE = re.compile(r"£\s+(?=\d)")
# "12l." counts as pounds only when shillings follow ("12l. 7s.") or the line
# ends: "Jan 12 L. Tarnby" (a date, then an initial) must stay as it is. The rule
# is the amount grammar's (ocrbench/ledger/amounts.py), shared with scoring and the balance check.
_POUNDS_AFTER = POUNDS_AFTER
_SHILLING_PENCE_STOP = re.compile(r"(?<=[\d¼½¾])([sd])\.(?=\s|$)")


def _ascii_fraction(m: re.Match[str]) -> str:
    return _ASCII_FRACTION_MAP.get((m.group(1), m.group(2)), m.group(0))


def _ledger_line(line: str) -> str:
    s = _loose_line(line)
    if "\u2044" in s:
        table = _vulgar_fractions()
        s = _fraction_slash_re().sub(lambda m: table[m.group(0)], s)
    if "/" in s:
        s = _ASCII_FRACTION.sub(_ascii_fraction, s)
    if "\u20a4" in s:
        s = s.replace("\u20a4", "£")
    if "£" in s:
        s = _POUND_SPACE.sub("£", s)
    if "l." in s:
        s = _POUNDS_AFTER.sub(r"£\1", s)
    if "s." in s or "d." in s:
        s = _SHILLING_PENCE_STOP.sub(r"\1", s)
    return s


# --------------------------------------------------------------------------- registry


PROFILES: dict[str, Profile] = {
    p.name: p
    for p in (
        Profile("exact", 1, "code points as found", _identity, _identity),
        Profile("nfc", 1, "Unicode NFC (canonical composition)", _nfc, _nfc),
        Profile("loose", 1, "NFKC, case folded, dashes and quotes unified, whitespace collapsed",
                _loose_line),
        Profile("ledger", 1, "loose, plus unified pound signs, l./s./d. abbreviations and fractions",
                _ledger_line),
    )
}


def get_profile(profile: str | Profile) -> Profile:
    """Look a profile up by name (a Profile passes through). Raises ValueError for unknown names."""
    if isinstance(profile, Profile):
        return profile
    try:
        return PROFILES[profile]
    except KeyError:
        raise ValueError(f"unknown normalisation profile {profile!r}; "
                         f"choose one of {', '.join(PROFILES)}") from None


def apply(text: str, profile: str | Profile = DEFAULT_PROFILE) -> str:
    """Normalise ``text`` (one line or several separated by ``\\n``) under ``profile``."""
    return get_profile(profile).apply_text(text)


def apply_lines(lines: Iterable[str], profile: str | Profile = DEFAULT_PROFILE) -> list[str]:
    """Normalise each line of ``lines`` under ``profile``."""
    return list(map(get_profile(profile).line, lines))
