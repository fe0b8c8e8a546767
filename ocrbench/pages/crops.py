"""Line crops: the grey page cut around a line box with paper margins, and their clean-up
(shading flattened, rules painted out, paper above and below the text trimmed) as the card's
``[input] flatten`` / ``remove_rules`` / ``trim`` steps."""

from __future__ import annotations

import numpy as np

from ocrbench.pages.binarise import otsu_threshold
from ocrbench.pages.components import row_runs

#: Padding of a line crop around its ink box, as a share of the box height
#: (the demo recognisers were trained with 5-35 % above/below, 5-50 % at the sides).
CROP_PAD_VERTICAL = 0.18
CROP_PAD_HORIZONTAL = 0.25


def crop_line(gray: np.ndarray, box: tuple[int, int, int, int],
              others: list[tuple[int, int, int, int]]) -> np.ndarray:
    """Grey crop of a line box with paper margins; neighbouring lines' ink in the margin is blanked."""
    x0, y0, x1, y1 = box
    h, w = gray.shape
    bh = y1 - y0
    pv = max(2, int(round(CROP_PAD_VERTICAL * bh)))
    ph = max(2, int(round(CROP_PAD_HORIZONTAL * bh)))
    cy0, cy1, cx0, cx1 = y0 - pv, y1 + pv, x0 - ph, x1 + ph
    sy0, sy1, sx0, sx1 = max(0, cy0), min(h, cy1), max(0, cx0), min(w, cx1)
    region = gray[sy0:sy1, sx0:sx1]
    paper = int(np.percentile(region, 90)) if region.size else 255
    crop = np.full((cy1 - cy0, cx1 - cx0), paper, dtype=np.uint8)
    crop[sy0 - cy0: sy1 - cy0, sx0 - cx0: sx1 - cx0] = region
    for ox0, oy0, ox1, oy1 in others:
        # rows of a neighbour's box that fall in this crop's margin (outside this box)
        for ra, rb in ((max(oy0, cy0), min(oy1, y0)), (max(oy0, y1), min(oy1, cy1))):
            if rb > ra and ox1 > cx0 and ox0 < cx1:
                crop[ra - cy0: rb - cy0, max(ox0, cx0) - cx0: min(ox1, cx1) - cx0] = paper
    return crop


# --------------------------------------------------------------------------- clean-up of a crop

#: A row run of ink at least this many crop heights long is a rule (a letter or a joined
#: stroke of handwriting is never that long in one pixel row).
RULE_MIN_LENGTH = 3.0
#: A column run of ink over this share of the crop height is a rule: the crop adds
#: CROP_PAD_VERTICAL of the box height above and below, so a letter spans at most
#: 1 / (1 + 2 * 0.18) = 0.74 of it.
RULE_MIN_HEIGHT = 0.85


def _running_max(a: np.ndarray, k: int, axis: int) -> np.ndarray:
    """Maximum over a centred window of ``k`` along ``axis`` (edges padded by repetition)."""
    pad = [(0, 0), (0, 0)]
    pad[axis] = (k // 2, k - 1 - k // 2)
    padded = np.pad(a, pad, mode="edge")
    windows = np.lib.stride_tricks.sliding_window_view(padded, k, axis=axis)
    return windows.max(axis=-1)


def flatten_crop(crop: np.ndarray) -> np.ndarray:
    """Divide out the paper's shading along a line crop.

    Each column's paper level is the median of its pixels (a column crosses a
    letter and more paper above and below it; the median also ignores the margin
    rows :func:`crop_line` blanks with the page's paper), widened by a running maximum over
    one crop height (so columns filled by ink still reach paper) and smoothed over
    the same window; the crop is divided by it, so paper becomes 255 and ink keeps
    its contrast to the paper around it (background division, the illumination
    flattening used on page images; common practice).
    """
    g = np.asarray(crop, dtype=np.uint8)
    if g.ndim != 2 or min(g.shape) < 2:
        return g.copy()
    h, w = g.shape
    k = max(3, min(w, h))
    column = np.median(g, axis=0).astype(np.float32)[None, :]
    level = _running_max(column, k, axis=1)[0]
    padded = np.pad(level, (k // 2, k - 1 - k // 2), mode="edge")
    level = np.convolve(padded, np.ones(k, np.float32) / k, mode="valid")
    level = np.maximum(level, 32.0)          # a dark blotch is not paper: never divide by ~0
    return np.clip(g.astype(np.float32) * (255.0 / level[None, :]), 0, 255).astype(np.uint8)


def _rule_runs(ink: np.ndarray) -> np.ndarray:
    """The ink pixels of a crop's rules: row runs of at least RULE_MIN_LENGTH crop heights and column runs over
    RULE_MIN_HEIGHT of the height (looked for only in the rows and columns with ink enough to hold one)."""
    h = ink.shape[0]
    rule = np.zeros_like(ink)
    rows_in = np.flatnonzero(ink.sum(axis=1) >= RULE_MIN_LENGTH * h)
    if rows_in.size:
        r, a, b = row_runs(ink[rows_in])
        keep = (b - a) >= RULE_MIN_LENGTH * h
        for i, x, y in zip(rows_in[r[keep]], a[keep], b[keep]):
            rule[i, x:y] = True
    cols_in = np.flatnonzero(ink.sum(axis=0) > RULE_MIN_HEIGHT * h)
    if cols_in.size:
        c, a, b = row_runs(np.ascontiguousarray(ink[:, cols_in].T))
        keep = (b - a) > RULE_MIN_HEIGHT * h
        for i, x, y in zip(cols_in[c[keep]], a[keep], b[keep]):
            rule[x:y, i] = True
    return rule


def remove_crop_rules(crop: np.ndarray) -> np.ndarray:
    """Paint out long horizontal and vertical rules that cross or bound a line crop.

    Ink is Otsu's threshold of the flattened crop (N. Otsu, 1979); row runs of at least
    :data:`RULE_MIN_LENGTH` crop heights and column runs over :data:`RULE_MIN_HEIGHT`
    of the height are rules; they and their one-pixel fringe become paper (the
    crop's 90th percentile). Letters crossed by a rule lose only the rule's pixels.
    """
    g = np.asarray(crop, dtype=np.uint8)
    if g.ndim != 2 or min(g.shape) < 4:
        return g.copy()
    flat = flatten_crop(g)                    # shading would pass for ink
    lo, hi = np.percentile(flat, 2), np.percentile(flat, 98)
    if hi - lo < 30:                          # no ink to speak of
        return g.copy()
    rule = _rule_runs(flat <= otsu_threshold(flat))
    if not rule.any():
        return g.copy()
    grown = rule.copy()
    grown[1:, :] |= rule[:-1, :]
    grown[:-1, :] |= rule[1:, :]
    grown[:, 1:] |= rule[:, :-1]
    grown[:, :-1] |= rule[:, 1:]
    out = g.copy()
    out[grown] = int(np.percentile(g, 90))
    return out


#: ``trim`` keeps this share of the text's height as paper above and below it (inside the 5-35 % the demo
#: recognisers were trained with) ...
TRIM_MARGIN = 0.2
#: ... and cuts only a crop at least this much taller than the text with those margins.
TRIM_MIN_GAIN = 1.25
#: Rows of the x-height band carry at least this share of the fullest row's ink.
TRIM_CORE_SHARE = 0.3
#: Ascenders and capitals reach at most this many band heights above the band, descenders below it.
TRIM_REACH_UP, TRIM_REACH_DOWN = 1.0, 0.8
#: A second band of rows with at least this share of the first one's ink is a second line of text (a
#: segmenter's box around two lines): such a crop is not trimmed.
TRIM_SECOND_LINE = 0.5
#: A row with this many times the ink of every row two to four rows above and below it is a horizontal
#: rule (a letter's rows change gradually; a rule is one to three rows thick even blurred).
TRIM_SPIKE = 3.0


def _rule_rows(profile: np.ndarray) -> np.ndarray:
    """Rows of a crop's ink profile that belong to a horizontal rule: rows with TRIM_SPIKE times the ink of
    each row two to four rows away on both sides (outside the crop counts as no ink), and the two rows on
    either side of them (the rule's blurred edges)."""
    n = len(profile)
    padded = np.concatenate([np.zeros(4), profile.astype(np.float64), np.zeros(4)])
    near = np.max([padded[4 + d: 4 + d + n] for d in (-4, -3, -2, 2, 3, 4)], axis=0)
    spike = profile > TRIM_SPIKE * near + 2
    grown = spike.copy()
    for d in (1, 2):
        grown[d:] |= spike[:-d]
        grown[:-d] |= spike[d:]
    return grown


def _text_rows(ink: np.ndarray) -> tuple[int, int] | None:
    """The rows a line's letters occupy, or None where it has no ink.

    Horizontal rules left out (:func:`_rule_rows`), the x-height band is the run of rows with at least
    TRIM_CORE_SHARE of the fullest row's ink (gaps of two rows bridged) that holds the most ink (None where another
    such run holds TRIM_SECOND_LINE of its ink: two lines in one crop); it is grown
    through the rows above and below that still hold ink, by at most TRIM_REACH_UP band heights above and
    TRIM_REACH_DOWN below, so specks, rules and a neighbour's strokes far from the text do not count."""
    profile = ink.sum(axis=1).astype(np.float64)
    profile[_rule_rows(profile)] = 0
    if profile.max() <= 0:
        return None
    core = np.flatnonzero(profile >= TRIM_CORE_SHARE * profile.max())
    runs = np.split(core, np.flatnonzero(np.diff(core) > 2) + 1)
    weights = sorted((profile[r[0]: r[-1] + 1].sum(), i) for i, r in enumerate(runs))
    if len(weights) > 1 and weights[-2][0] >= TRIM_SECOND_LINE * weights[-1][0]:
        return None                            # two lines of text in one crop: which to keep is not ours to say
    best = runs[weights[-1][1]]
    top, bottom = int(best[0]), int(best[-1]) + 1
    band = bottom - top
    floor = max(1.0, 0.02 * profile.max())
    lo = max(0, top - int(np.ceil(TRIM_REACH_UP * band)))
    while top > lo and profile[top - 1] >= floor:
        top -= 1
    hi = min(len(profile), bottom + int(np.ceil(TRIM_REACH_DOWN * band)))
    while bottom < hi and profile[bottom] >= floor:
        bottom += 1
    return top, bottom


def trim_rows(crop: np.ndarray, *, flattened: bool = False) -> tuple[int, int]:
    """The rows :func:`trim_crop` keeps, ``(top, bottom)``: the text's rows with TRIM_MARGIN of their height
    above and below, or the whole crop where that would not make it TRIM_MIN_GAIN times lower.

    The text's rows are found on Otsu's ink of the flattened crop (N. Otsu, 1979), without its rules
    (:func:`_rule_runs`, :func:`_text_rows`). ``flattened``: the crop's shading was divided out already.
    """
    g = np.asarray(crop, dtype=np.uint8)
    whole = (0, g.shape[0] if g.ndim else 0)
    if g.ndim != 2 or min(g.shape) < 8:
        return whole
    flat = g if flattened else flatten_crop(g)
    cdf = np.cumsum(np.bincount(flat.ravel(), minlength=256))
    lo, hi = np.searchsorted(cdf, 0.02 * cdf[-1]), np.searchsorted(cdf, 0.98 * cdf[-1])   # 2nd, 98th percentiles
    if hi - lo < 30:                          # no ink to speak of
        return whole
    ink = flat <= otsu_threshold(flat)
    ink &= ~_rule_runs(ink)                   # rules, underlines, column rules through the crop
    rows = _text_rows(ink)
    if rows is None:
        return whole
    top, bottom = rows
    margin = int(np.ceil(TRIM_MARGIN * (bottom - top))) + 1
    top, bottom = max(0, top - margin), min(g.shape[0], bottom + margin)
    return (top, bottom) if g.shape[0] >= TRIM_MIN_GAIN * (bottom - top) else whole


def trim_crop(crop: np.ndarray, *, flattened: bool = False) -> np.ndarray:
    """Cut the paper above and below a line's text down to TRIM_MARGIN of the text's height (:func:`trim_rows`).

    A segmenter's crop of a ruled table row, or of a line with wide leading, can be two or three times the
    height of its type; resized to a recogniser's fixed input height, such type shrinks below what it
    can read. The width is kept.
    """
    g = np.asarray(crop, dtype=np.uint8)
    top, bottom = trim_rows(g, flattened=flattened)
    return g[top:bottom].copy()


def clean_crop(crop: np.ndarray, *, flatten: bool = False, remove_rules: bool = False,
               trim: bool = False) -> np.ndarray:
    """The card's ``[input] flatten`` / ``remove_rules`` / ``trim`` steps on one crop (rules first, then shading,
    then the trim, which reuses the flattened crop).

    Measured (tests/test_pages_real_scans.py): on scikit-image's photographed ``page``,
    body-line CER 21.4 -> 2.1 % (ledger-ctc) and 32.5 -> 4.3 % (ledger-seq) with
    ``flatten``; on demo lines crossed by table rules, 25.2 -> 2.7 % (ctc) and
    146.5 -> 2.7 % (seq) against the same lines without rules with ``remove_rules``;
    on 8 clean demo pages 0.23 -> 0.22 % (ctc), 0.85 -> 0.83 % (seq) with ``flatten``,
    no change with ``remove_rules``. With ``trim`` (tests/test_crop_trim.py): the photographed page cut with
    0.8 of the line height above and below, 29.5 -> 3.4 % (ctc) and 28.2 -> 3.9 % (seq); the held-out-family
    test lines (models/README.md) 4.00 -> 2.86 % degraded, 0.99 -> 0.81 % clean (ctc).
    """
    out = np.asarray(crop, dtype=np.uint8)
    if remove_rules:
        out = remove_crop_rules(out)
    if flatten:
        out = flatten_crop(out)
    if trim:
        out = trim_crop(out, flattened=flatten)
    return out
