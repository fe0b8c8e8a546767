"""Uncertainty for accuracy figures: page bootstrap, paired comparison, ground-truth sample size.

Pages are the sampling unit throughout: lines of one page share the scan, the
hand and the layout, so their errors are correlated and resampling lines would
make intervals too narrow.

* :func:`bootstrap_ratio_ci` — bootstrap interval for a corpus ratio such as
  CER = Σ edits / Σ reference characters, resampling whole pages. The interval
  is the *expanded percentile* interval (T. C. Hesterberg, "What teachers should
  know about the bootstrap", The American Statistician 69(4), 2015): the
  percentiles are taken at the tail probability Φ(−√(n/(n−1))·t_{n−1}) instead
  of (1 − level)/2, which undoes the plain percentile interval's narrowness with
  few pages (n = pages). With fewer than 2 pages there is no interval (None).
* :func:`paired_comparison` — two recognisers scored on the same pages: the
  difference of their corpus rates, its bootstrap interval (the same resampled
  pages for both, expanded as above) and a two-sided p-value consistent with that
  interval; a winner is named only when the interval excludes zero.
* :func:`sample_size_for_cer` — how many pages to transcribe so the CER interval
  has a given half-width, from a pilot sample, using the large-sample variance of
  the ratio estimator (W. G. Cochran, *Sampling Techniques*, chapter on ratio
  estimation): V(R̂) ≈ (1 − n/N) · S_d² / (n · X̄²) with S_d² the variance of
  the residuals d_i = y_i − R·x_i (y = edits, x = reference characters of page i).
* :func:`cochran_n0` — the simple-proportion case n0 = z²·p(1−p)/e².

Everything is seeded: the same inputs and seed give the same interval.
"""

from __future__ import annotations

import math
from statistics import NormalDist
from typing import Any, Callable, Iterator, Sequence

import numpy as np
import pandas as pd

from ocrbench.errors import PlanError
from ocrbench.intervals import percentile_interval, wilson_interval

__all__ = ["z_value", "t_cdf", "t_quantile", "expanded_tail", "resample_counts", "bootstrap_sums",
           "bootstrap_ratio_ci", "bootstrap_ratio_cis", "percentile_interval", "bootstrap_statistic",
           "wilson_interval", "paired_comparison", "sample_size_for_cer", "cochran_n0"]

#: Upper bound on the entries of one resampling block (memory: 8 bytes each).
_BLOCK = 2_000_000

_METRIC_COLUMNS = {"cer": ("char_edits", "ref_chars"), "wer": ("word_edits", "ref_words")}


def z_value(level: float) -> float:
    """Two-sided standard-normal quantile for a confidence level (0.95 → 1.95996…)."""
    if not 0 < level < 1:
        raise ValueError(f"confidence level must be between 0 and 1, got {level}")
    return NormalDist().inv_cdf(0.5 + level / 2)


def t_cdf(t: float, df: int) -> float:
    """P(T <= t) for Student's t with ``df`` degrees of freedom.

    Exact finite series for integer df (Abramowitz & Stegun, Handbook of
    Mathematical Functions, 26.7.3 and 26.7.4) up to df = 200; above that the
    quantile expansion 26.7.5 is inverted by bisection.
    """
    if df < 1:
        raise ValueError(f"degrees of freedom must be >= 1, got {df}")
    if math.isinf(t):
        return 1.0 if t > 0 else 0.0
    if df > 200:
        lo, hi = 1e-300, 1 - 1e-16
        for _ in range(100):
            mid = (lo + hi) / 2
            if t_quantile(mid, df) < t:
                lo = mid
            else:
                hi = mid
        return (lo + hi) / 2
    theta = math.atan2(abs(t), math.sqrt(df))
    c2 = math.cos(theta) ** 2
    if df % 2:   # odd: A = (2/pi) [theta + sin cos (1 + 2/3 c2 + 2.4/(3.5) c2^2 + ...)]
        term, total = 1.0, 1.0 if df > 1 else 0.0
        for k in range(1, (df - 1) // 2):
            term *= (2 * k) / (2 * k + 1) * c2
            total += term
        a = 2 / math.pi * (theta + (math.sin(theta) * math.cos(theta) * total if df > 1 else 0.0))
    else:        # even: A = sin (1 + 1/2 c2 + 1.3/(2.4) c2^2 + ...)
        term, total = 1.0, 1.0
        for k in range(1, df // 2):
            term *= (2 * k - 1) / (2 * k) * c2
            total += term
        a = math.sin(theta) * total
    a = min(max(a, 0.0), 1.0)           # A = P(|T| <= |t|)
    return 0.5 + a / 2 if t >= 0 else 0.5 - a / 2


def t_quantile(p: float, df: int) -> float:
    """The p-quantile of Student's t with ``df`` degrees of freedom (inverse of :func:`t_cdf`)."""
    if not 0 < p < 1:
        raise ValueError(f"p must be between 0 and 1, got {p}")
    if df > 200:   # A&S 26.7.5 (Cornish-Fisher type expansion in 1/df)
        z = NormalDist().inv_cdf(p)
        g1 = (z ** 3 + z) / 4
        g2 = (5 * z ** 5 + 16 * z ** 3 + 3 * z) / 96
        g3 = (3 * z ** 7 + 19 * z ** 5 + 17 * z ** 3 - 15 * z) / 384
        g4 = (79 * z ** 9 + 776 * z ** 7 + 1482 * z ** 5 - 1920 * z ** 3 - 945 * z) / 92160
        return z + g1 / df + g2 / df ** 2 + g3 / df ** 3 + g4 / df ** 4
    lo, hi = -1.0, 1.0
    while t_cdf(lo, df) > p:
        lo *= 2
    while t_cdf(hi, df) < p:
        hi *= 2
    for _ in range(200):
        mid = (lo + hi) / 2
        if t_cdf(mid, df) < p:
            lo = mid
        else:
            hi = mid
        if hi - lo < 1e-12 * max(1.0, abs(mid)):
            break
    return (lo + hi) / 2


def expanded_tail(level: float, n: int) -> float:
    """Lower tail probability at which to read the bootstrap percentiles for ``n`` pages.

    Φ(−√(n/(n−1)) · t_{(1+level)/2, n−1}) (Hesterberg 2015, expanded percentile
    interval); tends to (1 − level)/2 as n grows.
    """
    if not 0 < level < 1:
        raise ValueError(f"confidence level must be between 0 and 1, got {level}")
    if n < 2:
        raise ValueError("an interval needs at least 2 pages")
    z = math.sqrt(n / (n - 1)) * t_quantile(0.5 + level / 2, n - 1)
    return NormalDist().cdf(-z)


def resample_counts(n: int, n_boot: int, seed: int) -> Iterator[np.ndarray]:
    """Bootstrap resamples of ``n`` pages as blocks of multiplicity rows.

    Each yielded array has shape (b, n): row r says how often each page was drawn
    in resample r (rows sum to n). Blocks keep memory bounded; the block size
    depends only on ``n``, so results are reproducible for a given seed.
    """
    rng = np.random.default_rng(seed)
    rows = max(1, _BLOCK // max(n, 1))
    dtype = np.int32 if n * rows < 2**31 else np.int64
    for start in range(0, n_boot, rows):
        b = min(rows, n_boot - start)
        idx = rng.integers(0, n, size=(b, n), dtype=dtype)
        idx += (np.arange(b, dtype=dtype) * n)[:, None]
        yield np.bincount(idx.ravel(), minlength=b * n).reshape(b, n).astype(np.float64)


def bootstrap_sums(values: np.ndarray, *, n_boot: int = 2000, seed: int = 0) -> np.ndarray:
    """Column sums of ``values`` (pages × k) over ``n_boot`` page resamples: (n_boot, k)."""
    v = np.asarray(values, dtype=np.float64)
    if v.ndim == 1:
        v = v[:, None]
    out = np.empty((n_boot, v.shape[1]))
    pos = 0
    for counts in resample_counts(v.shape[0], n_boot, seed):
        out[pos:pos + counts.shape[0]] = counts @ v
        pos += counts.shape[0]
    return out


def _percentiles(samples: np.ndarray, tail: float) -> tuple[float | None, float | None]:
    s = samples[np.isfinite(samples)]
    if s.size == 0:
        return None, None
    lo, hi = np.quantile(s, [tail, 1 - tail])
    return float(lo), float(hi)


def bootstrap_ratio_cis(numerators: np.ndarray, denominators: np.ndarray, *, n_boot: int = 2000,
                        level: float = 0.95, seed: int = 0) -> list[tuple[float | None, float | None]]:
    """Expanded percentile intervals for several corpus ratios Σnum_k / Σden_k, one set of page resamples.

    ``numerators`` and ``denominators`` are (pages × k). Resamples whose
    denominator sums to zero are left out; ``(None, None)`` when there are fewer
    than 2 pages or no denominator at all.
    """
    num = np.asarray(numerators, dtype=np.float64)
    den = np.asarray(denominators, dtype=np.float64)
    if num.ndim == 1:
        num, den = num[:, None], den[:, None]
    k = num.shape[1]
    if num.shape[0] < 2:
        return [(None, None)] * k
    tail = expanded_tail(level, num.shape[0])
    sums = bootstrap_sums(np.hstack([num, den]), n_boot=n_boot, seed=seed)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratios = np.where(sums[:, k:] > 0, sums[:, :k] / sums[:, k:], np.nan)
    out = []
    for j in range(k):
        if den[:, j].sum() <= 0:
            out.append((None, None))
        else:
            out.append(_percentiles(ratios[:, j], tail))
    return out


def bootstrap_ratio_ci(edits: Any, totals: Any, *, n_boot: int = 2000, level: float = 0.95,
                       seed: int = 0) -> tuple[float | None, float | None]:
    """Bootstrap interval for Σedits / Σtotals, resampling pages (one entry per page).

    Expanded percentile interval (see the module docstring). Returns
    ``(None, None)`` with fewer than 2 pages or no reference text at all.
    """
    e = np.asarray(edits, dtype=np.float64)
    t = np.asarray(totals, dtype=np.float64)
    if e.shape != t.shape or e.ndim != 1:
        raise ValueError("edits and totals must be 1-D arrays of the same length (one entry per page)")
    return bootstrap_ratio_cis(e, t, n_boot=n_boot, level=level, seed=seed)[0]




def bootstrap_statistic(stat: Callable[[np.ndarray], float | None], groups: Sequence[np.ndarray], *,
                        n_boot: int = 1000, level: float = 0.95, seed: int = 0) -> tuple[float, float] | None:
    """Percentile bootstrap interval of ``stat(indices)``, resampling whole groups of item indices.

    ``groups``: one index array per sampling unit (a page's lines, or one line
    each). Resamples where ``stat`` is undefined (None) are skipped; None when
    every resample was.
    """
    rng = np.random.default_rng(seed)
    vals = []
    for _ in range(n_boot):
        pick = rng.integers(0, len(groups), len(groups))
        v = stat(np.concatenate([groups[g] for g in pick]))
        if v is not None:
            vals.append(v)
    return percentile_interval(vals, level) if vals else None




# --------------------------------------------------------------------------- paired comparison


def _pages_frame(x: Any) -> pd.DataFrame:
    pages = getattr(x, "pages", x)
    if not isinstance(pages, pd.DataFrame):
        raise TypeError("expected a Scores object or its per-page DataFrame")
    return pages


def paired_comparison(pages_a: Any, pages_b: Any, *, metric: str = "cer", n_boot: int = 2000,
                      level: float = 0.95, seed: int = 0, names: tuple[str, str] = ("a", "b")) -> dict:
    """Compare two recognisers scored on the same pages (same truth, same profile).

    ``pages_a``/``pages_b``: :class:`~ocrbench.accuracy.score.Scores` or their
    ``pages`` DataFrames. Pages are matched by ``page_id``; pages scored for only
    one side are left out of the comparison and listed in the result.

    Returns a dict: ``diff`` (rate of a − rate of b; negative means a makes fewer
    errors), ``low``/``high`` (expanded percentile bootstrap interval of the
    difference, both rates computed on the same resampled pages), ``p_value``
    (two-sided, the smallest 1 − level at which that interval would touch zero:
    g = share of resampled differences on the far side of zero, +1 corrected so
    never 0; z = Φ⁻¹(1 − g); p = 2·(1 − T_{n−1}(z / √(n/(n−1))))), ``winner``
    (the name with the lower rate, only when the interval excludes zero and the
    p-value is below 1 − level, else ``None``; on very few pages the two can
    disagree), ``p_floor`` (the smallest p-value ``n_boot`` resamples can give) and
    ``p_at_floor`` (p is that floor: read it as "p < floor", not as exact), the two
    rates and the page counts. Fewer than 2 common pages give no interval and no winner.
    """
    if metric not in _METRIC_COLUMNS:
        raise ValueError(f"metric must be one of {sorted(_METRIC_COLUMNS)}, got {metric!r}")
    num, den = _METRIC_COLUMNS[metric]
    a, b = _pages_frame(pages_a), _pages_frame(pages_b)
    m = a[["page_id", num, den]].merge(b[["page_id", num, den]], on="page_id", suffixes=("_a", "_b"))
    only_a = sorted(set(a["page_id"]) - set(m["page_id"]))
    only_b = sorted(set(b["page_id"]) - set(m["page_id"]))
    if m.empty:
        raise ValueError("the two score sets have no page in common")
    if not np.array_equal(m[f"{den}_a"].to_numpy(), m[f"{den}_b"].to_numpy()):
        bad = m.loc[m[f"{den}_a"] != m[f"{den}_b"], "page_id"].tolist()[:5]
        raise ValueError(f"the reference lengths differ on pages {bad}: were both scored against "
                         "the same ground truth with the same profile?")
    ea = m[f"{num}_a"].to_numpy(np.float64)
    eb = m[f"{num}_b"].to_numpy(np.float64)
    t = m[f"{den}_a"].to_numpy(np.float64)
    total = t.sum()
    result: dict[str, Any] = {
        "metric": metric, "a": names[0], "b": names[1], "pages": int(len(m)),
        "pages_only_a": only_a, "pages_only_b": only_b, "level": level, "n_boot": n_boot, "seed": seed,
        "method": "paired percentile bootstrap over pages",
    }
    if total <= 0:
        result.update(value_a=None, value_b=None, diff=None, low=None, high=None, p_value=None, p_floor=None,
                      p_at_floor=False, winner=None)
        return result
    va, vb = ea.sum() / total, eb.sum() / total
    n = len(m)
    if n < 2:
        result.update(value_a=float(va), value_b=float(vb), diff=float(va - vb), low=None, high=None,
                      p_value=None, p_floor=None, p_at_floor=False, winner=None)
        return result
    sums = bootstrap_sums(np.column_stack([ea, eb, t]), n_boot=n_boot, seed=seed)
    ok = sums[:, 2] > 0
    d = (sums[ok, 0] - sums[ok, 1]) / sums[ok, 2]
    low, high = _percentiles(d, expanded_tail(level, n))
    def p_of(g: float) -> float:
        if g >= 0.5:
            return 1.0
        z = NormalDist().inv_cdf(1 - g) / math.sqrt(n / (n - 1))
        return min(1.0, 2 * (1 - t_cdf(z, n - 1)))

    p = p_of((min(np.count_nonzero(d <= 0), np.count_nonzero(d >= 0)) + 1) / (d.size + 1))
    # The smallest p-value these resamples can give (no resample on the far side of zero): a p-value
    # there only says "at most this"; more resamples would lower the floor.
    p_floor = p_of(1 / (d.size + 1))
    winner = None
    # On very few pages the bootstrap cannot spread beyond the observed pages (two pages that both
    # improved give an interval on one side of zero), while the p-value's t correction for n - 1
    # degrees of freedom still says "not shown": a winner needs both.
    if low is not None and high is not None and p < 1 - level:
        if high < 0:
            winner = names[0]
        elif low > 0:
            winner = names[1]
    result.update(value_a=float(va), value_b=float(vb), diff=float(va - vb), low=low, high=high,
                  p_value=float(p), p_floor=float(p_floor), p_at_floor=bool(p <= p_floor), winner=winner)
    return result


# --------------------------------------------------------------------------- sample size


def cochran_n0(p: float, e: float, level: float = 0.95) -> int:
    """Sample size for estimating a proportion ``p`` to within ±``e`` (simple random sampling).

    n0 = z² · p · (1 − p) / e², rounded to the nearest whole unit as in Cochran's
    worked example (p = 0.5, e = 0.05, 95 % → 384). Apply the finite-population
    correction n = n0 / (1 + n0 / N) separately when the population is small.
    """
    if not 0 <= p <= 1:
        raise ValueError(f"p must be a proportion in [0, 1], got {p}")
    if e <= 0:
        raise ValueError(f"the margin e must be positive, got {e}")
    z = z_value(level)
    return int(round(z * z * p * (1 - p) / (e * e)))


def sample_size_for_cer(pilot: Any, *, half_width: float, level: float = 0.95,
                        population: int | None = None, metric: str = "cer") -> dict:
    """Pages (and lines) of ground truth needed so the CER interval is at most ±``half_width``.

    ``pilot``: per-page scores of a pilot sample (a Scores object or its ``pages``
    DataFrame, with ``char_edits`` and ``ref_chars``; ``ref_lines`` if lines are
    wanted). ``half_width`` is a rate (0.005 = ±0.5 percentage points).
    ``population``: pages in the archive, for the finite-population correction.

    Method (ratio estimator, Cochran's *Sampling Techniques*, ratio estimation):
    R̂ = Σy/Σx; S_d² = Σ(y_i − R̂x_i)² / (m − 1) over the m pilot pages;
    V(R̂) ≈ (1 − n/N) S_d² / (n X̄²) with X̄ the mean reference characters per
    page. Setting z·√V = half_width gives n0 = z² S_d² / (half_width² X̄²) and,
    with N known, n = n0 / (1 + n0/N) (solved exactly from the same variance).
    Pages are rounded up. Lines = pages × mean reference lines per pilot page.
    """
    if half_width <= 0:
        raise ValueError(f"half_width must be positive, got {half_width}")
    if population is not None and population < 1:
        raise ValueError(f"population must be at least 1 page, got {population}")
    num, den = _METRIC_COLUMNS[metric]
    df = _pages_frame(pilot)
    y = df[num].to_numpy(np.float64)
    x = df[den].to_numpy(np.float64)
    m = len(df)
    if m < 2 or x.sum() <= 0:
        raise PlanError(f"a pilot of at least 2 pages with reference text is needed (got {m} pages, "
                        f"{int(x.sum())} reference units)")
    r = y.sum() / x.sum()
    d = y - r * x
    s2 = float((d * d).sum() / (m - 1))
    xbar = float(x.mean())
    z = z_value(level)
    n0 = z * z * s2 / (half_width * half_width * xbar * xbar)
    n = n0 / (1 + n0 / population) if population else n0
    pages = max(2, math.ceil(n - 1e-9))
    if population:
        pages = min(pages, int(population))
    notes = []
    if s2 == 0:
        notes.append("the pilot shows no spread between pages (e.g. no errors at all); "
                     "the variance is not estimable and the size is only a floor")
    if m < 20:
        notes.append(f"the pilot has only {m} pages; the variance estimate is rough")
    lines = None
    mean_lines = None
    if "ref_lines" in df.columns:
        mean_lines = float(df["ref_lines"].mean())
        lines = math.ceil(pages * mean_lines - 1e-9)
    return {
        "pages": int(pages), "lines": lines, "n0_pages": float(n0), "population": population,
        "half_width": half_width, "level": level, "z": z, "metric": metric,
        "pilot_pages": m, "pilot_rate": float(r), "residual_sd": math.sqrt(s2),
        "mean_ref_units_per_page": xbar, "mean_lines_per_page": mean_lines,
        "method": "ratio estimator variance (Cochran, Sampling Techniques, ratio estimation)"
                  + (" with finite-population correction" if population else ""),
        "notes": notes,
    }
