"""Decisions on the estimates: deadline and budget fit, the recommended option, the seq/CTC crossover.

:func:`make_plan` is the planner's pure core: fitted models and a
:class:`PlanInputs` in, the side-by-side table out.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field, replace
from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from ocrbench.errors import PlanError
from ocrbench.planning.archive import Archive
from ocrbench.planning.costmodel import CostModel
from ocrbench.planning.estimate import (SEQ_SPEED_DRIFT, SPEED_DRIFT, AccuracyInput, Correction, Goals, Option,
                                        Resources, estimate_serial, evaluate_option)
from ocrbench.planning.numerics import ScalingFit, format_duration
from ocrbench.planning.people import DEFAULT_HOURS_PER_WEEK

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
    correction_by_recogniser: Mapping[str, Correction] = field(default_factory=dict)   # e.g. measured catch rates
    accuracy: Mapping[str, AccuracyInput] = field(default_factory=dict)
    sample_sizes: Mapping[str, Mapping] = field(default_factory=dict)
    scaling: Mapping[str, ScalingFit] = field(default_factory=dict)   # by recogniser (or profile) name
    resources_by_profile: Mapping[str, Resources] = field(default_factory=dict)
    draws: int = 2000
    seed: int = 0
    speed_drift: float = SPEED_DRIFT   # machine speed spread between calibration and run (see SPEED_DRIFT)
    currency: str | None = None        # ISO 4217 code of every amount of money
    alternatives: Sequence[CostModel] = ()   # other measured settings (batch size, threads) of the recognisers

    def __post_init__(self) -> None:
        if not 0.0 <= self.speed_drift < 1.0:
            raise PlanError(f"speed drift must be within 0..1 (a coefficient of variation), not {self.speed_drift}")
        check_currency(self.currency)

    def correction_for(self, recogniser: str) -> Correction:
        return self.correction_by_recogniser.get(recogniser, self.correction)


def check_currency(code: str | None) -> None:
    """An ISO 4217 alphabetic code is three capital letters (ISO 4217, the published standard)."""
    if code is not None and not re.fullmatch(r"[A-Z]{3}", code):
        raise PlanError(f"currency {code!r}: give an ISO 4217 code of three capital letters, e.g. GBP, EUR, USD")


def money_text(v: float | None, currency: str | None) -> str:
    """An amount with its currency (``GBP 1,234.50``); amounts without a currency say so."""
    if v is None:
        return "unpriced"
    return f"{currency} {v:,.2f}" if currency else f"{v:,.2f} (no currency given)"


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


def _meets(row: Mapping) -> bool:
    return row["meets_deadline"] is not False and row["meets_budget"] is not False


def _key(o: Option) -> float:
    r = o.row
    return r["cost"] if r["cost"] is not None else r["wall_seconds_p50"]


def _evaluate(o: Option, res: Resources, inputs: PlanInputs) -> Option:
    m = o.serial.model
    return evaluate_option(o.serial, res, inputs.goals, scaling=_scaling_for(inputs, m),
                           accuracy=inputs.accuracy.get(m.recogniser), correction=inputs.correction_for(m.recogniser))


def _fit_text(r: Mapping, inputs: PlanInputs) -> str:
    goals, what = inputs.goals, []
    if goals.deadline_s is not None:
        what.append(f"recognition P90 {format_duration(r['wall_seconds_p90'])} within "
                    f"{format_duration(goals.deadline_s)}")
        if r.get("correctors"):
            what.append(f"correction by {r['correctors']} corrector(s) in "
                        f"{format_duration(r['people_seconds_high'] or 0.0)}")
        elif r.get("correctors_needed"):
            what.append(f"correction needs {r['correctors_needed']} corrector(s) (none given)")
    if goals.budget is not None and r["cost_high"] is not None:
        what.append(f"cost up to {money_text(r['cost_high'], inputs.currency)} within "
                    f"{money_text(goals.budget, inputs.currency)}")
    return f" ({'; '.join(what)})" if what else ""


def _change(kind: int, size: float, o: Option, r: Mapping, change: str, text: str, *, two: bool = False,
            **over) -> tuple:
    m = o.serial.model
    lead = "no single change is enough; the smallest pair: " if two else "the smallest change: "
    d = {"recogniser": m.recogniser, "profile": m.profile, "workers": r["workers"], "machines": r["machines"],
         "change": change, "text": "no option meets the goals as given; " + lead + text}
    return (kind, size, _key(o), d | over)


def _more_resources(o: Option, res: Resources, inputs: PlanInputs) -> list[tuple]:
    """More workers (up to the cores, never a count measured slower than fewer), then more machines."""
    m, out = o.serial.model, []
    sc = _scaling_for(inputs, m)
    for w in range(res.workers + 1, _max_workers(m, res, sc) + 1):
        if sc is not None and sc.measured_slower(w, res.threads or m.threads) is not None:
            continue
        try:
            alt = _evaluate(o, replace(res, workers=w), inputs)
        except PlanError:
            break
        if _meets(alt.row):
            out.append(_change(0, w - res.workers, alt, alt.row, f"workers {res.workers} -> {w}",
                               f"{m.recogniser} on {m.profile} with {w} workers instead of {res.workers} (P90 "
                               f"{format_duration(alt.row['wall_seconds_p90'])})", workers=w))
            break
    if o.row["meets_budget"] is False or o.row.get("recognition_meets_deadline") is not False:
        return out
    for mach in range(res.machines + 1, 4 * res.machines + 65):
        try:
            alt = _evaluate(o, replace(res, machines=mach), inputs)
        except PlanError:
            break
        if alt.row.get("recognition_meets_deadline") is not False and alt.row["meets_budget"] is not False:
            out.append(_change(1, mach - res.machines, alt, alt.row, f"machines {res.machines} -> {mach}",
                               f"{m.recogniser} on {mach} machines like {m.profile} instead of {res.machines} "
                               f"(P90 {format_duration(alt.row['wall_seconds_p90'])}; machines assumed "
                               "independent)", machines=mach))
            break
    return out


def _other_changes(o: Option, inputs: PlanInputs) -> list[tuple]:
    """More correctors, a later deadline, a larger budget; where the deadline and the budget both fail, the
    two changes together (more correctors, or a later deadline, and a larger budget): more correctors do
    not change the cost (the same hours of work), so they alone never mend a budget."""
    m, r, goals, out = o.serial.model, o.row, inputs.goals, []
    over_budget = r["meets_budget"] is False
    if over_budget:
        budget_need = r["cost_high"] if r["cost_high"] is not None else r["cost_priced_part_high"]
        raise_budget = (f"raise the budget to {money_text(budget_need, inputs.currency)} for {m.recogniser} on "
                        f"{m.profile} ({money_text(goals.budget, inputs.currency)} given)")

    def offer(alone: int, pair: int, size: float, change: str, text: str) -> None:
        """The change alone (rank ``alone``) where the budget holds; with the budget raised too (rank ``pair``)
        where it fails as well."""
        if not over_budget:
            out.append(_change(alone, size, o, r, change, text))
        else:
            out.append(_change(pair, budget_need / goals.budget, o, r,
                               f"{change}; budget -> {money_text(budget_need, inputs.currency)}",
                               f"{text}, and {raise_budget}", two=True))

    if (r.get("correction_meets_deadline") is False and r.get("correctors_needed")
            and r.get("recognition_meets_deadline") is not False):
        offer(0, 4, r["correctors_needed"] - (r["correctors"] or 0),
              f"correctors {r['correctors']} -> {r['correctors_needed']}",
              f"{r['correctors_needed']} correctors instead of {r['correctors']} for {m.recogniser}'s "
              f"{r['people_hours_high']:,.0f} hours of review and correction")
    if r["meets_deadline"] is False:
        need = max(r["wall_seconds_p90"], r.get("people_seconds_high") or 0.0)
        offer(2, 5, need / goals.deadline_s, f"deadline -> {format_duration(need)}",
              f"extend the deadline to {format_duration(need)} (recognition and correction of "
              f"{m.recogniser} on {m.profile}, {format_duration(goals.deadline_s)} given)")
    if over_budget and r["meets_deadline"] is not False:
        out.append(_change(3, budget_need / goals.budget, o, r,
                           f"budget -> {money_text(budget_need, inputs.currency)}", raise_budget))
    return out


def _recommend(options: list[Option], inputs: PlanInputs, ranked: Sequence[Option] = ()) -> dict:
    """The cheapest configuration meeting the goals (never one measured slower than another), else the
    smallest change that would make one meet them."""
    ok = [o for o in (list(ranked) or options) if _meets(o.row)]
    if ok:
        best = min(ok, key=_key)
        r = best.row
        judged = "cheapest option meeting the goals" if r["cost"] is not None else \
            "fastest option not failing the goals (money not judged: " + "; ".join(r["unpriced"] + r["unknown"]) + ")"
        return {"recogniser": r["recogniser"], "profile": r["profile"], "workers": r["workers"],
                "machines": r["machines"], "batch_size": best.serial.model.batch_size, "change": None,
                "text": f"{judged}: {r['recogniser']} on {r['profile']} with {r['workers']} worker(s) x "
                        f"{r['threads']} thread(s) x {r['machines']} machine(s), batch size "
                        f"{best.serial.model.batch_size}" + _fit_text(r, inputs)}
    changes = []
    for o in options:
        res = inputs.resources_by_profile.get(o.serial.model.profile, inputs.resources)
        changes += _more_resources(o, res, inputs) + _other_changes(o, inputs)
    if not changes:
        return {"recogniser": None, "change": None,
                "text": "no option meets the goals, and no single change (workers, machines, correctors, deadline "
                        "or budget) was found that would"}
    # Prefer a change of resources; among them the smallest step, then the cheapest.
    return min(changes, key=lambda t: (t[0], t[1], t[2]))[3]


def rank_configurations(options: list[Option], inputs: PlanInputs) -> list[tuple[dict, Option]]:
    """Every configuration of each recogniser and profile worth considering, ranked by the goals, then cost/time.

    Dimensions: the recogniser (variants are recognisers of their own), each batch size (and thread count)
    measured for it (``PlanInputs.alternatives``), and the workers per machine: each count measured at the
    planned threads, and the count asked for. A count measured slower than a smaller count, and settings
    measured slower than others on the same pages (:mod:`ocrbench.planning.configs`), are listed as
    excluded: never ranked above, or recommended over, the faster one. Ranked first: configurations not
    failing the goals; then the cheapest (or the fastest when money is not known).
    """
    out = []
    for o in options:
        m = o.serial.model
        res = inputs.resources_by_profile.get(m.profile, inputs.resources)
        sc = _scaling_for(inputs, m)
        threads = res.threads or m.threads
        counts = sorted({res.workers} | ({int(w) for w in sc.table.loc[sc.table["threads"] == threads, "workers"]}
                                         if sc is not None else set()))
        for w in counts:
            slower = sc.measured_slower(w, threads) if sc is not None else None
            try:
                alt = o if w == res.workers else _evaluate(o, replace(res, workers=w), inputs)
            except PlanError:
                continue
            r = alt.row
            why = [f"{w} workers were measured slower than {slower} on {m.profile}"] if slower is not None else []
            why += [f"{m.recogniser} on {m.profile}: {m.slower_than}"] if m.slower_than else []
            out.append(({k: r.get(k) for k in ("recogniser", "profile", "workers", "threads", "machines",
                                                "wall_seconds_p10", "wall_seconds_p50", "wall_seconds_p90",
                                                "cost", "cost_high", "meets_deadline", "meets_budget")}
                        | {"batch_size": m.batch_size, "excluded": "; ".join(why) or None}, alt))
    ranked = sorted([c for c in out if not c[0]["excluded"]],
                    key=lambda c: (not _meets(c[0]), c[0]["cost"] is None,
                                   c[0]["cost"] if c[0]["cost"] is not None else 0.0, c[0]["wall_seconds_p50"]))
    for i, (c, _o) in enumerate(ranked, start=1):
        c["rank"] = i
    return ranked + [(c | {"rank": None}, o) for c, o in out if c["excluded"]]


def _assumptions(models: Sequence[CostModel], inputs: PlanInputs) -> list[str]:
    proc = sorted({f"{m.profile}: {m.process_start_s:.2f} s" for m in models if m.process_start_s > 0})
    return [
        *dict.fromkeys(inputs.correction_for(m.recogniser).describe() for m in models),
        f"correctors work {inputs.correction.hours_per_week:g} hours a week each"
        + (" (default: a full-time week; give the hours they really correct)"
           if inputs.correction.hours_per_week == DEFAULT_HOURS_PER_WEEK else " (given)"),
        "meets_deadline: recognition's P90 wall-clock AND the correctors' time at the upper CER both within the "
        "deadline (correction runs alongside recognition as pages come out); unknown when the correctors are not "
        "given; meets_budget: compute at P90 plus review and correction at the CER's upper bound within the "
        "budget; unknown while any part is unpriced",
        "money: " + (f"every amount in {inputs.currency} (ISO 4217)" if inputs.currency else
                     "no currency given (--currency, an ISO 4217 code)"),
        f"the machine's speed may differ between calibration and run with a coefficient of variation of "
        f"{inputs.speed_drift:g}" + (f" (default: measured on a shared virtual machine, {SEQ_SPEED_DRIFT:g} for "
                                     "seq recognisers, whose runs moved more; 0 for a dedicated one)"
                                     if inputs.speed_drift == SPEED_DRIFT else " (given)")
        + ", or the calibration's own session-to-session spread where larger; it widens P10-P90",
        "whole-process time: every job pays the process start-up"
        + (f" (measured, {', '.join(proc)})" if proc else " (not measured: 0 s; `ocrbench measure-scaling` "
                                                         "measures it)")
        + " and the model loading and warm-up (measured before the first page); several workers of one "
        "machine are one Dask run, which also starts and closes its cluster (measured by `ocrbench "
        "measure-scaling --workers K`, else 0 s)",
        "characters per line of a segmented sample are estimated once, from line width (the calibration fit of "
        "characters on width that explains most of their variance, applied to the width as that recogniser "
        "measures it: ink only for a card that cuts lines at blank gaps); expected errors = CER x these characters",
    ]


#: Relative difference in a page figure beyond which the archive is said to look unlike the calibration pages.
FIGURE_TOLERANCE = 0.20


def sample_differences(models: Sequence[CostModel], archive: Archive,
                       tolerance: float = FIGURE_TOLERANCE) -> list[str]:
    """Warnings naming each figure (line height, characters per line, lines per page, page size) in which the
    archive differs from the calibration (and ground-truth) pages by more than ``tolerance``, and by how much."""
    mine = archive.figures()
    out = []
    for prof in dict.fromkeys(m.profile for m in models):
        figs = [m.figures for m in models if m.profile == prof and m.figures]
        for name, a in mine.items():
            vals = [f[name] for f in figs if name in f]
            if not vals or not a:
                continue
            c = float(np.mean(vals))
            if c > 0 and abs(a / c - 1) > tolerance:
                out.append(f"the archive's {name} ({a:.3g}, {archive.source}) differs from the calibration pages' "
                           f"on {prof} ({c:.3g}) by {100 * (a / c - 1):+.0f}%: the speed and the CER measured on "
                           "those pages may not hold for this archive; calibrate (and transcribe ground truth) on "
                           "pages like it")
    return out


def _alternative_options(inputs: PlanInputs, first_seed: int) -> list[Option]:
    """The recognisers' other measured settings (batch size, threads), each judged as its own configuration."""
    out = []
    for i, m in enumerate(inputs.alternatives):
        res = inputs.resources_by_profile.get(m.profile, inputs.resources)
        try:
            est = estimate_serial(m, inputs.archive, draws=inputs.draws, seed=inputs.seed + first_seed + i,
                                  speed_drift=inputs.speed_drift, archive_seed=inputs.seed)
            o = _evaluate(Option(row={}, wall=np.zeros(0), serial=est), res, inputs)
        except PlanError:
            continue
        o.row["currency"] = inputs.currency
        out.append(o)
    return out


def make_plan(models: Sequence[CostModel], inputs: PlanInputs) -> pd.DataFrame:
    """The plan: one row per recogniser (per machine profile), side by side.

    ``DataFrame.attrs`` carries ``recommendation`` (dict with ``text``),
    ``crossover`` (list of dicts with ``text``), ``configurations`` (ranked),
    ``warnings`` (list of strings), ``fits`` (DataFrame of every stage fit),
    ``archive`` (dict), ``currency`` and ``assumptions`` (list of strings).
    """
    if not models:
        raise PlanError("no calibrated recogniser to plan with")
    options: list[Option] = []
    for i, m in enumerate(models):
        est = estimate_serial(m, inputs.archive, draws=inputs.draws, seed=inputs.seed + i,
                              speed_drift=inputs.speed_drift, archive_seed=inputs.seed)
        res = inputs.resources_by_profile.get(m.profile, inputs.resources)
        options.append(evaluate_option(est, res, inputs.goals, scaling=_scaling_for(inputs, m),
                                       accuracy=inputs.accuracy.get(m.recogniser),
                                       correction=inputs.correction_for(m.recogniser),
                                       sample_size=inputs.sample_sizes.get(m.recogniser)))
    for o in options:
        o.row["currency"] = inputs.currency
        o.row["batch_size"] = o.serial.model.batch_size
    table = pd.DataFrame([o.row for o in options])
    cross = []
    for prof in dict.fromkeys(m.profile for m in models):
        seqs = [m for m in models if m.profile == prof and m.kind == "seq"]
        ctcs = [m for m in models if m.profile == prof and m.kind == "ctc"]
        cross += [crossover(s, c) for s in seqs for c in ctcs]
    warnings = list(dict.fromkeys(w for o in options for w in o.row["warnings"]))
    warnings += sample_differences(models, inputs.archive)
    if inputs.goals.budget is not None:
        for o in options:
            if o.row["meets_budget"] is None and (o.row["unpriced"] or o.row["unknown"]):
                warnings.append(f"{o.row['recogniser']}: not judged against the budget: "
                                + "; ".join([f"{u} unpriced" for u in o.row["unpriced"]]
                                            + [f"{u} unknown" for u in o.row["unknown"]]))
    warnings += [f"{m.recogniser} on {m.profile}: its row is planned with the settings of its latest run, but "
                 f"{m.slower_than}; the configurations rank (and the choice takes) the faster"
                 for m in models if m.slower_than]
    configs = rank_configurations(options + _alternative_options(inputs, len(models)), inputs)
    table.attrs["recommendation"] = _recommend(options, inputs, [o for c, o in configs if c["rank"]])
    table.attrs["configurations"] = [c for c, _o in configs]
    table.attrs["crossover"] = cross
    table.attrs["warnings"] = warnings
    table.attrs["fits"] = pd.concat([m.fit_table() for m in models], ignore_index=True)
    table.attrs["archive"] = inputs.archive.describe()
    table.attrs["currency"] = inputs.currency
    table.attrs["assumptions"] = _assumptions(models, inputs)
    return table
