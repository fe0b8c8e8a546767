"""Helpers for the page-pipeline tests: box matching, and pages drawn without synth.py."""

from __future__ import annotations

import json
import random
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFont

Box = tuple[int, int, int, int]


def iou(a: Box, b: Box) -> float:
    """Intersection over union of two boxes (x0, y0, x1, y1), x1/y1 exclusive."""
    ix = max(0, min(a[2], b[2]) - max(a[0], b[0]))
    iy = max(0, min(a[3], b[3]) - max(a[1], b[1]))
    inter = ix * iy
    union = (a[2] - a[0]) * (a[3] - a[1]) + (b[2] - b[0]) * (b[3] - b[1]) - inter
    return inter / union if union else 0.0


def match_boxes(truth: list[Box], found: list[Box], *, min_iou: float = 0.7) -> tuple[list[float], list[Box]]:
    """One-to-one matching, greedy by IoU: the matched IoU of every truth box (0.0 when
    unmatched) and the found boxes left over (spurious lines)."""
    pairs = sorted(((iou(t, f), i, j) for i, t in enumerate(truth) for j, f in enumerate(found)), reverse=True)
    best = [0.0] * len(truth)
    used_t: set[int] = set()
    used_f: set[int] = set()
    for v, i, j in pairs:
        if v < min_iou:
            break
        if i in used_t or j in used_f:
            continue
        best[i] = v
        used_t.add(i)
        used_f.add(j)
    return best, [f for j, f in enumerate(found) if j not in used_f]


def truth_of(image: Path) -> dict:
    """The synth .json beside a generated page image."""
    return json.loads(image.with_suffix(".json").read_text(encoding="utf-8"))


_WORDS = ("quay bought ledger journey paying tally yearly gross bundle kept jetty typed Quigley "
          "hogshead wharfage lighterage, cooperage; 12 1/2 per cent. rec'd (ditto)").split()


def other_renderer_page(*, seed: int = 0, size: int = 22, pitch: float = 1.3, width: int = 900,
                        height: int = 760, rules: bool = True, specks: int = 0,
                        rotation: float = 0.0) -> tuple[np.ndarray, list[Box]]:
    """A page drawn here, not by synth.py: Pillow's built-in font (``ImageFont.load_default``,
    the Aileron face, which the generator never uses), prose lines of varying length and
    indent, a heading in a larger size, a ruled margin and a rule under the heading.

    ``pitch`` is the line spacing as a multiple of the font's ascent + descent (0.65 makes
    descenders touch the next line's capitals). Returns the grey page and the ink box of
    every text line in the unrotated frame (threshold 215 on the clean line, as synth does).
    """
    rng = random.Random(seed)
    body = ImageFont.load_default(size=size)
    head = ImageFont.load_default(size=int(size * 1.5))
    page = Image.new("L", (width, height), 255)
    boxes: list[Box] = []

    def put(text: str, x: int, y: int, fnt: ImageFont.FreeTypeFont) -> None:
        asc, desc = fnt.getmetrics()
        band = Image.new("L", (width, asc + desc + 8), 255)
        ImageDraw.Draw(band).text((x, 4), text, font=fnt, fill=0)
        bb = Image.eval(band, lambda v: 255 - v).point(lambda v: 255 if v > 40 else 0).getbbox()
        y0 = y - 4
        region = np.minimum(np.asarray(page.crop((0, y0, width, y0 + band.height))), np.asarray(band))
        page.paste(Image.fromarray(region), (0, y0))
        boxes.append((bb[0], bb[1] + y0, bb[2], bb[3] + y0))

    put("Journal of the Quayside Stores", 70, 24, head)
    asc, desc = body.getmetrics()
    step = int((asc + desc) * pitch)
    y = boxes[0][3] + 22
    while y + asc + desc < height - 30:
        words = [rng.choice(_WORDS) for _ in range(rng.randint(2, 11))]
        text = " ".join(words) + f" {rng.randint(1, 999)}.{rng.randint(0, 99):02d}"
        put(text, 70 + rng.choice([0, 0, 0, 40]), y, body)
        y += step
    draw = ImageDraw.Draw(page)
    if rules:
        draw.line([(40, 12), (40, height - 12)], fill=0, width=2)                 # ruled margin
        ry = (boxes[0][3] + boxes[1][1]) // 2
        draw.line([(30, ry), (width - 30, ry)], fill=0, width=2)                  # rule under the heading
    if specks:
        srng = np.random.default_rng(seed)
        a = np.asarray(page).copy()
        for _ in range(specks):
            sy, sx = int(srng.integers(0, height - 4)), int(srng.integers(0, width - 4))
            r = int(srng.integers(1, 3))
            a[sy:sy + r, sx:sx + r] = 0
        page = Image.fromarray(a)
    if rotation:
        page = page.rotate(rotation, resample=Image.BICUBIC, fillcolor=255)
    return np.asarray(page), boxes


def matplotlib_page(*, seed: int = 0, families: tuple[str, ...] = ("STIXGeneral", "cmr10"),
                    size_pt: float = 12.0, n_lines: int = 18, rotation: float = 0.0,
                    dpi: int = 100) -> tuple[np.ndarray, list[Box]]:
    """A page rendered by other software: matplotlib's Agg rasteriser with its bundled STIX and
    Computer Modern faces (the generator uses DejaVu through Pillow/FreeType only), two columns
    of fields per line at irregular spacing. Returns the grey page (8.5 x 11 in) and each line's
    ink box, found by rendering that line alone at the same place (threshold 215)."""
    from matplotlib.figure import Figure
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    rng = random.Random(seed)
    lines: list[tuple[float, float, str, str]] = []
    y = 0.93
    for i in range(n_lines):
        fam = families[i % len(families)]
        left = " ".join(rng.choice(_WORDS) for _ in range(rng.randint(2, 6)))
        right = f"{rng.randint(1, 9999):,}.{rng.randint(0, 99):02d}"
        lines.append((y, 0.08 + 0.04 * rng.randint(0, 2), f"{left}    {right}", fam))
        y -= rng.uniform(0.038, 0.055)

    def render(which: list[int]) -> np.ndarray:
        fig = Figure(figsize=(8.5, 11), dpi=dpi)
        fig.patch.set_facecolor("white")
        for k in which:
            yy, xx, text, fam = lines[k]
            fig.text(xx, yy, text, family=fam, size=size_pt, color="black", va="baseline")
        canvas = FigureCanvasAgg(fig)
        canvas.draw()
        rgba = np.asarray(canvas.buffer_rgba())
        return np.asarray(Image.fromarray(rgba[..., :3]).convert("L"))

    page = render(list(range(len(lines))))
    boxes: list[Box] = []
    for k in range(len(lines)):
        alone = render([k]) < 215
        ys, xs = np.nonzero(alone)
        boxes.append((int(xs.min()), int(ys.min()), int(xs.max()) + 1, int(ys.max()) + 1))
    if rotation:
        page = np.asarray(Image.fromarray(page).rotate(rotation, resample=Image.BICUBIC, fillcolor=255))
    return page, boxes
