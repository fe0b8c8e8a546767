"""The plan's options side by side: single recognisers, quantised variants and routes at candidate thresholds;
the cost/CER frontier and the choice for a target CER.

An **option** is one way to read the archive with its total cost (compute plus
people's reading and correction, as the plan's rows split them) and its CER with
the 95 % interval:

* each recogniser of the calibration (a quantised variant is one of them, with its
  own measured times and CER; it is labelled with the card it was made from);
* each route ``FAST -> SLOW if doubt > X`` at the thresholds
  :mod:`ocrbench.planning.routes` evaluates (routed share and CER from per-line
  readings on the calibration pages, cost FAST + share x SLOW).

**Frontier**: the options no other option beats on both cost and CER (point
values): nothing else is at most as costly and at most as wrong, and better on one.

**Target** (``--target-cer``): the options whose CER *upper bound* (the high end
of the 95 % interval) is at most the target and that do not fail the deadline or
the budget; of those the one with the lowest total cost (P50) is chosen. When no
option meets it the plan says so and recommends nothing. When a total cost is not
known for every option (a part unpriced), options are compared by core-hours and
the plan says that money was not judged.
"""

from __future__ import annotations

import math
from typing import Callable, Mapping, Sequence

import pandas as pd

from ocrbench.errors import PlanError
from ocrbench.planning.decide import PlanInputs, money_text
from ocrbench.planning.routes import (RouteSpec, candidate_thresholds, check_named, evaluate_thresholds,
                                      load_route_lines, pair_names, route_row, routed_runs, variant_sources)

#: How the target is judged against an interval (named in every statement about it).
BOUND = "the upper end of the CER's 95 % interval"

_KEEP = ("recogniser", "kind", "profile", "route_fast", "route_slow", "threshold", "routed_share", "cer", "cer_low",
         "cer_high", "compute_cost", "people_cost", "cost", "cost_high", "core_hours", "wall_seconds_p50",
         "wall_seconds_p90", "people_hours", "meets_deadline", "meets_budget", "unpriced", "unknown")


def _pct(v) -> str:
    return "-" if v is None else f"{100 * v:.3f} %"


def option_of(row: Mapping, **extra) -> dict:
    """One option (the columns the comparison needs) from a plan row, named by the row's recogniser."""
    def clean(v):
        return None if isinstance(v, float) and v != v else v     # a table's missing number is NaN

    return {k: clean(row.get(k)) for k in _KEEP} | {"option": row["recogniser"]} | extra


def _route_options(table: pd.DataFrame, inputs: PlanInputs, stores: Sequence[tuple[str, str]], truth,
                   route: RouteSpec | None, auto: bool, seed: int, say: Callable[[str], None]) -> tuple[list, list]:
    """(route rows, notes): every route asked for, or (``auto``) every pair with readings on the same pages."""
    rows, notes = [], []
    by = {(r["recogniser"], r["profile"]): r for r in table.to_dict("records")}
    for store, profile in stores:
        names = [n for (n, p) in by if p == profile]
        if route is not None:
            check_named(route, names)
            pairs = [(route.fast, route.slow)]
        elif auto:
            pairs = pair_names(names)
        else:
            from ocrbench.planning.inputs import read_store_frames

            pairs = [(r["fast"], r["slow"]) for r in routed_runs(read_store_frames(store)["runs"])
                     if r["fast"] in names and r["slow"] in names]
            pairs = list(dict.fromkeys(pairs))
        for fast, slow in pairs:
            say(f"routes {fast} -> {slow}: shares and CER per threshold")
            rl = load_route_lines(store, fast, slow, truth)
            if rl is None:
                notes.append(f"route {fast} -> {slow} on {profile}: not evaluated, {slow} never read the pages "
                             f"{fast} read in {store}")
                continue
            xs = [route.threshold] if route is not None and route.threshold is not None else \
                candidate_thresholds(rl.lines["doubt"], extra=rl.measured)
            evals = evaluate_thresholds(rl, xs, seed=seed)
            if not evals:
                notes.append(f"route {fast} -> {slow}: no asked threshold can be evaluated ({rl.source}; "
                             f"thresholds from {rl.floor:g} up only)")
            fr, sr = by[(fast, profile)], by[(slow, profile)]
            if any(e["routed_lines"] == 0 for e in evals):
                notes.append(f"route {fast} -> {slow}: a threshold that routes no line is {fast} alone, left out")
            for e in _distinct(evals, rl.measured):
                acc = None if e["cer"] is None else (e["cer"], e["cer_low"], e["cer_high"])
                name = f"{fast} -> {slow} if doubt > {e['threshold']:.4g}"
                if any(r["recogniser"] == name for r in rows):          # thresholds alike to 4 digits
                    name = f"{fast} -> {slow} if doubt > {e['threshold']!r}"
                row = route_row(fr, sr, e["share"], acc, name=name,
                                correction=inputs.correction_for(fast), deadline_s=inputs.goals.deadline_s,
                                budget=inputs.goals.budget)
                row |= {"threshold": e["threshold"], "routed_lines": e["routed_lines"], "route_lines": e["lines"],
                        "pages_scored": e["pages_scored"], "route_source": rl.source}
                rows.append(row)
            if not rl.truth:
                notes.append(f"route {fast} -> {slow}: no ground truth for its pages, so no CER (give --truth)")
    return rows, notes


def _distinct(evals: Sequence[dict], measured: Sequence[float]) -> list[dict]:
    """One evaluation per set of routed lines (thresholds between the same two doubts route the same lines):
    a routed run's own threshold where it is one of them, else the lowest. Routing no line is FAST alone."""
    by: dict[int, dict] = {}
    for e in evals:
        k = e["routed_lines"]
        if k > 0 and (k not in by or any(math.isclose(e["threshold"], m, rel_tol=0, abs_tol=1e-12)
                                         for m in measured)):
            by[k] = e
    return sorted(by.values(), key=lambda e: e["threshold"])


def frontier(options: Sequence[Mapping], key: str) -> list[bool]:
    """For each option: True when no other option is at most as costly and as wrong, and better on one."""
    pts = [(o.get(key), o.get("cer")) for o in options]
    out = []
    for i, (c, e) in enumerate(pts):
        if c is None or e is None:
            out.append(False)
            continue
        out.append(not any(j != i and c2 is not None and e2 is not None and c2 <= c and e2 <= e and (c2 < c or e2 < e)
                           for j, (c2, e2) in enumerate(pts)))
    return out


def _judge(options: list[dict], target: float, key: str, currency: str | None) -> dict | None:
    """Mark the chosen option and why each other lost; the chosen option (None when none meets the target)."""
    def fmt(v) -> str:
        return money_text(v, currency) if key == "cost" else f"{v:,.1f} core-hours"

    ok = [o for o in options if o["cer_high"] is not None and o["cer_high"] <= target
          and o["meets_deadline"] is not False and o["meets_budget"] is not False and o.get(key) is not None]
    chosen = min(ok, key=lambda o: (o[key], o["cer"])) if ok else None
    for o in options:
        o["chosen"] = o is chosen
        if o is chosen:
            o["lost"] = None
        elif o["cer_high"] is None:
            o["lost"] = "no CER measured"
        elif o["cer_high"] > target:
            o["lost"] = f"CER up to {_pct(o['cer_high'])}, above the target {_pct(target)}"
        elif o["meets_deadline"] is False:
            o["lost"] = "misses the deadline"
        elif o["meets_budget"] is False:
            o["lost"] = "over the budget"
        elif o.get(key) is None:
            o["lost"] = "no cost known"
        else:
            o["lost"] = f"meets the target but costs {fmt(o[key] - chosen[key])} more"
    return chosen


def choose_for_target(options: list[dict], target: float, key: str = "cost",
                      currency: str | None = None) -> tuple[dict | None, str]:
    """(the chosen option or None, the statement saying so): the cheapest option by ``key`` whose CER upper bound
    is at most ``target`` and that fails neither deadline nor budget. Each option gets ``chosen`` and ``lost``."""
    chosen = _judge(options, target, key, currency)
    return chosen, _statement(chosen, options, target, key, currency)


def _statement(chosen: dict | None, options: list[dict], target: float, key: str, currency: str | None) -> str:
    if chosen is None:
        best = min((o for o in options if o["cer_high"] is not None), key=lambda o: o["cer_high"], default=None)
        tail = "" if best is None else (f"; the lowest upper bound is {best['option']}'s, {_pct(best['cer_high'])} "
                                        f"(CER {_pct(best['cer'])})")
        return (f"no option meets the target CER of {_pct(target)} ({BOUND}, and the deadline and budget where "
                f"given) among {len(options)} options{tail}: nothing is recommended; more accurate recognisers, "
                "or a larger ground-truth sample to narrow the intervals, are needed")
    why = sorted({w for o in options if o["cer"] is not None and o["cost"] is None
                  for w in list(o.get("unpriced") or []) + list(o.get("unknown") or [])})
    cost = (money_text(chosen["cost"], currency) + " in total (compute + people)" if key == "cost" else
            f"{chosen['core_hours']:,.1f} core-hours (money not judged: " + "; ".join(why) + ")")
    what = (f"{chosen['option']} (routes {100 * chosen['routed_share']:.1f} % of the lines to {chosen['route_slow']})"
            if chosen["kind"] == "route" else chosen["option"])
    return (f"for a target CER of {_pct(target)} ({BOUND}): {what}, CER {_pct(chosen['cer'])} "
            f"({_pct(chosen['cer_low'])}-{_pct(chosen['cer_high'])}), {cost}; the cheapest of "
            f"{sum(1 for o in options if not o['lost'] or o['lost'].startswith('meets'))} options meeting it, "
            f"of {len(options)}")


def plan_options(table: pd.DataFrame, inputs: PlanInputs, *, stores: Sequence[tuple[str, str]], truth,
                 route: RouteSpec | None = None, target_cer: float | None = None, seed: int = 0,
                 say: Callable[[str], None] = lambda _m: None) -> pd.DataFrame:
    """The table with ``attrs["options"]`` (every option, frontier marked) and, for a target CER,
    ``attrs["target"]`` and the recommendation replaced by the choice; a chosen route's row is appended.

    ``stores``: (calibration store, profile) pairs. Routes are evaluated for the route asked for, else
    for every pair of recognisers when a target CER and ground truth are given, else for the routed
    runs a store holds.
    """
    if target_cer is not None and not 0 <= target_cer < 1:
        raise PlanError(f"--target-cer must be a fraction within 0..1 (0.004 for 0.4 %), not {target_cer}")
    auto = target_cer is not None and truth is not None
    routes, notes = _route_options(table, inputs, stores, truth, route, auto, seed, say)
    variants = {}
    for store, _p in stores:
        variants |= variant_sources(store)
    singles = [option_of(r, kind=("variant of " + variants[r["recogniser"]]) if r["recogniser"] in variants
                       else r["kind"]) for r in table.to_dict("records")]
    options = singles + [option_of(r, pages_scored=r["pages_scored"], source=r["route_source"]) for r in routes]
    rated = [o for o in options if o["cer"] is not None]       # only these can meet a target
    key = "cost" if rated and all(o["cost"] is not None for o in rated) else "core_hours"
    for o, f in zip(options, frontier(options, key)):
        o["frontier"] = f
    table.attrs["options"] = options
    table.attrs["options_key"] = key
    table.attrs["options_notes"] = notes
    if target_cer is None:
        return table
    chosen, text = choose_for_target(options, target_cer, key, inputs.currency)
    table.attrs["target"] = {"target_cer": target_cer, "bound": BOUND, "compared_by": key,
                             "chosen": None if chosen is None else chosen["option"], "text": text}
    table.attrs["recommendation"] = {"recogniser": None if chosen is None else chosen["option"], "change": None,
                                     "target_cer": target_cer, "text": text}
    if chosen is not None and chosen["kind"] == "route":
        row = next(r for r in routes if r["recogniser"] == chosen["option"])
        table = pd.concat([table, pd.DataFrame([row])], ignore_index=True).pipe(_with_attrs, table.attrs)
    return table


def _with_attrs(df: pd.DataFrame, attrs: Mapping) -> pd.DataFrame:
    df.attrs.update(dict(attrs))
    return df


def has_options(plan: Mapping) -> bool:
    """Whether a plan (table attrs or the report's plan section) has options beyond its recognisers' rows:
    a route, or a target CER to choose for."""
    return bool(plan.get("target")) or any(o.get("kind") == "route" for o in plan.get("options") or [])


def option_statements(table: pd.DataFrame) -> list[tuple[str, str]]:
    """(kind, text) lines of the options: the singles, the frontier and the chosen one each with cost and CER and
    why it lost; the other (dominated) route thresholds counted by reason (``--json`` lists every one)."""
    opts = table.attrs.get("options") or []
    if not has_options(table.attrs):
        return []
    key, cur = table.attrs.get("options_key", "cost"), table.attrs.get("currency")
    out, rest = [], {}
    for o in sorted(opts, key=lambda o: (o.get(key) is None, o.get(key) or 0.0)):
        if o["kind"] == "route" and not o.get("frontier") and not o.get("chosen"):
            lost = o.get("lost") or ""
            why = ("with a CER above the target" if lost.startswith("CER up to") else
                   "meeting the target at a higher cost" if lost.startswith("meets") else
                   lost or "costlier or less accurate than an option on the frontier")
            rest[why] = rest.get(why, 0) + 1
            continue
        cost = (money_text(o[key], cur) if key == "cost" else f"{o[key]:,.1f} core-hours") \
            if o.get(key) is not None else "cost unknown"
        mark = "chosen" if o.get("chosen") else ("frontier" if o.get("frontier") else "dominated")
        share = f", {100 * o['routed_share']:.1f} % routed" if o["kind"] == "route" else ""
        why = f" — {o['lost']}" if o.get("lost") else ""
        out.append(("Option", f"[{mark}] {o['option']} ({o['kind']}{share}): {cost}, CER {_pct(o['cer'])} "
                              f"({_pct(o['cer_low'])}-{_pct(o['cer_high'])}){why}"))
    if rest:
        out.append(("Option", f"{sum(rest.values())} other route thresholds off the frontier: "
                              + "; ".join(f"{n} {w}" for w, n in sorted(rest.items()))))
    out += [("Option", n) for n in table.attrs.get("options_notes") or []]
    return out
