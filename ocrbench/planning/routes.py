"""Routes as plan options: per-line readings of two recognisers, the routed share and CER of each threshold,
and the route's cost from the two recognisers' plan rows.

A route ``FAST -> SLOW if doubt > X`` (:mod:`ocrbench.run.route`) reads every
line with FAST and re-reads with SLOW the lines whose doubt (the review queue's,
computed from FAST's reading) is above X. For the planner:

* **share** of lines routed at X: measured on every line FAST read in the
  calibration store (a routed run's SLOW run holds exactly these lines);
* **accuracy** at X: the calibration pages with ground truth, each line taking
  SLOW's reading where routed and FAST's elsewhere, scored as ``score`` scores
  (:func:`ocrbench.accuracy.score.score_pages`, corpus CER with its page-bootstrap
  interval). SLOW's readings come from a plain (or routed-FAST) run of SLOW on the
  same pages, which has every line, or else from a routed run's SLOW run, which
  has the routed lines only: then only thresholds at or above the routed run's
  are evaluated (a lower one would route lines SLOW never read);
* **cost** (:func:`route_compute`): FAST on every line plus SLOW on the routed
  share, ``fast + share * slow`` for wall-clock percentiles, core-hours and
  compute cost (:func:`ocrbench.run.route.expected_cost`). Percentiles are added
  because both recognisers read the same pages (their times rise and fall
  together); SLOW's page loading and segmenting, which a routed run does once, is
  counted on the share too, so the figure errs high by that much.

The thresholds tried (:func:`candidate_thresholds`) are the distinct quantiles
of FAST's line doubts at 5 %, 10 %, ..., 95 %, so the routed shares run from
about 95 % down to 5 %, plus any threshold asked for or measured by a routed run.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from ocrbench.errors import ConfigError, PlanError
from ocrbench.planning.people import Correction, both, budget_fit, effort, money, schedule
from ocrbench.run.route import SYNTAX, expected_cost, line_doubts, parse_route

#: Quantiles of FAST's line doubts tried as thresholds (doubt > the quantile is routed).
QUANTILES = tuple(round(0.05 * k, 2) for k in range(1, 20))


# --------------------------------------------------------------------------- the route asked for


@dataclass(frozen=True)
class RouteSpec:
    """A route named for the plan: FAST and SLOW (recogniser names); the threshold, or None to choose one."""

    fast: str
    slow: str
    threshold: float | None = None

    def __str__(self) -> str:
        tail = "" if self.threshold is None else f" if doubt > {self.threshold:g}"
        return f"{self.fast} -> {self.slow}{tail}"


def parse_plan_route(text: str, *, source: str = "--route") -> RouteSpec:
    """``"a -> b if doubt > 0.3"`` (the run's syntax) or ``"a -> b"`` (the planner chooses the threshold)."""
    parts = (text or "").split("->")
    if len(parts) == 2 and parts[0].strip() and parts[1].strip() and not re.search(r"\bdoubt\b", parts[1], re.I):
        fast, slow = parts[0].strip(), parts[1].strip()
        if fast == slow:
            raise ConfigError(source, f"FAST and SLOW are both {fast!r}; a route needs two recognisers")
        return RouteSpec(fast, slow)
    try:
        r = parse_route(text)
    except ConfigError as e:
        raise ConfigError(source, f"cannot read {text!r}; write '{SYNTAX}', or 'FAST -> SLOW' to let the plan "
                                  "choose the threshold") from e
    return RouteSpec(r.fast, r.slow, r.threshold)


def route_from_table(t: Mapping | None, source: Path | str) -> RouteSpec | None:
    """A plan file's checked ``[route]`` table (``fast``, ``slow``, optional ``threshold``) as a RouteSpec."""
    if not t or all(v is None for v in t.values()):
        return None
    missing = [k for k in ("fast", "slow") if not t.get(k)]
    if missing:
        raise ConfigError(source, f"route.{missing[0]} is needed: a route names FAST and SLOW recognisers")
    if t["fast"] == t["slow"]:
        raise ConfigError(source, f"route.fast and route.slow are both {t['fast']!r}; a route needs two recognisers")
    x = t.get("threshold")
    return RouteSpec(str(t["fast"]), str(t["slow"]), None if x is None else float(x))


# --------------------------------------------------------------------------- readings in a store


def _settings(row: Mapping) -> dict:
    try:
        return json.loads(row.get("settings_json") or "{}")
    except (TypeError, ValueError):
        return {}


def reading_runs(runs: pd.DataFrame) -> pd.DataFrame:
    """The runs that read every line of their pages: not a route's kept text, not a route's SLOW re-reading."""
    if runs.empty:
        return runs
    keep = [(r.get("kind") != "route") and _settings(r).get("route_role") != "slow" for r in runs.to_dict("records")]
    return runs[np.asarray(keep, dtype=bool)]


def calibration_runs(runs: pd.DataFrame) -> pd.DataFrame:
    """The runs a cost model may be fitted on: :func:`reading_runs`, and a route's SLOW re-reading for a
    recogniser that has no other run (its batches are timed like any run's, on the routed lines only)."""
    full = reading_runs(runs)
    slow = runs[[_settings(r).get("route_role") == "slow" for r in runs.to_dict("records")]] if len(runs) else runs
    return pd.concat([full, slow[~slow["recogniser"].isin(set(full["recogniser"]))]]).sort_values("run_id")


def routed_runs(runs: pd.DataFrame) -> list[dict]:
    """Each route run of a store: fast and slow recogniser names, threshold, and the three run ids."""
    out = []
    rows = runs.to_dict("records")
    for r in rows:
        if r.get("kind") != "route":
            continue
        s = _settings(r)
        try:
            x = parse_route(s.get("route", "")).threshold
        except ConfigError:
            continue
        def role(q: Mapping, name: str, hash_key: str) -> bool:
            qs = _settings(q)
            return qs.get("route") == s.get("route") and qs.get("route_role") == name and \
                q.get("card_hash") == s.get(hash_key)

        f = [q for q in rows if role(q, "fast", "route_fast")]
        sl = [q for q in rows if role(q, "slow", "route_slow")]
        if f and sl:
            out.append({"fast": f[-1]["recogniser"], "slow": sl[-1]["recogniser"], "threshold": x,
                        "run_id": int(r["run_id"]), "fast_run": int(f[-1]["run_id"]),
                        "slow_run": int(sl[-1]["run_id"])})
    return out


@dataclass
class RouteLines:
    """Per-line readings of a candidate route on the calibration pages.

    ``lines``: page_id, line_no, doubt (from FAST's reading), fast, slow (None where
    SLOW did not read the line). ``truth``: page id -> truth lines, for the pages
    scored. ``floor``: the lowest threshold every routed line has a SLOW reading for
    (-inf when SLOW read every line).
    """

    fast: str
    slow: str
    store: str
    lines: pd.DataFrame
    truth: dict[str, list[str]]
    floor: float = -math.inf
    measured: list[float] = field(default_factory=list)   # thresholds of routed runs in the store
    source: str = ""


def _page_readings(st, run_id: int, pages: Sequence[str]) -> dict[str, list[tuple]]:
    return {p: st.page_lines(run_id, p) for p in pages}


def load_route_lines(store_path: Path | str, fast: str, slow: str, truth_dir: Path | str | None) -> RouteLines | None:
    """FAST's and SLOW's line readings on the same pages of a store (None when SLOW never read FAST's pages)."""
    from ocrbench.accuracy.evaluate import read_truth_pages
    from ocrbench.store import RunStore

    with RunStore(store_path, read_only=True) as st:
        frames = st.read_frames()
        runs = frames["runs"]
        full = reading_runs(runs)
        f_runs, s_runs = full[full["recogniser"] == fast], full[full["recogniser"] == slow]
        if f_runs.empty:
            return None
        fid = int(f_runs["run_id"].iloc[-1])
        routes = [r for r in routed_runs(runs) if r["fast"] == fast and r["slow"] == slow]
        if not s_runs.empty:
            sid, floor = int(s_runs["run_id"].iloc[-1]), -math.inf
            source = f"{fast} run {fid} and {slow} run {sid} (every line read by both)"
        elif routes:
            sid, floor = routes[-1]["slow_run"], routes[-1]["threshold"]
            fid = routes[-1]["fast_run"]
            source = (f"routed run {routes[-1]['run_id']} ({fast} run {fid}; {slow} run {sid} re-read the lines "
                      f"above doubt {floor:g})")
        else:
            return None
        pages = sorted(set(st.done_page_ids(fid)) & set(st.done_page_ids(sid)))
        if not pages:
            return None
        fr, sr = _page_readings(st, fid, pages), _page_readings(st, sid, pages)
    rows = []
    for p in pages:
        f_lines = fr[p]
        d = line_doubts([x[1] for x in f_lines], [x[2] for x in f_lines])
        s_by = {x[0]: x[1] for x in sr[p]}
        rows += [{"page_id": p, "line_no": no, "doubt": float(dd), "fast": t, "slow": s_by.get(no)}
                 for (no, t, _c, _cc), dd in zip(f_lines, d)]
    truth = {}
    if truth_dir is not None:
        truth, _pairing, _bad = read_truth_pages(truth_dir, pages)
    return RouteLines(fast, slow, str(store_path), pd.DataFrame(rows, columns=["page_id", "line_no", "doubt", "fast",
                                                                               "slow"]),
                      truth, floor, [r["threshold"] for r in routes], source)


# --------------------------------------------------------------------------- thresholds


def candidate_thresholds(doubts: Sequence[float] | np.ndarray, extra: Sequence[float] = ()) -> list[float]:
    """Distinct doubt quantiles (:data:`QUANTILES`) of FAST's lines, plus ``extra``, ascending."""
    d = np.asarray(doubts, dtype=float)
    qs = [float(v) for v in np.quantile(d, QUANTILES)] if d.size else []
    return sorted({round(v, 12) for v in qs} | {float(x) for x in extra if x is not None})


def evaluate_thresholds(rl: RouteLines, thresholds: Sequence[float], *, n_boot: int = 1000,
                        seed: int = 0) -> list[dict]:
    """Routed share and CER (with interval) of the route at each threshold it can be evaluated at.

    Share: lines with doubt above X among every FAST line of the pages read by both.
    CER: the pages with ground truth, lines routed taking SLOW's reading, scored by
    ``score_pages`` (NFC profile, corpus CER, page bootstrap) as ``score`` does.
    A threshold that would route a line SLOW never read is skipped.
    """
    from ocrbench.accuracy.score import score_pages

    ln = rl.lines
    doubt = ln["doubt"].to_numpy(dtype=float)
    has_slow = ln["slow"].notna().to_numpy()
    out = []
    for x in thresholds:
        routed = doubt > x
        if (routed & ~has_slow).any():
            continue
        row = {"threshold": float(x), "routed_lines": int(routed.sum()), "lines": int(len(ln)),
               "share": float(routed.mean()) if len(ln) else 0.0, "cer": None, "cer_low": None, "cer_high": None,
               "pages_scored": 0}
        if rl.truth:
            kept = np.where(routed, ln["slow"].fillna("").to_numpy(dtype=object), ln["fast"].to_numpy(dtype=object))
            pages = [(p, rl.truth[p], [str(t) for t in kept[idx]])
                     for p, idx in ln.groupby("page_id", sort=True).indices.items() if p in rl.truth]
            if pages:
                s = score_pages(pages, classes=False, n_boot=n_boot, seed=seed).summary
                row |= {"cer": s.get("cer"), "cer_low": s.get("cer_low"), "cer_high": s.get("cer_high"),
                        "pages_scored": len(pages)}
        out.append(row)
    return out


# --------------------------------------------------------------------------- cost of a route

#: Compute columns of a plan row that a route sums as FAST + share x SLOW.
ADDITIVE = ("wall_seconds_p10", "wall_seconds_p50", "wall_seconds_p90", "core_hours", "core_hours_p90",
            "compute_cost", "compute_cost_p90", "startup_seconds")


def route_compute(fast_row: Mapping, slow_row: Mapping, share: float) -> dict:
    """The compute columns of a route: FAST on every line + SLOW on ``share`` of them (``fast + share * slow``).

    Money is None when either recogniser's compute is unpriced.
    """
    out = {}
    for k in ADDITIVE:
        a, b = fast_row.get(k), slow_row.get(k)
        out[k] = None if a is None or b is None else expected_cost(float(a), float(b), share)
    return out


def route_row(fast_row: Mapping, slow_row: Mapping, share: float, accuracy: tuple | None, *, name: str,
              correction: Correction, deadline_s: float | None, budget: float | None) -> dict:
    """A full plan row for a route: its compute (:func:`route_compute`), then errors, people, money and goals
    worked as for a single recogniser, on FAST's archive (lines, characters)."""
    row = dict(fast_row) | route_compute(fast_row, slow_row, share)
    row |= {"recogniser": name, "kind": "route", "routed_share": share, "route_fast": fast_row["recogniser"],
            "route_slow": slow_row["recogniser"], "band_drift_share": None, "p_meets_deadline": None,
            "p_recognition_meets_deadline": None, "gt_sample_pages": None,
            "extrapolated": bool(fast_row.get("extrapolated") or slow_row.get("extrapolated")),
            "warnings": list(dict.fromkeys([*(fast_row.get("warnings") or []), *(slow_row.get("warnings") or [])]))}
    chars = float(row["characters"])
    if accuracy is None:
        errs = None
        row |= {k: None for k in ("cer", "cer_low", "cer_high", "char_errors", "char_errors_low", "char_errors_high")}
    else:
        cer, lo, hi = accuracy
        errs = (cer * chars, lo * chars, hi * chars)
        row |= {"cer": cer, "cer_low": lo, "cer_high": hi, "char_errors": errs[0], "char_errors_low": errs[1],
                "char_errors_high": errs[2]}
    row |= effort(correction, row["lines"], chars, errs)
    row |= schedule(correction, row["people_hours_high"], deadline_s)
    row |= money((row["compute_cost"], row["compute_cost_p90"]), row, correction.price_hour)
    if deadline_s is not None:
        rec_ok = bool(row["wall_seconds_p90"] <= deadline_s)
        row |= {"deadline_seconds": deadline_s, "recognition_meets_deadline": rec_ok,
                "meets_deadline": both(rec_ok, row["correction_meets_deadline"])}
    row["budget"] = budget
    row["meets_budget"] = budget_fit(row, budget)
    return row


def pair_names(names: Sequence[str]) -> list[tuple[str, str]]:
    """Every ordered pair of distinct names (each recogniser as FAST with each other as SLOW)."""
    return [(a, b) for a in names for b in names if a != b]


def check_named(spec: RouteSpec, names: Sequence[str]) -> None:
    """PlanError unless both of the route's recognisers are among the calibrated ones."""
    for n in (spec.fast, spec.slow):
        if n not in names:
            raise PlanError(f"the route {spec} names {n!r}, which is none of the calibrated recognisers "
                            f"({', '.join(names)})")


def variant_sources(store_path: Path | str) -> dict[str, str]:
    """Recogniser name -> the name of the card it was quantised from, for the variants a store's runs used."""
    from ocrbench.errors import OcrbenchError
    from ocrbench.recognisers.card import load_card
    from ocrbench.store import RunStore

    with RunStore(store_path, read_only=True) as st:
        runs = reading_runs(st.read_frames()["runs"])
    out = {}
    for name, path in zip(runs["recogniser"], runs["card_path"]):
        try:
            v = load_card(path).variant if isinstance(path, str) and path else None
        except (OcrbenchError, OSError, ValueError):
            v = None
        if v and v.get("source_name"):
            out[str(name)] = str(v["source_name"])
    return out
