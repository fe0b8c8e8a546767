"""Console output shared by commands: how scores, intervals and characters are printed.

Only printing lives here (rich tables); every figure comes from the library's
summaries unchanged.
"""

from __future__ import annotations

import math

from rich.console import Console
from rich.table import Table

__all__ = ["show_char", "pct", "interval", "p_value", "wide_console", "print_scores", "print_comparisons"]


def show_char(ch: str) -> str:
    """A character as a person can read it in a table (spaces, line breaks and invisibles named)."""
    if ch == "":
        return "(none)"
    if ch == " ":
        return "space"
    if ch == "\n":
        return "line break"
    if not ch.isprintable() or ch.isspace():
        return f"U+{ord(ch):04X}"
    return ch


def pct(v: float | None) -> str:
    return "-" if v is None or (isinstance(v, float) and math.isnan(v)) else f"{100 * v:.2f}%"


def interval(lo: float | None, hi: float | None) -> str:
    return "-" if lo is None or hi is None else f"{100 * lo:.2f}% – {100 * hi:.2f}%"


def p_value(r: dict) -> str:
    """A comparison's p-value; "< floor" when it sits at the smallest value the resamples can give."""
    if r.get("p_value") is None:
        return "-"
    if r.get("p_at_floor"):
        return f"< {r['p_floor']:.3g}"
    return f"{r['p_value']:.3g}"


def wide_console() -> Console:
    """stdout; at least 132 columns when it is not a terminal (so piped tables do not fold)."""
    con = Console()
    return con if con.is_terminal else Console(width=max(con.width, 132))


def _figures(sm: dict) -> Table:
    t = Table(title=f"{sm['system']} — profile {sm['profile']}, {sm['pages']} pages", title_justify="left")
    t.add_column("figure")
    t.add_column("value", justify="right")
    t.add_column(f"{100 * sm['interval']['level']:g}% interval", justify="right")
    t.add_column("counts", justify="right")
    t.add_row("CER (corpus)", pct(sm["cer"]), interval(sm["cer_low"], sm["cer_high"]),
              f"{sm['char_edits']:,} edits / {sm['ref_chars']:,} chars")
    t.add_row("WER (corpus)", pct(sm["wer"]), interval(sm["wer_low"], sm["wer_high"]),
              f"{sm['word_edits']:,} edits / {sm['ref_words']:,} words")
    t.add_row("CER (page mean)", pct(sm["cer_page_mean"]), "-", "mean of page rates")
    if sm["subs"] is not None:
        t.add_row("substitutions / deletions / insertions", "", "",
                  f"{sm['subs']:,} / {sm['dels']:,} / {sm['ins']:,}")
    if sm["amounts"]:
        a = sm["amounts"]
        t.add_row("amounts with digits right", pct(a["share_right"]), interval(a["low"], a["high"]),
                  f"{a['right']:,} of {a['found']:,}")
    return t


def _classes(sm: dict) -> Table:
    c = Table(title="by character class (substitutions and deletions charged to the truth character; "
                    "insertions to the inserted one)", title_justify="left")
    for col in ("class", "truth chars", "errors", "error rate", "interval", "inserted"):
        c.add_column(col, justify="left" if col == "class" else "right")
    for name, v in sm["classes"].items():
        c.add_row(name, f"{v['ref_chars']:,}", f"{v['errors']:,}", pct(v["rate"]),
                  interval(v["low"], v["high"]), f"{v['inserted']:,}")
    return c


def _confusions(sm: dict, top: int) -> Table:
    f = Table(title=f"most frequent confusions (truth → recognised), top {top}", title_justify="left")
    for col in ("truth", "recognised", "kind", "count"):
        f.add_column(col, justify="right" if col == "count" else "left")
    for row in sm["confusions"][:top]:
        f.add_row(show_char(row["ref"]), show_char(row["hyp"]), row["op"], f"{row['count']:,}")
    return f


def print_scores(con: Console, sm: dict, top: int) -> None:
    """One system's corpus figures, classes and confusions (``sm``: its JSON report)."""
    con.print(_figures(sm))
    if sm["classes"]:
        con.print(_classes(sm))
    if sm["confusions"] and top:
        con.print(_confusions(sm, top))
    if sm["line_count_mismatch"]:
        n = len(sm["line_count_mismatch"])
        con.print(f"{n} page{'s' if n != 1 else ''} had different line counts and "
                  f"{'were' if n != 1 else 'was'} aligned as one text each.", markup=False, highlight=False)
    if sm.get("collections"):
        con.print(_collections(sm["collections"]))
    con.print(f"recipe: {sm['recipe']}", markup=False, highlight=False, style="dim", soft_wrap=True)


def _collections(rows: list[dict]) -> Table:
    t = Table(title="CER per collection (page folder)", title_justify="left")
    for col in ("collection", "pages", "characters", "CER", "interval"):
        t.add_column(col, justify="left" if col == "collection" else "right")
    for r in rows:
        t.add_row(r["collection"] or "(top)", str(r["pages"]), f"{r['ref_chars']:,}", pct(r["cer"]),
                  interval(r["cer_low"], r["cer_high"]))
    return t


def print_comparisons(con: Console, comparisons: list[dict]) -> None:
    """The paired CER comparisons, one row each."""
    c = Table(title="paired comparisons (CER, same pages)", title_justify="left")
    for col in ("a", "b", "CER a − b", "interval", "p-value", "better"):
        c.add_column(col)
    for r in comparisons:
        if "error" in r:
            c.add_row(r["a"], r["b"], "-", "-", "-", r["error"])
            continue
        c.add_row(r["a"], r["b"], pct(r["diff"]), interval(r["low"], r["high"]), p_value(r),
                  r["winner"] or "no clear difference")
    con.print(c)
