"""Numerical pieces of the planner: non-negative least squares, Amdahl's law and its fit to measured
throughput, durations and ranges as people write them.

Pure numpy/pandas; no files.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd

from ocrbench.errors import PlanError

# --------------------------------------------------------------------------- NNLS


def nnls(A: np.ndarray, b: np.ndarray, *, max_iter: int | None = None) -> tuple[np.ndarray, float]:
    """Non-negative least squares: ``argmin ||A x - b||`` subject to ``x >= 0``.

    The active-set algorithm of Lawson & Hanson (1974, *Solving Least Squares
    Problems*, ch. 23, algorithm NNLS). Columns are scaled to unit norm before
    solving so features of very different magnitudes (1 per batch vs pixels x
    steps) are treated evenly; the solution is returned in the original units.
    Returns ``(x, residual_norm)``. Implemented here so the runtime needs no
    scipy; the tests compare it with ``scipy.optimize.nnls``.
    """
    A = np.asarray(A, dtype=float)
    b = np.asarray(b, dtype=float)
    if A.ndim != 2 or b.ndim != 1 or A.shape[0] != b.shape[0]:
        raise ValueError(f"nnls: shapes {A.shape} and {b.shape} do not match")
    m, n = A.shape
    norms = np.linalg.norm(A, axis=0)
    live = norms > 0
    scale = np.where(live, norms, 1.0)
    As = A / scale
    x = np.zeros(n)
    P = np.zeros(n, dtype=bool)
    max_iter = max_iter or 3 * n + 30
    tol = 10 * np.finfo(float).eps * max(m, n) * max(1.0, float(np.abs(As).sum(axis=0).max(initial=0.0)))
    w = As.T @ (b - As @ x)
    it = 0
    while True:
        cand = (~P) & live
        if not cand.any() or float(w[cand].max()) <= tol:
            break
        j = int(np.argmax(np.where(cand, w, -np.inf)))
        P[j] = True
        while True:
            it += 1
            if it > max_iter:
                raise PlanError("nnls did not converge (the timing table may be degenerate)")
            z = np.zeros(n)
            z[P] = np.linalg.lstsq(As[:, P], b, rcond=None)[0]
            if (z[P] > tol).all():
                break
            bad = P & (z <= tol)
            alpha = float(np.min(x[bad] / np.maximum(x[bad] - z[bad], 1e-300)))
            x = x + alpha * (z - x)
            P &= x > tol
            x[~P] = 0.0
        x = z
        w = As.T @ (b - As @ x)
    sol = x / scale
    return sol, float(np.linalg.norm(A @ sol - b))


# --------------------------------------------------------------------------- Amdahl


def amdahl_speedup(serial_fraction: float, workers: float | np.ndarray) -> float | np.ndarray:
    """Speed-up on ``workers`` of a job whose ``serial_fraction`` cannot be spread (G. Amdahl 1967)."""
    s = float(serial_fraction)
    return 1.0 / (s + (1.0 - s) / np.asarray(workers, dtype=float))


def amdahl_max_speedup(serial_fraction: float) -> float:
    """The limit of :func:`amdahl_speedup` for infinitely many workers: ``1 / s``."""
    return math.inf if serial_fraction <= 0 else 1.0 / serial_fraction


def fit_serial_fraction(workers: Sequence[float], speedups: Sequence[float]) -> float:
    """Least-squares serial fraction from measured speed-ups.

    Amdahl's law written as ``1/S - 1/n = s (1 - 1/n)`` is linear in ``s``
    through the origin; points at n = 1 carry no information and drop out.
    The result is clipped to [0, 1].
    """
    n = np.asarray(workers, dtype=float)
    S = np.asarray(speedups, dtype=float)
    u = 1.0 - 1.0 / n
    v = 1.0 / S - 1.0 / n
    den = float((u * u).sum())
    if den <= 0:
        raise PlanError("a serial fraction needs throughput measured at 2 or more workers")
    return float(np.clip((u * v).sum() / den, 0.0, 1.0))


@dataclass
class ScalingFit:
    """Throughput at 1..k workers of one recogniser on one machine, and its Amdahl fit.

    ``table`` has columns ``workers``, ``threads``, ``pages_per_second`` (one row
    per measured point; several rows at one point are averaged).
    """

    table: pd.DataFrame
    recogniser: str | None = None

    def __post_init__(self) -> None:
        need = {"workers", "threads", "pages_per_second"}
        if not need <= set(self.table.columns):
            raise PlanError(f"a scaling table needs columns {sorted(need)}, got {sorted(self.table.columns)}")
        self.table = (self.table.groupby(["threads", "workers"], as_index=False)["pages_per_second"].mean()
                      .sort_values(["threads", "workers"]).reset_index(drop=True))

    def threads_measured(self) -> list[int]:
        return sorted(int(t) for t in self.table["threads"].unique())

    def _rows(self, threads: int) -> pd.DataFrame:
        return self.table[self.table["threads"] == threads]

    def serial_fraction(self, threads: int) -> float | None:
        r = self._rows(threads)
        base = r[r["workers"] == 1]
        if base.empty or (r["workers"] > 1).sum() == 0:
            return None
        x1 = float(base["pages_per_second"].iloc[0])
        return fit_serial_fraction(r["workers"].to_numpy(), r["pages_per_second"].to_numpy() / x1)

    def max_workers_measured(self, threads: int) -> int:
        r = self._rows(threads)
        return int(r["workers"].max()) if not r.empty else 0

    def speedup(self, workers: int, threads: int) -> tuple[float, str | None]:
        """Speed-up over one worker at ``threads``: measured where measured, else Amdahl.

        Returns ``(speedup, note)``; the note says when the value is extrapolated.
        """
        if workers == 1:
            return 1.0, None
        r = self._rows(threads)
        base = r[r["workers"] == 1]
        if base.empty:
            raise PlanError(f"no throughput measured at 1 worker x {threads} thread(s); "
                            "measure scaling with these threads")
        x1 = float(base["pages_per_second"].iloc[0])
        hit = r[r["workers"] == workers]
        if not hit.empty:
            return float(hit["pages_per_second"].iloc[0]) / x1, None
        s = self.serial_fraction(threads)
        if s is None:
            raise PlanError(f"{workers} workers need throughput measured at 2 or more workers "
                            f"({threads} thread(s) each); only 1 was measured")
        kmax = self.max_workers_measured(threads)
        note = None
        if workers > kmax:
            note = (f"{workers} workers lie beyond the {kmax} measured: speed-up from Amdahl's law "
                    f"with serial fraction {s:.3f} (limit {amdahl_max_speedup(s):.1f}x)")
        return float(amdahl_speedup(s, workers)), note

    def measured_slower(self, workers: int, threads: int) -> int | None:
        """A smaller worker count measured faster than ``workers`` (the fastest such), else None.

        ``workers`` itself may be measured or extrapolated; the comparison is with measured counts only.
        """
        r = self._rows(threads)
        fewer = r[r["workers"] < workers]
        if workers <= 1 or fewer.empty or r[r["workers"] == 1].empty:
            return None
        try:
            mine, _ = self.speedup(workers, threads)
        except PlanError:
            return None
        x1 = float(r.loc[r["workers"] == 1, "pages_per_second"].iloc[0])
        best = fewer.loc[fewer["pages_per_second"].idxmax()]
        return int(best["workers"]) if float(best["pages_per_second"]) / x1 > mine * (1 + 1e-9) else None

    def thread_factor(self, threads: int, calibrated_threads: int) -> float:
        """Throughput of one worker at ``threads`` relative to one at ``calibrated_threads``."""
        if threads == calibrated_threads:
            return 1.0
        a = self._rows(threads)
        b = self._rows(calibrated_threads)
        a, b = a[a["workers"] == 1], b[b["workers"] == 1]
        if a.empty or b.empty:
            raise PlanError(f"{threads} thread(s) per worker were not measured against the calibration's "
                            f"{calibrated_threads}: measure scaling at both, or plan with "
                            f"--threads {calibrated_threads}")
        return float(a["pages_per_second"].iloc[0]) / float(b["pages_per_second"].iloc[0])


# --------------------------------------------------------------------------- durations


_DURATION_UNITS = {"s": 1.0, "m": 60.0, "h": 3600.0, "d": 86400.0, "w": 7 * 86400.0}


def parse_duration(text: str | float | int) -> float:
    """Seconds in a duration such as ``6w``, ``42d``, ``1000h``, ``90m``, ``3600s``, ``1.5d``."""
    if isinstance(text, (int, float)):
        raise PlanError(f"duration {text!r} needs a unit: s, m, h, d or w (e.g. 42d)")
    m = re.fullmatch(r"\s*([0-9]*\.?[0-9]+)\s*([smhdw])\s*", str(text).lower())
    if not m:
        raise PlanError(f"cannot read duration {text!r}: write a number and a unit s, m, h, d or w (e.g. 6w, 42d, 1000h)")
    value = float(m.group(1)) * _DURATION_UNITS[m.group(2)]
    if value <= 0:
        raise PlanError(f"duration {text!r} must be positive")
    return value


def format_duration(seconds: float) -> str:
    """A duration in the largest sensible unit (``3.2 d``, ``5.1 h``, ``42 s``)."""
    if not np.isfinite(seconds):
        return "n/a"
    for unit, size in (("w", 7 * 86400.0), ("d", 86400.0), ("h", 3600.0), ("min", 60.0)):
        if seconds >= 2 * size:
            return f"{seconds / size:.1f} {unit}"
    return f"{seconds:.0f} s" if seconds >= 10 else f"{seconds:.2f} s"


def parse_range(text: str | int | float | Sequence[int]) -> tuple[int, int]:
    """``"16-30"`` or ``24`` or ``[16, 30]`` -> an inclusive integer range."""
    if isinstance(text, (list, tuple)):
        if len(text) != 2:
            raise PlanError(f"range {text!r} needs two numbers")
        a, b = int(text[0]), int(text[1])
    elif isinstance(text, (int, float)):
        a = b = int(text)
    else:
        m = re.fullmatch(r"\s*(\d+)\s*(?:-\s*(\d+))?\s*", str(text))
        if not m:
            raise PlanError(f"cannot read range {text!r}: write N or A-B (e.g. 16-30)")
        a = int(m.group(1))
        b = int(m.group(2)) if m.group(2) else a
    if a < 1 or b < a:
        raise PlanError(f"range {text!r} must be positive and ascending")
    return a, b
