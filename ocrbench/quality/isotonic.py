"""Isotonic regression by pool-adjacent-violators (PAV), weighted, non-decreasing.

Why: the error rate of a line should not fall as its doubt rises, but nothing
says the relation is linear or smooth. Isotonic regression is the least-squares
fit among all non-decreasing step functions (R. E. Barlow, D. J. Bartholomew,
J. M. Bremner, H. D. Brunk, *Statistical Inference under Order Restrictions*,
1972, ch. 1); the pool-adjacent-violators algorithm computes it in one pass.
With weights w_i = characters of line i and y_i = edits / characters, each
pooled block's value is Σ edits / Σ characters: a ratio estimator per block.

Equal x values are pooled first (weighted mean), and predictions between the
fitted points are linear interpolations, clipped to the end values outside the
fitted range — the same conventions as scikit-learn's ``IsotonicRegression``
with ``out_of_bounds="clip"`` (the tests compare the two).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["pav", "IsotonicMap", "fit_isotonic", "blocks"]


def pav(y: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Non-decreasing least-squares fit of ``y`` (already in x order) with positive weights ``w``."""
    y = np.asarray(y, dtype=np.float64)
    w = np.asarray(w, dtype=np.float64)
    if y.shape != w.shape or y.ndim != 1:
        raise ValueError("y and w must be 1-D arrays of the same length")
    if np.any(w <= 0):
        raise ValueError("PAV weights must be positive")
    vals: list[float] = []
    wts: list[float] = []
    lens: list[int] = []
    for yi, wi in zip(y.tolist(), w.tolist()):
        v, ww, n = yi, wi, 1
        # Pool backwards while the previous block is above the new one (a violator).
        while vals and vals[-1] > v:
            pv, pw, pn = vals.pop(), wts.pop(), lens.pop()
            v = (pv * pw + v * ww) / (pw + ww)
            ww += pw
            n += pn
        vals.append(v)
        wts.append(ww)
        lens.append(n)
    return np.repeat(np.asarray(vals), np.asarray(lens, dtype=np.int64))


@dataclass(frozen=True)
class IsotonicMap:
    """A fitted non-decreasing map: ``x`` (sorted, unique) to ``y`` (fitted), linear in between.

    ``w``: the summed weight behind each ``x`` (after pooling ties).
    """

    x: np.ndarray
    y: np.ndarray
    w: np.ndarray

    def __call__(self, values: np.ndarray | float) -> np.ndarray:
        return np.interp(np.asarray(values, dtype=np.float64), self.x, self.y)

    @property
    def lo(self) -> float:
        return float(self.x[0])

    @property
    def hi(self) -> float:
        return float(self.x[-1])


def _pool_ties(x: np.ndarray, y: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Sort by x, merge equal x into one point (weighted mean of y, summed weight)."""
    order = np.argsort(x, kind="stable")
    x, y, w = x[order], y[order], w[order]
    ux, start = np.unique(x, return_index=True)
    sw = np.add.reduceat(w, start)
    sy = np.add.reduceat(w * y, start) / sw
    return ux, sy, sw


def fit_isotonic(x: np.ndarray, y: np.ndarray, w: np.ndarray | None = None) -> IsotonicMap:
    """Fit a non-decreasing map of ``y`` on ``x`` (points with weight 0 are ignored)."""
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    w = np.ones_like(x) if w is None else np.asarray(w, dtype=np.float64)
    if not (x.shape == y.shape == w.shape) or x.ndim != 1:
        raise ValueError("x, y and w must be 1-D arrays of the same length")
    keep = w > 0
    if not keep.any():
        raise ValueError("isotonic fit needs at least one point with positive weight")
    ux, uy, uw = _pool_ties(x[keep], y[keep], w[keep])
    return IsotonicMap(ux, pav(uy, uw), uw)


def blocks(fit: IsotonicMap) -> tuple[np.ndarray, np.ndarray]:
    """Start index of each pooled block (a run of equal fitted values) and the block's summed weight."""
    start = np.flatnonzero(np.r_[True, np.diff(fit.y) != 0])
    return start, np.add.reduceat(fit.w, start)
