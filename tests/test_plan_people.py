"""A plan a digitisation lead can sign off: people, money, configurations, sample size (issue 18).

References, each named beside its check: hand-worked arithmetic written out in the
docstrings; Cochran, *Sampling Techniques* (3rd ed., 1977), sample size for a
proportion n0 = z^2 P Q / d^2 and its relative-error form d = r P (from memory);
ISO 4217 for currency codes.
"""

from __future__ import annotations

import math
import re
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))

from ocrbench.errors import PlanError  # noqa: E402
from ocrbench.planning.archive import Archive  # noqa: E402
from ocrbench.planning.costmodel import fit_cost_model  # noqa: E402
from ocrbench.planning.decide import PlanInputs, make_plan  # noqa: E402
from ocrbench.planning.estimate import AccuracyInput, Goals, Resources  # noqa: E402
from ocrbench.planning.numerics import ScalingFit  # noqa: E402
from ocrbench.planning.people import Correction, effort, schedule  # noqa: E402
from ocrbench.planning.present import statements, table_lines  # noqa: E402
from ocrbench.planning.sampling import sample_size  # noqa: E402
from ocrbench.planning.throughput import between_pages, describe_rows, explain, speedup_interval  # noqa: E402
from test_planner import calibrate  # noqa: E402

WEEK = 7 * 86400.0


@pytest.fixture(scope="module")
def ctc_model():
    return fit_cost_model(calibrate(noise=0.0, width_noise=0, kinds=("ctc",)), "demo-ctc", n_boot=10)


def _plan(model, *, correction, goals, resources=Resources(), scaling=None, currency="GBP", cer=(0.02, 0.015, 0.03)):
    archive = Archive.from_numbers(1000, "24", "40", page_size=(1100, 1430))
    acc = {"demo-ctc": AccuracyInput(*cer)} if cer else {}
    inputs = PlanInputs(archive=archive, resources=resources, goals=goals, correction=correction, accuracy=acc,
                        scaling={"demo-ctc": scaling} if scaling else {}, draws=50, speed_drift=0.0,
                        currency=currency)
    return make_plan([model], inputs)


def test_correction_decides_the_deadline_hand_worked(ctc_model):
    """1,000 pages x 24 lines x 40 characters: 24,000 lines, 960,000 characters (as in test_planner).

    Full review: reading 24,000 x 4 s + 960,000 / 10 s = 192,000 s = 53.333 h; correcting at the upper
    CER 0.03: 28,800 errors x 10 s = 80 h. People, upper: 133.333 h. Two correctors x 37.5 h a week =
    75 h a week -> 1.7778 weeks > 1 week deadline, although recognition takes about 2 minutes.
    Correctors needed in one week: ceil(133.333 / 37.5) = ceil(3.5556) = 4; with 4: 0.8889 weeks.
    """
    goals = Goals(deadline_s=WEEK)
    two = _plan(ctc_model, correction=Correction(correctors=2, price_hour=20.0), goals=goals).iloc[0]
    assert two["people_hours_high"] == pytest.approx(133.333333, rel=1e-6)
    assert two["people_seconds_high"] == pytest.approx(1.7777778 * WEEK, rel=1e-6)
    assert two["recognition_meets_deadline"] is True or two["recognition_meets_deadline"] == True  # noqa: E712
    assert two["correction_meets_deadline"] == False and two["meets_deadline"] == False  # noqa: E712
    assert two["correctors_needed"] == 4
    four = _plan(ctc_model, correction=Correction(correctors=4, price_hour=20.0), goals=goals)
    r = four.iloc[0]
    assert r["people_seconds_high"] == pytest.approx(0.8888889 * WEEK, rel=1e-6)
    assert r["meets_deadline"] == True  # noqa: E712
    # no correctors given: the plan cannot say yes, and says how many are needed
    none = _plan(ctc_model, correction=Correction(price_hour=20.0), goals=goals)
    assert none.iloc[0]["meets_deadline"] is None and none.iloc[0]["correctors_needed"] == 4
    # the recommendation with 2 correctors is to have 4 (the smallest change that makes the deadline)
    rec = _plan(ctc_model, correction=Correction(correctors=2, price_hour=20.0), goals=goals).attrs["recommendation"]
    assert rec["change"] == "correctors 2 -> 4"


def test_more_correctors_alone_never_mend_a_budget(ctc_model):
    """The same 133.333 hours of people at GBP 20 an hour: GBP 2,666.67 at the upper CER whoever does them,
    plus a little compute. With a budget of GBP 1,000 and a one-week deadline both goals fail; 4 correctors
    mend the deadline only, so the recommendation names both changes, never the correctors alone."""
    goals = Goals(deadline_s=WEEK, budget=1000.0)
    p = _plan(ctc_model, correction=Correction(correctors=2, price_hour=20.0), goals=goals,
              resources=Resources(price_core_hour=0.12))
    r = p.iloc[0]
    assert r["meets_deadline"] == False and r["meets_budget"] == False  # noqa: E712
    assert r["people_cost_high"] == pytest.approx(133.333333 * 20.0, rel=1e-6)
    rec = p.attrs["recommendation"]
    assert rec["change"].startswith("correctors 2 -> 4; budget -> GBP 2,6"), rec
    assert "no single change is enough" in rec["text"] and "raise the budget to GBP 2,6" in rec["text"]
    # with the budget raised as it says, 4 correctors meet both goals
    need = float(rec["change"].split("GBP ")[1].replace(",", ""))
    four = _plan(ctc_model, correction=Correction(correctors=4, price_hour=20.0),
                 goals=Goals(deadline_s=WEEK, budget=need + 0.01), resources=Resources(price_core_hour=0.12))
    assert four.iloc[0]["meets_deadline"] == True and four.iloc[0]["meets_budget"] == True  # noqa: E712


def test_review_modes_hand_worked():
    """Targeted: 10 % of lines read, holding 60 % of the errors; none: nobody reads.

    Lines 1,000, characters 40,000; errors (800, 600, 1,200). Reading all: 1,000 x 4 + 40,000 / 10 = 8,000 s.
    Targeted: 800 s reading + 800 x 0.6 x 10 s = 4,800 s correcting -> 5,600 s; 320 errors left.
    """
    errs = (800.0, 600.0, 1200.0)
    full = effort(Correction(), 1000, 40_000, errs)
    assert full["review_hours"] * 3600 == pytest.approx(8000) and full["correction_hours"] * 3600 == pytest.approx(8000)
    assert full["errors_left"] == 0
    t = effort(Correction(review="targeted", catch_rate=0.6), 1000, 40_000, errs)
    assert t["review_hours"] * 3600 == pytest.approx(800) and t["people_hours"] * 3600 == pytest.approx(5600)
    assert t["errors_left"] == pytest.approx(320) and t["errors_left_high"] == pytest.approx(480)
    n = effort(Correction(review="none"), 1000, 40_000, errs)
    assert n["people_hours"] == 0 and n["errors_left"] == 800
    assert schedule(Correction(review="none"), 0.0, WEEK)["correction_meets_deadline"] is True
    with pytest.raises(PlanError, match="catch"):
        Correction(review="targeted")          # a catch rate must be given or measured, never assumed
    with pytest.raises(PlanError, match="review mode"):
        Correction(review="skim")


def test_unpriced_correction_never_meets_the_budget(ctc_model):
    """Compute is priced (a few pence), people are not: no total, "meets budget" unknown, never yes."""
    p = _plan(ctc_model, correction=Correction(correctors=10), goals=Goals(budget=1000.0),
              resources=Resources(price_core_hour=0.12))
    r = p.iloc[0]
    assert r["compute_cost"] > 0 and r["cost"] is None and r["meets_budget"] is None
    assert any("review and correction" in u for u in r["unpriced"])
    assert any("not judged against the budget" in w and "unpriced" in w for w in p.attrs["warnings"])
    heads, lines = table_lines(p)
    cells = dict(lines)
    assert cells["meets budget"] == ["unknown"]
    assert cells["total cost, GBP (P50 / high)"][0].startswith("not a total")
    # the priced part alone over the budget: a sure no
    p = _plan(ctc_model, correction=Correction(correctors=10), goals=Goals(budget=0.0001),
              resources=Resources(price_core_hour=0.12))
    assert p.iloc[0]["meets_budget"] == False  # noqa: E712


def test_costs_split_with_shares_and_currency_everywhere(ctc_model):
    p = _plan(ctc_model, correction=Correction(correctors=4, price_hour=20.0), goals=Goals(budget=5000.0),
              resources=Resources(price_core_hour=0.12), currency="EUR")
    r = p.iloc[0]
    assert r["currency"] == "EUR" and p.attrs["currency"] == "EUR"
    assert r["compute_share"] + r["people_share"] == pytest.approx(1.0)
    assert r["cost"] == pytest.approx(r["compute_cost"] + r["people_cost"])
    assert r["people_share"] > 0.99            # accuracy, not speed, decides the cost here
    heads, lines = table_lines(p)
    money_labels = [label for label, _ in lines if "cost" in label]
    assert money_labels and all("EUR" in label for label in money_labels)
    texts = [t for k, t in statements(p) if k in ("Choice", "Configuration")]
    assert texts and all("EUR" in t for t in texts if "cost" in t)
    assert any("EUR" in a for a in p.attrs["assumptions"])
    with pytest.raises(PlanError, match="ISO 4217"):
        _plan(ctc_model, correction=Correction(), goals=Goals(), currency="£")


def test_configurations_ranked_never_measured_slower_first(ctc_model):
    """Two workers measured slower than one (speed-up 0.85): asked for 2, the plan ranks 1 first,
    lists 2 as excluded, and recommends 1 worker."""
    sc = ScalingFit(pd.DataFrame({"workers": [1, 2], "threads": [1, 1], "pages_per_second": [1.0, 0.85]}))
    p = _plan(ctc_model, correction=Correction(review="none"), goals=Goals(deadline_s=WEEK),
              resources=Resources(workers=2, price_core_hour=0.1), scaling=sc)
    configs = p.attrs["configurations"]
    assert configs[0]["rank"] == 1 and configs[0]["workers"] == 1
    slow = [c for c in configs if c["workers"] == 2]
    assert slow and slow[0]["rank"] is None and "measured slower than 1" in slow[0]["excluded"]
    assert p.attrs["recommendation"]["workers"] == 1
    assert any("measured slower than 1" in w for w in p.attrs["warnings"])
    # measured faster: both ranked, by cost (the cheaper first), none excluded
    sc = ScalingFit(pd.DataFrame({"workers": [1, 2], "threads": [1, 1], "pages_per_second": [1.0, 1.9]}))
    p = _plan(ctc_model, correction=Correction(review="none"), goals=Goals(deadline_s=WEEK),
              resources=Resources(workers=2, price_core_hour=0.1), scaling=sc)
    configs = p.attrs["configurations"]
    assert [c["rank"] for c in configs] == [1, 2]
    assert configs[0]["cost"] <= configs[1]["cost"]


def test_relative_margin_sample_size_hand_worked_binomial():
    """Pilot of 6 pages of 1,000 characters with 27, 13, 20, 20, 20, 20 errors: CER p = 0.02, and the
    residual variance S_d^2 = (49 + 49) / 5 = 19.6 = 1,000 p (1 - p), a binomial page.

    Cochran (Sampling Techniques, 1977, sample size for a proportion, from memory): n0 = z^2 P Q / d^2
    characters; with a relative margin r, d = r P: n0 = z^2 Q / (r^2 P) = 1.959964^2 x 0.98 / (0.04 x 0.02)
    = 4,705.8 characters = 4.7058 pages of 1,000 -> 5 pages. An absolute margin of 0.005 (wider than a
    quarter of the CER) would give n0 = 1.959964^2 x 19.6 / (0.005^2 x 1,000^2) = 3.0118 -> 4 pages... and
    at a CER of 0.24 % an absolute ±0.5 points would be met by the 2-page floor: relative is the default.
    """
    pilot = pd.DataFrame({"char_edits": [27, 13, 20, 20, 20, 20], "ref_chars": [1000] * 6})
    z = 1.959964
    n0_binomial = z * z * (1 - 0.02) / (0.2 ** 2 * 0.02) / 1000
    s = sample_size(pilot, relative=0.2)
    assert s["margin"] == "relative" and s["half_width"] == pytest.approx(0.004)
    assert s["n0_pages"] == pytest.approx(n0_binomial, rel=1e-5) and s["pages"] == 5
    a = sample_size(pilot, absolute=0.005)
    assert a["margin"] == "absolute" and a["n0_pages"] == pytest.approx(z * z * 19.6 / (0.005 ** 2 * 1e6), rel=1e-5)
    assert a["pages"] == 4
    # a pilot without errors cannot meet a margin relative to 0: it says so instead of advising a few pages
    zero = sample_size(pd.DataFrame({"char_edits": [0, 0], "ref_chars": [900, 1100]}), relative=0.2)
    assert zero["pages"] is None and "absolute" in zero["notes"][0]


def test_whole_process_time_counts_each_job(ctc_model):
    """Jobs of 100 pages: 1,000 pages -> 10 jobs, on 1 worker 10 waves, each paying the start-up again.

    The model's start-up (loading and warm-up) s and process start-up p: wall = 10 (s + p) + serial
    instead of (s + p) + serial; the difference is 9 (s + p) exactly (no drift, same draws).
    """
    import dataclasses

    m = dataclasses.replace(ctc_model, startup_s=0.4, process_start_s=2.0)
    one = _plan(m, correction=Correction(review="none"), goals=Goals()).iloc[0]
    jobs = _plan(m, correction=Correction(review="none"), goals=Goals(),
                 resources=Resources(pages_per_job=100)).iloc[0]
    assert one["jobs"] == 1 and jobs["jobs"] == 10 and jobs["startup_seconds_per_job"] == pytest.approx(2.4)
    assert jobs["wall_seconds_p50"] - one["wall_seconds_p50"] == pytest.approx(9 * 2.4, rel=1e-9)


def test_a_dask_run_pays_its_measured_start_and_close(ctc_model):
    """Two workers on one machine are one Dask run: its start and close as measure-scaling timed a K-worker run.

    Hand-worked: process 0.5 s; a serial session's start-up 1.3 s and close 0.1 s; a measured 2-worker Dask run
    started in 2.9 s and closed in 0.5 s (3.4 s). 1 worker: 0.5 + 1.3 + 0.1 = 1.9 s; 2 workers: 0.5 + 3.4 = 3.9 s,
    of which the cluster's share 3.4 - 1.4 = 2.0 s. Without the K-worker measurement the older cluster figure
    (1.2 s) is added to the serial start-up: 1.9 + 1.2 = 3.1 s.
    """
    import dataclasses

    m = dataclasses.replace(ctc_model, startup_s=1.3, close_s=0.1, process_start_s=0.5, cluster_start_s=1.2,
                            dask_start_close_s={2: 3.4})
    scaling = ScalingFit(pd.DataFrame({"workers": [1, 2], "threads": [1, 1], "pages_per_second": [1.0, 1.2]}))
    one = _plan(m, correction=Correction(review="none"), goals=Goals(), scaling=scaling).iloc[0]
    two = _plan(m, correction=Correction(review="none"), goals=Goals(), scaling=scaling,
                resources=Resources(workers=2)).iloc[0]
    assert one["startup_seconds"] == pytest.approx(1.9) and one["cluster_start_seconds"] == 0
    assert two["startup_seconds"] == pytest.approx(3.9) and two["cluster_start_seconds"] == pytest.approx(2.0)
    older = _plan(dataclasses.replace(m, dask_start_close_s={}), correction=Correction(review="none"), goals=Goals(),
                  scaling=scaling, resources=Resources(workers=2)).iloc[0]
    assert older["startup_seconds"] == pytest.approx(3.1)


def test_measure_scaling_explains_a_speedup_below_one_and_never_prints_negative_time():
    base = {"recogniser": "x", "workers": 1, "threads": 1, "pages": 10, "pages_per_second": 2.0,
            "busy_seconds": 5.0, "gap_seconds_per_page": -0.05, "host_json": '{"cores": 2}',
            "page_seconds": [0.5] * 10}
    two = base | {"workers": 2, "pages": 20, "pages_per_second": 1.7, "busy_seconds": 23.5,
                  "gap_seconds_per_page": 0.01, "page_seconds": [1.0, 1.35] * 10}
    text = explain(two, base, cores=2)
    assert "0.850 < 1" in text and "took 1.18 s instead of 0.5 s" in text
    assert explain(two | {"threads": 2}, base, cores=2).count("ask for 4 cores")
    df, notes = describe_rows(pd.DataFrame([base, two]))
    assert len(notes) == 1 and (df[["idle_seconds_per_page", "overlap_seconds_per_page"]] >= 0).all().all()
    assert df.loc[0, "overlap_seconds_per_page"] == pytest.approx(0.05)
    # speed-up from page times: 2 x 0.5 / 1.175 = 0.851; the interval holds it and lies below 1
    s, lo, hi = speedup_interval(base["page_seconds"], two["page_seconds"], 2)
    assert s == pytest.approx(2 * 0.5 / 1.175) and lo <= s <= hi < 1
    assert between_pages(-0.3) == (0.0, 0.3) and between_pages(0.2) == (0.2, 0.0)


def test_no_printed_time_is_negative(ctc_model):
    p = _plan(ctc_model, correction=Correction(correctors=3, price_hour=10.0), goals=Goals(deadline_s=WEEK))
    _, lines = table_lines(p)
    for label, cells in lines:
        for c in cells:
            assert not re.search(r"(^|[\s(/])-\d", c), (label, c)     # no minus sign before a number
    assert (p[["wall_seconds_p10", "wall_seconds_p50", "wall_seconds_p90", "startup_seconds"]] >= 0).all().all()
    assert np.isfinite(p["wall_seconds_p50"]).all() and not math.isnan(p.iloc[0]["people_hours"])


def test_band_names_machine_drift_and_includes_the_spread_between_runs(ctc_model):
    """A noise-free model: with 10 % machine drift almost all of the P10-P90 band is drift. Two runs of the same pages, the second 10 % slower: cv = sd(1, 1.1) / 1.05 = 0.0673."""
    archive = Archive.from_numbers(1000, "24", "40", page_size=(1100, 1430))
    r = make_plan([ctc_model], PlanInputs(archive=archive, correction=Correction(review="none"), draws=400,
                                          speed_drift=0.1)).iloc[0]
    assert 0.9 <= r["band_drift_share"] <= 1.0
    frames = calibrate(noise=0.0, width_noise=0, kinds=("ctc",))
    two = {k: v.copy() for k, v in frames.items()}
    for k in ("runs", "pages", "batches", "lines"):
        again = frames[k].copy()
        again["run_id"] = 2
        if k == "pages":
            again["t_total"] = again["t_total"] * 1.1
        two[k] = pd.concat([frames[k], again], ignore_index=True)
    m = fit_cost_model(two, "demo-ctc", n_boot=5)
    assert m.speed_cv == pytest.approx(np.std([1.0, 1.1], ddof=1) / 1.05, rel=1e-6)
    assert any("across 2 runs" in n for n in m.notes)


def test_stratified_by_collection_hand_worked():
    """Two collections of 4 pages x 1,000 characters: A with 9, 11, 9, 11 errors, B with 29, 31, 29, 31.

    Pooled: R = 0.02, d = -11, -9, -11, -9, 9, 11, 9, 11; S_d^2 = 808 / 7 = 115.43;
    n0 = 1.959964^2 x 115.43 / ((0.2 x 0.02)^2 x 1000^2) = 27.71 -> 28 pages.
    Stratified (Cochran, stratified sampling, combined ratio estimate, from memory): within each collection
    d varies by +-1: S_dh^2 = 4/3; sum W_h S_dh^2 = 4/3; n0 = 3.8415 x 1.3333 / 16 = 0.320 -> at least
    2 pages per collection = 4 pages.
    """
    from ocrbench.planning.sampling import stratified_sample_size

    pilot = pd.DataFrame({"page_id": [f"A/p{i}.png" for i in range(4)] + [f"B/p{i}.png" for i in range(4)],
                          "char_edits": [9, 11, 9, 11, 29, 31, 29, 31], "ref_chars": [1000] * 8})
    pooled = sample_size(pilot, relative=0.2)
    assert pooled["n0_pages"] == pytest.approx(1.959964 ** 2 * 808 / 7 / 16, rel=1e-5) and pooled["pages"] == 28
    strat = stratified_sample_size(pilot, relative=0.2)
    assert strat["n0_pages"] == pytest.approx(1.959964 ** 2 * (4 / 3) / 16, rel=1e-5)
    assert strat["by_collection"] == {"A": 2, "B": 2} and strat["pages"] == 4
    # one collection only: the pooled answer
    flat = pilot.assign(page_id=[f"p{i}.png" for i in range(8)])
    assert stratified_sample_size(flat, relative=0.2)["pages"] == 28


def test_tune_times_the_most_promising_configurations_first():
    from ocrbench.planning.throughput import grid_order

    order = grid_order([1, 2], [8, 16, 32], [1, 2], cores=2)
    uses = [c["workers"] * c["threads"] for c in order]
    # every configuration using both cores before any using one; too large ones last; middle batch first
    assert uses == sorted(uses, key=lambda u: (u > 2, -min(u, 2)))
    assert order[0]["batch_size"] == 16 and order[0]["workers"] * order[0]["threads"] == 2
    assert len(order) == 12 and order[-1]["workers"] * order[-1]["threads"] == 4
