"""Line-level alignment of reference and hypothesis, laid out for reading.

The report shows each line **as it was read**, with the edits against the
truth marked inline (:func:`inline_html`): a character read as another is
bold and underlined twice, with the truth character in its title (shown on
hover); a truth character the reading misses is shown struck through where it
belongs; a character the reading adds is shaded in a dotted box. Marks are
shapes, never colour alone, so the view reads the same printed in grey. An
edited space is shown as ``\u2423`` and an edited character with no visible
shape as ``\u00a4``, with its code point in the title. A legend in words goes
with the view.

:func:`columns_text` writes the same alignment as plain text for consoles
and tests (truth row, reading row, one edit letter per position).

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

__all__ = ["Column", "align_columns", "split_rows", "columns_html", "columns_text", "inline_html", "GAP", "LEGEND",
           "INLINE_LEGEND", "SPACE_MARK", "INVISIBLE_MARK"]

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


# --------------------------------------------------------------------------- the report's view: the line as read

#: What the marks of :func:`inline_html` mean, in words (mark's CSS class, name, meaning).
INLINE_LEGEND = (
    ("sub", "read as another", "a character the recogniser read wrongly: shown as read, bold and underlined "
                               "twice; point at it to see the truth character"),
    ("del", "missing", "a truth character the reading leaves out: shown struck through where it belongs"),
    ("ins", "added", "a character the reading has and the truth does not: shaded in a dotted box"),
    ("mark", f"{SPACE_MARK} and {INVISIBLE_MARK}", "an edited space, and an edited character with no visible "
                                                   "shape (point at it for its code point)"),
)


def _char_title(text: str) -> str:
    """Characters for a title: as they are when all are visible, else each named by its code point."""
    if all(ch.isprintable() and not ch.isspace() for ch in text):
        return text
    return ", ".join(_describe(ch) for ch in text)


def inline_html(cols: Sequence[Column]) -> str:
    """The line as read, with the edits marked inline (HTML; every character escaped).

    Hits are plain text; substituted characters show as read (``<mark class="sub">``, the truth
    characters in the title); missing truth characters show struck through where they belong
    (``<del>``); added characters show in ``<mark class="ins">``. A run of edits of one kind is one
    mark. Edited spaces and invisible characters get a visible one-character stand-in, with their
    code points in the title.
    """
    out: list[str] = []
    k = 0
    while k < len(cols):
        op = cols[k].op
        end = k
        while end < len(cols) and cols[end].op == op:
            end += 1
        run = cols[k:end]
        k = end
        read = "".join(c.hyp or "" for c in run)
        truth = "".join(c.ref or "" for c in run)
        if op == HIT:
            out.append(html.escape("".join(_VISIBLE.get(ch, ch) for ch in read)))
            continue
        shown = html.escape("".join(_visible_edit(ch) for ch in (truth if op == DEL else read)))
        if op == SUB:
            title = f"read {_char_title(read)} where the truth has {_char_title(truth)}"
            out.append(f'<mark class="sub" title="{html.escape(title, quote=True)}">{shown}</mark>')
        elif op == DEL:
            title = f"missing from the reading: {_char_title(truth)}"
            out.append(f'<del title="{html.escape(title, quote=True)}">{shown}</del>')
        else:
            title = f"added by the reading: {_char_title(read)}"
            out.append(f'<mark class="ins" title="{html.escape(title, quote=True)}">{shown}</mark>')
    return '<p class="al">' + "".join(out) + "</p>"
