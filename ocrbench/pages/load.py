"""Loading a page image as 8-bit grey, with a size guard before any pixel is decoded.

Every mode scanners and archives produce becomes 8-bit grey (transparent parts
composited on white paper); the EXIF orientation is honoured and the resolution read.
"""

from __future__ import annotations

import io
import math
import re
import struct
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps, UnidentifiedImageError

from ocrbench.errors import ImageTooLargeError, PageError
from ocrbench.pages.listing import PDF_SUFFIXES, PageRef
from ocrbench.pages.pdf import DEFAULT_PDF_DPI, load_pdf_page

DEFAULT_MAX_PIXELS = 200_000_000

# Pillow refuses images over 2 * MAX_IMAGE_PIXELS inside Image.open (before we see the
# size). Align that hard limit with our default so DEFAULT_MAX_PIXELS is the one in force;
# never lower a limit an application has raised or switched off.
if Image.MAX_IMAGE_PIXELS is not None and 2 * Image.MAX_IMAGE_PIXELS < DEFAULT_MAX_PIXELS:
    Image.MAX_IMAGE_PIXELS = DEFAULT_MAX_PIXELS // 2

#: Pillow format names accepted (PDF goes through pages.pdf).
_FORMATS = ("PNG", "JPEG", "TIFF", "JPEG2000", "WEBP", "BMP", "DIB", "GIF")
_FORMAT_NAMES = "PNG, JPEG, TIFF, JPEG 2000, WebP, BMP, GIF or PDF"
#: PNG chunks that hold only metadata (text, colour profile): dropped when Pillow's limits on
#: their size refuse a file whose pixels are fine (PNG specification, 2nd ed., section 11.3).
_PNG_METADATA_CHUNKS = {b"tEXt", b"zTXt", b"iTXt", b"iCCP", b"eXIf"}


@dataclass
class Page:
    """A loaded page: 8-bit grey (0 = black ink, 255 = paper), upright."""

    ref: PageRef
    gray: np.ndarray
    dpi: tuple[float, float] | None     # None: the file does not say


def _read_dpi(im: Image.Image) -> tuple[float, float] | None:
    if im.format == "TIFF":
        # Pillow reports 1 dpi when a TIFF has no XResolution/YResolution tags (282, 283): unknown.
        tags = getattr(im, "tag_v2", {})
        if 282 not in tags or 283 not in tags:
            return None
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
    """The file format a file's first bytes announce, if any."""
    try:
        with open(path, "rb") as f:
            head = f.read(12)
    except OSError:
        return None
    if head.startswith(b"\x89PNG\r\n\x1a\n"):
        return "PNG"
    if head.startswith(b"\xff\xd8"):
        return "JPEG"
    if head[:4] in (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+"):
        return "TIFF"
    if head.startswith(b"%PDF"):
        return "PDF"
    if head.startswith(b"\x00\x00\x00\x0cjP  ") or head.startswith(b"\xff\x4f\xff\x51"):
        return "JPEG 2000"
    if head.startswith(b"RIFF") and head[8:12] == b"WEBP":
        return "WebP"
    if head.startswith(b"BM"):
        return "BMP"
    if head[:6] in (b"GIF87a", b"GIF89a"):
        return "GIF"
    return None


def _png_without_metadata(path: Path) -> io.BytesIO | None:
    """The PNG with its metadata chunks left out, or None when its chunk structure is broken."""
    out = io.BytesIO()
    with open(path, "rb") as f:
        out.write(f.read(8))
        while True:
            head = f.read(8)
            if len(head) < 8:
                return None
            length, kind = struct.unpack(">I4s", head)
            if kind in _PNG_METADATA_CHUNKS:
                f.seek(length + 4, io.SEEK_CUR)
                continue
            body = f.read(length + 4)
            if len(body) < length + 4:
                return None
            out.write(head + body)
            if kind == b"IEND":
                break
    out.seek(0)
    return out


def load_page(ref: PageRef, *, max_pixels: int = DEFAULT_MAX_PIXELS, pdf_dpi: float = DEFAULT_PDF_DPI) -> Page:
    """Load one page as 8-bit grey.

    The declared size is checked against ``max_pixels`` before any pixel is
    decoded. Pillow's own guard (raised at import to ``DEFAULT_MAX_PIXELS``)
    fires even earlier for larger images and is reported the same way; an
    application wanting ``max_pixels`` above it must raise
    ``PIL.Image.MAX_IMAGE_PIXELS`` as well. PDF pages are rendered by
    :mod:`ocrbench.pages.pdf` (``pdf_dpi`` for pages that are not one scanned image).
    Raises :class:`ImageTooLargeError` or :class:`PageError`, naming the file.
    """
    path = Path(ref.path)
    shown = ref.display()
    if not path.exists():
        raise PageError(shown, "file not found")
    if path.is_dir():
        raise PageError(shown, "is a folder, not an image")
    if path.stat().st_size == 0:
        raise PageError(shown, "empty file (0 bytes)")
    if path.suffix.lower() in PDF_SUFFIXES or _signature(path) == "PDF":
        im, dpi = load_pdf_page(path, (ref.frame or 1) - 1, shown, dpi=pdf_dpi, max_pixels=max_pixels)
        return Page(ref=ref, gray=np.ascontiguousarray(_to_gray(im)), dpi=dpi)
    try:
        fh = open(path, "rb")
    except OSError as e:
        raise PageError(shown, f"cannot read the file ({e.strerror or e})") from e
    try:
        with fh:
            gray, dpi = _decode(fh, ref, shown, max_pixels)
    except PageError:
        raise
    except (MemoryError, Image.DecompressionBombError) as e:
        raise _explain(e, path, shown) from e
    except (OSError, SyntaxError, ValueError, EOFError, IndexError, KeyError, TypeError, struct.error) as e:
        stripped = _png_without_metadata(path) if _signature(path) == "PNG" else None
        if stripped is None:
            raise _explain(e, path, shown) from e
        try:           # a PNG whose metadata chunks exceed Pillow's limits: the pixels are fine
            gray, dpi = _decode(stripped, ref, shown, max_pixels)
        except PageError:
            raise
        except Exception:  # noqa: BLE001 - the first failure is the one to report
            raise _explain(e, path, shown) from e
    return Page(ref=ref, gray=np.ascontiguousarray(gray), dpi=dpi)


def _decode(fh, ref: PageRef, shown: str, max_pixels: int) -> tuple[np.ndarray, tuple[float, float] | None]:
    """Grey pixels and resolution of an open image file (frame ``ref.frame`` of a TIFF)."""
    with warnings.catch_warnings():
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
            return _to_gray(upright), dpi


def _explain(e: BaseException, path: Path, shown: str) -> PageError:
    """The one-line error for a page that cannot be decoded."""
    if isinstance(e, Image.DecompressionBombError):
        # Pillow's own guard fires inside Image.open, before our check can see the size.
        m = re.search(r"\((\d+) pixels\)", str(e))
        declared = f"declares {int(m.group(1)):,} pixels" if m else "declares too many pixels"
        return ImageTooLargeError(
            shown, f"{declared}, over Pillow's safety limit of {2 * (Image.MAX_IMAGE_PIXELS or 0):,} "
                   "(possible decompression bomb)")
    if isinstance(e, UnidentifiedImageError):
        kind = _signature(path)
        if kind:
            return PageError(shown, f"damaged or truncated {kind} file (its header or directory cannot be read)")
        return PageError(shown, f"not a {_FORMAT_NAMES} file")
    if isinstance(e, MemoryError):
        return PageError(shown, "not enough memory to decode this image")
    detail = str(e) or type(e).__name__
    return PageError(shown, f"damaged or truncated image data, cannot decode the pixels ({detail})")
