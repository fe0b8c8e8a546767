"""Scale-out benchmark: the serial runner and the Dask engine at 1, 2 (and, where the cores exist, 4, 8, 16)
workers on the same pages, from one run.

Issue 19: a Dask worker should be as efficient as the serial runner, and scaling out should pay for
its cores. Each side is timed as a user meets it, the whole command: for Dask, starting a LocalCluster
of worker processes (1 thread each, onnxruntime 1 intra-op thread), every worker opening the
recogniser, then the pages (load, segment, recognise; the client writing each page to a fresh SQLite
store); for the serial runner, opening the recogniser, then the pages. Start-up (the call until the
first page may start: cluster and sessions) is reported separately from the pages phase (the first
page's start to the last page's end). Per side:

* pages/hour over the whole command and over the pages phase;
* pages/hour per core of the pages phase (cores = worker processes; the serial runner counts as
  one, although its page prefetch runs in a second thread, as each Dask worker's now does);
* efficiency against the serial runner: (pages/hour per core) / (serial runner's pages/hour).

The sides alternate ``--repeats`` times and the best of each is kept (the least disturbed by other
work). ``--old`` also times one worker the way the engine ran before pipelining (one page a task, no
prefetch), for the before/after figure.

The machine's state is printed first (usable cores, load average): on a shared machine the ratios
say what the spare cores allowed, not what the engine can do. To emulate a 2-core machine on a
bigger one, pin the whole benchmark: ``taskset -c 0,1 python ...``.

Prints ``RATIO <name> <value> <target>`` lines for tests/benchmarks/run_all.py.

Run: .venv/bin/python tests/benchmarks/bench_distributed.py [--pages 48] [--repeats 2] [--workers 1,2,4]
     [--seq] [--old] [--models DIR] [--quick]
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from _bench_support import find_models, images_only  # noqa: E402
from ocrbench import synth  # noqa: E402

clock = time.perf_counter


@dataclass
class Timing:
    whole: float          # the whole command: cluster start (Dask), sessions, pages
    startup: float        # the call until the first page may start
    pages: float          # the first page's start to the last page's end
    page_seconds: float   # the pages' own times (load to text) summed, as the store recorded them

    @property
    def key(self) -> float:
        return self.whole


def usable_cores() -> int:
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)


def machine() -> str:
    load = " ".join(f"{x:.2f}" for x in os.getloadavg()) if hasattr(os, "getloadavg") else "?"
    return f"{usable_cores()} usable cores (of {os.cpu_count()}), load average {load}"


def make_pages(folder: Path, n: int, seed: int = 90) -> Path:
    synth.write_archive(folder, synth.ArchiveSpec(n_pages=n, lines_per_page=(18, 26), seed=seed))
    return images_only(folder)


def page_seconds(db: Path) -> float:
    import sqlite3

    con = sqlite3.connect(db)
    try:
        return float(con.execute("SELECT SUM(t_total) FROM pages").fetchone()[0])
    finally:
        con.close()


class Phases:
    """A progress callback that notes when pages may start and when the last one ended."""

    def __init__(self) -> None:
        self.start: float | None = None
        self.last: float | None = None

    def __call__(self, ev) -> None:
        if ev.kind == "start" and self.start is None:
            self.start = clock()
        elif ev.kind == "page":
            self.last = clock()


def time_dask(pages: Path, card, workers: int, db: Path, *, old: bool = False) -> Timing:
    from distributed import Client, LocalCluster

    from ocrbench.run.distributed import DaskOptions, run_distributed
    from ocrbench.run.engine import RunOptions

    options = RunOptions(prefetch=False) if old else RunOptions()
    dask = DaskOptions(pages_per_task=1 if old else None)
    ph = Phases()
    t0 = clock()
    with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address="127.0.0.1:0",
                      silence_logs=50) as cluster, Client(cluster) as client:
        s = run_distributed(pages, [card], store=db, options=options, progress=ph,
                            dask=DaskOptions(scheduler=cluster.scheduler_address, pages_per_task=dask.pages_per_task))
        t_end = clock()
        client.close()
    assert not s.failed_pages and s.recognisers[0].pages_done == s.pages_total
    # the whole command also closes its cluster; that is not counted (a user has the answer by then)
    return Timing(whole=t_end - t0, startup=ph.start - t0, pages=ph.last - ph.start, page_seconds=page_seconds(db))


def time_serial(pages: Path, card, db: Path) -> Timing:
    from ocrbench.run.engine import run_pages

    ph = Phases()
    t0 = clock()
    run_pages(pages, [card], store=db, progress=ph)
    t = clock() - t0
    return Timing(whole=t, startup=ph.start - t0, pages=ph.last - ph.start, page_seconds=page_seconds(db))


def bench(card, pages: Path, n: int, workers: list[int], repeats: int, tmp: Path, label: str,
          old: bool) -> dict[str, Timing]:
    sides = ["serial"] + [f"w{k}" for k in workers] + (["w1-old"] if old else [])
    best: dict[str, Timing] = {}
    for r in range(repeats):
        for side in sides:
            db = tmp / f"{label}-{side}-{r}.sqlite"
            if side == "serial":
                t = time_serial(pages, card, db)
            else:
                t = time_dask(pages, card, int(side[1:].split("-")[0]), db, old=side.endswith("-old"))
            if side not in best or t.key < best[side].key:
                best[side] = t
            print(f"  {label} {side:7s} repeat {r + 1}: {t.whole:7.2f} s whole ({3600 * n / t.whole:,.0f} pages/hour), "
                  f"start-up {t.startup:5.2f} s, pages {t.pages:6.2f} s", flush=True)
    return best


def table(best: dict[str, Timing], n: int) -> None:
    serial_rate = 3600 * n / best["serial"].pages
    print(f"  {'side':7s} {'whole s':>8s} {'start-up s':>10s} {'pages s':>8s} {'pages/h':>9s} "
          f"{'pages/h/core':>12s} {'efficiency':>10s}")
    for side, t in best.items():
        cores = 1 if side == "serial" else int(side[1:].split("-")[0])
        rate = 3600 * n / t.pages
        print(f"  {side:7s} {t.whole:8.2f} {t.startup:10.2f} {t.pages:8.2f} {3600 * n / t.whole:9,.0f} "
              f"{rate / cores:12,.0f} {rate / cores / serial_rate:10.3f}")


def ratios(kind: str, best: dict[str, Timing], workers: list[int]) -> None:
    s, w1 = best["serial"], best["w1"]
    print(f"RATIO serial_vs_1_worker_whole_{kind} {s.whole / w1.whole:.3f} {'>=0.9' if kind == 'ctc' else 'info'}")
    print(f"RATIO serial_vs_1_worker_pages_phase_{kind} {s.pages / w1.pages:.3f} info")
    if "w2" in best:
        w2 = best["w2"]
        print(f"RATIO dask_2_workers_vs_serial_runner_{kind} {s.whole / w2.whole:.3f} "
              f"{'>=1.0' if kind == 'ctc' else 'info'}")
        print(f"RATIO dask_2_vs_1_workers_{kind} {w1.whole / w2.whole:.3f} info")
        # ~1 when each worker had a core of its own; ~2 when two workers shared one core
        print(f"RATIO dask_page_time_2_vs_1_workers_{kind} {w2.page_seconds / w1.page_seconds:.3f} info")
    for k in workers:
        if k > 1:
            eff = (s.pages / best[f"w{k}"].pages) / k
            print(f"RATIO dask_{k}_workers_efficiency_vs_serial_{kind} {eff:.3f} info")
    if "w8" in best:
        print(f"RATIO dask_8_vs_1_workers_{kind} {w1.whole / best['w8'].whole:.3f} "
              f"{'>=6' if kind == 'ctc' else 'info'}")
    if "w1-old" in best:
        print(f"RATIO dask_1_worker_pipelined_vs_one_page_a_task_{kind} {best['w1-old'].whole / w1.whole:.3f} info")


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pages", type=int, default=48)
    ap.add_argument("--repeats", type=int, default=2)
    ap.add_argument("--workers", default=None,
                    help="comma-separated worker counts (default: 1, 2 and each of 4, 8, 16 up to the usable cores)")
    ap.add_argument("--models", type=Path, default=None)
    ap.add_argument("--seq", action="store_true", help="also measure the seq recogniser (information only)")
    ap.add_argument("--old", action="store_true", help="also time 1 worker with one page a task and no prefetch")
    ap.add_argument("--quick", action="store_true", help="8 pages, 1 repeat")
    a = ap.parse_args(argv)
    if a.quick:
        a.pages, a.repeats = 8, 1
    workers = ([int(w) for w in a.workers.split(",")] if a.workers else
               [1, 2] + [k for k in (4, 8, 16) if k <= usable_cores()])
    if 1 not in workers:
        workers = [1] + workers
    from ocrbench.recognisers.card import load_card

    models = find_models(a.models, "bench_distributed")
    import distributed
    import onnxruntime as ort

    print(f"bench_distributed: {machine()}; dask {distributed.__version__}, onnxruntime {ort.__version__}; "
          f"models {models}; workers {workers}", flush=True)
    results = {}
    tmp = Path(tempfile.mkdtemp(prefix="ocrbench-bench-dask-"))
    try:
        pages = make_pages(tmp / "pages", a.pages)
        for kind in ["ctc"] + (["seq"] if a.seq else []):
            card = load_card(models / f"ledger-{kind}")
            print(f"{kind}: {a.pages} pages, best of {a.repeats}", flush=True)
            results[kind] = bench(card, pages, a.pages, workers, a.repeats, tmp, kind, a.old)
            table(results[kind], a.pages)
        print(f"(after: {machine()})")
        for kind, best in results.items():
            ratios(kind, best, workers)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return results


if __name__ == "__main__":
    main()
