"""The quality package: isotonic calibration, estimated CER, drift tests, quality on a store being written.

References named beside each check: scikit-learn's IsotonicRegression (the PAV fit), scipy's ks_2samp
(the KS statistic), hand-worked examples of PAV (Barlow et al. 1972, ch. 1 method) and of Holm's step-down
adjustment (Holm 1979, the procedure as defined there).
"""

from __future__ import annotations

import json
import os
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import scipy.stats
from sklearn.isotonic import IsotonicRegression
from typer.testing import CliRunner

from _quality_support import build_store
from ocrbench.cli.app import app
from ocrbench.quality.data import collection_of, read_snapshot, systems_of
from ocrbench.quality.drift import holm, ks_page_permutation, ks_statistic
from ocrbench.quality.estimate import calibrate, estimate_pages
from ocrbench.quality.isotonic import fit_isotonic, pav
from ocrbench.quality.summary import quality

runner = CliRunner()
ROOT = Path(__file__).resolve().parents[1]


def test_pav_hand_worked():
    # Worked by hand: 3 > 2 pool to 2.5, 4 > 3 pool to 3.5; weights pull the pooled mean.
    assert pav(np.array([1, 3, 2, 4, 3, 5.0]), np.ones(6)).tolist() == [1, 2.5, 2.5, 3.5, 3.5, 5]
    assert pav(np.array([3, 1.0]), np.array([1, 3.0])).tolist() == [1.5, 1.5]
    with pytest.raises(ValueError):
        pav(np.array([1.0]), np.array([0.0]))


@pytest.mark.parametrize("seed", range(5))
def test_isotonic_matches_scikit_learn(seed):
    rng = np.random.default_rng(seed)
    n = 300
    x = np.round(rng.uniform(0, 1, n), 2)           # ties on purpose
    y = rng.poisson(5 * x ** 2) / 10
    w = rng.integers(1, 60, n).astype(float)
    ours = fit_isotonic(x, y, w)
    ref = IsotonicRegression(out_of_bounds="clip").fit(x, y, sample_weight=w)   # scikit-learn reference
    grid = np.linspace(-0.2, 1.2, 501)
    assert np.allclose(ours(grid), ref.predict(grid), atol=1e-12)
    assert np.allclose(ours(x), ref.predict(x), atol=1e-12)


def test_ks_statistic_matches_scipy():
    rng = np.random.default_rng(3)
    for a, b in [(rng.normal(0, 1, 50), rng.normal(0.5, 1, 80)), (rng.integers(0, 5, 40), rng.integers(0, 6, 33))]:
        assert abs(ks_statistic(a, b) - scipy.stats.ks_2samp(a, b).statistic) < 1e-12   # scipy reference


def test_ks_page_permutation_separates_shift_from_no_shift():
    rng = np.random.default_rng(1)
    pages_a = np.repeat(np.arange(10), 20)
    a = rng.beta(9, 1, 200) + np.repeat(rng.normal(0, 0.01, 10), 20)
    same = rng.beta(9, 1, 400)
    worse = rng.beta(4, 1, 400)
    pages_b = np.repeat(np.arange(20), 20)
    _, p_same = ks_page_permutation(a, pages_a, same, pages_b, permutations=199)
    d, p_worse = ks_page_permutation(a, pages_a, worse, pages_b, permutations=199)
    assert p_same > 0.05 and p_worse <= 0.01 and d > 0.2


def test_holm_hand_worked():
    # By hand: sorted 0.005, 0.01, 0.03, 0.04 -> 4*0.005=0.02, 3*0.01=0.03, 2*0.03=0.06, max(0.06, 1*0.04)=0.06
    adj = holm([0.01, 0.04, 0.03, 0.005, None])
    assert adj[4] is None
    assert np.allclose(adj[:4], [0.03, 0.06, 0.06, 0.02])


def test_collection_of():
    assert collection_of("page_001.png") == "."
    assert collection_of("box3/page_001.png") == "box3"
    assert collection_of("1890/box3/book.tif#4") == "1890/box3"
    assert collection_of("box3\\page.png") == "box3"
    # the store's pages.collection (schema version 3) decides when present; "" is the top folder
    assert collection_of("box3/page_001.png", "vol1/box3") == "vol1/box3"
    assert collection_of("page_001.png", "") == "."
    assert collection_of("box3/page_001.png", None) == "box3"


def test_quality_groups_by_the_stored_collection_and_counts_sanity_flags(tmp_path):
    from ocrbench.quality.data import group_labels
    from ocrbench.store import PageRecord, RunStore

    db, _, _ = _store(tmp_path)
    assert set(group_labels(read_snapshot(db).pages, "collection")) == {"boxA", "boxB", "boxC"}   # no column values
    con = sqlite3.connect(db)            # stored collections (here one level deeper than the page ids say) decide
    con.execute("UPDATE pages SET collection = 'vol1/' || substr(page_id, 1, instr(page_id, '/') - 1)")
    con.commit()
    con.close()
    snap = read_snapshot(db)
    assert set(group_labels(snap.pages, "collection")) == {"vol1/boxA", "vol1/boxB", "vol1/boxC"}
    [s] = quality(db, n_boot=50, permutations=19)["systems"]
    assert {g["group"] for g in s["groups"]} == {"vol1/boxA", "vol1/boxB", "vol1/boxC"}
    with RunStore(db) as st:
        st.write_page(int(snap.runs["run_id"].iloc[0]),
                      PageRecord(page_id="boxC/blank.png", path="x", content_hash="c", status="done", n_lines=0,
                                 collection="boxC", flags="blank"))
    [sys_] = systems_of(read_snapshot(db))
    assert bool(sys_.pages.set_index("page_id").loc["boxC/blank.png", "flagged"])


def _store(tmp_path, seed=0):
    return build_store(tmp_path, {"boxA": (40, (0.8, 1.0)), "boxB": (40, (0.8, 1.0)), "boxC": (40, (0.4, 0.9))},
                       keyed={"boxA": 3, "boxB": 3}, seed=seed)


def test_estimate_covers_measured_and_flags_worse_collection(tmp_path):
    db, truth, _ = _store(tmp_path)
    res = quality(db, truth=truth, n_boot=300, permutations=199)
    full = quality(db, truth=tmp_path / "truth_all", n_boot=100, permutations=19)
    [s], [f] = res["systems"], full["systems"]
    assert s["calibration"]["pages"] == 6
    rows = {g["group"]: g for g in s["groups"]}
    measured = {g["group"]: g["measured_cer"] for g in f["groups"]}
    for like in ("boxA", "boxB"):     # like the keyed sample: measured CER of all pages inside the estimate
        g = rows[like]
        assert g["est_low"] <= measured[like] <= g["est_high"], (like, g, measured[like])
        assert g["drift"]["ks_p_holm"] > 0.05 and not g["drift"]["flagged"]
    worse = rows["boxC"]
    assert worse["keyed_pages"] == 0 and worse["drift"]["flagged"]
    assert worse["drift"]["ks_p_holm"] < 0.05 and worse["drift"]["median_confidence_shift"] < -0.1
    assert worse["extrapolated"] and worse["beyond_range"] > 0.05
    assert worse["est_cer"] > rows["boxA"]["est_cer"]
    for g in s["groups"]:
        assert g["pages_done"] == 40 and 0 <= g["flagged_share"] <= 1 and g["queued_lines"] >= 0


def test_page_estimates_and_calibration_interval(tmp_path):
    db, truth, _ = _store(tmp_path, seed=4)
    [system] = systems_of(read_snapshot(db), truth=truth)
    cal = calibrate(system)
    pages = estimate_pages(system, cal, n_boot=200)
    assert len(pages) == 120 and pages["keyed"].sum() == 6
    ok = pages.dropna(subset=["est_low"])
    assert (ok["est_low"] <= ok["est_cer"]).all() and (ok["est_cer"] <= ok["est_high"]).all()
    # the map is non-decreasing in doubt and the keyed sample's CER lies inside its own interval
    assert np.all(np.diff(cal.fit.y) >= 0)
    assert cal.cer_low <= cal.cer <= cal.cer_high
    # no ground truth: figures without estimates, nothing raised
    [bare] = quality(db)["systems"]
    assert bare["calibration"] is None and all(g["est_cer"] is None and "drift" not in g for g in bare["groups"])


WRITER = r"""
import sys, time
sys.path.insert(0, sys.argv[3])
from ocrbench.store import LineRecord, PageRecord, RunStore
db, n = sys.argv[1], int(sys.argv[2])
st = RunStore(db, timeout=0.2)      # a short busy timeout: any lock held by the reader would fail a write
rid = st.run_ids()[0]
for k in range(n):
    lines = [LineRecord(line_no=i, x0=0, y0=0, x1=1, y1=1, width_px=1, text=f"Jan {i} twine {k}.{i:02d}",
                        text_post=None, confidence=0.9) for i in range(10)]
    st.write_page(rid, PageRecord(page_id=f"live/page_{k:04d}.png", path="x", content_hash=str(k), status="done",
                                  n_lines=10), lines)
    time.sleep(0.01)
st.close()
print("wrote", n)
"""


def test_quality_reads_while_another_process_writes(tmp_path):
    from _quality_support import start_run
    from ocrbench.store import RunStore

    db = tmp_path / "live.sqlite"
    with RunStore(db) as st:
        start_run(st)
    n = 150
    proc = subprocess.Popen([sys.executable, "-c", WRITER, str(db), str(n), str(ROOT)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    seen = []
    try:
        while proc.poll() is None:
            [s] = quality(db, n_boot=50)["systems"] or [None]
            g = s["groups"][0] if s and s["groups"] else None
            if g is not None:
                assert g["lines"] == 10 * g["pages_done"]      # one consistent snapshot: no half-written page
                seen.append(g["pages_done"])
    finally:
        out, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err
    assert out.strip() == f"wrote {n}"
    assert seen == sorted(seen) and any(0 < k < n for k in seen), seen
    [s] = quality(db, n_boot=50)["systems"]
    assert s["groups"][0]["pages_done"] == n


def test_quality_cli_json_groupings_and_refusals(tmp_path):
    db, truth, _ = _store(tmp_path, seed=2)
    r = runner.invoke(app, ["quality", str(db), "--truth", str(truth), "--json", "--boot", "100"])
    assert r.exit_code == 0, r.output
    res = json.loads(r.stdout)
    assert [g["group"] for g in res["systems"][0]["groups"]] == ["boxA", "boxB", "boxC"]
    for by, n in (("day", 1), ("run", 1)):
        r = runner.invoke(app, ["quality", str(db), "--by", by, "--json", "--boot", "100"])
        assert r.exit_code == 0 and len(json.loads(r.stdout)["systems"][0]["groups"]) == n
    r = runner.invoke(app, ["quality", str(db), "--truth", str(truth), "--boot", "100"])
    assert r.exit_code == 0 and "boxC" in r.stdout and "confidence distribution differs" in r.stdout
    csv = tmp_path / "pages.csv"
    r = runner.invoke(app, ["quality", str(db), "--truth", str(truth), "--boot", "100", "--pages-csv", str(csv)])
    assert r.exit_code == 0, r.output
    import pandas as pd

    pages = pd.read_csv(csv)
    assert len(pages) == 120 and {"page_id", "group", "est_cer", "est_low", "est_high", "beyond_range"} <= set(pages)
    assert runner.invoke(app, ["quality", str(db), "--by", "week"]).exit_code == 2
    r = runner.invoke(app, ["quality", str(tmp_path / "none.sqlite")])
    assert r.exit_code == 2 and "not found" in r.output


def test_quality_watch_refreshes_until_interrupted(tmp_path):
    import signal

    db, _, _ = _store(tmp_path, seed=3)
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    proc = subprocess.Popen([sys.executable, "-m", "ocrbench", "quality", str(db), "--json", "--watch", "0.2",
                             "--boot", "50"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    deadline = time.monotonic() + 60
    lines = []
    while len(lines) < 2 and time.monotonic() < deadline:
        lines.append(proc.stdout.readline())
    proc.send_signal(signal.SIGINT)
    out, _ = proc.communicate(timeout=30)
    assert len(lines) == 2 and all(json.loads(x)["systems"] for x in lines)
    assert proc.returncode == 130


def test_no_errors_in_the_keyed_sample_still_gives_an_upper_bound(tmp_path):
    from ocrbench.quality.estimate import redraw

    db, truth, _ = build_store(tmp_path, {"boxA": (20, (1.0, 1.0)), "boxB": (20, (0.9, 1.0))}, keyed={"boxA": 3})
    [s] = quality(db, truth=truth, n_boot=300, permutations=99)["systems"]
    cal = s["calibration"]
    assert cal["edits"] == 0 and cal["cer"] == 0.0 and cal["cer_high"] > 0   # Wilson bound, not [0, 0]
    for g in s["groups"]:
        assert g["est_low"] is not None and g["est_high"] > 0
    # the redrawn map stays non-decreasing
    rng = np.random.default_rng(0)
    fit = fit_isotonic(np.linspace(0, 1, 50), np.repeat([0.0, 0.01, 0.05, 0.2, 0.3], 10), np.full(50, 40.0))
    for _ in range(20):
        assert np.all(np.diff(redraw(fit, rng).y) >= 0)


def test_between_group_spread_by_moments_hand_worked():
    from ocrbench.quality.estimate import DEFAULT_SPREAD, MIN_GROUPS, level_and_spread

    # By hand: R = 30/25 = 1.2; Σ(y - Rx)² = 16 + 16 = 32; minus Σ Rx = 30 -> 2; over R²Σx² = 1.44 * 125 = 180
    r, tau2 = level_and_spread(np.array([10, 2, 6, 6, 6.0]), np.full(5, 5.0))
    assert MIN_GROUPS <= 5 and abs(r - 1.2) < 1e-12 and abs(tau2 - 2 / 180) < 1e-12
    # two groups: 32 - 12 = 20 over 1.44 * 50 = 72 -> 0.278, below the floor for so few groups
    assert level_and_spread(np.array([10, 2.0]), np.array([5, 5.0])) == (1.2, max(20 / 72, DEFAULT_SPREAD))
    assert level_and_spread(np.array([0, 0.0]), np.array([5, 5.0]))[0] is None      # nothing measured


def test_pooled_ks_equals_direct_statistic():
    from ocrbench.quality.drift import pooled_ks   # the fast path, checked against the direct one

    rng = np.random.default_rng(5)
    values = np.round(rng.uniform(0, 1, 300), 2)            # ties on purpose
    pages = rng.integers(0, 30, 300)
    in_a = np.zeros(30, dtype=bool)
    in_a[rng.choice(30, 12, replace=False)] = True
    order = np.argsort(values, kind="stable")
    ends = np.flatnonzero(np.r_[values[order][1:] != values[order][:-1], True])
    direct = ks_statistic(values[in_a[pages]], values[~in_a[pages]])
    assert abs(pooled_ks(pages[order], ends, in_a) - direct) < 1e-12
    assert abs(direct - scipy.stats.ks_2samp(values[in_a[pages]], values[~in_a[pages]]).statistic) < 1e-12  # scipy


def test_unreadable_truth_is_named_and_the_rest_is_used(tmp_path):
    db, truth, _ = _store(tmp_path, seed=6)
    bad = truth / "boxA" / "page_000.txt"
    bad.write_bytes(b"Cash Book\n\xff\xfe broken\n")
    r = runner.invoke(app, ["quality", str(db), "--truth", str(truth), "--json", "--boot", "100"])
    assert r.exit_code == 1
    assert str(bad) in r.stderr and "UTF-8" in r.stderr and len([x for x in r.stderr.splitlines() if str(bad) in x]) == 1
    [s] = json.loads(r.stdout)["systems"]
    assert s["calibration"]["pages"] == 5          # the other keyed pages still calibrate
    empty = tmp_path / "empty.sqlite"
    from ocrbench.store import RunStore

    RunStore(empty).close()
    r = runner.invoke(app, ["quality", str(empty)])
    assert r.exit_code == 0 and "no runs in this store yet" in r.stdout
