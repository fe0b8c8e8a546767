"""Decisions on the estimates: deadline and budget fit, the recommended option, the seq/CTC crossover.

:func:`make_plan` is the planner's pure core: fitted models and a
:class:`PlanInputs` in, the side-by-side table out.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from ocrbench.errors import PlanError
from ocrbench.planning.archive import Archive
from ocrbench.planning.costmodel import DEFAULT_SECONDS_PER_ERROR, CostModel
from ocrbench.planning.estimate import (SPEED_DRIFT, AccuracyInput, Correction, Goals, Option, Resources,
                                        SerialEstimate, estimate_serial, evaluate_option)
from ocrbench.planning.numerics import ScalingFit, format_duration

# --------------------------------------------------------------------------- crossover


def crossover(seq: CostModel, ctc: CostModel, *, max_chars: int | None = None) -> dict:
    """Characters per line at which the autoregressive model's time per line overtakes the CTC one's.

    Both time-per-line curves come from the fitted models (full batches, no
    page overhead); the difference is solved for its sign changes on 1..max
    characters, refined by bisection.
    """
    top = int(max_chars or min(seq.max_tokens - 1, 400))
    if seq.width is None or ctc.width is None:
        return {"seq": seq.recogniser, "ctc": ctc.recogniser, "profile": seq.profile, "chars": None, "always": None,
                "text": f"crossover of {seq.recogniser} and {ctc.recogniser} not computed: line width per "
                        "character was not fitted"}
    c = np.arange(1, top + 1, dtype=float)
    d = seq.line_time(c) - ctc.line_time(c)
    out = {"seq": seq.recogniser, "ctc": ctc.recogniser, "profile": seq.profile, "max_chars": top,
           "seq_line_s_at_40": float(seq.line_time(40.0)[0]), "ctc_line_s_at_40": float(ctc.line_time(40.0)[0])}
    if (d > 0).all():
        out |= {"chars": None, "text": f"on {seq.profile}, {seq.recogniser} takes longer per line than "
                f"{ctc.recogniser} at every length from 1 to {top} characters "
                f"(at 40 characters: {1000 * out['seq_line_s_at_40']:.1f} ms vs {1000 * out['ctc_line_s_at_40']:.1f} ms)"}
        out["always"] = "seq slower"
        return out
    if (d <= 0).all():
        out |= {"chars": None, "always": "seq faster",
                "text": f"on {seq.profile}, {seq.recogniser} is no slower per line than {ctc.recogniser} "
                f"up to {top} characters"}
        return out
    i = int(np.flatnonzero((d[:-1] <= 0) & (d[1:] > 0))[0]) if ((d[:-1] <= 0) & (d[1:] > 0)).any() else None
    if i is None:   # seq slower at short lines, faster at long: report the first sign change
        i = int(np.flatnonzero(np.sign(d[:-1]) != np.sign(d[1:]))[0])
    lo, hi = c[i], c[i + 1]
    f = lambda x: float(seq.line_time(x)[0] - ctc.line_time(x)[0])  # noqa: E731
    for _ in range(60):
        mid = (lo + hi) / 2
        if (f(mid) > 0) == (f(hi) > 0):
            hi = mid
        else:
            lo = mid
    x = (lo + hi) / 2
    direction = "overtakes" if f(hi) > 0 else "falls below"
    out |= {"chars": x, "always": None,
            "text": f"on {seq.profile}, {seq.recogniser}'s time per line {direction} {ctc.recogniser}'s at "
            f"{x:.1f} characters per line ({1000 * seq.line_time(x)[0]:.2f} ms per line)"}
    return out


# --------------------------------------------------------------------------- the plan


@dataclass
class PlanInputs:
    """Everything one plan needs besides the fitted models."""

    archive: Archive
    resources: Resources = Resources()
    goals: Goals = Goals()
    correction: Correction = Correction()
    accuracy: Mapping[str, AccuracyInput] = field(default_factory=dict)
    sample_sizes: Mapping[str, Mapping] = field(default_factory=dict)
    scaling: Mapping[str, ScalingFit] = field(default_factory=dict)   # by recogniser (or profile) name
    resources_by_profile: Mapping[str, Resources] = field(default_factory=dict)
    draws: int = 2000
    seed: int = 0
    speed_drift: float = SPEED_DRIFT   # machine speed spread between calibration and run (see SPEED_DRIFT)

    def __post_init__(self) -> None:
        if not 0.0 <= self.speed_drift < 1.0:
            raise PlanError(f"speed drift must be within 0..1 (a coefficient of variation), not {self.speed_drift}")


def _scaling_for(inputs: PlanInputs, m: CostModel) -> ScalingFit | None:
    return inputs.scaling.get(f"{m.profile}/{m.recogniser}") or inputs.scaling.get(m.recogniser) \
        or inputs.scaling.get(m.profile)


def _max_workers(m: CostModel, res: Resources, scaling: ScalingFit | None) -> int:
    """The most workers one machine can be planned with: its cores, if scaling was measured to extrapolate."""
    if scaling is None:
        return 1
    threads = res.threads or m.threads
    measured = scaling.max_workers_measured(threads)
    if scaling.serial_fraction(threads) is None:
        return max(1, measured)
    cores = int(m.host.get("cores") or 0)
    return max(1, cores // threads) if cores else max(1, measured)


def _recommend(options: list[Option], inputs: PlanInputs) -> dict:
    goals = inputs.goals
    ok = [o for o in options if o.row["meets_deadline"] is not False and o.row["meets_budget"] is not False]
    key = lambda o: (o.row["cost"] if o.row["cost"] is not None else o.row["wall_seconds_p50"])  # noqa: E731
    if ok:
        best = min(ok, key=key)
        r = best.row
        what = []
        if goals.deadline_s is not None:
            what.append(f"P90 {format_duration(r['wall_seconds_p90'])} within {format_duration(goals.deadline_s)}")
        if goals.budget is not None and r["cost_high"] is not None:
            what.append(f"cost up to {r['cost_high']:,.2f} within {goals.budget:,.2f}")
        return {"recogniser": r["recogniser"], "profile": r["profile"], "workers": r["workers"],
                "machines": r["machines"], "change": None,
                "text": f"cheapest option meeting the goals: {r['recogniser']} on {r['profile']} with "
                        f"{r['workers']} worker(s) x {r['threads']} thread(s) x {r['machines']} machine(s)"
                        + (f" ({'; '.join(what)})" if what else "")}
    # Smallest change: more workers (up to the machine's cores), then more machines, then time or money.
    changes = []
    for o in options:
        m, r = o.serial.model, o.row
        res = inputs.resources_by_profile.get(m.profile, inputs.resources)
        sc = _scaling_for(inputs, m)
        for w in range(res.workers + 1, _max_workers(m, res, sc) + 1):
            try:
                alt = evaluate_option(o.serial, replace(res, workers=w), goals, scaling=sc,
                                      accuracy=inputs.accuracy.get(m.recogniser), correction=inputs.correction)
            except PlanError:
                break
            if alt.row["meets_deadline"] is not False and alt.row["meets_budget"] is not False:
                changes.append((0, w - res.workers, key(alt), {
                    "recogniser": m.recogniser, "profile": m.profile, "workers": w, "machines": res.machines,
                    "change": f"workers {res.workers} -> {w}",
                    "text": f"no option meets the goals as given; the smallest change: {m.recogniser} on "
                            f"{m.profile} with {w} workers instead of {res.workers} (P90 "
                            f"{format_duration(alt.row['wall_seconds_p90'])})"}))
                break
        if r["meets_budget"] is not False:
            for mach in range(res.machines + 1, 4 * res.machines + 65):
                try:
                    alt = evaluate_option(o.serial, replace(res, machines=mach), goals, scaling=sc,
                                          accuracy=inputs.accuracy.get(m.recogniser), correction=inputs.correction)
                except PlanError:
                    break
                if alt.row["meets_deadline"] is not False and alt.row["meets_budget"] is not False:
                    changes.append((1, mach - res.machines, key(alt), {
                        "recogniser": m.recogniser, "profile": m.profile, "workers": res.workers, "machines": mach,
                        "change": f"machines {res.machines} -> {mach}",
                        "text": f"no option meets the goals as given; the smallest change: {m.recogniser} on "
                                f"{mach} machines like {m.profile} instead of {res.machines} (P90 "
                                f"{format_duration(alt.row['wall_seconds_p90'])}; machines assumed independent)"}))
                    break
        if r["meets_deadline"] is False and r["meets_budget"] is not False:
            need = r["wall_seconds_p90"]
            changes.append((2, need / goals.deadline_s, key(o), {
                "recogniser": m.recogniser, "profile": m.profile, "workers": res.workers, "machines": res.machines,
                "change": f"deadline -> {format_duration(need)}",
                "text": f"no option meets the goals as given; the smallest change: extend the deadline to "
                        f"{format_duration(need)} (P90 of {m.recogniser} on {m.profile}, "
                        f"{format_duration(goals.deadline_s)} given)"}))
        if r["meets_budget"] is False and r["meets_deadline"] is not False:
            changes.append((3, r["cost_high"] / goals.budget, key(o), {
                "recogniser": m.recogniser, "profile": m.profile, "workers": res.workers, "machines": res.machines,
                "change": f"budget -> {r['cost_high']:,.2f}",
                "text": f"no option meets the goals as given; the smallest change: raise the budget to "
                        f"{r['cost_high']:,.2f} for {m.recogniser} on {m.profile} ({goals.budget:,.2f} given)"}))
    if not changes:
        return {"recogniser": None, "change": None,
                "text": "no option meets the goals, and no single change (workers, machines, deadline or budget) "
                        "was found that would"}
    # Prefer a change of resources; among them the smallest step, then the cheapest.
    return min(changes, key=lambda t: (t[0], t[1], t[2]))[3]


def make_plan(models: Sequence[CostModel], inputs: PlanInputs) -> pd.DataFrame:
    """The plan: one row per recogniser (per machine profile), side by side.

    ``DataFrame.attrs`` carries ``recommendation`` (dict with ``text``),
    ``crossover`` (list of dicts with ``text``), ``warnings`` (list of
    strings), ``fits`` (DataFrame of every stage fit), ``archive`` (dict) and
    ``assumptions`` (list of strings).
    """
    if not models:
        raise PlanError("no calibrated recogniser to plan with")
    options: list[Option] = []
    estimates: dict[str, SerialEstimate] = {}
    for i, m in enumerate(models):
        est = estimate_serial(m, inputs.archive, draws=inputs.draws, seed=inputs.seed + i,
                              speed_drift=inputs.speed_drift)
        estimates[f"{m.profile}/{m.recogniser}"] = est
        res = inputs.resources_by_profile.get(m.profile, inputs.resources)
        options.append(evaluate_option(est, res, inputs.goals, scaling=_scaling_for(inputs, m),
                                       accuracy=inputs.accuracy.get(m.recogniser), correction=inputs.correction,
                                       sample_size=inputs.sample_sizes.get(m.recogniser)))
    table = pd.DataFrame([o.row for o in options])
    cross = []
    for prof in dict.fromkeys(m.profile for m in models):
        seqs = [m for m in models if m.profile == prof and m.kind == "seq"]
        ctcs = [m for m in models if m.profile == prof and m.kind == "ctc"]
        cross += [crossover(s, c) for s in seqs for c in ctcs]
    warnings = list(dict.fromkeys(w for o in options for w in o.row["warnings"]))
    table.attrs["recommendation"] = _recommend(options, inputs)
    table.attrs["crossover"] = cross
    table.attrs["warnings"] = warnings
    table.attrs["fits"] = pd.concat([m.fit_table() for m in models], ignore_index=True)
    table.attrs["archive"] = inputs.archive.describe()
    table.attrs["assumptions"] = [
        f"seconds per character error: {inputs.correction.seconds_per_error:g} "
        + ("(default: keystroke-level edit of 3-4 s plus finding the error on the scan; common practice)"
           if inputs.correction.seconds_per_error == DEFAULT_SECONDS_PER_ERROR else "(given)"),
        "meets_deadline: the P90 wall-clock is within the deadline; meets_budget: compute at P90 plus "
        "correction at the CER's upper bound is within the budget",
        "wall-clock covers recognition only; human correction time is reported separately",
        f"the machine's speed may differ between calibration and run with a coefficient of variation of "
        f"{inputs.speed_drift:g}" + (" (default: measured on a shared virtual machine; 0 for a dedicated one)"
                                     if inputs.speed_drift == SPEED_DRIFT else " (given)")
        + ", or the calibration's own session-to-session spread where larger; it widens P10-P90",
        "characters per line of a segmented sample are estimated from line width (fitted px per character "
        "on the calibration's recognised lines); expected errors = CER x these characters",
    ]
    return table
