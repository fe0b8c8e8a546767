"""Intervals, paired comparison and sample size against published results and reference libraries."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from ocrbench.accuracy.stats import (bootstrap_ratio_ci, bootstrap_sums, cochran_n0, expanded_tail,
                                     paired_comparison, sample_size_for_cer, t_cdf, t_quantile, z_value)
from ocrbench.errors import PlanError

import scipy.stats as scipy_stats  # noqa: E402  (reference only; the test extra installs scipy)


def _pages(rng: np.random.Generator, n_pages: int, cer: float, conc: float = 300.0):
    """Synthetic pages with a known true CER: page sizes vary, page rates vary around ``cer``."""
    chars = rng.integers(200, 2001, size=n_pages)
    rates = rng.beta(cer * conc, (1 - cer) * conc, size=n_pages)
    return rng.binomial(chars, rates), chars


def test_interval_coverage_on_synthetic_pages_with_known_cer():
    # A 95% interval must cover the true value in about 95% of repetitions
    # (definition of a confidence interval); 200 seeded replications of 30 pages
    # each whose rates vary around a true CER of 3%.
    rng = np.random.default_rng(2024)
    true_cer, hits = 0.03, 0
    for rep in range(200):
        edits, chars = _pages(rng, 30, true_cer)
        lo, hi = bootstrap_ratio_ci(edits, chars, n_boot=1000, seed=rep)
        hits += lo <= true_cer <= hi
    assert 0.90 <= hits / 200 <= 0.98, hits / 200


def test_bootstrap_interval_matches_scipy():
    # Reference: scipy.stats.bootstrap, paired resampling of (edits, chars) rows,
    # percentile method at the same tail probability; Monte Carlo error allowed.
    rng = np.random.default_rng(7)
    edits, chars = _pages(rng, 60, 0.04)
    tail = expanded_tail(0.95, 60)
    ours = bootstrap_ratio_ci(edits, chars, n_boot=20000, seed=1)
    ref = scipy_stats.bootstrap((edits, chars), lambda e, c: e.sum() / c.sum(), paired=True, vectorized=False,
                                method="percentile", confidence_level=1 - 2 * tail, n_resamples=20000,
                                random_state=np.random.default_rng(3)).confidence_interval
    width = ref.high - ref.low
    assert abs(ours[0] - ref.low) < 0.03 * width and abs(ours[1] - ref.high) < 0.03 * width


def test_bootstrap_sums_resample_whole_pages():
    # Every resample draws n pages with replacement: weights sum to n, so a
    # column of ones sums to n in every replicate.
    sums = bootstrap_sums(np.ones((17, 1)), n_boot=300, seed=0)
    assert np.all(sums == 17)


def test_interval_is_seeded():
    rng = np.random.default_rng(0)
    e, c = _pages(rng, 25, 0.05)
    assert bootstrap_ratio_ci(e, c, seed=4) == bootstrap_ratio_ci(e, c, seed=4)
    assert bootstrap_ratio_ci(e, c, seed=4) != bootstrap_ratio_ci(e, c, seed=5)


def test_no_interval_without_data():
    assert bootstrap_ratio_ci([], []) == (None, None)
    assert bootstrap_ratio_ci([3], [100]) == (None, None)      # one page: no spread to measure
    assert bootstrap_ratio_ci([1, 2], [0, 0]) == (None, None)  # no reference text at all


@pytest.mark.parametrize("df", [1, 2, 3, 5, 12, 29, 150, 200, 201, 1000, 50000])
@pytest.mark.parametrize("p", [0.001, 0.025, 0.3, 0.5, 0.975, 0.999])
def test_student_t_against_scipy(df, p):
    # Reference: scipy.stats.t (quantile and CDF of Student's t).
    q = t_quantile(p, df)
    assert q == pytest.approx(scipy_stats.t.ppf(p, df), rel=1e-7, abs=1e-9)
    assert t_cdf(q, df) == pytest.approx(p, rel=1e-7)


def test_expanded_tail_tends_to_the_plain_tail():
    # Hesterberg (2015): the expansion matters for few pages and vanishes for many.
    assert expanded_tail(0.95, 5) < expanded_tail(0.95, 30) < expanded_tail(0.95, 10_000) < 0.025
    assert expanded_tail(0.95, 10_000) == pytest.approx(0.025, rel=0.01)
    assert z_value(0.95) == pytest.approx(1.959964, abs=1e-6)   # standard normal table


# --------------------------------------------------------------------------- paired comparison


def _frame(edits, chars, ids=None):
    ids = ids if ids is not None else [f"p{i}" for i in range(len(edits))]
    return pd.DataFrame({"page_id": ids, "char_edits": edits, "ref_chars": chars})


def test_identical_systems_have_no_winner():
    rng = np.random.default_rng(1)
    e, c = _pages(rng, 40, 0.05)
    r = paired_comparison(_frame(e, c), _frame(e, c), names=("ctc", "seq"))
    assert r["diff"] == 0 and r["low"] == 0 and r["high"] == 0
    assert r["winner"] is None and r["p_value"] == 1.0


def test_clearly_better_system_wins():
    rng = np.random.default_rng(2)
    chars = rng.integers(500, 2000, size=40)
    good = rng.binomial(chars, 0.01)
    bad = rng.binomial(chars, 0.05)
    r = paired_comparison(_frame(bad, chars), _frame(good, chars), names=("ctc", "seq"))
    assert r["winner"] == "seq" and r["low"] > 0 and r["p_value"] < 0.01
    r = paired_comparison(_frame(good, chars), _frame(bad, chars), names=("ctc", "seq"))
    assert r["winner"] == "ctc" and r["high"] < 0


def test_small_difference_on_few_pages_names_no_winner():
    rng = np.random.default_rng(3)
    chars = rng.integers(500, 2000, size=6)
    a = rng.binomial(chars, rng.beta(3, 97, size=6))
    b = rng.binomial(chars, rng.beta(3, 97, size=6))
    r = paired_comparison(_frame(a, chars), _frame(b, chars))
    assert r["low"] < 0 < r["high"] and r["winner"] is None and r["p_value"] > 0.05


def test_two_pages_that_both_improved_show_no_winner():
    # Seen on a two-page run: every resample of two improved pages lies below zero, so the percentile
    # interval excluded zero while the p-value (t with 1 degree of freedom) was 0.3. A winner needs both.
    r = paired_comparison(_frame([20, 25], [1000, 1200]), _frame([2, 3], [1000, 1200]), names=("raw", "post"))
    assert r["low"] > 0 and r["p_value"] > 0.05 and r["winner"] is None


def test_p_value_agrees_with_the_interval():
    # The p-value is the smallest 1 - level whose interval touches zero, so
    # "interval excludes 0 at 95%" and "p < 0.05" must agree (up to resampling grain).
    rng = np.random.default_rng(4)
    checked = agree = winners = 0
    for k in range(30):
        chars = rng.integers(500, 2000, size=20)
        a = rng.binomial(chars, 0.03)
        b = rng.binomial(chars, 0.03 + 0.002 * (k % 6))
        r = paired_comparison(_frame(a, chars), _frame(b, chars), seed=k)
        if abs(r["p_value"] - 0.05) < 0.005:
            continue                       # too close to the edge to demand agreement
        checked += 1
        winners += r["winner"] is not None
        agree += (r["winner"] is not None) == (r["p_value"] < 0.05)
    assert checked >= 25 and 0 < winners < checked and agree == checked


def test_paired_comparison_checks_its_inputs():
    a = _frame([1, 2, 3], [10, 10, 10], ["x", "y", "z"])
    with pytest.raises(ValueError, match="reference lengths differ"):
        paired_comparison(a, _frame([1, 2, 3], [10, 11, 10], ["x", "y", "z"]))
    r = paired_comparison(a, _frame([1, 2], [10, 10], ["x", "y"]))
    assert r["pages"] == 2 and r["pages_only_a"] == ["z"] and r["pages_only_b"] == []


# --------------------------------------------------------------------------- sample size


def test_cochran_worked_example():
    # W. G. Cochran, Sampling Techniques: n0 = t^2 p q / d^2 with p = 0.5,
    # d = 0.05 at 95% gives n0 = 384 (the textbook's worked figure).
    assert cochran_n0(0.5, 0.05) == 384
    # Finite-population correction n = n0 / (1 + n0/N) (same source): N = 1000 -> 278.
    assert math.ceil(384 / (1 + 384 / 1000)) == 278


def test_ratio_sample_size_reduces_to_the_proportion_case():
    # With one character per page the ratio estimator is a simple proportion, so
    # the pages needed approach Cochran's n0 (up to the pilot's m/(m-1) factor).
    m, p = 4000, 0.2
    pilot = _frame(np.r_[np.ones(int(m * p)), np.zeros(m - int(m * p))].astype(int), np.ones(m, dtype=int))
    got = sample_size_for_cer(pilot, half_width=0.02)
    assert got["pages"] == pytest.approx(cochran_n0(p, 0.02), rel=0.002)
    with_fpc = sample_size_for_cer(pilot, half_width=0.02, population=2000)
    assert with_fpc["pages"] == math.ceil(got["n0_pages"] / (1 + got["n0_pages"] / 2000))


def test_ratio_sample_size_gives_the_target_half_width_by_simulation():
    # Monte Carlo check of the ratio-estimator variance (Cochran, Sampling
    # Techniques, ratio estimation): draw samples of the advised size without
    # replacement from a known archive; z * sd of the estimated CER must be the
    # target half-width.
    rng = np.random.default_rng(11)
    N = 4000
    edits, chars = _pages(rng, N, 0.04, conc=40)
    archive = _frame(edits, chars).assign(ref_lines=rng.integers(20, 40, size=N))
    target = 0.003
    plan = sample_size_for_cer(archive, half_width=target, population=N)
    n = plan["pages"]
    assert 20 < n < N and plan["lines"] == math.ceil(n * archive["ref_lines"].mean() - 1e-9)
    draws = rng.permuted(np.tile(np.arange(N), (1500, 1)), axis=1)[:, :n]
    est = edits[draws].sum(1) / chars[draws].sum(1)
    achieved = 1.959964 * est.std()
    assert achieved == pytest.approx(target, rel=0.1)


def test_sample_size_needs_a_pilot():
    with pytest.raises(PlanError, match="at least 2 pages"):
        sample_size_for_cer(_frame([1], [100]), half_width=0.01)
    small = sample_size_for_cer(_frame([0, 0, 0], [100, 100, 100]), half_width=0.01)
    assert small["pages"] == 2 and small["notes"]
