"""Measure throughput on this machine: one timed session, and runs of 1..k workers as ``run`` makes them.

Why: the planner does not assume that k workers are k times faster. It takes
the throughput measured here (pages per second at 1, 2, ... k workers, each
with a given number of intra-op threads) and fits Amdahl's serial fraction
(G. Amdahl 1967) to go beyond. A timed session also gives what the run store
cannot: the start-up (opening and warming the sessions) and the time between
pages that no page's own timing covers (hashing the file, writing the store).

How: one worker is the serial runner (:func:`ocrbench.run.engine.run_pages`) in a
process of its own; K workers are the Dask engine (:func:`ocrbench.run.distributed.run_distributed`)
on a local cluster of K worker processes sharing the page set, exactly as
``run --workers K`` runs it. Throughput is pages over the span from the first
page's start to the last page's write. Rows go to the ``scaling`` table of the
calibration store (:func:`ocrbench.planning.inputs.save_scaling`).
"""

from __future__ import annotations

import datetime as _dt
import json
import multiprocessing as mp
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Sequence

import pandas as pd

from ocrbench.errors import OcrbenchError, PlanError
from ocrbench.run.distributed import sigint_ignored

Clock = Callable[[], float]


@dataclass
class _Timeline:
    """What the progress callback saw: the call, the first page's start, each page's end."""

    t_call: float
    t_begin: float | None = None
    page_ends: list | None = None
    failed: int = 0


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="microseconds")


def measure_session(pages: Path | str, card, *, store: Path | str, options=None, clock: Clock = time.perf_counter,
                    fresh: bool = True, dask=None) -> dict:
    """Run one recogniser over ``pages`` with the real runner, timing the session around it.

    ``dask`` (:class:`ocrbench.run.distributed.DaskOptions`): the pages run as ``run --workers K`` runs them,
    on a local Dask cluster started for it (its start is in ``startup_seconds``), shared among its workers.
    Returns one row of the scaling table (``workers`` = 1, or the cluster's workers) with
    ``startup_seconds`` (call until the first page starts: the card checked, a Dask run's cluster
    started, sessions opened and warmed), ``close_seconds`` in ``host_json`` (the last page until
    the run returned), ``busy_seconds`` (the pages' own ``t_total`` summed),
    ``gap_seconds_per_page`` (time between pages outside their own timing;
    negative when the runner overlaps pages, e.g. by loading ahead) and
    ``pages_per_second``.
    """
    from ocrbench.recognisers.base import EngineOptions
    from ocrbench.recognisers.card import Card, load_card
    from ocrbench.run.engine import RunOptions, run_pages
    from ocrbench.store import RunStore

    t_call = clock()                   # the command checks its card first: that is part of its start-up
    card = card if isinstance(card, Card) else load_card(card)
    if options is None:
        options = RunOptions()
    elif isinstance(options, EngineOptions):
        options = RunOptions(engine=options)
    tl = _Timeline(t_call=t_call, page_ends=[])

    def progress(ev) -> None:
        if ev.kind == "start":
            tl.t_begin = clock()
        elif ev.kind == "page" and not ev.skipped:
            tl.page_ends.append(clock())
            tl.failed += bool(ev.failed)

    if dask is None:
        summary = run_pages(pages, [card], store=store, options=options, clock=clock, progress=progress, fresh=fresh)
    else:
        from ocrbench.run.distributed import run_distributed
        summary = run_distributed(pages, [card], store=store, options=options, dask=dask, clock=clock,
                                  progress=progress, fresh=fresh)
    t_end = clock()
    rs = summary.recognisers[0]
    with RunStore(store, read_only=True) as st:
        info = st.run_info(rs.run_id)
        page_seconds = [float(t) for t in st.run_totals(rs.run_id)["t_total"]]
        busy = float(sum(page_seconds))
    n = len(tl.page_ends)
    if n == 0 or tl.t_begin is None:
        raise PlanError(f"{pages}: no page was processed, nothing to time")
    if rs.pages_failed:
        raise PlanError(f"{pages}: {rs.pages_failed} page(s) failed; time a folder of good pages")
    span = tl.page_ends[-1] - tl.t_begin
    return {
        "measured_at": _now(), "recogniser": card.name, "kind": card.kind, "card_hash": card.card_hash,
        # close_seconds: the last page's write until the run returned (the store finished; a Dask run's cluster closed)
        "host_json": json.dumps(info.host | {"close_seconds": max(0.0, t_end - tl.page_ends[-1])}, sort_keys=True),
        "workers": 1 if dask is None else int(dask.workers or 1),
        "threads": int(options.engine.intra_threads), "pages": n, "wall_seconds": span,
        "pages_per_second": n / span if span > 0 else float("nan"),
        "startup_seconds": tl.t_begin - tl.t_call, "busy_seconds": busy,
        # negative when the runner overlaps work (e.g. loads the next page while recognising this one)
        "gap_seconds_per_page": (span - busy) / n, "run_id": rs.run_id,
        "page_seconds": page_seconds,       # each page's own time (not stored; for intervals of the speed-up)
    }


def session_options(engine, intra: int, batch_size: int):
    """``engine`` (the options ``run`` takes; default ones when None) at ``intra`` threads and ``batch_size``."""
    import dataclasses

    from ocrbench.recognisers.base import EngineOptions

    base = engine if engine is not None else EngineOptions()
    return dataclasses.replace(base, intra_threads=intra, batch_size=batch_size)


def _worker(args: tuple) -> None:
    pages, card_path, store, options, queue, dask = args
    try:
        row = measure_session(pages, card_path, store=store, clock=time.perf_counter, options=options, dask=dask)
        queue.put(("ok", row))
    except BaseException as e:  # noqa: BLE001 - reported to the parent, which raises it
        queue.put(("error", f"{type(e).__name__}: {e}"))


def measure_scaling(pages: Path | str, card_path: Path | str, *, workers: Sequence[int] = (1, 2), threads: int = 1,
                    batch_size: int = 16, engine=None, work_dir: Path | str | None = None, timeout: float = 3600.0,
                    progress: Callable[[int, int], None] | None = None) -> pd.DataFrame:
    """Pages per second with each number of ``workers`` at ``threads`` intra-op threads each, as ``run`` runs them.

    One worker is the serial runner in a process of its own (``run``); K > 1 workers are a local Dask
    cluster of K worker processes sharing the pages (``run --workers K``: the same chunking into
    tasks, the same pipelining inside a worker, the same single writer). Measured this way the speed-up
    is the one a user gets: an earlier version ran K serial runners side by side, each over the whole
    page set, and on 2 cores measured 1.40 where the Dask run gained 1.20 (DEVELOPERS.md, Scale-out).
    Each run writes its own store under ``work_dir`` (a temporary folder by default).
    Returns one row per worker count with the columns of the scaling table.
    """
    from ocrbench.pages import list_pages
    from ocrbench.run.distributed import DaskOptions

    ws = sorted({int(w) for w in workers})
    if not ws or ws[0] < 1:
        raise PlanError("worker counts must be at least 1")
    rows = []
    n_pages = len(list_pages(pages))
    with tempfile.TemporaryDirectory(prefix="ocrbench-scaling-", dir=work_dir) as tmp:
        for k, w in enumerate(ws):
            # one task per worker: each pipelines its share as over a long archive (auto chunking would give
            # a few calibration pages one page a task, none pipelined, and a speed-up no archive run sees)
            dask = DaskOptions(workers=w, threads_per_worker=1, pages_per_task=max(1, -(-n_pages // w))) \
                if w > 1 else None
            got = measure_fresh(pages, card_path, store=Path(tmp) / f"w{w}.sqlite",
                                options=session_options(engine, threads, batch_size), dask=dask, timeout=timeout)
            rows.append(got | {"run_id": None})      # its store is gone with the scratch folder
            if progress:
                progress(k + 1, len(ws))
    df = pd.DataFrame(rows)
    base = df.loc[df["workers"] == df["workers"].min(), "pages_per_second"].iloc[0]
    df["speedup"] = df["pages_per_second"] / base
    return df


def measure_fresh(pages: Path | str, card_path: Path | str, *, store: Path | str, options=None, dask=None,
                  timeout: float = 3600.0) -> dict:
    """:func:`measure_session` in a fresh process, as a command runs: what it imports and sets up on first use
    (the card checker, onnxruntime's first session, Dask) is timed, whatever this process did before.

    Measured in one process, a second recogniser's start-up was 0.46 s against the first's 1.39 s (6 demo
    pages): the first had paid those costs for both, and a run of the second alone pays them again.
    """
    ctx = mp.get_context("spawn")
    queue = ctx.Queue()
    proc = ctx.Process(target=_worker, args=((str(pages), str(card_path), str(store), options, queue, dask),),
                       daemon=dask is None)        # a daemon process may not start Dask's worker processes
    with sigint_ignored():                         # Ctrl-C reaches this process only; it stops the run
        proc.start()
    try:
        status, got = queue.get(timeout=timeout)
    except BaseException:
        proc.terminate()                          # interrupted or failed: stop it now, not after 30 s
        raise
    finally:
        proc.join(timeout=30)
        if proc.is_alive():
            proc.terminate()
    if status != "ok":
        raise OcrbenchError(f"measuring {pages} with {card_path} failed: {got}")
    return got


def measure_process_start(repeats: int = 3, *, timeout: float = 120.0) -> float:
    """Seconds a new process takes before it can run: the interpreter, ocrbench's command line and runner and
    onnxruntime imported (and the interpreter's exit, which the probe pays too).

    The median of ``repeats`` fresh processes (what every job of a split archive pays before its
    sessions open; the sessions' loading and warm-up are timed by :func:`measure_session`).
    """
    import statistics
    import subprocess
    import sys

    times = []
    for _ in range(max(1, repeats)):
        t0 = time.perf_counter()
        # what `ocrbench run` imports before its run starts: the command line, the runner, onnxruntime
        done = subprocess.run([sys.executable, "-c", "import ocrbench.cli.app, ocrbench.run.engine, onnxruntime"],
                              capture_output=True, timeout=timeout, check=False)
        if done.returncode != 0:
            raise PlanError(f"a fresh process could not import the runner: {done.stderr.decode(errors='replace')[-300:]}")
        times.append(time.perf_counter() - t0)
    return float(statistics.median(times))
