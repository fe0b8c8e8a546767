"""The archive plan shown in a report: read a plan file, or compute one with the planner on the report's store.

``ocrbench report --plan FILE`` accepts the project's two plan formats:

* **a plan file** (TOML), the same format ``ocrbench plan`` reads
  (:data:`ocrbench.planning.inputs.PLAN_FILE_FORMAT`). Its ``calibration`` may be left
  out: the report's store is then the calibration. When the file does not
  describe the archive's pages (no ``sample``, ``store`` or
  ``lines_per_page``), the report's own pages describe them, as read by the
  most accurate recogniser. CER and its interval come from the report's
  scores (the post-processed text where stored) unless the file gives them.
* **plan results** (JSON), as ``ocrbench plan --json`` prints them: an
  object with a ``recognisers`` list (or the list itself). Shown as given.

The plan is computed with the planner's own pieces (:mod:`ocrbench.planning.inputs`,
:mod:`ocrbench.planning.model`), so it equals what ``ocrbench plan`` says for the
same inputs, and the report adds the wall-clock against the number of
workers: one worker per machine up to as many workers as the measured
machine has cores (only with throughput measured at several workers, see
``ocrbench measure-scaling``), then whole machines of that kind added.
"""

from __future__ import annotations

import dataclasses
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from ocrbench.planning import inputs as planio
from ocrbench.planning import model as P
from ocrbench.errors import InputError, PlanError

__all__ = ["PlanRequest", "PlanResults", "load_plan_file", "compute_plan", "plan_from_results", "ROW_KEYS"]

PlanRequest = planio.PlanRequest


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
        return planio.load_plan_file(p)
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


def _clean(v: Any) -> Any:
    """JSON-ready: numpy scalars to Python, paths to strings, NaN to None, containers recursively."""
    if isinstance(v, Mapping):
        return {str(k): _clean(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_clean(x) for x in v]
    if isinstance(v, np.generic):
        v = v.item()
    if isinstance(v, Path):
        return str(v)
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


#: Columns of a plan row copied into each recogniser's entry of the report.
ROW_KEYS = ("workers", "threads", "machines", "pages", "characters", "wall_seconds_p10", "wall_seconds_p50",
            "wall_seconds_p90", "core_hours", "core_hours_p90", "compute_cost", "compute_cost_p90", "cer",
            "cer_low", "cer_high", "char_errors", "char_errors_low", "char_errors_high", "correction_hours",
            "correction_hours_low", "correction_hours_high", "correction_cost", "correction_cost_high", "cost",
            "cost_high", "deadline_seconds", "meets_deadline", "p_meets_deadline", "budget", "meets_budget",
            "fit_r2_batch", "calibration_pages", "gt_sample_pages", "extrapolated")


def plan_from_results(results: PlanResults) -> dict:
    """The report's plan section from rows computed elsewhere (no workers curve)."""
    rows = {str(r["recogniser"]): {k: _clean(r.get(k)) for k in ROW_KEYS} for r in results.rows}
    st = results.statements
    return _clean({"source": results.source, "spec": None, "rows": rows, "archive": st.get("archive"),
                   "assumptions": list(st.get("assumptions") or []), "recommendation": st.get("recommendation"),
                   "crossover": list(st.get("crossover") or []), "warnings": list(st.get("warnings") or []),
                   "curve": [], "curve_axis": None})


def _archive(req: PlanRequest, frames: Mapping[str, pd.DataFrame], runs: Sequence[Mapping],
             accuracy: Mapping[str, tuple], ref: P.CostModel) -> tuple[P.Archive, str | None]:
    n_desc = sum(x is not None for x in (req.sample, req.archive_store)) + (req.lines_per_page is not None)
    if n_desc > 1:
        raise PlanError("describe the archive one way: a sample folder, an archive store, or lines per page "
                        "and characters per line")
    if req.sample is not None:
        archive, _failed = planio.describe_sample(req.sample, n_pages=req.pages, sample_pages=req.sample_pages,
                                                  seed=req.seed)
        return archive, None
    if req.archive_store is not None:
        return P.Archive.from_store_frames(planio.read_store_frames(req.archive_store), n_pages=req.pages), None
    if req.pages is None:
        raise PlanError("the plan needs the archive's page count (archive.pages)")
    if req.lines_per_page is not None:
        if req.chars_per_line is None:
            raise PlanError("give chars_per_line with lines_per_page")
        return P.Archive.from_numbers(int(req.pages), req.lines_per_page, req.chars_per_line,
                                      page_size=planio.page_size_or_calibrated(req.page_size, ref)), None

    def key(r: Mapping) -> tuple:
        a = accuracy.get(r["name"])
        return (a is None, a[0] if a else 0.0, int(r["run_id"]))

    best = min(runs, key=key)
    archive = P.Archive.from_store_frames(frames, run_id=int(best["run_id"]), n_pages=int(req.pages))
    note = (f"the archive's pages are described by this store's pages as read by {best['name']} (run "
            f"{best['run_id']}{', the most accurate' if accuracy.get(best['name']) else ''}): lines per page, "
            "characters per line and line widths are resampled from them")
    return archive, note


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


def compute_plan(store: Path | str, frames: Mapping[str, pd.DataFrame], req: PlanRequest,
                 runs: Sequence[Mapping[str, Any]], *,
                 accuracy: Mapping[str, tuple[float, float, float]] | None = None,
                 page_scores: Mapping[str, pd.DataFrame] | None = None, curve_max_workers: int = 16) -> dict:
    """Plan the archive ``req`` describes, calibrated on ``req.calibration`` or else on ``store``.

    ``runs``: the report's runs (``name``, ``run_id``). ``accuracy``: recogniser
    name -> (CER, low, high) from the report's scores, used unless the request
    gives its own. ``page_scores``: per-page scores by recogniser name, for the
    ground-truth sample size. Returns the JSON-ready plan section.
    """
    accuracy = dict(accuracy or {})
    names = [r["name"] for r in runs]
    cal_specs = list(req.calibration) or [str(store)]
    cals = [planio.read_calibration(c, recognisers=req.recognisers or (names if not req.calibration else None),
                                    seed=req.seed) for c in cal_specs]
    models = [m for c in cals for m in c.models]
    scaling = {k: v for c in cals for k, v in c.scaling.items()}
    archive, described_by = _archive(req, frames, runs, accuracy, models[0])

    acc: dict[str, P.AccuracyInput] = {}
    for n, d in (req.accuracy or {}).items():
        try:
            acc[n] = P.AccuracyInput.from_summary(d)
        except (KeyError, TypeError, ValueError) as e:
            raise PlanError(f"accuracy of {n}: give cer, cer_low and cer_high ({e})") from e
    for n, v in accuracy.items():
        if n not in acc and None not in v:
            acc[n] = P.AccuracyInput(*v)
    sizes: dict[str, dict] = {}
    if page_scores:
        from ocrbench.accuracy.stats import sample_size_for_cer

        for n, df in page_scores.items():
            try:
                sizes[n] = sample_size_for_cer(df, half_width=req.cer_margin, population=archive.n_pages)
            except (PlanError, ValueError) as e:
                sizes[n] = {"pages": None, "notes": [str(e)]}

    res = P.Resources(workers=req.workers, threads=req.threads, machines=req.machines,
                      price_core_hour=req.price_core_hour, price_machine_hour=req.price_machine_hour)
    goals = P.Goals(deadline_s=P.parse_duration(req.deadline) if req.deadline else None, budget=req.budget)
    correction = P.Correction(seconds_per_error=req.seconds_per_error, price_hour=req.correction_price_hour)
    inputs = P.PlanInputs(archive=archive, resources=res, goals=goals, correction=correction, accuracy=acc,
                          sample_sizes=sizes, scaling=scaling, draws=req.draws, seed=req.seed,
                          speed_drift=req.speed_drift)
    table = P.make_plan(models, inputs)
    rows = {str(rec["recogniser"]): {k: _clean(rec.get(k)) for k in ROW_KEYS} for rec in table.to_dict("records")}

    # Wall-clock against workers, from the same Monte Carlo draws (make_plan seeds model i with seed + i).
    curve = []
    axis = set()
    for i, m in enumerate(models):
        est = P.estimate_serial(m, archive, draws=req.draws, seed=req.seed + i, speed_drift=req.speed_drift)
        sc = scaling.get(f"{m.profile}/{m.recogniser}") or scaling.get(m.recogniser)
        cores = int(m.host.get("cores") or 1) // int(req.threads or m.threads or 1)
        for total, per, machines in _curve_points(cores, sc is not None, curve_max_workers):
            r = dataclasses.replace(res, workers=per, machines=machines)
            try:
                o = P.evaluate_option(est, r, goals, scaling=sc, accuracy=acc.get(m.recogniser),
                                      correction=correction).row
            except PlanError:
                continue
            curve.append({"recogniser": m.recogniser, "kind": m.kind, "workers": total, "workers_per_machine": per,
                          "machines": machines, "wall_seconds_p10": o["wall_seconds_p10"],
                          "wall_seconds_p50": o["wall_seconds_p50"], "wall_seconds_p90": o["wall_seconds_p90"],
                          "cost": o["cost"], "meets_deadline": o["meets_deadline"]})
        axis.add(f"up to {max(1, cores)} per machine as measured, then more machines like {m.profile}"
                 if sc is not None else f"one per machine like {m.profile}, machines assumed independent")
    assumptions = list(table.attrs.get("assumptions", []))
    if described_by:
        assumptions.append(described_by)
    spec = {k: _clean(v) for k, v in dataclasses.asdict(req).items()}
    spec["calibration"] = [str(c) for c in cal_specs]
    return _clean({
        "source": "computed by the planner" + ("" if req.calibration else " on this store"),
        "spec": spec, "rows": rows, "archive": table.attrs.get("archive"), "assumptions": assumptions,
        "recommendation": table.attrs.get("recommendation"), "crossover": list(table.attrs.get("crossover", [])),
        "warnings": list(table.attrs.get("warnings", [])), "sample_sizes": sizes,
        "curve": curve, "curve_axis": "; ".join(sorted(axis)) or None,
        "scaling_measured": sorted({k.split("/")[-1] for k in scaling}),
    })
