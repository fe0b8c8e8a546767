"""Calibrate now, run later: does the plan's P10-P90 band hold for a run in a later process, after other load?

Issue 18's validation ("calibrate in one session, run the archive in a later one, minutes apart, other
load in between: inside P10-P90 in >= 80 % of rounds"). Each round:

1. one process calibrates both demo recognisers (measure-scaling's timed session on demo pages) and plans
   the held-out archive of bench_plan_whole (another renderer), writing the predicted bands to a file;
2. other load: ``ocrbench run`` of both recognisers over the demo pages for at least ``--load-seconds``;
3. a later process per recogniser runs the archive (``ocrbench run``), timed by /usr/bin/time.

    RATIO plan_later_inside_p10_p90_share_<kind>_<pages> <value> >=0.8
    RATIO plan_later_p50_abs_error_<kind>_<pages> <value> <=0.1

Run:  .venv/bin/python tests/benchmarks/bench_plan_later.py [--rounds 3] [--pages 40] [--load-seconds 60]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _bench_support import ROOT, find_models  # noqa: E402
from bench_plan_whole import calibrate, predict, print_ratios, render_archive, run_and_compare  # noqa: E402

sys.path.insert(0, str(ROOT))


def calibrate_process(work: Path, models: Path, pages: int, seed: int, calib_pages: int, draws: int) -> None:
    """The first process: calibrate, describe the archive, plan; the bands go to work/plan.json."""
    log = lambda m: print(m, file=sys.stderr, flush=True)  # noqa: E731
    stores = calibrate(work, models, calib_pages, log)
    held, drawn = render_archive(work / "held", pages, seed=seed)
    rows = predict(stores, held, pages, drawn, draws=draws, seed=seed)
    keep = ("kind", "pages", "wall_seconds_p10", "wall_seconds_p50", "wall_seconds_p90", "startup_seconds")
    (work / "plan.json").write_text(json.dumps({n: {k: r[k] for k in keep} for n, r in rows.items()}),
                                    encoding="utf-8")


def other_load(work: Path, models: Path, seconds: float) -> float:
    """Real work in between: both recognisers over the demo pages, repeated until ``seconds`` have passed."""
    t0, k = time.perf_counter(), 0
    while time.perf_counter() - t0 < seconds:
        subprocess.run([sys.executable, "-m", "ocrbench", "run", str(ROOT / "scans_demo"), "-r",
                        str(models / "ledger-ctc"), "-r", str(models / "ledger-seq"), "--store",
                        str(work / f"load_{k}.sqlite")], capture_output=True, check=True)
        k += 1
    return time.perf_counter() - t0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--models", type=Path, default=None)
    ap.add_argument("--pages", type=int, default=40)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--calib-pages", type=int, default=6)
    ap.add_argument("--draws", type=int, default=1000)
    ap.add_argument("--load-seconds", type=float, default=60.0)
    ap.add_argument("--calibrate-into", type=Path, default=None, help=argparse.SUPPRESS)   # the first process
    ap.add_argument("--seed", type=int, default=0, help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    models = find_models(a.models, "bench_plan_later")
    if a.calibrate_into is not None:
        calibrate_process(a.calibrate_into, models, a.pages, a.seed, a.calib_pages, a.draws)
        return 0
    results: dict[tuple[str, int], list[tuple[float, bool]]] = {}
    for rnd in range(a.rounds):
        with tempfile.TemporaryDirectory(prefix="ocrbench-bench-later-") as tmp:
            work = Path(tmp)
            print(f"round {rnd + 1} of {a.rounds}: calibrating and planning in one process", file=sys.stderr,
                  flush=True)
            subprocess.run([sys.executable, __file__, "--calibrate-into", str(work), "--models", str(models),
                            "--pages", str(a.pages), "--seed", str(200 + rnd), "--calib-pages", str(a.calib_pages),
                            "--draws", str(a.draws)], check=True)
            rows = json.loads((work / "plan.json").read_text(encoding="utf-8"))
            took = other_load(work, models, a.load_seconds)
            print(f"round {rnd + 1}: {took:.0f} s of other load (ocrbench run of the demo pages) in between",
                  flush=True)
            for name, r in rows.items():
                got = run_and_compare(name, models / name, work / "held", r, work / f"run_{name}.sqlite")
                results.setdefault((str(r["kind"]), a.pages), []).append(got)
    print_ratios("plan_later", results)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
