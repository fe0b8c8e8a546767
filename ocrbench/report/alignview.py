"""Line-level alignment of reference and hypothesis, laid out for reading (HTML and plain text).

Why three rows: a reader checking a recogniser wants to see *where* it went
wrong, not only how often. Each aligned line is written as three rows of a
fixed-width block::

    truth  Cash from bank   12.50
    read   Cash fr·m bank   12.5O
    edit          D             S

The ``edit`` row names every edit with a letter, so the view reads the same
printed in grey, photocopied, or through a screen reader: ``S``
substitution (a truth character read as another), ``D`` deletion (a truth
character missing from the reading), ``I`` insertion (a character in the
reading that the truth does not have). Where one side has no character the
column holds a gap mark ``·``. In HTML the edited characters are also marked
by shape (substitution: double underline; deletion: struck through;
insertion: dotted box), never by colour alone.

The alignment is the accuracy module's minimal edit script
(:func:`ocrbench.accuracy.align.edits`), so the marked edits are the ones
counted in the CER. Every character of page or ground-truth text is
HTML-escaped before it is written.
"""

from __future__ import annotations

import html
import unicodedata
from dataclasses import dataclass
from typing import Sequence

from ocrbench.accuracy.align import edits

__all__ = ["Column", "align_columns", "split_rows", "columns_html", "columns_text", "GAP", "LEGEND"]

GAP = "\u00b7"          # middle dot: no character on this side
HIT, SUB, DEL, INS = "=", "S", "D", "I"

#: Characters that would break a fixed-width row, shown by a visible stand-in.
_VISIBLE = {"\n": "\u23ce", "\t": "\u2192", "\r": "\u240d", "\f": "\u240c", "\v": "\u240b"}
#: An edited space (inserted, deleted or substituted) would be an empty mark: shown as an open box.
SPACE_MARK = "\u2423"
#: An edited character with no visible shape (other spaces, format and control characters).
INVISIBLE_MARK = "\u00a4"

LEGEND = (
    ("S", "substitution", "a character of the truth read as another (double underline)"),
    ("D", "deletion", "a character of the truth missing from the reading (struck through)"),
    ("I", "insertion", "a character in the reading that the truth does not have (dotted box)"),
    (GAP, "gap", "no character on this side of the alignment"),
    (SPACE_MARK, "space", "an edited space (a plain space would leave the mark empty)"),
    (INVISIBLE_MARK, "invisible", "an edited character with no visible shape (hover for its code point)"),
)


@dataclass(frozen=True)
class Column:
    """One aligned position: the truth character, the read character (None for a gap) and the edit."""

    ref: str | None
    hyp: str | None
    op: str          # "=", "S", "D" or "I"


def align_columns(ref: str, hyp: str) -> list[Column]:
    """The columns of a minimal alignment of ``ref`` (truth) and ``hyp`` (reading).

    Reading the ``ref`` characters of the columns gives ``ref`` back, reading
    the ``hyp`` characters gives ``hyp`` back, and the number of non-hit
    columns equals the Levenshtein distance.
    """
    cols: list[Column] = []
    i = j = 0
    for e in edits(ref, hyp):          # rapidfuzz gives the script in order along both strings
        while i < e.ref_pos and j < e.hyp_pos:
            cols.append(Column(ref[i], hyp[j], HIT))
            i += 1
            j += 1
        if i != e.ref_pos or j != e.hyp_pos:
            raise ValueError(f"edit script out of step at {e} (ref {i}, hyp {j})")
        if e.op == "sub":
            cols.append(Column(ref[i], hyp[j], SUB))
            i += 1
            j += 1
        elif e.op == "del":
            cols.append(Column(ref[i], None, DEL))
            i += 1
        else:
            cols.append(Column(None, hyp[j], INS))
            j += 1
    if len(ref) - i != len(hyp) - j:
        raise ValueError("edit script leaves unequal tails")
    while i < len(ref):
        cols.append(Column(ref[i], hyp[j], HIT))
        i += 1
        j += 1
    return cols


def split_rows(cols: Sequence[Column]) -> list[list[Column]]:
    """Break a page-long alignment into display rows after every line break of either side."""
    rows: list[list[Column]] = [[]]
    for c in cols:
        rows[-1].append(c)
        if c.ref == "\n" or c.hyp == "\n":
            rows.append([])
    return [r for r in rows if r]


def _visible(ch: str | None) -> str:
    if ch is None:
        return GAP
    return _VISIBLE.get(ch, ch)


def _visible_edit(ch: str) -> str:
    """An edited character as a visible one-column mark: spaces and invisible characters get a stand-in."""
    if ch in _VISIBLE:
        return _VISIBLE[ch]
    if ch == " ":
        return SPACE_MARK
    if unicodedata.category(ch) in ("Zs", "Zl", "Zp", "Cf", "Cc", "Cn", "Co", "Mn", "Me"):
        return INVISIBLE_MARK
    return ch


def _describe(ch: str) -> str:
    return f"U+{ord(ch):04X} {unicodedata.name(ch, 'unnamed character')}"


_CLASS = {SUB: "e-sub", DEL: "e-del", INS: "e-ins"}


def _row_html(cols: Sequence[Column], side: str) -> str:
    """One row (``ref``, ``hyp`` or ``op``) as escaped HTML; runs of hits are written as plain text."""
    out: list[str] = []
    plain: list[str] = []

    def flush() -> None:
        if plain:
            out.append(html.escape("".join(plain)))
            plain.clear()

    for c in cols:
        if side == "op":
            if c.op == HIT:
                plain.append(" ")
            else:
                flush()
                out.append(f'<b class="{_CLASS[c.op]}-mark">{c.op}</b>')
            continue
        ch = c.ref if side == "ref" else c.hyp
        if c.op == HIT:
            plain.append(_visible(ch))
            continue
        flush()
        if ch is None:
            out.append(f'<span class="gap">{GAP}</span>')
        else:
            out.append(f'<span class="{_CLASS[c.op]}" title="{html.escape(_describe(ch), quote=True)}">'
                       f"{html.escape(_visible_edit(ch))}</span>")
    flush()
    return "".join(out)


def columns_html(cols: Sequence[Column], *, labels: tuple[str, str, str] = ("truth", "read", "edit")) -> str:
    """The three-row block for one aligned line (or a page broken into rows), as HTML."""
    width = max(len(x) for x in labels) + 1
    lab = [html.escape(x.ljust(width)) for x in labels]    # padded so the rows line up as plain text too
    blocks = []
    for row in split_rows(cols) or [[]]:
        lines = [f'<span class="lab">{lab[0]}</span>{_row_html(row, "ref")}',
                 f'<span class="lab">{lab[1]}</span>{_row_html(row, "hyp")}',
                 f'<span class="lab">{lab[2]}</span>{_row_html(row, "op")}']
        blocks.append("\n".join(lines))
    return '<pre class="align">' + "\n\n".join(blocks) + "</pre>"


def _shown(ch: str | None, op: str) -> str:
    return _visible(ch) if ch is None or op == HIT else _visible_edit(ch)


def columns_text(cols: Sequence[Column]) -> str:
    """The same three rows as plain text (for consoles and tests)."""
    rows = []
    for row in split_rows(cols) or [[]]:
        rows.append("truth " + "".join(_shown(c.ref, c.op) for c in row))
        rows.append("read  " + "".join(_shown(c.hyp, c.op) for c in row))
        rows.append("edit  " + "".join(" " if c.op == HIT else c.op for c in row))
    return "\n".join(rows)
