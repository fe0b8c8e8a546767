"""Splitting table lines at wide blank gaps (card option ``split_gap``)."""

import numpy as np
from PIL import Image, ImageDraw, ImageFont

from ocrbench.pages.segment import split_at_gaps


def _line(fields_at, width=900, height=34):
    img = Image.new("L", (width, height), 255)
    d = ImageDraw.Draw(img)
    fnt = ImageFont.load_default(size=22)  # Pillow's own font, not the generator's
    for x, text in fields_at:
        d.text((x, 5), text, font=fnt, fill=10)
    return np.asarray(img)


def test_wide_gap_splits_and_narrow_gap_does_not():
    g = _line([(10, "Jan 9 Hobfield rates"), (700, "790.72")])
    spans = split_at_gaps(g, 1.0)
    assert len(spans) == 2
    assert spans[0][1] < 700 <= spans[1][0] + 34  # the amount is in the second piece
    assert split_at_gaps(_line([(10, "Jan 9 Hobfield rates 790.72")]), 1.0) == [(0, 900)]


def test_off_and_blank_give_whole_line():
    g = _line([(10, "a"), (700, "b")])
    assert split_at_gaps(g, 0.0) == [(0, 900)]
    assert split_at_gaps(np.full((34, 900), 255, np.uint8), 1.0) == [(0, 900)]
