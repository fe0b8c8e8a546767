"""What a throughput measurement means: speed-up with an interval, and why it is below 1 when it is.

``ocrbench measure-scaling`` times one worker (the serial runner), then a Dask run of k
workers sharing the same pages (``run --workers K``), each in a fresh process. Each page's
own time is known at every count, so the speed-up
k x (mean page time at 1 worker) / (mean page time at k workers) gets a
bootstrap interval over pages (Efron & Tibshirani 1993, percentile interval).
When k workers are slower than one, the page times say why: each page took
longer because the workers shared the machine's cores (k x threads asked for
more than it has) or its memory and caches.
"""

from __future__ import annotations

import json
import math
from typing import TYPE_CHECKING, Sequence

import numpy as np

if TYPE_CHECKING:
    import pandas as pd


def speedup_interval(one: Sequence[float], many: Sequence[float], workers: int, *, n_boot: int = 2000,
                     seed: int = 0, level: float = 0.95) -> tuple[float, float, float]:
    """Speed-up of ``workers`` workers from page times (1-worker pages, k-worker pages): (value, low, high)."""
    a, b = np.asarray(one, dtype=float), np.asarray(many, dtype=float)
    if len(a) == 0 or len(b) == 0 or b.mean() <= 0:
        return math.nan, math.nan, math.nan
    value = workers * a.mean() / b.mean()
    rng = np.random.default_rng(seed)
    ma = a[rng.integers(0, len(a), size=(n_boot, len(a)))].mean(axis=1)
    mb = b[rng.integers(0, len(b), size=(n_boot, len(b)))].mean(axis=1)
    boot = workers * ma / np.maximum(mb, 1e-12)
    q = (1 - level) / 2
    return float(value), float(np.quantile(boot, q)), float(np.quantile(boot, 1 - q))


def explain(row: dict, base: dict, cores: int | None) -> str | None:
    """Why ``row`` (k workers) delivers less than ``base`` (1 worker), or None when it does not."""
    k, t = int(row["workers"]), int(row["threads"])
    s = row["pages_per_second"] / base["pages_per_second"] if base["pages_per_second"] else math.nan
    if not s < 1:
        return None
    a = base["busy_seconds"] / base["pages"]
    b = row["busy_seconds"] / row["pages"]
    why = (f"{k} workers x {t} thread(s) ask for {k * t} cores and this machine has {cores}: they took turns"
           if cores and k * t > cores else
           "the workers shared the machine's memory bandwidth and caches (or other load ran meanwhile)")
    return (f"{k} workers: speed-up {s:.3f} < 1 — each page took {b:.3g} s instead of {a:.3g} s at 1 worker "
            f"(x{b / a:.2f}), more than the {k} workers gain; {why}. Plan with fewer workers on this machine.")


def between_pages(gap_seconds_per_page: float) -> tuple[float, float]:
    """(idle time between pages, time hidden by overlapping pages) per page; both >= 0.

    A negative measured gap means the runner overlapped pages (loading the next while recognising
    this one): the overlap is shown as its own positive figure rather than as a negative time.
    """
    g = float(gap_seconds_per_page)
    return max(0.0, g), max(0.0, -g)


def measure_table(target, cards, *, store, workers: int = 1, threads: int = 1, batch_size: int = 16,
                  engine=None, progress=None, sessions: int = 2) -> tuple["pd.DataFrame", list[str]]:
    """Time each card on ``target`` at 1..``workers`` workers, save the rows to ``store``'s scaling table.

    One worker is timed ``sessions`` times, each a fresh process writing a run of its own into ``store``:
    the plan fits on all of them and its band includes their spread. On this project's 2-core machine one
    fresh 6-page session of the seq recogniser ran at 1.44 pages/s where four others ran at 1.95-2.10
    (2026-12-02): a single short session can be such an outlier, and nothing in it shows that it is.

    Returns the rows with speed-up intervals and the positive idle/overlap figures, and the
    explanations of every speed-up below 1. The process start-up is measured too and noted in the rows'
    host description (the planner reads it from there); a K-worker row is a whole Dask run, its start
    and close in the row itself.
    """
    import pandas as pd

    from ocrbench.planning.inputs import save_scaling
    from ocrbench.run.measure import measure_fresh, measure_process_start, measure_scaling, session_options

    say = progress or (lambda _m: None)
    say("timing a fresh process start")
    proc = measure_process_start()
    extra = {"process_start_seconds": proc}
    rows = []
    for card in cards:
        for i in range(max(1, sessions)):
            say(f"timing {card} on one worker" + (f" (session {i + 1} of {sessions})" if sessions > 1 else ""))
            rows.append(measure_fresh(target, card, store=store, options=session_options(engine, threads, batch_size)))
        if workers > 1:
            say(f"timing {card} on 2..{workers} workers")
            more = measure_scaling(target, card, workers=range(2, workers + 1), threads=threads,
                                   batch_size=batch_size, engine=engine)
            rows += more.drop(columns=["speedup"]).to_dict(orient="records")
    df = pd.DataFrame(rows)
    df["host_json"] = [json.dumps(json.loads(h or "{}") | extra, sort_keys=True) for h in df["host_json"]]
    df["process_start_seconds"] = proc
    save_scaling(store, df)
    return describe_rows(df)


def describe_rows(df: "pd.DataFrame") -> tuple["pd.DataFrame", list[str]]:
    """Speed-up with its interval, idle and overlapped time per page (both >= 0), and explanations."""
    df = df.copy()
    notes: list[str] = []
    for c in ("speedup", "speedup_low", "speedup_high", "idle_seconds_per_page", "overlap_seconds_per_page"):
        df[c] = math.nan
    for name, g in df.groupby("recogniser", sort=False):
        base = g.iloc[0].to_dict()
        ones = g[g["workers"] == 1]
        if len(ones) > 1:          # several one-worker sessions: the speed-ups are over their mean
            base |= {"pages_per_second": float(ones["pages_per_second"].mean()),
                     "busy_seconds": float(ones["busy_seconds"].sum()), "pages": int(ones["pages"].sum()),
                     "page_seconds": [t for ps in ones["page_seconds"] if isinstance(ps, list) for t in ps]}
        cores = json.loads(base.get("host_json") or "{}").get("cores")
        for i, r in g.iterrows():
            r = r.to_dict()
            k = int(r["workers"])
            s, lo, hi = (1.0, 1.0, 1.0) if i == g.index[0] and len(ones) == 1 else \
                speedup_interval(base.get("page_seconds") or [], r.get("page_seconds") or [], k, seed=k)
            df.loc[i, ["speedup_low", "speedup_high"]] = [lo, hi]
            df.loc[i, "speedup"] = r["pages_per_second"] / base["pages_per_second"]
            df.loc[i, ["idle_seconds_per_page", "overlap_seconds_per_page"]] = between_pages(r["gap_seconds_per_page"])
            why = None if k == 1 else explain(r, base, cores)
            if why:
                notes.append(f"{name}: {why}")
    return df, notes


def grid_order(threads: Sequence[int], batch_sizes: Sequence[int], workers: Sequence[int],
               cores: int) -> list[dict]:
    """The grid in the order it is timed, most promising first, so a time limit cuts the least promising:
    configurations that use every core (workers x threads = cores) first, then fewer cores; within them the
    middle batch sizes before the extremes."""
    bs = sorted(set(batch_sizes))
    mid = bs[len(bs) // 2]
    cfgs = [{"threads": t, "batch_size": b, "workers": w} for t in sorted(set(threads)) for b in bs
            for w in sorted(set(workers))]
    return sorted(cfgs, key=lambda c: (c["workers"] * c["threads"] > cores,
                                       -min(c["workers"] * c["threads"], cores), abs(bs.index(c["batch_size"]) -
                                                                                    bs.index(mid)),
                                       c["threads"], c["batch_size"]))


def tune(target, card, *, store, threads: Sequence[int] = (1, 2), batch_sizes: Sequence[int] = (8, 16, 32),
         workers: Sequence[int] = (1, 2), pages: int = 6, max_seconds: float = 300.0, cores: int | None = None,
         progress=None, work_dir=None) -> dict:
    """Measure a small grid (threads x batch size x workers) on ``pages`` sample pages, within ``max_seconds``.

    Configurations asking for more cores than the machine has are skipped; the rest are timed most
    promising first (:func:`grid_order`) and none is started that would likely end past ``max_seconds``. Each is timed with
    the real runner (a Dask run of k workers, as ``measure-scaling`` does) into a scratch store;
    the fastest (pages per second of the whole machine) is then timed once more into ``store``,
    with its throughput rows at each worker count, so ``ocrbench plan`` calibrates on it and
    ranks its worker counts. Every other batch size timed at the chosen threads is timed once more into
    ``store`` too (before the chosen one, whose run stays the latest), as a run of its own settings, so
    the plan ranks batch sizes on measurements of the same pages (:mod:`ocrbench.planning.configs`).
    Returns ``grid`` (every configuration measured or why not), ``best``, ``batch_sizes_stored``.
    """
    import os
    import shutil
    import tempfile
    import time
    from pathlib import Path

    import pandas as pd

    from ocrbench.pages import list_pages
    from ocrbench.planning.inputs import save_scaling
    from ocrbench.run.measure import measure_fresh, measure_process_start, measure_scaling, session_options

    say = progress or (lambda _m: None)
    cores = int(cores or os.cpu_count() or 1)
    refs = list_pages(target)[:max(1, pages)]
    grid, t0 = [], time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="ocrbench-tune-", dir=work_dir) as tmp:
        subset = Path(tmp) / "pages"
        subset.mkdir()
        for ref in refs:
            shutil.copy2(ref.path, subset / Path(ref.path).name)
        last = 0.0
        for cfg in grid_order(threads, batch_sizes, workers, cores):
            t, b, w = cfg["threads"], cfg["batch_size"], cfg["workers"]
            if w * t > cores:
                grid.append(cfg | {"pages_per_second": None, "skipped": f"{w * t} cores > {cores}"})
                continue
            if time.perf_counter() - t0 + last > max_seconds:
                grid.append(cfg | {"pages_per_second": None, "skipped": "time limit reached"})
                continue
            say(f"timing threads={t} batch={b} workers={w}")
            t1 = time.perf_counter()
            df = measure_scaling(subset, card, workers=[w], threads=t, batch_size=b, work_dir=tmp)
            last = time.perf_counter() - t1
            grid.append(cfg | {"pages_per_second": float(df["pages_per_second"].iloc[0]), "skipped": None})
        done = [g for g in grid if g["pages_per_second"]]
        if not done:
            from ocrbench.errors import PlanError
            raise PlanError(f"{target}: no configuration could be timed within {max_seconds:g} s")
        best = max(done, key=lambda g: g["pages_per_second"])
        others = sorted({g["batch_size"] for g in done if g["threads"] == best["threads"]} - {best["batch_size"]})
        for b in others:         # kept as runs of their own: the plan ranks batch sizes by what was measured
            say(f"timing batch size {b} into the calibration store")
            measure_fresh(subset, card, store=store, options=session_options(None, best["threads"], b))
        say("timing the chosen configuration into the calibration store")
        opts = session_options(None, best["threads"], best["batch_size"])
        rows = [measure_fresh(subset, card, store=store, options=opts)]
        more = [w for w in sorted(set(workers)) if w > 1 and w * best["threads"] <= cores]
        if more:
            rows += measure_scaling(subset, card, workers=more, threads=best["threads"],
                                    batch_size=best["batch_size"], work_dir=tmp).drop(columns=["speedup"]) \
                .to_dict(orient="records")
    out = pd.DataFrame(rows)
    proc = measure_process_start()
    out["host_json"] = [json.dumps(json.loads(h or "{}") | {"process_start_seconds": proc}, sort_keys=True)
                        for h in out["host_json"]]
    save_scaling(store, out)
    return {"grid": grid, "best": best, "cores": cores, "pages": len(refs), "batch_sizes_stored": others + [best["batch_size"]],
            "seconds": time.perf_counter() - t0, "process_start_seconds": proc}
