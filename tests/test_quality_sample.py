"""`ocrbench sample`: stratified allocation against hand-worked examples, and the keying templates'
round trip into ground truth.

Allocation references: optimum allocation n_h = n·(N_h S_h/√c_h)/Σ(N_k S_k/√c_k), Neyman's case with equal
costs, and strata taken whole when the formula asks for more than they hold (W. G. Cochran, Sampling
Techniques, 3rd ed., §5.5, 5.6, 5.8, from memory); the numbers below are worked by hand from those formulas.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
from typer.testing import CliRunner

from _quality_support import build_store
from ocrbench.accuracy.score import score_pages
from ocrbench.cli.app import app
from ocrbench.io.text import pair_store_pages, read_text_lines
from ocrbench.quality.data import read_snapshot, systems_of
from ocrbench.quality.sample import neyman_allocation, plan_sample

runner = CliRunner()


def test_neyman_allocation_hand_worked():
    # N·S = 400, 400, 300 of 1100; n = 22 -> 8, 8, 6 exactly
    assert neyman_allocation([100, 200, 300], [4, 2, 1], 22) == [8, 8, 6]
    # N·S = 500, 100, 100: stratum 1's quota 14.3 exceeds its 5 pages -> taken whole (§5.8);
    # the other 15 split 7.5 / 7.5, the tie of remainders going to the first -> 8, 7
    assert neyman_allocation([5, 100, 100], [100, 1, 1], 20) == [5, 8, 7]
    # no spread anywhere: proportional to N
    assert neyman_allocation([10, 30], [0, 0], 8) == [2, 6]
    # never more than the strata hold
    assert neyman_allocation([2, 3], [1, 1], 50) == [2, 3]


def test_lines_budget_is_optimum_allocation_by_cost(tmp_path):
    from ocrbench.quality.sample import pages_for_lines

    # N = 100, 100, S = 1, 1, c = 4, 16 lines a page; budget 240 lines.
    # n = 240·(100/2 + 100/4)/(100·2 + 100·4) = 30; n_h ∝ 50 : 25 -> 20, 10; cost 20·4 + 10·16 = 240.
    alloc = pages_for_lines(np.array([100, 100]), np.array([1.0, 1.0]), np.array([4.0, 16.0]), 240)
    assert alloc == [20, 10]


def test_sample_templates_round_trip_into_ground_truth(tmp_path):
    db, truth, _ = build_store(tmp_path, {"boxA": (20, (0.8, 1.0)), "boxB": (20, (0.5, 0.95)), ".": (6, (0.8, 1.0))},
                               keyed={"boxA": 2})
    out = tmp_path / "key"
    r = runner.invoke(app, ["sample", str(db), "--pages", "9", "--out", str(out), "--truth", str(truth), "--json"])
    assert r.exit_code == 0, r.output
    res = json.loads(r.stdout)
    chosen = pd.read_csv(out / "sample.csv")
    assert len(chosen) == res["pages"] == 9 == sum(s["n"] for s in res["strata"])
    keyed = {"boxA/page_000.png", "boxA/page_001.png"}
    assert not keyed & set(chosen["page_id"])                      # pages keyed already are not chosen again
    assert set(chosen["collection"]) <= {"boxA", "boxB", "."}
    # round trip: the template of each chosen page pairs with the page and reads back as its recognised text
    snap = read_snapshot(db)
    pairing = pair_store_pages(out, chosen["page_id"])
    assert not pairing.hyp_only and len(pairing.pairs) == 9
    pages = []
    for pid, path, _ in pairing.pairs:
        stored = snap.lines[snap.lines["page_id"] == pid].sort_values("line_no")["text"].tolist()
        assert read_text_lines(path) == stored
        pages.append((pid, read_text_lines(path), stored))
    assert score_pages(pages, classes=False).summary["cer"] == 0.0
    # keyed templates come back as ground truth: quality counts them as keyed pages
    r = runner.invoke(app, ["quality", str(db), "--truth", str(out), "--json", "--boot", "100"])
    assert r.exit_code == 0, r.output
    [s] = json.loads(r.stdout)["systems"]
    assert sum(g["keyed_pages"] for g in s["groups"]) == 9
    # a second sample into the same folder leaves existing templates alone
    path = out / pairing.pairs[0][1].relative_to(out)
    path.write_text("corrected by hand\n", encoding="utf-8")
    r = runner.invoke(app, ["sample", str(db), "--pages", "9", "--out", str(out), "--truth", str(truth)])
    assert r.exit_code == 0 and path.read_text(encoding="utf-8") == "corrected by hand\n"
    assert "left as it is" in r.output


def test_sample_allocation_follows_spread(tmp_path):
    db, truth, _ = build_store(tmp_path, {"calm": (30, (0.97, 1.0)), "rough": (30, (0.3, 0.9))},
                               keyed={"calm": 2, "rough": 2})
    snap = read_snapshot(db)
    [system] = systems_of(snap, truth=truth)
    from ocrbench.quality.estimate import calibrate

    plan = plan_sample(snap, system, calibrate(system), pages=10, bands=1)
    by = plan.strata.set_index("collection")
    assert by.loc["rough", "S"] > by.loc["calm", "S"] and by.loc["rough", "n"] > by.loc["calm", "n"]
    lines_plan = plan_sample(snap, system, calibrate(system), lines=120)
    st = lines_plan.strata
    assert (st["n"] * st["cost"]).sum() <= 120          # the budget holds at each stratum's mean lines a page
    assert abs(lines_plan.pages["lines"].sum() - 120) <= 0.25 * 120
    assert runner.invoke(app, ["sample", str(db), "--out", str(tmp_path / "x")]).exit_code == 2
    assert runner.invoke(app, ["sample", str(db), "--pages", "3", "--lines", "3",
                               "--out", str(tmp_path / "x")]).exit_code == 2


def test_flat_truth_pairs_only_unambiguous_stems(tmp_path):
    # page_001.txt at the top belongs to the top-level page; box2's page_001 must not borrow it, while
    # box2/page_007.png (no other page_007) still finds a flat page_007.txt
    (tmp_path / "page_001.txt").write_text("a\n", encoding="utf-8")
    (tmp_path / "page_007.txt").write_text("b\n", encoding="utf-8")
    p = pair_store_pages(tmp_path, ["page_001.png", "box2/page_001.png", "box2/page_007.png"])
    assert {k: v.name for k, v, _ in p.pairs} == {"page_001.png": "page_001.txt", "box2/page_007.png": "page_007.txt"}
    assert p.hyp_only == ["box2/page_001.png"]
