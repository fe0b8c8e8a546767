"""The cost model: a recogniser's time per batch, per page and between pages, fitted on a calibration store.

Every cost term is a coefficient fitted by non-negative least squares (Lawson &
Hanson 1974, *Solving Least Squares Problems*, ch. 23) on the store's
``batches`` and ``pages`` tables. For each stage several plausible shapes are
tried (e.g. whether a batch keeps decoding every line until its longest one
ends, or lets finished lines go) and the one that predicts held-out pages best
(cross-validation by page) is kept. Start-up and the time between pages come
from the store's timestamps (:mod:`ocrbench.planning.timeline`) or from a timed
session (``ocrbench measure-scaling``).
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Iterable, Mapping, Sequence

import numpy as np
import pandas as pd

from ocrbench.errors import PlanError
from ocrbench.planning.numerics import nnls
from ocrbench.planning.timeline import page_key, timeline
from ocrbench.recognisers.preprocess import width_batches

# --------------------------------------------------------------------------- constants

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
N_BATCH, N_PAGE = len(BATCH_FEATURES), len(PAGE_FEATURES)


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
            v[N_BATCH + PAGE_FEATURES.index(f)] += c
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
    process_start_s: float = 0.0       # a new process: interpreter and imports, before the run starts (measured)
    cluster_start_s: float = 0.0       # a local Dask cluster's start and close, once per run of several workers
    close_s: float = 0.0               # the last page until a serial run returned (the store finished; measured)
    dask_start_close_s: dict = field(default_factory=dict)   # K -> a measured K-worker Dask run's start + close
    figures: dict = field(default_factory=dict)   # the calibration pages' look (medians), see page_figures
    slower_than: str | None = None     # measured slower than another configuration of it (planning.configs)

    def _parts(self, X: np.ndarray, coef: np.ndarray | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Per page: batch time, page overhead, and the part of them loading ahead hides."""
        c = self.coef if coef is None else coef
        b = X[:, :N_BATCH] @ c[:N_BATCH]
        o = X[:, N_BATCH:N_BATCH + N_PAGE] @ c[N_BATCH:N_BATCH + N_PAGE]
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
        return X @ (self.coef if coef is None else coef)[:N_BATCH]

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
        return k * (X @ self.coef[:N_BATCH]) / B


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


@dataclass
class _Calibration:
    """One recogniser's calibration rows (pages finished, their batches and lines) and the runner's settings."""

    ids: list[int]
    kind: str
    host: dict
    settings: dict
    pages: pd.DataFrame
    batches: pd.DataFrame
    lines: pd.DataFrame


def _select(frames: Mapping[str, pd.DataFrame], recogniser: str, run_ids: Sequence[int] | None) -> _Calibration:
    """Every run of ``recogniser`` with the settings of its latest run (or the given ``run_ids``)."""
    runs = frames["runs"]
    mine = runs[runs["recogniser"] == recogniser].sort_values("run_id")
    if run_ids is not None:
        mine = mine[mine["run_id"].isin(list(run_ids))]
    if mine.empty:
        raise PlanError(f"no run of recogniser {recogniser!r} in the calibration store")
    mine = mine[mine["settings_json"] == mine["settings_json"].iloc[-1]]
    ids = [int(r) for r in mine["run_id"]]
    kind = str(mine["kind"].iloc[-1])
    if kind not in STAGE_CANDIDATES:
        raise PlanError(f"recogniser {recogniser!r} has unknown kind {kind!r}")
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
    return _Calibration(ids=ids, kind=kind, host=_host_of(mine), settings=_settings_of(mine), pages=pages,
                        batches=batches, lines=lines)


def _runner_settings(cal: _Calibration, width_multiple: int | None, line_height: int | None) -> dict:
    """Batch size, padding, geometry and threads the calibration ran with (the runner's defaults where unrecorded)."""
    s, host = cal.settings, cal.host
    batch_size = int(_deep_get(s, "batch_size", default=DEFAULT_BATCH_SIZE))
    return {
        "width_multiple": int(width_multiple or _deep_get(s, "width_multiple", default=DEFAULT_WIDTH_MULTIPLE)),
        "batch_size": max(batch_size, int(cal.batches["n_lines"].max())),
        "max_pad_ratio": float(_deep_get(s, "max_pad_ratio", default=DEFAULT_MAX_PAD_RATIO)),
        "line_height": int(line_height or _deep_get(s, "line_height", "height", default=DEFAULT_LINE_HEIGHT)),
        "max_tokens": int(_deep_get(s, "max_tokens", default=None) or DEFAULT_MAX_TOKENS),
        "threads": int(_deep_get(s, "intra_threads", default=None) or host.get("intra_threads") or 1),
    }


def _fit_batch_stages(cal: _Calibration, X: np.ndarray, groups: np.ndarray) -> list[StageFit]:
    stages: list[StageFit] = []
    for stage, cands in STAGE_CANDIDATES[cal.kind].items():
        y = cal.batches[stage].to_numpy(dtype=float) if stage in cal.batches else np.zeros(len(cal.batches))
        y = np.nan_to_num(y)
        if float(np.abs(y).max(initial=0.0)) <= 1e-9:
            continue   # stage not used by this recogniser
        stages.append(_fit_stage(stage, X, y, groups, cands, BATCH_FEATURES))
    return stages


@dataclass
class _PageOverhead:
    """Whatever a page costs outside its batches, and the page-level arrays the rest of the fit uses."""

    keys: np.ndarray          # page keys (run, page)
    batch_total: pd.Series    # per batch: sum of its stage times
    batch_time: np.ndarray    # per page: its batches' time
    y: np.ndarray             # per page: overhead (target of the page fit)
    target: str
    X: np.ndarray             # page feature rows
    fit: StageFit
    pixels: np.ndarray
    lines: np.ndarray
    notes: list[str]


def _fit_page_overhead(cal: _Calibration, batch_keys: pd.Series) -> _PageOverhead:
    pages, batches = cal.pages, cal.batches
    notes = []
    batch_total = batches[[c for c in BATCH_STAGES if c in batches]].fillna(0).sum(axis=1)
    pkeys = np.array([page_key(a, b) for a, b in zip(pages["run_id"], pages["page_id"])])
    batch_time = batch_total.groupby(batch_keys).sum().reindex(pkeys).fillna(0.0).to_numpy()
    if "t_total" in pages and pages["t_total"].notna().all():
        y_page = pages["t_total"].to_numpy(dtype=float) - batch_time
        target = "t_total less batch time"
    else:
        cols = [c for c in ("t_load", "t_segment", "t_postprocess") if c in pages]
        y_page = pages[cols].fillna(0).sum(axis=1).to_numpy(dtype=float)
        target = "+".join(cols)
        notes.append("pages.t_total missing: page overhead fitted on " + target)
    pixels = (pages["width"].astype(float) * pages["height"].astype(float)).to_numpy()
    lpp = pages["n_lines"].to_numpy(dtype=float)
    Xp = page_feature_matrix(pixels, lpp)
    fit = _fit_stage("page overhead", Xp, y_page, pkeys, PAGE_CANDIDATES, PAGE_FEATURES)
    return _PageOverhead(keys=pkeys, batch_total=batch_total, batch_time=batch_time, y=y_page, target=target,
                         X=Xp, fit=fit, pixels=pixels, lines=lpp, notes=notes)


@dataclass
class _BetweenPages:
    gap_mean: float
    gaps: np.ndarray          # per page (NaN where unknown)
    startup: float
    overlap: float
    speed_cv: float
    notes: list[str]


def _overlap_from_session(session: Mapping, pages: pd.DataFrame, po: _PageOverhead,
                          gap_mean: float) -> tuple[float, float, str]:
    """The runner overlapped pages (loading the next while recognising this one): the session was
    shorter than its pages' own times. A page's wall time is modelled as
    batch + overhead - overlap * min(batch, overhead), overlap fitted to the session."""
    sel = np.ones(len(po.keys), dtype=bool)
    if session.get("run_id") is not None:
        sel = (pages["run_id"] == int(session["run_id"])).to_numpy()
        sel = sel if sel.any() else np.ones(len(po.keys), dtype=bool)
    shorter = np.minimum(po.batch_time[sel], np.maximum(po.y[sel], 0.0))
    n_sel = int(sel.sum())
    overlap = 0.0
    if n_sel >= 2 and shorter[1:].sum() > 0:
        # The first page of a session is loaded while nothing else runs: only the others can
        # hide their loading (a 10-page session hides at most ~90 %). Pages run in page-id
        # order (the runner's order, which the store's frames keep).
        chance = float(shorter[1:].sum()) / n_sel          # per page of the session
        overlap = min(1.0, -gap_mean / chance)
        gap_mean = min(0.0, gap_mean + overlap * chance)
    note = (f"pages overlapped in the timed session (loading ahead): {100 * overlap:.0f}% of the "
            "shorter of a page's recognition and its loading is hidden")
    return overlap, gap_mean, note


def _runs_spread(cal: _Calibration) -> tuple[float, int]:
    """Spread (coefficient of variation) of the time the same pages took in different runs of this
    recogniser and settings (e.g. ``ocrbench run`` and a ``measure-scaling`` session), and the runs compared."""
    p = cal.pages.dropna(subset=["t_total"])
    if p["run_id"].nunique() < 2:
        return 0.0, 1
    common = set.intersection(*[set(g["page_id"]) for _, g in p.groupby("run_id")])
    if len(common) < 2:
        return 0.0, 1
    totals = p[p["page_id"].isin(common)].groupby("run_id")["t_total"].sum().to_numpy(dtype=float)
    return float(totals.std(ddof=1) / totals.mean()), len(totals)


def _between_pages(frames: Mapping[str, pd.DataFrame], cal: _Calibration, po: _PageOverhead,
                   session: Mapping | None) -> _BetweenPages:
    """Start-up and the time between pages: from a timed session where given, else from the store's timestamps."""
    notes: list[str] = []
    gaps, startup, tl_notes = timeline(frames["runs"], frames["pages"], cal.ids)
    my_gaps = np.array([gaps.get(k, np.nan) for k in po.keys], dtype=float)
    gap_mean = float(np.nanmean(my_gaps)) if np.isfinite(my_gaps).any() else 0.0
    overlap = 0.0
    speed_cv = float((session or {}).get("speed_cv") or 0.0)
    if session and int(session.get("sessions") or 1) >= 2:
        notes.append(f"the machine's speed varied by {100 * speed_cv:.1f}% (coefficient of variation) between "
                     f"{int(session['sessions'])} timed sessions of the same pages; the interval includes it")
    runs_cv, n_runs = _runs_spread(cal)
    if n_runs >= 2:
        notes.append(f"the same pages took {100 * runs_cv:.1f}% longer or shorter (coefficient of variation) "
                     f"across {n_runs} runs of this recogniser (e.g. `ocrbench run` and `measure-scaling`); "
                     "the interval includes the larger of the measured spreads")
        speed_cv = max(speed_cv, runs_cv)
    if session:
        # measured directly around a run (ocrbench.run.measure): more precise than store timestamps
        gap_mean = float(session.get("gap_seconds_per_page", gap_mean) or 0.0)
        startup = float(session.get("startup_seconds", startup or 0.0) or 0.0)
        if gap_mean < 0:
            overlap, gap_mean, note = _overlap_from_session(session, cal.pages, po, gap_mean)
            notes.append(note)
        my_gaps = np.full(len(po.keys), gap_mean)
    else:
        notes += tl_notes
    return _BetweenPages(gap_mean=gap_mean, gaps=my_gaps, startup=float(startup or 0.0), overlap=overlap,
                         speed_cv=speed_cv, notes=notes)


def _bootstrap(cal: _Calibration, X: np.ndarray, groups: np.ndarray, stages: Sequence[StageFit],
               po: _PageOverhead, bp: _BetweenPages, n_boot: int, seed: int) -> np.ndarray:
    """Bootstrap over pages: refit every stage with its chosen shape on resampled pages."""
    rng = np.random.default_rng(seed)
    pkeys = po.keys
    by_key = {k: np.flatnonzero(groups == k) for k in np.unique(groups)}
    empty = np.zeros(0, dtype=int)
    col = {n: i for i, n in enumerate(BATCH_FEATURES)}
    pcol = [PAGE_FEATURES.index(f) for f in po.fit.features]
    stage_y = {s.stage: np.nan_to_num(cal.batches[s.stage].to_numpy(dtype=float)) for s in stages}
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
        c, _ = nnls(po.X[np.ix_(prow, pcol)], po.y[prow])
        for f, cf in zip(po.fit.features, c):
            v[N_BATCH + PAGE_FEATURES.index(f)] += cf
        g = bp.gaps[prow]
        v[-1] = float(np.nanmean(g)) if np.isfinite(g).any() else bp.gap_mean
        boot[b] = v
    return boot


def _width_and_ranges(cal: _Calibration, po: _PageOverhead) -> tuple[WidthFit | None, dict, pd.DataFrame, list[str]]:
    """Width per character (when the lines support it) and the ranges the calibration measured."""
    notes = []
    ln = cal.lines.dropna(subset=["width_px", "n_chars"])
    try:
        width: WidthFit | None = fit_width(ln["n_chars"].to_numpy(dtype=float), ln["width_px"].to_numpy(dtype=float))
    except PlanError as e:
        width = None
        notes.append(f"line width per character not fitted ({e}); plans must describe the archive by a run "
                     "store, where characters and widths are both measured")
    b = cal.batches
    ranges = {
        "line width (px)": (float(ln["width_px"].min()), float(ln["width_px"].max())),
        "characters per line": (float(ln["n_chars"].min()), float(ln["n_chars"].max())),
        "batch padded width (px)": (float(b["padded_width"].min()), float(b["padded_width"].max())),
        "lines per page": (float(po.lines.min()), float(po.lines.max())),
        "page pixels": (float(po.pixels.min()), float(po.pixels.max())),
    }
    if cal.kind == "seq":
        ranges["decoder steps per line"] = (float(b["steps_max"].min()), float(b["steps_max"].max()))
    return width, ranges, ln, notes


def page_figures(line_heights, chars_per_line, lines_per_page, page_pixels) -> dict[str, float]:
    """How pages look, as medians: what a calibration and an archive sample are compared on."""
    out = {}
    for name, v in (("line height (px)", line_heights), ("characters per line", chars_per_line),
                    ("lines per page", lines_per_page), ("page size (megapixels)", page_pixels)):
        a = np.asarray(v if v is not None else [], dtype=float)
        a = a[np.isfinite(a)]
        if len(a):
            out[name] = float(np.median(a)) / (1e6 if name.startswith("page size") else 1.0)
    return out


def _calibration_figures(cal: _Calibration, po: _PageOverhead) -> dict[str, float]:
    ln = cal.lines
    heights = (ln["y1"] - ln["y0"]).to_numpy(dtype=float) if {"y0", "y1"} <= set(ln.columns) else None
    return page_figures(heights, ln["n_chars"].to_numpy(dtype=float) if "n_chars" in ln else None, po.lines,
                        po.pixels)


def fit_cost_model(frames: Mapping[str, pd.DataFrame], recogniser: str, *,
                   run_ids: Sequence[int] | None = None, profile: str | None = None,
                   line_height: int | None = None, width_multiple: int | None = None, split_gap: float = 0.0,
                   session: Mapping | None = None, n_boot: int = 200, seed: int = 0) -> CostModel:
    """Fit one recogniser's cost model on a store's tables (``runs``, ``pages``, ``batches``, ``lines``).

    Uses every run of ``recogniser`` that has the same settings as its latest
    run (or the given ``run_ids``). ``session``: a timed session's start-up,
    time between pages and speed spread (``ocrbench measure-scaling``), which
    win over the store's timestamps. Raises :class:`PlanError` with a reason
    when the data cannot support a fit.
    """
    cal = _select(frames, recogniser, run_ids)
    rs = _runner_settings(cal, width_multiple, line_height)
    batches = cal.batches
    key = pd.Series([page_key(a, b) for a, b in zip(batches["run_id"], batches["page_id"])], index=batches.index)
    X = batch_feature_matrix(batches["n_lines"], batches["padded_width"], batches["sum_width"],
                             batches["steps_max"].fillna(0), batches["tokens_sum"].fillna(0),
                             batches["tokens_sq_sum"].fillna(0), width_multiple=rs["width_multiple"])
    groups = key.to_numpy()
    stages = _fit_batch_stages(cal, X, groups)
    po = _fit_page_overhead(cal, key)
    bp = _between_pages(frames, cal, po, session)
    coef = _coef_vector(stages, po.fit, bp.gap_mean)
    y_tot = po.batch_total.to_numpy(dtype=float)
    batch_resid = y_tot - X @ coef[:N_BATCH]
    page_resid = po.y - po.X @ coef[N_BATCH:N_BATCH + N_PAGE]
    boot = _bootstrap(cal, X, groups, stages, po, bp, n_boot, seed)
    width, ranges, ln, w_notes = _width_and_ranges(cal, po)
    quality = {
        "r2": _r2(y_tot, batch_resid), "resid_sd": float(batch_resid.std(ddof=1)),
        "resid_p10": float(np.percentile(batch_resid, 10)), "resid_p90": float(np.percentile(batch_resid, 90)),
        "relative_resid_median": float(np.median(np.abs(batch_resid) / np.maximum(np.abs(y_tot), 1e-12))),
        "page_r2": po.fit.r2, "page_resid_sd": po.fit.resid_sd,
        "calibration_seconds": float(cal.pages["t_total"].sum()) if "t_total" in cal.pages else None,
    }
    return CostModel(
        recogniser=recogniser, kind=cal.kind, profile=profile or str(cal.host.get("hostname") or "this machine"),
        host=cal.host, run_ids=cal.ids, **rs, stages=stages, page=po.fit, page_target=po.target,
        gap_per_page=bp.gap_mean, startup_s=bp.startup, coef=coef, boot=boot, batch_resid=batch_resid,
        page_resid=page_resid, width=width, ranges=ranges, n_pages=len(cal.pages), n_lines=len(ln),
        n_batches=len(batches), quality=quality, notes=po.notes + bp.notes + w_notes, overlap=bp.overlap,
        speed_cv=bp.speed_cv, split_gap=float(split_gap or 0.0),
        process_start_s=max(0.0, float((session or {}).get("process_start_seconds") or 0.0)),
        cluster_start_s=max(0.0, float((session or {}).get("cluster_start_seconds") or 0.0)),
        close_s=max(0.0, float((session or {}).get("close_seconds") or 0.0)),
        dask_start_close_s={int(k): max(0.0, float(v)) for k, v in ((session or {}).get("dask_start_close") or {}).items()},
        figures=_calibration_figures(cal, po),
        pieces_per_line=float(batches["n_lines"].sum() / max(1.0, float(po.lines.sum()))) if split_gap else 1.0)


def fit_cost_models(frames: Mapping[str, pd.DataFrame], *, profile: str | None = None,
                    recognisers: Iterable[str] | None = None, n_boot: int = 200, seed: int = 0) -> dict[str, CostModel]:
    """A :class:`CostModel` for every recogniser in a store (or the named ones)."""
    names = list(recognisers) if recognisers is not None else sorted(frames["runs"]["recogniser"].unique())
    if not names:
        raise PlanError("the calibration store holds no runs")
    return {n: fit_cost_model(frames, n, profile=profile, n_boot=n_boot, seed=seed) for n in names}
