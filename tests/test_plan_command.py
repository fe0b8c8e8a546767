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
from ocrbench.planning.service import plan_frame  # noqa: E402
from ocrbench.cli.app import app  # noqa: E402
from ocrbench.errors import ConfigError  # noqa: E402

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
        # one worker x one thread: core-hours = wall-hours; compute cost = core-hours x 0.10 (by hand)
        assert r["core_hours"] == pytest.approx(r["wall_seconds_p50"] / 3600, rel=1e-12)
        assert r["compute_cost"] == pytest.approx(r["core_hours"] * 0.10, rel=1e-12)
        assert r["deadline_seconds"] == dt.timedelta(hours=1).total_seconds()   # datetime as reference
        assert r["recognition_meets_deadline"] == (r["wall_seconds_p90"] <= 3600)
        assert r["correction_hours"] is None          # no CER given: not guessed
        # ... so the people's part is unknown and unpriced: no total, and the deadline not judged "yes"
        assert r["cost"] is None and r["unknown"] and r["unpriced"]
        assert r["meets_deadline"] in (None, False) and r["meets_deadline"] is not True
    assert any("250x the 4 calibration pages" in w for w in doc["warnings"])
    assert doc["recommendation"]["text"]
    # the Python API gives the same plan as a DataFrame
    df = plan_frame(calibration=[str(d / "cal.sqlite")], archive_store=d / "cal.sqlite", pages=1000,
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


def _plan_file(tmp_path, d, extra: str) -> Path:
    f = tmp_path / "plan.toml"
    f.write_text(f'''calibration = ["lab={d / 'cal.sqlite'}"]
recognisers = ["tiny-ctc"]
[archive]
pages = 200
lines_per_page = "4-10"
chars_per_line = "20-30"
[goals]
deadline = "2d"
[simulation]
draws = 100
{extra}''', encoding="utf-8")
    return f


def test_report_plan_honours_profiles_like_plan(calibrated, tmp_path):
    """``report --plan`` and ``plan --plan`` go through one function: a [profiles] table counts in both."""
    d, _ = calibrated
    f = _plan_file(tmp_path, d, "[profiles.lab]\nmachines = 3\nprice_machine_hour = 1.5\n")
    res = cli.invoke(app, ["plan", "--plan", str(f), "--json"])
    assert res.exit_code == 0, res.output
    (planned,) = json.loads(res.stdout)["recognisers"]
    assert planned["machines"] == 3 and planned["profile"] == "lab"
    res = cli.invoke(app, ["report", str(d / "cal.sqlite"), "--out", str(tmp_path / "rep"), "--plan", str(f),
                           "--json"])
    assert res.exit_code == 0, res.output
    summary = json.loads(Path(json.loads(res.stdout)["summary"]).read_text(encoding="utf-8"))
    row = summary["plan"]["rows"]["tiny-ctc"]
    assert row["machines"] == 3
    # the same request, the same seed: the same figures (3 machines at 1.5 per machine-hour, by hand)
    assert row["wall_seconds_p50"] == pytest.approx(planned["wall_seconds_p50"], rel=1e-12)
    assert row["compute_cost"] == pytest.approx(row["wall_seconds_p50"] / 3600 * 3 * 1.5, rel=1e-12)


@pytest.mark.parametrize("extra, words", [
    ("[archive]\npagez = 1000\n", ["archive.pagez", "archive.pages"]),
    ("[resources]\nworker = 4\n", ["resources.worker", "resources.workers"]),
    ("[profiles.lab]\nmachine = 2\n", ["profiles.lab.machine", "profiles.lab.machines"]),
    ("[goals]\nbudget = \"lots\"\n", ["goals.budget", "a number"]),
])
def test_plan_file_misspelt_or_wrong_key_is_a_usage_error(calibrated, tmp_path, extra, words):
    d, _ = calibrated
    f = tmp_path / "bad.toml"
    f.write_text(f'calibration = ["{d / "cal.sqlite"}"]\n' + extra, encoding="utf-8")
    for cmd in (["plan", "--plan", str(f)], ["report", str(d / "cal.sqlite"), "--out", str(tmp_path / "r"),
                                             "--plan", str(f)]):
        res = cli.invoke(app, cmd)
        assert res.exit_code == 2, res.output
        text = " ".join(res.output.split())
        assert "bad.toml" in text and all(w in text for w in words), text


def test_wrong_type_names_the_dotted_path(tmp_path):
    f = tmp_path / "t.toml"
    f.write_text('[archive]\npages = "many"\n', encoding="utf-8")
    with pytest.raises(ConfigError, match=r"t\.toml.*archive\.pages must be an integer"):
        planio.load_plan_file(f)


def test_plan_format_is_a_valid_plan_file(tmp_path):
    """What `ocrbench plan --plan-format` prints loads through the same checks, every key of it."""
    res = cli.invoke(app, ["plan", "--plan-format"])
    assert res.exit_code == 0
    f = tmp_path / "format.toml"
    f.write_text(res.stdout, encoding="utf-8")
    req = planio.load_plan_file(f)
    assert req.pages == 180000 and req.workers == 2 and req.profiles == {"gpu-box": {"price_machine_hour": 2.5,
                                                                                      "workers": 1}}
    assert req.accuracy["ledger-ctc"]["cer"] == 0.021 and req.speed_drift == 0.08
    # every commented-out key is a valid key too
    uncommented = "\n".join(ln[2:] if ln.startswith("# ") and "=" in ln.split("#")[1] else ln
                            for ln in res.stdout.splitlines()[3:])
    f.write_text(res.stdout.splitlines()[2] + "\n" + uncommented, encoding="utf-8")
    req = planio.load_plan_file(f)
    assert req.sample_pages == 20 and req.price_machine_hour == 0.40 and req.archive_store is not None


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
    from ocrbench.planning.numerics import ScalingFit
    from ocrbench.run.measure import measure_scaling

    d, _ = calibrated
    df = measure_scaling(d / "pages", d / "ctc", workers=(1, 2))
    assert list(df["workers"]) == [1, 2] and (df["pages"] == [4, 4]).all()   # 2 workers share the 4 pages (run --workers 2)
    assert (df["pages_per_second"] > 0).all() and df["speedup"].iloc[0] == 1.0
    # 2 workers are a real Dask run (run --workers 2), timed from its start to its close
    two = json.loads(df["host_json"].iloc[1])
    assert two["dask"]["workers"] == 2 and two["close_seconds"] >= 0 and df["startup_seconds"].iloc[1] > 0
    fit = ScalingFit(df[["workers", "threads", "pages_per_second"]])
    s = fit.serial_fraction(1)
    assert s is not None and 0.0 <= s <= 1.0


@pytest.mark.slow
def test_measure_scaling_and_tune_on_the_real_runner(calibrated, tmp_path):
    """measure-scaling: process start, intervals, no negative time; tune: the fastest of a bounded grid is kept
    in the store and the plan then ranks its worker counts."""
    d, _ = calibrated
    store = tmp_path / "m.sqlite"
    res = cli.invoke(app, ["measure-scaling", str(d / "pages"), "-r", str(d / "ctc"), "--store", str(store),
                           "--workers", "2", "--sessions", "2", "--json"])
    assert res.exit_code == 0, res.output
    doc = json.loads(res.stdout)
    rows = doc["scaling"]
    assert [r["workers"] for r in rows] == [1, 1, 2]     # two one-worker sessions, then a 2-worker Dask run
    for r in rows:
        assert r["process_start_seconds"] > 0 and r["startup_seconds"] > 0
        assert r["idle_seconds_per_page"] >= 0 and r["overlap_seconds_per_page"] >= 0
    assert rows[2]["speedup_low"] <= rows[2]["speedup_high"]
    assert len(doc["explanations"]) == (rows[2]["speedup"] < 1)
    # the 2-worker speed-up is over the mean of the two sessions
    assert rows[2]["speedup"] == pytest.approx(rows[2]["pages_per_second"] /
                                               ((rows[0]["pages_per_second"] + rows[1]["pages_per_second"]) / 2))
    back = planio.load_scaling(store)
    assert json.loads(back["host_json"].iloc[0])["process_start_seconds"] == pytest.approx(
        rows[0]["process_start_seconds"])

    tuned = tmp_path / "t.sqlite"
    res = cli.invoke(app, ["tune", str(d / "pages"), "-r", str(d / "ctc"), "--store", str(tuned), "--threads", "1",
                           "--batch-sizes", "4,8", "--workers", "1,2", "--pages", "2", "--max-seconds", "120",
                           "--json"])
    assert res.exit_code == 0, res.output
    t = json.loads(res.stdout)
    timed = [g for g in t["grid"] if g["pages_per_second"]]
    assert t["best"]["pages_per_second"] == max(g["pages_per_second"] for g in timed)
    res = cli.invoke(app, ["plan", "-c", str(tuned), "--pages", "100", "--lines-per-page", "5-10",
                           "--chars-per-line", "20-30", "--workers", "2", "--review", "none", "--draws", "100",
                           "--json"])
    assert res.exit_code == 0, res.output
    plan = json.loads(res.stdout)
    ranked = [c for c in plan["configurations"] if c["rank"]]
    assert ranked and {c["workers"] for c in plan["configurations"]} == {1, 2}
    # every batch size timed at the chosen threads is a configuration of the plan, ranked on its measurement
    assert {c["batch_size"] for c in plan["configurations"]} == set(t["batch_sizes_stored"])
    assert plan["recognisers"][0]["process_start_seconds"] > 0


def test_one_archive_description_for_every_recogniser_and_a_warning_when_unlike(calibrated, tmp_path):
    """A sample folder gives both recognisers the same characters; pages unlike the calibration's are named."""
    d, _ = calibrated
    for i in range(3):       # larger type, more lines: unlike the 500-px calibration pages
        synth.write_page(tmp_path / "s", f"s{i}", synth.PageSpec(seed=20 + i, lines_per_page=20, width=1100,
                                                                 font_size=34), "png")
    res = cli.invoke(app, ["plan", "-c", str(d / "cal.sqlite"), "--sample", str(tmp_path / "s"), "--pages", "500",
                           "--review", "none", "--draws", "100", "--json"])
    assert res.exit_code == 0, res.output
    doc = json.loads(res.stdout)
    chars = {r["recogniser"]: r["characters"] for r in doc["recognisers"]}
    assert len(chars) == 2 and len(set(chars.values())) == 1          # one archive, whatever the recogniser
    assert any("estimated once for every recogniser" in a for a in doc["assumptions"])
    unlike = [w for w in doc["warnings"] if "differs from the calibration pages'" in w]
    assert any("line height" in w for w in unlike) and any("page size" in w for w in unlike)
    assert all("%" in w for w in unlike)


def test_targeted_review_measures_its_catch_rate_on_the_ground_truth(calibrated):
    d, _ = calibrated
    res = cli.invoke(app, ["plan", "-c", str(d / "cal.sqlite"), "--archive-store", str(d / "cal.sqlite"),
                           "--pages", "100", "--truth", str(d / "pages"), "--review", "targeted",
                           "--review-share", "0.5", "--draws", "100", "--json"])
    assert res.exit_code == 0, res.output
    doc = json.loads(res.stdout)
    for r in doc["recognisers"]:
        assert r["review_mode"] == "targeted" and 0.0 <= r["catch_rate"] <= 1.0
        # errors left = errors x (1 - catch rate); correction = caught errors x 10 s (by hand)
        assert r["errors_left"] == pytest.approx(r["char_errors"] * (1 - r["catch_rate"]))
        assert r["correction_hours"] == pytest.approx(r["char_errors"] * r["catch_rate"] * 10 / 3600)
    assert sum("measured for tiny-" in a for a in doc["assumptions"]) == 2
    res = cli.invoke(app, ["plan", "-c", str(d / "cal.sqlite"), "--archive-store", str(d / "cal.sqlite"),
                           "--pages", "100", "--review", "targeted"])
    assert res.exit_code == 2 and "catch" in res.output


def test_plan_and_review_agree_on_reading_time(calibrated):
    """The plan's full-review reading time is priced as `ocrbench review` prices reading every line: the same
    4 s per line + 1 s per 10 characters, on the lines and characters each counts."""
    d, _ = calibrated
    rev = cli.invoke(app, ["review", str(d / "cal.sqlite"), "--json"])
    assert rev.exit_code == 0, rev.output
    runs = json.loads(rev.stdout)
    runs = runs["runs"] if isinstance(runs, dict) else runs
    for run in runs:
        a = run["all"]           # review's whole queue: its lines and characters at its rate
        assert a["minutes"] * 60 == pytest.approx(a["lines"] * 4 + a["chars"] / 10)
    res = cli.invoke(app, ["plan", "-c", str(d / "cal.sqlite"), "--archive-store", str(d / "cal.sqlite"),
                           "--pages", "4000", "--draws", "200", "--json"])
    assert res.exit_code == 0, res.output
    for r in json.loads(res.stdout)["recognisers"]:
        assert r["review_hours"] * 3600 == pytest.approx(r["lines"] * 4 + r["characters"] / 10)
        # and the archive's mean page is within the bootstrap's reach of the 4 pages review read
        latest = max(runs, key=lambda x: x["run_id"])["all"]
        assert r["review_hours"] * 60 / 4000 == pytest.approx(latest["minutes"] / 4, rel=0.25)
