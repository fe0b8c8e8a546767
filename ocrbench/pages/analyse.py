"""A page's layout: skew estimated and removed, text lines found with their crops.

Boxes are in the coordinates of the deskewed page; with ``deskew`` the page is
rotated back about its centre on the same canvas, so boxes line up with the
unrotated original.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ocrbench.pages.binarise import binarise
from ocrbench.pages.crops import crop_line
from ocrbench.pages.orient import detect_rotation, turn_upright
from ocrbench.pages.segment import find_line_boxes, remove_rules
from ocrbench.pages.skew import MIN_DESKEW_DEGREES, skew_from_ink
from ocrbench.pages.skew import deskew as rotate_back   # analyse_page's keyword ``deskew`` shadows the name


@dataclass
class LineBox:
    """One text line: its ink box (x1/y1 exclusive) and a padded grey crop."""

    x0: int
    y0: int
    x1: int
    y1: int
    crop: np.ndarray

    @property
    def height(self) -> int:
        return self.y1 - self.y0

    @property
    def width(self) -> int:
        return self.x1 - self.x0


@dataclass
class Layout:
    """A page's lines, its skew and the deskewed page; ``rotation``: the clockwise turn of
    the text that was undone first (``auto_rotate``), 0 when the page was used as it came."""

    lines: list[LineBox]
    skew_degrees: float
    deskewed: np.ndarray
    rotation: int = 0


def lines_from_ink(g: np.ndarray, ink: np.ndarray) -> list[LineBox]:
    """Lines of a grey page from its ink mask: rules removed, boxes found, padded crops cut."""
    boxes = find_line_boxes(remove_rules(ink))
    lines = []
    for i, box in enumerate(boxes):
        neighbours = boxes[max(0, i - 2): i] + boxes[i + 1: i + 3]
        lines.append(LineBox(*box, crop=crop_line(g, box, neighbours)))
    return lines


def segment_lines(gray: np.ndarray) -> list[LineBox]:
    """Text lines of an already-deskewed page, top to bottom, with padded grey crops."""
    g = np.asarray(gray, dtype=np.uint8)
    if g.ndim != 2 or min(g.shape) < 4:
        return []
    return lines_from_ink(g, binarise(g))


def analyse_page(gray: np.ndarray, *, deskew: bool = True, max_degrees: float = 5.0,
                 auto_rotate: bool = False) -> Layout:
    """Estimate the skew, deskew (about the centre, same canvas) and find the lines.

    With ``auto_rotate``, text turned by 90, 180 or 270 degrees is first turned upright
    (:func:`~ocrbench.pages.orient.detect_rotation`); boxes are then in the turned page.
    """
    g = np.asarray(gray, dtype=np.uint8)
    if g.ndim != 2:
        raise ValueError(f"expected a 2-D grey image, got shape {g.shape}")
    if g.size == 0 or min(g.shape) < 4:
        return Layout(lines=[], skew_degrees=0.0, deskewed=g.copy())
    layout = _analyse(g, deskew=deskew, max_degrees=max_degrees)
    if auto_rotate:
        found = (layout.deskewed, [(ln.x0, ln.y0, ln.x1, ln.y1) for ln in layout.lines]) if deskew else None
        rotation = detect_rotation(g, found=found) or 0
        if rotation:
            layout = _analyse(turn_upright(g, rotation), deskew=deskew, max_degrees=max_degrees)
            layout.rotation = rotation
    return layout


def _analyse(g: np.ndarray, *, deskew: bool, max_degrees: float) -> Layout:
    ink = binarise(g)
    skew = 0.0
    if deskew and min(g.shape) >= 8:
        skew = skew_from_ink(ink, max_degrees=max_degrees)
    if abs(skew) >= MIN_DESKEW_DEGREES:
        straight = rotate_back(g, skew)
        ink = binarise(straight)
    else:
        straight = g.copy()
    return Layout(lines=lines_from_ink(straight, ink), skew_degrees=skew, deskewed=straight)
