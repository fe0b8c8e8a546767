"""Invented ledger pages and text lines with exact ground truth.

Everything here is deterministic by seed. The scenario is the cash book of an
invented firm (Marrowby & Kettle, rope and twine makers); every name is made up
from syllables. The same generator serves three purposes:

* the demo archive in ``scans_demo/`` (:func:`write_archive`),
* training lines for the demo recognisers (:func:`line_samples`),
* archives of chosen density for planner calibration (``lines_per_page`` and
  ``chars_per_line`` of :class:`PageSpec`).

Ground truth follows the common keying practice of a single space
between fields, however wide the gap on the page.

Conventions of the written files:

* ``<stem>.<ext>``  the page image,
* ``<stem>.txt``    UTF-8 ground truth, one line per text line, ``\\n`` endings,
* ``<stem>.json``   line boxes ``[x0, y0, x1, y1]`` (ink bounding boxes, pixel
  edges, x1/y1 exclusive) in the frame of the *unrotated* page, plus the
  rotation applied (``rotation_degrees_ccw``, counter-clockwise positive, about
  the image centre, same canvas size).
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import random
from dataclasses import dataclass, field, asdict
from pathlib import Path
from typing import Iterator, Sequence

import numpy as np
from PIL import Image, ImageDraw, ImageFilter, ImageFont

FONT_DIR = Path("/usr/share/fonts/truetype/dejavu")

#: Faces used for demo pages and for training the demo recognisers.
TRAIN_FONTS: tuple[str, ...] = (
    "DejaVuSans.ttf",
    "DejaVuSans-Bold.ttf",
    "DejaVuSans-Oblique.ttf",
    "DejaVuSansCondensed.ttf",
    "DejaVuSansCondensed-Bold.ttf",
    "DejaVuSansMono.ttf",
    "DejaVuSansMono-Bold.ttf",
    "DejaVuSerif.ttf",
    "DejaVuSerif-Bold.ttf",
    "DejaVuSerif-Italic.ttf",
    "DejaVuSerifCondensed.ttf",
    "DejaVuSerifCondensed-Bold.ttf",
)

#: Faces never used in training: held out to test generalisation.
HELDOUT_FONTS: tuple[str, ...] = (
    "DejaVuSansCondensed-Oblique.ttf",
    "DejaVuSerifCondensed-Italic.ttf",
)

#: The character set the demo recognisers can emit (besides the CTC blank).
ALPHABET: str = "".join(chr(c) for c in range(32, 127)) + "£½¼¾"

FIRM = "Marrowby & Kettle"

_SYL_A = ["Ald", "Brem", "Cor", "Dun", "Fal", "Gris", "Hal", "Kest", "Lom",
          "Mor", "Pen", "Quil", "Rad", "Sel", "Tarn", "Wex", "Yar", "Nib",
          "Oss", "Vel", "Bax", "Crad", "Ember", "Hob"]
_SYL_B = ["by", "ford", "well", "ton", "ham", "ley", "wick", "stead", "more",
          "den", "cott", "field", "ridge", "mere", "gate", "low"]
_INITIALS = "ABCDEFGHJKLMNPRSTW"
_PLACES = ["Portley", "Hanmoor", "Cresswick", "Dunmere", "Oxlow", "Tarnby",
           "Fenholt", "Quarley", "Brackstead", "Wexmouth"]
_GOODS = ["hemp", "twine", "coal", "tar", "pitch", "jute", "flax", "oil",
          "cordage", "sacking", "rope", "tallow", "soap", "nails", "timber"]
_UNITS = ["cwt", "lb", "tons", "bales", "coils", "yds", "gal", "doz"]
_PARTICULARS = [
    "{g} {n} {u}", "carriage to {p}", "wages week {n}", "rent of yard",
    "repairs to cart", "{g} sold", "postage", "insurance on stock",
    "interest on loan", "cash from bank", "bill No. {big}", "freight {g}",
    "{g} & {g2}", "sundries", "commission", "discount allowed",
    "petty cash", "gas & water", "rates Q{q}", "{g} per {p} waggon",
]

_COMMON_WORDS = (
    "the of and to in a is that for it as was with be by on not he this are "
    "or his from at which but have an they you were her she there been one "
    "all we their has would when if so no will more can said what out up "
    "into them some than time only could new these two may first then do "
    "any like my now over such our man me even most made after also did "
    "many before must through back years where much your way well down "
    "should because each just those people how too little state good very "
    "make world still own see men work long get here between both life "
    "being under never day same another know while last might us great old "
    "year off come since against go came right used take three house "
    "account received paid balance ledger entry folio sum total amount "
    "owing credit debit stock goods order delivery warehouse office clerk "
    "Monday Tuesday Wednesday Thursday Friday Saturday January February "
    "March April June July August September October November December"
).split()

_MONTHS = ["Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep",
           "Oct", "Nov", "Dec"]


# --------------------------------------------------------------------------- text


def invented_surname(rng: random.Random) -> str:
    return rng.choice(_SYL_A) + rng.choice(_SYL_B)


def invented_payee(rng: random.Random) -> str:
    r = rng.random()
    if r < 0.5:
        return f"{rng.choice(_INITIALS)}. {invented_surname(rng)}"
    if r < 0.7:
        return f"{invented_surname(rng)} & Sons"
    if r < 0.85:
        return f"{invented_surname(rng)} & {invented_surname(rng)}"
    return f"{rng.choice(_PLACES)} {rng.choice(['Bank', 'Mill', 'Wharf', 'Co.'])}"


def particulars(rng: random.Random) -> str:
    pat = rng.choice(_PARTICULARS)
    return pat.format(
        g=rng.choice(_GOODS), g2=rng.choice(_GOODS), n=rng.randint(1, 52),
        u=rng.choice(_UNITS), p=rng.choice(_PLACES), big=rng.randint(100, 9999),
        q=rng.randint(1, 4),
    )


def format_decimal(cents: int, thousands: bool = True) -> str:
    whole, frac = divmod(cents, 100)
    w = f"{whole:,}" if thousands else str(whole)
    return f"{w}.{frac:02d}"


_FRACTIONS = {0: "", 1: "¼", 2: "½", 3: "¾"}


def lsd_parts(farthings: int) -> tuple[int, int, int, int]:
    """Split farthings into (pounds, shillings, pence, farthings)."""
    pence_total, q = divmod(farthings, 4)
    shillings_total, d = divmod(pence_total, 12)
    pounds, s = divmod(shillings_total, 20)
    return pounds, s, d, q


def format_lsd_columns(farthings: int) -> list[str]:
    """Three columns: pounds, shillings, pence (pence may carry ¼ ½ ¾)."""
    l, s, d, q = lsd_parts(farthings)
    return [str(l) if l else "-", str(s) if s else "-", f"{d}{_FRACTIONS[q]}" if (d or q) else "-"]


def format_lsd_marked(farthings: int) -> str:
    l, s, d, q = lsd_parts(farthings)
    return f"£{l} {s}s {d}{_FRACTIONS[q]}d"


def random_date(rng: random.Random, year: int) -> _dt.date:
    start = _dt.date(year, 1, 1).toordinal()
    return _dt.date.fromordinal(start + rng.randint(0, 364))


def format_date(d: _dt.date, style: str) -> str:
    if style == "dmy":
        return f"{d.day} {_MONTHS[d.month - 1]} {d.year}"
    if style == "md":
        return f"{_MONTHS[d.month - 1]} {d.day}"
    if style == "slash":
        return f"{d.day:02d}/{d.month:02d}/{d.year}"
    return d.isoformat()


def prose_line(rng: random.Random, n_chars: int) -> str:
    words: list[str] = []
    while len(" ".join(words)) < n_chars:
        r = rng.random()
        if r < 0.70:
            w = rng.choice(_COMMON_WORDS)
        elif r < 0.80:
            w = invented_surname(rng)
        elif r < 0.90:
            w = str(rng.randint(0, 99999)) if rng.random() < 0.6 else f"{rng.randint(0, 999)}.{rng.randint(0, 99):02d}"
        else:
            w = "".join(rng.choice("abcdefghijklmnopqrstuvwxyz") for _ in range(rng.randint(2, 8)))
        if rng.random() < 0.1:
            w = w.capitalize()
        if rng.random() < 0.04:
            w = w.upper()
        if rng.random() < 0.15:
            w += rng.choice(",.;:!?")
        if rng.random() < 0.04:
            w = rng.choice(["(", "\"", "'", "["]) + w + rng.choice([")", "\"", "'", "]"])
        words.append(w)
    return " ".join(words)[: max(n_chars, 1) + 8].strip()


def random_chars(rng: random.Random, n: int) -> str:
    chars = ALPHABET
    s = "".join(rng.choice(chars) for _ in range(n))
    s = " ".join(s.split())  # no leading/trailing/double spaces
    return s or "x"


# --------------------------------------------------------------------------- fonts


_FONT_CACHE: dict[tuple[str, int], ImageFont.FreeTypeFont] = {}


def font(name: str, size: int) -> ImageFont.FreeTypeFont:
    key = (name, size)
    f = _FONT_CACHE.get(key)
    if f is None:
        f = ImageFont.truetype(str(FONT_DIR / name), size)
        _FONT_CACHE[key] = f
    return f


# --------------------------------------------------------------------------- pages


@dataclass
class PageSpec:
    """What one generated page looks like. All fields have sensible defaults."""

    seed: int = 0
    lines_per_page: int = 24          # entry lines (header, headings, totals added)
    chars_per_line: int = 48          # target characters of an entry line
    currency: str = "decimal"         # "decimal" | "lsd" | "lsd_marked"
    font: str = "DejaVuSerif.ttf"
    font_size: int = 22
    width: int = 1100
    degrade: bool = False
    rotation_degrees: float = 0.0     # counter-clockwise
    folio: int = 1
    brought_forward: int = 0          # cents or farthings carried in
    rules: bool = True
    year: int = 1887


@dataclass
class PageTruth:
    lines: list[str]
    boxes: list[tuple[int, int, int, int]]
    rotation_degrees_ccw: float
    width: int
    height: int
    carried_forward: int
    meta: dict = field(default_factory=dict)


def _amount_cols(spec: PageSpec, value: int) -> list[str]:
    if spec.currency == "decimal":
        return [format_decimal(value)]
    if spec.currency == "lsd":
        return format_lsd_columns(value)
    return [format_lsd_marked(value)]


def _random_amount(rng: random.Random, spec: PageSpec) -> int:
    if spec.currency == "decimal":
        return int(math.exp(rng.uniform(math.log(50), math.log(500000))))
    # farthings: up to a few hundred pounds; quarter pence sometimes
    f = int(math.exp(rng.uniform(math.log(4 * 3), math.log(4 * 240 * 400))))
    return f if rng.random() < 0.25 else f - f % 4


@dataclass
class _Geometry:
    """Where a page's columns sit, in pixels (from the spec, the font and the first random draws)."""

    pitch: int
    top: int
    margin_x: int
    text_w: int
    x_date: int
    x_payee: int
    x_part: int
    right: int
    col_w: int
    amount_x: list[int]


def _geometry(spec: PageSpec, fnt, rng: random.Random) -> _Geometry:
    ascent, descent = fnt.getmetrics()
    pitch = int(round((ascent + descent) * rng.uniform(1.45, 1.75)))
    margin_x = int(spec.width * 0.07)
    text_w = spec.width - 2 * margin_x
    right = margin_x + text_w
    col_w = int(fnt.getlength("0000") * 1.1)
    if spec.currency == "lsd":
        amount_x = [right - 2 * col_w - int(col_w * 0.5), right - col_w - int(col_w * 0.2), right]
    else:
        amount_x = [right]
    return _Geometry(pitch=pitch, top=int(pitch * 2.2), margin_x=margin_x, text_w=text_w, x_date=margin_x,
                     x_payee=margin_x + int(text_w * 0.20), x_part=margin_x + int(text_w * 0.44), right=right,
                     col_w=col_w, amount_x=amount_x)


Row = tuple[list[tuple[str, int, str]], str]   # fields (text, x, align) and the row's kind


def _entry_particulars(spec: PageSpec, fnt, rng: random.Random, g: _Geometry, want: int) -> str:
    """Particulars of one entry, cut at word boundaries to fit its column."""
    part = particulars(rng)
    while len(part) < want - 6:
        part += " " + rng.choice([particulars(rng), rng.choice(_PLACES), rng.choice(_GOODS)])
    max_w = (g.amount_x[0] - g.col_w * (1.6 if len(g.amount_x) == 1 else 0.9)) - g.x_part
    words = part.split()
    while len(words) > 1 and (len(" ".join(words)) > want or fnt.getlength(" ".join(words)) > max_w):
        words.pop()
    while words and words[-1] in ("&", "per", "to", "of", "on", "from"):
        words.pop()
    return " ".join(words) or "sundries"


def _page_rows(spec: PageSpec, fnt, rng: random.Random, g: _Geometry, date_style: str) -> tuple[list[Row], int]:
    """The page's rows (header, headings, brought forward, entries, total) and its closing total."""

    def amount_fields(value: int) -> list[tuple[str, int, str]]:
        return [(t, x, "r") for t, x in zip(_amount_cols(spec, value), g.amount_x)]

    rows: list[Row] = [([(FIRM, g.margin_x, "l"), ("Cash Book", g.margin_x + int(g.text_w * 0.45), "l"),
                         (f"Folio {spec.folio}", g.right, "r")], "header")]
    head_amount = (["£", "s", "d"] if len(g.amount_x) == 3 else ["Amount"])
    rows.append(([("Date", g.x_date, "l"), ("Payee", g.x_payee, "l"), ("Particulars", g.x_part, "l")]
                 + [(t, x, "r") for t, x in zip(head_amount, g.amount_x)], "headings"))
    total = spec.brought_forward
    if spec.folio > 1:
        rows.append(([("Brought forward", g.x_payee, "l")] + amount_fields(total), "brought"))
    dates = sorted(random_date(rng, spec.year) for _ in range(spec.lines_per_page))
    for d in dates:
        value = _random_amount(rng, spec)
        total += value
        date_s = format_date(d, date_style)
        payee = invented_payee(rng)
        base = len(date_s) + len(payee) + sum(len(t) for t in _amount_cols(spec, value)) + 4
        part = _entry_particulars(spec, fnt, rng, g, max(6, spec.chars_per_line - base))
        rows.append(([(date_s, g.x_date, "l"), (payee, g.x_payee, "l"), (part, g.x_part, "l")]
                     + amount_fields(value), "entry"))
    final_label = "Carried forward" if rng.random() < 0.6 else "Total"
    rows.append(([(final_label, g.x_payee, "l")] + amount_fields(total), "total"))
    return rows, total


def _draw_rows(page: Image.Image, rows: list[Row], fnt, g: _Geometry, ink: int
               ) -> tuple[list[str], list[tuple[int, int, int, int]], list[str]]:
    """Draw each row in its own band (so its box is exact) onto ``page``; lines, boxes and kinds."""
    ascent, descent = fnt.getmetrics()
    band_h = ascent + descent + 8
    lines: list[str] = []
    boxes: list[tuple[int, int, int, int]] = []
    kinds: list[str] = []
    width = page.width
    for i, (fields, kind) in enumerate(rows):
        baseline = g.top + i * g.pitch + ascent
        if kind == "total":
            baseline += g.pitch // 3
        band = Image.new("L", (width, band_h), 255)
        bd = ImageDraw.Draw(band)
        prev_end = -1e9
        min_gap = 1.5 * fnt.getlength(" ")
        for text, x, align in fields:
            xx = x - fnt.getlength(text) if align == "r" else x
            xx = max(xx, prev_end + min_gap)   # a visible gap between fields, always
            bd.text((xx, 4 + ascent), text, font=fnt, fill=ink, anchor="ls")
            prev_end = xx + fnt.getlength(text)
        inv = Image.eval(band, lambda v: 255 - v)
        bb = inv.point(lambda v: 255 if v > 40 else 0).getbbox()
        if bb is None:
            continue
        y0 = baseline - ascent - 4
        page.paste(Image.fromarray(np.minimum(np.asarray(page.crop((0, y0, width, y0 + band_h))),
                                              np.asarray(band))), (0, y0))
        boxes.append((bb[0], bb[1] + y0, bb[2], bb[3] + y0))
        lines.append(" ".join(t for t, _, _ in fields))
        kinds.append(kind)
    return lines, boxes, kinds


def _draw_rules(page: Image.Image, boxes: list[tuple[int, int, int, int]], g: _Geometry, ink: int) -> None:
    """A rule under the headings and a double rule above the total."""
    draw = ImageDraw.Draw(page)
    rule_ink = max(0, ink - 10)
    y = (boxes[1][3] + boxes[2][1]) // 2
    draw.line([(g.margin_x - 10, y), (g.right + 10, y)], fill=rule_ink, width=2)
    yt = (boxes[-2][3] + boxes[-1][1]) // 2
    draw.line([(g.amount_x[0] - g.col_w * 1.3, yt - 2), (g.right + 6, yt - 2)], fill=rule_ink, width=1)
    draw.line([(g.amount_x[0] - g.col_w * 1.3, yt + 2), (g.right + 6, yt + 2)], fill=rule_ink, width=1)


def render_page(spec: PageSpec) -> tuple[Image.Image, PageTruth]:
    """Render one cash-book page. Returns the image (mode L) and its truth.

    The random draws happen in a fixed order (geometry, date style, rows, ink, degradation),
    so a seed gives the same page byte for byte.
    """
    rng = random.Random(spec.seed)
    fnt = font(spec.font, spec.font_size)
    g = _geometry(spec, fnt, rng)
    date_style = rng.choice(["dmy", "md", "slash", "iso"])
    rows, total = _page_rows(spec, fnt, rng, g, date_style)

    height = g.top + g.pitch * (len(rows) + 1) + int(g.pitch * 1.5)
    height = max(height, int(spec.width * 1.3))
    ink = rng.randint(90, 140) if (spec.degrade and rng.random() < 0.5) else rng.randint(0, 40)

    page = Image.new("L", (spec.width, height), 255)
    lines, boxes, kinds = _draw_rows(page, rows, fnt, g, ink)
    if spec.rules:
        _draw_rules(page, boxes, g, ink)

    img = page
    if spec.rotation_degrees:
        img = img.rotate(spec.rotation_degrees, resample=Image.BICUBIC, fillcolor=255, expand=False)
    if spec.degrade:
        img = degrade_page(img, rng)

    truth = PageTruth(lines=lines, boxes=boxes, rotation_degrees_ccw=spec.rotation_degrees,
                      width=spec.width, height=height, carried_forward=total,
                      meta={"kinds": kinds, "currency": spec.currency, "font": spec.font,
                            "font_size": spec.font_size, "seed": spec.seed, "folio": spec.folio,
                            "degraded": spec.degrade})
    return img, truth


def degrade_page(img: Image.Image, rng: random.Random) -> Image.Image:
    """Blur, uneven illumination, noise and specks, as scans show them."""
    nprng = np.random.default_rng(rng.randint(0, 2**31))
    if rng.random() < 0.7:
        img = img.filter(ImageFilter.GaussianBlur(rng.uniform(0.4, 1.0)))
    a = np.asarray(img).astype(np.float32)
    h, w = a.shape
    # uneven illumination: a smooth gradient darkening the paper
    gy = np.linspace(0, 1, h)[:, None]
    gx = np.linspace(0, 1, w)[None, :]
    angle = rng.uniform(0, 2 * math.pi)
    grad = (math.cos(angle) * gx + math.sin(angle) * gy)
    grad = (grad - grad.min()) / max(1e-6, float(grad.max() - grad.min()))
    paper = 255 - rng.uniform(10, 55) * grad
    a = a / 255.0 * paper
    a += nprng.normal(0, rng.uniform(4, 12), a.shape)
    # specks
    n_specks = rng.randint(20, 120)
    ys = nprng.integers(0, h, n_specks)
    xs = nprng.integers(0, w, n_specks)
    for y, x in zip(ys, xs):
        r = int(nprng.integers(1, 3))
        a[max(0, y - r):y + r, max(0, x - r):x + r] *= 0.35
    return Image.fromarray(np.clip(a, 0, 255).astype(np.uint8))


# --------------------------------------------------------------------------- archives


@dataclass
class ArchiveSpec:
    n_pages: int = 24
    seed: int = 1
    lines_per_page: tuple[int, int] = (16, 30)
    chars_per_line: tuple[int, int] = (38, 60)
    degraded_share: float = 0.5
    skewed_share: float = 0.4
    max_skew: float = 3.0
    fonts: Sequence[str] = TRAIN_FONTS
    font_sizes: tuple[int, int] = (19, 26)


def archive_page_specs(a: ArchiveSpec) -> list[tuple[str, PageSpec, str]]:
    """(stem, spec, format) for every page of an invented archive."""
    rng = random.Random(a.seed)
    out = []
    folio = {"decimal": 0, "lsd": 0, "lsd_marked": 0}
    n_clean_tif = 0
    for i in range(a.n_pages):
        currency = ["decimal", "lsd", "lsd_marked"][i % 3]
        folio[currency] += 1
        degrade = rng.random() < a.degraded_share
        skew = rng.uniform(-a.max_skew, a.max_skew) if rng.random() < a.skewed_share else 0.0
        spec = PageSpec(
            seed=a.seed * 100003 + i,
            lines_per_page=rng.randint(*a.lines_per_page),
            chars_per_line=rng.randint(*a.chars_per_line),
            currency=currency,
            font=a.fonts[i % len(a.fonts)],
            font_size=rng.randint(*a.font_sizes),
            degrade=degrade,
            rotation_degrees=round(skew, 2),
            folio=folio[currency],
            brought_forward=0,
            year=1880 + (i % 3) * 10,
        )
        # Degraded (grey, noisy) pages as JPEG; clean ones alternate PNG and TIFF, the TIFFs
        # mostly bilevel in CCITT Group 4, every third one grey in LZW.
        if degrade:
            fmt = "jpg"
        elif i % 2 == 0:
            fmt = "png"
        else:
            fmt = "tif_lzw" if n_clean_tif % 3 == 2 else "tif"
            n_clean_tif += 1
        out.append((f"page_{i + 1:03d}", spec, fmt))
    return out


def save_image(img: Image.Image, path: Path, fmt: str) -> None:
    if fmt == "png":
        img.save(path, format="PNG", optimize=True)
    elif fmt == "jpg":
        img.save(path, format="JPEG", quality=75)
    elif fmt == "tif":
        # Bilevel pages in CCITT Group 4, grey ones in LZW, as archives hold them.
        a = np.asarray(img)
        if (a.min() >= 200) or len(np.unique(a[::4, ::4])) <= 2:
            img.convert("1").save(path, format="TIFF", compression="group4")
        else:
            img.save(path, format="TIFF", compression="tiff_lzw")
    else:
        raise ValueError(f"unknown image format {fmt!r}")


def write_page(out_dir: Path, stem: str, spec: PageSpec, fmt: str = "png") -> PageTruth:
    """Write one page: ``fmt`` is "png", "jpg", "tif" (a clean page made bilevel, Group 4)
    or "tif_lzw" (kept grey, LZW)."""
    out_dir.mkdir(parents=True, exist_ok=True)
    img, truth = render_page(spec)
    ext = {"png": "png", "jpg": "jpg", "tif": "tif", "tif_lzw": "tif"}[fmt]
    if fmt == "tif" and not spec.degrade:
        img = img.point(lambda v: 0 if v < 160 else 255).convert("1")
    save_image(img, out_dir / f"{stem}.{ext}", "tif" if fmt == "tif_lzw" else fmt)
    (out_dir / f"{stem}.txt").write_text("\n".join(truth.lines) + "\n", encoding="utf-8")
    doc = {"image": f"{stem}.{ext}", "width": truth.width, "height": truth.height,
           "rotation_degrees_ccw": truth.rotation_degrees_ccw,
           "lines": [{"text": t, "box": list(b)} for t, b in zip(truth.lines, truth.boxes)],
           "spec": asdict(spec), "meta": truth.meta}
    (out_dir / f"{stem}.json").write_text(json.dumps(doc, indent=1, ensure_ascii=False) + "\n", encoding="utf-8")
    return truth


def write_archive(out_dir: Path | str, spec: ArchiveSpec | None = None) -> list[Path]:
    """Write an invented archive: images, ``.txt`` ground truth and ``.json`` boxes.

    Pages of the same currency style form one book; each page's total is
    brought forward onto the next page of that book, so the totals really sum.
    """
    a = spec or ArchiveSpec()
    out = Path(out_dir)
    carried: dict[str, int] = {}
    written = []
    for stem, ps, fmt in archive_page_specs(a):
        ps.brought_forward = carried.get(ps.currency, 0) if ps.folio > 1 else 0
        truth = write_page(out, stem, ps, fmt)
        carried[ps.currency] = truth.carried_forward
        written.append(out / f"{stem}.{'tif' if fmt == 'tif_lzw' else fmt}")
    return written


# --------------------------------------------------------------------------- training lines


def ledger_line_fields(rng: random.Random) -> list[str]:
    """The fields of one ledger-like line (dates, payees, particulars, amounts)."""
    cur = rng.choice(["decimal", "lsd", "lsd_marked"])
    spec = PageSpec(currency=cur)
    value = _random_amount(rng, spec)
    r = rng.random()
    if r < 0.08:
        return [rng.choice(["Brought forward", "Carried forward", "Total", "Balance"])] + _amount_cols(spec, value)
    if r < 0.12:
        return [FIRM, "Cash Book", f"Folio {rng.randint(1, 400)}"]
    if r < 0.16:
        return ["Date", "Payee", "Particulars"] + (["£", "s", "d"] if cur == "lsd" else ["Amount"])
    d = format_date(random_date(rng, rng.randint(1840, 1950)), rng.choice(["dmy", "md", "slash", "iso"]))
    fields = [d, invented_payee(rng), particulars(rng)]
    if rng.random() < 0.3:
        fields[2] += " " + particulars(rng)
    return fields + _amount_cols(spec, value)


def line_text(rng: random.Random) -> tuple[list[str], str]:
    """Choose the content of a training line: (fields, kind)."""
    r = rng.random()
    if r < 0.45:
        return ledger_line_fields(rng), "ledger"
    if r < 0.75:
        return [prose_line(rng, rng.randint(8, 60))], "prose"
    if r < 0.88:
        parts = []
        for _ in range(rng.randint(1, 6)):
            c = rng.random()
            if c < 0.3:
                parts.append(format_decimal(rng.randint(0, 10**8), thousands=rng.random() < 0.7))
            elif c < 0.5:
                parts.append(format_lsd_marked(rng.randint(0, 4 * 240 * 900)))
            elif c < 0.7:
                parts.append(format_date(random_date(rng, rng.randint(1840, 1950)), rng.choice(["dmy", "md", "slash", "iso"])))
            else:
                parts.append(str(rng.randint(0, 10 ** rng.randint(1, 7))))
        return parts, "numbers"
    return [random_chars(rng, rng.randint(3, 40))], "chars"


def render_line(fields: Sequence[str], fnt: ImageFont.FreeTypeFont, rng: random.Random,
                ink: int = 20, gap_range: tuple[float, float] = (0.6, 6.0)) -> Image.Image:
    """Render fields on one line, separated by gaps of random width (in spaces)."""
    space = max(1.0, fnt.getlength(" "))
    ascent, descent = fnt.getmetrics()
    xs = []
    x = 0.0
    for i, f in enumerate(fields):
        xs.append(x)
        x += fnt.getlength(f)
        if i < len(fields) - 1:
            x += space * (1.0 if rng.random() < 0.3 else rng.uniform(*gap_range))
    w = int(x) + 4
    h = ascent + descent + 4
    img = Image.new("L", (w, h), 255)
    d = ImageDraw.Draw(img)
    for f, xx in zip(fields, xs):
        d.text((xx + 2, 2 + ascent), f, font=fnt, fill=ink, anchor="ls")
    return img


def crop_ink(img: Image.Image, threshold: int = 128) -> Image.Image:
    a = np.asarray(img)
    mask = a < threshold
    if not mask.any():
        return img
    ys = np.where(mask.any(axis=1))[0]
    xs = np.where(mask.any(axis=0))[0]
    return img.crop((int(xs[0]), int(ys[0]), int(xs[-1]) + 1, int(ys[-1]) + 1))


def degrade_line(img: Image.Image, rng: random.Random) -> Image.Image:
    """Per-line version of the page degradations, plus scale jitter."""
    nprng = np.random.default_rng(rng.randint(0, 2**31))
    if rng.random() < 0.3:
        img = img.rotate(rng.uniform(-0.8, 0.8), resample=Image.BICUBIC, fillcolor=255, expand=True)
    if rng.random() < 0.3:
        f = rng.uniform(0.5, 0.9)
        w, h = img.size
        img = img.resize((max(1, int(w * f)), max(1, int(h * f))), Image.BILINEAR).resize((w, h), Image.BILINEAR)
    if rng.random() < 0.5:
        img = img.filter(ImageFilter.GaussianBlur(rng.uniform(0.3, 1.1)))
    a = np.asarray(img).astype(np.float32)
    h, w = a.shape
    if rng.random() < 0.6:
        gx = np.linspace(0, 1, w)[None, :]
        if rng.random() < 0.5:
            gx = gx[:, ::-1]
        paper = 255 - rng.uniform(5, 60) * gx
        a = a / 255.0 * paper
    if rng.random() < 0.7:
        a += nprng.normal(0, rng.uniform(2, 14), a.shape)
    if rng.random() < 0.3:
        for _ in range(rng.randint(1, 6)):
            y, x = int(nprng.integers(0, h)), int(nprng.integers(0, w))
            a[max(0, y - 1):y + 1, max(0, x - 1):x + 1] *= 0.4
    return Image.fromarray(np.clip(a, 0, 255).astype(np.uint8))


def pad_like_segmenter(img: Image.Image, rng: random.Random) -> Image.Image:
    """Pad a tight crop as a line segmenter's crop would be: a little paper around."""
    w, h = img.size
    top = int(round(h * rng.uniform(0.05, 0.35)))
    bottom = int(round(h * rng.uniform(0.05, 0.35)))
    left = int(round(h * rng.uniform(0.05, 0.5)))
    right = int(round(h * rng.uniform(0.05, 0.5)))
    out = Image.new("L", (w + left + right, h + top + bottom), 255)
    out.paste(img, (left, top))
    return out


def line_sample(rng: random.Random, fonts: Sequence[str] = TRAIN_FONTS,
                size_range: tuple[int, int] = (16, 34)) -> tuple[Image.Image, str]:
    """One training line: a grey crop such as the segmenter produces, and its text."""
    img, text, _kind = line_sample_with_kind(rng, fonts, size_range)
    return img, text


def line_sample_with_kind(rng: random.Random, fonts: Sequence[str] = TRAIN_FONTS,
                          size_range: tuple[int, int] = (16, 34)) -> tuple[Image.Image, str, str]:
    """As :func:`line_sample`, also returning the kind of content
    ("ledger", "prose", "numbers" or "chars": random characters)."""
    fields, kind = line_text(rng)
    fields = [f for f in fields if f]
    fnt = font(rng.choice(list(fonts)), rng.randint(*size_range))
    ink = rng.randint(0, 40) if rng.random() < 0.7 else rng.randint(60, 140)
    img = render_line(fields, fnt, rng, ink=ink)
    img = crop_ink(img, threshold=min(200, ink + 60))
    img = pad_like_segmenter(img, rng)
    img = degrade_line(img, rng)
    text = " ".join(" ".join(fields).split())
    return img, text, kind


def line_samples(seed: int, n: int, fonts: Sequence[str] = TRAIN_FONTS) -> Iterator[tuple[Image.Image, str]]:
    """``n`` training lines, deterministic by ``seed``."""
    rng = random.Random(seed)
    for _ in range(n):
        yield line_sample(rng, fonts)


# --------------------------------------------------------------------------- command line


def _int_range(text: str) -> tuple[int, int]:
    """``"16-30"`` -> (16, 30); ``"20"`` -> (20, 20)."""
    import argparse

    parts = text.split("-")
    try:
        lo, hi = (int(parts[0]), int(parts[-1])) if len(parts) <= 2 else (None, None)
    except ValueError:
        lo = hi = None
    if lo is None or hi is None or lo < 1 or hi < lo:
        raise argparse.ArgumentTypeError(f"expected N or A-B with 1 <= A <= B, got {text!r}")
    return lo, hi


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m ocrbench.synth OUT_DIR``: write an invented archive of chosen size and density."""
    import argparse

    d = ArchiveSpec()
    ap = argparse.ArgumentParser(
        prog="python -m ocrbench.synth",
        description=f"Write invented ledger pages ({FIRM}, a made-up firm) with exact ground truth: "
                    "<stem>.png/.jpg/.tif, <stem>.txt (one line per text line) and <stem>.json (line boxes).")
    ap.add_argument("out_dir", help="folder to write (created if missing)")
    ap.add_argument("--pages", type=int, default=d.n_pages, help=f"number of pages (default {d.n_pages})")
    ap.add_argument("--seed", type=int, default=d.seed, help=f"random seed (default {d.seed})")
    ap.add_argument("--lines-per-page", type=_int_range, default=d.lines_per_page, metavar="A-B",
                    help="entry lines per page, drawn from A..B (default %d-%d)" % d.lines_per_page)
    ap.add_argument("--chars-per-line", type=_int_range, default=d.chars_per_line, metavar="A-B",
                    help="target characters per entry line, drawn from A..B (default %d-%d)" % d.chars_per_line)
    ap.add_argument("--degraded-share", type=float, default=d.degraded_share,
                    help=f"share of degraded (noisy, blurred, unevenly lit) pages (default {d.degraded_share})")
    ap.add_argument("--skewed-share", type=float, default=d.skewed_share,
                    help=f"share of rotated pages (default {d.skewed_share})")
    ap.add_argument("--max-skew", type=float, default=d.max_skew,
                    help=f"largest rotation in degrees (default {d.max_skew})")
    args = ap.parse_args(argv)
    if args.pages < 1:
        ap.error("--pages must be at least 1")
    for name in ("degraded_share", "skewed_share"):
        if not 0.0 <= getattr(args, name) <= 1.0:
            ap.error(f"--{name.replace('_', '-')} must be between 0 and 1")
    spec = ArchiveSpec(n_pages=args.pages, seed=args.seed, lines_per_page=args.lines_per_page,
                       chars_per_line=args.chars_per_line, degraded_share=args.degraded_share,
                       skewed_share=args.skewed_share, max_skew=args.max_skew)
    written = write_archive(args.out_dir, spec)
    print(f"wrote {len(written)} pages to {args.out_dir}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
