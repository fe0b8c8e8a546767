"""Archive planner: a cost model fitted on measured timings, projected onto a whole archive.

What it answers: for each recogniser measured in a calibration store, how long a
whole archive would take (P10/P50/P90 wall-clock), how many core-hours and how
much money, how many character errors people would have to correct and for how
long, whether that meets the deadline and the budget, and which option is the
cheapest that does (or the smallest change that would make one do).

Why it is built this way:

* **Measured, not assumed.** Every cost term is a coefficient fitted by
  non-negative least squares (Lawson & Hanson 1974, *Solving Least Squares
  Problems*, ch. 23) on the store's ``batches`` and ``pages`` tables. For each
  stage several plausible shapes are tried (e.g. whether a batch keeps decoding
  every line until its longest one ends, or lets finished lines go) and the one
  that predicts held-out pages best (cross-validation by page) is kept.
* **Lines -> widths -> batches.** The runner groups lines of similar width into
  batches (``preprocess.width_batches``), so a batch's cost is not a sum of line
  costs. The planner makes the archive's pages line by line, batches them as the
  runner would and prices the batches.
* **Intervals, always.** Wall-clock comes from a Monte Carlo over (a) bootstrap
  refits of the cost model (pages resampled), (b) the archive's page
  distribution and (c) the fit residuals.
* **No free scaling.** Several workers on one machine are only planned with a
  measured throughput table (``ocrbench.run.measure``); between measured points and
  beyond them Amdahl's law (G. Amdahl 1967) with a fitted serial fraction is
  used, and a warning says so.

Pure: numpy and pandas only; no onnxruntime, no files, no CLI. The I/O around it
(reading a store, segmenting a sample folder, scoring ground truth) lives in
``ocrbench.planning.inputs``.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass, field, replace
from typing import Iterable, Mapping, Sequence

import numpy as np
import pandas as pd

from ocrbench.errors import PlanError
from ocrbench.recognisers.preprocess import width_batches

# --------------------------------------------------------------------------- constants

#: Default seconds a person needs per character error (see :class:`Correction`).
DEFAULT_SECONDS_PER_ERROR = 10.0

#: Default half-width of the CER interval wanted from a ground-truth sample.
DEFAULT_CER_MARGIN = 0.005

#: The runner's defaults, used when a run's settings do not record them.
DEFAULT_BATCH_SIZE = 16
DEFAULT_MAX_PAD_RATIO = 1.3
DEFAULT_WIDTH_MULTIPLE = 4
DEFAULT_LINE_HEIGHT = 32
DEFAULT_MIN_WIDTH = 16
DEFAULT_MAX_WIDTH = 4096
DEFAULT_MAX_TOKENS = 200

#: Stage columns of the ``batches`` table that together make a batch's model time.
BATCH_STAGES = ("t_preprocess", "t_encode", "t_steps", "t_collapse")

#: Feature columns of a batch (what a batch's stage times may depend on).
BATCH_FEATURES = (
    "const",                  # 1 per batch: session call overhead
    "n_lines",                # lines in the batch
    "sum_width",              # sum of the lines' resized widths (pixels actually filled)
    "area",                   # n_lines * padded_width: pixels the model runs over
    "steps_max",              # decoder steps of the longest line, end token included (loop iterations)
    "tokens_sum",             # emitted tokens summed over lines (lines leave the batch when they end)
    "tokens_sq_half",         # sum of tokens^2 / 2: attention over a growing prefix, line by line
    "lines_x_steps",          # n_lines * steps_max: every line kept until the longest ends
    "lines_x_steps_sq_half",  # n_lines * steps_max^2 / 2: ... with a growing prefix
    "steps_x_area",           # steps_max * area / width_multiple: cross-attention over the memory
)

#: Feature columns of a page's overhead (load, segmentation, bookkeeping).
PAGE_FEATURES = ("page_const", "pixels", "page_lines")

#: Candidate shapes per stage and kind; the best by cross-validation is kept.
STAGE_CANDIDATES: dict[str, dict[str, tuple[tuple[str, ...], ...]]] = {
    "ctc": {
        "t_preprocess": (("const", "sum_width"), ("const", "n_lines", "sum_width")),
        "t_encode": (("const", "area"), ("const", "n_lines", "area"), ("const", "n_lines", "sum_width")),
        "t_steps": (("const", "area"), ("const", "n_lines", "area")),
        "t_collapse": (("const", "area"), ("const", "n_lines", "area"), ("const", "n_lines", "sum_width")),
    },
    "seq": {
        "t_preprocess": (("const", "sum_width"), ("const", "n_lines", "sum_width")),
        # batch encoded at once (area) or line by line at each line's own width (sum_width)
        "t_encode": (("const", "area"), ("const", "n_lines", "area"), ("const", "n_lines", "sum_width")),
        "t_steps": (
            ("steps_max", "n_lines", "tokens_sum", "tokens_sq_half"),
            ("steps_max", "lines_x_steps", "lines_x_steps_sq_half"),
            ("steps_max", "lines_x_steps", "lines_x_steps_sq_half", "steps_x_area"),
            ("steps_max", "n_lines", "tokens_sum", "tokens_sq_half", "steps_x_area"),
        ),
        "t_collapse": (("const", "n_lines"), ("const", "n_lines", "tokens_sum"), ("const", "steps_max", "tokens_sum")),
    },
}
PAGE_CANDIDATES: tuple[tuple[str, ...], ...] = (("page_const", "pixels"), ("page_const", "pixels", "page_lines"))

#: Coefficient vector layout of a fitted model: batch features, page features, per-page gap.
COEF_NAMES: tuple[str, ...] = tuple(f"batch:{f}" for f in BATCH_FEATURES) + tuple(
    f"page:{f}" for f in PAGE_FEATURES) + ("page:gap",)
_NB, _NP = len(BATCH_FEATURES), len(PAGE_FEATURES)


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


# --------------------------------------------------------------------------- features


def batch_feature_matrix(n_lines, padded_width, sum_width, steps_max, tokens_sum, tokens_sq_sum,
                         *, width_multiple: int = DEFAULT_WIDTH_MULTIPLE) -> np.ndarray:
    """Rows of :data:`BATCH_FEATURES` for batches given by their summary columns."""
    n = np.asarray(n_lines, dtype=float)
    W = np.asarray(padded_width, dtype=float)
    sm = np.asarray(steps_max, dtype=float)
    area = n * W
    return np.column_stack([
        np.ones_like(n), n, np.asarray(sum_width, dtype=float), area, sm,
        np.asarray(tokens_sum, dtype=float), np.asarray(tokens_sq_sum, dtype=float) / 2.0,
        n * sm, n * sm * sm / 2.0, sm * area / float(width_multiple),
    ])


def page_feature_matrix(pixels, n_lines) -> np.ndarray:
    p = np.asarray(pixels, dtype=float)
    return np.column_stack([np.ones_like(p), p, np.asarray(n_lines, dtype=float)])


def simulate_batches(widths: Sequence[int], tokens: Sequence[int] | None, *, batch_size: int,
                     max_pad_ratio: float = DEFAULT_MAX_PAD_RATIO,
                     width_multiple: int = DEFAULT_WIDTH_MULTIPLE) -> pd.DataFrame:
    """Batch one page's lines as the runner does; one row per batch with the store's column names.

    ``widths`` are the lines' resized widths; ``tokens`` the tokens each line
    emits (its characters) for an autoregressive recogniser, else None. A
    line's decoder steps are its tokens plus the end token.
    """
    widths = [int(w) for w in widths]
    tok = np.asarray(tokens if tokens is not None else np.zeros(len(widths)), dtype=np.int64)
    rows = []
    for no, idx in enumerate(width_batches(widths, batch_size, max_pad_ratio)):
        w = np.asarray([widths[i] for i in idx], dtype=np.int64)
        t = tok[idx]
        rows.append({
            "batch_no": no, "n_lines": len(idx),
            "padded_width": int(-(-int(w.max()) // width_multiple) * width_multiple),
            "sum_width": int(w.sum()), "steps_max": int(t.max()) + 1 if tokens is not None else 0,
            "tokens_sum": int(t.sum()), "tokens_sq_sum": int((t * t).sum()),
        })
    return pd.DataFrame(rows, columns=["batch_no", "n_lines", "padded_width", "sum_width", "steps_max",
                                       "tokens_sum", "tokens_sq_sum"])


# --------------------------------------------------------------------------- fit pieces


@dataclass
class StageFit:
    """One stage's fitted cost: ``time = sum(coef[f] * feature[f])``, with its quality."""

    stage: str
    features: tuple[str, ...]
    coef: dict[str, float]
    r2: float
    resid_sd: float
    resid_p10: float
    resid_p90: float
    n: int
    cv_rmse: float | None
    tried: dict[str, float | None] = field(default_factory=dict)   # candidate -> cv rmse
    measured: bool = True

    def as_row(self) -> dict:
        return {"stage": self.stage, "features": "+".join(self.features),
                "coefficients": json.dumps({k: float(f"{v:.4g}") for k, v in self.coef.items()}),
                "r2": self.r2, "resid_sd": self.resid_sd, "resid_p10": self.resid_p10,
                "resid_p90": self.resid_p90, "n": self.n, "cv_rmse": self.cv_rmse, "measured": self.measured}


@dataclass
class WidthFit:
    """Resized line width and characters per line, each predicted from the other.

    ``width_px = intercept + px_per_char * n_chars`` (widths of lines whose
    characters are given, for an archive described by numbers), and the
    regression the other way, ``n_chars = chars_intercept + chars_per_px *
    width_px`` (characters of lines whose widths are measured, for a segmented
    sample). Each direction has its own least-squares fit and residuals: the
    inverse of a weak width-on-characters line would spread characters
    wildly, whereas the regression of characters on width falls back towards
    the calibration's own characters per line when width says little (as in
    ledgers, whose fields span the page whatever their length).
    """

    intercept: float
    px_per_char: float
    resid: np.ndarray
    r2: float
    n: int
    chars_seen: np.ndarray = field(default_factory=lambda: np.zeros(0))
    widths_seen: np.ndarray = field(default_factory=lambda: np.zeros(0))
    chars_intercept: float = 0.0
    chars_per_px: float = 0.0
    chars_resid: np.ndarray = field(default_factory=lambda: np.zeros(0))

    def resampled(self, rng: np.random.Generator) -> "WidthFit":
        """A bootstrap refit on the calibration lines drawn with replacement."""
        if len(self.chars_seen) < 3:
            return self
        i = rng.integers(0, len(self.chars_seen), size=len(self.chars_seen))
        try:
            return fit_width(self.chars_seen[i], self.widths_seen[i])
        except PlanError:
            return self

    def width(self, chars: np.ndarray, rng: np.random.Generator | None = None) -> np.ndarray:
        w = self.intercept + self.px_per_char * np.asarray(chars, dtype=float)
        if rng is not None and len(self.resid):
            w = w + rng.choice(self.resid, size=w.shape)
        return w

    def chars(self, widths: np.ndarray, rng: np.random.Generator | None = None) -> np.ndarray:
        c = self.chars_intercept + self.chars_per_px * np.asarray(widths, dtype=float)
        if rng is not None and len(self.chars_resid):
            c = c + rng.choice(self.chars_resid, size=c.shape)
        return np.maximum(1, np.round(c)).astype(np.int64)


def fit_width(n_chars: np.ndarray, width_px: np.ndarray) -> WidthFit:
    """Fit :class:`WidthFit`: width on characters by NNLS (both terms non-negative), characters on width by OLS."""
    c = np.asarray(n_chars, dtype=float)
    w = np.asarray(width_px, dtype=float)
    ok = np.isfinite(c) & np.isfinite(w) & (c > 0)
    c, w = c[ok], w[ok]
    if len(c) < 3 or np.ptp(c) == 0 or np.ptp(w) == 0:
        raise PlanError("the calibration lines do not vary in length: cannot relate width to characters")
    coef, _ = nnls(np.column_stack([np.ones_like(c), c]), w)   # slope 0 allowed: width may not follow length
    resid = w - (coef[0] + coef[1] * c)
    back = np.linalg.lstsq(np.column_stack([np.ones_like(w), w]), c, rcond=None)[0]
    c_resid = c - (back[0] + back[1] * w)
    return WidthFit(float(coef[0]), float(coef[1]), resid, _r2(w, resid), int(len(c)), c, w,
                    float(back[0]), float(back[1]), c_resid)


def _r2(y: np.ndarray, resid: np.ndarray) -> float:
    ss_tot = float(((y - y.mean()) ** 2).sum()) if len(y) else 0.0
    return float("nan") if ss_tot <= 0 else 1.0 - float((resid ** 2).sum()) / ss_tot


def _folds(groups: np.ndarray, k: int) -> list[np.ndarray]:
    uniq = np.unique(groups)
    if len(uniq) < 3:
        return []
    k = min(k, len(uniq))
    assign = {g: i % k for i, g in enumerate(uniq)}
    g_fold = np.array([assign[g] for g in groups])
    return [g_fold == f for f in range(k)]


def _fit_stage(stage: str, X: np.ndarray, y: np.ndarray, groups: np.ndarray,
               candidates: Sequence[tuple[str, ...]], names: Sequence[str]) -> StageFit:
    """Fit one stage over each candidate shape; keep the best by grouped cross-validation."""
    col = {n: i for i, n in enumerate(names)}
    folds = _folds(groups, 10)
    scores: dict[tuple[str, ...], float | None] = {}
    for cand in candidates:
        A = X[:, [col[f] for f in cand]]
        if not folds:
            scores[cand] = None
            continue
        err = np.empty_like(y)
        for test in folds:
            coef, _ = nnls(A[~test], y[~test])
            err[test] = y[test] - A[test] @ coef
        scores[cand] = float(np.sqrt(np.mean(err ** 2)))
    if all(v is None for v in scores.values()):
        best = candidates[0]
    else:
        top = min(v for v in scores.values() if v is not None)
        # the simplest shape within 2% of the best: a more complex one must earn its place
        slack = 1.02 * top + 1e-9 * float(np.sqrt(np.mean(y ** 2)))
        best = min((c for c, v in scores.items() if v is not None and v <= slack),
                   key=lambda c: (len(c), scores[c]))
    A = X[:, [col[f] for f in best]]
    coef, _ = nnls(A, y)
    resid = y - A @ coef
    return StageFit(stage=stage, features=best, coef={f: float(v) for f, v in zip(best, coef)},
                    r2=_r2(y, resid), resid_sd=float(resid.std(ddof=1)) if len(resid) > 1 else 0.0,
                    resid_p10=float(np.percentile(resid, 10)), resid_p90=float(np.percentile(resid, 90)),
                    n=int(len(y)), cv_rmse=scores[best],
                    tried={"+".join(c): v for c, v in scores.items()})


def _coef_vector(stages: Sequence[StageFit], page: StageFit | None, gap: float) -> np.ndarray:
    v = np.zeros(len(COEF_NAMES))
    for s in stages:
        for f, c in s.coef.items():
            v[BATCH_FEATURES.index(f)] += c
    if page is not None:
        for f, c in page.coef.items():
            v[_NB + PAGE_FEATURES.index(f)] += c
    v[-1] = gap
    return v


# --------------------------------------------------------------------------- cost model


@dataclass
class CostModel:
    """A recogniser's fitted cost on one machine, with everything needed to predict and to warn."""

    recogniser: str
    kind: str                          # "ctc" | "seq"
    profile: str                       # machine name (host name or a name given)
    host: dict
    run_ids: list[int]
    threads: int                       # intra-op threads the calibration ran with
    batch_size: int
    max_pad_ratio: float
    width_multiple: int
    line_height: int
    max_tokens: int
    stages: list[StageFit]
    page: StageFit | None
    page_target: str                   # what the page overhead was fitted on
    gap_per_page: float                # seconds between pages not inside any page's own timing
    startup_s: float                   # seconds from run start to the first page's start
    coef: np.ndarray                   # main fit, layout COEF_NAMES
    boot: np.ndarray                   # (B, len(COEF_NAMES)) bootstrap refits over pages
    batch_resid: np.ndarray            # residual of each calibration batch's total model time
    page_resid: np.ndarray             # residual of each calibration page's overhead
    width: WidthFit | None             # None when the calibration lines cannot support it (see notes)
    ranges: dict[str, tuple[float, float]]
    n_pages: int
    n_lines: int
    n_batches: int
    quality: dict = field(default_factory=dict)   # batch-total and page-overhead fit quality
    notes: list[str] = field(default_factory=list)
    overlap: float = 0.0               # share of min(batch time, page overhead) hidden by loading ahead
    speed_cv: float = 0.0              # session-to-session spread of the machine's speed (repeated timed sessions)
    split_gap: float = 0.0             # the card cuts lines at blank gaps wider than this many heights
    pieces_per_line: float = 1.0       # pieces per line seen in calibration (split_gap > 0)

    def _parts(self, X: np.ndarray, coef: np.ndarray | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Per page: batch time, page overhead, and the part of them loading ahead hides."""
        c = self.coef if coef is None else coef
        b = X[:, :_NB] @ c[:_NB]
        o = X[:, _NB:_NB + _NP] @ c[_NB:_NB + _NP]
        hidden = self.overlap * np.minimum(b, np.maximum(o, 0.0)) if self.overlap else np.zeros_like(b)
        return b, o, hidden

    def page_times(self, X: np.ndarray, coef: np.ndarray | None = None) -> np.ndarray:
        """Wall time of pages given their feature rows (layout :data:`COEF_NAMES`)."""
        b, o, hidden = self._parts(X, coef)
        c = self.coef if coef is None else coef
        return b + o + X[:, -1] * c[-1] - hidden

    def first_page_extra(self, X: np.ndarray, coef: np.ndarray | None = None) -> float:
        """What :meth:`page_times` hides for a page that cannot hide it: a run's first page (mean page)."""
        if not self.overlap or len(X) == 0:
            return 0.0
        return float(self._parts(X, coef)[2].mean())

    # ---- reporting
    def fit_table(self) -> pd.DataFrame:
        """One row per fitted stage (batch stages, page overhead, width-per-character)."""
        rows = [s.as_row() for s in self.stages]
        if self.page is not None:
            rows.append(self.page.as_row() | {"stage": f"page overhead ({self.page_target})"})
        if self.width is not None:
            rows.append({"stage": "line width vs characters", "features": "const+n_chars",
                         "coefficients": json.dumps({"const": round(self.width.intercept, 3),
                                                     "px_per_char": round(self.width.px_per_char, 4)}),
                         "r2": self.width.r2, "resid_sd": float(np.std(self.width.resid, ddof=1)),
                         "resid_p10": float(np.percentile(self.width.resid, 10)),
                         "resid_p90": float(np.percentile(self.width.resid, 90)), "n": self.width.n,
                         "cv_rmse": None, "measured": True})
        df = pd.DataFrame(rows)
        df.insert(0, "recogniser", self.recogniser)
        return df

    def require_width(self) -> WidthFit:
        if self.width is None:
            raise PlanError(f"{self.recogniser}: characters cannot be related to line widths from this calibration "
                            "(too few lines with text, or no variation); describe the archive by a run store")
        return self.width

    def batch_quality(self) -> dict:
        """R^2 and residual spread of a batch's total model time (all stages together)."""
        return dict(self.quality)

    # ---- prediction helpers
    def batch_time(self, batches: pd.DataFrame, coef: np.ndarray | None = None) -> np.ndarray:
        X = batch_feature_matrix(batches["n_lines"], batches["padded_width"], batches["sum_width"],
                                 batches["steps_max"], batches["tokens_sum"], batches["tokens_sq_sum"],
                                 width_multiple=self.width_multiple)
        return X @ (self.coef if coef is None else coef)[:_NB]

    def line_time(self, chars: float | np.ndarray) -> np.ndarray:
        """Model time per line for lines of ``chars`` characters in full batches (no page overhead).

        Continuous in ``chars`` (width from the fitted px-per-character, no
        rounding), so it can be solved for a crossover.
        """
        c = np.atleast_1d(np.asarray(chars, dtype=float))
        B = float(self.batch_size)
        self.require_width()
        k = self.pieces_per_line if self.split_gap > 0 else 1.0     # a split line is k pieces, each batched
        w = (self.width.intercept + self.width.px_per_char * c) / k
        tok = np.maximum(c - (k - 1.0), 0.0) / k
        tok = np.minimum(tok, self.max_tokens - 1.0) if self.kind == "seq" else np.zeros_like(c)
        steps = tok + 1.0 if self.kind == "seq" else np.zeros_like(c)
        X = batch_feature_matrix(np.full_like(c, B), w, B * w, steps, B * tok, B * tok * tok,
                                 width_multiple=self.width_multiple)
        return k * (X @ self.coef[:_NB]) / B


def _host_of(runs: pd.DataFrame) -> dict:
    try:
        return json.loads(runs["host_json"].iloc[-1] or "{}")
    except (TypeError, ValueError):
        return {}


def _settings_of(runs: pd.DataFrame) -> dict:
    try:
        return json.loads(runs["settings_json"].iloc[-1] or "{}")
    except (TypeError, ValueError):
        return {}


def _deep_get(d: Mapping, *keys, default=None):
    """First of ``keys`` found in ``d`` or in any nested dict of it."""
    for k in keys:
        if k in d and d[k] is not None:
            return d[k]
    for v in d.values():
        if isinstance(v, Mapping):
            got = _deep_get(v, *keys, default=None)
            if got is not None:
                return got
    return default


def _parse_times(s: pd.Series) -> pd.Series:
    return pd.to_datetime(s, utc=True, errors="coerce", format="ISO8601")


def _page_key(run_id, page_id) -> str:
    return f"{int(run_id)}\x00{page_id}"


def _timeline(runs: pd.DataFrame, pages: pd.DataFrame, run_ids: Sequence[int]) -> tuple[dict[str, float], float | None, list[str]]:
    """Per-page gap (time between pages outside each page's own t_total) and start-up, from timestamps.

    Only used when the store's timestamps resolve fractions of a second and a
    run's pages are not interleaved with another run's (several recognisers in
    one command share each page's loading, so the gap is not theirs alone).
    Returns ``({page key: gap}, startup or None, notes)``.
    """
    notes: list[str] = []
    mine = pages[pages["run_id"].isin(list(run_ids))]
    done = pages[pages["status"] == "done"].copy()
    if mine.empty:
        return {}, None, notes
    fin_text = mine["finished_at"].astype(str)
    if not fin_text.str.contains(r"T\d\d:\d\d:\d\d\.\d", regex=True).any():
        notes.append("the store's timestamps are whole seconds: the time between pages (store writes, hashing) "
                     "and the start-up are not in this model; measure a session with `ocrbench measure-scaling` "
                     "to include them")
        return {}, None, notes
    done["_fin"] = _parse_times(done["finished_at"])
    done = done.dropna(subset=["_fin", "t_total"]).sort_values("_fin", kind="stable")
    other = done["run_id"].shift(1)
    gaps: dict[str, float] = {}
    interleaved = False
    startups = []
    for rid in run_ids:
        idx = done.index[done["run_id"] == rid]
        if len(idx) == 0:
            continue
        d = done.loc[idx]
        if (other.loc[idx[1:]] != rid).any():
            interleaved = True
            continue
        g = (d["_fin"].diff().dt.total_seconds() - d["t_total"].astype(float)).iloc[1:]
        for (r, p), v in zip(d[["run_id", "page_id"]].iloc[1:].itertuples(index=False), g):
            gaps[_page_key(r, p)] = float(max(0.0, v))
        t0 = _parse_times(runs.loc[runs["run_id"] == rid, "started_at"]).iloc[0]
        if not pd.isna(t0):
            startups.append((d["_fin"].iloc[0] - t0).total_seconds() - float(d["t_total"].iloc[0]))
    if interleaved:
        notes.append("several recognisers took turns on each page in the calibration run: the time between "
                     "pages is not attributed (measure a session per recogniser with `ocrbench measure-scaling`)")
    su = float(max(0.0, np.median(startups))) if startups else None
    return gaps, su, notes


def fit_cost_model(frames: Mapping[str, pd.DataFrame], recogniser: str, *,
                   run_ids: Sequence[int] | None = None, profile: str | None = None,
                   line_height: int | None = None, width_multiple: int | None = None, split_gap: float = 0.0,
                   session: Mapping | None = None, n_boot: int = 200, seed: int = 0) -> CostModel:
    """Fit one recogniser's cost model on a store's tables (``runs``, ``pages``, ``batches``, ``lines``).

    Uses every run of ``recogniser`` that has the same settings as its latest
    run (or the given ``run_ids``). Raises :class:`PlanError` with a reason when
    the data cannot support a fit.
    """
    runs = frames["runs"]
    mine = runs[runs["recogniser"] == recogniser].sort_values("run_id")
    if run_ids is not None:
        mine = mine[mine["run_id"].isin(list(run_ids))]
    if mine.empty:
        raise PlanError(f"no run of recogniser {recogniser!r} in the calibration store")
    latest = mine["settings_json"].iloc[-1]
    mine = mine[mine["settings_json"] == latest]
    ids = [int(r) for r in mine["run_id"]]
    kind = str(mine["kind"].iloc[-1])
    if kind not in STAGE_CANDIDATES:
        raise PlanError(f"recogniser {recogniser!r} has unknown kind {kind!r}")
    host, settings = _host_of(mine), _settings_of(mine)
    notes: list[str] = []

    pages = frames["pages"]
    pages = pages[pages["run_id"].isin(ids) & (pages["status"] == "done")].reset_index(drop=True)
    batches = frames["batches"]
    batches = batches[batches["run_id"].isin(ids)].copy()
    lines = frames["lines"]
    lines = lines[lines["run_id"].isin(ids)].copy()
    batches = batches.merge(pages[["run_id", "page_id"]], on=["run_id", "page_id"])
    if len(pages) < 2 or len(batches) < 3:
        raise PlanError(f"recogniser {recogniser!r}: {len(pages)} finished page(s) and {len(batches)} batch(es) "
                        "in the calibration store; at least 2 pages and 3 batches are needed")

    width_multiple = int(width_multiple or _deep_get(settings, "width_multiple", default=DEFAULT_WIDTH_MULTIPLE))
    batch_size = int(_deep_get(settings, "batch_size", default=DEFAULT_BATCH_SIZE))
    if int(batches["n_lines"].max()) > batch_size:
        batch_size = int(batches["n_lines"].max())
    max_pad_ratio = float(_deep_get(settings, "max_pad_ratio", default=DEFAULT_MAX_PAD_RATIO))
    line_height = int(line_height or _deep_get(settings, "line_height", "height", default=DEFAULT_LINE_HEIGHT))
    max_tokens = int(_deep_get(settings, "max_tokens", default=None) or DEFAULT_MAX_TOKENS)
    threads = int(_deep_get(settings, "intra_threads", default=None) or host.get("intra_threads") or 1)

    key = pd.Series([_page_key(a, b) for a, b in zip(batches["run_id"], batches["page_id"])], index=batches.index)
    X = batch_feature_matrix(batches["n_lines"], batches["padded_width"], batches["sum_width"],
                             batches["steps_max"].fillna(0), batches["tokens_sum"].fillna(0),
                             batches["tokens_sq_sum"].fillna(0), width_multiple=width_multiple)
    groups = key.to_numpy()

    stages: list[StageFit] = []
    for stage, cands in STAGE_CANDIDATES[kind].items():
        y = batches[stage].to_numpy(dtype=float) if stage in batches else np.zeros(len(batches))
        y = np.nan_to_num(y)
        if float(np.abs(y).max(initial=0.0)) <= 1e-9:
            continue   # stage not used by this recogniser
        stages.append(_fit_stage(stage, X, y, groups, cands, BATCH_FEATURES))

    # Page overhead: whatever a page costs outside its batches.
    batch_total = batches[[c for c in BATCH_STAGES if c in batches]].fillna(0).sum(axis=1)
    per_page_batch = batch_total.groupby(key).sum()
    pkeys = np.array([_page_key(a, b) for a, b in zip(pages["run_id"], pages["page_id"])])
    batch_time = per_page_batch.reindex(pkeys).fillna(0.0).to_numpy()
    if "t_total" in pages and pages["t_total"].notna().all():
        y_page = pages["t_total"].to_numpy(dtype=float) - batch_time
        page_target = "t_total less batch time"
    else:
        cols = [c for c in ("t_load", "t_segment", "t_postprocess") if c in pages]
        y_page = pages[cols].fillna(0).sum(axis=1).to_numpy(dtype=float)
        page_target = "+".join(cols)
        notes.append("pages.t_total missing: page overhead fitted on " + page_target)
    pixels = (pages["width"].astype(float) * pages["height"].astype(float)).to_numpy()
    lpp = pages["n_lines"].to_numpy(dtype=float)
    Xp = page_feature_matrix(pixels, lpp)
    page_fit = _fit_stage("page overhead", Xp, y_page, pkeys, PAGE_CANDIDATES, PAGE_FEATURES)

    gaps, startup, tl_notes = _timeline(runs, frames["pages"], ids)
    my_gaps = np.array([gaps.get(k, np.nan) for k in pkeys], dtype=float)
    gap_mean = float(np.nanmean(my_gaps)) if np.isfinite(my_gaps).any() else 0.0
    overlap = 0.0
    speed_cv = float((session or {}).get("speed_cv") or 0.0)
    if session and int(session.get("sessions") or 1) >= 2:
        notes.append(f"the machine's speed varied by {100 * speed_cv:.1f}% (coefficient of variation) between "
                     f"{int(session['sessions'])} timed sessions of the same pages; the interval includes it")
    if session:
        # measured directly around a run (ocrbench.run.measure): more precise than store timestamps
        gap_mean = float(session.get("gap_seconds_per_page", gap_mean) or 0.0)
        startup = float(session.get("startup_seconds", startup or 0.0) or 0.0)
        if gap_mean < 0:
            # The runner overlapped pages (loading the next while recognising this one): the session
            # was shorter than its pages' own times. Model a page's wall time as
            # batch + overhead - overlap * min(batch, overhead), overlap fitted to the session.
            sel = np.ones(len(pkeys), dtype=bool)
            if session.get("run_id") is not None:
                sel = (pages["run_id"] == int(session["run_id"])).to_numpy()
                sel = sel if sel.any() else np.ones(len(pkeys), dtype=bool)
            shorter = np.minimum(batch_time[sel], np.maximum(y_page[sel], 0.0))
            n_sel = int(sel.sum())
            if n_sel >= 2 and shorter[1:].sum() > 0:
                # The first page of a session is loaded while nothing else runs: only the others can
                # hide their loading (a 10-page session hides at most ~90 %). Pages run in page-id
                # order (the runner's order, which the store's frames keep).
                chance = float(shorter[1:].sum()) / n_sel          # per page of the session
                overlap = min(1.0, -gap_mean / chance)
                gap_mean = min(0.0, gap_mean + overlap * chance)
            notes.append(f"pages overlapped in the timed session (loading ahead): {100 * overlap:.0f}% of the "
                         "shorter of a page's recognition and its loading is hidden")
        my_gaps = np.full(len(pkeys), gap_mean)
    else:
        notes += tl_notes
    startup = float(startup or 0.0)

    coef = _coef_vector(stages, page_fit, gap_mean)
    y_tot = batch_total.to_numpy(dtype=float)
    batch_resid = y_tot - X @ coef[:_NB]
    page_resid = y_page - Xp @ coef[_NB:_NB + _NP]

    # Bootstrap over pages: refit every stage with its chosen shape on resampled pages.
    rng = np.random.default_rng(seed)
    by_key = {k: np.flatnonzero(groups == k) for k in np.unique(groups)}
    empty = np.zeros(0, dtype=int)
    col = {n: i for i, n in enumerate(BATCH_FEATURES)}
    pcol = [PAGE_FEATURES.index(f) for f in page_fit.features]
    stage_y = {s.stage: np.nan_to_num(batches[s.stage].to_numpy(dtype=float)) for s in stages}
    boot = np.empty((n_boot, len(COEF_NAMES)))
    for b in range(n_boot):
        prow = rng.integers(0, len(pkeys), size=len(pkeys))
        rows = np.concatenate([by_key.get(pkeys[i], empty) for i in prow])
        v = np.zeros(len(COEF_NAMES))
        for s in stages:
            if len(rows) == 0:
                continue
            c, _ = nnls(X[np.ix_(rows, [col[f] for f in s.features])], stage_y[s.stage][rows])
            for f, cf in zip(s.features, c):
                v[col[f]] += cf
        c, _ = nnls(Xp[np.ix_(prow, pcol)], y_page[prow])
        for f, cf in zip(page_fit.features, c):
            v[_NB + PAGE_FEATURES.index(f)] += cf
        g = my_gaps[prow]
        v[-1] = float(np.nanmean(g)) if np.isfinite(g).any() else gap_mean
        boot[b] = v

    ln = lines.dropna(subset=["width_px", "n_chars"])
    try:
        width: WidthFit | None = fit_width(ln["n_chars"].to_numpy(dtype=float), ln["width_px"].to_numpy(dtype=float))
    except PlanError as e:
        width = None
        notes.append(f"line width per character not fitted ({e}); plans must describe the archive by a run "
                     "store, where characters and widths are both measured")
    ranges = {
        "line width (px)": (float(ln["width_px"].min()), float(ln["width_px"].max())),
        "characters per line": (float(ln["n_chars"].min()), float(ln["n_chars"].max())),
        "batch padded width (px)": (float(batches["padded_width"].min()), float(batches["padded_width"].max())),
        "lines per page": (float(lpp.min()), float(lpp.max())),
        "page pixels": (float(pixels.min()), float(pixels.max())),
    }
    if kind == "seq":
        ranges["decoder steps per line"] = (float(batches["steps_max"].min()), float(batches["steps_max"].max()))
    quality = {
        "r2": _r2(y_tot, batch_resid), "resid_sd": float(batch_resid.std(ddof=1)),
        "resid_p10": float(np.percentile(batch_resid, 10)), "resid_p90": float(np.percentile(batch_resid, 90)),
        "relative_resid_median": float(np.median(np.abs(batch_resid) / np.maximum(np.abs(y_tot), 1e-12))),
        "page_r2": page_fit.r2, "page_resid_sd": page_fit.resid_sd,
        "calibration_seconds": float(pages["t_total"].sum()) if "t_total" in pages else None,
    }
    return CostModel(
        recogniser=recogniser, kind=kind, profile=profile or str(host.get("hostname") or "this machine"),
        host=host, run_ids=ids, threads=threads, batch_size=batch_size, max_pad_ratio=max_pad_ratio,
        width_multiple=width_multiple, line_height=line_height, max_tokens=max_tokens, stages=stages,
        page=page_fit, page_target=page_target, gap_per_page=gap_mean, startup_s=startup, coef=coef,
        boot=boot, batch_resid=batch_resid, page_resid=page_resid, width=width, ranges=ranges,
        n_pages=len(pages), n_lines=len(ln), n_batches=len(batches), quality=quality, notes=notes,
        overlap=overlap, speed_cv=speed_cv, split_gap=float(split_gap or 0.0),
        pieces_per_line=float(batches["n_lines"].sum() / max(1.0, float(lpp.sum()))) if split_gap else 1.0)


def fit_cost_models(frames: Mapping[str, pd.DataFrame], *, profile: str | None = None,
                    recognisers: Iterable[str] | None = None, n_boot: int = 200, seed: int = 0) -> dict[str, CostModel]:
    """A :class:`CostModel` for every recogniser in a store (or the named ones)."""
    names = list(recognisers) if recognisers is not None else sorted(frames["runs"]["recogniser"].unique())
    if not names:
        raise PlanError("the calibration store holds no runs")
    return {n: fit_cost_model(frames, n, profile=profile, n_boot=n_boot, seed=seed) for n in names}


# --------------------------------------------------------------------------- archive


@dataclass
class Archive:
    """What is to be recognised: a page count and how pages look.

    Either parametric (``lines_per_page`` and ``chars_per_line`` as inclusive
    ranges, uniform; ``page_pixels`` one size) or a sample of real pages
    (``sample_lines``: one row per line with ``page_id`` and ``n_chars`` and/or
    ``width_px`` (resized) and/or ``crop_w``/``crop_h`` (segmented crop size);
    ``sample_pages``: ``page_id``, ``pixels``) that is resampled page by page.
    """

    n_pages: int
    source: str
    lines_per_page: tuple[int, int] | None = None
    chars_per_line: tuple[int, int] | None = None
    page_pixels: float | None = None
    sample_pages: pd.DataFrame | None = None
    sample_lines: pd.DataFrame | None = None

    def __post_init__(self) -> None:
        if int(self.n_pages) < 1:
            raise PlanError(f"an archive needs at least 1 page, got {self.n_pages}")
        self.n_pages = int(self.n_pages)
        if self.sample_pages is None and (self.lines_per_page is None or self.chars_per_line is None):
            raise PlanError("describe the archive by a sample (folder or store) or by lines per page and "
                            "characters per line")

    @classmethod
    def from_numbers(cls, n_pages: int, lines_per_page, chars_per_line, *,
                     page_size: tuple[int, int] | None = None) -> "Archive":
        px = float(page_size[0]) * float(page_size[1]) if page_size else None
        return cls(n_pages=n_pages, source="numbers", lines_per_page=parse_range(lines_per_page),
                   chars_per_line=parse_range(chars_per_line), page_pixels=px)

    @classmethod
    def from_store_frames(cls, frames: Mapping[str, pd.DataFrame], *, run_id: int | None = None,
                          n_pages: int | None = None) -> "Archive":
        """Pages and lines as a run recorded them (characters and widths both measured)."""
        runs = frames["runs"]
        if runs.empty:
            raise PlanError("the archive store holds no runs")
        rid = int(run_id if run_id is not None else runs["run_id"].max())
        pages = frames["pages"]
        pages = pages[(pages["run_id"] == rid) & (pages["status"] == "done")]
        if pages.empty:
            raise PlanError(f"run {rid} of the archive store holds no finished pages")
        lines = frames["lines"]
        lines = lines[lines["run_id"] == rid][["page_id", "n_chars", "width_px"]].copy()
        sp = pd.DataFrame({"page_id": pages["page_id"],
                           "pixels": pages["width"].astype(float) * pages["height"].astype(float)})
        return cls(n_pages=n_pages or len(sp), source=f"store run {rid} ({len(sp)} pages)",
                   sample_pages=sp.reset_index(drop=True), sample_lines=lines.reset_index(drop=True))

    @classmethod
    def from_layouts(cls, pages: pd.DataFrame, lines: pd.DataFrame, *, n_pages: int | None = None,
                     source: str = "sample folder") -> "Archive":
        """Segmented sample pages: ``pages`` (page_id, width, height), ``lines`` (page_id, crop_w, crop_h)."""
        if pages.empty:
            raise PlanError("the sample holds no usable page")
        sp = pd.DataFrame({"page_id": pages["page_id"],
                           "pixels": pages["width"].astype(float) * pages["height"].astype(float)})
        return cls(n_pages=n_pages or len(sp), source=f"{source} ({len(sp)} pages segmented)",
                   sample_pages=sp.reset_index(drop=True), sample_lines=lines.reset_index(drop=True))

    def describe(self) -> dict:
        d = {"pages": self.n_pages, "source": self.source}
        if self.sample_pages is None:
            d |= {"lines_per_page": list(self.lines_per_page), "chars_per_line": list(self.chars_per_line),
                  "page_pixels": self.page_pixels}
        else:
            n = self.sample_lines.groupby("page_id").size().reindex(self.sample_pages["page_id"]).fillna(0)
            d |= {"sample_pages": len(self.sample_pages), "lines_per_page_mean": float(n.mean()),
                  "lines_per_page_range": [int(n.min()), int(n.max())],
                  "page_pixels_median": float(self.sample_pages["pixels"].median())}
            if "n_chars" in self.sample_lines:
                d["chars_per_line_mean"] = float(self.sample_lines["n_chars"].mean())
        return d


@dataclass
class PagePool:
    """Simulated pages for one recogniser: per-page feature sums and counts."""

    X: np.ndarray          # (pages, len(COEF_NAMES)): batch feature sums, page features, 1 (gap)
    n_batches: np.ndarray
    n_lines: np.ndarray
    n_chars: np.ndarray
    max_width: float
    max_padded: float
    max_steps: float
    widths: np.ndarray     # every simulated line's width (for range checks)
    pixels: np.ndarray


def _resized_width(crop_w, crop_h, height: int) -> np.ndarray:
    w = np.asarray(crop_w, dtype=float)
    h = np.maximum(np.asarray(crop_h, dtype=float), 1.0)
    return np.clip(np.round(w * height / h), DEFAULT_MIN_WIDTH, DEFAULT_MAX_WIDTH)


def _resized(w, h, height: int) -> np.ndarray:
    return np.clip(np.round(np.asarray(w, dtype=float) * height / max(float(h), 1.0)), DEFAULT_MIN_WIDTH,
                   DEFAULT_MAX_WIDTH)


def _page_lines(model: CostModel, archive: Archive, rng: np.random.Generator, k: int,
                width_fit: WidthFit) -> list[tuple[np.ndarray, np.ndarray, float, list | None]]:
    """``k`` pages of (line widths, line characters, pixels, pieces) drawn from the archive description.

    ``pieces``: per line, the resized widths of the pieces the card cuts it into
    (a segmented sample measured with the card's ``split_gap``), else None.
    For a card that splits lines, line width is the sum of its pieces.
    """
    out = []
    if width_fit is None and (archive.sample_pages is None or "n_chars" not in archive.sample_lines):
        model.require_width()
    if archive.sample_pages is None:
        px = archive.page_pixels
        if px is None:
            lo, hi = model.ranges["page pixels"]
            px = (lo + hi) / 2
        a, b = archive.lines_per_page
        c0, c1 = archive.chars_per_line
        for _ in range(k):
            n = int(rng.integers(a, b + 1))
            chars = rng.integers(c0, c1 + 1, size=n)
            w = np.clip(np.round(width_fit.width(chars, rng)), DEFAULT_MIN_WIDTH, DEFAULT_MAX_WIDTH)
            out.append((w, chars, float(px), None))
        return out
    sl = archive.sample_lines
    groups = {pid: g for pid, g in sl.groupby("page_id", sort=False)}
    pick = rng.integers(0, len(archive.sample_pages), size=k)
    pcol = f"pieces_{model.split_gap:g}"
    for i in pick:
        row = archive.sample_pages.iloc[int(i)]
        g = groups.get(row["page_id"])
        if g is None or g.empty:
            out.append((np.zeros(0), np.zeros(0, dtype=np.int64), float(row["pixels"]), None))
            continue
        pieces = None
        if model.split_gap > 0 and pcol in g and "crop_h" in g:
            pieces = [_resized(pw, h, model.line_height) for pw, h in zip(g[pcol], g["crop_h"])]
            w = np.array([p.sum() for p in pieces], dtype=float)
        elif "width_px" in g and g["width_px"].notna().all():
            w = g["width_px"].to_numpy(dtype=float)
        else:
            w = _resized_width(g["crop_w"], g["crop_h"], model.line_height)
        if "n_chars" in g and g["n_chars"].notna().all():
            chars = g["n_chars"].to_numpy(dtype=np.int64)
        else:
            chars = width_fit.chars(w, rng)
        out.append((w, chars, float(row["pixels"]), pieces))
    return out


def _units(model: CostModel, w: np.ndarray, chars: np.ndarray, pieces: list | None,
           rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """What the recogniser batches: whole lines, or the pieces a splitting card cuts them into.

    Returns (widths, tokens). A line of ``c`` characters in ``k`` pieces has
    ``c - (k - 1)`` tokens (the joining spaces are not decoded), shared in
    proportion to the pieces' widths. Without measured pieces a line is cut
    into the calibration's mean number of pieces, of equal width.
    """
    if model.split_gap <= 0 or len(w) == 0:
        return w, chars
    if pieces is None:
        r = model.pieces_per_line
        ks = np.floor(r) + (rng.random(len(w)) < (r - np.floor(r)))
        pieces = [np.full(int(max(1, k)), wi / max(1, k)) for wi, k in zip(w, ks)]
    uw, ut = [], []
    for p, c in zip(pieces, chars):
        p = np.maximum(np.asarray(p, dtype=float), DEFAULT_MIN_WIDTH)
        tok = max(0, int(c) - (len(p) - 1))
        share = np.floor(tok * p / p.sum())
        share[: int(tok - share.sum())] += 1          # hand out the remainder
        uw.append(np.round(p))
        ut.append(share)
    return np.concatenate(uw), np.concatenate(ut).astype(np.int64)


def _page_batch_features(widths: np.ndarray, tokens: np.ndarray | None, model: CostModel) -> tuple[np.ndarray, int, float, float]:
    """Sum of :data:`BATCH_FEATURES` over one page's batches, batched as the runner does.

    ``tokens``: tokens emitted per line (seq), steps being tokens + 1.
    Returns ``(feature sums, number of batches, widest padded batch, most decoder steps)``.
    """
    wl = [int(w) for w in widths]
    groups = width_batches(wl, model.batch_size, model.max_pad_ratio)
    w = np.asarray(wl, dtype=np.int64)
    t = np.asarray(tokens if tokens is not None else np.zeros(len(wl)), dtype=np.int64)
    m = model.width_multiple
    n = np.array([len(g) for g in groups], dtype=float)
    padded = np.array([-(-int(w[g].max()) // m) * m for g in groups], dtype=float)
    sum_w = np.array([w[g].sum() for g in groups], dtype=float)
    smax = np.array([t[g].max() + 1 if tokens is not None else 0 for g in groups], dtype=float)
    tsum = np.array([t[g].sum() for g in groups], dtype=float)
    tsq = np.array([(t[g] * t[g]).sum() for g in groups], dtype=float)
    X = batch_feature_matrix(n, padded, sum_w, smax, tsum, tsq, width_multiple=m)
    return X.sum(axis=0), len(groups), float(padded.max()), float(smax.max())


def simulate_pool(model: CostModel, archive: Archive, *, rng: np.random.Generator,
                  pages: int | None = None, width_fit: WidthFit | None = None) -> PagePool:
    """Make pages as the archive describes them, batch them as the runner would, sum their features."""
    wf = width_fit or model.width
    k = pages or (len(archive.sample_pages) if archive.sample_pages is not None else 200)
    rows, nb, nl, nc, all_w, pix = [], [], [], [], [], []
    pmax = smax = 0.0
    for w, chars, px, pieces in _page_lines(model, archive, rng, k, wf):
        v = np.zeros(len(COEF_NAMES))
        if len(w):
            uw, ut = _units(model, w, chars, pieces, rng)
            tokens = np.minimum(ut, model.max_tokens - 1) if model.kind == "seq" else None
            v[:_NB], n_b, p, st = _page_batch_features(uw, tokens, model)
            nb.append(n_b)
            pmax, smax = max(pmax, p), max(smax, st)
            all_w.append(w)
        else:
            nb.append(0)
        v[_NB:_NB + _NP] = page_feature_matrix([px], [len(w)])[0]
        v[-1] = 1.0
        rows.append(v)
        nl.append(len(w))
        nc.append(int(np.sum(chars)))
        pix.append(px)
    widths = np.concatenate(all_w) if all_w else np.zeros(0)
    return PagePool(X=np.array(rows), n_batches=np.array(nb), n_lines=np.array(nl), n_chars=np.array(nc),
                    max_width=float(widths.max(initial=0.0)), max_padded=pmax, max_steps=smax,
                    widths=widths, pixels=np.array(pix))


# --------------------------------------------------------------------------- prediction


@dataclass
class SerialEstimate:
    """One recogniser's archive time on one worker (Monte Carlo draws), before scaling."""

    model: CostModel
    archive: Archive
    serial_s: np.ndarray      # draws: sum of page times on one worker at calibration threads
    chars: np.ndarray         # draws: total characters
    lines: np.ndarray         # draws: total lines
    warnings: list[str]
    extrapolation: list[dict]


def _sum_of_draws(values: np.ndarray, n: int, rng: np.random.Generator, exact_limit: int = 5000) -> float:
    """Sum of ``n`` draws with replacement from ``values`` (exact when small, normal approximation when large)."""
    if n <= 0 or len(values) == 0:
        return 0.0
    if n <= exact_limit:
        return float(values[rng.integers(0, len(values), size=n)].sum())
    return float(n * values.mean() + math.sqrt(n) * values.std() * rng.standard_normal())


def _extrapolation(model: CostModel, pools: Sequence[PagePool], archive: Archive) -> tuple[list[str], list[dict]]:
    msgs, rows = [], []
    allw = np.concatenate([p.widths for p in pools]) if pools else np.zeros(0)
    checks = [
        ("line width (px)", allw),
        ("batch padded width (px)", np.array([p.max_padded for p in pools])),
        ("lines per page", np.concatenate([p.n_lines for p in pools]).astype(float)),
        ("page pixels", np.concatenate([p.pixels for p in pools]).astype(float)),
    ]
    if model.kind == "seq":
        checks.append(("decoder steps per line", np.array([p.max_steps for p in pools])))
    measured_both = archive.sample_pages is not None and "n_chars" in archive.sample_lines \
        and "width_px" in archive.sample_lines
    if model.width is not None and model.width.r2 < 0.5 and not measured_both:
        what = ("line widths follow mostly the calibration lines' own" if archive.sample_pages is None
                else "characters per line follow mostly the calibration lines' own")
        msgs.append(f"{model.recogniser}: line width and characters per line are weakly related in the calibration "
                    f"(R^2 {max(model.width.r2, 0):.2f}); in this plan {what}")
    for name, vals in checks:
        if not len(vals):
            continue
        lo, hi = model.ranges[name]
        top = float(vals.max())
        if hi > 0 and top > hi * 1.0001:
            share = float((vals > hi).mean())
            rows.append({"quantity": name, "measured_max": hi, "planned_max": top, "ratio": top / hi,
                         "share_beyond": share})
            msgs.append(f"{model.recogniser}: {name} up to {top:,.0f} exceed the largest measured ({hi:,.0f}) "
                        f"by {100 * (top / hi - 1):.0f}%; the cost model is extrapolated there")
    busy = float(model.quality.get("calibration_seconds") or 0.0)
    if 0 < busy < 30:
        msgs.append(f"{model.recogniser}: the calibration covers only {busy:.1f} s of recognition; a moment's "
                    "slowness of the machine weighs on the whole fit (time the pages more than once, or more pages)")
    if archive.n_pages > model.n_pages:
        ratio = archive.n_pages / model.n_pages
        rows.append({"quantity": "pages", "measured_max": float(model.n_pages), "planned_max": float(archive.n_pages),
                     "ratio": ratio, "share_beyond": 1.0 - model.n_pages / archive.n_pages})
        if ratio > 10:
            msgs.append(f"{model.recogniser}: the archive ({archive.n_pages:,} pages) is {ratio:,.0f}x the "
                        f"{model.n_pages} calibration pages: the plan assumes each page costs what it cost in "
                        "calibration, however long the run (no drift, no slow-down over time was measured)")
    return msgs, rows


#: Default spread of a machine's speed between the calibration and the run (coefficient of variation).
#: Measured on this project's shared 2-core virtual machine: the same 60 pages took the seq recogniser
#: 30.5-39.1 s and the CTC recogniser 19.2-21.9 s in runs minutes apart (about 10 % and 5 %), while
#: three back-to-back calibration sessions of 10 pages varied by only 2-5 %: a calibration cannot see
#: the slower drift. 0.08 is between the two; pass 0 for a dedicated machine, or your own measurement.
SPEED_DRIFT = 0.08


def estimate_serial(model: CostModel, archive: Archive, *, draws: int = 2000, seed: int = 0,
                    pools: int = 20, speed_drift: float = SPEED_DRIFT) -> SerialEstimate:
    """Monte Carlo of the archive's one-worker time for one recogniser.

    Each draw uses one bootstrap refit of the cost model, one simulated pool of
    pages (itself drawn with a bootstrap refit of width-per-character, and for a
    sample a resample of its pages), a sum over the archive's pages drawn from
    the pool, the fit residuals summed over the batches and pages, and (when
    the calibration timed the same pages several times) a factor for the
    machine's speed: normal with a coefficient of variation of the larger of the
    measured session-to-session spread and ``speed_drift`` (the drift between a
    calibration and a run that the calibration cannot see; :data:`SPEED_DRIFT`).
    """
    rng = np.random.default_rng(seed)
    n_pools = max(1, min(pools, draws))
    pool_list: list[PagePool] = []
    for k in range(n_pools):
        wf = model.width if (k == 0 or model.width is None) else model.width.resampled(rng)
        pool_list.append(simulate_pool(model, archive, rng=rng, width_fit=wf))
    serial = np.empty(draws)
    chars = np.empty(draws)
    lines = np.empty(draws)
    N = archive.n_pages
    for i in range(draws):
        pool = pool_list[i % n_pools]
        theta = model.boot[i % len(model.boot)] if len(model.boot) else model.coef
        T = model.page_times(pool.X, theta)
        C = pool.n_chars.astype(float)
        L = pool.n_lines.astype(float)
        if N <= 5000:
            idx = rng.integers(0, len(T), size=N)
            s, c, l = T[idx].sum(), C[idx].sum(), L[idx].sum()
            nb = int(pool.n_batches[idx].sum())
        else:
            z = rng.standard_normal(3)
            s = N * T.mean() + math.sqrt(N) * T.std() * z[0]
            c = N * C.mean() + math.sqrt(N) * C.std() * z[1]
            l = N * L.mean() + math.sqrt(N) * L.std() * z[2]
            nb = int(round(N * pool.n_batches.mean()))
        s += _sum_of_draws(model.batch_resid, nb, rng) + _sum_of_draws(model.page_resid, N, rng)
        s += model.first_page_extra(pool.X, theta)        # nothing loads ahead of the first page
        cv = max(model.speed_cv, speed_drift)
        if cv > 0:   # the machine runs a little faster or slower than when it was calibrated
            s *= max(0.2, 1.0 + cv * rng.standard_normal())
        serial[i], chars[i], lines[i] = max(s, 0.0), c, l
    msgs, rows = _extrapolation(model, pool_list, archive)
    return SerialEstimate(model=model, archive=archive, serial_s=serial, chars=chars, lines=lines,
                          warnings=msgs + [f"{model.recogniser}: {n}" for n in model.notes], extrapolation=rows)


# --------------------------------------------------------------------------- resources, goals, money


@dataclass(frozen=True)
class Resources:
    """What runs the archive: ``machines`` x ``workers`` processes x ``threads`` each, and prices.

    Give a price per core-hour (cores reserved = workers x threads x machines)
    or per machine-hour, or neither (then money is not computed).
    """

    workers: int = 1
    threads: int | None = None            # None: as calibrated
    machines: int = 1
    price_core_hour: float | None = None
    price_machine_hour: float | None = None

    def __post_init__(self) -> None:
        if self.workers < 1 or self.machines < 1 or (self.threads is not None and self.threads < 1):
            raise PlanError("workers, threads and machines must be at least 1")
        for p in (self.price_core_hour, self.price_machine_hour):
            if p is not None and p < 0:
                raise PlanError("prices cannot be negative")


@dataclass(frozen=True)
class Goals:
    deadline_s: float | None = None
    budget: float | None = None


@dataclass(frozen=True)
class Correction:
    """Human correction effort.

    ``seconds_per_error`` defaults to :data:`DEFAULT_SECONDS_PER_ERROR` (10 s).
    Assumption and its reasoning: the edit itself (look at the error, point,
    click, retype a character) is about 3-4 s by the keystroke-level model's
    operator times (mental act 1.35 s, pointing 1.1 s, homing 0.4 s, key
    presses 0.2-0.3 s; Card, Moran & Newell 1980, from memory), and finding the
    error by comparing the text with the scan and re-checking the line roughly
    doubles to triples that; 10 s per error is the round figure in common
    practice for proof-reading with the image side by side. Measure your own
    correctors and pass their figure.
    ``price_hour``: what an hour of correction costs (None: not priced).
    """

    seconds_per_error: float = DEFAULT_SECONDS_PER_ERROR
    price_hour: float | None = None


@dataclass(frozen=True)
class AccuracyInput:
    """CER and its interval from the accuracy module's summary (``cer``, ``cer_low``, ``cer_high``)."""

    cer: float
    cer_low: float
    cer_high: float

    def __post_init__(self) -> None:
        if not (0 <= self.cer_low <= self.cer <= self.cer_high):
            raise PlanError(f"CER interval must satisfy 0 <= low <= cer <= high, got "
                            f"{self.cer_low}, {self.cer}, {self.cer_high}")

    @classmethod
    def from_summary(cls, summary: Mapping) -> "AccuracyInput":
        return cls(float(summary["cer"]), float(summary["cer_low"]), float(summary["cer_high"]))


@dataclass
class Option:
    """One recogniser on one set of resources: the row of the side-by-side table."""

    row: dict
    wall: np.ndarray
    serial: SerialEstimate


def _speedup(model: CostModel, res: Resources, scaling: ScalingFit | None) -> tuple[float, list[str]]:
    notes: list[str] = []
    threads = res.threads or model.threads
    factor = 1.0
    if threads != model.threads:
        if scaling is None:
            raise PlanError(f"{model.recogniser}: calibrated with {model.threads} thread(s); planning "
                            f"{threads} needs a scaling measurement at both")
        factor = scaling.thread_factor(threads, model.threads)
    cores = int(model.host.get("cores") or 0)
    w = res.workers
    if w > 1:
        if scaling is None:
            raise PlanError(f"{model.recogniser}: {w} workers need throughput measured at several workers on "
                            f"{model.profile} (ocrbench measure-scaling); linear scaling is not assumed")
        if cores and w * threads > cores:
            capped = max(1, cores // threads)
            notes.append(f"{model.recogniser}: {w} workers x {threads} thread(s) exceed {model.profile}'s "
                         f"{cores} cores; speed-up taken at {capped} worker(s)")
            w = capped
        s, note = scaling.speedup(w, threads)
        if note:
            notes.append(f"{model.recogniser}: {note}")
        factor *= s
    if res.machines > 1:
        notes.append(f"{model.recogniser}: {res.machines} machines assumed independent "
                     "(pages split evenly, no shared bottleneck measured)")
    return factor * res.machines, notes


def _pct(a: np.ndarray, q: float) -> float:
    return float(np.percentile(a, q))


def evaluate_option(est: SerialEstimate, res: Resources, goals: Goals, *, scaling: ScalingFit | None = None,
                    accuracy: AccuracyInput | None = None, correction: Correction = Correction(),
                    sample_size: Mapping | None = None) -> Option:
    """Wall-clock, core-hours, money, errors and correction for one recogniser on ``res``."""
    m = est.model
    speed, notes = _speedup(m, res, scaling)
    wall = m.startup_s + est.serial_s / speed
    threads = res.threads or m.threads
    cores = res.workers * threads * res.machines
    w10, w50, w90 = _pct(wall, 10), _pct(wall, 50), _pct(wall, 90)
    ch50, ch90 = w50 / 3600 * cores, w90 / 3600 * cores

    def compute_cost(wall_s: float) -> float | None:
        if res.price_core_hour is not None:
            return wall_s / 3600 * cores * res.price_core_hour
        if res.price_machine_hour is not None:
            return wall_s / 3600 * res.machines * res.price_machine_hour
        return None

    chars50 = _pct(est.chars, 50)
    row: dict = {
        "recogniser": m.recogniser, "kind": m.kind, "profile": m.profile,
        "cpu_model": m.host.get("cpu_model"), "cores": m.host.get("cores"), "workers": res.workers,
        "threads": threads, "machines": res.machines, "pages": est.archive.n_pages,
        "lines": _pct(est.lines, 50), "characters": chars50,
        "characters_p10": _pct(est.chars, 10), "characters_p90": _pct(est.chars, 90),
        "wall_seconds_p10": w10, "wall_seconds_p50": w50, "wall_seconds_p90": w90,
        "core_hours": ch50, "core_hours_p90": ch90,
        "compute_cost": compute_cost(w50), "compute_cost_p90": compute_cost(w90),
    }
    if accuracy is not None:
        errs = (accuracy.cer * chars50, accuracy.cer_low * chars50, accuracy.cer_high * chars50)
        hours = tuple(e * correction.seconds_per_error / 3600 for e in errs)
        row |= {"cer": accuracy.cer, "cer_low": accuracy.cer_low, "cer_high": accuracy.cer_high,
                "char_errors": errs[0], "char_errors_low": errs[1], "char_errors_high": errs[2],
                "correction_hours": hours[0], "correction_hours_low": hours[1], "correction_hours_high": hours[2]}
        if correction.price_hour is not None:
            row["correction_cost"] = hours[0] * correction.price_hour
            row["correction_cost_high"] = hours[2] * correction.price_hour
        else:
            row["correction_cost"] = row["correction_cost_high"] = None
    else:
        row |= {k: None for k in ("cer", "cer_low", "cer_high", "char_errors", "char_errors_low",
                                  "char_errors_high", "correction_hours", "correction_hours_low",
                                  "correction_hours_high", "correction_cost", "correction_cost_high")}
    row["seconds_per_error"] = correction.seconds_per_error
    parts = [row["compute_cost"], row["correction_cost"]]
    parts_hi = [row["compute_cost_p90"], row["correction_cost_high"]]
    row["cost"] = None if all(p is None for p in parts) else sum(p for p in parts if p is not None)
    row["cost_high"] = None if all(p is None for p in parts_hi) else sum(p for p in parts_hi if p is not None)
    if goals.deadline_s is not None:
        row["deadline_seconds"] = goals.deadline_s
        row["meets_deadline"] = bool(w90 <= goals.deadline_s)
        row["p_meets_deadline"] = float((wall <= goals.deadline_s).mean())
    else:
        row["deadline_seconds"] = row["meets_deadline"] = row["p_meets_deadline"] = None
    if goals.budget is not None:
        row["budget"] = goals.budget
        row["meets_budget"] = None if row["cost_high"] is None else bool(row["cost_high"] <= goals.budget)
    else:
        row["budget"] = row["meets_budget"] = None
    q = m.batch_quality()
    row |= {"fit_r2_batch": q["r2"], "fit_resid_sd_batch": q["resid_sd"], "fit_r2_page": q["page_r2"],
            "calibration_pages": m.n_pages}
    row["gt_sample_pages"] = None if not sample_size else sample_size.get("pages")
    row["extrapolated"] = bool(est.extrapolation and any(r["quantity"] != "pages" for r in est.extrapolation))
    row["warnings"] = est.warnings + notes
    return Option(row=row, wall=wall, serial=est)


# --------------------------------------------------------------------------- crossover


def crossover(seq: CostModel, ctc: CostModel, *, max_chars: int | None = None) -> dict:
    """Characters per line at which the autoregressive model's time per line overtakes the CTC one's.

    Both time-per-line curves come from the fitted models (full batches, no
    page overhead); the difference is solved for its sign changes on 1..max
    characters, refined by bisection.
    """
    top = int(max_chars or min(seq.max_tokens - 1, 400))
    if seq.width is None or ctc.width is None:
        return {"seq": seq.recogniser, "ctc": ctc.recogniser, "profile": seq.profile, "chars": None, "always": None,
                "text": f"crossover of {seq.recogniser} and {ctc.recogniser} not computed: line width per "
                        "character was not fitted"}
    c = np.arange(1, top + 1, dtype=float)
    d = seq.line_time(c) - ctc.line_time(c)
    out = {"seq": seq.recogniser, "ctc": ctc.recogniser, "profile": seq.profile, "max_chars": top,
           "seq_line_s_at_40": float(seq.line_time(40.0)[0]), "ctc_line_s_at_40": float(ctc.line_time(40.0)[0])}
    if (d > 0).all():
        out |= {"chars": None, "text": f"on {seq.profile}, {seq.recogniser} takes longer per line than "
                f"{ctc.recogniser} at every length from 1 to {top} characters "
                f"(at 40 characters: {1000 * out['seq_line_s_at_40']:.1f} ms vs {1000 * out['ctc_line_s_at_40']:.1f} ms)"}
        out["always"] = "seq slower"
        return out
    if (d <= 0).all():
        out |= {"chars": None, "always": "seq faster",
                "text": f"on {seq.profile}, {seq.recogniser} is no slower per line than {ctc.recogniser} "
                f"up to {top} characters"}
        return out
    i = int(np.flatnonzero((d[:-1] <= 0) & (d[1:] > 0))[0]) if ((d[:-1] <= 0) & (d[1:] > 0)).any() else None
    if i is None:   # seq slower at short lines, faster at long: report the first sign change
        i = int(np.flatnonzero(np.sign(d[:-1]) != np.sign(d[1:]))[0])
    lo, hi = c[i], c[i + 1]
    f = lambda x: float(seq.line_time(x)[0] - ctc.line_time(x)[0])  # noqa: E731
    for _ in range(60):
        mid = (lo + hi) / 2
        if (f(mid) > 0) == (f(hi) > 0):
            hi = mid
        else:
            lo = mid
    x = (lo + hi) / 2
    direction = "overtakes" if f(hi) > 0 else "falls below"
    out |= {"chars": x, "always": None,
            "text": f"on {seq.profile}, {seq.recogniser}'s time per line {direction} {ctc.recogniser}'s at "
            f"{x:.1f} characters per line ({1000 * seq.line_time(x)[0]:.2f} ms per line)"}
    return out


# --------------------------------------------------------------------------- the plan


@dataclass
class PlanInputs:
    """Everything one plan needs besides the fitted models."""

    archive: Archive
    resources: Resources = Resources()
    goals: Goals = Goals()
    correction: Correction = Correction()
    accuracy: Mapping[str, AccuracyInput] = field(default_factory=dict)
    sample_sizes: Mapping[str, Mapping] = field(default_factory=dict)
    scaling: Mapping[str, ScalingFit] = field(default_factory=dict)   # by recogniser (or profile) name
    resources_by_profile: Mapping[str, Resources] = field(default_factory=dict)
    draws: int = 2000
    seed: int = 0
    speed_drift: float = SPEED_DRIFT   # machine speed spread between calibration and run (see SPEED_DRIFT)

    def __post_init__(self) -> None:
        if not 0.0 <= self.speed_drift < 1.0:
            raise PlanError(f"speed drift must be within 0..1 (a coefficient of variation), not {self.speed_drift}")


def _scaling_for(inputs: PlanInputs, m: CostModel) -> ScalingFit | None:
    return inputs.scaling.get(f"{m.profile}/{m.recogniser}") or inputs.scaling.get(m.recogniser) \
        or inputs.scaling.get(m.profile)


def _max_workers(m: CostModel, res: Resources, scaling: ScalingFit | None) -> int:
    """The most workers one machine can be planned with: its cores, if scaling was measured to extrapolate."""
    if scaling is None:
        return 1
    threads = res.threads or m.threads
    measured = scaling.max_workers_measured(threads)
    if scaling.serial_fraction(threads) is None:
        return max(1, measured)
    cores = int(m.host.get("cores") or 0)
    return max(1, cores // threads) if cores else max(1, measured)


def _recommend(options: list[Option], inputs: PlanInputs) -> dict:
    goals = inputs.goals
    ok = [o for o in options if o.row["meets_deadline"] is not False and o.row["meets_budget"] is not False]
    key = lambda o: (o.row["cost"] if o.row["cost"] is not None else o.row["wall_seconds_p50"])  # noqa: E731
    if ok:
        best = min(ok, key=key)
        r = best.row
        what = []
        if goals.deadline_s is not None:
            what.append(f"P90 {format_duration(r['wall_seconds_p90'])} within {format_duration(goals.deadline_s)}")
        if goals.budget is not None and r["cost_high"] is not None:
            what.append(f"cost up to {r['cost_high']:,.2f} within {goals.budget:,.2f}")
        return {"recogniser": r["recogniser"], "profile": r["profile"], "workers": r["workers"],
                "machines": r["machines"], "change": None,
                "text": f"cheapest option meeting the goals: {r['recogniser']} on {r['profile']} with "
                        f"{r['workers']} worker(s) x {r['threads']} thread(s) x {r['machines']} machine(s)"
                        + (f" ({'; '.join(what)})" if what else "")}
    # Smallest change: more workers (up to the machine's cores), then more machines, then time or money.
    changes = []
    for o in options:
        m, r = o.serial.model, o.row
        res = inputs.resources_by_profile.get(m.profile, inputs.resources)
        sc = _scaling_for(inputs, m)
        for w in range(res.workers + 1, _max_workers(m, res, sc) + 1):
            try:
                alt = evaluate_option(o.serial, replace(res, workers=w), goals, scaling=sc,
                                      accuracy=inputs.accuracy.get(m.recogniser), correction=inputs.correction)
            except PlanError:
                break
            if alt.row["meets_deadline"] is not False and alt.row["meets_budget"] is not False:
                changes.append((0, w - res.workers, key(alt), {
                    "recogniser": m.recogniser, "profile": m.profile, "workers": w, "machines": res.machines,
                    "change": f"workers {res.workers} -> {w}",
                    "text": f"no option meets the goals as given; the smallest change: {m.recogniser} on "
                            f"{m.profile} with {w} workers instead of {res.workers} (P90 "
                            f"{format_duration(alt.row['wall_seconds_p90'])})"}))
                break
        if r["meets_budget"] is not False:
            for mach in range(res.machines + 1, 4 * res.machines + 65):
                try:
                    alt = evaluate_option(o.serial, replace(res, machines=mach), goals, scaling=sc,
                                          accuracy=inputs.accuracy.get(m.recogniser), correction=inputs.correction)
                except PlanError:
                    break
                if alt.row["meets_deadline"] is not False and alt.row["meets_budget"] is not False:
                    changes.append((1, mach - res.machines, key(alt), {
                        "recogniser": m.recogniser, "profile": m.profile, "workers": res.workers, "machines": mach,
                        "change": f"machines {res.machines} -> {mach}",
                        "text": f"no option meets the goals as given; the smallest change: {m.recogniser} on "
                                f"{mach} machines like {m.profile} instead of {res.machines} (P90 "
                                f"{format_duration(alt.row['wall_seconds_p90'])}; machines assumed independent)"}))
                    break
        if r["meets_deadline"] is False and r["meets_budget"] is not False:
            need = r["wall_seconds_p90"]
            changes.append((2, need / goals.deadline_s, key(o), {
                "recogniser": m.recogniser, "profile": m.profile, "workers": res.workers, "machines": res.machines,
                "change": f"deadline -> {format_duration(need)}",
                "text": f"no option meets the goals as given; the smallest change: extend the deadline to "
                        f"{format_duration(need)} (P90 of {m.recogniser} on {m.profile}, "
                        f"{format_duration(goals.deadline_s)} given)"}))
        if r["meets_budget"] is False and r["meets_deadline"] is not False:
            changes.append((3, r["cost_high"] / goals.budget, key(o), {
                "recogniser": m.recogniser, "profile": m.profile, "workers": res.workers, "machines": res.machines,
                "change": f"budget -> {r['cost_high']:,.2f}",
                "text": f"no option meets the goals as given; the smallest change: raise the budget to "
                        f"{r['cost_high']:,.2f} for {m.recogniser} on {m.profile} ({goals.budget:,.2f} given)"}))
    if not changes:
        return {"recogniser": None, "change": None,
                "text": "no option meets the goals, and no single change (workers, machines, deadline or budget) "
                        "was found that would"}
    # Prefer a change of resources; among them the smallest step, then the cheapest.
    return min(changes, key=lambda t: (t[0], t[1], t[2]))[3]


def make_plan(models: Sequence[CostModel], inputs: PlanInputs) -> pd.DataFrame:
    """The plan: one row per recogniser (per machine profile), side by side.

    ``DataFrame.attrs`` carries ``recommendation`` (dict with ``text``),
    ``crossover`` (list of dicts with ``text``), ``warnings`` (list of
    strings), ``fits`` (DataFrame of every stage fit), ``archive`` (dict) and
    ``assumptions`` (list of strings).
    """
    if not models:
        raise PlanError("no calibrated recogniser to plan with")
    options: list[Option] = []
    estimates: dict[str, SerialEstimate] = {}
    for i, m in enumerate(models):
        est = estimate_serial(m, inputs.archive, draws=inputs.draws, seed=inputs.seed + i,
                              speed_drift=inputs.speed_drift)
        estimates[f"{m.profile}/{m.recogniser}"] = est
        res = inputs.resources_by_profile.get(m.profile, inputs.resources)
        options.append(evaluate_option(est, res, inputs.goals, scaling=_scaling_for(inputs, m),
                                       accuracy=inputs.accuracy.get(m.recogniser), correction=inputs.correction,
                                       sample_size=inputs.sample_sizes.get(m.recogniser)))
    table = pd.DataFrame([o.row for o in options])
    cross = []
    for prof in dict.fromkeys(m.profile for m in models):
        seqs = [m for m in models if m.profile == prof and m.kind == "seq"]
        ctcs = [m for m in models if m.profile == prof and m.kind == "ctc"]
        cross += [crossover(s, c) for s in seqs for c in ctcs]
    warnings = list(dict.fromkeys(w for o in options for w in o.row["warnings"]))
    table.attrs["recommendation"] = _recommend(options, inputs)
    table.attrs["crossover"] = cross
    table.attrs["warnings"] = warnings
    table.attrs["fits"] = pd.concat([m.fit_table() for m in models], ignore_index=True)
    table.attrs["archive"] = inputs.archive.describe()
    table.attrs["assumptions"] = [
        f"seconds per character error: {inputs.correction.seconds_per_error:g} "
        + ("(default: keystroke-level edit of 3-4 s plus finding the error on the scan; common practice)"
           if inputs.correction.seconds_per_error == DEFAULT_SECONDS_PER_ERROR else "(given)"),
        "meets_deadline: the P90 wall-clock is within the deadline; meets_budget: compute at P90 plus "
        "correction at the CER's upper bound is within the budget",
        "wall-clock covers recognition only; human correction time is reported separately",
        f"the machine's speed may differ between calibration and run with a coefficient of variation of "
        f"{inputs.speed_drift:g}" + (" (default: measured on a shared virtual machine; 0 for a dedicated one)"
                                     if inputs.speed_drift == SPEED_DRIFT else " (given)")
        + ", or the calibration's own session-to-session spread where larger; it widens P10-P90",
        "characters per line of a segmented sample are estimated from line width (fitted px per character "
        "on the calibration's recognised lines); expected errors = CER x these characters",
    ]
    return table
