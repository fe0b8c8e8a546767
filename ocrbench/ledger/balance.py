"""Ledger grammar: dates, amounts and column totals of cash-book pages.

Why: the arithmetic of a ledger page is a check that needs no ground truth.
The entries of a page plus the amount brought forward must equal the total (or
the amount carried forward); a page whose recognised text does not add up holds
at least one misread amount. Over many pages this gives an estimate of how often
amounts are misread, and within a page it points the reviewer at the lines whose
digits are in doubt.

Money is counted in exact integers, never floats:

* decimal amounts in cents (``1,234.56`` -> 123456);
* pounds, shillings and pence in farthings: 4 farthings = 1 penny, 12 pence =
  1 shilling, 20 shillings = 1 pound (so £1 = 240d = 960 farthings).

Three written forms are read, each taken from the *trailing* field(s) of a line
so that dates, folio numbers, week numbers and years before them are never
mistaken for money:

* ``decimal``      ``1,234.56`` / ``1234.56`` (exactly two decimals; optional
  thousands separators, optional leading ``£ $ €``);
* ``lsd_columns``  three trailing columns ``12 7 6½`` with ``-`` for zero
  (shillings below 20, pence below 12, pence may carry ``¼ ½ ¾``);
* ``lsd_marked``   ``£12 7s 6½d`` (``£0 0s 8¼d``; ``-`` for zero allowed), or with the
  pounds written after the number, ``12l. 7s. 6d.``.

The pieces of these patterns (dashes for zero, fractions of a penny, the ``l.``
rule) come from :mod:`ocrbench.ledger.amounts`, the one amount grammar that
accuracy scoring and normalisation use too.

A page is made of lines (header, column headings, optional "Brought forward",
entries, a closing "Carried forward" or "Total"); :func:`check_page` classifies
each line and reports the page as balanced, unbalanced (with the difference) or
not checkable (with the reason).
"""

from __future__ import annotations

import datetime as _dt
import math
import re
from dataclasses import dataclass
from statistics import NormalDist
from typing import Iterable, Sequence

from rapidfuzz.distance import Levenshtein

from ocrbench.intervals import wilson_interval
from ocrbench.ledger.amounts import (DASH, FRACTION, POUND_SIGN, POUNDS_AFTER_MARK, POUNDS_AFTER_NUMBER,
                                     fraction_char)

# --------------------------------------------------------------------------- units

FARTHINGS_PER_PENNY = 4
PENCE_PER_SHILLING = 12      # fact of the trade (pre-1971 British currency)
SHILLINGS_PER_POUND = 20     # fact of the trade
FARTHINGS_PER_SHILLING = FARTHINGS_PER_PENNY * PENCE_PER_SHILLING
FARTHINGS_PER_POUND = FARTHINGS_PER_SHILLING * SHILLINGS_PER_POUND

DECIMAL = "decimal"
LSD_COLUMNS = "lsd_columns"
LSD_MARKED = "lsd_marked"
FORMS: tuple[str, ...] = (DECIMAL, LSD_MARKED, LSD_COLUMNS)   # also the tie-break order

BALANCED = "balanced"
UNBALANCED = "unbalanced"
NOT_CHECKABLE = "not checkable"

_FRACTION_FARTHINGS = {"": 0, "¼": 1, "½": 2, "¾": 3}
_FARTHING_FRACTION = {v: k for k, v in _FRACTION_FARTHINGS.items()}
_ZERO = DASH


def lsd_to_farthings(pounds: int = 0, shillings: int = 0, pence: int = 0, farthings: int = 0) -> int:
    """Exact value in farthings of an amount in pounds, shillings, pence and farthings.

    The parts need not be in canonical range (``lsd_to_farthings(0, 20)`` is £1).
    """
    return ((pounds * SHILLINGS_PER_POUND + shillings) * PENCE_PER_SHILLING + pence) * FARTHINGS_PER_PENNY + farthings


def farthings_to_lsd(farthings: int) -> tuple[int, int, int, int]:
    """Split a non-negative number of farthings into (pounds, shillings, pence, farthings)."""
    if farthings < 0:
        raise ValueError("farthings_to_lsd takes a non-negative amount; handle the sign outside")
    pence_total, q = divmod(farthings, FARTHINGS_PER_PENNY)
    shillings_total, d = divmod(pence_total, PENCE_PER_SHILLING)
    pounds, s = divmod(shillings_total, SHILLINGS_PER_POUND)
    return pounds, s, d, q


def system_of(form: str) -> str:
    """``"decimal"`` (cents) or ``"lsd"`` (farthings) for a written form."""
    if form == DECIMAL:
        return "decimal"
    if form in (LSD_COLUMNS, LSD_MARKED):
        return "lsd"
    raise ValueError(f"unknown amount form {form!r}; expected one of {', '.join(FORMS)}")


def format_amount(value: int, form: str, *, decimal_mark: str = ".") -> str:
    """Write ``value`` (cents or farthings) in ``form``; negative values get a leading ``-``.

    ``lsd_columns`` is written as three space-separated columns with ``-`` for
    zero, as on the page; for a *difference* prefer :func:`format_difference`.
    """
    sign = "-" if value < 0 else ""
    v = abs(value)
    if form == DECIMAL:
        whole, frac = divmod(v, 100)
        sep = "," if decimal_mark == "." else "."
        w = f"{whole:,}".replace(",", sep)
        return f"{sign}{w}{decimal_mark}{frac:02d}"
    l, s, d, q = farthings_to_lsd(v)
    if form == LSD_MARKED:
        return f"{sign}£{l} {s}s {d}{_FARTHING_FRACTION[q]}d"
    if form == LSD_COLUMNS:
        cols = [str(l) if l else "-", str(s) if s else "-", f"{d}{_FARTHING_FRACTION[q]}" if (d or q) else "-"]
        return sign + " ".join(cols)
    raise ValueError(f"unknown amount form {form!r}")


def format_difference(value: int, form: str, *, decimal_mark: str = ".") -> str:
    """A page difference as one readable string in the page's currency.

    Decimal pages: ``-12.50``. £sd pages (both forms) use marks, ``-£0 2s 6d``,
    because three bare columns in one string (``- 2 6``) read ambiguously.
    """
    if system_of(form) == "decimal":
        return format_amount(value, DECIMAL, decimal_mark=decimal_mark)
    return format_amount(value, LSD_MARKED)


# --------------------------------------------------------------------------- amounts


@dataclass(frozen=True)
class Amount:
    """An amount found in a line: its exact value and where it was written."""

    value: int            # cents (decimal) or farthings (£sd)
    form: str             # DECIMAL | LSD_COLUMNS | LSD_MARKED
    text: str             # the amount as written
    start: int            # character span within the line
    end: int

    @property
    def system(self) -> str:
        return system_of(self.form)

    def format(self) -> str:
        return format_amount(self.value, self.form)


_POUNDS = r"\d{1,3}(?:,\d{3})+|\d+"


def _decimal_regex(decimal_mark: str) -> re.Pattern[str]:
    if decimal_mark == ".":
        whole = r"\d{1,3}(?:,\d{3})+|\d+"
        mark = r"\."
    elif decimal_mark == ",":
        whole = r"\d{1,3}(?:[.\u00a0\u202f]\d{3})+|\d+"
        mark = ","
    else:
        raise ValueError(f"decimal_mark must be '.' or ',', got {decimal_mark!r}")
    return re.compile(rf"(?:^|(?<=\s))(?P<amt>[£$€]?(?P<whole>{whole}){mark}(?P<frac>\d{{2}}))\s*$")


_DECIMAL_RE = {m: _decimal_regex(m) for m in (".", ",")}
_COLUMNS_RE = re.compile(
    rf"(?:^|(?<=\s))(?P<amt>(?P<l>{_POUNDS}|{_ZERO})\s+(?P<s>\d{{1,2}}|{_ZERO})\s+"
    rf"(?P<d>{_ZERO}|\d{{1,2}}(?P<q>{FRACTION})?|(?P<q2>{FRACTION})))\s*$")
# Pounds (optional) as "£12" or "12l.", then shillings and pence.
_MARKED_RE = re.compile(
    rf"(?:^|(?<=\s))(?P<amt>(?:(?:{POUND_SIGN}\s?(?P<l>{_POUNDS}|{_ZERO})"
    rf"|(?P<la>{POUNDS_AFTER_NUMBER}){POUNDS_AFTER_MARK})"
    rf"\s+)?(?P<s>\d{{1,2}}|{_ZERO})\s?s\.?\s+(?P<d>\d{{1,2}}|{_ZERO})?\s?(?P<q>{FRACTION})?\s?d\.?)\s*$")


def _num(tok: str | None) -> int:
    if tok is None or re.fullmatch(_ZERO, tok):
        return 0
    return int(tok.replace(",", ""))


def _farthings(tok: str | None) -> int:
    """Farthings of a written fraction of a penny (``½``, ``1/2``: 2), 0 for none."""
    return _FRACTION_FARTHINGS[fraction_char(tok)]


def find_amount(line: str, form: str, *, decimal_mark: str = ".") -> Amount | None:
    """The amount written in ``form`` at the end of ``line``, or None.

    Only the trailing field(s) are read, and the parts must be in range
    (shillings < 20, pence < 12), so "Folio 12", "No. 482", "wages week 14",
    years and dates are never taken for money.
    """
    text = line.rstrip()
    if form == DECIMAL:
        m = _DECIMAL_RE[decimal_mark].search(text)
        if not m:
            return None
        whole = re.sub(r"[^\d]", "", m["whole"])
        value = int(whole) * 100 + int(m["frac"])
    elif form == LSD_COLUMNS:
        m = _COLUMNS_RE.search(text)
        if not m:
            return None
        s = _num(m["s"])
        frac = m["q"] or m["q2"]
        dnum = m["d"][: len(m["d"]) - len(frac)] if frac else m["d"]
        d = _num(dnum) if dnum else 0
        if s >= SHILLINGS_PER_POUND or d >= PENCE_PER_SHILLING:
            return None
        value = lsd_to_farthings(_num(m["l"]), s, d, _farthings(frac))
    elif form == LSD_MARKED:
        m = _MARKED_RE.search(text)
        if not m or (m["d"] is None and m["q"] is None):
            return None
        s, d = _num(m["s"]), _num(m["d"])
        if s >= SHILLINGS_PER_POUND or d >= PENCE_PER_SHILLING:
            return None
        value = lsd_to_farthings(_num(m["l"] if m["l"] is not None else m["la"]), s, d, _farthings(m["q"]))
    else:
        raise ValueError(f"unknown amount form {form!r}; expected one of {', '.join(FORMS)}")
    return Amount(value=value, form=form, text=m["amt"], start=m.start("amt"), end=m.end("amt"))


def parse_amount(text: str, form: str | None = None, *, decimal_mark: str = ".") -> Amount | None:
    """Read ``text`` as exactly one amount (in ``form``, or whichever form fits), else None."""
    t = text.strip()
    for f in ([form] if form else FORMS):
        a = find_amount(t, f, decimal_mark=decimal_mark)
        if a is not None and a.start == 0:
            return a
    return None


# --------------------------------------------------------------------------- dates

_MONTH_NAMES = {
    "jan": 1, "january": 1, "feb": 2, "february": 2, "mar": 3, "march": 3, "apr": 4, "april": 4,
    "may": 5, "jun": 6, "june": 6, "jul": 7, "july": 7, "aug": 8, "august": 8, "sep": 9,
    "sept": 9, "september": 9, "oct": 10, "october": 10, "nov": 11, "november": 11,
    "dec": 12, "december": 12,
}
_MON = "|".join(sorted(_MONTH_NAMES, key=len, reverse=True))
_ORD = r"(?:st|nd|rd|th)?"
_DATE_PATTERNS: tuple[tuple[str, re.Pattern[str]], ...] = (
    ("iso", re.compile(r"^(?P<y>\d{4})-(?P<m>\d{1,2})-(?P<d>\d{1,2})(?=\s|$)")),
    ("numeric", re.compile(r"^(?P<a>\d{1,2})[/.](?P<b>\d{1,2})[/.](?P<y>\d{4}|\d{2})(?=\s|$)")),
    ("dmy", re.compile(rf"^(?P<d>\d{{1,2}}){_ORD}\s+(?P<mon>{_MON})\.?,?(?:\s+(?P<y>\d{{4}}))?(?=\s|$)", re.I)),
    ("mdy", re.compile(rf"^(?P<mon>{_MON})\.?\s+(?P<d>\d{{1,2}}){_ORD},?(?:\s+(?P<y>\d{{4}}))?(?=\s|$)", re.I)),
)

#: Year used to validate a day and month written without a year: a leap year, so 29 Feb passes.
NO_YEAR_CHECK = 2000


@dataclass(frozen=True)
class DateMatch:
    """A date-shaped field at the start of a line, valid or not."""

    text: str
    shape: str                 # "iso" | "numeric" | "dmy" | "mdy"
    year: int | None
    month: int
    day: int
    valid: bool                # the day exists in that month (checked with datetime)

    @property
    def date(self) -> _dt.date | None:
        """The calendar date, when valid and the year is written."""
        if not self.valid or self.year is None:
            return None
        return _dt.date(self.year, self.month, self.day)


def _valid(year: int | None, month: int, day: int) -> bool:
    try:
        _dt.date(year if year is not None else NO_YEAR_CHECK, month, day)
    except ValueError:
        return False
    return True


def match_date(text: str, *, day_first: bool = True) -> DateMatch | None:
    """A date written at the start of ``text`` (valid or not), or None if none is written there.

    Shapes: ``1887-03-14``, ``14/03/1887`` (day first unless ``day_first=False``),
    ``14 Mar 1887``, ``Mar 14`` (year optional). Validity is decided by
    :class:`datetime.date`, so 31 Feb is recognised as date-shaped but invalid.
    """
    t = text.lstrip()
    for shape, rx in _DATE_PATTERNS:
        m = rx.match(t)
        if not m:
            continue
        gd = m.groupdict()
        y = int(gd["y"]) if gd.get("y") else None
        if shape == "numeric":
            a, b = int(gd["a"]), int(gd["b"])
            d, mo = (a, b) if day_first else (b, a)
            if y is not None and len(gd["y"]) == 2:
                y = None          # two-digit year: century unknown; validate day/month only
        elif shape == "iso":
            d, mo = int(gd["d"]), int(gd["m"])
        else:
            d, mo = int(gd["d"]), _MONTH_NAMES[gd["mon"].lower()]
        return DateMatch(text=m.group(0), shape=shape, year=y, month=mo, day=d,
                         valid=1 <= mo <= 12 and _valid(y, mo, d))
    return None


def parse_date(text: str, *, day_first: bool = True) -> DateMatch | None:
    """The valid date that ``text`` consists of, or None (not a date, or no such day)."""
    m = match_date(text, day_first=day_first)
    if m is None or not m.valid or m.text.strip() != text.strip():
        return None
    return m


# --------------------------------------------------------------------------- lines

ENTRY, BROUGHT, TOTAL, TEXT, UNREADABLE = "entry", "brought", "total", "text", "unreadable"

#: Labels that open a page (amount brought in) and close it (page total).
BROUGHT_LABELS: tuple[str, ...] = ("brought forward", "brought over", "b/f", "balance brought forward")
TOTAL_LABELS: tuple[str, ...] = ("carried forward", "carried over", "c/f", "total",
                                 "balance carried forward", "total carried forward")


def _label_kind(label: str, *, max_share: float = 0.2) -> str | None:
    """BROUGHT / TOTAL when ``label`` opens with a known label, allowing a few misread letters.

    The first words of ``label`` (as many as the known label has) are compared
    with it; at most ``max_share`` of its letters may differ (so "Tota1" and
    "Carricd forward" still count, "Totnes Mill" does not).
    """
    words = label.casefold().split()
    if not words:
        return None
    best: tuple[float, str | None] = (max_share + 1e-9, None)
    for kind, labels in ((BROUGHT, BROUGHT_LABELS), (TOTAL, TOTAL_LABELS)):
        for ref in labels:
            n = len(ref.split())
            head = " ".join(words[:n]).rstrip(".:")
            d = Levenshtein.normalized_distance(head, ref)
            if d < best[0]:
                best = (d, kind)
    return best[1]


@dataclass(frozen=True)
class LedgerLine:
    """One line of a page as the ledger grammar reads it."""

    line_no: int                # 0-based position in the page
    text: str
    kind: str                   # ENTRY | BROUGHT | TOTAL | TEXT | UNREADABLE
    amount: Amount | None
    date: DateMatch | None
    label: str                  # the text before the amount (the whole line if none)


def read_line(line_no: int, text: str, form: str, *, decimal_mark: str = ".",
              day_first: bool = True) -> LedgerLine:
    """Classify one line of a page whose amounts are written in ``form``.

    A line with a trailing amount is an entry, or the brought-forward / total
    line when its label says so. A line without one is plain text (header,
    headings, notes) unless it looks like it should carry an amount (it starts
    with a date or has a brought/total label): then it is UNREADABLE, an
    amount that was there but cannot be read.
    """
    amount = find_amount(text, form, decimal_mark=decimal_mark)
    label = text[: amount.start].strip() if amount else text.strip()
    date = match_date(label, day_first=day_first)
    lk = _label_kind(label)
    if amount is not None:
        kind = lk or ENTRY
    elif date is not None or lk is not None:
        kind = UNREADABLE
    else:
        kind = TEXT
    return LedgerLine(line_no=line_no, text=text, kind=kind, amount=amount, date=date, label=label)


def detect_form(lines: Sequence[str], *, decimal_mark: str = ".") -> str | None:
    """The amount form most lines of the page end with (None when no line has an amount).

    Ties go to the form the column headings announce (``£ s d`` -> columns), then
    to the order of :data:`FORMS`.
    """
    counts = {f: sum(find_amount(t, f, decimal_mark=decimal_mark) is not None for t in lines) for f in FORMS}
    best = max(counts.values())
    if best == 0:
        return None
    tied = [f for f in FORMS if counts[f] == best]
    if len(tied) > 1 and LSD_COLUMNS in tied and any(re.search(r"£\s+s\s+d\s*$", t) for t in lines):
        return LSD_COLUMNS
    return tied[0]


# --------------------------------------------------------------------------- pages


@dataclass(frozen=True)
class PageBalance:
    """Whether a page's entries add up to its stated total.

    ``difference`` = stated total - (brought forward + sum of entries), in cents
    or farthings; 0 when balanced, None when not checkable.
    """

    status: str                         # BALANCED | UNBALANCED | NOT_CHECKABLE
    form: str | None
    difference: int | None
    reason: str | None                  # why not checkable (None otherwise)
    lines: tuple[LedgerLine, ...] = ()
    decimal_mark: str = "."

    @property
    def amount_lines(self) -> list[LedgerLine]:
        """Lines whose amount takes part in the check (brought, entries, total)."""
        return [ln for ln in self.lines if ln.kind in (ENTRY, BROUGHT, TOTAL)]

    @property
    def unreadable_lines(self) -> list[LedgerLine]:
        return [ln for ln in self.lines if ln.kind == UNREADABLE]

    @property
    def n_amounts(self) -> int:
        """Amounts the check rests on, counting unreadable ones (they should have been amounts)."""
        return len(self.amount_lines) + len(self.unreadable_lines)

    @property
    def difference_text(self) -> str | None:
        if self.difference is None or self.form is None:
            return None
        return format_difference(self.difference, self.form, decimal_mark=self.decimal_mark)

    def to_dict(self) -> dict:
        return {"status": self.status, "difference": self.difference_text, "form": self.form,
                "reason": self.reason, "amounts": len(self.amount_lines),
                "unreadable_lines": [ln.line_no + 1 for ln in self.unreadable_lines]}


def check_page(lines: Sequence[str], *, form: str | None = None, decimal_mark: str = ".",
               day_first: bool = True) -> PageBalance:
    """Check one page: do brought forward + entries equal the closing total?

    ``lines`` are the page's text lines in reading order. ``form`` forces the
    amount form; by default it is detected (:func:`detect_form`). The closing
    line is the last line labelled total / carried forward; entries are the
    amount lines before it (after the brought-forward line, if any).
    """
    lines = list(lines)
    f = form or detect_form(lines, decimal_mark=decimal_mark)
    if f is None:
        return PageBalance(NOT_CHECKABLE, None, None, "no amounts found", (), decimal_mark)
    read = tuple(read_line(i, t, f, decimal_mark=decimal_mark, day_first=day_first) for i, t in enumerate(lines))

    def nc(reason: str) -> PageBalance:
        return PageBalance(NOT_CHECKABLE, f, None, reason, read, decimal_mark)

    totals = [ln for ln in read if ln.kind == TOTAL]
    if not totals:
        bad = [ln for ln in read if ln.kind == UNREADABLE and _label_kind(ln.label) == TOTAL]
        if bad:
            return nc(f"line {bad[-1].line_no + 1}: total amount not readable as {f}")
        return nc("no total or carried-forward line")
    closing = totals[-1]
    after = [ln for ln in read if ln.line_no > closing.line_no and ln.kind in (ENTRY, UNREADABLE, BROUGHT)]
    if after:
        return nc(f"line {after[0].line_no + 1}: amount after the total line")
    unreadable = [ln for ln in read if ln.kind == UNREADABLE]
    if unreadable:
        nums = ", ".join(str(ln.line_no + 1) for ln in unreadable[:5])
        more = "" if len(unreadable) <= 5 else f" and {len(unreadable) - 5} more"
        return nc(f"line {nums}{more}: amount not readable as {f}")
    brought = [ln for ln in read if ln.kind == BROUGHT]
    if len(brought) > 1:
        return nc(f"{len(brought)} brought-forward lines")
    entries = [ln for ln in read if ln.kind == ENTRY]
    if not entries:
        return nc("no entries before the total line")
    if len(totals) > 1:          # running subtotals within a page are not supported
        return nc(f"{len(totals)} total lines")
    computed = sum(ln.amount.value for ln in entries) + sum(ln.amount.value for ln in brought)  # type: ignore[union-attr]
    diff = closing.amount.value - computed  # type: ignore[union-attr]
    return PageBalance(BALANCED if diff == 0 else UNBALANCED, f, diff, None, read, decimal_mark)


# --------------------------------------------------------------------------- single-digit fixes


@dataclass(frozen=True)
class DigitFix:
    """Changing one digit of one amount would balance the page."""

    line_no: int          # 0-based line in the page
    char_index: int       # position of the digit in the line's text
    old: str
    new: str

    def apply(self, text: str) -> str:
        return text[: self.char_index] + self.new + text[self.char_index + 1:]


def single_digit_fixes(balance: PageBalance) -> list[DigitFix]:
    """Every one-digit substitution in one amount that would make an unbalanced page balance.

    Why: a misread digit is the commonest amount error; when exactly one low-
    confidence digit can explain the difference, the ledger supports changing it.
    Returns [] for pages that are balanced or not checkable.
    """
    if balance.status != UNBALANCED or balance.form is None:
        return []
    out: list[DigitFix] = []
    for ln in balance.amount_lines:
        a = ln.amount
        assert a is not None
        for pos in range(a.start, a.end):
            ch = ln.text[pos]
            if not ("0" <= ch <= "9"):
                continue
            for new in "0123456789":
                if new == ch:
                    continue
                changed = ln.text[:pos] + new + ln.text[pos + 1:]
                b = find_amount(changed, balance.form, decimal_mark=balance.decimal_mark)
                if b is None or b.start != a.start:
                    continue
                delta = b.value - a.value
                # total rises -> difference rises; an entry or brought amount rising lowers it
                new_diff = balance.difference + (delta if ln.kind == TOTAL else -delta)  # type: ignore[operator]
                if new_diff == 0:
                    out.append(DigitFix(ln.line_no, pos, ch, new))
    return out


# --------------------------------------------------------------------------- accuracy signal




def _loglik(p: float, balanced_k: Sequence[int], failed_k: Sequence[int]) -> float:
    if p <= 0.0:
        return 0.0 if not failed_k else -math.inf
    if p >= 1.0:
        return 0.0 if not balanced_k else -math.inf
    lq = math.log1p(-p)
    ll = lq * sum(balanced_k)
    for k in failed_k:
        ll += math.log(-math.expm1(k * lq))      # log(1 - (1-p)^k)
    return ll


def _argmax_concave(fn, lo: float = 0.0, hi: float = 1.0, iters: int = 200) -> float:
    for _ in range(iters):   # golden-section search on a concave function
        m1 = lo + (hi - lo) * 0.381966
        m2 = hi - (hi - lo) * 0.381966
        if fn(m1) < fn(m2):
            lo = m1
        else:
            hi = m2
    return (lo + hi) / 2


def _bisect(fn, lo: float, hi: float, iters: int = 200) -> float:
    """Root of a monotone ``fn`` with fn(lo), fn(hi) of opposite signs."""
    flo = fn(lo)
    for _ in range(iters):
        mid = (lo + hi) / 2
        if (fn(mid) > 0) == (flo > 0):
            lo, flo = mid, fn(mid)
        else:
            hi = mid
    return (lo + hi) / 2


@dataclass(frozen=True)
class MisreadEstimate:
    """How often amounts are misread, estimated from page arithmetic alone (no ground truth).

    ``failed_share``: pages that fail the check (unbalanced, or an amount that
    cannot be read) among the pages that could be judged, with a Wilson interval.
    ``per_amount_rate``: the probability that one amount is misread, under the
    model stated in ``model``, with a likelihood-ratio interval.
    """

    pages_judged: int
    pages_failed: int
    pages_not_checkable: int
    amounts: int
    failed_share: float | None
    failed_share_low: float | None
    failed_share_high: float | None
    per_amount_rate: float | None
    per_amount_low: float | None
    per_amount_high: float | None
    level: float
    model: str

    def to_dict(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


MISREAD_MODEL = (
    "each amount on a page (brought forward, entries, total) is misread independently with "
    "the same probability p; a page balances exactly when none of its k amounts is misread "
    "(a misread that keeps the sum, or two that cancel, is taken as negligible), so "
    "P(page fails) = 1 - (1-p)^k. p is the maximum-likelihood estimate over the judged pages; "
    "its interval is the profile likelihood-ratio interval (chi-square, 1 df). Pages not "
    "checkable for other reasons are left out, which assumes they are like the rest."
)


def estimate_misreads(balances: Iterable[PageBalance], *, level: float = 0.95,
                      count_unreadable: bool = True) -> MisreadEstimate:
    """Estimate the misread rate of amounts from page balance results (see :data:`MISREAD_MODEL`).

    ``count_unreadable``: a page not checkable only because an amount could not be
    read counts as failed (the amount was there but was misread). Turn it off
    for hand-keyed texts whose dated lines may lawfully carry no amount.
    """
    balanced_k: list[int] = []
    failed_k: list[int] = []
    not_checkable = 0
    for b in balances:
        if b.status == BALANCED:
            balanced_k.append(b.n_amounts)
        elif b.status == UNBALANCED:
            failed_k.append(b.n_amounts)
        elif count_unreadable and b.unreadable_lines and _only_unreadable(b):
            failed_k.append(b.n_amounts)
        else:
            not_checkable += 1
    n = len(balanced_k) + len(failed_k)
    if n == 0:
        return MisreadEstimate(0, 0, not_checkable, 0, None, None, None, None, None, None, level, MISREAD_MODEL)
    share = len(failed_k) / n
    lo, hi = wilson_interval(len(failed_k), n, level=level)  # type: ignore[misc]

    def ll(p: float) -> float:
        return _loglik(p, balanced_k, failed_k)

    if not failed_k:
        p_hat = 0.0
    elif not balanced_k:
        p_hat = 1.0
    else:
        p_hat = _argmax_concave(ll)
    ll_hat = ll(p_hat)
    cut = NormalDist().inv_cdf(0.5 + level / 2) ** 2 / 2     # chi2(1 df) quantile / 2
    p_lo = 0.0 if p_hat == 0.0 or ll(0.0) >= ll_hat - cut else _bisect(lambda p: ll(p) - (ll_hat - cut), 0.0, p_hat)
    p_hi = 1.0 if p_hat == 1.0 or ll(1.0) >= ll_hat - cut else _bisect(lambda p: ll(p) - (ll_hat - cut), p_hat, 1.0)
    return MisreadEstimate(n, len(failed_k), not_checkable, sum(balanced_k) + sum(failed_k),
                           share, lo, hi, p_hat, p_lo, p_hi, level, MISREAD_MODEL)


def _only_unreadable(b: PageBalance) -> bool:
    """The page would have been checkable but for its unreadable amounts."""
    return any(ln.kind == TOTAL for ln in b.lines) or any(
        ln.kind == UNREADABLE and _label_kind(ln.label) == TOTAL for ln in b.lines)
