"""Scale-out benchmark: the serial runner and the Dask engine at 1, 2 (and, where the cores exist, 4, 8, 16)
workers on the same pages, from one run, each side a whole command in a fresh process.

Issue 19: a Dask worker should be as efficient as the serial runner, and scaling out should pay for
its cores. Each side runs as a user meets it: a fresh Python process (``python -c``, so that Dask's
spawned workers do not import this script again) that imports the engine and calls the function
the ``run`` command calls with the recogniser's card *path* (so validating the card is inside the
command), writing a fresh SQLite store; the Dask side lets ``run_distributed`` start its own
LocalCluster of worker processes (1 thread each, onnxruntime 1 intra-op thread: ``run --workers K``)
and close it. Per side, from one run:

* whole: the process's spawn to its exit, and the phases inside it: ``imports`` (spawn until the
  call), ``start-up`` (the call until the first page may start: card validation, the cluster and
  its workers, recogniser sessions and warm-up), ``pages`` (the first page's start to the last
  page's write), ``close`` (the last page to the process's exit: closing the cluster, the
  interpreter's shutdown);
* CPU seconds of the whole command, its worker processes included (``getrusage`` of the reaped
  children), so work done twice shows even when idle cores hide it in the wall-clock;
* pages/hour per core of the pages phase (cores = worker processes; the serial runner counts as
  one, although its page prefetch runs in a second thread, as each Dask worker's does) and
  efficiency against the serial runner.

Ratios: whole command (what a user waits for) and pages phase (the steady state, without the
fixed start-up) apart. The sides alternate ``--repeats`` times and the best of each is kept (the
least disturbed by other work). ``--old`` also times one worker the pre-pipelining way (one page a
task, no prefetch). ``--plan`` calibrates on other pages (``measure_table``: one serial session, then a Dask run of
2 workers in a fresh process, as ``ocrbench measure-scaling --workers 2`` does), asks the
planner for the whole command's time on these pages with 2 workers, and compares its P50 with the
measured 2-worker side.

Worker counts beyond the usable cores are not run (they would only queue for the cores): the
benchmark names each with the cores and memory it would need. The machine's state is printed
first and last (usable cores, load average): on a shared machine the ratios say what the spare
cores allowed, not what the engine can do. To emulate a 2-core machine on a bigger one, pin the
whole benchmark: ``taskset -c 0,1 python ...``.

Prints ``RATIO <name> <value> <target>`` lines for tests/benchmarks/run_all.py.

Run: .venv/bin/python tests/benchmarks/bench_distributed.py [--pages 48] [--repeats 2] [--workers 1,2,4,8,14]
     [--seq] [--old] [--plan] [--models DIR] [--quick]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from _bench_support import find_models, images_only  # noqa: E402
from ocrbench import synth  # noqa: E402

#: One side, in a fresh process: argv = side, pages folder, store, card folder. Prints one PHASES line.
CHILD = r"""
import json, resource, sys, time
t_start = time.time()
side, pages, db, card = sys.argv[1:5]
if side == "serial":
    from ocrbench.run.engine import run_pages
else:
    from ocrbench.run.distributed import DaskOptions, run_distributed
    from ocrbench.run.engine import RunOptions
marks = {}
def progress(ev):
    if ev.kind == "start" and "first" not in marks:
        marks["first"] = time.time()
    elif ev.kind == "page":
        marks["last"] = time.time()
t_call = time.time()
if side == "serial":
    s = run_pages(pages, [card], store=db, progress=progress)
else:
    k, old = int(side[1:].split("-")[0]), side.endswith("-old")
    s = run_distributed(pages, [card], store=db, progress=progress,
                        options=RunOptions(prefetch=False) if old else None,
                        dask=DaskOptions(workers=k, pages_per_task=1 if old else None))
t_return = time.time()
assert not s.failed_pages and s.recognisers[0].pages_done == s.pages_total, s
kib = lambda who: resource.getrusage(who).ru_maxrss      # KiB on Linux
cpu = lambda who: resource.getrusage(who).ru_utime + resource.getrusage(who).ru_stime
print("PHASES " + json.dumps({"t_start": t_start, "t_call": t_call, "first": marks["first"], "last": marks["last"],
                              "t_return": t_return, "rss_self_kib": kib(resource.RUSAGE_SELF),
                              "rss_children_kib": kib(resource.RUSAGE_CHILDREN), "cpu_self": cpu(resource.RUSAGE_SELF),
                              "cpu_children": cpu(resource.RUSAGE_CHILDREN)}), flush=True)
"""


@dataclass
class Timing:
    whole: float          # the process's spawn to its exit
    imports: float        # spawn until the call
    startup: float        # the call until the first page may start
    pages: float          # the first page's start to the last page's write
    close: float          # the last page's write to the process's exit
    cpu: float            # CPU seconds of the process and its reaped children (the workers)
    cpu_workers: float    # of which the worker processes (0 for the serial runner)
    page_seconds: float   # the pages' own times (load to text) summed, as the store recorded them
    rss_client_mib: float
    rss_worker_mib: float  # the largest child process (a worker); 0 for the serial runner

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


def children_cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_CHILDREN)
    return r.ru_utime + r.ru_stime


def time_side(side: str, pages: Path, card: Path, db: Path) -> Timing:
    """One side as a fresh process: the whole command, its phases, its CPU seconds (workers included)."""
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(p for p in (str(ROOT), os.environ.get("PYTHONPATH")) if p)}
    cpu0 = children_cpu()
    t0 = time.time()
    done = subprocess.run([sys.executable, "-c", CHILD, side, str(pages), str(db), str(card)], env=env,
                          capture_output=True, text=True, check=False)
    t_exit = time.time()
    cpu = children_cpu() - cpu0
    line = next((ln for ln in done.stdout.splitlines() if ln.startswith("PHASES ")), None)
    if done.returncode != 0 or line is None:
        raise SystemExit(f"bench_distributed: side {side} failed (exit {done.returncode}):\n{done.stderr[-3000:]}")
    p = json.loads(line[len("PHASES "):])
    return Timing(whole=t_exit - t0, imports=p["t_call"] - t0, startup=p["first"] - p["t_call"],
                  pages=p["last"] - p["first"], close=t_exit - p["last"], cpu=cpu, cpu_workers=p["cpu_children"],
                  page_seconds=page_seconds(db),
                  rss_client_mib=p["rss_self_kib"] / 1024,
                  rss_worker_mib=0.0 if side == "serial" else p["rss_children_kib"] / 1024)


def bench(card: Path, pages: Path, n: int, workers: list[int], repeats: int, tmp: Path, label: str,
          old: bool) -> dict[str, Timing]:
    sides = ["serial"] + [f"w{k}" for k in workers] + (["w1-old"] if old else [])
    best: dict[str, Timing] = {}
    for r in range(repeats):
        for side in sides:
            t = time_side(side, pages, card, tmp / f"{label}-{side}-{r}.sqlite")
            if side not in best or t.key < best[side].key:
                best[side] = t
            print(f"  {label} {side:7s} repeat {r + 1}: {t.whole:7.2f} s whole ({3600 * n / t.whole:,.0f} pages/hour): "
                  f"imports {t.imports:5.2f}, start-up {t.startup:5.2f}, pages {t.pages:6.2f}, close {t.close:5.2f} s; "
                  f"CPU {t.cpu:6.2f} s (workers {t.cpu_workers:5.2f})", flush=True)
    return best


def table(best: dict[str, Timing], n: int) -> None:
    serial_rate = 3600 * n / best["serial"].pages
    print(f"  {'side':7s} {'whole s':>8s} {'imports':>7s} {'start-up':>8s} {'pages s':>8s} {'close':>6s} "
          f"{'CPU s':>7s} {'pages/h':>9s} {'pages/h/core':>12s} {'efficiency':>10s}")
    for side, t in best.items():
        cores = 1 if side == "serial" else int(side[1:].split("-")[0])
        rate = 3600 * n / t.pages
        print(f"  {side:7s} {t.whole:8.2f} {t.imports:7.2f} {t.startup:8.2f} {t.pages:8.2f} {t.close:6.2f} "
              f"{t.cpu:7.2f} {3600 * n / t.whole:9,.0f} {rate / cores:12,.0f} {rate / cores / serial_rate:10.3f}")


def ratios(kind: str, best: dict[str, Timing], workers: list[int]) -> None:
    s, w1 = best["serial"], best["w1"]
    print(f"RATIO serial_vs_1_worker_whole_{kind} {s.whole / w1.whole:.3f} {'>=0.9' if kind == 'ctc' else 'info'}")
    print(f"RATIO serial_vs_1_worker_pages_phase_{kind} {s.pages / w1.pages:.3f} info")
    print(f"RATIO serial_vs_1_worker_cpu_{kind} {s.cpu / w1.cpu:.3f} info")
    if "w2" in best:
        w2 = best["w2"]
        print(f"RATIO dask_2_workers_vs_serial_runner_{kind} {s.whole / w2.whole:.3f} "
              f"{'>=1.0' if kind == 'ctc' else 'info'}")
        print(f"RATIO dask_2_workers_vs_serial_runner_pages_phase_{kind} {s.pages / w2.pages:.3f} info")
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


def split_workers(asked: list[int], cores: int) -> tuple[list[int], list[int]]:
    """(worker counts to run here, counts this machine lacks the cores for)."""
    return [k for k in asked if k <= cores], [k for k in asked if k > cores]


def needs(skipped: list[int], best: dict[str, Timing]) -> None:
    """Name each worker count not run, with the cores and memory it would need (from the 1-worker side)."""
    w1 = best.get("w1")
    for k in skipped:
        mem = (f", about {(w1.rss_client_mib + k * w1.rss_worker_mib) / 1024:.1f} GiB of memory "
               f"(client {w1.rss_client_mib:.0f} MiB + {k} x {w1.rss_worker_mib:.0f} MiB a worker, measured here)"
               if w1 else "")
        print(f"  w{k}: not run: needs {k} usable cores for its workers and one more for the client (this machine "
              f"has {usable_cores()}){mem}; run this benchmark on such a machine (DEVELOPERS.md, Scale-out)")


def plan_check(card: Path, pages: Path, n: int, tmp: Path, measured: dict[str, Timing], kind: str,
               calib_pages: int) -> None:
    """The planner's P50 for this command at 1 and 2 workers, from a calibration on other pages, vs measured."""
    from ocrbench.planning import service
    from ocrbench.planning.inputs import PlanRequest
    from ocrbench.planning.throughput import measure_table

    calib = make_pages(tmp / f"calib-{kind}", calib_pages, seed=91)
    store = tmp / f"calib-{kind}.sqlite"
    t0 = time.time()
    measure_table(calib, [card], store=store, workers=2)
    print(f"  {kind} plan: calibrated on {calib_pages} other pages at 1 and 2 processes in {time.time() - t0:.1f} s",
          flush=True)
    for k, side in ((1, "serial"), (1, "w1"), (2, "w2")):
        if side not in measured:
            continue
        res = service.plan(PlanRequest(calibration=[str(store)], sample=pages, sample_pages=min(20, n), pages=n,
                                       workers=k, review="none", draws=1000, seed=0))
        r = res.table.iloc[0]
        got = measured[side].whole
        err = (r["wall_seconds_p50"] - got) / got
        print(f"  {kind} plan for {k} worker(s): P50 {r['wall_seconds_p50']:.2f} s [{r['wall_seconds_p10']:.2f}-"
              f"{r['wall_seconds_p90']:.2f}] (start-up {r['startup_seconds']:.2f} s); measured {side} {got:.2f} s "
              f"whole: error {100 * err:+.1f} %", flush=True)
        name = {"serial": "serial_runner", "w1": "1_worker", "w2": "2_workers"}[side]
        print(f"RATIO plan_p50_error_{name}_{kind} {abs(err):.3f} {'<=0.1' if side == 'w2' else 'info'}")


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pages", type=int, default=48)
    ap.add_argument("--repeats", type=int, default=2)
    ap.add_argument("--workers", default=None,
                    help="comma-separated worker counts, e.g. 1,2,4,8,14 (default: 1, 2 and each of 4, 8, 16 up to "
                         "the usable cores); counts beyond the usable cores are named with what they need, not run")
    ap.add_argument("--models", type=Path, default=None)
    ap.add_argument("--seq", action="store_true", help="also measure the seq recogniser (information only)")
    ap.add_argument("--old", action="store_true", help="also time 1 worker with one page a task and no prefetch")
    ap.add_argument("--plan", action="store_true", help="also check the planner's 2-worker prediction")
    ap.add_argument("--calib-pages", type=int, default=8, help="pages to calibrate the planner on (--plan)")
    ap.add_argument("--quick", action="store_true", help="8 pages, 1 repeat")
    a = ap.parse_args(argv)
    if a.quick:
        a.pages, a.repeats = 8, 1
    try:
        asked = ([int(w) for w in a.workers.split(",")] if a.workers else
                 [1, 2] + [k for k in (4, 8, 16) if k <= usable_cores()])
    except ValueError:
        ap.error(f"--workers: {a.workers!r} is not a comma-separated list of numbers")
    if any(k < 1 for k in asked):
        ap.error("--workers: every count must be at least 1")
    asked = sorted(set(asked) | {1})
    workers, skipped = split_workers(asked, usable_cores())
    models = find_models(a.models, "bench_distributed")
    import distributed
    import onnxruntime as ort

    print(f"bench_distributed: {machine()}; dask {distributed.__version__}, onnxruntime {ort.__version__}; "
          f"models {models}; workers {workers}" + (f" (not run here: {skipped})" if skipped else ""), flush=True)
    results = {}
    tmp = Path(tempfile.mkdtemp(prefix="ocrbench-bench-dask-"))
    try:
        pages = make_pages(tmp / "pages", a.pages)
        for kind in ["ctc"] + (["seq"] if a.seq else []):
            card = models / f"ledger-{kind}"
            print(f"{kind}: {a.pages} pages, best of {a.repeats}", flush=True)
            results[kind] = bench(card, pages, a.pages, workers, a.repeats, tmp, kind, a.old)
            table(results[kind], a.pages)
            needs(skipped, results[kind])
            if a.plan:
                plan_check(card, pages, a.pages, tmp, results[kind], kind, a.calib_pages)
        print(f"(after: {machine()})")
        for kind, best in results.items():
            ratios(kind, best, workers)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return results


if __name__ == "__main__":
    main()
