"""Page images: load, check, binarise, deskew and cut into text lines.

This is the first stage of every run. It turns a scanned page (PNG, JPEG or
TIFF, any of the modes scanners and archives produce) into an 8-bit grey array,
estimates and removes the skew, and finds the text lines with their boxes and
grey crops for the recognisers.

Design, in short (each step is a plain function so it can be tested alone):

* **Loading** (:func:`load_page`) checks the declared size against a pixel
  limit *before* any pixel is decoded (a decompression bomb is refused, never
  allocated), converts every mode to 8-bit grey (transparent parts composited
  on white paper), honours the EXIF orientation and reads the resolution.
* **Binarisation** (:func:`binarise`) first flattens uneven illumination (the
  paper level is estimated on a coarse grid of blocks and divided out), then
  applies Otsu's global threshold (:func:`otsu_threshold`, N. Otsu 1979,
  computed on the 256-bin histogram). A page whose two classes barely differ
  (blank paper with noise) has no ink.
* **Skew** (:func:`estimate_skew`) maximises the variance of the horizontal
  projection profile of the ink over candidate angles, coarse then fine. Ink
  pixels are projected as points (no image is rotated per angle), so a page
  takes a few tens of milliseconds.
* **Lines** (:func:`segment_lines`): ruled lines (ink runs far longer than any
  stroke) are removed, the ink is split into 8-connected components
  (:func:`connected_components`, labelled on runs, vectorised), and the
  letter-sized components give a horizontal projection whose bands are split at
  deep valleys (close or touching lines; letters joined across two lines are
  shared out by row). Small components (dots, commas, dashes, specks) never make
  or stretch a line by themselves: they join one only where punctuation sits.
  Crops get a paper margin like the recognisers' training lines, with the ink of
  neighbouring lines in that margin blanked.

Boxes are in the coordinates of the deskewed page; with ``deskew`` the page is
rotated back about its centre on the same canvas, so boxes line up with the
unrotated original.
"""

from __future__ import annotations

import math
import re
import struct
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps, UnidentifiedImageError

from ocrbench.errors import ImageTooLargeError, InputError, PageError

DEFAULT_MAX_PIXELS = 200_000_000
IMAGE_SUFFIXES = {".png", ".jpg", ".jpeg", ".tif", ".tiff"}

# Pillow refuses images over 2 * MAX_IMAGE_PIXELS inside Image.open (before we see the
# size). Align that hard limit with our default so DEFAULT_MAX_PIXELS is the one in force;
# never lower a limit an application has raised or switched off.
if Image.MAX_IMAGE_PIXELS is not None and 2 * Image.MAX_IMAGE_PIXELS < DEFAULT_MAX_PIXELS:
    Image.MAX_IMAGE_PIXELS = DEFAULT_MAX_PIXELS // 2

#: Pillow format names accepted.
_FORMATS = ("PNG", "JPEG", "TIFF")

#: Below this difference between the mean grey of paper and of ink (after
#: illumination flattening) a page is treated as blank: Otsu would otherwise
#: split plain noise into "ink" and "paper".
MIN_CONTRAST = 40.0

#: Skews smaller than this are not corrected: the largest displacement on a
#: 1500-pixel page is under 1.5 pixels, and resampling would only blur.
MIN_DESKEW_DEGREES = 0.05

#: Ink lower than this many pixels is not taken for a text line (no recogniser reads it;
#: on a page without letters a speck would otherwise set the scale).
MIN_LINE_HEIGHT = 6

#: Padding of a line crop around its ink box, as a share of the box height
#: (the demo recognisers were trained with 5-35 % above/below, 5-50 % at the sides).
CROP_PAD_VERTICAL = 0.18
CROP_PAD_HORIZONTAL = 0.25


# --------------------------------------------------------------------------- references


@dataclass(frozen=True)
class PageRef:
    """One page: a file, or one frame (1-based) of a multi-page TIFF."""

    path: Path
    frame: int | None = None

    @property
    def id(self) -> str:
        """File name, with ``#frame`` for a frame of a multi-page TIFF."""
        name = Path(self.path).name
        return name if self.frame is None else f"{name}#{self.frame}"

    def display(self) -> str:
        """The path as given, with ``#frame`` for a frame of a multi-page TIFF."""
        return str(self.path) if self.frame is None else f"{self.path}#{self.frame}"


def _tiff_frame_count(path: Path) -> int | None:
    """Frames in a TIFF file, or None when it cannot be read (load_page will say why)."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")      # load_page reports what matters
            with Image.open(path, formats=("TIFF",)) as im:
                return int(getattr(im, "n_frames", 1))
    except (OSError, SyntaxError, ValueError, EOFError, Image.DecompressionBombError):
        return None
    except Exception:  # noqa: BLE001 - a damaged file must not stop the listing
        return None


def list_pages(target: Path | str) -> list[PageRef]:
    """The pages in ``target``: a file, or a folder (one level, sorted by name).

    Multi-page TIFFs expand into one :class:`PageRef` per frame. A file that
    cannot be opened still becomes ``PageRef(path)`` so that :func:`load_page`
    reports it with its reason, and a batch goes on with the others.
    Raises :class:`InputError` only if ``target`` does not exist.
    """
    p = Path(target)
    if not p.exists():
        raise InputError(p, "no such file or folder")
    if p.is_dir():
        files = sorted((f for f in p.iterdir() if f.is_file() and f.suffix.lower() in IMAGE_SUFFIXES),
                       key=lambda f: f.name)
    else:
        files = [p]
    refs: list[PageRef] = []
    for f in files:
        if f.suffix.lower() in (".tif", ".tiff"):
            n = _tiff_frame_count(f)
            if n is not None and n > 1:
                refs.extend(PageRef(f, i) for i in range(1, n + 1))
                continue
        refs.append(PageRef(f))
    return refs


# --------------------------------------------------------------------------- loading


@dataclass
class Page:
    """A loaded page: 8-bit grey (0 = black ink, 255 = paper), upright."""

    ref: PageRef
    gray: np.ndarray
    dpi: tuple[float, float] | None


def _read_dpi(im: Image.Image) -> tuple[float, float] | None:
    dpi = im.info.get("dpi")
    if dpi is None:
        return None
    try:
        x, y = float(dpi[0]), float(dpi[1])
    except (TypeError, ValueError, IndexError):
        return None
    if not (math.isfinite(x) and math.isfinite(y)) or x <= 0 or y <= 0:
        return None
    return (round(x, 1), round(y, 1))


def _to_gray(im: Image.Image) -> np.ndarray:
    """Any Pillow mode to uint8 grey; transparency is composited on white paper."""
    mode = im.mode
    if mode == "L":
        return np.asarray(im, dtype=np.uint8)
    if mode == "1":
        return np.asarray(im.convert("L"), dtype=np.uint8)
    if mode in ("I;16", "I;16L", "I;16B", "I;16N", "I", "F"):
        a = np.asarray(im)
        if mode == "F":
            a = a.astype(np.float64)
            finite = a[np.isfinite(a)]
            top = float(finite.max()) if finite.size else 1.0
            scale = 255.0 if top <= 1.0 else 1.0
            return np.clip(np.nan_to_num(a * scale, nan=255.0), 0, 255).round().astype(np.uint8)
        a = a.astype(np.int64)
        if mode == "I" and a.size and (a.min() < 0 or a.max() > 65535):
            lo, hi = int(a.min()), int(a.max())
            return ((a - lo) * 255 // max(1, hi - lo)).astype(np.uint8)
        # 16-bit samples: 0..65535 onto 0..255 (65535 / 257 = 255).
        return ((a + 128) // 257).clip(0, 255).astype(np.uint8)
    if mode in ("RGBA", "LA", "PA", "La", "RGBa") or (mode == "P" and "transparency" in im.info) \
            or (mode in ("RGB", "L") and "transparency" in im.info):
        rgba = im.convert("RGBA")
        paper = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
        return np.asarray(Image.alpha_composite(paper, rgba).convert("L"), dtype=np.uint8)
    if mode in ("RGB", "P", "CMYK", "YCbCr", "LAB", "HSV"):
        rgb = im if mode == "RGB" else im.convert("RGB")
        return np.asarray(rgb.convert("L"), dtype=np.uint8)
    try:
        return np.asarray(im.convert("L"), dtype=np.uint8)
    except (ValueError, OSError) as e:
        raise ValueError(f"unsupported image mode {mode}") from e


def _signature(path: Path) -> str | None:
    """The image format a file's first bytes announce, if any."""
    try:
        with open(path, "rb") as f:
            head = f.read(8)
    except OSError:
        return None
    if head.startswith(b"\x89PNG\r\n\x1a\n"):
        return "PNG"
    if head.startswith(b"\xff\xd8"):
        return "JPEG"
    if head[:4] in (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+"):
        return "TIFF"
    return None


def load_page(ref: PageRef, *, max_pixels: int = DEFAULT_MAX_PIXELS) -> Page:
    """Load one page as 8-bit grey.

    The declared size is checked against ``max_pixels`` before any pixel is
    decoded. Pillow's own guard (raised at import to ``DEFAULT_MAX_PIXELS``)
    fires even earlier for larger images and is reported the same way; an
    application wanting ``max_pixels`` above it must raise
    ``PIL.Image.MAX_IMAGE_PIXELS`` as well.
    Raises :class:`ImageTooLargeError` or :class:`PageError`, naming the file.
    """
    path = Path(ref.path)
    shown = ref.display()
    if not path.exists():
        raise PageError(shown, "file not found")
    if path.is_dir():
        raise PageError(shown, "is a folder, not an image")
    size = path.stat().st_size
    if size == 0:
        raise PageError(shown, "empty file (0 bytes)")
    try:
        fh = open(path, "rb")
    except OSError as e:
        raise PageError(shown, f"cannot read the file ({e.strerror or e})") from e
    try:
        with fh, warnings.catch_warnings():
            # Our own limit below replaces Pillow's warning (its hard error still applies);
            # warnings about damaged metadata (EXIF) do not stop a page whose pixels decode.
            warnings.simplefilter("ignore")
            with Image.open(fh, formats=_FORMATS) as im:
                if ref.frame is not None:
                    n = int(getattr(im, "n_frames", 1))
                    if not 1 <= ref.frame <= n:
                        raise PageError(shown, f"has {n} frame(s), no frame {ref.frame}")
                    im.seek(ref.frame - 1)
                w, h = im.size
                if w <= 0 or h <= 0:
                    raise PageError(shown, f"declares an empty size {w}x{h}")
                if w * h > max_pixels:
                    raise ImageTooLargeError(
                        shown, f"declares {w}x{h} = {w * h:,} pixels, over the limit of {max_pixels:,} "
                               "(possible decompression bomb; raise max_pixels if the scan is genuine)")
                dpi = _read_dpi(im)
                im.load()
                upright = ImageOps.exif_transpose(im)
                if upright is not im and upright.size != im.size and dpi is not None:
                    dpi = (dpi[1], dpi[0])
                gray = _to_gray(upright)
    except PageError:
        raise
    except Image.DecompressionBombError as e:
        # Pillow's own guard fires inside Image.open, before our check can see the size.
        m = re.search(r"\((\d+) pixels\)", str(e))
        declared = f"declares {int(m.group(1)):,} pixels" if m else "declares too many pixels"
        raise ImageTooLargeError(
            shown, f"{declared}, over Pillow's safety limit of {2 * (Image.MAX_IMAGE_PIXELS or 0):,} "
                   "(possible decompression bomb)") from e
    except UnidentifiedImageError as e:
        kind = _signature(path)
        if kind:
            raise PageError(shown, f"damaged or truncated {kind} file (its header or directory cannot be read)") from e
        raise PageError(shown, "not a PNG, JPEG or TIFF image") from e
    except MemoryError as e:
        raise PageError(shown, "not enough memory to decode this image") from e
    except (OSError, SyntaxError, ValueError, EOFError, IndexError, KeyError, TypeError, struct.error) as e:
        detail = str(e) or type(e).__name__
        raise PageError(shown, f"damaged or truncated image data, cannot decode the pixels ({detail})") from e
    return Page(ref=ref, gray=np.ascontiguousarray(gray), dpi=dpi)


# --------------------------------------------------------------------------- binarisation


def otsu_threshold(gray: np.ndarray) -> int:
    """Otsu's threshold (N. Otsu, 1979) on the 256-bin histogram of ``gray``.

    Returns ``t`` such that pixels ``<= t`` form the dark class: ``t``
    maximises the between-class variance ``w0 * w1 * (mu0 - mu1) ** 2``.
    A constant image returns its value.
    """
    g = np.asarray(gray)
    if g.size == 0:
        return 0
    hist = np.bincount(g.ravel().astype(np.uint8, copy=False), minlength=256).astype(np.float64)
    levels = np.arange(256, dtype=np.float64)
    w0 = np.cumsum(hist)
    s0 = np.cumsum(hist * levels)
    total, total_s = w0[-1], s0[-1]
    w1 = total - w0
    with np.errstate(divide="ignore", invalid="ignore"):
        mu0 = s0 / w0
        mu1 = (total_s - s0) / w1
        between = w0 * w1 * (mu0 - mu1) ** 2
    between = np.where((w0 > 0) & (w1 > 0), between, -1.0)
    if between.max() < 0:
        return int(g.min())
    return int(np.argmax(between))


def _block_size(h: int, w: int) -> int:
    return int(min(64, max(8, round(math.sqrt(h * w) / 80))))


def flatten_illumination(gray: np.ndarray) -> np.ndarray:
    """Divide out the paper level, estimated on a coarse grid of blocks.

    Each block's paper level is a high percentile of its pixels (text strokes
    are thinner than a block), widened by a 3x3 maximum over neighbouring blocks
    (for blocks filled by ink) and interpolated back to full size.
    """
    g = np.asarray(gray, dtype=np.uint8)
    h, w = g.shape
    b = _block_size(h, w)
    if h < 2 * b or w < 2 * b:
        return g.copy()
    gh, gw = h // b, w // b
    blocks = g[: gh * b, : gw * b].reshape(gh, b, gw, b).transpose(0, 2, 1, 3).reshape(gh, gw, b * b)
    k = int(0.9 * (b * b - 1))
    level = np.partition(blocks, k, axis=2)[:, :, k].astype(np.float32)
    padded = np.pad(level, 1, mode="edge")
    level = np.max(np.stack([padded[dy:dy + gh, dx:dx + gw] for dy in range(3) for dx in range(3)]), axis=0)
    level = np.maximum(level, 48.0)   # near-black areas are not paper: never divide by ~0
    bg = np.asarray(Image.fromarray(level, mode="F").resize((gw * b, gh * b), Image.BILINEAR))
    bg = np.pad(bg, ((0, h - gh * b), (0, w - gw * b)), mode="edge")
    out = g.astype(np.float32) * (255.0 / bg)
    return np.clip(out, 0, 255).astype(np.uint8)


def binarise(gray: np.ndarray) -> np.ndarray:
    """Ink mask (True = ink): illumination flattening, then Otsu's threshold.

    A page whose paper and ink classes differ by less than :data:`MIN_CONTRAST`
    grey levels (blank or nearly blank paper) has no ink.
    """
    g = np.asarray(gray)
    if g.ndim != 2:
        raise ValueError(f"expected a 2-D grey image, got shape {g.shape}")
    if g.size == 0:
        return np.zeros(g.shape, dtype=bool)
    flat = flatten_illumination(g)
    t = otsu_threshold(flat)
    ink = flat <= t
    n_ink = int(ink.sum())
    if n_ink == 0 or n_ink == ink.size:
        return np.zeros(g.shape, dtype=bool)
    hist = np.bincount(flat.ravel(), minlength=256).astype(np.float64)
    levels = np.arange(256)
    mu_ink = float((hist[: t + 1] * levels[: t + 1]).sum() / hist[: t + 1].sum())
    mu_paper = float((hist[t + 1:] * levels[t + 1:]).sum() / hist[t + 1:].sum())
    if mu_paper - mu_ink < MIN_CONTRAST:
        return np.zeros(g.shape, dtype=bool)
    return ink


# --------------------------------------------------------------------------- skew


def _ink_points(ink: np.ndarray, max_points: int = 80_000) -> tuple[np.ndarray, np.ndarray]:
    ys, xs = np.nonzero(ink)
    if ys.size > max_points:
        step = int(math.ceil(ys.size / max_points))
        ys, xs = ys[::step], xs[::step]
    return ys.astype(np.float64), xs.astype(np.float64)


def _profile_score(ys: np.ndarray, xs: np.ndarray, degrees: float) -> float:
    """Sum of squares of the projection profile after undoing a ccw skew of ``degrees``."""
    a = math.radians(degrees)
    v = ys * math.cos(a) + xs * math.sin(a)
    bins = np.floor(v - v.min()).astype(np.int64)
    prof = np.bincount(bins).astype(np.float64)
    return float(np.dot(prof, prof))


def estimate_skew(gray: np.ndarray, *, max_degrees: float = 5.0) -> float:
    """Skew of the text lines in degrees, counter-clockwise positive.

    The angle maximising the variance of the horizontal projection profile,
    searched in steps of 0.25 degrees over ``+-max_degrees``, then refined to
    0.02 degrees with a parabola through the best step. Ruled lines count as
    evidence (they run along the text); a page without ink gives 0.0.
    """
    g = np.asarray(gray)
    if g.ndim != 2 or min(g.shape) < 8:
        return 0.0
    ink = binarise(g)
    return _skew_from_ink(ink, max_degrees=max_degrees)


def _skew_from_ink(ink: np.ndarray, *, max_degrees: float) -> float:
    ys, xs = _ink_points(ink)
    if ys.size < 50:
        return 0.0
    xs = xs - xs.mean()
    ys = ys - ys.mean()

    def best_of(angles: np.ndarray) -> tuple[float, np.ndarray]:
        scores = np.array([_profile_score(ys, xs, float(a)) for a in angles])
        return float(angles[int(np.argmax(scores))]), scores

    coarse = np.arange(-max_degrees, max_degrees + 1e-9, 0.25)
    a0, _ = best_of(coarse)
    fine = np.arange(a0 - 0.3, a0 + 0.3 + 1e-9, 0.05)
    a1, _ = best_of(fine)
    finer = np.arange(a1 - 0.06, a1 + 0.06 + 1e-9, 0.02)
    a2, scores = best_of(finer)
    i = int(np.argmax(scores))
    if 0 < i < len(scores) - 1:  # parabolic interpolation of the peak
        l, c, r = scores[i - 1], scores[i], scores[i + 1]
        den = l - 2 * c + r
        if den < 0:
            a2 += 0.02 * 0.5 * (l - r) / den
    a2 = float(np.clip(a2, -max_degrees, max_degrees))
    return round(a2, 3) + 0.0


def deskew(gray: np.ndarray, degrees: float) -> np.ndarray:
    """Rotate the page back by ``degrees`` (ccw skew) about its centre, same canvas, paper fill."""
    g = np.asarray(gray, dtype=np.uint8)
    if degrees == 0 or g.size == 0:
        return g.copy()
    img = Image.fromarray(g).rotate(-degrees, resample=Image.BICUBIC, fillcolor=255, expand=False)
    return np.asarray(img, dtype=np.uint8)


_rotate_back = deskew  # analyse_page's keyword ``deskew`` shadows the function's name


# --------------------------------------------------------------------------- line segmentation


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
    lines: list[LineBox]
    skew_degrees: float
    deskewed: np.ndarray


def _row_runs(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Horizontal runs of True in row-major order: (row, start, end exclusive)."""
    h, w = mask.shape
    padded = np.zeros((h, w + 2), dtype=np.int8)
    padded[:, 1:-1] = mask
    d = np.diff(padded, axis=1)
    rows, starts = np.nonzero(d == 1)
    _, ends = np.nonzero(d == -1)
    return rows, starts, ends


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
    rows, starts, ends = _row_runs(ink)
    for r, a, b in zip(*(x[(ends - starts) >= min_h] for x in (rows, starts, ends))):
        out[r, a:b] = False
    cols, starts, ends = _row_runs(np.ascontiguousarray(ink.T))
    for c, a, b in zip(*(x[(ends - starts) >= min_v] for x in (cols, starts, ends))):
        out[a:b, c] = False
    return out


@dataclass
class Components:
    """8-connected components of an ink mask, labelled on its horizontal runs.

    ``run_label[i]`` is the component of run ``i`` (rows/starts/ends); the
    per-component arrays give bounding boxes (x1/y1 exclusive) and ink area.
    """

    rows: np.ndarray
    starts: np.ndarray
    ends: np.ndarray
    run_label: np.ndarray
    x0: np.ndarray
    y0: np.ndarray
    x1: np.ndarray
    y1: np.ndarray
    area: np.ndarray

    @property
    def count(self) -> int:
        return int(self.area.size)


def connected_components(ink: np.ndarray) -> Components:
    """Label the 8-connected components of ``ink``.

    Runs in consecutive rows that touch (diagonals included) are joined by a
    vectorised union-find (hooking to the smaller label, then pointer jumping),
    so a page takes milliseconds without any compiled extension.
    """
    h, w = ink.shape
    rows, starts, ends = _row_runs(ink)
    n = rows.size
    empty = np.zeros(0, dtype=np.int64)
    if n == 0:
        return Components(rows, starts, ends, empty, empty, empty, empty, empty, empty)
    m = w + 2
    key_s = rows.astype(np.int64) * m + starts
    key_e = rows.astype(np.int64) * m + ends
    nxt = (rows.astype(np.int64) + 1) * m
    # runs of the next row with end >= start and start <= end (8-connectivity) are contiguous
    lo = np.searchsorted(key_e, nxt + starts, side="left")
    hi = np.searchsorted(key_s, nxt + ends, side="right")
    cnt = np.clip(hi - lo, 0, None)
    u = np.repeat(np.arange(n), cnt)
    v = lo[u] + (np.arange(u.size) - np.repeat(np.cumsum(cnt) - cnt, cnt))
    lab = np.arange(n)
    while u.size:
        lu, lv = lab[u], lab[v]
        differ = lu != lv
        if not differ.any():
            break
        u, v, lu, lv = u[differ], v[differ], lu[differ], lv[differ]
        low = np.minimum(lu, lv)
        np.minimum.at(lab, lu, low)
        np.minimum.at(lab, lv, low)
        while True:
            jumped = lab[lab]
            if np.array_equal(jumped, lab):
                break
            lab = jumped
    _, run_label = np.unique(lab, return_inverse=True)
    k = int(run_label.max()) + 1
    x0 = np.full(k, w, dtype=np.int64)
    y0 = np.full(k, h, dtype=np.int64)
    x1 = np.zeros(k, dtype=np.int64)
    y1 = np.zeros(k, dtype=np.int64)
    np.minimum.at(x0, run_label, starts)
    np.maximum.at(x1, run_label, ends)
    np.minimum.at(y0, run_label, rows)
    np.maximum.at(y1, run_label, rows + 1)
    area = np.bincount(run_label, weights=ends - starts, minlength=k).astype(np.int64)
    return Components(rows, starts, ends, run_label, x0, y0, x1, y1, area)


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
    if cc.count == 0:
        return []
    ch_ = cc.y1 - cc.y0
    cw = cc.x1 - cc.x0
    letterish = (cc.area >= 8) & (ch_ >= 3)
    if not letterish.any():
        return []
    # first pass: letter height from the components, line height from the bands
    xh = float(np.median(ch_[letterish]))
    fill = cc.area / np.maximum(1, ch_ * cw)
    figure = (ch_ > 6 * xh) & (cw > 6 * xh) & (fill > 0.35)   # a solid blot, stamp or picture
    flat_rule = (cw > 8 * xh) & (ch_ < 0.5 * xh)
    big = (ch_ >= 0.5 * xh) | (cw >= 0.5 * xh)
    big &= ~figure & ~flat_rule
    if not big.any():
        return []
    bands, prof = _bands(cc, big, h, max(3.0, 0.5 * xh))
    if not bands:
        return []
    band_h = np.array([b - a for a, b in bands], dtype=np.float64)
    band_mass = np.array([prof[a:b].sum() for a, b in bands], dtype=np.float64)
    line_h = max(3.0, _weighted_median(band_h, band_mass))
    # second pass: small against the line height
    small = (ch_ < 0.4 * line_h) & (cw < 0.4 * line_h) & ~figure
    big = ~small & ~figure & ~flat_rule
    if not big.any():
        return []
    bands, prof = _bands(cc, big, h, max(3.0, 0.5 * xh))
    if not bands:
        return []
    nb = len(bands)
    starts = np.array([a for a, _ in bands])
    # letters joined across touching lines form one tall component: its runs are shared
    # out to the bands by row; every other component goes to the band of its centre
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

    lines: list[dict] = []
    for i in range(nb):
        if barea[i] == 0:
            continue
        lines.append({"x0": int(bx0[i]), "x1": int(bx1[i]), "y0": int(by0[i]), "y1": int(by1[i]),
                      "area": int(barea[i]), "members": normal_idx[which == i]})
    if not lines:
        return []
    heights = np.array([ln["y1"] - ln["y0"] for ln in lines], dtype=np.float64)
    typ = _weighted_median(heights, np.array([ln["area"] for ln in lines], dtype=np.float64))
    lines = [ln for ln in lines
             if (ln["y1"] - ln["y0"]) >= max(MIN_LINE_HEIGHT, 0.35 * typ) and ln["area"] >= 0.1 * typ * typ]
    if not lines:
        return []

    # small components: attach to the line they belong to, else drop
    ly0 = np.array([ln["y0"] for ln in lines], dtype=np.float64)
    ly1 = np.array([ln["y1"] for ln in lines], dtype=np.float64)
    margin = 0.15 * typ
    near = 0.3 * typ
    touch = max(1.0, 0.1 * typ)
    dash_reach = 4.0 * typ
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
        j = int(inside[np.argmin(np.abs((ly0[inside] + ly1[inside]) / 2.0 - mid))])
        ln = lines[j]
        within_rows = sy0 >= ln["y0"] and sy1 <= ln["y1"]
        within_cols = sx1 >= ln["x0"] - near and sx0 <= ln["x1"] + near
        if within_cols and within_rows:
            pass                                    # a dot, comma or dash among the letters
        elif within_cols:
            # sticks out above or below: only a mark that starts inside the line next to a
            # letter (a comma below the baseline); marks wholly outside are specks
            if sy1 <= ln["y0"] or sy0 >= ln["y1"]:
                continue
            m = ln["members"]
            over = (cc.x0[m] <= sx1 + touch) & (cc.x1[m] >= sx0 - touch)
            gap = np.maximum(cc.y0[m] - sy1, sy0 - cc.y1[m])
            if not np.any(over & (gap <= margin)):
                continue
        else:
            # beyond the letters: only a flat mark at mid-height, a few letters away
            sw, sh = sx1 - sx0, sy1 - sy0
            flat = sw >= 1.5 * sh or (sw > sh and sw >= 0.25 * typ)
            hgt = ln["y1"] - ln["y0"]
            centred = ln["y0"] + 0.3 * hgt <= mid <= ln["y1"] - 0.2 * hgt
            reach = (ln["x0"] - dash_reach <= sx1) and (sx0 <= ln["x1"] + dash_reach)
            if not (flat and centred and reach):
                continue
        attached[k] = True
        ln["x0"], ln["x1"] = min(ln["x0"], sx0), max(ln["x1"], sx1)
        ln["y0"], ln["y1"] = min(ln["y0"], sy0), max(ln["y1"], sy1)
    return [(ln["x0"], ln["y0"], ln["x1"], ln["y1"]) for ln in lines]


def _crop(gray: np.ndarray, box: tuple[int, int, int, int],
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


def _lines_from_ink(g: np.ndarray, ink: np.ndarray) -> list[LineBox]:
    boxes = find_line_boxes(remove_rules(ink))
    lines = []
    for i, box in enumerate(boxes):
        neighbours = boxes[max(0, i - 2): i] + boxes[i + 1: i + 3]
        lines.append(LineBox(*box, crop=_crop(g, box, neighbours)))
    return lines


def segment_lines(gray: np.ndarray) -> list[LineBox]:
    """Text lines of an already-deskewed page, top to bottom, with padded grey crops."""
    g = np.asarray(gray, dtype=np.uint8)
    if g.ndim != 2 or min(g.shape) < 4:
        return []
    return _lines_from_ink(g, binarise(g))


def analyse_page(gray: np.ndarray, *, deskew: bool = True, max_degrees: float = 5.0) -> Layout:
    """Estimate the skew, deskew (about the centre, same canvas) and find the lines."""
    g = np.asarray(gray, dtype=np.uint8)
    if g.ndim != 2:
        raise ValueError(f"expected a 2-D grey image, got shape {g.shape}")
    if g.size == 0 or min(g.shape) < 4:
        return Layout(lines=[], skew_degrees=0.0, deskewed=g.copy())
    ink = binarise(g)
    skew = 0.0
    if deskew and min(g.shape) >= 8:
        skew = _skew_from_ink(ink, max_degrees=max_degrees)
    if abs(skew) >= MIN_DESKEW_DEGREES:
        straight = _rotate_back(g, skew)
        ink = binarise(straight)
    else:
        straight = g.copy()
    return Layout(lines=_lines_from_ink(straight, ink), skew_degrees=skew, deskewed=straight)
