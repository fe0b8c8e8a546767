"""Tests of the archive planner (ocrbench.planning: numerics, costmodel, archive, estimate, decide).

External references used here, each named beside its check:
* G. Amdahl (1967), "Validity of the single processor approach to achieving
  large scale computing capabilities": speed-up 1 / (s + (1 - s) / n), limit 1 / s;
* scipy.optimize.nnls (reference library) for non-negative least squares;
* Lawson & Hanson (1974), *Solving Least Squares Problems*: the NNLS
  optimality (KKT) conditions;
* Python's datetime.timedelta for duration arithmetic;
* hand-worked arithmetic written out in the tests.

Timings come from a fake machine driven by a fake clock: every stage of every
batch advances the clock by a cost computed from known coefficients, and the
rows are written with the run store's column names (ocrbench/store/CONTRACT.md), so the
planner sees exactly what it would read from a store.
"""

from __future__ import annotations

import datetime as dt
import json
import re

import numpy as np
import pandas as pd
import pytest

from ocrbench.planning.archive import Archive, batch_units
from ocrbench.planning.costmodel import BATCH_FEATURES, batch_feature_matrix, fit_cost_model, fit_cost_models, fit_width
from ocrbench.planning.decide import PlanInputs, crossover, make_plan
from ocrbench.planning.estimate import AccuracyInput, Correction, Goals, Resources
from ocrbench.planning.numerics import ScalingFit, amdahl_max_speedup, amdahl_speedup, fit_serial_fraction, nnls, parse_duration, parse_range
from ocrbench.errors import PlanError
from ocrbench.recognisers.preprocess import width_batches

# --------------------------------------------------------------------------- the fake machine

TRUE = {
    "ctc": {
        "t_preprocess": {"const": 2e-4, "sum_width": 1.5e-6},
        "t_encode": {"const": 3e-3, "area": 4e-7},
        "t_collapse": {"const": 1e-4, "area": 2e-8},
    },
    "seq": {
        "t_preprocess": {"const": 2e-4, "sum_width": 1.5e-6},
        "t_encode": {"const": 3e-3, "n_lines": 2e-4, "area": 3e-7},
        "t_steps": {"steps_max": 1.2e-3, "lines_x_steps": 6e-5, "lines_x_steps_sq_half": 4e-7},
        "t_collapse": {"const": 5e-5, "n_lines": 1e-5},
    },
}
PAGE = {"page_const": 0.02, "pixels": 4e-8, "page_lines": 1e-3}
GAP = 0.003          # seconds between pages outside the page's own timing (store write)
STARTUP = 0.4        # seconds from run start to the first page (model load, warm-up)
BASE = dt.datetime(2024, 3, 1, 9, 0, 0, tzinfo=dt.timezone.utc)


class FakeClock:
    """A clock that only moves when told to: ``clock()`` reads it, ``advance(dt)`` moves it."""

    def __init__(self) -> None:
        self.t = 0.0

    def __call__(self) -> float:
        return self.t

    def advance(self, seconds: float) -> None:
        self.t += seconds


def fake_pages(n: int, *, seed: int, lines=(16, 30), chars=(38, 60), width_noise: int = 12,
               page_widths=(1000, 1300)) -> list[dict]:
    """Page descriptions: line character counts and resized widths (~9 px per character)."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n):
        k = int(rng.integers(lines[0], lines[1] + 1))
        c = rng.integers(chars[0], chars[1] + 1, size=k)
        noise = rng.integers(-width_noise, width_noise + 1, size=k) if width_noise else np.zeros(k, int)
        w = int(rng.integers(page_widths[0], page_widths[1] + 1))
        h = int(1.3 * w) + 30 * max(0, k - 30)
        out.append({"page_id": f"page_{i + 1:03d}.png", "chars": c, "widths": 6 + 9 * c + noise,
                    "width": w, "height": h})
    return out


def _cost(coefs: dict, feats: dict) -> float:
    return sum(v * feats[k] for k, v in coefs.items())


def run_fake(kind: str, pages: list[dict], clock: FakeClock, *, run_id: int, recogniser: str,
             noise: float = 0.0, seed: int = 0, batch_size: int = 16, tables: dict | None = None,
             startup: float = STARTUP) -> dict:
    """Process ``pages`` on the fake machine; append rows with the store's column names to ``tables``."""
    rng = np.random.default_rng(seed)
    jit = (lambda: float(np.exp(noise * rng.standard_normal()))) if noise else (lambda: 1.0)
    t = tables if tables is not None else {"runs": [], "pages": [], "lines": [], "batches": []}
    t_run0 = clock()
    clock.advance(startup)
    for p in pages:
        t0 = clock()
        pixels = p["width"] * p["height"]
        over = _cost(PAGE, {"page_const": 1, "pixels": pixels, "page_lines": len(p["widths"])}) * jit()
        clock.advance(0.6 * over)
        t_load = 0.6 * over
        clock.advance(0.4 * over)
        t_seg = 0.4 * over
        stage_sum = dict.fromkeys(("t_preprocess", "t_encode", "t_steps", "t_collapse"), 0.0)
        widths = [int(w) for w in p["widths"]]
        for no, idx in enumerate(width_batches(widths, batch_size, 1.3)):
            w = np.array([widths[i] for i in idx])
            # as the runner records them: tokens = characters emitted, steps = tokens + end token
            tokens = p["chars"][idx] if kind == "seq" else np.zeros(len(idx), int)
            steps = tokens + 1 if kind == "seq" else np.zeros(len(idx), int)
            padded = int(-(-int(w.max()) // 4) * 4)
            n = len(idx)
            f = {"const": 1, "n_lines": n, "sum_width": int(w.sum()), "area": n * padded,
                 "steps_max": int(steps.max()), "tokens_sum": int(tokens.sum()),
                 "lines_x_steps": n * int(steps.max()), "lines_x_steps_sq_half": n * int(steps.max()) ** 2 / 2}
            row = {"run_id": run_id, "page_id": p["page_id"], "batch_no": no, "n_lines": n,
                   "padded_width": padded, "sum_width": int(w.sum()), "frames": padded // 4,
                   "steps_max": int(steps.max()), "tokens_sum": int(tokens.sum()),
                   "tokens_sq_sum": int((tokens * tokens).sum())}
            for stage in ("t_preprocess", "t_encode", "t_steps", "t_collapse"):
                s0 = clock()
                if stage in TRUE[kind]:
                    clock.advance(_cost(TRUE[kind][stage], f) * jit())
                row[stage] = clock() - s0
                stage_sum[stage] += row[stage]
            t["batches"].append(row)
            for j, i in enumerate(idx):
                t["lines"].append({"run_id": run_id, "page_id": p["page_id"], "line_no": int(i), "x0": 0, "y0": 0,
                                   "x1": 1, "y1": 1, "width_px": widths[i], "text": "x" * int(p["chars"][i]),
                                   "text_post": None, "confidence": 0.9, "char_conf_json": "[]",
                                   "n_chars": int(p["chars"][i]), "steps": int(steps[j]), "batch_no": no,
                                   "t_line": 0.0})
        t_total = clock() - t0
        t["pages"].append({"run_id": run_id, "page_id": p["page_id"], "path": p["page_id"], "content_hash": "h",
                           "status": "done", "error": None, "width": p["width"], "height": p["height"],
                           "n_lines": len(widths), "skew_degrees": 0.0, "t_load": t_load, "t_segment": t_seg,
                           **stage_sum, "t_postprocess": 0.0, "t_total": t_total,
                           "finished_at": (BASE + dt.timedelta(seconds=clock())).isoformat()})
        clock.advance(GAP)   # the store's transaction, outside the page's own timing
    t["runs"].append({"run_id": run_id, "recogniser": recogniser, "kind": kind, "card_path": "x", "card_hash": kind,
                      "settings_json": json.dumps({"batch_size": batch_size, "intra_threads": 1}),
                      "input_dir": "in", "host_json": json.dumps({"hostname": "fakebox", "cores": 2,
                                                                  "intra_threads": 1}),
                      "engine": "local", "ocrbench_version": "test",
                      "started_at": (BASE + dt.timedelta(seconds=t_run0)).isoformat(),
                      "finished_at": (BASE + dt.timedelta(seconds=clock())).isoformat()})
    return t


def frames_of(t: dict) -> dict[str, pd.DataFrame]:
    return {k: pd.DataFrame(v) for k, v in t.items()}


def calibrate(noise=0.0, n=10, width_noise=12, kinds=("ctc", "seq"), seed=1):
    clock = FakeClock()
    pages = fake_pages(n, seed=seed, width_noise=width_noise)
    t = None
    for rid, kind in enumerate(kinds, start=1):
        t = run_fake(kind, pages, clock, run_id=rid, recogniser=f"demo-{kind}", noise=noise, seed=rid, tables=t)
    return frames_of(t)


# --------------------------------------------------------------------------- NNLS


def test_nnls_agrees_with_scipy_and_recovers_known_coefficients():
    import scipy.optimize as scipy_opt   # reference only (the test extra installs scipy)

    rng = np.random.default_rng(3)
    for trial in range(20):
        A = rng.uniform(0, 1, size=(60, 6)) * rng.uniform(1e-3, 1e3, size=6)   # very different column scales
        x_true = rng.uniform(0.5, 2.0, size=6)
        x_true[rng.integers(0, 6, size=2)] = 0.0
        b = A @ x_true + rng.normal(0, 0.01 * np.abs(A @ x_true).mean(), size=60)
        x, rn = nnls(A, b)
        x_ref, rn_ref = scipy_opt.nnls(A, b)   # reference library
        assert rn == pytest.approx(rn_ref, rel=1e-7, abs=1e-9)
        np.testing.assert_allclose(x, x_ref, rtol=1e-5, atol=1e-8 * np.abs(x_ref).max())
    # Known coefficients recovered from synthetic batch timings with 2% noise:
    # time = 3 ms per call + 0.2 ms per line + 0.4 us per padded pixel.
    n = rng.integers(1, 17, size=200).astype(float)
    W = rng.integers(100, 1200, size=200).astype(float)
    A = np.column_stack([np.ones_like(n), n, n * W])
    x_true = np.array([3e-3, 2e-4, 4e-7])
    t = (A @ x_true) * np.exp(0.02 * rng.standard_normal(200))
    x, _ = nnls(A, t)
    np.testing.assert_allclose(x, x_true, rtol=0.10)
    np.testing.assert_allclose(x, scipy_opt.nnls(A, t)[0], rtol=1e-6)   # reference library
    # A problem whose unconstrained solution is negative: KKT conditions (Lawson & Hanson 1974):
    # x >= 0, gradient w = A^T (b - A x) <= 0 where x = 0, and w = 0 where x > 0.
    A = np.array([[1.0, 1.0], [1.0, 2.0], [1.0, 3.0]])
    b = np.array([3.0, 2.0, 1.0])          # falling line: slope -1 unconstrained
    x, _ = nnls(A, b)
    w = A.T @ (b - A @ x)
    assert (x >= 0).all() and x[1] == 0.0
    assert x[0] == pytest.approx(2.0)      # mean of b, worked by hand
    assert w[1] <= 1e-12 and abs(w[0]) <= 1e-12


def test_fit_recovers_fake_machine_coefficients():
    frames = calibrate(noise=0.0)
    for kind in ("ctc", "seq"):
        m = fit_cost_model(frames, f"demo-{kind}", n_boot=20)
        for stage in m.stages:
            want = TRUE[kind][stage.stage]
            for f, v in want.items():
                assert stage.coef.get(f, 0.0) == pytest.approx(v, rel=1e-6), (kind, stage.stage, f)
            extra = {f: c for f, c in stage.coef.items() if f not in want}
            assert all(abs(c) < 1e-9 for c in extra.values()), extra
            assert stage.r2 == pytest.approx(1.0, abs=1e-9)
        for f, v in PAGE.items():
            assert m.page.coef.get(f, 0.0) == pytest.approx(v, rel=1e-6)
        assert m.gap_per_page == pytest.approx(GAP, abs=1e-6)
        assert m.startup_s == pytest.approx(STARTUP, abs=1e-6)
        assert m.width.px_per_char == pytest.approx(9.0, rel=0.02)


def test_fit_with_noise_stays_close_and_reports_quality():
    frames = calibrate(noise=0.03)
    m = fit_cost_model(frames, "demo-seq", n_boot=50)
    q = m.batch_quality()
    assert 0.95 < q["r2"] <= 1.0
    assert q["resid_p10"] < 0 < q["resid_p90"]
    fits = m.fit_table()
    assert {"stage", "features", "coefficients", "r2", "resid_sd", "cv_rmse"} <= set(fits.columns)
    # per-line time at 40 characters within 5% of the true machine's
    true = fit_cost_model(calibrate(noise=0.0), "demo-seq", n_boot=5)
    assert m.line_time(40.0)[0] == pytest.approx(true.line_time(40.0)[0], rel=0.05)


# --------------------------------------------------------------------------- Amdahl


def test_amdahl_worked_example():
    # G. Amdahl (1967): serial fraction 0.05 -> maximum speed-up 1/0.05 = 20.
    assert amdahl_max_speedup(0.05) == pytest.approx(20.0)
    assert amdahl_speedup(0.05, 1e12) == pytest.approx(20.0, rel=1e-9)
    # by hand: n = 2 -> 1 / (0.05 + 0.95 / 2) = 1 / 0.525 = 1.904762
    assert amdahl_speedup(0.05, 2) == pytest.approx(1.904762, rel=1e-6)
    # the fit recovers the serial fraction from exact Amdahl speed-ups
    n = np.array([1, 2, 3, 4])
    assert fit_serial_fraction(n, 1 / (0.05 + 0.95 / n)) == pytest.approx(0.05, abs=1e-12)
    sc = ScalingFit(pd.DataFrame({"workers": n, "threads": 1, "pages_per_second": 2.0 / (0.05 + 0.95 / n)}))
    s, note = sc.speedup(8, 1)          # beyond the measured 4: Amdahl, with a note saying so
    assert s == pytest.approx(1 / (0.05 + 0.95 / 8)) and "beyond" in note
    with pytest.raises(PlanError):
        ScalingFit(pd.DataFrame({"workers": [1], "threads": [1], "pages_per_second": [1.0]})).speedup(2, 1)


def test_durations_and_ranges():
    # Python's datetime.timedelta as the reference for unit arithmetic
    assert parse_duration("6w") == dt.timedelta(weeks=6).total_seconds()
    assert parse_duration("42d") == dt.timedelta(days=42).total_seconds()
    assert parse_duration("1000h") == dt.timedelta(hours=1000).total_seconds()
    assert parse_duration("1.5d") == dt.timedelta(days=1.5).total_seconds()
    for bad in ("6", "six weeks", "-3d", "0h"):
        with pytest.raises(PlanError):
            parse_duration(bad)
    assert parse_range("16-30") == (16, 30) and parse_range("24") == (24, 24)
    with pytest.raises(PlanError):
        parse_range("30-16")


# --------------------------------------------------------------------------- cost arithmetic


def test_cost_arithmetic_hand_worked():
    """Noise-free CTC calibration, 1,000 identical pages, worked out by hand below.

    Each page: 24 lines of 40 characters; resized width 6 + 9 * 40 = 366 px,
    padded to 368 (multiple of 4). Batching (16 at most): one batch of 16, one of 8.
      batch of 16: preprocess 2e-4 + 1.5e-6*16*366 = 0.008984
                   encode     3e-3 + 4e-7*16*368   = 0.0053552
                   collapse   1e-4 + 2e-8*16*368   = 0.00021776   -> 0.01455696
      batch of 8:  preprocess 2e-4 + 1.5e-6*8*366  = 0.004592
                   encode     3e-3 + 4e-7*8*368    = 0.0041776
                   collapse   1e-4 + 2e-8*8*368    = 0.00015888   -> 0.00892848
      page overhead 0.02 + 4e-8*1100*1430 + 1e-3*24 = 0.10692; gap 0.003
      page = 0.13340544 s; 1,000 pages = 133.40544 s on one worker.
    Two workers with a measured speed-up of 1.8: wall = 0.4 + 133.40544/1.8 = 74.5141333 s.
    Core-hours = 74.5141333/3600 * 2 = 0.0413967407; at 0.12 per core-hour: 0.00496760889.
    Characters 1,000*24*40 = 960,000; CER 0.02 -> 19,200 errors; 10 s each -> 53.333 h of correction.
    Full review (every line read at 4 s per line + 1 s per 10 characters, the rate of `ocrbench review`):
    24,000 lines * 4 s + 960,000 / 10 s = 192,000 s = 53.333 h of reading. People: 106.667 h,
    at 20 per hour 2,133.3333; with compute: 2,133.3383. Upper CER 0.03 -> 80 h + 53.333 h = 133.333 h
    -> 2,666.6667 + 0.0049676 = 2,666.6716 (within the budget of 3,000).
    """
    frames = calibrate(noise=0.0, width_noise=0, kinds=("ctc",))
    m = fit_cost_model(frames, "demo-ctc", n_boot=10)
    archive = Archive.from_numbers(1000, "24", "40", page_size=(1100, 1430))
    sc = ScalingFit(pd.DataFrame({"workers": [1, 2], "threads": [1, 1], "pages_per_second": [1.0, 1.8]}))
    inputs = PlanInputs(
        archive=archive, resources=Resources(workers=2, price_core_hour=0.12),
        goals=Goals(deadline_s=60.0, budget=3000.0),
        correction=Correction(seconds_per_error=10.0, price_hour=20.0),
        accuracy={"demo-ctc": AccuracyInput(0.02, 0.015, 0.03)}, scaling={"demo-ctc": sc}, draws=50,
        speed_drift=0.0)                                   # exact figures: no machine drift in the draws
    plan = make_plan([m], inputs)
    r = plan.iloc[0]
    # store timestamps carry microseconds, so the per-page gap is known to ~1 us: rel 1e-5
    assert r["wall_seconds_p10"] == pytest.approx(74.5141333, rel=1e-5)
    assert r["wall_seconds_p90"] == pytest.approx(74.5141333, rel=1e-5)
    assert r["core_hours"] == pytest.approx(0.0413967407, rel=1e-5)
    assert r["compute_cost"] == pytest.approx(0.00496760889, rel=1e-5)
    assert r["characters"] == 960_000
    assert r["char_errors"] == pytest.approx(19_200) and r["char_errors_high"] == pytest.approx(28_800)
    assert r["correction_hours"] == pytest.approx(53.333333, rel=1e-6)
    assert r["review_hours"] == pytest.approx(53.333333, rel=1e-6)
    assert r["people_hours"] == pytest.approx(106.666667, rel=1e-6)
    assert r["cost"] == pytest.approx(2133.3383, rel=1e-6)
    assert r["cost_high"] == pytest.approx(2666.6716, rel=1e-6)
    # the shares of the total: compute 0.0049676 / 2133.3383, people the rest
    assert r["compute_share"] == pytest.approx(0.00496760889 / 2133.3383, rel=1e-5)
    assert r["people_share"] == pytest.approx(2133.3333 / 2133.3383, rel=1e-6)
    assert bool(r["meets_budget"]) is True and bool(r["meets_deadline"]) is False
    # Two workers is all 2 cores allow; the smallest change is a second machine:
    # 0.4 + 133.40544 / 3.6 = 37.457 s <= 60 s.
    rec = plan.attrs["recommendation"]
    assert rec["change"] == "machines 1 -> 2" and rec["machines"] == 2


# --------------------------------------------------------------------------- extrapolation


@pytest.mark.slow
def test_plan_beyond_measured_range_warns():
    frames = calibrate(noise=0.02)
    models = list(fit_cost_models(frames, n_boot=20).values())
    archive = Archive.from_numbers(200_000, "40-80", "150-190", page_size=(2200, 3000))
    plan = make_plan(models, PlanInputs(archive=archive, draws=200))
    warnings = "\n".join(plan.attrs["warnings"])
    assert "line width (px)" in warnings and "exceed the largest measured" in warnings
    assert "decoder steps per line" in warnings       # the seq model's tokens too
    assert "200,000 pages" in warnings and "calibration pages" in warnings
    assert plan["extrapolated"].all()
    # by how much: widths ~6 + 9*190 = 1,716 px against at most ~6 + 9*60 + 12 = 558 measured
    assert any(re.search(r"by (\d+)%", w) and int(re.search(r"by (\d+)%", w).group(1)) > 150
               for w in plan.attrs["warnings"])


@pytest.mark.slow
def test_plan_in_range_has_no_range_warning_and_needs_measured_scaling():
    frames = calibrate(noise=0.02)
    m = fit_cost_model(frames, "demo-ctc", n_boot=20)
    archive = Archive.from_numbers(8, "18-28", "40-55", page_size=(1100, 1430))
    plan = make_plan([m], PlanInputs(archive=archive, draws=200))
    assert not plan["extrapolated"].any()
    with pytest.raises(PlanError, match="linear scaling is not assumed"):
        make_plan([m], PlanInputs(archive=archive, resources=Resources(workers=2), draws=50))


# --------------------------------------------------------------------------- crossover


def test_crossover_solves_the_fitted_models():
    frames = calibrate(noise=0.0)
    seq = fit_cost_model(frames, "demo-seq", n_boot=5)
    ctc = fit_cost_model(frames, "demo-ctc", n_boot=5)
    out = crossover(seq, ctc)
    # By hand from the true coefficients, per line in a batch of B = 16 with width w = a + b c
    # (a, b the fitted px-per-character line) and s = c + 1 steps, the preprocess terms cancel:
    #   seq - ctc = [3e-3 + 2e-4 B + 3e-7 B w + 1.2e-3 s + 6e-5 B s + 4e-7 B s^2 / 2 + 5e-5 + 1e-5 B
    #                - (3e-3 + 4e-7 B w + 1e-4 + 2e-8 B w)] / B
    # a quadratic in c whose positive root is the crossover.
    B, a, b = 16.0, seq.width.intercept, seq.width.px_per_char
    s2 = 4e-7 * B / 2
    s1 = 1.2e-3 + 6e-5 * B
    const = 3e-3 + 2e-4 * B + 5e-5 + 1e-5 * B - 3e-3 - 1e-4
    wcoef = (3e-7 - 4e-7 - 2e-8) * B
    # in c: s = c + 1, w = a + b c
    q2 = s2
    q1 = 2 * s2 + s1 + wcoef * b
    q0 = s2 + s1 + const + wcoef * a
    roots = [r.real for r in np.roots([q2, q1, q0]) if abs(r.imag) < 1e-9 and r.real > 0]
    if out["chars"] is None:
        assert not roots or min(roots) < 1
        assert out["always"] == "seq slower"
    else:
        assert out["chars"] == pytest.approx(min(roots), rel=1e-6)
    assert "characters" in out["text"] or "character" in out["text"]


# --------------------------------------------------------------------------- the mechanics, fake clock


@pytest.mark.slow
@pytest.mark.parametrize("kind", ["ctc", "seq"])
def test_fake_clock_validation_mechanics(kind):
    """Calibrate on 10 pages, predict 60 held-out pages with twice the lines, run them, compare.

    The same procedure as tests/benchmarks/bench_planner.py, on the fake machine.
    """
    clock = FakeClock()
    calib = run_fake(kind, fake_pages(10, seed=11), clock, run_id=1, recogniser="r", noise=0.01, seed=5)
    m = fit_cost_model(frames_of(calib), "r", n_boot=100)
    held = fake_pages(60, seed=12, lines=(32, 60))
    # the planner sees the held-out pages only as segmentation gives them: page sizes and line widths
    pages_df = pd.DataFrame({"page_id": [p["page_id"] for p in held], "width": [p["width"] for p in held],
                             "height": [p["height"] for p in held]})
    lines_df = pd.DataFrame([{"page_id": p["page_id"], "width_px": int(w)} for p in held for w in p["widths"]])
    archive = Archive.from_layouts(pages_df, lines_df, n_pages=60)
    plan = make_plan([m], PlanInputs(archive=archive, draws=1000, seed=3))
    r = plan.iloc[0]
    c2 = FakeClock()
    run_fake(kind, held, c2, run_id=2, recogniser="r", noise=0.01, seed=6)
    measured = c2()
    assert r["wall_seconds_p10"] < r["wall_seconds_p50"] < r["wall_seconds_p90"]
    assert abs(r["wall_seconds_p50"] - measured) / measured < 0.05
    assert r["wall_seconds_p10"] <= measured <= r["wall_seconds_p90"]
    # lines per page doubled: beyond the calibrated 16-30, and the plan says so
    assert any("lines per page" in w for w in plan.attrs["warnings"])


@pytest.mark.slow
def test_interleaved_runs_and_whole_second_timestamps_are_not_misread():
    """Recognisers taking turns page by page share each page's loading: no gap is attributed, and a note says so.

    Timestamps to the second (as a store may hold) cannot time a gap of milliseconds: likewise.
    A session measured around the run (ocrbench.run.measure) supplies both instead.
    """
    clock = FakeClock()
    pages = fake_pages(6, seed=2)
    t = {"runs": [], "pages": [], "lines": [], "batches": []}
    for i, p in enumerate(pages):
        for rid, kind in ((1, "ctc"), (2, "seq")):
            sub = run_fake(kind, [p], clock, run_id=rid, recogniser=f"demo-{kind}", seed=i,
                           startup=STARTUP if (i, rid) == (0, 1) else 0.0)
            for k in ("pages", "lines", "batches"):
                t[k] += sub[k]
    t["runs"] = [{**sub["runs"][0], "run_id": rid, "recogniser": f"demo-{k}", "kind": k,
                  "started_at": BASE.isoformat()} for rid, k in ((1, "ctc"), (2, "seq"))]
    m = fit_cost_model(frames_of(t), "demo-seq", n_boot=5)
    assert m.gap_per_page == 0.0 and any("took turns" in n for n in m.notes)
    m = fit_cost_model(frames_of(t), "demo-seq", n_boot=5,
                         session={"gap_seconds_per_page": GAP, "startup_seconds": STARTUP})
    assert m.gap_per_page == GAP and m.startup_s == STARTUP and not m.notes
    # repeated sessions that ran at different speeds widen the interval by that spread
    archive = Archive.from_numbers(2000, "20-30", "40-50", page_size=(1100, 1430))
    band = {}
    for cv in (0.0, 0.10):
        m = fit_cost_model(frames_of(t), "demo-seq", n_boot=20, session={
            "gap_seconds_per_page": GAP, "startup_seconds": STARTUP, "speed_cv": cv, "sessions": 3})
        r = make_plan([m], PlanInputs(archive=archive, draws=1000, speed_drift=0.0)).iloc[0]
        band[cv] = (r["wall_seconds_p90"] - r["wall_seconds_p10"]) / r["wall_seconds_p50"]
    # P10-P90 of a normal factor with sd 0.10 spans 2 x 1.2816 x 0.10 = 0.256 (normal quantiles)
    assert band[0.0] < 0.05 and 0.2 < band[0.10] < 0.32

    frames = calibrate(noise=0.0, kinds=("ctc",))
    frames["pages"]["finished_at"] = frames["pages"]["finished_at"].str.replace(r"\.\d+", "", regex=True)
    m = fit_cost_model(frames, "demo-ctc", n_boot=5)
    assert m.gap_per_page == 0.0 and m.startup_s == 0.0
    assert any("whole seconds" in n for n in m.notes)


def test_pages_overlapped_by_loading_ahead():
    """A runner that loads the next page while recognising this one hides part of the shorter of the two.

    Fake session: each page's wall time is batch + overhead - 0.6 * min(batch, overhead), except the
    first page's, whose loading nothing can hide (the runner's prefetch starts with it). The session's
    span (all the planner is told besides the store) must give back 0.6, and the held-out prediction
    must follow the same rule.
    """
    phi = 0.6

    def span_of(t):
        b = pd.DataFrame(t["batches"]).assign(
            bt=lambda x: x[["t_preprocess", "t_encode", "t_steps", "t_collapse"]].sum(axis=1))
        bsum = b.groupby("page_id")["bt"].sum()
        pg = pd.DataFrame(t["pages"]).set_index("page_id")
        o = pg["t_total"] - bsum.reindex(pg.index).fillna(0)
        hidden = phi * np.minimum(bsum.reindex(pg.index).fillna(0), o)
        hidden.iloc[0] = 0.0                                # the first page: nothing loads ahead of it
        return float((pg["t_total"] - hidden).sum()), float(pg["t_total"].sum())

    calib = run_fake("ctc", fake_pages(10, seed=21), FakeClock(), run_id=1, recogniser="r")
    span, busy = span_of(calib)
    session = {"gap_seconds_per_page": (span - busy) / 10, "startup_seconds": STARTUP, "run_id": 1}
    m = fit_cost_model(frames_of(calib), "r", session=session, n_boot=20)
    assert m.overlap == pytest.approx(phi, rel=1e-6) and m.gap_per_page == pytest.approx(0.0, abs=1e-12)
    held = fake_pages(60, seed=22, lines=(32, 60))
    measured, _ = span_of(run_fake("ctc", held, FakeClock(), run_id=2, recogniser="r"))
    pages_df = pd.DataFrame({"page_id": [p["page_id"] for p in held], "width": [p["width"] for p in held],
                             "height": [p["height"] for p in held]})
    lines_df = pd.DataFrame([{"page_id": p["page_id"], "width_px": int(w)} for p in held for w in p["widths"]])
    plan = make_plan([m], PlanInputs(archive=Archive.from_layouts(pages_df, lines_df, n_pages=60), draws=400))
    assert plan.iloc[0]["wall_seconds_p50"] - STARTUP == pytest.approx(measured, rel=0.03)


def test_characters_from_width_regress_to_the_calibration_mean():
    """Ledger lines span the page: width says little about characters. Estimates must not spread wildly."""
    rng = np.random.default_rng(4)
    c = rng.integers(15, 56, size=300).astype(float)
    w = 1000 + 0.5 * c + rng.normal(0, 120, size=300)          # almost unrelated, as in ledgers
    fit = fit_width(c, w)
    est = fit.chars(w, np.random.default_rng(5))
    # least squares of characters on width (numpy.polyfit as the reference) and the calibration's spread
    slope, icpt = np.polyfit(w, c, 1)
    assert fit.chars_per_px == pytest.approx(slope) and fit.chars_intercept == pytest.approx(icpt)
    assert abs(est.mean() - c.mean()) < 2.0 and est.std() < 1.5 * c.std()
    # a strong relation (about 9 px per character) is followed closely
    w2 = 6 + 9 * c + rng.normal(0, 5, size=300)
    fit2 = fit_width(c, w2)
    assert fit2.px_per_char == pytest.approx(9.0, rel=0.02) and fit2.r2 > 0.99
    assert np.abs(fit2.chars(w2) - c).mean() < 1.0


def test_lines_cut_into_pieces_are_batched_as_pieces():
    """A card with split_gap cuts a ledger line at wide gaps; the runner batches the pieces.

    Hand-worked: a line of 30 characters in pieces 100, 200 and 100 px wide has 30 - 2 = 28 tokens
    (the two joining spaces are not decoded), shared 7, 14, 7 in proportion to width.
    """
    m = fit_cost_model(calibrate(noise=0.0, kinds=("seq",)), "demo-seq", n_boot=5, split_gap=1.0)
    rng = np.random.default_rng(0)
    w, t = batch_units(m, np.array([400.0]), np.array([30]), [np.array([100.0, 200.0, 100.0])], rng)
    assert list(w) == [100, 200, 100] and list(t) == [7, 14, 7]
    # without measured pieces: the calibration's pieces per line (here 1: the fake machine never splits)
    assert m.pieces_per_line == pytest.approx(1.0)
    w, t = batch_units(m, np.array([400.0, 300.0]), np.array([30, 20]), None, rng)
    assert list(w) == [400, 300] and list(t) == [30, 20]
    # per-line time of a split line is k pieces' time: k = 2 pieces of half width and (c - 1) / 2 tokens
    m2 = fit_cost_model(calibrate(noise=0.0, kinds=("seq",)), "demo-seq", n_boot=5)
    object.__setattr__(m2, "split_gap", 1.0)
    m2.pieces_per_line = 2.0
    whole = fit_cost_model(calibrate(noise=0.0, kinds=("seq",)), "demo-seq", n_boot=5)
    B = whole.batch_size
    wd = whole.width.intercept + whole.width.px_per_char * 41
    X = batch_feature_matrix([B], [wd / 2], [B * wd / 2], [21.0], [B * 20.0], [B * 400.0])
    assert m2.line_time(41.0)[0] == pytest.approx(2 * (X @ whole.coef[:len(BATCH_FEATURES)])[0] / B)


def test_bad_inputs_raise_plan_errors():
    frames = calibrate(noise=0.0, n=1, kinds=("ctc",))
    with pytest.raises(PlanError, match="at least 2 pages"):
        fit_cost_model(frames, "demo-ctc")
    with pytest.raises(PlanError, match="no run of recogniser"):
        fit_cost_model(frames, "nope")
    with pytest.raises(PlanError):
        Archive(n_pages=0, source="x", lines_per_page=(1, 2), chars_per_line=(1, 2))
    with pytest.raises(PlanError):
        AccuracyInput(0.1, 0.2, 0.3)


@pytest.mark.slow
def test_default_speed_drift_widens_the_band_as_a_normal_factor():
    """Without a measured session spread, the default drift (coefficient of variation 0.08) still widens the
    band: P10-P90 of a normal factor with sd 0.08 spans 2 x 1.2816 x 0.08 = 0.205 of the median (normal
    quantiles); a larger measured spread wins over the default."""
    frames = calibrate(noise=0.0, kinds=("ctc",))
    archive = Archive.from_numbers(5000, "24", "40", page_size=(1100, 1430))
    band = {}
    for cv in (0.0, 0.15):
        m = fit_cost_model(frames, "demo-ctc", n_boot=20, session={"speed_cv": cv, "sessions": 3,
                                                                     "gap_seconds_per_page": 0.0})
        r = make_plan([m], PlanInputs(archive=archive, draws=2000)).iloc[0]
        band[cv] = (r["wall_seconds_p90"] - r["wall_seconds_p10"]) / r["wall_seconds_p50"]
    assert 0.17 < band[0.0] < 0.24 and 0.33 < band[0.15] < 0.45      # 2 x 1.2816 x 0.15 = 0.384
    with pytest.raises(PlanError):
        PlanInputs(archive=archive, speed_drift=1.5)


@pytest.mark.slow
def test_a_seq_recogniser_gets_the_wider_default_drift_it_was_measured_to_need():
    """The seq default (0.11, measured from same-page runs minutes apart: estimate.SEQ_SPEED_DRIFT) spans
    2 x 1.2816 x 0.11 = 0.282 of the median (normal quantiles); a drift given explicitly is used as given."""
    from ocrbench.planning.estimate import SEQ_SPEED_DRIFT, default_drift

    frames = calibrate(noise=0.0, kinds=("seq",))
    archive = Archive.from_numbers(5000, "24", "40", page_size=(1100, 1430))
    m = fit_cost_model(frames, "demo-seq", n_boot=20, session={"speed_cv": 0.0, "sessions": 3,
                                                                 "gap_seconds_per_page": 0.0})
    r = make_plan([m], PlanInputs(archive=archive, draws=2000)).iloc[0]
    band = (r["wall_seconds_p90"] - r["wall_seconds_p10"]) / r["wall_seconds_p50"]
    assert 0.25 < band < 0.32
    assert default_drift("seq", 0.08) == SEQ_SPEED_DRIFT == 0.11
    assert default_drift("ctc", 0.08) == 0.08 and default_drift("seq", 0.02) == 0.02


def test_timeline_reads_microsecond_and_whole_second_timestamps():
    """Start-up and gaps from ISO timestamps as the store writes them (datetime.isoformat, the reference).

    isoformat() drops the fraction when it is zero, so a microsecond store may hold a value like
    '...:05+00:00' among '...:05.250000+00:00'; both are read with datetime.fromisoformat.
    Hand-worked: run starts 09:00:00; pages take 0.5 s each (t_total) and finish at 01.0, 01.75, 03.0:
    start-up = 1.0 - 0.5 = 0.5 s; gaps = (0.75 - 0.5, 1.25 - 0.5) = (0.25, 0.75) s.
    """
    from ocrbench.planning.timeline import WHOLE_SECONDS_NOTE, timeline

    t0 = BASE
    fin = [t0 + dt.timedelta(seconds=s) for s in (1.0, 1.75, 3.0)]
    runs = pd.DataFrame({"run_id": [1], "started_at": [t0.isoformat()]})
    pages = pd.DataFrame({"run_id": [1, 1, 1], "page_id": ["a", "b", "c"], "status": ["done"] * 3,
                          "t_total": [0.5, 0.5, 0.5], "finished_at": [t.isoformat() for t in fin]})
    assert pages["finished_at"][0].endswith(":01+00:00")           # no fraction written for .000000
    gaps, startup, notes = timeline(runs, pages, [1])
    assert startup == pytest.approx(0.5) and not notes
    assert sorted(gaps.values()) == pytest.approx([0.25, 0.75])
    # an older store: whole seconds everywhere -> nothing attributed, and the note says why
    pages["finished_at"] = [t.replace(microsecond=0).isoformat() for t in fin]
    gaps, startup, notes = timeline(runs, pages, [1])
    assert gaps == {} and startup is None and notes == [WHOLE_SECONDS_NOTE]
