"""Estimated CER without ground truth: line doubt calibrated on the keyed pages.

Map. On keyed lines (pages with ground truth whose line counts match), the
error rate of a line, y = edits / characters, is regressed on its doubt (the
review score of :mod:`ocrbench.postprocess.review`: low confidence, failed
page arithmetic, unlisted words) by weighted isotonic regression
(:mod:`ocrbench.quality.isotonic`, weights = characters). The map's expected
edits of a page are x = Σ rate(doubt) × characters over its lines (recognised
characters after the normalisation profile stand in for the unknown reference
characters).

Group factor. The same confidence does not mean the same error rate in every
collection (on ``bench_quality``'s pages the demo CTC recogniser errs ten times
less on clean pages than on degraded ones at equal confidence, and no map of
doubt alone could tell). So each group g has its own factor θ_g on the map,
with a gamma-Poisson model: measured edits of a keyed page ~ Poisson(θ_g·x),
θ_g ~ Gamma with mean R = Σy/Σx over all keyed pages and relative variance τ²,
the between-group spread, estimated by the method of moments from the groups
that hold keyed pages (:func:`level_and_spread`; with fewer than
:data:`MIN_GROUPS` of them, at least :data:`DEFAULT_SPREAD`). A group's factor
is the posterior, Gamma(1/τ² + Y_g, 1/(τ²R) + X_g) with Y_g, X_g its keyed
pages' measured and expected edits (the empirical-Bayes shrinkage of area
rates of D. Clayton and J. Kaldor, Biometrics 43, 1987): a group with many
keyed pages follows its own pages, a group with none gets R with the whole
between-group spread. Its estimated CER is (measured edits of its keyed pages +
θ_g × expected edits of the others) / (their reference + recognised characters).

Interval. Each of ``n_boot`` rounds resamples the keyed pages with replacement
and refits the map (the calibration's own uncertainty), redraws every pooled
block's rate from Gamma(E + ½) / C for its E edits over C characters
(Jeffreys' prior for a Poisson mean: a keyed sample of a good recogniser holds
few errors, and resampling pages cannot show the uncertainty of a count of
zero) and pools the redrawn rates again so the map stays non-decreasing,
recomputes R and τ², draws θ_g from its posterior, resamples the group's pages
(its page-to-page spread) and draws the unkeyed pages' edits as Poisson around
their expectation. The interval is the expanded percentile interval of
:mod:`ocrbench.accuracy.stats` with n = the smaller of the two page counts. A
page's interval has the calibration and factor parts only: it is the interval
of the *expected* CER of a page with those doubts. The measured CER of the keyed
sample gets the wider of its page-bootstrap interval and the Wilson interval
of edits over characters (few errors again).

Calibrated range: the map is fitted between the smallest and the largest
calibration doubt and held flat beyond them. ``beyond_range`` is the share of a
group's characters on lines outside that range; above :data:`RANGE_TOLERANCE`
the estimate is marked as extrapolated.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ocrbench.accuracy.stats import bootstrap_ratio_ci, expanded_tail, resample_counts
from ocrbench.accuracy.stats import wilson_interval
from ocrbench.ledger.balance import BALANCED, UNBALANCED
from ocrbench.quality.data import System
from ocrbench.quality.isotonic import IsotonicMap, blocks, fit_isotonic, pav

__all__ = ["RANGE_TOLERANCE", "DEFAULT_SPREAD", "MIN_GROUPS", "Calibration", "calibrate", "estimate_groups",
           "estimate_pages", "balance_rate", "level_and_spread", "redraw"]

#: Share of a group's characters that may lie outside the calibrated doubt range before
#: its estimate is called extrapolated (a judgement call: 5 %).
RANGE_TOLERANCE = 0.05

#: Relative between-group variance τ² of the calibration factor assumed when it cannot be measured well
#: (fewer than MIN_GROUPS groups with keyed pages). Taken from bench_quality's six collections, where a
#: map fitted on every page missed each collection's CER by factors 0.09-1.5 (relative variance 0.65;
#: 0.72 without the deliberately worse one): at equal confidence the demo CTC recogniser errs ten times
#: less on clean pages than on degraded ones. So that benchmark is not independent of this constant;
#: with 0.25, 0.5 and 1.0 it covered the same collections (DEVELOPERS.md).
DEFAULT_SPREAD = 0.7

#: Groups with keyed pages needed before the measured between-group spread is trusted on its own.
MIN_GROUPS = 5


@dataclass
class Calibration:
    """The doubt-to-error map fitted on keyed lines, with what the keyed sample showed."""

    doubt: np.ndarray          # keyed lines
    rate: np.ndarray           # edits / max(characters, 1)
    weight: np.ndarray         # max(characters, 1)
    page: np.ndarray           # index of the line's page among the keyed pages
    page_keys: list[tuple[int, str]]   # the keyed pages (run_id, page_id)
    page_index: np.ndarray     # their rows in the system's page table
    fit: IsotonicMap
    cer: float | None          # measured on the keyed pages (all of them)
    cer_low: float | None
    cer_high: float | None
    balance: tuple[float | None, float | None, float | None, int]   # rate, low, high, checkable pages
    confidence: np.ndarray     # keyed lines' confidences (for the drift test)
    conf_page: np.ndarray
    level: float

    @property
    def n_pages(self) -> int:
        return len(self.page_keys)

    def to_dict(self) -> dict[str, Any]:
        r, lo, hi, n = self.balance
        return {"pages": self.n_pages, "lines": int(self.doubt.size), "edits": int(round(float(
            (self.rate * self.weight).sum()))), "cer": self.cer, "cer_low": self.cer_low, "cer_high": self.cer_high,
            "doubt_range": [self.fit.lo, self.fit.hi], "balance_rate": r, "balance_low": lo, "balance_high": hi,
            "checkable_pages": n, "map": {"doubt": self.fit.x.tolist(), "cer": self.fit.y.tolist()},
            "method": "weighted isotonic regression (pool-adjacent-violators) of line edits/characters on doubt"}


def balance_rate(status: pd.Series, level: float = 0.95) -> tuple[float | None, float | None, float | None, int]:
    """Share of checkable pages that balance, with its Wilson interval, and the checkable pages."""
    ok = int((status == BALANCED).sum())
    n = ok + int((status == UNBALANCED).sum())
    if n == 0:
        return None, None, None, 0
    lo, hi = wilson_interval(ok, n, level=level)  # type: ignore[misc]
    return ok / n, float(lo), float(hi), n


def calibrate(system: System, *, level: float = 0.95, n_boot: int = 2000, seed: int = 0) -> Calibration | None:
    """Fit the map on the system's keyed lines; None when no keyed line can be used."""
    ln = system.lines[system.lines["edits"] >= 0]
    if ln.empty:
        return None
    keys = list(zip(system.pages["run_id"], system.pages["page_id"]))
    used = np.flatnonzero(system.pages["keyed"].to_numpy()).tolist()     # every keyed page, resampled as a unit
    pos = {p: i for i, p in enumerate(used)}
    w = np.maximum(ln["chars"].to_numpy(np.float64), 1.0)
    doubt = ln["doubt"].to_numpy(np.float64)
    rate = ln["edits"].to_numpy(np.float64) / w
    keyed = system.pages[system.pages["keyed"]]
    lo_hi = bootstrap_ratio_ci(keyed["edits"].to_numpy(), keyed["ref_chars"].to_numpy(), n_boot=n_boot,
                               level=level, seed=seed) if len(keyed) else (None, None)
    ref = float(keyed["ref_chars"].sum())
    if ref > 0:    # few or no errors: the page bootstrap alone would give a zero-width interval
        wl = wilson_interval(int(min(keyed["edits"].sum(), ref)), int(ref), level=level)
        if wl is not None:
            lo_hi = (min(wl[0], lo_hi[0]) if lo_hi[0] is not None else wl[0],
                     max(wl[1], lo_hi[1]) if lo_hi[1] is not None else wl[1])
    conf = ln["confidence"].to_numpy(np.float64)
    ok = ~np.isnan(conf)
    page = np.array([pos[p] for p in ln["page"]], dtype=np.int64)
    return Calibration(doubt, rate, w, page, [keys[p] for p in used], np.asarray(used, dtype=np.int64),
                       fit_isotonic(doubt, rate, w),
                       float(keyed["edits"].sum()) / ref if ref > 0 else None, lo_hi[0], lo_hi[1],
                       balance_rate(keyed["balance"], level), conf[ok], page[ok], level)


def redraw(fit: IsotonicMap, rng: np.random.Generator) -> IsotonicMap:
    """The map with each pooled block's rate redrawn from Gamma(E + 1/2) / C, pooled again (see the notes)."""
    start, c = blocks(fit)
    e = fit.y[start] * c
    r = rng.gamma(e + 0.5) / c
    r = pav(r, c)
    return IsotonicMap(fit.x, np.repeat(r, np.diff(np.r_[start, fit.x.size])), fit.w)


def _boot_page_edits(system: System, cal: Calibration, n_boot: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """(n_boot, pages) expected edits of every page by the map alone, one refitted, redrawn map per row,
    and (n_boot, keyed pages) how often each keyed page was drawn in that row's resample."""
    ln = system.lines
    d = ln["doubt"].to_numpy(np.float64)
    ch = ln["chars"].to_numpy(np.float64)
    pg = ln["page"].to_numpy(np.int64)
    n_pages = len(system.pages)
    out = np.empty((n_boot, n_pages), dtype=np.float32)
    drawn = np.empty((n_boot, cal.n_pages), dtype=np.float32)
    row = 0
    rng = np.random.default_rng([seed, 1])
    for block in resample_counts(cal.n_pages, n_boot, seed):
        for counts in block:
            m = redraw(fit_isotonic(cal.doubt, cal.rate, cal.weight * counts[cal.page]), rng)
            out[row] = np.bincount(pg, weights=m(d) * ch, minlength=n_pages)
            drawn[row] = counts
            row += 1
    return out, drawn


def _point_page_edits(system: System, cal: Calibration) -> np.ndarray:
    ln = system.lines
    return np.bincount(ln["page"].to_numpy(np.int64), weights=cal.fit(ln["doubt"].to_numpy(np.float64))
                       * ln["chars"].to_numpy(np.float64), minlength=len(system.pages))


def level_and_spread(y: np.ndarray, x: np.ndarray) -> tuple[float | None, float]:
    """R = Σy/Σx and the relative between-group variance τ² of the calibration factor, from per-group
    measured edits ``y`` and map-expected edits ``x`` of keyed pages (method of moments for a gamma-Poisson
    model: E(y − Rx)² = Rx + τ²R²x²). R is None when no keyed edit was measured; τ² is at least
    :data:`DEFAULT_SPREAD` with fewer than :data:`MIN_GROUPS` groups."""
    keep = x > 0
    y, x = y[keep], x[keep]
    if x.sum() <= 0 or y.sum() <= 0:
        return None, DEFAULT_SPREAD
    r = float(y.sum() / x.sum())
    if x.size < 2:
        return r, DEFAULT_SPREAD
    tau2 = max(0.0, float(((y - r * x) ** 2 - r * x).sum()) / (r * r * float((x * x).sum())))
    # A variance from a handful of groups is poorly determined (and often 0 by chance): below MIN_GROUPS
    # groups with keyed pages, never assume less spread than DEFAULT_SPREAD.
    return r, tau2 if x.size >= MIN_GROUPS else max(tau2, DEFAULT_SPREAD)


def _factors(y_g: np.ndarray, x_g: np.ndarray, rng: np.random.Generator | None) -> np.ndarray:
    """Each group's calibration factor: the posterior mean (``rng`` None) or one posterior draw."""
    r, tau2 = level_and_spread(y_g, x_g)
    if r is None:                # nothing measured to set a level: keep the map's own (its redraws carry the doubt)
        return np.ones_like(x_g)
    alpha = 1.0 / tau2 if tau2 > 0 else 1e9
    shape, rate = alpha + y_g, alpha / r + x_g
    return shape / rate if rng is None else rng.gamma(shape) / rate


def _beyond(system: System, cal: Calibration) -> np.ndarray:
    """Characters per page on unkeyed lines whose doubt lies outside the calibrated range."""
    ln = system.lines
    d = ln["doubt"].to_numpy(np.float64)
    out = ((d < cal.fit.lo) | (d > cal.fit.hi)) & (ln["edits"].to_numpy() < 0)
    return np.bincount(ln["page"].to_numpy(np.int64), weights=ln["chars"].to_numpy(np.float64) * out,
                       minlength=len(system.pages))


def _quantiles(values: np.ndarray, tail: float, point: float | None) -> tuple[float | None, float | None]:
    v = values[np.isfinite(values)]
    if v.size == 0 or point is None:
        return None, None
    lo, hi = np.quantile(v, [tail, 1 - tail])
    return float(min(lo, point)), float(max(hi, point))


def _group_codes(system: System) -> tuple[np.ndarray, list[str]]:
    codes, names = pd.factorize(system.pages["group"], sort=True)
    return codes.astype(np.int64), [str(n) for n in names]


def _keyed_totals(system: System, cal: Calibration, x: np.ndarray, codes: np.ndarray, n_groups: int,
                  drawn: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Measured and map-expected edits of the keyed pages per group (each keyed page ``drawn`` times)."""
    k = cal.page_index
    w = np.ones(k.size) if drawn is None else np.asarray(drawn, dtype=np.float64)
    y = np.bincount(codes[k], weights=w * system.pages["edits"].to_numpy(np.float64)[k], minlength=n_groups)
    return y, np.bincount(codes[k], weights=w * x[k], minlength=n_groups)


def estimate_pages(system: System, cal: Calibration, *, n_boot: int = 400, seed: int = 0) -> pd.DataFrame:
    """Per page: est_cer (map × the group's factor) with its interval, beyond_range share, measured CER if keyed."""
    p = system.pages[["run_id", "page_id", "group", "chars", "keyed"]].copy()
    ch = p["chars"].to_numpy(np.float64)
    codes, names = _group_codes(system)
    x0 = _point_page_edits(system, cal)
    theta0 = _factors(*_keyed_totals(system, cal, x0, codes, len(names)), None)
    xb, drawn = _boot_page_edits(system, cal, n_boot, seed)
    rng = np.random.default_rng([seed, 2])
    boot = np.empty_like(xb)
    for b in range(n_boot):
        boot[b] = xb[b] * _factors(*_keyed_totals(system, cal, xb[b].astype(np.float64), codes, len(names),
                                                  drawn[b]), rng)[codes]
    with np.errstate(invalid="ignore", divide="ignore"):
        den = np.where(ch > 0, ch, np.nan)
        point = x0 * theta0[codes] / den
        boot = boot / den
        p["beyond_range"] = np.where(ch > 0, _beyond(system, cal) / ch, 0.0)
    tail = expanded_tail(cal.level, cal.n_pages) if cal.n_pages >= 2 else None
    p["est_cer"] = point
    ci = [_quantiles(boot[:, i], tail, None if np.isnan(point[i]) else float(point[i])) if tail else (None, None)
          for i in range(len(p))]
    p["est_low"] = [c[0] for c in ci]
    p["est_high"] = [c[1] for c in ci]
    ref = system.pages["ref_chars"].to_numpy(np.float64)
    p["measured_cer"] = np.where(p["keyed"] & (ref > 0), system.pages["edits"] / np.where(ref > 0, ref, 1), np.nan)
    return p


def estimate_groups(system: System, cal: Calibration, *, n_boot: int = 400, seed: int = 0) -> dict[str, dict]:
    """Per group: est_cer, est_low, est_high, factor, beyond_range, extrapolated (keyed pages count as measured)."""
    pages = system.pages
    done = (pages["status"] == "done").to_numpy()
    keyed = pages["keyed"].to_numpy()
    y = pages["edits"].to_numpy(np.float64)
    chars = pages["chars"].to_numpy(np.float64)
    den = np.where(keyed, pages["ref_chars"].to_numpy(np.float64), chars)
    codes, names = _group_codes(system)
    x0 = _point_page_edits(system, cal)
    theta0 = _factors(*_keyed_totals(system, cal, x0, codes, len(names)), None)
    xb, drawn = _boot_page_edits(system, cal, n_boot, seed)
    rng = np.random.default_rng([seed, 3])
    theta_b = np.vstack([_factors(*_keyed_totals(system, cal, xb[b].astype(np.float64), codes, len(names),
                                                 drawn[b]), rng) for b in range(n_boot)])
    beyond = _beyond(system, cal)
    out = {}
    for k, g in enumerate(names):
        idx = np.flatnonzero((codes == k) & done)
        total = den[idx].sum()
        if idx.size == 0 or total <= 0:
            out[g] = {"est_cer": None, "est_low": None, "est_high": None, "factor": None, "beyond_range": None,
                      "extrapolated": False}
            continue
        kd, un = idx[keyed[idx]], idx[~keyed[idx]]
        point = float((y[kd].sum() + theta0[k] * x0[un].sum()) / total)
        lo = hi = None
        n = min(cal.n_pages, idx.size) if idx.size >= 2 else cal.n_pages
        if n >= 2:
            counts = np.vstack(list(resample_counts(idx.size, n_boot, seed + 1 + k)))
            is_key = keyed[idx]
            expected = theta_b[:, k] * (counts[:, ~is_key] * xb[:, un]).sum(1)
            num = (counts[:, is_key] * y[kd]).sum(1) + rng.poisson(np.maximum(expected, 0.0))
            with np.errstate(divide="ignore", invalid="ignore"):   # a resample of pages without text: dropped
                rates = num / (counts * den[idx]).sum(1)
            lo, hi = _quantiles(rates, expanded_tail(cal.level, n), point)
        share = float(beyond[idx].sum() / chars[idx].sum()) if chars[idx].sum() > 0 else 0.0
        out[g] = {"est_cer": point, "est_low": lo, "est_high": hi, "factor": float(theta0[k]), "beyond_range": share,
                  "extrapolated": share > RANGE_TOLERANCE}
    return out
