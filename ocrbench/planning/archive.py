"""The archive to plan: a page count and how its pages look, and simulated pages batched as the runner would.

Lines -> widths -> batches: the runner groups lines of similar width into
batches (``preprocess.width_batches``), so a batch's cost is not a sum of line
costs. The planner makes the archive's pages line by line, batches them as the
runner would and sums the cost model's features per page.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Mapping, Sequence

import numpy as np
import pandas as pd

from ocrbench.errors import PlanError
from ocrbench.planning.costmodel import (COEF_NAMES, DEFAULT_MAX_WIDTH, DEFAULT_MIN_WIDTH, N_BATCH, N_PAGE,
                                         CostModel, WidthFit, batch_feature_matrix, page_feature_matrix,
                                         page_figures)
from ocrbench.planning.numerics import parse_range
from ocrbench.recognisers.preprocess import width_batches

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

    def figures(self) -> dict[str, float]:
        """How the archive's pages look (medians), to compare with the calibration pages."""
        if self.sample_pages is None:
            mid = lambda r: (r[0] + r[1]) / 2  # noqa: E731
            px = [self.page_pixels] if self.page_pixels else None
            return page_figures(None, [mid(self.chars_per_line)], [mid(self.lines_per_page)], px)
        sl = self.sample_lines
        n = sl.groupby("page_id").size().reindex(self.sample_pages["page_id"]).fillna(0)
        heights = sl["crop_h"] if "crop_h" in sl else None
        chars = sl["n_chars"] if "n_chars" in sl else None
        return page_figures(heights, chars, n.to_numpy(), self.sample_pages["pixels"])

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
                width_fit: WidthFit, page_rng: np.random.Generator | None = None) -> list[tuple[np.ndarray, np.ndarray, float, list | None]]:
    """``k`` pages of (line widths, line characters, pixels, pieces) drawn from the archive description.

    ``pieces``: per line, the resized widths of the pieces the card cuts it into
    (a segmented sample measured with the card's ``split_gap``), else None.
    For a card that splits lines, line width is the sum of its pieces.
    """
    out = []
    prng = page_rng or rng       # the archive's own randomness (which pages, how many lines): shared by recognisers
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
            n = int(prng.integers(a, b + 1))
            chars = prng.integers(c0, c1 + 1, size=n)
            w = np.clip(np.round(width_fit.width(chars, rng)), DEFAULT_MIN_WIDTH, DEFAULT_MAX_WIDTH)
            out.append((w, chars, float(px), None))
        return out
    sl = archive.sample_lines
    groups = {pid: g for pid, g in sl.groupby("page_id", sort=False)}
    pick = prng.integers(0, len(archive.sample_pages), size=k)
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


def batch_units(model: CostModel, w: np.ndarray, chars: np.ndarray, pieces: list | None,
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
                  pages: int | None = None, width_fit: WidthFit | None = None,
                  page_rng: np.random.Generator | None = None) -> PagePool:
    """Make pages as the archive describes them, batch them as the runner would, sum their features."""
    wf = width_fit or model.width
    k = pages or (len(archive.sample_pages) if archive.sample_pages is not None else 200)
    rows, nb, nl, nc, all_w, pix = [], [], [], [], [], []
    pmax = smax = 0.0
    for w, chars, px, pieces in _page_lines(model, archive, rng, k, wf, page_rng):
        v = np.zeros(len(COEF_NAMES))
        if len(w):
            uw, ut = batch_units(model, w, chars, pieces, rng)
            tokens = np.minimum(ut, model.max_tokens - 1) if model.kind == "seq" else None
            v[:N_BATCH], n_b, p, st = _page_batch_features(uw, tokens, model)
            nb.append(n_b)
            pmax, smax = max(pmax, p), max(smax, st)
            all_w.append(w)
        else:
            nb.append(0)
        v[N_BATCH:N_BATCH + N_PAGE] = page_feature_matrix([px], [len(w)])[0]
        v[-1] = 1.0
        rows.append(v)
        nl.append(len(w))
        nc.append(int(np.sum(chars)))
        pix.append(px)
    widths = np.concatenate(all_w) if all_w else np.zeros(0)
    return PagePool(X=np.array(rows), n_batches=np.array(nb), n_lines=np.array(nl), n_chars=np.array(nc),
                    max_width=float(widths.max(initial=0.0)), max_padded=pmax, max_steps=smax,
                    widths=widths, pixels=np.array(pix))


def _chars_r2(fit: WidthFit) -> float:
    """Share of the calibration's characters-per-line variance that the fit of characters on width explains."""
    v = float(np.var(fit.chars_seen)) if len(fit.chars_seen) > 1 else 0.0
    return 1.0 - float(np.var(fit.chars_resid)) / v if v > 0 and len(fit.chars_resid) else 0.0


def _fitted_width(model: CostModel, lines: pd.DataFrame) -> tuple[np.ndarray, str]:
    """Each sample line's width measured as ``model``'s calibration widths were (the fit applies to that width):
    the sum of the pieces a card that cuts lines at blank gaps reads (ink only), else the whole line."""
    col = f"pieces_{model.split_gap:g}"
    if model.split_gap > 0 and col in lines:
        w = [float(np.sum(_resized(pw, h, model.line_height))) if len(pw) else 0.0
             for pw, h in zip(lines[col], lines["crop_h"])]
        return np.asarray(w, dtype=float), "width of the ink, blank gaps left out"
    return _resized_width(lines["crop_w"], lines["crop_h"], model.line_height), "width of the whole line"


def with_shared_characters(archive: Archive, models: Sequence[CostModel]) -> tuple[Archive, str | None]:
    """A segmented sample's characters per line, estimated once for every recogniser.

    A segmented sample has line shapes but no text. Each recogniser's calibration fitted characters on
    the line width *as that recogniser measured it*: the whole line, or for a card that cuts lines at
    blank gaps the sum of its pieces (ink only). The fit that explains most of the calibration's
    characters-per-line variance (R^2 of characters on width) is applied to the sample's lines, each
    measured the same way, and written into the sample, so every recogniser plans the same characters
    (and the same errors per CER). Measured on bench_plan_whole's held-out renderer (DejaVu Sans, an
    amount column far right): the whole-line fit of the splitting card read 66.7 characters per line
    against 35.7 true (+87 %), because the blank gap before the amount counted as characters; the same
    fit on the ink width reads 35.6. Samples that already hold characters (a run store) are returned as
    they are.
    """
    sl = archive.sample_lines
    if archive.sample_pages is None or sl is None or "n_chars" in sl or not {"crop_w", "crop_h"} <= set(sl):
        return archive, None
    fits = [m for m in models if m.width is not None]
    if not fits:
        return archive, None
    best = max(fits, key=lambda m: (_chars_r2(m.width), m.split_gap > 0, m.recogniser))
    widths, how = _fitted_width(best, sl)
    est = best.width.chars(widths)
    lines = sl.copy()
    lines["n_chars"] = np.maximum(1, np.round(est)).astype(np.int64)
    others = "; ".join(f"{m.recogniser} R^2 {_chars_r2(m.width):.2f}" for m in fits if m is not best)
    note = (f"characters per line of the sample are estimated once for every recogniser from its line shapes: "
            f"{best.recogniser}'s calibration fit of characters on the {how} (R^2 {_chars_r2(best.width):.2f}"
            + (f"; not used: {others}" if others else "") + "), so every recogniser plans the same archive"
            + ("; line width says little about characters here (R^2 below 0.3): the estimate is close to the "
               "calibration's own characters per line, and errors (CER x characters) are as uncertain; describe "
               "the archive by a run store (--archive-store) to count them" if _chars_r2(best.width) < 0.3 else ""))
    return replace(archive, sample_lines=lines), note
