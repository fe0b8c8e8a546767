"""Memory benchmark: the writer's peak memory for 1,000 pages vs 100 pages (Dask engine).

Issue 9: memory must stay flat however large the archive: target peak(1,000) / peak(100) <= 1.2.
The process measured is the client, the single writer: it lists the pages, runs the
scheduler of its LocalCluster, keeps a bounded number of tasks in flight and writes each
page to SQLite as it completes. Each size runs in a fresh child process (so one peak cannot
leak into the other) and reports its own peak resident set size (getrusage(2) ru_maxrss,
which counts this process only, not the worker processes). Pages are small invented ledger
pages (a few lines each), ten distinct ones hard-linked under as many names as needed.

Prints ``RATIO <name> <value> <target>`` lines for tests/benchmarks/run_all.py.

Run: .venv/bin/python tests/benchmarks/bench_memory.py [--small 100] [--large 1000] [--workers 2]
     [--models DIR] [--serial] [--quick]
"""

from __future__ import annotations

import argparse
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from _bench_support import find_models, images_only  # noqa: E402


def make_pages(base: Path, folder: Path, n: int) -> Path:
    folder.mkdir(parents=True)
    sources = sorted(base.glob("*.png"))
    for i in range(n):
        os.link(sources[i % len(sources)], folder / f"page_{i + 1:05d}.png")
    return folder


def base_pages(folder: Path, distinct: int = 10) -> Path:
    from ocrbench import synth

    folder.mkdir(parents=True)
    for i in range(distinct):
        spec = synth.PageSpec(seed=500 + i, lines_per_page=2, width=600, chars_per_line=30, folio=i + 1)
        synth.write_page(folder, f"base_{i:02d}", spec, "png")
    return images_only(folder)


def child(pages: Path, store: Path, card: Path, engine: str, workers: int) -> None:
    """Run once and print this process's peak RSS (kilobytes on Linux)."""
    from ocrbench.run.engine import run_pages

    t0 = time.perf_counter()
    if engine == "dask":
        from ocrbench.run.distributed import DaskOptions, run_distributed

        s = run_distributed(pages, [card], store=store, dask=DaskOptions(workers=workers))
    else:
        s = run_pages(pages, [card], store=store)
    t = time.perf_counter() - t0
    assert not s.failed_pages and s.recognisers[0].pages_done == s.pages_total
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(f"PEAK_RSS_KB {peak} PAGES {s.pages_total} SECONDS {t:.2f}", flush=True)


def measure(pages: Path, store: Path, card: Path, engine: str, workers: int) -> tuple[int, float]:
    out = subprocess.run([sys.executable, __file__, "--child", str(pages), str(store), str(card), engine,
                          str(workers)], capture_output=True, text=True)
    line = [ln for ln in out.stdout.splitlines() if ln.startswith("PEAK_RSS_KB")]
    if out.returncode != 0 or not line:
        raise SystemExit(f"bench_memory: child run failed:\n{out.stderr[-3000:]}")
    parts = line[0].split()
    return int(parts[1]), float(parts[5])


def main(argv=None) -> dict:
    if argv is None and len(sys.argv) > 1 and sys.argv[1] == "--child":
        pages, store, card, engine, workers = sys.argv[2:7]
        child(Path(pages), Path(store), Path(card), engine, int(workers))
        return {}
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--small", type=int, default=100)
    ap.add_argument("--large", type=int, default=1000)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--models", type=Path, default=None)
    ap.add_argument("--serial", action="store_true", help="also measure the serial runner (information)")
    ap.add_argument("--quick", action="store_true", help="50 vs 500 pages")
    a = ap.parse_args(argv)
    if a.quick:
        a.small, a.large = 50, 500
    card = find_models(a.models, "bench_memory") / "ledger-ctc"
    print(f"bench_memory: writer peak RSS, {a.small} vs {a.large} pages, {a.workers} Dask workers, {card}",
          flush=True)
    tmp = Path(tempfile.mkdtemp(prefix="ocrbench-bench-mem-"))
    results: dict = {}
    try:
        base = base_pages(tmp / "base")
        engines = ["dask"] + (["serial"] if a.serial else [])
        for engine in engines:
            for n in (a.small, a.large):
                pages = tmp / f"p{n}"
                if not pages.exists():
                    make_pages(base, pages, n)
                kb, secs = measure(pages, tmp / f"{engine}{n}.sqlite", card, engine, a.workers)
                results[(engine, n)] = kb
                print(f"  {engine:6s} {n:6d} pages: peak RSS {kb / 1024:8.1f} MiB  ({secs:.1f} s)", flush=True)
        for engine in engines:
            ratio = results[(engine, a.large)] / results[(engine, a.small)]
            target = "<=1.2" if engine == "dask" else "info"
            print(f"RATIO peak_memory_{a.large}_vs_{a.small}_pages_{engine} {ratio:.3f} {target}")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return results


if __name__ == "__main__":
    main()
