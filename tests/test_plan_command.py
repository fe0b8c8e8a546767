"""End-to-end checks of ``ocrbench plan`` and ``ocrbench.run.measure`` with the real runner and store.

The recognisers are the tiny ONNX models of tests/_tiny_models.py (real
models run by onnxruntime, small enough for milliseconds), the pages come from
ocrbench.synth. External references: the synthetic pages' own ground truth
(their .json line boxes) for segmentation counts; Python's datetime for the
deadline; hand arithmetic for core-hours and cost, written out beside the checks.
"""

from __future__ import annotations

import datetime as dt
import json
import sys
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import CliRunner

sys.path.insert(0, str(Path(__file__).resolve().parent))

from ocrbench import synth  # noqa: E402
from ocrbench.planning import inputs as planio  # noqa: E402
from ocrbench.cli.app import app  # noqa: E402

from _tiny_models import write_ctc, write_seq  # noqa: E402

cli = CliRunner()


@pytest.fixture(scope="module")
def calibrated(tmp_path_factory):
    """Four small pages run by both tiny recognisers as timed sessions into one calibration store."""
    from ocrbench.run.measure import measure_session

    d = tmp_path_factory.mktemp("plan")
    for i in range(4):
        synth.write_page(d / "pages", f"p{i}", synth.PageSpec(seed=i, lines_per_page=4 + 3 * i, width=500), "png")
    ctc, seq = write_ctc(d / "ctc"), write_seq(d / "seq")
    rows = [measure_session(d / "pages", c, store=d / "cal.sqlite") for c in (ctc, seq)]
    planio.save_scaling(d / "cal.sqlite", pd.DataFrame(rows))
    return d, rows


def test_timed_session_accounts_for_every_second(calibrated):
    d, rows = calibrated
    for r in rows:
        # the pages' own time plus the time between them is the span of the session
        assert r["busy_seconds"] + r["gap_seconds_per_page"] * r["pages"] == pytest.approx(r["wall_seconds"], rel=1e-9)
        assert r["startup_seconds"] > 0 and r["pages"] == 4
    back = planio.load_scaling(d / "cal.sqlite")
    assert list(back["recogniser"]) == ["tiny-ctc", "tiny-seq"]


def test_fake_clock_session_on_the_real_runner(tmp_path):
    """With a clock that moves 1 ms per reading, the session's figures are counts of readings."""
    from ocrbench.run.measure import measure_session

    class TickClock:
        def __init__(self):
            self.t = 0.0

        def __call__(self):
            self.t += 0.001
            return self.t

    for i in range(2):
        synth.write_page(tmp_path / "pages", f"p{i}", synth.PageSpec(seed=i, lines_per_page=3, width=400), "png")
    from ocrbench.run.engine import RunOptions

    r = measure_session(tmp_path / "pages", write_ctc(tmp_path / "ctc"), store=tmp_path / "s.sqlite",
                        clock=TickClock(), options=RunOptions(prefetch=False))   # one thread reads the clock
    ticks = round(r["wall_seconds"] / 0.001)
    assert abs(r["wall_seconds"] - ticks * 0.001) < 1e-9            # whole ticks only
    assert r["busy_seconds"] <= r["wall_seconds"]
    assert r["busy_seconds"] + r["gap_seconds_per_page"] * 2 == pytest.approx(r["wall_seconds"], abs=1e-9)


def test_plan_json_from_a_run_store(calibrated):
    d, _ = calibrated
    res = cli.invoke(app, ["plan", "-c", str(d / "cal.sqlite"), "--archive-store", str(d / "cal.sqlite"),
                           "--pages", "1000", "--deadline", "1h", "--price-core-hour", "0.10", "--draws", "200",
                           "--json"])
    assert res.exit_code == 0, res.output
    doc = json.loads(res.stdout)
    rows = {r["recogniser"]: r for r in doc["recognisers"]}
    assert set(rows) == {"tiny-ctc", "tiny-seq"}
    for r in rows.values():
        for k in ("wall_seconds_p10", "wall_seconds_p50", "wall_seconds_p90", "core_hours", "cost",
                  "correction_hours", "meets_deadline"):
            assert k in r
        assert r["wall_seconds_p10"] <= r["wall_seconds_p50"] <= r["wall_seconds_p90"]
        # one worker x one thread: core-hours = wall-hours; cost = core-hours x 0.10 (by hand)
        assert r["core_hours"] == pytest.approx(r["wall_seconds_p50"] / 3600, rel=1e-12)
        assert r["cost"] == pytest.approx(r["core_hours"] * 0.10, rel=1e-12)
        assert r["deadline_seconds"] == dt.timedelta(hours=1).total_seconds()   # datetime as reference
        assert r["meets_deadline"] == (r["wall_seconds_p90"] <= 3600)
        assert r["correction_hours"] is None          # no CER given: not guessed
    assert any("250x the 4 calibration pages" in w for w in doc["warnings"])
    assert doc["recommendation"]["text"]
    # the Python API gives the same plan as a DataFrame
    df = planio.plan(calibration=[str(d / "cal.sqlite")], archive_store=d / "cal.sqlite", pages=1000,
                     deadline="1h", price_core_hour=0.10, draws=200)
    assert set(df["recogniser"]) == set(rows)
    for _, r in df.iterrows():
        assert r["wall_seconds_p50"] == pytest.approx(rows[r["recogniser"]]["wall_seconds_p50"], rel=1e-12)


def test_plan_with_ground_truth_gives_cer_and_sample_size(calibrated):
    d, _ = calibrated
    res = cli.invoke(app, ["plan", "-c", str(d / "cal.sqlite"), "--archive-store", str(d / "cal.sqlite"),
                           "--pages", "1000", "--truth", str(d / "pages"), "--draws", "100", "--json"])
    assert res.exit_code == 0, res.output
    doc = json.loads(res.stdout)
    for r in doc["recognisers"]:
        assert r["cer_low"] <= r["cer"] <= r["cer_high"]
        assert r["char_errors"] == pytest.approx(r["cer"] * r["characters"])
        assert r["correction_hours"] == pytest.approx(r["char_errors"] * 10 / 3600)   # default 10 s per error
        size = doc["ground_truth_sample"][r["recogniser"]]
        assert r["gt_sample_pages"] == size["pages"] and 2 <= size["pages"] <= 1000


def test_plan_file_and_its_errors(calibrated, tmp_path):
    d, _ = calibrated
    f = tmp_path / "plan.toml"
    f.write_text(f'''calibration = ["lab={d / 'cal.sqlite'}"]
recognisers = ["tiny-ctc"]
[archive]
store = "{d / 'cal.sqlite'}"
pages = 50
[resources]
price_machine_hour = 2.0
[goals]
deadline = "2d"
budget = 100
[accuracy.tiny-ctc]
cer = 0.04
cer_low = 0.03
cer_high = 0.05
[correction]
seconds_per_error = 6
price_hour = 30
[simulation]
draws = 100
''', encoding="utf-8")
    res = cli.invoke(app, ["plan", "--plan", str(f), "--json"])
    assert res.exit_code == 0, res.output
    (r,) = json.loads(res.stdout)["recognisers"]
    assert r["profile"] == "lab" and r["pages"] == 50
    # errors = CER x characters; hours = errors x 6 s / 3600; cost at 30 per hour (by hand)
    assert r["char_errors"] == pytest.approx(0.04 * r["characters"])
    assert r["correction_hours"] == pytest.approx(r["char_errors"] * 6 / 3600)
    assert r["correction_cost"] == pytest.approx(r["correction_hours"] * 30)
    assert r["compute_cost"] == pytest.approx(r["wall_seconds_p50"] / 3600 * 2.0)
    # an option on the command line wins over the file
    res = cli.invoke(app, ["plan", "--plan", str(f), "--pages", "70", "--json"])
    assert json.loads(res.stdout)["recognisers"][0]["pages"] == 70

    bad = tmp_path / "bad.toml"
    bad.write_text("calibration = [\n", encoding="utf-8")
    res = cli.invoke(app, ["plan", "--plan", str(bad)])
    assert res.exit_code == 2 and "bad.toml" in res.output and "TOML" in res.output
    res = cli.invoke(app, ["plan", "-c", str(d / "cal.sqlite"), "--pages", "10", "--lines-per-page", "20-10",
                           "--chars-per-line", "40"])
    assert res.exit_code == 2 and "20-10" in res.output
    res = cli.invoke(app, ["plan", "-c", str(tmp_path / "none.sqlite"), "--pages", "10", "--lines-per-page", "20",
                           "--chars-per-line", "40"])
    assert res.exit_code == 2 and "none.sqlite" in res.output


def test_sample_folder_is_segmented_not_recognised(tmp_path):
    truth = synth.write_archive(tmp_path / "s", synth.ArchiveSpec(n_pages=3, seed=9, lines_per_page=(5, 9)))
    (tmp_path / "s" / "broken.png").write_bytes(b"not an image")
    archive, failed = planio.describe_sample(tmp_path / "s", sample_pages=10)
    assert [Path(p).name for p, _ in failed] == ["broken.png"]
    assert archive.n_pages == 4 and len(archive.sample_pages) == 3
    per_page = archive.sample_lines.groupby("page_id").size()
    for img in truth:
        # the generator's ground truth: one .json line box per text line
        n_truth = len(json.loads(img.with_suffix(".json").read_text(encoding="utf-8"))["lines"])
        assert per_page[img.name] == n_truth


@pytest.mark.slow
def test_scaling_two_workers_on_the_real_runner(calibrated):
    from ocrbench.planning.model import ScalingFit
    from ocrbench.run.measure import measure_scaling

    d, _ = calibrated
    df = measure_scaling(d / "pages", d / "ctc", workers=(1, 2))
    assert list(df["workers"]) == [1, 2] and (df["pages"] == [4, 8]).all()
    assert (df["pages_per_second"] > 0).all() and df["speedup"].iloc[0] == 1.0
    fit = ScalingFit(df[["workers", "threads", "pages_per_second"]])
    s = fit.serial_fraction(1)
    assert s is not None and 0.0 <= s <= 1.0
