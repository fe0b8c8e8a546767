"""The whole command's wall-clock, predicted against measured, on an archive the planner has never seen.

Issue 18's validation: calibrate with ``measure-scaling`` (process start-up, model loading and
warm-up, pages) on demo pages; describe a held-out archive drawn by a renderer of this benchmark's
own (not synth.py's layout: another font, type size, line spacing and density) by segmentation
only; predict the P10/P50/P90 wall-clock of the *whole* ``ocrbench run`` command on it; then time
that command with /usr/bin/time. Targets: |P50 - measured| / measured <= 10 % and the measured
time inside P10-P90 (in >= 80 % of rounds).

    RATIO plan_whole_p50_abs_error_<kind>_<pages> <value> <=0.1
    RATIO plan_whole_inside_p10_p90_share_<kind>_<pages> <value> >=0.8

Run:  .venv/bin/python tests/benchmarks/bench_plan_whole.py [--pages 40 400] [--rounds 1] [--calib-pages 6]
"""

from __future__ import annotations

import argparse
import random
import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _bench_support import ROOT, find_models  # noqa: E402

sys.path.insert(0, str(ROOT))

WORDS = ("Paid", "Received", "To", "By", "Cash", "Coals", "Rent", "Wages", "Carriage", "Sundries", "Ledger",
         "Account", "Bills", "Interest", "Stamps", "Freight", "Timber", "Iron", "Hire", "Repairs")


def render_archive(out: Path, n: int, seed: int) -> Path:
    """n pages drawn directly with PIL: sans type of 30 px on 1,500 x 2,000 pages, 26-34 lines, ragged lines."""
    from PIL import Image, ImageDraw, ImageFont

    font = ImageFont.truetype("/usr/share/fonts/truetype/dejavu/DejaVuSans.ttf", 30)
    rnd = random.Random(seed)
    out.mkdir(parents=True, exist_ok=True)
    for i in range(n):
        img = Image.new("L", (1500, 2000), 250)
        d = ImageDraw.Draw(img)
        y = 90
        for _ in range(rnd.randint(26, 34)):
            words = " ".join(rnd.choice(WORDS) for _ in range(rnd.randint(2, 6)))
            amount = f"{rnd.randint(1, 999)}.{rnd.randint(0, 99):02d}"
            d.text((rnd.randint(80, 140), y), f"{rnd.randint(1, 28)} {words}", fill=20, font=font)
            d.text((1200, y), amount, fill=20, font=font)
            y += rnd.randint(52, 58)
        img.save(out / f"h{seed}_{i:04d}.png")
    return out


def timed(cmd: list[str]) -> float:
    done = subprocess.run(["/usr/bin/time", "-f", "WALL %e"] + cmd, capture_output=True, text=True, check=False)
    m = re.search(r"WALL ([0-9.]+)", done.stderr)
    if done.returncode != 0 or not m:
        raise SystemExit(f"bench_plan_whole: {' '.join(cmd)} failed:\n{done.stderr[-2000:]}")
    return float(m.group(1))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--models", type=Path, default=None)
    ap.add_argument("--pages", type=int, nargs="+", default=[40, 400])
    ap.add_argument("--rounds", type=int, default=1)
    ap.add_argument("--calib-pages", type=int, default=6)
    ap.add_argument("--draws", type=int, default=1000)
    a = ap.parse_args(argv)
    models = find_models(a.models, "bench_plan_whole")
    from ocrbench.planning import service
    from ocrbench.planning.inputs import PlanRequest
    from ocrbench.planning.throughput import measure_table

    log = lambda m: print(m, file=sys.stderr, flush=True)  # noqa: E731
    results: dict[tuple[str, int], list[tuple[float, bool]]] = {}
    for rnd in range(a.rounds):
        with tempfile.TemporaryDirectory(prefix="ocrbench-bench-whole-") as tmp:
            work = Path(tmp)
            calib = work / "calib"
            calib.mkdir()
            for p in sorted((ROOT / "scans_demo").glob("*.jpg"))[:a.calib_pages]:
                shutil.copy2(p, calib / p.name)
            for name in ("ledger-ctc", "ledger-seq"):
                card = models / name
                store = work / f"cal_{name}.sqlite"
                log(f"round {rnd + 1}: calibrating {name} on {a.calib_pages} pages")
                measure_table(calib, [card], store=store)
                for n in a.pages:
                    held = render_archive(work / f"held_{n}", n, seed=100 + rnd)
                    res = service.plan(PlanRequest(calibration=[str(store)], sample=held, sample_pages=20,
                                                   pages=n, review="none", draws=a.draws, seed=rnd))
                    r = res.table.iloc[0]
                    log(f"  predicting {name} on {n} pages: P50 {r['wall_seconds_p50']:.1f} s; running it")
                    wall = timed([sys.executable, "-m", "ocrbench", "run", str(held), "--recogniser", str(card),
                                  "--store", str(work / f"run_{name}_{n}.sqlite")])
                    err = (r["wall_seconds_p50"] - wall) / wall
                    inside = bool(r["wall_seconds_p10"] <= wall <= r["wall_seconds_p90"])
                    print(f"{name} ({r['kind']}), {n} pages: predicted P50 {r['wall_seconds_p50']:.1f} s "
                          f"[{r['wall_seconds_p10']:.1f}-{r['wall_seconds_p90']:.1f}], measured {wall:.1f} s "
                          f"(/usr/bin/time), error {100 * err:+.1f}%, inside P10-P90: {inside}", flush=True)
                    results.setdefault((str(r["kind"]), n), []).append((err, inside))
    for (kind, n), got in results.items():
        errs = sorted(abs(e) for e, _ in got)
        print(f"RATIO plan_whole_p50_abs_error_{kind}_{n} {errs[len(errs) // 2]:.3f} <=0.1")
        print(f"RATIO plan_whole_inside_p10_p90_share_{kind}_{n} {sum(i for _, i in got) / len(got):.3f} >=0.8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
