"""Trimming loose line crops (the card's ``[input] trim``): paper above and below the text cut to a margin.

References named beside each check: Pillow draws the text (its own rendering says which rows hold ink),
scikit-image's photographed ``page`` (reference data) is cut into crops by ocrbench's own segmenter with
looser margins, rapidfuzz computes the edit distance.
"""

from __future__ import annotations

import numpy as np
import pytest
from PIL import Image, ImageDraw, ImageFont
from skimage import data as skdata

import ocrbench.pages.crops as crops_mod
from _runner_support import DEMO_CTC, DEMO_SEQ, open_demo
from ocrbench.pages import analyse_page, clean_crop, trim_crop, trim_rows
from test_pages_real_scans import PAGE_BODY, _card_with, _cer, _texts

DEJAVU = "/usr/share/fonts/truetype/dejavu/"
TEXT = "No. 332 Ann J. Bremridge joiner 1824-02-06 £2 18s 10¾d"


def _drawn(face: str, size: int) -> np.ndarray:
    """The text drawn by Pillow on a crop just tall enough for it (no margin)."""
    fnt = ImageFont.truetype(DEJAVU + face, size)
    x0, y0, x1, y1 = fnt.getbbox(TEXT)
    img = Image.new("L", (x1 + 4, y1 - y0 + 2), 255)
    ImageDraw.Draw(img).text((2, 1 - y0), TEXT, font=fnt, fill=20)
    return np.asarray(img)


def _ink_rows(a: np.ndarray) -> tuple[int, int]:
    rows = np.flatnonzero((a < 128).any(axis=1))
    return int(rows[0]), int(rows[-1]) + 1


def _loose(text: np.ndarray, above: float, below: float, rng: np.random.Generator) -> np.ndarray:
    """The text on a crop with ``above`` / ``below`` text heights of paper, a cell border at the top and the
    bottom, column rules through the whole height and specks of dirt in the margins."""
    h, w = text.shape
    top, bottom = int(above * h), int(below * h)
    out = np.full((top + h + bottom, w), 238, np.uint8)
    out[top: top + h] = np.minimum(out[top: top + h], text)
    out[0:2, :] = 60                                              # cell borders
    out[-2:, :] = 60
    for x in (w // 3, 2 * w // 3):
        out[:, x: x + 2] = 70                                     # column rules
    for _ in range(6):                                            # dirt in the margins
        y = int(rng.integers(3, max(4, top - 2)))
        x = int(rng.integers(0, w - 3))
        out[y: y + 2, x: x + 2] = 50
    return out


@pytest.mark.parametrize("face", ["DejaVuSans.ttf", "DejaVuSerif.ttf", "DejaVuSansMono.ttf", "DejaVuSans-Bold.ttf"])
@pytest.mark.parametrize("size", [12, 20, 34])
def test_trim_keeps_every_inked_row_of_the_text_and_cuts_the_rest(face, size):
    # Pillow's own rendering says which rows the text inks (capitals, ascenders, descenders, the ¾);
    # the trimmed crop must keep all of them and, besides TRIM_MARGIN of paper on each side, nothing else.
    rng = np.random.default_rng(size)
    text = _drawn(face, size)
    t0, t1 = _ink_rows(text)
    for above, below in ((1.5, 1.5), (2.5, 0.6), (0.6, 2.5)):
        crop = _loose(text, above, below, rng)
        top, bottom = trim_rows(crop)
        off = int(above * text.shape[0])
        assert top <= off + t0 and bottom >= off + t1, (face, size, above, below, (top, bottom), (off + t0, off + t1))
        assert bottom - top <= (t1 - t0) * (1 + 2 * crops_mod.TRIM_MARGIN) + 4, (face, size, (top, bottom), t1 - t0)
        assert np.array_equal(trim_crop(crop), crop[top:bottom])


def test_a_crop_already_close_to_its_text_is_left_as_it_is():
    text = _drawn("DejaVuSerif.ttf", 20)
    tight = np.full((text.shape[0] + 6, text.shape[1]), 255, np.uint8)
    tight[3:-3] = text
    assert trim_rows(tight) == (0, tight.shape[0])
    assert np.array_equal(trim_crop(tight), tight)
    blank = np.full((60, 400), 230, np.uint8)                      # paper only
    faint = blank.copy()
    faint[25:35, 50:350] = 215                                     # less than 30 grey levels of contrast
    for a in (blank, faint, np.zeros((5, 200), np.uint8)):
        assert np.array_equal(trim_crop(a), a)


def test_a_rule_is_not_taken_for_the_text():
    # A cell border drawn through specks (broken into short pieces) has more ink in its rows than any
    # row of the text: it must still not be taken for the x-height band.
    rng = np.random.default_rng(3)
    text = _drawn("DejaVuSans.ttf", 14)
    crop = _loose(text, 1.2, 1.2, rng)
    y = crop.shape[0] - 6
    crop[y: y + 2, :] = 40
    crop[y: y + 2, ::9] = 238                                      # a broken border: no long run
    off = int(1.2 * text.shape[0])
    t0, t1 = _ink_rows(text)
    top, bottom = trim_rows(crop)
    assert top <= off + t0 and bottom >= off + t1 and bottom < y


def test_a_crop_holding_two_lines_keeps_both():
    # A segmenter's box around two lines of text: trimming to one of them would drop the other's words.
    text = _drawn("DejaVuSerif.ttf", 16)
    h, w = text.shape
    crop = np.full((4 * h, w), 240, np.uint8)
    crop[h // 2: h // 2 + h] = text
    crop[2 * h: 3 * h] = text
    assert trim_rows(crop) == (0, crop.shape[0])


def _loose_page_crops(monkeypatch, pad: float) -> list[np.ndarray]:
    # ocrbench's segmenter on scikit-image's photographed page, cutting its crops with `pad` of the line
    # height above and below instead of CROP_PAD_VERTICAL (neighbouring lines' ink still blanked).
    monkeypatch.setattr(crops_mod, "CROP_PAD_VERTICAL", pad)
    return [ln.crop for ln in analyse_page(skdata.page()).lines[1:6]]


@pytest.mark.parametrize("folder", [DEMO_CTC, DEMO_SEQ])
def test_trimming_loose_crops_of_the_photographed_page(monkeypatch, folder):
    # Measured (CER on the 5 body lines; crops with 0.8 of the line height above and below, 33-49 px for
    # type of about 10 px x-height): ledger-ctc 29.5 % -> 3.4 %, ledger-seq 28.2 % -> 3.9 %; with 0.5,
    # 5.1 % -> 0.43 % and 2.6 % -> 0.00 %; with the segmenter's own 0.18 the crops are left as they are.
    loose = _loose_page_crops(monkeypatch, 0.8)
    plain = _cer(PAGE_BODY, _texts(open_demo(folder, trim=False), loose))
    trimmed = _cer(PAGE_BODY, _texts(open_demo(folder, trim=True), loose))
    assert plain >= 0.2 and trimmed <= 0.05, (plain, trimmed)
    own = _loose_page_crops(monkeypatch, 0.18)
    assert all(trim_rows(c) == (0, c.shape[0]) for c in own)


def test_card_trim_cleans_every_crop_and_a_split_line_keeps_its_height(monkeypatch, tmp_path):
    from ocrbench.recognisers.card import load_card
    from ocrbench.recognisers.registry import open_recogniser

    loose = _loose_page_crops(monkeypatch, 0.8)
    assert load_card(DEMO_CTC).input.trim and load_card(DEMO_SEQ).input.trim   # the demo cards trim (models/README.md)
    plain = open_recogniser(load_card(_card_with(DEMO_CTC, tmp_path, "")))
    assert not plain.spec.trim and not plain.spec.flatten
    card = load_card(_card_with(DEMO_CTC, tmp_path, "flatten = true\ntrim = true\n"))
    assert card.input.trim and card.card_hash != plain.card.card_hash
    want = _texts(plain, [clean_crop(c, flatten=True, trim=True) for c in loose])
    assert _texts(open_recogniser(card), loose) == want and _texts(plain, loose) != want
    # Cut at gaps, a line is trimmed whole first: its pieces are read as the same cut of the trimmed line
    # (a piece holding only a dash or a full stop, trimmed alone, would be blown up to the full height).
    split = open_recogniser(load_card(_card_with(DEMO_CTC, tmp_path, "flatten = true\ntrim = true\nsplit_gap = 0.3\n")))
    split_plain = open_recogniser(load_card(_card_with(DEMO_CTC, tmp_path, "split_gap = 0.3\n")))
    pre = [clean_crop(c, flatten=True, trim=True) for c in loose]
    assert sum(len(split_plain._spans(c)) for c in pre) > len(pre)          # the lines are cut
    assert _texts(split, loose) == _texts(split_plain, pre)
