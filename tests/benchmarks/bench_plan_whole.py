"""The whole command's wall-clock, predicted against measured, on an archive the planner has never seen.

Issue 18's validation: calibrate with ``measure-scaling`` (process start-up, model loading and
warm-up, pages) on demo pages; describe a held-out archive drawn by a renderer of this benchmark's
own (not synth.py's layout: another font, type size, line spacing and density) by segmentation
only; predict the P10/P50/P90 wall-clock of the *whole* ``ocrbench run`` command on it; then time
that command with /usr/bin/time. Targets: |P50 - measured| / measured <= 10 % and the measured
time inside P10-P90 (in >= 80 % of rounds).

    RATIO plan_whole_p50_abs_error_<kind>_<pages> <value> <=0.1
    RATIO plan_whole_inside_p10_p90_share_<kind>_<pages> <value> >=0.8

Both recognisers are planned in one plan (one archive description: the sample's characters are
estimated once, and printed against the characters drawn).

Run:  .venv/bin/python tests/benchmarks/bench_plan_whole.py [--pages 40 400] [--rounds 3] [--calib-pages 6]
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


def render_archive(out: Path, n: int, seed: int) -> tuple[Path, int]:
    """n pages drawn directly with PIL: sans type of 30 px on 1,500 x 2,000 pages, 26-34 lines, ragged lines.
    Returns the folder and the characters drawn (spaces included, one between the text and the amount)."""
    from PIL import Image, ImageDraw, ImageFont

    font = ImageFont.truetype("/usr/share/fonts/truetype/dejavu/DejaVuSans.ttf", 30)
    rnd = random.Random(seed)
    out.mkdir(parents=True, exist_ok=True)
    chars = 0
    for i in range(n):
        img = Image.new("L", (1500, 2000), 250)
        d = ImageDraw.Draw(img)
        y = 90
        for _ in range(rnd.randint(26, 34)):
            words = " ".join(rnd.choice(WORDS) for _ in range(rnd.randint(2, 6)))
            amount = f"{rnd.randint(1, 999)}.{rnd.randint(0, 99):02d}"
            x = rnd.randint(80, 140)          # drawn in this order, as the first measurements were
            left = f"{rnd.randint(1, 28)} {words}"
            d.text((x, y), left, fill=20, font=font)
            d.text((1200, y), amount, fill=20, font=font)
            chars += len(left) + 1 + len(amount)
            y += rnd.randint(52, 58)
        img.save(out / f"h{seed}_{i:04d}.png")
    return out, chars


def timed(cmd: list[str]) -> float:
    done = subprocess.run(["/usr/bin/time", "-f", "WALL %e"] + cmd, capture_output=True, text=True, check=False)
    m = re.search(r"WALL ([0-9.]+)", done.stderr)
    if done.returncode != 0 or not m:
        raise SystemExit(f"bench_plan_whole: {' '.join(cmd)} failed:\n{done.stderr[-2000:]}")
    return float(m.group(1))


def calibrate(work: Path, models: Path, calib_pages: int, log) -> dict[str, Path]:
    """Each demo recogniser timed by measure-scaling's session (start-up, loading, warm-up, pages) on demo pages."""
    from ocrbench.planning.throughput import measure_table

    calib = work / "calib"
    calib.mkdir(exist_ok=True)
    for p in sorted((ROOT / "scans_demo").glob("*.jpg"))[:calib_pages]:
        shutil.copy2(p, calib / p.name)
    stores = {}
    for name in ("ledger-ctc", "ledger-seq"):
        stores[name] = work / f"cal_{name}.sqlite"
        log(f"calibrating {name} on {calib_pages} pages")
        measure_table(calib, [models / name], store=stores[name])
    return stores


def predict(stores: dict[str, Path], held: Path, n: int, drawn: int, *, draws: int, seed: int) -> dict[str, dict]:
    """One plan for both recognisers (one archive description), rows by recogniser; prints the characters
    the archive description holds against those drawn."""
    from ocrbench.planning import service
    from ocrbench.planning.inputs import PlanRequest

    res = service.plan(PlanRequest(calibration=[str(p) for p in stores.values()], sample=held, sample_pages=20,
                                   pages=n, review="none", draws=draws, seed=seed))
    rows = {str(r["recogniser"]): r for r in res.table.to_dict(orient="records")}
    est = next(iter(rows.values()))["characters"]
    print(f"archive of {n} pages: characters estimated from the sample's line shapes {est:,.0f} (P50), drawn "
          f"{drawn:,} (ratio {est / drawn:.3f}); the same for every recogniser: "
          f"{len({round(r['characters']) for r in rows.values()}) == 1}", flush=True)
    return rows


def run_and_compare(name: str, card: Path, held: Path, r: dict, store: Path) -> tuple[float, bool]:
    """Time the whole `ocrbench run` command and compare it with the plan's range: (P50 error, inside)."""
    wall = timed([sys.executable, "-m", "ocrbench", "run", str(held), "--recogniser", str(card),
                  "--store", str(store)])
    err = (r["wall_seconds_p50"] - wall) / wall
    inside = bool(r["wall_seconds_p10"] <= wall <= r["wall_seconds_p90"])
    print(f"{name} ({r['kind']}), {r['pages']} pages: predicted P50 {r['wall_seconds_p50']:.1f} s "
          f"[{r['wall_seconds_p10']:.1f}-{r['wall_seconds_p90']:.1f}], measured {wall:.1f} s "
          f"(/usr/bin/time), error {100 * err:+.1f}%, inside P10-P90: {inside}", flush=True)
    pages = pages_phase(store)
    print(f"  where: pages phase predicted {r['wall_seconds_p50'] - r['startup_seconds']:.1f} s, measured "
          f"{pages:.1f} s (store timestamps); the rest (start-up, close) predicted {r['startup_seconds']:.1f} s, "
          f"measured {wall - pages:.1f} s", flush=True)
    return err, inside


def pages_phase(store: Path) -> float:
    """The first page's start to the last page's write, from the store's microsecond timestamps."""
    import datetime as dt
    import sqlite3

    con = sqlite3.connect(str(store))
    try:
        rows = con.execute("SELECT finished_at, t_total FROM pages WHERE status = 'done'").fetchall()
    finally:
        con.close()
    ends = [(dt.datetime.fromisoformat(f).timestamp(), float(t or 0.0)) for f, t in rows]
    first = min(ends)
    return max(e for e, _ in ends) - (first[0] - first[1])


def print_ratios(prefix: str, results: dict[tuple[str, int], list[tuple[float, bool]]]) -> None:
    for (kind, n), got in results.items():
        errs = sorted(abs(e) for e, _ in got)
        print(f"{kind}, {n} pages: {len(got)} round(s)", flush=True)
        print(f"RATIO {prefix}_p50_abs_error_{kind}_{n} {errs[len(errs) // 2]:.3f} <=0.1")
        print(f"RATIO {prefix}_inside_p10_p90_share_{kind}_{n} {sum(i for _, i in got) / len(got):.3f} >=0.8")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--models", type=Path, default=None)
    ap.add_argument("--pages", type=int, nargs="+", default=[40, 400])
    ap.add_argument("--rounds", type=int, default=1)
    ap.add_argument("--calib-pages", type=int, default=6)
    ap.add_argument("--draws", type=int, default=1000)
    a = ap.parse_args(argv)
    models = find_models(a.models, "bench_plan_whole")
    log = lambda m: print(m, file=sys.stderr, flush=True)  # noqa: E731
    results: dict[tuple[str, int], list[tuple[float, bool]]] = {}
    for rnd in range(a.rounds):
        with tempfile.TemporaryDirectory(prefix="ocrbench-bench-whole-") as tmp:
            work = Path(tmp)
            log(f"round {rnd + 1} of {a.rounds}")
            stores = calibrate(work, models, a.calib_pages, log)
            for n in a.pages:
                held, drawn = render_archive(work / f"held_{n}", n, seed=100 + rnd)
                rows = predict(stores, held, n, drawn, draws=a.draws, seed=rnd)
                for name in stores:
                    log(f"  running {name} on {n} pages (predicted P50 {rows[name]['wall_seconds_p50']:.1f} s)")
                    got = run_and_compare(name, models / name, held, rows[name], work / f"run_{name}_{n}.sqlite")
                    results.setdefault((str(rows[name]["kind"]), n), []).append(got)
    print_ratios("plan_whole", results)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
