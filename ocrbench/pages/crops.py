"""Line crops: the grey page cut around a line box with paper margins."""

from __future__ import annotations

import numpy as np

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
