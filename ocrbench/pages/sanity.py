"""Page sanity before recognition: flags for pages whose text would be confident garbage.

Each flag is a plain word stored with the page and shown by ``pages``:

* ``blank`` — no text line found and (almost) no ink;
* ``not_text_like`` — a photograph, a drawing or noise: too much ink for writing,
  or most of the ink outside the text lines found;
* ``rotated_90`` / ``rotated_180`` / ``rotated_270`` — the text is turned clockwise by
  that angle (see :mod:`ocrbench.pages.orient`; ``auto_rotate`` turns it back);
* ``overwide_lines`` — a line crop wider than a recogniser takes without squeezing
  (width over height above ``max_aspect``); :func:`~ocrbench.pages.segment.cut_overwide`
  cuts such a line into pieces a recogniser reads one by one.

Every threshold is named here, with where it comes from.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ocrbench.pages.binarise import binarise

#: Ink share of a page above which it is not writing. Text, printed or handwritten, covers
#: roughly 2-15 % of a page (common practice; measured 3-8 % on the demo pages, 13-16 % on
#: scikit-image's photographed ``page``/``text``); photographs and noise binarise to 25-70 %.
MAX_TEXT_INK = 0.25
#: Ink share below which a page with no line is blank rather than "not text".
MAX_BLANK_INK = 0.02
#: Share of the ink that must fall inside the line boxes (>= 0.94 on every text page
#: measured; 0.08-0.42 on photographs and noise).
MIN_LINE_COVERAGE = 0.8
#: Widest line crop (width / height) a recogniser reads unsqueezed: the default line input
#: of 32 pixels high and at most 4096 wide (``InputSpec``); pass a card's own ratio.
DEFAULT_MAX_ASPECT = 4096 / 32

ROTATION_FLAGS = {90: "rotated_90", 180: "rotated_180", 270: "rotated_270"}


@dataclass
class PageCheck:
    """The flags of one page and the measures behind them."""

    flags: list[str] = field(default_factory=list)
    ink_share: float = 0.0
    line_coverage: float = 0.0
    widest_aspect: float = 0.0
    rotation: int | None = None

    @property
    def clean(self) -> bool:
        return not self.flags


def _coverage(ink: np.ndarray, boxes: list[tuple[int, int, int, int]]) -> float:
    total = int(ink.sum())
    if total == 0:
        return 0.0
    inside = np.zeros(ink.shape, dtype=bool)
    for x0, y0, x1, y1 in boxes:
        inside[y0:y1, x0:x1] = True
    return float(ink[inside].sum()) / total


def check_page(layout, *, rotation: int | None = 0, max_aspect: float = DEFAULT_MAX_ASPECT) -> PageCheck:
    """Flags of an analysed page (:class:`~ocrbench.pages.analyse.Layout`).

    ``rotation``: the text's clockwise turn found by :func:`~ocrbench.pages.orient.detect_rotation`
    (also when the page was already turned back), None when unknown.
    """
    ink = binarise(layout.deskewed) if layout.deskewed.size else np.zeros((0, 0), bool)
    share = float(ink.mean()) if ink.size else 0.0
    boxes = [(ln.x0, ln.y0, ln.x1, ln.y1) for ln in layout.lines]
    out = PageCheck(ink_share=share, line_coverage=_coverage(ink, boxes), rotation=rotation)
    sideways = rotation in (90, 270) and getattr(layout, "rotation", 0) != rotation
    if not boxes:
        if share < MAX_BLANK_INK:
            out.flags.append("blank")
        else:   # lines are not found across sideways text
            out.flags.append(ROTATION_FLAGS[rotation] if sideways and share <= MAX_TEXT_INK else "not_text_like")
        return out
    if share > MAX_TEXT_INK or (not sideways and out.line_coverage < MIN_LINE_COVERAGE):
        out.flags.append("not_text_like")     # (lines found across sideways text cover it badly)
    elif rotation in ROTATION_FLAGS:
        out.flags.append(ROTATION_FLAGS[rotation])
    aspects = [ln.crop.shape[1] / max(1, ln.crop.shape[0]) for ln in layout.lines]
    out.widest_aspect = float(max(aspects))
    if out.widest_aspect > max_aspect:
        out.flags.append("overwide_lines")
    return out
