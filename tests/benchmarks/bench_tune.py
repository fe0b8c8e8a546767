"""Does `ocrbench tune` choose well? Its bounded grid's choice against an exhaustive grid on this machine.

Issue 18's target: the configuration tune chooses delivers >= 0.9x the pages per hour of the
best configuration of an exhaustive grid (threads x batch size x workers), both timed here on
the same sample pages of the demo archive with the demo recognisers.

    RATIO tune_chosen_over_best_<recogniser> <value> >=0.9

Run:  .venv/bin/python tests/benchmarks/bench_tune.py [--pages 6] [--max-seconds 300] [--models DIR]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _bench_support import ROOT, find_models  # noqa: E402

sys.path.insert(0, str(ROOT))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--models", type=Path, default=None)
    ap.add_argument("--pages", type=int, default=6)
    ap.add_argument("--max-seconds", type=float, default=300.0, help="tune's own time bound")
    ap.add_argument("--recognisers", nargs="+", default=["ledger-ctc"])
    ap.add_argument("--batch-sizes", default="4,8,16,32,64", help="the exhaustive grid's batch sizes")
    a = ap.parse_args(argv)
    models = find_models(a.models, "bench_tune")
    from ocrbench.planning.throughput import tune
    from ocrbench.run.measure import measure_scaling

    cores = os.cpu_count() or 1
    sample = ROOT / "scans_demo"
    log = lambda m: print(m, file=sys.stderr, flush=True)  # noqa: E731
    for name in a.recognisers:
        card = models / name
        with tempfile.TemporaryDirectory(prefix="ocrbench-bench-tune-") as tmp:
            res = tune(sample, card, store=Path(tmp) / "t.sqlite", pages=a.pages, max_seconds=a.max_seconds,
                       progress=log)
            chosen = res["best"]
            log(f"{name}: tune chose {chosen} in {res['seconds']:.0f} s; timing the exhaustive grid")
            pages = Path(tmp) / "pages"
            import shutil

            pages.mkdir()
            for p in sorted(sample.glob("*.jpg"))[:a.pages]:
                shutil.copy2(p, pages / p.name)
            grid = {}
            for t in (1, 2, 4):
                for b in (int(x) for x in a.batch_sizes.split(",")):
                    for w in (1, 2, 4):
                        if w * t > cores:
                            continue
                        df = measure_scaling(pages, card, workers=[w], threads=t, batch_size=b, work_dir=tmp)
                        grid[(t, b, w)] = float(df["pages_per_second"].iloc[0])
                        log(f"  threads={t} batch={b} workers={w}: {grid[(t, b, w)]:.3f} pages/s")
            best = max(grid.values())
            mine = grid.get((chosen["threads"], chosen["batch_size"], chosen["workers"]))
            print(f"{name}: exhaustive best {max(grid, key=grid.get)} {best:.3f} pages/s; tune's choice "
                  f"{mine:.3f} pages/s in the exhaustive timing ({len(grid)} configurations)")
            print(f"RATIO tune_chosen_over_best_{name} {mine / best:.3f} >=0.9")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
