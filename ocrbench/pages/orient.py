"""Which way up the text is: rotated by 0, 90, 180 or 270 degrees.

Two published cues, both measured on the ink:

* **Line direction** (horizontal or vertical) from the nearest neighbour of each
  letter-sized component: letters of a word are closer to each other than to
  the lines above and below, so the nearest-neighbour directions of a text page
  cluster along its lines (the "docstrum", L. O'Gorman, "The document spectrum
  for page layout analysis", IEEE PAMI 15(11), 1993).
* **Up or down** from the baseline: in Latin script most letters stand on the
  baseline while their tops spread between the x-height and the ascender or
  capital height, so the bottoms of a line's letters line up more tightly than
  their tops (the ascender/descender asymmetry used for up/down detection by
  R. S. Caprari, "Algorithm for text page up/down orientation determination",
  Pattern Recognition Letters 21, 2000; cited from memory).

``rotation`` is the clockwise angle by which the text is turned; turning the page
that many degrees counter-clockwise (:func:`turn_upright`) sets it upright.
"""

from __future__ import annotations

import numpy as np

from ocrbench.pages.binarise import binarise
from ocrbench.pages.components import connected_components
from ocrbench.pages.segment import find_line_boxes, remove_rules
from ocrbench.pages.skew import MIN_DESKEW_DEGREES, deskew, skew_from_ink

#: Components sampled for the nearest-neighbour directions (enough for a stable share, cheap).
NN_SAMPLE = 800
#: Below this share of horizontal nearest neighbours a page's lines run vertically.
MIN_HORIZONTAL_SHARE = 0.5
#: The baseline cue must win by this much (mean over lines of the difference in aligned
#: shares of bottoms and tops) before an upright page is called upside down, or the reverse.
MIN_BASELINE_MARGIN = 0.05


def horizontal_share(ink: np.ndarray, *, seed: int = 0) -> float | None:
    """Share of letter-sized components whose nearest neighbour lies more left/right than up/down.

    ``ink``: a page's ink mask with the rules removed. None when the page has fewer
    than 10 such components (nothing to judge).
    """
    cc = connected_components(ink)
    if cc.count < 10:
        return None
    h, w = cc.y1 - cc.y0, cc.x1 - cc.x0
    sized = cc.area >= 8
    if not sized.any():
        return None
    med = float(np.median(h[sized]))
    keep = sized & (h < 4 * med + 1) & (w < 4 * med + 1) & (h >= 0.3 * med)
    cy = ((cc.y0 + cc.y1) / 2.0)[keep]
    cx = ((cc.x0 + cc.x1) / 2.0)[keep]
    if cy.size < 10:
        return None
    if cy.size > NN_SAMPLE:
        pick = np.random.default_rng(seed).choice(cy.size, NN_SAMPLE, replace=False)
        cy, cx = cy[pick], cx[pick]
    dy = cy[:, None] - cy[None, :]
    dx = cx[:, None] - cx[None, :]
    d = dy * dy + dx * dx
    np.fill_diagonal(d, np.inf)
    j = np.argmin(d, axis=1)
    rows = np.arange(cy.size)
    return float(np.mean(np.abs(dx[rows, j]) > np.abs(dy[rows, j])))


def baseline_score(ink: np.ndarray, boxes: list[tuple[int, int, int, int]]) -> float:
    """Mean over lines of (share of letter bottoms on the baseline - share of tops on one level).

    Positive: upright; negative: upside down; near 0: no evidence.
    """
    total, n = 0.0, 0
    for x0, y0, x1, y1 in boxes:
        cc = connected_components(ink[y0:y1, x0:x1])
        if cc.count < 3:
            continue
        h = cc.y1 - cc.y0
        med = float(np.median(h))
        keep = (h >= 0.4 * med) & (cc.area >= 4)
        if keep.sum() < 3:
            continue
        tops, bottoms = cc.y0[keep].astype(float), cc.y1[keep].astype(float)
        tol = max(1.0, 0.12 * med)
        on_top = np.mean(np.abs(tops - np.median(tops)) <= tol)
        on_base = np.mean(np.abs(bottoms - np.median(bottoms)) <= tol)
        total += float(on_base - on_top)
        n += 1
    return total / n if n else 0.0


def turn_upright(gray: np.ndarray, rotation: int) -> np.ndarray:
    """The page turned ``rotation`` degrees counter-clockwise (undoing a clockwise turn of the text)."""
    return np.ascontiguousarray(np.rot90(np.asarray(gray), (rotation // 90) % 4))


def detect_rotation(gray: np.ndarray, *, found: tuple[np.ndarray, list[tuple[int, int, int, int]]] | None = None
                    ) -> int | None:
    """0, 90, 180 or 270 (the clockwise turn of the text), or None when there is no text to judge.

    ``found``: the deskewed page and its line boxes when the page was already
    analysed as it is (saves analysing it again when its lines run across).
    """
    g = np.asarray(gray, dtype=np.uint8)
    if g.ndim != 2 or min(g.shape) < 8:
        return None
    page_ink = remove_rules(binarise(found[0] if found is not None else g))
    share = horizontal_share(page_ink)
    if share is None:
        return None
    candidates = (0, 180) if share >= MIN_HORIZONTAL_SHARE else (90, 270)
    if candidates[0] == 0 and found is not None:
        ink, boxes = page_ink, found[1]
    else:
        first = turn_upright(g, candidates[0])
        ink = binarise(first)
        skew = skew_from_ink(ink, max_degrees=5.0)
        if abs(skew) >= MIN_DESKEW_DEGREES:
            ink = binarise(deskew(first, skew))
        ink = remove_rules(ink)
        boxes = find_line_boxes(ink)
    if not boxes:
        return None
    score = baseline_score(ink, boxes)
    if score >= MIN_BASELINE_MARGIN:
        return candidates[0]
    if score <= -MIN_BASELINE_MARGIN:
        return candidates[1]
    return candidates[0] if candidates[0] == 0 else None
