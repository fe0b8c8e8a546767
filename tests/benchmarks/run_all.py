"""The one benchmark command: run every benchmark under tests/benchmarks/ and print one table of ratios.

Every ``bench_*.py`` here runs in its own subprocess, one after another (so they do not
disturb each other's timings), with its output shown as it runs. A benchmark reports
each figure on a line of its own::

    RATIO <name> <value> <target>

``name`` has no spaces; ``value`` is a number; ``target`` is ``>=X``, ``<=X`` or ``info``
(no target). At the end one table lists every ratio of this single run with its target
and whether it was met. Nothing here fails on a missed target: speed targets are
measured and reported, not asserted (tests/benchmarks is not part of the default test
run). The exit status is 1 only when a benchmark crashed or printed no ratio.

Run:  .venv/bin/python tests/benchmarks/run_all.py [--quick] [--only NAME ...] [--timeout S] [--models DIR]

``--quick`` passes each benchmark the smaller sizes listed in QUICK_ARGS below (for a
smoke run; the ratios of a full run are the ones to record).
"""

from __future__ import annotations

import argparse
import os
import re
import signal
import subprocess
import sys
import threading
import time
from dataclasses import dataclass
from pathlib import Path

HERE = Path(__file__).resolve().parent

#: Smaller sizes per benchmark for --quick (their own options).
QUICK_ARGS = {
    "bench_distributed": ["--quick"],
    "bench_memory": ["--quick"],
    "bench_runner": ["--pages", "2", "--repeats", "2"],
    "bench_accuracy": ["--pages", "300", "--repeats", "2"],
    "bench_planner": ["--rounds", "1", "--calib-pages", "6", "--held-pages", "20"],
    "bench_pages": ["4"],
    "bench_postprocess": ["--pages", "6", "--boot", "500"],
    "bench_variant": ["--pages", "4", "--boot", "500"],
    "bench_route": ["--pages", "3", "--shares", "0.25", "--boot", "300"],
    "bench_quality": ["--quick", "--repeats", "2"],
    "bench_tune": ["--pages", "3", "--max-seconds", "60", "--batch-sizes", "8,16"],
    "bench_repeat_guard": ["--pages", "1", "--rounds", "2"],
    "bench_plan_whole": ["--pages", "20", "--rounds", "1"],
    "bench_plan_later": ["--pages", "20", "--rounds", "1", "--load-seconds", "10"],
}

#: Benchmarks that take ``--models DIR`` (a folder with ledger-ctc/ and ledger-seq/).
TAKES_MODELS = {"bench_distributed", "bench_memory", "bench_runner", "bench_planner", "bench_postprocess",
                "bench_variant", "bench_route", "bench_quality", "bench_tune", "bench_repeat_guard",
                "bench_plan_whole", "bench_plan_later", "bench_heldout_strata"}

RATIO_RE = re.compile(r"^RATIO\s+(\S+)\s+(\S+)\s*(.*)$")
TARGET_RE = re.compile(r"^(>=|<=|>|<)\s*([0-9.]+)\s*x?$")


@dataclass
class Ratio:
    bench: str
    name: str
    value: float
    target: str

    @property
    def met(self) -> bool | None:
        """True/False against the target, None when it is information only."""
        m = TARGET_RE.match(self.target.strip())
        if not m:
            return None
        op, x = m.group(1), float(m.group(2))
        return {">=": self.value >= x, "<=": self.value <= x, ">": self.value > x, "<": self.value < x}[op]


def parse_ratios(bench: str, text: str) -> list[Ratio]:
    """The RATIO lines of one benchmark's output."""
    out = []
    for line in text.splitlines():
        m = RATIO_RE.match(line.strip())
        if m:
            try:
                value = float(m.group(2))
            except ValueError:
                continue
            out.append(Ratio(bench, m.group(1), value, m.group(3).strip() or "info"))
    return out


def run_one(path: Path, args: list[str], timeout: float | None) -> tuple[int | None, str, float]:
    """Run a benchmark, echoing its output as it comes; returns (exit status or None on timeout, output, s).

    It runs in a session of its own, so a timeout stops it with every process it started (Dask workers).
    """
    t0 = time.perf_counter()
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    proc = subprocess.Popen([sys.executable, str(path), *args], stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                            text=True, cwd=HERE.parents[1], env=env, start_new_session=True)
    lines: list[str] = []

    def pump() -> None:
        assert proc.stdout is not None
        for line in proc.stdout:
            print(f"  | {line}", end="", flush=True)
            lines.append(line)

    reader = threading.Thread(target=pump, daemon=True)
    reader.start()
    try:
        rc: int | None = proc.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
        rc = None
    reader.join(timeout=10)
    return rc, "".join(lines), time.perf_counter() - t0


def table(ratios: list[Ratio], problems: list[str]) -> str:
    head = ("benchmark", "ratio", "value", "target", "met")
    rows = [(r.bench, r.name, f"{r.value:.3f}", r.target,
             {True: "yes", False: "NO", None: "-"}[r.met]) for r in ratios]
    widths = [max(len(h), *(len(row[i]) for row in rows)) if rows else len(h) for i, h in enumerate(head)]
    fmt = "  ".join(f"{{:{'>' if i == 2 else '<'}{w}}}" for i, w in enumerate(widths))
    out = [fmt.format(*head), fmt.format(*("-" * w for w in widths))]
    out += [fmt.format(*row) for row in rows]
    out += [f"!! {p}" for p in problems]
    return "\n".join(out)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="smaller sizes (smoke run)")
    ap.add_argument("--only", nargs="+", default=None, help="run only these benchmarks (e.g. bench_memory)")
    ap.add_argument("--timeout", type=float, default=None, help="seconds allowed per benchmark")
    ap.add_argument("--models", type=Path, default=None,
                    help="demo models folder for the benchmarks that run recognisers (default: their own, models/)")
    a = ap.parse_args(argv)
    benches = sorted(HERE.glob("bench_*.py"))
    if a.only:
        benches = [b for b in benches if b.stem in a.only or b.name in a.only]
    ratios: list[Ratio] = []
    problems: list[str] = []
    started = time.strftime("%Y-%m-%d %H:%M:%S")
    t_all = time.perf_counter()
    for b in benches:
        args = QUICK_ARGS.get(b.stem, []) if a.quick else []
        if a.models is not None and b.stem in TAKES_MODELS:
            args = [*args, "--models", str(a.models.resolve())]
        print(f"== {b.name} {' '.join(args)}", flush=True)
        rc, text, secs = run_one(b, args, a.timeout)
        found = parse_ratios(b.stem, text)
        ratios += found
        print(f"== {b.name}: exit {rc}, {secs:.0f} s, {len(found)} ratio(s)\n", flush=True)
        if rc is None:
            problems.append(f"{b.stem}: stopped after {a.timeout:g} s")
        elif rc != 0:
            problems.append(f"{b.stem}: exit status {rc}")
        elif not found:
            problems.append(f"{b.stem}: printed no RATIO lines")
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    print(f"Ratios of one run, started {started}, {time.perf_counter() - t_all:.0f} s, {cores} usable cores"
          f"{', quick sizes' if a.quick else ''}:")
    print(table(ratios, problems))
    return 1 if problems else 0


if __name__ == "__main__":
    raise SystemExit(main())
