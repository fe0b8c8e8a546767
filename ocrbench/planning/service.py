"""The one way to plan: :func:`plan` takes a :class:`PlanRequest` and returns the plan.

``ocrbench plan``, ``ocrbench report --plan`` and the demo (through the report)
all call :func:`plan`, so they accept the same plan file (``[profiles]``
included) and the same archive descriptions:

* a sample folder (segmented only), an earlier run store, or numbers (pages,
  lines per page, characters per line), exactly one of them; or
* in a report only, none: the report's own pages as read by its most accurate
  recogniser then describe the archive (:class:`ReportContext`).

Without a calibration store in the request, a report calibrates on its own
store. CER and its interval come, in this order, from the request's
``[accuracy]`` tables, from ``truth`` scored against the calibration pages, and
from the report's scores. ``ocrbench report --plan`` also reads plan results
(JSON, as ``ocrbench plan --json`` prints them; :class:`PlanResults`), shown
as given.

The report adds the wall-clock against the number of workers
(:func:`compute_plan`): one worker per machine up to as many workers as the
measured machine has cores (only with throughput measured at several workers,
see ``ocrbench measure-scaling``), then whole machines of that kind added.
"""

from __future__ import annotations

import dataclasses
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

import numpy as np
import pandas as pd

from ocrbench.io.tables import json_ready, json_text
from ocrbench.errors import InputError, PlanError
from ocrbench.planning.archive import Archive, with_shared_characters
from ocrbench.planning.costmodel import CostModel
from ocrbench.planning.decide import PlanInputs, make_plan
from ocrbench.planning.estimate import AccuracyInput, Goals, Resources, estimate_serial, evaluate_option
from ocrbench.planning.inputs import (PROFILE_SCHEMA, Calibration, PlanRequest, describe_sample,
                                      load_plan_file as load_plan_toml, measure_catch_rate,
                                      page_size_or_calibrated, read_calibration,
                                      read_store_frames, score_calibration)
from ocrbench.planning.numerics import parse_duration
from ocrbench.planning.options import plan_options
from ocrbench.planning.people import Correction
from ocrbench.planning.routes import parse_plan_route
from ocrbench.planning.sampling import stratified_sample_size

__all__ = ["PlanRequest", "PlanResult", "PlanResults", "ReportContext", "plan", "load_plan_file", "compute_plan",
           "plan_from_results", "plan_json", "json_dumps", "ROW_KEYS"]


@dataclass(frozen=True)
class ReportContext:
    """What a report adds to a plan request: its store, its runs and the accuracy it scored."""

    store: Path
    frames: Mapping[str, pd.DataFrame]
    runs: Sequence[Mapping[str, Any]]                       # name, run_id
    accuracy: Mapping[str, tuple[float, float, float]] = dataclasses.field(default_factory=dict)
    page_scores: Mapping[str, pd.DataFrame] = dataclasses.field(default_factory=dict)
    truth: Path | None = None                               # the report's ground truth (for routes' CER)


@dataclass
class PlanResult:
    """The plan (one row per recogniser and machine profile; statements in ``table.attrs``) and what made it."""

    table: pd.DataFrame
    sample_failures: list[tuple[str, str]]
    models: list[CostModel]
    inputs: PlanInputs
    calibration: list[str]
    described_by: str | None = None


@dataclass(frozen=True)
class PlanResults:
    """Plan rows computed elsewhere (``ocrbench plan --json``), shown as given, with the plan's statements."""

    rows: list[dict]
    source: str
    statements: dict = dataclasses.field(default_factory=dict)


def load_plan_file(path: Path | str) -> "PlanRequest | PlanResults":
    """Read ``--plan FILE``: a TOML plan file, or JSON plan results. InputError names the file and the problem."""
    p = Path(path)
    if p.suffix.lower() == ".toml":
        return load_plan_toml(p)
    try:
        data: Any = json.loads(p.read_text(encoding="utf-8-sig"))
    except FileNotFoundError as e:
        raise InputError(p, "plan file not found") from e
    except OSError as e:
        raise InputError(p, f"cannot read the plan file ({e.strerror or e})") from e
    except UnicodeDecodeError as e:
        raise InputError(p, f"the plan file is not UTF-8 text (byte offset {e.start})") from e
    except json.JSONDecodeError as e:
        raise InputError(p, f"not valid JSON: {e}") from e
    rows = data if isinstance(data, list) else (data.get("recognisers") if isinstance(data, Mapping) else None)
    if not isinstance(rows, list) or not rows or not all(isinstance(r, Mapping) and "recogniser" in r for r in rows):
        raise InputError(p, "JSON plan results need a list of objects, each with a 'recogniser' (as "
                            "'ocrbench plan --json' prints them); a plan to compute is written in TOML")
    statements = {k: data.get(k) for k in ("recommendation", "crossover", "warnings", "assumptions", "archive")} \
        if isinstance(data, Mapping) else {}
    return PlanResults([dict(r) for r in rows], str(p), statements)




#: Columns of a plan row copied into each recogniser's entry of the report.
ROW_KEYS = ("workers", "threads", "machines", "pages", "characters", "wall_seconds_p10", "wall_seconds_p50",
            "wall_seconds_p90", "core_hours", "core_hours_p90", "compute_cost", "compute_cost_p90", "cer",
            "cer_low", "cer_high", "char_errors", "char_errors_low", "char_errors_high", "correction_hours",
            "correction_hours_low", "correction_hours_high", "correction_cost", "correction_cost_high", "cost",
            "cost_high", "deadline_seconds", "meets_deadline", "p_meets_deadline", "budget", "meets_budget",
            "fit_r2_batch", "calibration_pages", "gt_sample_pages", "extrapolated",
            # people, money and whole-process time (issue 18)
            "currency", "review_mode", "review_hours", "people_hours", "people_hours_high", "errors_left",
            "correctors", "correctors_needed", "people_seconds_high", "correction_meets_deadline",
            "recognition_meets_deadline", "people_cost", "people_cost_high", "compute_share", "people_share",
            "unpriced", "unknown", "jobs", "startup_seconds_per_job", "cluster_start_seconds")


def plan_from_results(results: PlanResults) -> dict:
    """The report's plan section from rows computed elsewhere (no workers curve)."""
    rows = {str(r["recogniser"]): {k: json_ready(r.get(k)) for k in ROW_KEYS} for r in results.rows}
    st = results.statements
    return json_ready({"source": results.source, "spec": None, "rows": rows, "archive": st.get("archive"),
                   "assumptions": list(st.get("assumptions") or []), "recommendation": st.get("recommendation"),
                   "crossover": list(st.get("crossover") or []), "warnings": list(st.get("warnings") or []),
                   "curve": [], "curve_axis": None})


def _calibrations(req: PlanRequest, ctx: ReportContext | None) -> tuple[list[str], list[Calibration]]:
    specs = list(req.calibration) or ([str(ctx.store)] if ctx is not None else [])
    if not specs:
        raise PlanError("give at least one calibration store (--calibration STORE)")
    names = req.recognisers
    if names is None and ctx is not None and not req.calibration:
        names = [r["name"] for r in ctx.runs if r.get("kind") != "route"]   # a route's kept text is no recogniser
    return specs, [read_calibration(c, recognisers=names, seed=req.seed) for c in specs]


def _report_pages(req: PlanRequest, ctx: ReportContext) -> tuple[Archive, str]:
    """The report's own pages as read by its most accurate recogniser."""
    def key(r: Mapping) -> tuple:
        a = ctx.accuracy.get(r["name"])
        return (a is None, a[0] if a else 0.0, int(r["run_id"]))

    best = min(ctx.runs, key=key)
    archive = Archive.from_store_frames(ctx.frames, run_id=int(best["run_id"]), n_pages=int(req.pages))
    note = (f"the archive's pages are described by this store's pages as read by {best['name']} (run "
            f"{best['run_id']}{', the most accurate' if ctx.accuracy.get(best['name']) else ''}): lines per page, "
            "characters per line and line widths are resampled from them")
    return archive, note


def _archive(req: PlanRequest, models: Sequence[CostModel], ctx: ReportContext | None,
             say: Callable[[str], None]) -> tuple[Archive, list[tuple[str, str]], str | None]:
    """The archive the request describes: (archive, sample pages that failed, how it was described)."""
    n_desc = sum(x is not None for x in (req.sample, req.archive_store)) + (req.lines_per_page is not None)
    if n_desc > 1 or (n_desc == 0 and ctx is None):
        raise PlanError("describe the archive one way: --sample DIR, --archive-store STORE, or "
                        "--pages N --lines-per-page A-B --chars-per-line A-B (plan file: archive.sample, "
                        "archive.store, or archive.pages with archive.lines_per_page and archive.chars_per_line)")
    if req.sample is not None:
        say(f"segmenting a sample of {req.sample}")
        archive, failures = describe_sample(req.sample, n_pages=req.pages, sample_pages=req.sample_pages,
                                            seed=req.seed, split_gaps=[m.split_gap for m in models])
        archive, note = with_shared_characters(archive, models)
        return archive, failures, note
    if req.archive_store is not None:
        return Archive.from_store_frames(read_store_frames(req.archive_store), n_pages=req.pages), [], None
    if req.pages is None:
        raise PlanError("the plan needs the archive's page count (--pages, or archive.pages in a plan file)")
    if req.lines_per_page is not None:
        if req.chars_per_line is None:
            raise PlanError("--chars-per-line (archive.chars_per_line) is needed with --lines-per-page")
        return Archive.from_numbers(int(req.pages), req.lines_per_page, req.chars_per_line,
                                    page_size=page_size_or_calibrated(req.page_size, models[0])), [], None
    archive, note = _report_pages(req, ctx)
    return archive, [], note


def _accuracy(req: PlanRequest, cals: Sequence[Calibration], ctx: ReportContext | None, n_pages: int,
              say: Callable[[str], None]) -> tuple[dict[str, AccuracyInput], dict[str, dict]]:
    """CER per recogniser (request's tables, then truth, then the report's scores) and ground-truth sample sizes."""
    accuracy: dict[str, AccuracyInput] = {}
    for n, d in (req.accuracy or {}).items():
        try:
            accuracy[n] = AccuracyInput.from_summary(d)
        except (KeyError, TypeError, ValueError) as e:
            raise PlanError(f"accuracy of {n}: give cer, cer_low and cer_high ({e})") from e
    page_scores: dict[str, pd.DataFrame] = {}
    if req.truth is not None:
        say("scoring the calibration pages against the ground truth")
        for c in cals:
            for n, (acc, pages_df) in score_calibration(c.path, req.truth,
                                                         recognisers=[m.recogniser for m in c.models]).items():
                accuracy.setdefault(n, acc)
                page_scores.setdefault(n, pages_df)
    if ctx is not None:
        for n, v in ctx.accuracy.items():
            if n not in accuracy and None not in v:
                accuracy[n] = AccuracyInput(*v)
        for n, df in ctx.page_scores.items():
            page_scores.setdefault(n, df)
    sizes: dict[str, dict] = {}
    for n, df in page_scores.items():
        try:
            sizes[n] = stratified_sample_size(df, relative=req.cer_relative_margin, absolute=req.cer_margin,
                                              population=n_pages)
        except (PlanError, ValueError) as e:
            sizes[n] = {"pages": None, "notes": [str(e)]}
    return accuracy, sizes


def resources_of(req: PlanRequest) -> tuple[Resources, dict[str, Resources]]:
    """The request's resources, and those of each machine profile its ``profiles`` table overrides."""
    res = Resources(workers=req.workers, threads=req.threads, machines=req.machines,
                    price_core_hour=req.price_core_hour, price_machine_hour=req.price_machine_hour,
                    pages_per_job=req.pages_per_job)
    by_profile = {}
    for name, over in (req.profiles or {}).items():
        bad = sorted(set(over) - set(PROFILE_SCHEMA))
        if bad:
            raise PlanError(f"profile {name}: unknown key(s) {', '.join(bad)}; valid: {', '.join(PROFILE_SCHEMA)}")
        by_profile[name] = dataclasses.replace(res, **dict(over))
    return res, by_profile


def correction_of(req: PlanRequest, catch_rate: float | None = None, source: str = "given") -> Correction:
    """The people part of the request: review mode, rates, correctors, price."""
    return Correction(seconds_per_error=req.seconds_per_error, price_hour=req.correction_price_hour,
                      review=req.review, seconds_per_line=req.seconds_per_line,
                      chars_per_second=req.chars_per_second, review_share=req.review_share,
                      catch_rate=req.catch_rate if catch_rate is None else catch_rate, correctors=req.correctors,
                      hours_per_week=req.corrector_hours_per_week, catch_rate_source=source)


def _corrections(req: PlanRequest, cals: Sequence[Calibration],
                 say: Callable[[str], None]) -> tuple[Correction, dict[str, Correction]]:
    """The request's correction; for targeted review without a catch rate, one measured per recogniser on the
    calibration pages' ground truth."""
    if req.review != "targeted" or req.catch_rate is not None or req.truth is None:
        return correction_of(req), {}
    say("measuring the review queue's catch rate on the ground truth")
    by = {}
    for c in cals:
        for m in c.models:
            rate, where = measure_catch_rate(c.path, req.truth, m.recogniser, share=req.review_share)
            by[m.recogniser] = correction_of(req, rate, where)
    mean = float(np.mean([x.catch_rate for x in by.values()]))
    return correction_of(req, mean, "mean of the measured catch rates"), by


def plan(req: PlanRequest, *, context: ReportContext | None = None,
         progress: Callable[[str], None] | None = None) -> PlanResult:
    """Read, fit and plan: the whole of ``ocrbench plan`` (and of ``report --plan``) below the command line."""
    say = progress or (lambda _m: None)
    say("fitting cost models")
    specs, cals = _calibrations(req, context)
    models = [m for c in cals for m in c.models]
    archive, failures, described_by = _archive(req, models, context, say)
    accuracy, sizes = _accuracy(req, cals, context, archive.n_pages, say)
    res, by_profile = resources_of(req)
    correction, by_recogniser = _corrections(req, cals, say)
    inputs = PlanInputs(archive=archive, resources=res,
                        goals=Goals(deadline_s=parse_duration(req.deadline) if req.deadline else None,
                                    budget=req.budget),
                        correction=correction, correction_by_recogniser=by_recogniser,
                        accuracy=accuracy, sample_sizes=sizes, scaling={k: v for c in cals for k, v in c.scaling.items()},
                        resources_by_profile=by_profile, draws=req.draws, seed=req.seed, speed_drift=req.speed_drift,
                        currency=req.currency, alternatives=[a for c in cals for a in c.alternatives])
    say("simulating the archive")
    table = make_plan(models, inputs)
    table = plan_options(table, inputs, stores=[(str(c.path), c.profile) for c in cals],
                         truth=req.truth or (context.truth if context is not None else None),
                         route=parse_plan_route(req.route) if req.route else None, target_cer=req.target_cer,
                         seed=req.seed, say=say)
    table.attrs["sample_sizes"] = sizes
    table.attrs["cer_margin"] = req.cer_margin
    table.attrs["cer_relative_margin"] = None if req.cer_margin is not None else req.cer_relative_margin
    if described_by:
        table.attrs["assumptions"] = list(table.attrs.get("assumptions", [])) + [described_by]
    return PlanResult(table=table, sample_failures=failures, models=models, inputs=inputs, calibration=specs,
                      described_by=described_by)


def _curve_points(cores: int, scaled: bool, max_workers: int) -> list[tuple[int, int, int]]:
    """(total workers, workers per machine, machines): uniform configurations only."""
    per = max(1, cores) if scaled else 1
    out = []
    for w in range(1, max_workers + 1):
        if w <= per:
            out.append((w, w, 1))
        elif w % per == 0:
            out.append((w, per, w // per))
    return out


def _curve(result: PlanResult, req: PlanRequest, max_workers: int) -> tuple[list[dict], set[str]]:
    """Wall-clock against workers, from the same Monte Carlo draws (make_plan seeds model i with seed + i)."""
    inputs = result.inputs
    curve, axis = [], set()
    for i, m in enumerate(result.models):
        est = estimate_serial(m, inputs.archive, draws=req.draws, seed=req.seed + i, speed_drift=req.speed_drift,
                              archive_seed=req.seed)
        sc = inputs.scaling.get(f"{m.profile}/{m.recogniser}") or inputs.scaling.get(m.recogniser)
        base = inputs.resources_by_profile.get(m.profile, inputs.resources)
        cores = int(m.host.get("cores") or 1) // int(base.threads or m.threads or 1)
        for total, per, machines in _curve_points(cores, sc is not None, max_workers):
            r = dataclasses.replace(base, workers=per, machines=machines)
            try:
                o = evaluate_option(est, r, inputs.goals, scaling=sc, accuracy=inputs.accuracy.get(m.recogniser),
                                    correction=inputs.correction_for(m.recogniser)).row
            except PlanError:
                continue
            curve.append({"recogniser": m.recogniser, "kind": m.kind, "workers": total, "workers_per_machine": per,
                          "machines": machines, "wall_seconds_p10": o["wall_seconds_p10"],
                          "wall_seconds_p50": o["wall_seconds_p50"], "wall_seconds_p90": o["wall_seconds_p90"],
                          "cost": o["cost"], "meets_deadline": o["meets_deadline"]})
        axis.add(f"up to {max(1, cores)} per machine as measured, then more machines like {m.profile}"
                 if sc is not None else f"one per machine like {m.profile}, machines assumed independent")
    return curve, axis


def compute_plan(store: Path | str, frames: Mapping[str, pd.DataFrame], req: PlanRequest,
                 runs: Sequence[Mapping[str, Any]], *,
                 accuracy: Mapping[str, tuple[float, float, float]] | None = None,
                 page_scores: Mapping[str, pd.DataFrame] | None = None, curve_max_workers: int = 16,
                 truth: Path | str | None = None) -> dict:
    """The report's plan section: :func:`plan` with the report as context, plus the workers curve.

    ``runs``: the report's runs (``name``, ``run_id``). ``accuracy``: recogniser
    name -> (CER, low, high) from the report's scores, used unless the request
    gives its own. ``page_scores``: per-page scores by recogniser name, for the
    ground-truth sample size. Returns the JSON-ready plan section.
    """
    ctx = ReportContext(store=Path(store), frames=frames, runs=runs, accuracy=dict(accuracy or {}),
                        page_scores=dict(page_scores or {}), truth=None if truth is None else Path(truth))
    result = plan(req, context=ctx)
    table = result.table
    rows = {str(rec["recogniser"]): {k: json_ready(rec.get(k)) for k in ROW_KEYS} for rec in table.to_dict("records")}
    curve, axis = _curve(result, req, curve_max_workers)
    spec = {k: json_ready(v) for k, v in dataclasses.asdict(req).items()}
    spec["calibration"] = [str(c) for c in result.calibration]
    return json_ready({
        "source": "computed by the planner" + ("" if req.calibration else " on this store"),
        "spec": spec, "rows": rows, "archive": table.attrs.get("archive"), "currency": table.attrs.get("currency"),
        "configurations": table.attrs.get("configurations", []),
        "assumptions": list(table.attrs.get("assumptions", [])),
        "recommendation": table.attrs.get("recommendation"), "crossover": list(table.attrs.get("crossover", [])),
        "warnings": list(table.attrs.get("warnings", [])), "sample_sizes": table.attrs.get("sample_sizes", {}),
        "sample_failures": [{"page": p, "error": e} for p, e in result.sample_failures],
        "curve": curve, "curve_axis": "; ".join(sorted(axis)) or None, **options_json(table),
        "scaling_measured": sorted({k.split("/")[-1] for k in result.inputs.scaling}),
    })


def plan_frame(**options) -> pd.DataFrame:
    """Python API: the plan as a DataFrame (one row per recogniser and machine profile).

    Keyword options are the fields of :class:`PlanRequest`, e.g.
    ``plan_frame(calibration=["cal.sqlite"], pages=180_000, lines_per_page="16-30",
    chars_per_line="38-60", deadline="6w", price_core_hour=0.05)``. The
    statements (choice, crossover, warnings, assumptions, fits) are in
    ``DataFrame.attrs``.
    """
    return plan(PlanRequest(**options)).table


def plan_json(table: pd.DataFrame) -> dict:
    """The plan as a JSON-ready dict: ``recognisers`` (one object each) plus the plan's statements."""
    rows = [json_ready(r) for r in table.to_dict(orient="records")]
    fits = table.attrs.get("fits")
    return json_ready({
        "recognisers": rows,
        "currency": table.attrs.get("currency"),
        "recommendation": table.attrs.get("recommendation"),
        "configurations": table.attrs.get("configurations", []),
        "crossover": table.attrs.get("crossover", []),
        "warnings": table.attrs.get("warnings", []),
        "assumptions": table.attrs.get("assumptions", []),
        "archive": table.attrs.get("archive"),
        "ground_truth_sample": table.attrs.get("sample_sizes", {}),
        "fits": [] if fits is None else fits.to_dict(orient="records"), **options_json(table),
    })


def options_json(table: pd.DataFrame) -> dict:
    """The plan's options (singles, variants, routes; frontier and choice marked) and its target, JSON-ready."""
    return json_ready({"options": list(table.attrs.get("options") or []),
                       "options_compared_by": table.attrs.get("options_key"),
                       "options_notes": list(table.attrs.get("options_notes") or []),
                       "target": table.attrs.get("target")})


def json_dumps(obj) -> str:
    """The plan as JSON text (one home for JSON cleaning: :func:`ocrbench.io.tables.json_text`)."""
    return json_text(obj, indent=1)
