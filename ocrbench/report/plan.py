"""The archive plan shown in a report: read a plan file, or compute one with the planner from the store.

Two kinds of plan file are accepted by ``ocrbench report --plan``:

* **a plan description** (TOML or JSON object with a ``pages`` key), computed
  here with :mod:`ocrbench.planner` on the report's own store as calibration.
  Keys (all but ``pages`` optional; a ``[plan]`` table may hold them)::

      pages = 180000               # pages in the archive
      deadline = "6w"              # s, m, h, d or w
      budget = 4000.0              # money, in the same unit as the prices
      currency = "GBP"             # a label only
      workers = 4                  # worker processes
      machines = 1                 # machines of the calibration machine's kind
      threads = 1                  # intra-op threads per worker (default: as calibrated)
      price_core_hour = 0.05       # or price_machine_hour
      seconds_per_error = 10.0     # human correction effort per character error
      correction_price_hour = 20.0 # what an hour of correction costs (omit: not priced)
      lines_per_page = "16-30"     # describe pages by numbers instead of by the store's pages
      chars_per_line = "38-60"
      curve_max_workers = 16       # right end of the wall-clock-against-workers figure
      draws = 2000                 # Monte Carlo draws
      seed = 0

* **plan results** (JSON): a list of objects, one per recogniser, as
  ``ocrbench plan --json`` prints them (``recogniser``, ``wall_seconds_p10``,
  ``wall_seconds_p50``, ``wall_seconds_p90``, ``core_hours``, ``cost``,
  ``meets_deadline`` ...), or an object holding such a list under
  ``recognisers``, ``options`` or ``plan``. These are shown as given.

Workers: the planner assumes no speed-up from several worker processes on one
machine unless it was measured (a scaling table). When none is given, ``W``
workers on ``M`` machines are planned as ``W x M`` independent one-worker
machines of the calibration machine's kind, and the report says so.
"""

from __future__ import annotations

import json
import math
import tomllib
from dataclasses import asdict, dataclass, fields
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from ocrbench import planner as P
from ocrbench.errors import InputError, PlanError

__all__ = ["PlanSpec", "PlanResults", "load_plan_file", "compute_plan", "plan_from_results"]


@dataclass(frozen=True)
class PlanSpec:
    """What to plan: the archive, the resources, the goals and the correction effort (see the module docstring)."""

    pages: int
    deadline: str | None = None
    budget: float | None = None
    currency: str = ""
    workers: int = 1
    machines: int = 1
    threads: int | None = None
    price_core_hour: float | None = None
    price_machine_hour: float | None = None
    seconds_per_error: float = P.DEFAULT_SECONDS_PER_ERROR
    correction_price_hour: float | None = None
    lines_per_page: str | None = None
    chars_per_line: str | None = None
    curve_max_workers: int = 16
    draws: int = 2000
    seed: int = 0

    def __post_init__(self) -> None:
        if int(self.pages) < 1:
            raise PlanError(f"plan: pages must be at least 1, got {self.pages}")
        if self.workers < 1 or self.machines < 1 or self.curve_max_workers < 1:
            raise PlanError("plan: workers, machines and curve_max_workers must be at least 1")
        if self.deadline is not None:
            P.parse_duration(self.deadline)
        if (self.lines_per_page is None) != (self.chars_per_line is None):
            raise PlanError("plan: give both lines_per_page and chars_per_line, or neither (then the store's "
                            "pages describe the archive)")

    @classmethod
    def from_mapping(cls, data: Mapping[str, Any], *, source: str = "plan") -> "PlanSpec":
        """Build from a TOML/JSON table; unknown keys are refused (a typo must not pass silently)."""
        table = dict(data.get("plan", data)) if isinstance(data.get("plan"), Mapping) else dict(data)
        known = {f.name for f in fields(cls)}
        bad = sorted(set(table) - known)
        if bad:
            raise PlanError(f"{source}: unknown key(s) {', '.join(bad)}; known: {', '.join(sorted(known))}")
        if "pages" not in table:
            raise PlanError(f"{source}: the plan needs 'pages' (the archive's page count)")
        for k in ("lines_per_page", "chars_per_line", "deadline"):
            if k in table and table[k] is not None and not isinstance(table[k], str):
                table[k] = str(table[k]) if k != "deadline" else table[k]
        try:
            return cls(**table)
        except TypeError as e:
            raise PlanError(f"{source}: {e}") from e

    def describe(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class PlanResults:
    """Plan rows computed elsewhere (``ocrbench plan --json``), shown as given."""

    rows: list[dict]
    source: str


def load_plan_file(path: Path | str) -> PlanSpec | PlanResults:
    """Read ``--plan FILE`` (.toml or .json); raises InputError naming the file and the problem."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8-sig")
    except OSError as e:
        raise InputError(p, f"cannot read the plan file ({e.strerror or e})") from e
    except UnicodeDecodeError as e:
        raise InputError(p, f"the plan file is not UTF-8 text (byte offset {e.start})") from e
    if p.suffix.lower() == ".toml":
        try:
            data: Any = tomllib.loads(text)
        except tomllib.TOMLDecodeError as e:
            raise InputError(p, f"not valid TOML: {e}") from e
    else:
        try:
            data = json.loads(text)
        except json.JSONDecodeError as e:
            raise InputError(p, f"not valid JSON: {e}") from e
    try:
        if isinstance(data, list):
            return PlanResults(_check_rows(data, p), str(p))
        if isinstance(data, Mapping):
            for key in ("recognisers", "options", "plan"):
                if isinstance(data.get(key), list):
                    return PlanResults(_check_rows(data[key], p), str(p))
            return PlanSpec.from_mapping(data, source=str(p))
    except PlanError as e:
        raise InputError(p, str(e)) from e
    raise InputError(p, "a plan file holds a plan description (an object with 'pages') or plan results (a list)")


def _check_rows(rows: list, p: Path) -> list[dict]:
    if not rows or not all(isinstance(r, Mapping) and "recogniser" in r for r in rows):
        raise PlanError("plan results must be a list of objects, each with a 'recogniser'")
    return [dict(r) for r in rows]


def _clean(v: Any) -> Any:
    """JSON-ready: numpy scalars to Python, NaN to None, containers recursively."""
    if isinstance(v, Mapping):
        return {str(k): _clean(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_clean(x) for x in v]
    if isinstance(v, np.generic):
        v = v.item()
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


#: Columns of a plan row copied into each recogniser's entry of the report.
ROW_KEYS = ("workers", "threads", "machines", "pages", "characters", "wall_seconds_p10", "wall_seconds_p50",
            "wall_seconds_p90", "core_hours", "core_hours_p90", "compute_cost", "compute_cost_p90", "cer",
            "cer_low", "cer_high", "char_errors", "char_errors_low", "char_errors_high", "correction_hours",
            "correction_hours_low", "correction_hours_high", "correction_cost", "correction_cost_high", "cost",
            "cost_high", "deadline_seconds", "meets_deadline", "p_meets_deadline", "budget", "meets_budget",
            "fit_r2_batch", "calibration_pages", "extrapolated")


def plan_from_results(results: PlanResults) -> dict:
    """The report's plan section from rows computed elsewhere (no workers curve)."""
    rows = {str(r["recogniser"]): {k: _clean(r.get(k)) for k in ROW_KEYS} for r in results.rows}
    return {"source": results.source, "spec": None, "rows": rows, "archive": None, "assumptions": [],
            "recommendation": None, "crossover": [], "warnings": [], "curve": [], "curve_axis": None}


def compute_plan(frames: Mapping[str, pd.DataFrame], spec: PlanSpec, runs: Sequence[Mapping[str, Any]], *,
                 accuracy: Mapping[str, tuple[float, float, float]] | None = None,
                 scaling: Mapping[str, P.ScalingFit] | None = None) -> dict:
    """Fit each run's cost model on the store and plan the archive ``spec`` describes.

    ``runs``: the report's runs (``name``, ``run_id``). ``accuracy``: recogniser
    name -> (CER, low, high) for the correction effort. ``scaling``: measured
    throughput at several workers (by recogniser name); without it workers are
    planned as independent one-worker machines (see the module docstring).
    Returns the JSON-ready plan section: ``rows`` by recogniser name, ``curve``
    (wall-clock at 1..curve_max_workers), the planner's recommendation,
    crossover, warnings, assumptions and archive description.
    """
    scaling = dict(scaling or {})
    models = []
    for r in runs:
        models.append(P.fit_cost_model(frames, r["name"], run_ids=[int(r["run_id"])], seed=spec.seed))
    described_by = None
    if spec.lines_per_page is not None:
        archive = P.Archive.from_numbers(spec.pages, spec.lines_per_page, spec.chars_per_line)
    else:
        # The pages as read by the most accurate recogniser (its character counts are closest to the truth).
        def key(r: Mapping[str, Any]) -> tuple:
            a = (accuracy or {}).get(r["name"])
            return (a is None, a[0] if a else 0.0, int(r["run_id"]))

        best = min(runs, key=key)
        archive = P.Archive.from_store_frames(frames, run_id=int(best["run_id"]), n_pages=spec.pages)
        described_by = (f"the archive's pages are described by the store's pages as read by {best['name']} "
                        f"(run {best['run_id']}{', the most accurate' if (accuracy or {}).get(best['name']) else ''}): "
                        "lines per page, characters per line and line widths are resampled from them")
    as_machines = not scaling
    notes = [described_by] if described_by else []
    if as_machines and spec.workers > 1:
        notes.append(f"no throughput was measured at several workers on one machine: the {spec.workers} workers "
                     f"x {spec.machines} machine(s) are planned as {spec.workers * spec.machines} independent "
                     "one-worker machines of the calibration machine's kind (pages split evenly)")

    def resources(workers: int) -> P.Resources:
        if as_machines:
            return P.Resources(workers=1, threads=spec.threads, machines=workers * spec.machines,
                               price_core_hour=spec.price_core_hour, price_machine_hour=spec.price_machine_hour)
        return P.Resources(workers=workers, threads=spec.threads, machines=spec.machines,
                           price_core_hour=spec.price_core_hour, price_machine_hour=spec.price_machine_hour)

    goals = P.Goals(deadline_s=P.parse_duration(spec.deadline) if spec.deadline else None, budget=spec.budget)
    correction = P.Correction(seconds_per_error=spec.seconds_per_error, price_hour=spec.correction_price_hour)
    acc = {name: P.AccuracyInput(*v) for name, v in (accuracy or {}).items() if None not in v}
    inputs = P.PlanInputs(archive=archive, resources=resources(spec.workers), goals=goals, correction=correction,
                          accuracy=acc, scaling=scaling, draws=spec.draws, seed=spec.seed)
    table = P.make_plan(models, inputs)
    rows = {}
    for rec in table.to_dict("records"):
        rows[str(rec["recogniser"])] = {k: _clean(rec.get(k)) for k in ROW_KEYS}

    # Wall-clock against workers: the same Monte Carlo draws as the plan (make_plan seeds model i with seed + i).
    curve = []
    for i, m in enumerate(models):
        est = P.estimate_serial(m, archive, draws=spec.draws, seed=spec.seed + i)
        sc = scaling.get(m.recogniser) if scaling else None
        for w in range(1, spec.curve_max_workers + 1):
            try:
                opt = P.evaluate_option(est, resources(w), goals, scaling=sc, accuracy=acc.get(m.recogniser),
                                        correction=correction)
            except PlanError:
                continue
            o = opt.row
            curve.append({"recogniser": m.recogniser, "kind": m.kind, "workers": w,
                          "wall_seconds_p10": o["wall_seconds_p10"], "wall_seconds_p50": o["wall_seconds_p50"],
                          "wall_seconds_p90": o["wall_seconds_p90"], "cost": o["cost"],
                          "meets_deadline": o["meets_deadline"]})
    return _clean({
        "source": "computed from this store by the planner",
        "spec": spec.describe(),
        "rows": rows,
        "archive": table.attrs.get("archive"),
        "assumptions": list(table.attrs.get("assumptions", [])) + notes,
        "recommendation": table.attrs.get("recommendation"),
        "crossover": list(table.attrs.get("crossover", [])),
        "warnings": list(table.attrs.get("warnings", [])),
        "curve": curve,
        "curve_axis": ("independent one-worker machines" if as_machines else
                       f"workers on {spec.machines} machine(s), scaling as measured"),
        "fits": table.attrs["fits"].to_dict("records") if isinstance(table.attrs.get("fits"), pd.DataFrame) else [],
    })
