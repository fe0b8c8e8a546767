"""The archive's time and money for one recogniser: Monte Carlo P10/P50/P90 on given resources.

Intervals, always: wall-clock comes from a Monte Carlo over (a) bootstrap refits
of the cost model (pages resampled), (b) the archive's page distribution,
(c) the fit residuals and (d) the machine's speed drift. No free scaling:
several workers on one machine are only planned with a measured throughput
table; beyond it Amdahl's law (G. Amdahl 1967) with a fitted serial fraction,
and a warning says so.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np

from ocrbench.errors import PlanError
from ocrbench.planning.archive import Archive, PagePool, simulate_pool
from ocrbench.planning.costmodel import CostModel
from ocrbench.planning.numerics import ScalingFit
from ocrbench.planning.people import Correction, both, budget_fit, effort, money, schedule

# --------------------------------------------------------------------------- prediction


@dataclass
class SerialEstimate:
    """One recogniser's archive time on one worker (Monte Carlo draws), before scaling."""

    model: CostModel
    archive: Archive
    serial_s: np.ndarray      # draws: sum of page times on one worker at calibration threads
    chars: np.ndarray         # draws: total characters
    lines: np.ndarray         # draws: total lines
    warnings: list[str]
    extrapolation: list[dict]
    serial_nodrift_s: np.ndarray | None = None   # the same draws before the machine-speed factor


def _sum_of_draws(values: np.ndarray, n: int, rng: np.random.Generator, exact_limit: int = 5000) -> float:
    """Sum of ``n`` draws with replacement from ``values`` (exact when small, normal approximation when large)."""
    if n <= 0 or len(values) == 0:
        return 0.0
    if n <= exact_limit:
        return float(values[rng.integers(0, len(values), size=n)].sum())
    return float(n * values.mean() + math.sqrt(n) * values.std() * rng.standard_normal())


def _extrapolation(model: CostModel, pools: Sequence[PagePool], archive: Archive) -> tuple[list[str], list[dict]]:
    msgs, rows = [], []
    allw = np.concatenate([p.widths for p in pools]) if pools else np.zeros(0)
    checks = [
        ("line width (px)", allw),
        ("batch padded width (px)", np.array([p.max_padded for p in pools])),
        ("lines per page", np.concatenate([p.n_lines for p in pools]).astype(float)),
        ("page pixels", np.concatenate([p.pixels for p in pools]).astype(float)),
    ]
    if model.kind == "seq":
        checks.append(("decoder steps per line", np.array([p.max_steps for p in pools])))
    measured_both = archive.sample_pages is not None and "n_chars" in archive.sample_lines \
        and "width_px" in archive.sample_lines
    if model.width is not None and model.width.r2 < 0.5 and not measured_both:
        what = ("line widths follow mostly the calibration lines' own" if archive.sample_pages is None
                else "characters per line follow mostly the calibration lines' own")
        msgs.append(f"{model.recogniser}: line width and characters per line are weakly related in the calibration "
                    f"(R^2 {max(model.width.r2, 0):.2f}); in this plan {what}")
    for name, vals in checks:
        if not len(vals):
            continue
        lo, hi = model.ranges[name]
        top = float(vals.max())
        if hi > 0 and top > hi * 1.0001:
            share = float((vals > hi).mean())
            rows.append({"quantity": name, "measured_max": hi, "planned_max": top, "ratio": top / hi,
                         "share_beyond": share})
            msgs.append(f"{model.recogniser}: {name} up to {top:,.0f} exceed the largest measured ({hi:,.0f}) "
                        f"by {100 * (top / hi - 1):.0f}%; the cost model is extrapolated there")
    busy = float(model.quality.get("calibration_seconds") or 0.0)
    if 0 < busy < 30:
        msgs.append(f"{model.recogniser}: the calibration covers only {busy:.1f} s of recognition; a moment's "
                    "slowness of the machine weighs on the whole fit (time the pages more than once, or more pages)")
    if archive.n_pages > model.n_pages:
        ratio = archive.n_pages / model.n_pages
        rows.append({"quantity": "pages", "measured_max": float(model.n_pages), "planned_max": float(archive.n_pages),
                     "ratio": ratio, "share_beyond": 1.0 - model.n_pages / archive.n_pages})
        if ratio > 10:
            msgs.append(f"{model.recogniser}: the archive ({archive.n_pages:,} pages) is {ratio:,.0f}x the "
                        f"{model.n_pages} calibration pages: the plan assumes each page costs what it cost in "
                        "calibration, however long the run (no drift, no slow-down over time was measured)")
    return msgs, rows


#: Default spread of a machine's speed between the calibration and the run (coefficient of variation).
#: Measured on this project's shared 2-core virtual machine: the same 60 pages took the seq recogniser
#: 30.5-39.1 s and the CTC recogniser 19.2-21.9 s in runs minutes apart (about 10 % and 5 %), while
#: three back-to-back calibration sessions of 10 pages varied by only 2-5 %: a calibration cannot see
#: the slower drift. 0.08 is between the two; pass 0 for a dedicated machine, or your own measurement.
SPEED_DRIFT = 0.08

#: The default for an autoregressive (seq) recogniser, whose step-by-step decoding (many small model calls a
#: line) moves more with the machine's state. Measured on the same 2-core machine (2026-12-02 23:03-23:58 UTC,
#: quiet but for the benchmark): the same 40 held-out pages run twice minutes apart took the seq recogniser
#: 23.4/24.7, 26.0/21.1 and 23.4/19.8 s (a coefficient of variation of 11 % from the three pairs, root mean
#: square) and the CTC recogniser 18.8/18.6, 18.6/18.5 and 18.0/16.7 s (3 %). With 0.08 the seq run fell
#: inside the plan's P10-P90 in 8 of 12 rounds, the CTC run in 11 of 12 (bench_plan_whole, bench_plan_later).
SEQ_SPEED_DRIFT = 0.11


def default_drift(kind: str, speed_drift: float) -> float:
    """The drift a plan uses for a recogniser of ``kind``: :data:`SEQ_SPEED_DRIFT` for seq when the drift is
    the default, else the drift given."""
    return SEQ_SPEED_DRIFT if kind == "seq" and speed_drift == SPEED_DRIFT else speed_drift


def estimate_serial(model: CostModel, archive: Archive, *, draws: int = 2000, seed: int = 0,
                    pools: int = 20, speed_drift: float = SPEED_DRIFT, archive_seed: int | None = None) -> SerialEstimate:
    """Monte Carlo of the archive's one-worker time for one recogniser.

    Each draw uses one bootstrap refit of the cost model, one simulated pool of
    pages (itself drawn with a bootstrap refit of width-per-character, and for a
    sample a resample of its pages), a sum over the archive's pages drawn from
    the pool, the fit residuals summed over the batches and pages, and (when
    the calibration timed the same pages several times) a factor for the
    machine's speed: normal with a coefficient of variation of the larger of the
    measured session-to-session spread and ``speed_drift`` (the drift between a
    calibration and a run that the calibration cannot see; :data:`SPEED_DRIFT`).
    """
    rng = np.random.default_rng(seed)
    # The archive's randomness (which pages, lines and characters) has its own stream: recognisers planned
    # with the same archive_seed plan the same pages, so their characters and errors per CER agree.
    prng = np.random.default_rng(seed if archive_seed is None else archive_seed)
    n_pools = max(1, min(pools, draws))
    pool_list: list[PagePool] = []
    for k in range(n_pools):
        wf = model.width if (k == 0 or model.width is None) else model.width.resampled(rng)
        pool_list.append(simulate_pool(model, archive, rng=rng, width_fit=wf, page_rng=prng))
    serial = np.empty(draws)
    nodrift = np.empty(draws)
    chars = np.empty(draws)
    lines = np.empty(draws)
    N = archive.n_pages
    for i in range(draws):
        pool = pool_list[i % n_pools]
        theta = model.boot[i % len(model.boot)] if len(model.boot) else model.coef
        T = model.page_times(pool.X, theta)
        C = pool.n_chars.astype(float)
        L = pool.n_lines.astype(float)
        if N <= 5000:
            idx = prng.integers(0, len(T), size=N)
            s, c, l = T[idx].sum(), C[idx].sum(), L[idx].sum()
            nb = int(pool.n_batches[idx].sum())
        else:
            z = np.array([rng.standard_normal(), *prng.standard_normal(2)])
            s = N * T.mean() + math.sqrt(N) * T.std() * z[0]
            c = N * C.mean() + math.sqrt(N) * C.std() * z[1]
            l = N * L.mean() + math.sqrt(N) * L.std() * z[2]
            nb = int(round(N * pool.n_batches.mean()))
        s += _sum_of_draws(model.batch_resid, nb, rng) + _sum_of_draws(model.page_resid, N, rng)
        s += model.first_page_extra(pool.X, theta)        # nothing loads ahead of the first page
        nodrift[i] = max(s, 0.0)
        cv = max(model.speed_cv, default_drift(model.kind, speed_drift))
        if cv > 0:   # the machine runs a little faster or slower than when it was calibrated
            s *= max(0.2, 1.0 + cv * rng.standard_normal())
        serial[i], chars[i], lines[i] = max(s, 0.0), c, l
    msgs, rows = _extrapolation(model, pool_list, archive)
    return SerialEstimate(model=model, archive=archive, serial_s=serial, chars=chars, lines=lines,
                          warnings=msgs + [f"{model.recogniser}: {n}" for n in model.notes], extrapolation=rows,
                          serial_nodrift_s=nodrift)


# --------------------------------------------------------------------------- resources, goals, money


@dataclass(frozen=True)
class Resources:
    """What runs the archive: ``machines`` x ``workers`` processes x ``threads`` each, and prices.

    Give a price per core-hour (cores reserved = workers x threads x machines)
    or per machine-hour, or neither (then money is not computed).
    """

    workers: int = 1
    threads: int | None = None            # None: as calibrated
    machines: int = 1
    price_core_hour: float | None = None
    price_machine_hour: float | None = None
    pages_per_job: int | None = None      # None: one job per worker

    def __post_init__(self) -> None:
        if self.pages_per_job is not None and self.pages_per_job < 1:
            raise PlanError("pages per job must be at least 1")
        if self.workers < 1 or self.machines < 1 or (self.threads is not None and self.threads < 1):
            raise PlanError("workers, threads and machines must be at least 1")
        for p in (self.price_core_hour, self.price_machine_hour):
            if p is not None and p < 0:
                raise PlanError("prices cannot be negative")


@dataclass(frozen=True)
class Goals:
    deadline_s: float | None = None
    budget: float | None = None


@dataclass(frozen=True)
class AccuracyInput:
    """CER and its interval from the accuracy module's summary (``cer``, ``cer_low``, ``cer_high``)."""

    cer: float
    cer_low: float
    cer_high: float

    def __post_init__(self) -> None:
        if not (0 <= self.cer_low <= self.cer <= self.cer_high):
            raise PlanError(f"CER interval must satisfy 0 <= low <= cer <= high, got "
                            f"{self.cer_low}, {self.cer}, {self.cer_high}")

    @classmethod
    def from_summary(cls, summary: Mapping) -> "AccuracyInput":
        return cls(float(summary["cer"]), float(summary["cer_low"]), float(summary["cer_high"]))


@dataclass
class Option:
    """One recogniser on one set of resources: the row of the side-by-side table."""

    row: dict
    wall: np.ndarray
    serial: SerialEstimate


def _speedup(model: CostModel, res: Resources, scaling: ScalingFit | None) -> tuple[float, list[str]]:
    notes: list[str] = []
    threads = res.threads or model.threads
    factor = 1.0
    if threads != model.threads:
        if scaling is None:
            raise PlanError(f"{model.recogniser}: calibrated with {model.threads} thread(s); planning "
                            f"{threads} needs a scaling measurement at both")
        factor = scaling.thread_factor(threads, model.threads)
    cores = int(model.host.get("cores") or 0)
    w = res.workers
    if w > 1:
        if scaling is None:
            raise PlanError(f"{model.recogniser}: {w} workers need throughput measured at several workers on "
                            f"{model.profile} (ocrbench measure-scaling); linear scaling is not assumed")
        if cores and w * threads > cores:
            capped = max(1, cores // threads)
            notes.append(f"{model.recogniser}: {w} workers x {threads} thread(s) exceed {model.profile}'s "
                         f"{cores} cores; speed-up taken at {capped} worker(s)")
            w = capped
        s, note = scaling.speedup(w, threads)
        if note:
            notes.append(f"{model.recogniser}: {note}")
        slower = scaling.measured_slower(w, threads)
        if slower is not None:
            notes.append(f"{model.recogniser}: {w} workers were measured slower than {slower} on {model.profile}; "
                         f"planned as asked, but {slower} would be faster")
        factor *= s
    if res.machines > 1:
        notes.append(f"{model.recogniser}: {res.machines} machines assumed independent "
                     "(pages split evenly, no shared bottleneck measured)")
    return factor * res.machines, notes


def _pct(a: np.ndarray, q: float) -> float:
    return float(np.percentile(a, q))


def _whole_process(m: CostModel, res: Resources, n_pages: int) -> dict:
    """Per-job costs outside the pages: process start, card check, model loading and warm-up, close.

    Without ``pages_per_job`` every worker runs one job (one start each, all in parallel); with it the
    archive is ``ceil(pages / pages_per_job)`` jobs, run in waves over the workers, each wave starting anew.
    Several workers of one machine without ``pages_per_job`` are one Dask run (``run --workers K``), which
    also starts and closes its cluster. ``measure-scaling --workers K`` times such a run: its start (card
    check, cluster, every worker's sessions) and close are taken as measured for that K (for a K not
    measured, those of the most workers measured). Stores measured
    before that have only the cluster's start and close (``cluster_start_s``), added to a serial session's
    start-up: that plan missed a Dask run's whole command by -23 % on a loaded 2-core machine and by -18 %
    on a quiet one, the start-up and close being 2.4 s planned against 3.9 s measured (DEVELOPERS.md, Scale-out).
    """
    per_job = m.process_start_s + m.startup_s + m.close_s
    total_workers = res.workers * res.machines
    jobs = math.ceil(n_pages / res.pages_per_job) if res.pages_per_job else total_workers
    waves = math.ceil(jobs / total_workers)
    cluster = 0.0
    load = m.startup_s + m.close_s
    if res.workers > 1 and not res.pages_per_job:
        measured = m.dask_start_close_s.get(int(res.workers))
        if measured is None and m.dask_start_close_s:      # K not measured: the most workers that were
            measured = m.dask_start_close_s[max(m.dask_start_close_s)]
        if measured is not None:       # a measured Dask run of K workers: its start and close replace the serial ones
            cluster = max(0.0, measured - load)
        else:
            cluster = m.cluster_start_s
    return {"jobs": jobs, "pages_per_job": res.pages_per_job, "process_start_seconds": m.process_start_s,
            "load_warmup_seconds": load, "startup_seconds_per_job": per_job,
            "cluster_start_seconds": cluster, "startup_seconds": waves * per_job + cluster}


def _compute_part(est: SerialEstimate, res: Resources, scaling: ScalingFit | None) -> tuple[np.ndarray, dict, list[str]]:
    """Wall-clock draws, core-hours and compute cost on ``res``."""
    m = est.model
    speed, notes = _speedup(m, res, scaling)
    whole = _whole_process(m, res, est.archive.n_pages)
    wall = whole["startup_seconds"] + np.maximum(est.serial_s, 0.0) / speed
    threads = res.threads or m.threads
    cores = res.workers * threads * res.machines
    w10, w50, w90 = _pct(wall, 10), _pct(wall, 50), _pct(wall, 90)
    drift_share = None
    if est.serial_nodrift_s is not None and w90 > w10:
        nd = est.serial_nodrift_s / speed
        drift_share = float(np.clip(1.0 - (_pct(nd, 90) - _pct(nd, 10)) / (w90 - w10), 0.0, 1.0))

    def compute_cost(wall_s: float) -> float | None:
        if res.price_core_hour is not None:
            return wall_s / 3600 * cores * res.price_core_hour
        if res.price_machine_hour is not None:
            return wall_s / 3600 * res.machines * res.price_machine_hour
        return None

    row: dict = {
        "recogniser": m.recogniser, "kind": m.kind, "profile": m.profile,
        "cpu_model": m.host.get("cpu_model"), "cores": m.host.get("cores"), "workers": res.workers,
        "threads": threads, "machines": res.machines, "pages": est.archive.n_pages,
        "lines": _pct(est.lines, 50), "characters": _pct(est.chars, 50),
        "characters_p10": _pct(est.chars, 10), "characters_p90": _pct(est.chars, 90),
        "wall_seconds_p10": w10, "wall_seconds_p50": w50, "wall_seconds_p90": w90, **whole,
        "band_drift_share": drift_share, "speed_cv": m.speed_cv,
        "core_hours": w50 / 3600 * cores, "core_hours_p90": w90 / 3600 * cores,
        "compute_cost": compute_cost(w50), "compute_cost_p90": compute_cost(w90),
    }
    return wall, row, notes


def _accuracy_part(accuracy: AccuracyInput | None, chars: float) -> tuple[dict, tuple[float, float, float] | None]:
    if accuracy is None:
        return {k: None for k in ("cer", "cer_low", "cer_high", "char_errors", "char_errors_low",
                                  "char_errors_high")}, None
    errs = (accuracy.cer * chars, accuracy.cer_low * chars, accuracy.cer_high * chars)
    return {"cer": accuracy.cer, "cer_low": accuracy.cer_low, "cer_high": accuracy.cer_high,
            "char_errors": errs[0], "char_errors_low": errs[1], "char_errors_high": errs[2]}, errs


def _goals_part(row: dict, wall: np.ndarray, goals: Goals) -> dict:
    """Deadline (recognition and correction both) and budget."""
    out: dict = {"deadline_seconds": goals.deadline_s, "budget": goals.budget}
    if goals.deadline_s is not None:
        rec_ok = bool(row["wall_seconds_p90"] <= goals.deadline_s)
        people_ok = row["correction_meets_deadline"]
        out["recognition_meets_deadline"] = rec_ok
        out["meets_deadline"] = both(rec_ok, people_ok)
        p = float((wall <= goals.deadline_s).mean())
        out["p_meets_deadline"] = p if people_ok is True else (0.0 if people_ok is False else None)
        out["p_recognition_meets_deadline"] = p
    else:
        out |= {k: None for k in ("recognition_meets_deadline", "meets_deadline", "p_meets_deadline",
                                  "p_recognition_meets_deadline")}
    out["meets_budget"] = budget_fit(row, goals.budget)
    return out


def evaluate_option(est: SerialEstimate, res: Resources, goals: Goals, *, scaling: ScalingFit | None = None,
                    accuracy: AccuracyInput | None = None, correction: Correction = Correction(),
                    sample_size: Mapping | None = None) -> Option:
    """Wall-clock, core-hours, money, errors, people's hours and the goals for one recogniser on ``res``."""
    m = est.model
    wall, row, notes = _compute_part(est, res, scaling)
    acc, errs = _accuracy_part(accuracy, row["characters"])
    row |= acc
    row |= effort(correction, row["lines"], row["characters"], errs)
    row |= schedule(correction, row["people_hours_high"], goals.deadline_s)
    row |= money((row["compute_cost"], row["compute_cost_p90"]), row, correction.price_hour)
    row |= _goals_part(row, wall, goals)
    q = m.batch_quality()
    row |= {"fit_r2_batch": q["r2"], "fit_resid_sd_batch": q["resid_sd"], "fit_r2_page": q["page_r2"],
            "calibration_pages": m.n_pages}
    row["gt_sample_pages"] = None if not sample_size else sample_size.get("pages")
    row["extrapolated"] = bool(est.extrapolation and any(r["quantity"] != "pages" for r in est.extrapolation))
    row["warnings"] = est.warnings + notes
    return Option(row=row, wall=wall, serial=est)
