"""Estimated CER without ground truth: line doubt calibrated on the keyed pages.

Method. On keyed lines (pages with ground truth whose line counts match), the
error rate of a line, y = edits / characters, is regressed on its doubt (the
review score of :mod:`ocrbench.postprocess.review`: low confidence, failed
page arithmetic, unlisted words) by weighted isotonic regression
(:mod:`ocrbench.quality.isotonic`, weights = characters). The expected edits of
any line are then rate(doubt) × characters, and a page's or a group's
estimated CER is Σ expected edits / Σ characters (recognised characters after
the normalisation profile stand in for the unknown reference characters).
Keyed pages inside a group count with their measured edits instead.

Interval. Two bootstraps in one: each of ``n_boot`` rounds refits the map on
the calibration pages resampled with replacement (the calibration's own
uncertainty) and resamples the group's pages (its page-to-page spread); the
interval is the expanded percentile interval of :mod:`ocrbench.accuracy.stats`
with n = the smaller of the two page counts. A good recogniser makes few
errors, and a keyed sample of a few pages may hold none in a doubt band (or at
all): resampling pages cannot show the uncertainty of a count of zero. So each
round also redraws every pooled block's rate from the Jeffreys posterior of a
Poisson count, Gamma(E + ½) / C for E edits over C characters (Jeffreys'
prior for a Poisson mean; common practice for rare-event rates), and pools the
redrawn rates again so the map stays non-decreasing. The measured CER of the
keyed sample gets the wider of its page-bootstrap interval and the Wilson
interval of edits over characters, for the same reason. A page's interval has only the
calibration part: it is the interval of the *expected* CER of a page with those
doubts, not of that page's actual edits.

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
from ocrbench.ledger.balance import BALANCED, UNBALANCED, wilson_interval
from ocrbench.quality.data import System
from ocrbench.quality.isotonic import IsotonicMap, blocks, fit_isotonic, pav

__all__ = ["RANGE_TOLERANCE", "Calibration", "calibrate", "estimate_groups", "estimate_pages", "balance_rate"]

#: Share of a group's characters that may lie outside the calibrated doubt range before
#: its estimate is called extrapolated (a judgement call: 5 %).
RANGE_TOLERANCE = 0.05


@dataclass
class Calibration:
    """The doubt-to-error map fitted on keyed lines, with what the keyed sample showed."""

    doubt: np.ndarray          # keyed lines
    rate: np.ndarray           # edits / max(characters, 1)
    weight: np.ndarray         # max(characters, 1)
    page: np.ndarray           # index of the line's page among the calibration pages
    page_keys: list[tuple[int, str]]
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
    used = sorted(set(ln["page"].tolist()))
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
    return Calibration(doubt, rate, w, page, [keys[p] for p in used], fit_isotonic(doubt, rate, w),
                       float(keyed["edits"].sum()) / ref if ref > 0 else None, lo_hi[0], lo_hi[1],
                       balance_rate(keyed["balance"], level), conf[ok], page[ok], level)


def redraw(fit: IsotonicMap, rng: np.random.Generator) -> IsotonicMap:
    """The map with each pooled block's rate redrawn from Gamma(E + 1/2) / C, pooled again (see the notes)."""
    start, c = blocks(fit)
    e = fit.y[start] * c
    r = rng.gamma(e + 0.5) / c
    r = pav(r, c)
    return IsotonicMap(fit.x, np.repeat(r, np.diff(np.r_[start, fit.x.size])), fit.w)


def _boot_page_edits(system: System, cal: Calibration, n_boot: int, seed: int) -> np.ndarray:
    """(n_boot, pages) expected edits of every page, one refitted map per row (keyed pages: measured)."""
    ln = system.lines
    d = ln["doubt"].to_numpy(np.float64)
    ch = ln["chars"].to_numpy(np.float64)
    pg = ln["page"].to_numpy(np.int64)
    n_pages = len(system.pages)
    out = np.empty((n_boot, n_pages), dtype=np.float32)
    row = 0
    rng = np.random.default_rng([seed, 1])
    for block in resample_counts(cal.n_pages, n_boot, seed):
        for counts in block:
            m = redraw(fit_isotonic(cal.doubt, cal.rate, cal.weight * counts[cal.page]), rng)
            out[row] = np.bincount(pg, weights=m(d) * ch, minlength=n_pages)
            row += 1
    keyed = system.pages["keyed"].to_numpy()
    out[:, keyed] = system.pages["edits"].to_numpy(np.float64)[keyed]
    return out


def _point_page_edits(system: System, cal: Calibration) -> np.ndarray:
    ln = system.lines
    e = np.bincount(ln["page"].to_numpy(np.int64), weights=cal.fit(ln["doubt"].to_numpy(np.float64))
                    * ln["chars"].to_numpy(np.float64), minlength=len(system.pages))
    return e


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


def estimate_pages(system: System, cal: Calibration, *, n_boot: int = 400, seed: int = 0) -> pd.DataFrame:
    """Per page: est_cer with its calibration interval, chars, beyond_range share, keyed and measured CER."""
    p = system.pages[["run_id", "page_id", "group", "chars", "keyed"]].copy()
    ch = p["chars"].to_numpy(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        point = np.where(ch > 0, _point_page_edits(system, cal) / ch, np.nan)
        boot = _boot_page_edits(system, cal, n_boot, seed) / np.where(ch > 0, ch, np.nan)
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
    """Per group: est_cer, est_low, est_high, beyond_range, extrapolated (keyed pages count as measured)."""
    pages = system.pages
    done = (pages["status"] == "done").to_numpy()
    keyed = pages["keyed"].to_numpy()
    den = np.where(keyed, pages["ref_chars"].to_numpy(np.float64), pages["chars"].to_numpy(np.float64))
    point_e = _point_page_edits(system, cal)
    point_e[keyed] = pages["edits"].to_numpy(np.float64)[keyed]
    boot = _boot_page_edits(system, cal, n_boot, seed)
    beyond = _beyond(system, cal)
    out = {}
    for k, (g, idx) in enumerate(pages.groupby("group", sort=True).indices.items()):
        idx = idx[done[idx]]
        total = den[idx].sum()
        if idx.size == 0 or total <= 0:
            out[g] = {"est_cer": None, "est_low": None, "est_high": None, "beyond_range": None, "extrapolated": False}
            continue
        point = float(point_e[idx].sum() / total)
        lo = hi = None
        n = min(cal.n_pages, idx.size) if idx.size >= 2 else cal.n_pages
        if n >= 2:
            counts = np.vstack(list(resample_counts(idx.size, n_boot, seed + 1 + k)))
            ratio = (counts * boot[:, idx]).sum(1) / (counts * den[idx]).sum(1)
            lo, hi = _quantiles(ratio, expanded_tail(cal.level, n), point)
        share = float(beyond[idx].sum() / pages["chars"].to_numpy(np.float64)[idx].sum()) \
            if pages["chars"].to_numpy()[idx].sum() > 0 else 0.0
        out[g] = {"est_cer": point, "est_low": lo, "est_high": hi, "beyond_range": share,
                  "extrapolated": share > RANGE_TOLERANCE}
    return out
