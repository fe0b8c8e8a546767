"""Start-up and the time between pages, read from a run store's timestamps.

The store writes ISO 8601 timestamps (``datetime.isoformat``); newer stores
keep microseconds, older ones whole seconds. Both are read with
:func:`datetime.datetime.fromisoformat`. Only timestamps with a fractional
second can show start-up and the gaps between pages (a page takes a fraction of
a second); with whole seconds the planner falls back to a timed session
(``ocrbench measure-scaling``) or leaves them out, and says so.
"""

from __future__ import annotations

from datetime import datetime, timezone
from typing import Sequence

import numpy as np
import pandas as pd

#: Note given when a store's timestamps have no fraction of a second.
WHOLE_SECONDS_NOTE = ("the store's timestamps are whole seconds (a store written before microsecond "
                      "timestamps): the time between pages (store writes, hashing) and the start-up are not in "
                      "this model; measure a session with `ocrbench measure-scaling` to include them")


def parse_timestamp(text) -> datetime | None:
    """An ISO 8601 timestamp (with or without microseconds) as an aware datetime; None when unreadable."""
    if text is None or (isinstance(text, float) and np.isnan(text)):
        return None
    try:
        t = datetime.fromisoformat(str(text).strip())
    except ValueError:
        return None
    return t if t.tzinfo is not None else t.replace(tzinfo=timezone.utc)


def has_fraction(text) -> bool:
    """True when a timestamp resolves fractions of a second."""
    t = parse_timestamp(text)
    return t is not None and "." in str(text).split("T")[-1]


def page_key(run_id, page_id) -> str:
    return f"{int(run_id)}\x00{page_id}"


def _startup(runs: pd.DataFrame, rid: int, first_finished: datetime, first_total: float) -> float | None:
    started = runs.loc[runs["run_id"] == rid, "started_at"]
    t0 = parse_timestamp(started.iloc[0]) if len(started) else None
    if t0 is None:
        return None
    return (first_finished - t0).total_seconds() - first_total


def timeline(runs: pd.DataFrame, pages: pd.DataFrame,
             run_ids: Sequence[int]) -> tuple[dict[str, float], float | None, list[str]]:
    """Per-page gap (time between pages outside each page's own t_total) and start-up, from timestamps.

    Only used when the store's timestamps resolve fractions of a second and a
    run's pages are not interleaved with another run's (several recognisers in
    one command share each page's loading, so the gap is not theirs alone).
    Returns ``({page key: gap}, startup or None, notes)``.
    """
    notes: list[str] = []
    mine = pages[pages["run_id"].isin(list(run_ids))]
    if mine.empty:
        return {}, None, notes
    if not any(has_fraction(v) for v in mine["finished_at"]):
        notes.append(WHOLE_SECONDS_NOTE)
        return {}, None, notes
    done = pages[pages["status"] == "done"].copy()
    done["_fin"] = [parse_timestamp(v) for v in done["finished_at"]]
    done = done[done["_fin"].notna() & done["t_total"].notna()].sort_values("_fin", kind="stable")
    other = done["run_id"].shift(1)
    gaps: dict[str, float] = {}
    interleaved = False
    startups = []
    for rid in run_ids:
        idx = done.index[done["run_id"] == rid]
        if len(idx) == 0:
            continue
        d = done.loc[idx]
        if (other.loc[idx[1:]] != rid).any():
            interleaved = True
            continue
        fin = list(d["_fin"])
        tot = d["t_total"].astype(float).to_numpy()
        for k in range(1, len(fin)):
            r, p = d["run_id"].iloc[k], d["page_id"].iloc[k]
            gaps[page_key(r, p)] = float(max(0.0, (fin[k] - fin[k - 1]).total_seconds() - tot[k]))
        su = _startup(runs, rid, fin[0], float(tot[0]))
        if su is not None:
            startups.append(su)
    if interleaved:
        notes.append("several recognisers took turns on each page in the calibration run: the time between "
                     "pages is not attributed (measure a session per recogniser with `ocrbench measure-scaling`)")
    su = float(max(0.0, np.median(startups))) if startups else None
    return gaps, su, notes
