"""Interval formulas that several layers need (the ledger's misread estimate as well as accuracy and
quality figures): the plain percentile interval of bootstrap samples and the Wilson score interval.

Everything else about intervals (page bootstrap, expanded percentile, paired comparison) lives in
:mod:`ocrbench.accuracy.stats`, which re-exports these two; this module sits in the lowest layer so
that ``ledger`` can use them without importing upward.
"""

from __future__ import annotations

import math
from statistics import NormalDist
from typing import Any

import numpy as np

__all__ = ["percentile_interval", "wilson_interval"]

def percentile_interval(samples: Any, level: float = 0.95) -> tuple[float, float] | None:
    """Plain percentile interval of bootstrap samples (non-finite ones dropped); None when none is left."""
    s = np.asarray(samples, dtype=np.float64)
    s = s[np.isfinite(s)]
    if s.size == 0:
        return None
    lo, hi = np.quantile(s, [(1 - level) / 2, 1 - (1 - level) / 2])
    return float(lo), float(hi)


def wilson_interval(successes: int, n: int, *, level: float = 0.95) -> tuple[float, float] | None:
    """Wilson score interval for a binomial proportion (Wilson 1927); None when n == 0."""
    if n <= 0:
        return None
    z = NormalDist().inv_cdf(0.5 + level / 2)
    p = successes / n
    denom = 1 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    low = 0.0 if successes == 0 else max(0.0, centre - half)
    high = 1.0 if successes == n else min(1.0, centre + half)
    return low, high
