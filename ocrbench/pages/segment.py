"""Line segmentation: ruled lines out, components grouped into text lines, lines cut at wide gaps.

Ruled lines (ink runs far longer than any stroke) are removed, the ink is split
into 8-connected components, and the letter-sized components give a horizontal
projection whose bands are split at deep valleys (close or touching lines;
letters joined across two lines are shared out by row). Small components (dots,
commas, dashes, specks) never make or stretch a line by themselves: they join
one only where punctuation sits. :func:`split_at_gaps` cuts one line at wide
blank gaps (table fields far apart on the page).
"""

from __future__ import annotations

import numpy as np

from ocrbench.pages.components import Components, connected_components, row_runs

#: Ink lower than this many pixels is not taken for a text line (no recogniser reads it;
#: on a page without letters a speck would otherwise set the scale).
MIN_LINE_HEIGHT = 6


def remove_rules(ink: np.ndarray) -> np.ndarray:
    """Remove ruled lines: horizontal and vertical ink runs far longer than any stroke.

    Horizontal runs of at least 6 % of the page width (40 px or more) and vertical
    runs of at least 4 % of its height are cleared; letters crossing a rule keep
    their other pixels.
    """
    h, w = ink.shape
    min_h = max(40, int(0.06 * w))
    min_v = max(40, int(0.04 * h))
    out = ink.copy()
    rows, starts, ends = row_runs(ink)
    for r, a, b in zip(*(x[(ends - starts) >= min_h] for x in (rows, starts, ends))):
        out[r, a:b] = False
    cols, starts, ends = row_runs(np.ascontiguousarray(ink.T))
    for c, a, b in zip(*(x[(ends - starts) >= min_v] for x in (cols, starts, ends))):
        out[a:b, c] = False
    return out


def _runs(flags: np.ndarray) -> list[tuple[int, int]]:
    """(start, end exclusive) of each run of True."""
    d = np.diff(np.concatenate([[0], flags.astype(np.int8), [0]]))
    return list(zip(np.flatnonzero(d == 1).tolist(), np.flatnonzero(d == -1).tolist()))


def _split_band(prof: np.ndarray, y0: int, y1: int, out: list[tuple[int, int]], *,
                min_part: float, depth: int = 0) -> None:
    """Split rows [y0, y1) at the deepest valley between two line cores, recursively.

    Two close or touching lines show two dense x-height zones with a sparse
    valley of descenders and ascenders between them. A valley counts when it
    (a row's ink count) falls below 0.3 of the smaller peak on either side and leaves at least
    ``min_part`` rows on both sides (about a letter height), so the thin
    zones of one line (the bars of capitals, the bowls of descenders) are
    never cut off.
    """
    seg = prof[y0:y1].astype(np.float64)
    n = seg.size
    if n < 2 * min_part or depth > 200:
        out.append((y0, y1))
        return
    peak = seg.max()
    left_max = np.maximum.accumulate(seg)
    right_max = np.maximum.accumulate(seg[::-1])[::-1]
    side = np.minimum(left_max, right_max)
    rows = np.arange(n)
    ok = (side >= 0.15 * peak) & (seg < 0.3 * side) & (rows >= min_part) & (rows <= n - min_part)
    if not ok.any():
        out.append((y0, y1))
        return
    cand = np.flatnonzero(ok)
    cut = int(cand[int(np.argmin(seg[cand] / side[cand]))])
    # the lowest raw row in the valley's bottom
    lo, hi = cut, cut
    while lo > 0 and ok[lo - 1] and seg[lo - 1] <= seg[lo]:
        lo -= 1
    while hi < n - 1 and ok[hi + 1] and seg[hi + 1] <= seg[hi]:
        hi += 1
    cut = lo if seg[lo] <= seg[hi] else hi
    _split_band(prof, y0, y0 + cut, out, min_part=min_part, depth=depth + 1)
    _split_band(prof, y0 + cut, y1, out, min_part=min_part, depth=depth + 1)


def _weighted_median(values: np.ndarray, weights: np.ndarray) -> float:
    order = np.argsort(values)
    cum = np.cumsum(weights[order])
    return float(values[order][int(np.searchsorted(cum, cum[-1] / 2))])


def _bands(cc: Components, big: np.ndarray, h: int, min_part: float) -> tuple[list[tuple[int, int]], np.ndarray]:
    """Row bands of the big components' horizontal projection, split at deep valleys."""
    run_big = big[cc.run_label]
    prof = np.bincount(cc.rows[run_big], weights=(cc.ends - cc.starts)[run_big], minlength=h)
    bands: list[tuple[int, int]] = []
    for a, b in _runs(prof > 0):
        _split_band(prof, a, b, bands, min_part=min_part)
    return [(a, b) for a, b in bands if b > a], prof


def find_line_boxes(ink: np.ndarray) -> list[tuple[int, int, int, int]]:
    """Line boxes (x0, y0, x1, y1) from an ink mask with rules removed, top to bottom.

    Components the size of a letter or larger ("big") define the lines by
    their horizontal projection. Small components (dots, commas, dashes,
    specks: under 0.4 of a typical line height both ways) never start or
    stretch a line on their own: one joins a line when it lies within the
    line's rows among its letters, or starts inside the line next to a letter
    (a comma below the baseline), or is a flat mark at mid-height within a few
    letters of the line's end (an empty amount column is written "-").
    Anything far taller than a line (figures, borders, stamps) or a long flat
    remnant of a rule is ignored.
    """
    h, w = ink.shape
    cc = connected_components(ink)
    classes = _classify_components(cc, h)
    if classes is None:
        return []
    big, small, bands, line_h = classes
    lines = _keep_typical(_band_lines(cc, big, bands, line_h, h, w))
    if not lines:
        return []
    typ = lines[0]["typ"]
    _attach_small(cc, small, lines, typ)
    return [(ln["x0"], ln["y0"], ln["x1"], ln["y1"]) for ln in lines]


def _classify_components(cc: Components, h: int) -> tuple[np.ndarray, np.ndarray, list[tuple[int, int]], float] | None:
    """Big and small components, the row bands of the big ones and the typical line height.

    Two passes: the letter height (median component height) sets a first split and
    the line height (mass-weighted median band height); small components are then
    judged against the line height. None when the page has no letter-sized ink.
    """
    if cc.count == 0:
        return None
    ch_ = cc.y1 - cc.y0
    cw = cc.x1 - cc.x0
    letterish = (cc.area >= 8) & (ch_ >= 3)
    if not letterish.any():
        return None
    # first pass: letter height from the components, line height from the bands
    xh = float(np.median(ch_[letterish]))
    fill = cc.area / np.maximum(1, ch_ * cw)
    figure = (ch_ > 6 * xh) & (cw > 6 * xh) & (fill > 0.35)   # a solid blot, stamp or picture
    flat_rule = (cw > 8 * xh) & (ch_ < 0.5 * xh)
    big = (ch_ >= 0.5 * xh) | (cw >= 0.5 * xh)
    big &= ~figure & ~flat_rule
    if not big.any():
        return None
    bands, prof = _bands(cc, big, h, max(3.0, 0.5 * xh))
    if not bands:
        return None
    band_h = np.array([b - a for a, b in bands], dtype=np.float64)
    band_mass = np.array([prof[a:b].sum() for a, b in bands], dtype=np.float64)
    line_h = max(3.0, _weighted_median(band_h, band_mass))
    # second pass: small against the line height
    small = (ch_ < 0.4 * line_h) & (cw < 0.4 * line_h) & ~figure
    big = ~small & ~figure & ~flat_rule
    if not big.any():
        return None
    bands, _ = _bands(cc, big, h, max(3.0, 0.5 * xh))
    if not bands:
        return None
    return big, small, bands, line_h


def _band_lines(cc: Components, big: np.ndarray, bands: list[tuple[int, int]], line_h: float,
                h: int, w: int) -> list[dict]:
    """One line per band holding ink: its box, ink area and member components.

    Letters joined across touching lines form one tall component: its runs are
    shared out to the bands by row; every other component goes to the band of its centre.
    """
    nb = len(bands)
    starts = np.array([a for a, _ in bands])
    ch_ = cc.y1 - cc.y0
    chain = big & (ch_ > 1.6 * line_h)
    normal_idx = np.flatnonzero(big & ~chain)
    cy = (cc.y0[normal_idx] + cc.y1[normal_idx] - 1) / 2.0
    which = np.clip(np.searchsorted(starts, cy, side="right") - 1, 0, nb - 1)
    bx0 = np.full(nb, w, dtype=np.int64)
    by0 = np.full(nb, h, dtype=np.int64)
    bx1 = np.zeros(nb, dtype=np.int64)
    by1 = np.zeros(nb, dtype=np.int64)
    barea = np.zeros(nb, dtype=np.int64)
    np.minimum.at(bx0, which, cc.x0[normal_idx])
    np.maximum.at(bx1, which, cc.x1[normal_idx])
    np.minimum.at(by0, which, cc.y0[normal_idx])
    np.maximum.at(by1, which, cc.y1[normal_idx])
    np.add.at(barea, which, cc.area[normal_idx])
    run_chain = chain[cc.run_label]
    if run_chain.any():
        rr, rs, re_ = cc.rows[run_chain], cc.starts[run_chain], cc.ends[run_chain]
        rb = np.clip(np.searchsorted(starts, rr, side="right") - 1, 0, nb - 1)
        np.minimum.at(bx0, rb, rs)
        np.maximum.at(bx1, rb, re_)
        np.minimum.at(by0, rb, rr)
        np.maximum.at(by1, rb, rr + 1)
        np.add.at(barea, rb, re_ - rs)
    return [{"x0": int(bx0[i]), "x1": int(bx1[i]), "y0": int(by0[i]), "y1": int(by1[i]),
             "area": int(barea[i]), "members": normal_idx[which == i]}
            for i in range(nb) if barea[i] != 0]


def _keep_typical(lines: list[dict]) -> list[dict]:
    """Drop lines far lower or lighter than the typical (mass-weighted median) line; each kept
    line carries that typical height as ``typ``."""
    if not lines:
        return []
    heights = np.array([ln["y1"] - ln["y0"] for ln in lines], dtype=np.float64)
    typ = _weighted_median(heights, np.array([ln["area"] for ln in lines], dtype=np.float64))
    kept = [ln for ln in lines
            if (ln["y1"] - ln["y0"]) >= max(MIN_LINE_HEIGHT, 0.35 * typ) and ln["area"] >= 0.1 * typ * typ]
    for ln in kept:
        ln["typ"] = typ
    return kept


def _attach_small(cc: Components, small: np.ndarray, lines: list[dict], typ: float) -> None:
    """Attach each small component to the line it belongs to (widening its box), else drop it."""
    ly0 = np.array([ln["y0"] for ln in lines], dtype=np.float64)
    ly1 = np.array([ln["y1"] for ln in lines], dtype=np.float64)
    margin = 0.15 * typ
    small_idx = np.flatnonzero(small)
    small_idx = small_idx[np.argsort(cc.x0[small_idx], kind="stable")]
    attached = np.zeros(cc.count, dtype=bool)
    for k in np.concatenate([small_idx, small_idx[::-1]]):   # both ways: dashes in a row chain up
        if attached[k]:
            continue
        sx0, sx1, sy0, sy1 = int(cc.x0[k]), int(cc.x1[k]), int(cc.y0[k]), int(cc.y1[k])
        inside = np.flatnonzero((sy0 >= ly0 - margin) & (sy1 <= ly1 + margin))
        if inside.size == 0:
            continue
        mid = (sy0 + sy1) / 2.0
        ln = lines[int(inside[np.argmin(np.abs((ly0[inside] + ly1[inside]) / 2.0 - mid))])]
        if not _belongs(cc, (sx0, sy0, sx1, sy1), ln, typ):
            continue
        attached[k] = True
        ln["x0"], ln["x1"] = min(ln["x0"], sx0), max(ln["x1"], sx1)
        ln["y0"], ln["y1"] = min(ln["y0"], sy0), max(ln["y1"], sy1)


def _belongs(cc: Components, box: tuple[int, int, int, int], ln: dict, typ: float) -> bool:
    """Whether a small mark with ``box`` is punctuation of line ``ln`` (see find_line_boxes)."""
    sx0, sy0, sx1, sy1 = box
    margin = 0.15 * typ
    near = 0.3 * typ
    touch = max(1.0, 0.1 * typ)
    dash_reach = 4.0 * typ
    within_rows = sy0 >= ln["y0"] and sy1 <= ln["y1"]
    within_cols = sx1 >= ln["x0"] - near and sx0 <= ln["x1"] + near
    if within_cols and within_rows:
        return True                                  # a dot, comma or dash among the letters
    if within_cols:
        # sticks out above or below: only a mark that starts inside the line next to a
        # letter (a comma below the baseline); marks wholly outside are specks
        if sy1 <= ln["y0"] or sy0 >= ln["y1"]:
            return False
        m = ln["members"]
        over = (cc.x0[m] <= sx1 + touch) & (cc.x1[m] >= sx0 - touch)
        gap = np.maximum(cc.y0[m] - sy1, sy0 - cc.y1[m])
        return bool(np.any(over & (gap <= margin)))
    # beyond the letters: only a flat mark at mid-height, a few letters away
    mid = (sy0 + sy1) / 2.0
    sw, sh = sx1 - sx0, sy1 - sy0
    flat = sw >= 1.5 * sh or (sw > sh and sw >= 0.25 * typ)
    hgt = ln["y1"] - ln["y0"]
    centred = ln["y0"] + 0.3 * hgt <= mid <= ln["y1"] - 0.2 * hgt
    reach = (ln["x0"] - dash_reach <= sx1) and (sx0 <= ln["x1"] + dash_reach)
    return bool(flat and centred and reach)


def split_at_gaps(gray: np.ndarray, gap_factor: float) -> list[tuple[int, int]]:
    """Column spans of the pieces of a line separated by blank gaps wider than
    ``gap_factor`` times the crop height (tables: fields far apart on the page).

    A column is blank when fewer than two of its pixels are darker than the
    midpoint between the crop's paper (98th percentile) and ink (2nd percentile).
    Each piece keeps a little paper on both sides. One piece (the whole width)
    when there is no such gap or ``gap_factor`` is 0.
    """
    h, w = gray.shape
    if gap_factor <= 0 or w < 2 * h:
        return [(0, w)]
    lo, hi = np.percentile(gray, 2), np.percentile(gray, 98)
    if hi - lo < 30:
        return [(0, w)]
    ink = (gray < (lo + hi) / 2).sum(axis=0) >= 2
    cols = np.flatnonzero(ink)
    if cols.size == 0:
        return [(0, w)]
    min_gap = gap_factor * h
    pad = max(2, int(0.25 * h))
    spans = []
    start = int(cols[0])
    prev = int(cols[0])
    for c in cols[1:]:
        c = int(c)
        if c - prev - 1 >= min_gap:
            spans.append((start, prev + 1))
            start = c
        prev = c
    spans.append((start, prev + 1))
    if len(spans) == 1:
        return [(0, w)]
    return [(max(0, a - pad), min(w, b + pad)) for a, b in spans]


def cut_overwide(gray: np.ndarray, max_aspect: float) -> list[tuple[int, int]]:
    """Column spans that cut a line crop wider than ``max_aspect`` x its height into pieces
    no wider than that, so a recogniser reads each instead of squeezing the whole.

    Cuts go at blank gaps first (:func:`split_at_gaps` with ever smaller gaps, down
    to a quarter of the height: word spaces; neighbouring pieces that fit together are
    joined again), then, for a piece still too wide, at
    the column with least ink within the last third of the allowed width. One span
    (the whole width) when the crop is not too wide.
    """
    g = np.asarray(gray)
    h, w = g.shape
    limit = max(2, int(max_aspect * h))
    if w <= limit:
        return [(0, w)]
    spans = [(0, w)]
    for gap in (1.0, 0.5, 0.25):
        if all(b - a <= limit for a, b in spans):
            break
        spans = [(a + c, a + d) for a, b in spans
                 for c, d in (split_at_gaps(g[:, a:b], gap) if b - a > limit else [(0, b - a)])]
    merged: list[tuple[int, int]] = []
    for a, b in spans:                       # neighbours join again while they fit: few, long pieces
        if merged and b - merged[-1][0] <= limit:
            merged[-1] = (merged[-1][0], b)
        else:
            merged.append((a, b))
    lo, hi = np.percentile(g, 2), np.percentile(g, 98)
    ink = (g < (lo + hi) / 2).sum(axis=0) if hi - lo >= 30 else np.zeros(w, dtype=np.int64)
    out: list[tuple[int, int]] = []
    for a, b in merged:
        while b - a > limit:
            window = ink[a + (2 * limit) // 3: a + limit]
            cut = a + (2 * limit) // 3 + int(np.argmin(window))
            out.append((a, cut))
            a = cut
        out.append((a, b))
    return out
