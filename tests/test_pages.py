"""Binarisation, skew and line segmentation, checked against references outside ocrbench.

References used here:
* scikit-image (``skimage.filters.threshold_otsu``, ``threshold_sauvola``,
  ``skimage.measure.label``/``regionprops``) — the method of N. Otsu (1979), "A threshold
  selection method from gray-level histograms", IEEE Trans. SMC 9(1); Sauvola &
  Pietikäinen (2000) for local thresholding; 8-connected component labelling;
* ``skimage.data.page()`` — a real photographed text page bundled with scikit-image;
* Pillow's rotate (counter-clockwise positive, about the centre) for pages turned by known angles;
* pages drawn without synth.py: Pillow's built-in font and matplotlib's Agg renderer with
  its STIX and Computer Modern faces (tests/_pages_support.py).
Ground-truth boxes of generated pages come from the renderer (ink bounding boxes).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from PIL import Image
from skimage import data as skdata
from skimage.filters import threshold_otsu, threshold_sauvola
from skimage.measure import label, regionprops

from ocrbench import synth
from ocrbench.pages import (CROP_PAD_HORIZONTAL, CROP_PAD_VERTICAL, PageRef, analyse_page, binarise,
                            connected_components, deskew, estimate_skew, load_page, otsu_threshold,
                            segment_lines)

from _pages_support import match_boxes, matplotlib_page, other_renderer_page, truth_of


def boxes_of(layout) -> list[tuple[int, int, int, int]]:
    return [(ln.x0, ln.y0, ln.x1, ln.y1) for ln in layout.lines]


# --------------------------------------------------------------------------- Otsu


def _demo_gray(demo_dir: Path, name: str) -> np.ndarray:
    return load_page(PageRef(demo_dir / name)).gray


@pytest.mark.parametrize("name", ["camera", "coins", "page", "text", "moon", "demo_jpg", "demo_png", "bimodal"])
def test_otsu_agrees_with_scikit_image(name, demo_dir):
    if name == "demo_jpg":
        img = _demo_gray(demo_dir, "page_001.jpg")
    elif name == "demo_png":
        img = _demo_gray(demo_dir, "page_003.png")
    elif name == "bimodal":
        rng = np.random.default_rng(3)
        img = np.clip(np.concatenate([rng.normal(60, 15, 3000), rng.normal(190, 25, 9000)]), 0, 255)
        img = img.astype(np.uint8).reshape(60, 200)
    else:
        img = getattr(skdata, name)()
    # scikit-image: foreground is image > t; ours: the dark class is image <= t. Same split.
    assert abs(otsu_threshold(img) - float(threshold_otsu(img))) <= 1


def _between_class_variance(values: np.ndarray, t: int) -> float:
    """Textbook definition (Otsu 1979, eq. 18): w0 * w1 * (mu0 - mu1)^2, classes <= t and > t."""
    lo, hi = values[values <= t].astype(float), values[values > t].astype(float)
    if lo.size == 0 or hi.size == 0:
        return -1.0
    w0, w1 = lo.size / values.size, hi.size / values.size
    return w0 * w1 * (lo.mean() - hi.mean()) ** 2


@settings(max_examples=60, deadline=None)
@given(arrays(np.uint8, st.integers(2, 400)))
def test_otsu_maximises_the_between_class_variance(values):
    # Slow reference: try every threshold. Ties may pick any of the best.
    t = otsu_threshold(values)
    best = max(_between_class_variance(values, k) for k in range(256))
    if best < 0:                                   # one grey level only
        assert t == int(values.min())
    else:
        assert _between_class_variance(values, t) == pytest.approx(best, rel=1e-9, abs=1e-12)


def test_binarise_copes_with_uneven_lighting_like_a_local_method():
    # skimage.data.page() is lit from one side: a single global Otsu threshold marks the dark
    # corner as ink. Ours (paper level divided out, then Otsu) agrees with Sauvola's local method.
    g = skdata.page()
    sauvola = g <= threshold_sauvola(g, window_size=15)
    global_otsu = g <= threshold_otsu(g)
    ours = binarise(g)
    assert (ours == sauvola).mean() >= 0.97
    assert (global_otsu == sauvola).mean() < 0.85
    assert 0.05 < ours.mean() < 0.2                # text is a small share of a page


def test_blank_paper_has_no_ink():
    rng = np.random.default_rng(0)
    noisy = np.clip(rng.normal(225, 10, (300, 400)), 0, 255).astype(np.uint8)
    assert not binarise(noisy).any()
    assert not binarise(np.full((50, 50), 255, np.uint8)).any()


# --------------------------------------------------------------------------- components


@pytest.mark.parametrize("density, seed", [(0.3, 0), (0.5, 1), (0.6, 2)])
def test_components_agree_with_scikit_image(density, seed):
    rng = np.random.default_rng(seed)
    mask = rng.random((70, 90)) < density
    _check_components(mask)


def test_components_agree_with_scikit_image_on_a_page(demo_dir):
    _check_components(binarise(_demo_gray(demo_dir, "page_001.jpg")))


def _check_components(mask: np.ndarray) -> None:
    cc = connected_components(mask)
    ours = sorted(zip(cc.y0.tolist(), cc.x0.tolist(), cc.y1.tolist(), cc.x1.tolist(), cc.area.tolist()))
    ref = sorted((*r.bbox, int(r.area)) for r in regionprops(label(mask, connectivity=2)))
    assert ours == ref


# --------------------------------------------------------------------------- skew


ANGLES = [-3.0, -2.35, -1.6, -0.8, -0.3, 0.45, 1.2, 1.9, 2.6, 3.0]


@pytest.mark.slow
@pytest.mark.parametrize("degrade", [False, True])
def test_skew_of_generated_pages_rotated_by_known_angles(degrade):
    for i, angle in enumerate(ANGLES):
        spec = synth.PageSpec(seed=500 + i, rotation_degrees=angle, degrade=degrade,
                              font=synth.TRAIN_FONTS[(3 * i) % len(synth.TRAIN_FONTS)],
                              font_size=18 + i, lines_per_page=10 + 2 * i,
                              currency=("decimal", "lsd", "lsd_marked")[i % 3])
        img, _ = synth.render_page(spec)
        est = estimate_skew(np.asarray(img))
        assert abs(est - angle) <= 0.3, (angle, est)


@pytest.mark.slow
def test_skew_of_pages_from_other_renderers():
    for i, angle in enumerate([-2.8, -1.1, 0.7, 2.4]):
        g, _ = other_renderer_page(seed=i, rotation=angle, specks=40)
        assert abs(estimate_skew(g) - angle) <= 0.3
        g, _ = matplotlib_page(seed=i, rotation=-angle, n_lines=10)
        assert abs(estimate_skew(g) + angle) <= 0.3


def test_skew_of_a_real_scan_turned_by_known_angles():
    # The lines of skimage.data.page() are slightly curved (a photographed book page), so the
    # turned copies are compared with the estimate on the page as it is.
    g = skdata.page()
    base = estimate_skew(g)
    assert abs(base) < 1.0
    for angle in (-3.0, -1.5, 1.5, 3.0):
        turned = np.asarray(Image.fromarray(g).rotate(angle, resample=Image.BICUBIC, fillcolor=255))
        assert abs(estimate_skew(turned) - base - angle) <= 0.3


def test_deskew_undoes_a_counter_clockwise_rotation():
    g, _ = other_renderer_page(seed=9, rules=False)
    turned = np.asarray(Image.fromarray(g).rotate(2.0, resample=Image.BICUBIC, fillcolor=255))
    back = deskew(turned, estimate_skew(turned))
    ink, ink_back = g < 128, back < 128
    # the same ink, in the same place (inside the canvas away from the clipped corners)
    inner = (slice(60, -60), slice(60, -60))
    agree = (ink[inner] & ink_back[inner]).sum() / max(1, (ink[inner] | ink_back[inner]).sum())
    assert agree > 0.8


# --------------------------------------------------------------------------- lines


def _assert_lines_match(truth, layout, *, context: str) -> float:
    best, spurious = match_boxes(truth, boxes_of(layout))
    assert not spurious, f"{context}: spurious lines {spurious}"
    assert min(best) >= 0.7, f"{context}: line {int(np.argmin(best))} best IoU {min(best):.2f}"
    return min(best)


@pytest.mark.slow
def test_every_demo_line_is_found_and_nothing_else(demo_dir):
    images = sorted(p for p in demo_dir.iterdir() if p.suffix in (".png", ".jpg", ".tif"))
    assert len(images) == 24
    for img in images:
        truth = truth_of(img)
        layout = analyse_page(load_page(PageRef(img)).gray)
        assert abs(layout.skew_degrees - truth["rotation_degrees_ccw"]) <= 0.3, img.name
        _assert_lines_match([tuple(ln["box"]) for ln in truth["lines"]], layout, context=img.name)


@pytest.fixture(scope="module")
def dense_archive(tmp_path_factory) -> Path:
    """Six more generated pages, another seed: denser, smaller type, all skewed, half degraded."""
    out = tmp_path_factory.mktemp("dense")
    synth.write_archive(out, synth.ArchiveSpec(n_pages=6, seed=11, lines_per_page=(34, 48),
                                               chars_per_line=(50, 70), font_sizes=(16, 20),
                                               skewed_share=1.0, degraded_share=0.5))
    return out


def test_lines_of_denser_skewed_generated_pages(dense_archive):
    for img in sorted(p for p in dense_archive.iterdir() if p.suffix in (".png", ".jpg", ".tif")):
        truth = truth_of(img)
        layout = analyse_page(load_page(PageRef(img)).gray)
        assert abs(layout.skew_degrees - truth["rotation_degrees_ccw"]) <= 0.3, img.name
        _assert_lines_match([tuple(ln["box"]) for ln in truth["lines"]], layout, context=img.name)


@pytest.mark.parametrize("kw", [
    dict(seed=1),                                        # ruled margin, rule under the heading
    dict(seed=2, specks=80),                             # dust
    dict(seed=3, pitch=0.65),                            # descenders touch the next line's capitals
    dict(seed=4, pitch=0.8, rotation=-2.2, specks=30),   # close lines on a turned page
])
def test_lines_of_a_page_drawn_with_pillows_own_font(kw):
    g, truth = other_renderer_page(**kw)
    layout = analyse_page(g)
    assert len(layout.lines) == len(truth)
    _assert_lines_match(truth, layout, context=str(kw))


def test_touching_lines_really_touch_in_that_test():
    # guard for the test above: at pitch 0.65 some letters of consecutive lines are joined
    g, truth = other_renderer_page(seed=3, pitch=0.65)
    cc = connected_components(binarise(g))
    line_h = np.median([b[3] - b[1] for b in truth])
    assert ((cc.y1 - cc.y0) > 1.3 * line_h).any()


@pytest.mark.parametrize("rotation", [0.0, 1.7])
def test_lines_of_a_page_rendered_by_matplotlib(rotation):
    g, truth = matplotlib_page(seed=5, rotation=rotation)
    layout = analyse_page(g)
    assert len(layout.lines) == len(truth) == 18
    _assert_lines_match(truth, layout, context=f"matplotlib {rotation}")


def test_lines_of_a_real_scan():
    # skimage.data.page(): counted by eye on a 3x enlargement — a heading, five lines of a
    # paragraph, and one line of code whose bottom edge the photo cuts (with a cut-off URL
    # fragment under its start, which belongs to no full line). Two grey rules are not text.
    # Centres read off the enlargement (page rows): 23, 57, 75, 93, 110, 127, 182.
    layout = analyse_page(skdata.page())
    centres = [(ln.y0 + ln.y1) / 2 for ln in layout.lines]
    assert len(centres) == 7
    assert np.allclose(centres, [23, 57, 75, 93, 110, 127, 182], atol=4)
    widths = [ln.x1 - ln.x0 for ln in layout.lines]
    assert all(w > 0.9 * 384 for w in widths[1:5])      # the four full paragraph lines
    assert 0.35 * 384 < widths[5] < 0.55 * 384           # "histogram of grey values:"


def test_crops_carry_the_margins_the_recognisers_were_trained_with(demo_dir):
    # synth.pad_like_segmenter pads training lines by 5-35 % of the line height above and
    # below and 5-50 % at the sides; the segmenter's crops must fall in those ranges.
    page = load_page(PageRef(demo_dir / "page_015.png"))
    layout = analyse_page(page.gray)
    for ln in layout.lines:
        h = ln.y1 - ln.y0
        ch, cw = ln.crop.shape
        top = bottom = (ch - h) / 2 / h
        side = (cw - (ln.x1 - ln.x0)) / 2 / h
        assert 0.05 <= top <= 0.35 and 0.05 <= bottom <= 0.35 and 0.05 <= side <= 0.5
        assert top == pytest.approx(CROP_PAD_VERTICAL, abs=0.5 / h + 1e-9)
        assert side == pytest.approx(CROP_PAD_HORIZONTAL, abs=0.5 / h + 1e-9)
        pv, ph = (ch - h) // 2, (cw - (ln.x1 - ln.x0)) // 2
        assert np.array_equal(ln.crop[pv:pv + h, ph:ph + ln.x1 - ln.x0], layout.deskewed[ln.y0:ln.y1, ln.x0:ln.x1])


def test_crop_margins_hide_the_neighbouring_lines():
    g, _ = other_renderer_page(seed=3, pitch=0.65, rules=False)
    layout = analyse_page(g)
    dark_margins = 0
    for ln in layout.lines[1:-1]:
        pv = (ln.crop.shape[0] - (ln.y1 - ln.y0)) // 2
        margins = np.concatenate([ln.crop[:pv].ravel(), ln.crop[-pv:].ravel()])
        # only this line's own strokes may reach into its margins (none do: the box holds its ink)
        dark_margins += int((margins < 128).sum())
    assert dark_margins == 0


def test_segment_lines_on_a_straight_page_equals_analyse_without_deskew():
    g, _ = other_renderer_page(seed=6)
    assert boxes_of(analyse_page(g, deskew=False)) == [(ln.x0, ln.y0, ln.x1, ln.y1) for ln in segment_lines(g)]
    assert analyse_page(g, deskew=False).skew_degrees == 0.0


def test_rules_alone_are_not_lines():
    g = np.full((400, 600), 255, np.uint8)
    g[100:102, 40:560] = 0               # horizontal rules
    g[200:203, 40:560] = 0
    g[20:380, 50:52] = 0                 # a vertical rule
    g[300:304, 300:304] = 0              # a speck
    assert analyse_page(g).lines == []
