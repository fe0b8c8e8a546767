"""Drift: does a group read differently from the keyed (calibration) sample?

What a group is compared with: the *calibrated population*, i.e. every page of
the groups that hold keyed pages, leaving out the group itself. Not the keyed
pages alone: they are a sample stratified by doubt (``ocrbench sample``
over-samples doubtful pages on purpose), so their confidences and balance rate
are not those of the population they calibrate. Confidence and arithmetic need
no ground truth, so every read page of those groups can serve.

Three checks per group, each reported with its figure and the size of the shift:

* **confidence distribution** — two-sample Kolmogorov–Smirnov statistic
  D = sup |F_group − F_reference| over line confidences (the same statistic
  as ``scipy.stats.ks_2samp``; the tests compare them). Lines of one page share
  scan and hand, so the p-value is not the textbook one (which assumes
  independent lines and would flag nearly everything on a large archive): it is
  a permutation p-value that shuffles *whole pages* between the two samples
  (p = (1 + #{D* ≥ D}) / (1 + permutations)). Across groups the p-values are
  adjusted by Holm's step-down method (S. Holm, "A simple sequentially
  rejective multiple test procedure", Scand. J. Statistics 6, 1979), which
  holds the family-wise error rate at ``alpha`` without assuming independence.
* **estimated CER** outside the interval of the CER measured on the keyed sample.
* **balance rate** (share of checkable pages whose arithmetic adds up): the
  group's and the reference's Wilson intervals do not overlap (a conservative
  two-sample comparison: both counts are noisy, the reference's often small).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

__all__ = ["ks_statistic", "pooled_ks", "ks_page_permutation", "holm", "DEFAULT_ALPHA", "MAX_TEST_PAGES"]

DEFAULT_ALPHA = 0.05

#: A sample with more pages is tested on this many of them, drawn at random (seeded): enough power,
#: bounded time on a large archive.
MAX_TEST_PAGES = 200


def ks_statistic(a: np.ndarray, b: np.ndarray) -> float:
    """Two-sample Kolmogorov–Smirnov statistic: the largest gap between the two empirical CDFs."""
    a = np.sort(np.asarray(a, dtype=np.float64))
    b = np.sort(np.asarray(b, dtype=np.float64))
    if a.size == 0 or b.size == 0:
        raise ValueError("the KS statistic needs two non-empty samples")
    grid = np.concatenate([a, b])
    fa = np.searchsorted(a, grid, side="right") / a.size
    fb = np.searchsorted(b, grid, side="right") / b.size
    return float(np.abs(fa - fb).max())


def pooled_ks(order_pages: np.ndarray, ends: np.ndarray, in_a: np.ndarray) -> float:
    """KS statistic of a split of pooled, sorted lines: ``in_a`` marks the pages of sample a."""
    la = in_a[order_pages]
    na = int(la.sum())
    nb = la.size - na
    diff = np.cumsum(la) / na - np.cumsum(~la) / nb
    return float(np.abs(diff[ends]).max())


def ks_page_permutation(a: np.ndarray, a_pages: np.ndarray, b: np.ndarray, b_pages: np.ndarray, *,
                        permutations: int = 999, seed: int = 0,
                        max_pages: int = MAX_TEST_PAGES) -> tuple[float, float | None]:
    """KS statistic of two line samples and its page-permutation p-value (None with fewer than 2 pages a side).

    ``a_pages``/``b_pages`` name each line's page; whole pages are shuffled between the samples. The lines
    are sorted once; each permutation only relabels pages and takes the largest gap of the two running
    shares at the ends of runs of equal values (the same D as :func:`ks_statistic`).
    """
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    d = ks_statistic(a, b)
    _, ia = np.unique(np.asarray(a_pages), return_inverse=True)
    _, ib = np.unique(np.asarray(b_pages), return_inverse=True)
    na_pages, nb_pages = int(ia.max()) + 1, int(ib.max()) + 1
    rng = np.random.default_rng(seed)
    keep_a, keep_b = np.arange(na_pages), np.arange(nb_pages)
    if na_pages > max_pages:
        keep_a = np.sort(rng.choice(na_pages, max_pages, replace=False))
    if nb_pages > max_pages:
        keep_b = np.sort(rng.choice(nb_pages, max_pages, replace=False))
    sel_a, sel_b = np.isin(ia, keep_a), np.isin(ib, keep_b)
    if keep_a.size < 2 or keep_b.size < 2:
        return d, None
    # pooled lines; pages renumbered 0..P-1 (a's first)
    ra = np.searchsorted(keep_a, ia[sel_a])
    rb = np.searchsorted(keep_b, ib[sel_b]) + keep_a.size
    values = np.concatenate([a[sel_a], b[sel_b]])
    pages = np.concatenate([ra, rb])
    order = np.argsort(values, kind="stable")
    sorted_values = values[order]
    ends = np.flatnonzero(np.r_[sorted_values[1:] != sorted_values[:-1], True])
    order_pages = pages[order]
    n_pages = keep_a.size + keep_b.size
    in_a = np.zeros(n_pages, dtype=bool)
    in_a[:keep_a.size] = True
    d_test = pooled_ks(order_pages, ends, in_a)
    hits = 0
    for _ in range(permutations):
        in_a[:] = False
        in_a[rng.choice(n_pages, keep_a.size, replace=False)] = True
        hits += pooled_ks(order_pages, ends, in_a) >= d_test - 1e-12
    return d, (1 + hits) / (1 + permutations)


def holm(p_values: Sequence[float | None]) -> list[float | None]:
    """Holm step-down adjusted p-values (None stays None and does not count as a test).

    Sorted ascending p_(1) ≤ … ≤ p_(m): adjusted p_(i) = max over j ≤ i of min(1, (m − j + 1) · p_(j)).
    """
    idx = [i for i, p in enumerate(p_values) if p is not None]
    m = len(idx)
    out: list[float | None] = [None] * len(p_values)
    running = 0.0
    for rank, i in enumerate(sorted(idx, key=lambda i: p_values[i])):  # type: ignore[arg-type, return-value]
        running = max(running, min(1.0, (m - rank) * float(p_values[i])))  # type: ignore[arg-type]
        out[i] = running
    return out
