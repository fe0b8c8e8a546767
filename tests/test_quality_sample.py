"""`ocrbench sample`: stratified allocation against hand-worked examples, and the keying templates'
round trip into ground truth.

Allocation references: optimum allocation n_h = n·(N_h S_h/√c_h)/Σ(N_k S_k/√c_k), Neyman's case with equal
costs, and strata taken whole when the formula asks for more than they hold (W. G. Cochran, Sampling
Techniques, 3rd ed., §5.5, 5.6, 5.8, from memory); the numbers below are worked by hand from those formulas.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
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


# --------------------------------------------------------------------------- pages for a relative margin


def test_binomial_sample_size_hand_worked():
    from ocrbench.quality.sample import binomial_chars, pages_for_margin

    # Sample size of a proportion with absolute margin d: n = z²p(1 − p)/d² (Cochran, Sampling Techniques, §4.4,
    # from memory); with d = m·p, n = z²(1 − p)/(m²p). The classic survey figure: p = 0.5, d = 0.05 (m = 0.1) at
    # 95 % gives 384.1 (z = 1.96; common practice).
    assert binomial_chars(0.5, 0.1) == pytest.approx(1.959964 ** 2 * 0.5 / (0.01 * 0.5), rel=1e-6)
    assert round(binomial_chars(0.5, 0.1), 1) == 384.1
    # CER 2 %, ±20 % relative: 1.959964² · 0.98 / (0.04 · 0.02) = 3.841459 · 0.98 / 0.0008 = 4705.79 characters
    assert binomial_chars(0.02, 0.2) == pytest.approx(4705.79, abs=0.01)
    # 400 characters a page: 11.764 pages; finite population of 100 pages: 11.764/(1 + 0.11764) = 10.53 -> 11
    assert pages_for_margin(binomial_chars(0.02, 0.2), 400, 100) == 11
    # 5 pages in all: 11.764/(1 + 11.764/5) = 3.51 -> 4; never more than there are
    assert pages_for_margin(binomial_chars(0.02, 0.2), 400, 5) == 4
    assert pages_for_margin(1e9, 400, 5) == 5
    # 99 % instead of 95 %: z = 2.575829, n grows by (2.575829/1.959964)² = 1.7272
    assert binomial_chars(0.02, 0.2, 0.99) / binomial_chars(0.02, 0.2) == pytest.approx(1.7272, abs=1e-4)


def test_ratio_sample_size_hand_worked():
    from ocrbench.quality.sample import ratio_chars

    # Ratio estimate (Cochran §6.4, from memory): edits 2, 6, 4 on pages of 100, 200, 100 characters.
    # R = 12/400 = 0.03; e − Rc = −1, 0, 1, S_d² = 2/2 = 1; x̄ = 133.33;
    # pages = z²·S_d²/(m²R²x̄²) = 3.841459/(0.04 · 0.0009 · 17777.78) = 3.841459/0.64 = 6.0023
    got = ratio_chars([2, 6, 4], [100, 200, 100], 0.2)
    assert got / (400 / 3) == pytest.approx(6.0023, abs=1e-4)
    assert ratio_chars([0, 0], [100, 100], 0.2) is None and ratio_chars([3], [100], 0.2) is None


def test_sample_for_a_margin_per_collection(tmp_path):
    from ocrbench.quality.sample import MIN_KEYED_FOR_SPREAD

    db, truth, _ = build_store(tmp_path, {"calm": (40, (0.9, 1.0)), "rough": (40, (0.4, 0.9))},
                               keyed={"calm": 2, "rough": MIN_KEYED_FOR_SPREAD})
    out = tmp_path / "key"
    r = runner.invoke(app, ["sample", str(db), "--margin", "0.2", "--out", str(out), "--truth", str(truth), "--json"])
    assert r.exit_code == 0, r.output
    res = json.loads(r.stdout)
    targets = {t["collection"]: t for t in res["targets"]}
    assert set(targets) == {"calm", "rough"}
    z2 = 1.959964 ** 2
    for coll, t in targets.items():
        # the sizes follow the formulas of the module notes from the figures the JSON reports
        binom = z2 * (1 - t["cer"]) / (0.04 * t["cer"])
        assert t["chars_needed"] >= binom * (1 - 1e-6)
        n0 = t["chars_needed"] / t["chars_per_page"]
        assert t["pages_needed"] == min(40, math.ceil(n0 / (1 + n0 / 40) - 1e-9))
        assert t["to_key"] == min(40 - t["keyed"], max(0, t["pages_needed"] - t["keyed"]))
        assert sum(s["n"] for s in res["strata"] if s["collection"] == coll) == t["to_key"]
    assert targets["calm"]["size_from"] == "binomial"               # 2 keyed pages: too few for their spread
    assert targets["rough"]["cer"] > targets["calm"]["cer"]
    assert res["pages"] == sum(t["to_key"] for t in targets.values()) == len(pd.read_csv(out / "sample.csv"))
    # without keyed pages nothing says how good each collection is: a clear usage error
    r = runner.invoke(app, ["sample", str(db), "--margin", "0.2", "--out", str(tmp_path / "x")])
    assert r.exit_code == 2 and "first sample" in r.output
