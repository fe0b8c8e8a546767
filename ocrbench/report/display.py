"""How a figure is written for people: one formatting function for the HTML, the console and the demo.

Why one function: every number the report shows in HTML or prints on the
console is written by :func:`fmt` from the value stored in the JSON summary,
so the two can never drift apart. Each HTML figure carries its JSON path
(``data-key``) and its format name (``data-fmt``), so anyone can check the
page against the summary.

Formats (``None``, NaN and infinities are written ``n/a``):

=========  ===================================  ==================
name       what                                 example
=========  ===================================  ==================
``pct``    a rate as a percentage, 2 decimals   ``0.01234`` → ``1.23 %``
``pct1``   a rate as a percentage, 1 decimal    ``0.5`` → ``50.0 %``
``int``    a whole number, thousands separated  ``180000`` → ``180,000``
``f1``     one decimal, thousands separated     ``1234.56`` → ``1,234.6``
``f2``     two decimals                         ``0.1234`` → ``0.12``
``f3``     three decimals                       ``0.01234`` → ``0.012``
``ms``     seconds written as milliseconds      ``0.0123`` → ``12.30 ms``
``dur``    seconds as a duration                ``9000`` → ``2.5 h``
``money``  an amount of money, 2 decimals       ``1234.5`` → ``1,234.50``
``p``      a p-value, 4 decimals                ``0.0321`` → ``0.0321``
``bool``   yes / no                             ``True`` → ``yes``
``text``   the value as it is                   ``ledger-ctc``
=========  ===================================  ==================

Durations: seconds below 10 with two decimals (``4.25 s``), below two
minutes whole (``42 s``), then minutes (``min``), hours (``h``), days (``d``)
and weeks (``w``) with one decimal, the largest unit that is at least two.
"""

from __future__ import annotations

import math
from typing import Any

__all__ = ["FORMATS", "fmt", "NA"]

NA = "n/a"

_DUR_UNITS = (("w", 7 * 86400.0), ("d", 86400.0), ("h", 3600.0), ("min", 60.0))


def _duration(seconds: float) -> str:
    for unit, size in _DUR_UNITS:
        if seconds >= 2 * size:
            return f"{seconds / size:,.1f} {unit}"
    return f"{seconds:.0f} s" if seconds >= 10 else f"{seconds:.2f} s"


FORMATS: dict[str, Any] = {
    "pct": lambda v: f"{100 * v:,.2f} %",
    "pct1": lambda v: f"{100 * v:,.1f} %",
    "int": lambda v: f"{int(round(v)):,d}",
    "f1": lambda v: f"{v:,.1f}",
    "f2": lambda v: f"{v:,.2f}",
    "f3": lambda v: f"{v:,.3f}",
    "ms": lambda v: f"{1000 * v:,.2f} ms",
    "dur": _duration,
    "money": lambda v: f"{v:,.2f}",
    "p": lambda v: f"{v:.4f}",
    "bool": lambda v: "yes" if v else "no",
    "text": str,
}


def fmt(value: Any, kind: str) -> str:
    """``value`` written in format ``kind`` (see the module docstring); ``n/a`` when there is no value."""
    try:
        writer = FORMATS[kind]
    except KeyError:
        raise ValueError(f"unknown display format {kind!r}; known: {', '.join(FORMATS)}") from None
    if value is None:
        return NA
    if kind == "text":
        return str(value)
    if kind == "bool":
        return writer(bool(value))
    try:
        v = float(value)
    except (TypeError, ValueError):
        return str(value)
    if not math.isfinite(v):
        return NA
    return writer(v)
