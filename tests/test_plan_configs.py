"""Batch size as a dimension of the plan's configurations, ranked on what was measured.

Real measurements: the tiny ONNX recognisers of tests/_tiny_models.py timed by the real runner
(``measure_session``) at two batch sizes on the same synth pages into one calibration store. Which
batch size was slower is read back from the store with sqlite3 (the pages' own ``t_total``), not from
the planner, and the planner must never rank that one first nor recommend it.
"""

from __future__ import annotations

import json
import sqlite3
import sys
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import CliRunner

sys.path.insert(0, str(Path(__file__).resolve().parent))

from ocrbench import synth  # noqa: E402
from ocrbench.cli.app import app  # noqa: E402
from ocrbench.planning.configs import SettingsGroup, measured_slower  # noqa: E402
from ocrbench.planning.inputs import read_calibration  # noqa: E402

from _tiny_models import write_ctc, write_seq  # noqa: E402

cli = CliRunner()


def _mean_page_seconds(store: Path) -> dict[int, float]:
    """Batch size -> mean t_total of its pages, on the pages every run read (straight from the store)."""
    con = sqlite3.connect(store)
    try:
        runs = {rid: json.loads(s)["batch_size"] for rid, s in con.execute("SELECT run_id, settings_json FROM runs")}
        rows = con.execute("SELECT run_id, page_id, t_total FROM pages WHERE status = 'done'").fetchall()
    finally:
        con.close()
    df = pd.DataFrame(rows, columns=["run_id", "page_id", "t"])
    common = set.intersection(*(set(g["page_id"]) for _, g in df.groupby("run_id")))
    df = df[df["page_id"].isin(common)]
    return {runs[r]: float(g["t"].mean()) for r, g in df.groupby("run_id")}


@pytest.fixture(scope="module")
def two_batch_sizes(tmp_path_factory):
    """One store per order of measuring (so each batch size is once the latest, the recogniser's own row)."""
    from ocrbench.run.engine import RunOptions
    from ocrbench.recognisers.base import EngineOptions
    from ocrbench.run.measure import measure_session

    d = tmp_path_factory.mktemp("configs")
    for i in range(4):
        synth.write_page(d / "pages", f"p{i}", synth.PageSpec(seed=i, lines_per_page=6 + 2 * i, width=500), "png")
    seq = write_seq(d / "seq")
    stores = {}
    for order in ((1, 8), (8, 1)):
        store = d / f"cal_{order[0]}_{order[1]}.sqlite"
        for b in order:
            measure_session(d / "pages", seq, store=store, options=RunOptions(engine=EngineOptions(batch_size=b)))
        stores[order] = store
    return d, stores


def test_measured_slower_hand_worked():
    """A: pages p1 1.0 s, p2 3.0 s; B: p1 1.5 s, p2 2.0 s, p3 9.0 s. On the common pages p1, p2 A takes
    (1 + 3) / 2 = 2.0 s a page and B (1.5 + 2) / 2 = 1.75 s: A is slower (B's p3 is not compared).
    C, at other threads, is compared with neither."""
    a = SettingsGroup([1], {"batch_size": 8, "intra_threads": 1}, pd.Series({"p1": 1.0, "p2": 3.0}))
    b = SettingsGroup([2], {"batch_size": 32, "intra_threads": 1}, pd.Series({"p1": 1.5, "p2": 2.0, "p3": 9.0}))
    c = SettingsGroup([3], {"batch_size": 4, "intra_threads": 2}, pd.Series({"p1": 0.1, "p2": 0.1}))
    got = measured_slower([a, b, c])
    assert set(got) == {0}
    assert "batch size 8, threads 1 was measured slower than batch size 32, threads 1" in got[0]
    assert "2 s against 1.75 s a page on the same 2 pages" in got[0]


@pytest.mark.parametrize("order", [(1, 8), (8, 1)])
def test_the_measured_slower_batch_size_is_never_first(two_batch_sizes, order):
    d, stores = two_batch_sizes
    store = stores[order]
    secs = _mean_page_seconds(store)
    slow, fast = sorted(secs, key=secs.get, reverse=True)
    cal = read_calibration(store)
    assert [m.batch_size for m in cal.models] == [order[-1]]                  # the latest settings: the row
    assert [m.batch_size for m in cal.alternatives] == [order[0]]
    res = cli.invoke(app, ["plan", "-c", str(store), "--pages", "200", "--lines-per-page", "6-12",
                           "--chars-per-line", "10-20", "--review", "none", "--draws", "200",
                           "--price-core-hour", "0.05", "--currency", "EUR", "--json"])
    assert res.exit_code == 0, res.output
    doc = json.loads(res.stdout)
    configs = doc["configurations"]
    assert {c["batch_size"] for c in configs} == {1, 8}                   # batch size is a dimension
    ranked = sorted((c for c in configs if c["rank"]), key=lambda c: c["rank"])
    assert ranked and ranked[0]["batch_size"] == fast
    assert all(c["batch_size"] != slow for c in ranked)
    excluded = [c for c in configs if c["batch_size"] == slow]
    assert excluded and all(c["rank"] is None and "measured slower" in c["excluded"] for c in excluded)
    for c in ranked:                                                         # ranked with their ranges
        assert c["wall_seconds_p10"] <= c["wall_seconds_p50"] <= c["wall_seconds_p90"]
    assert doc["recommendation"]["batch_size"] == fast
    # when the recogniser's own row (its latest settings) is the slower one, the plan says so
    assert any("latest run" in w and "measured slower" in w for w in doc["warnings"]) == (order[-1] == slow)
    assert f"batch size {fast}" in doc["recommendation"]["text"]
    # the printed plan names the batch size of every configuration
    res = cli.invoke(app, ["plan", "-c", str(store), "--pages", "200", "--lines-per-page", "6-12",
                           "--chars-per-line", "10-20", "--review", "none", "--draws", "200"])
    assert res.exit_code == 0, res.output
    assert f"batch {slow}" in res.output and f"batch {fast}" in res.output


def test_a_recogniser_with_one_setting_has_no_alternatives(tmp_path):
    from ocrbench.run.measure import measure_session

    for i in range(2):
        synth.write_page(tmp_path / "pages", f"p{i}", synth.PageSpec(seed=i, lines_per_page=4, width=400), "png")
    measure_session(tmp_path / "pages", write_ctc(tmp_path / "ctc"), store=tmp_path / "s.sqlite")
    cal = read_calibration(tmp_path / "s.sqlite")
    assert cal.alternatives == [] and cal.models[0].slower_than is None
