"""PDF pages as grey images, through pypdfium2 (the PDFium library).

A page that is one embedded image (a scan, the usual hand-over from scanning
vendors; a hidden text layer beside it does not count) is rendered at the
image's own resolution, so no pixel is invented or lost; any other page is
rendered at ``dpi`` (default :data:`DEFAULT_PDF_DPI`). PDFium draws the page, so
image masks, colour spaces and placement are handled as a viewer would.
"""

from __future__ import annotations

import math
from pathlib import Path

from PIL import Image

from ocrbench.errors import ImageTooLargeError, PageError

#: Rendering resolution for PDF pages that are not a single scanned image
#: (300 dpi: the usual minimum for recognition masters; common practice of archives' scanning guidelines).
DEFAULT_PDF_DPI = 300.0
#: Share of the page an image must cover to be taken as "the page is this scan".
SCAN_COVERAGE = 0.9
_POINTS_PER_INCH = 72.0


def _open(path: Path, shown: str):
    import pypdfium2 as pdfium

    try:
        return pdfium.PdfDocument(str(path))
    except pdfium.PdfiumError as e:
        msg = str(e).lower()
        if "password" in msg or "security" in msg:
            raise PageError(shown, "encrypted PDF (it needs a password); decrypt it first") from e
        raise PageError(shown, f"damaged or unreadable PDF ({e})") from e
    except OSError as e:
        raise PageError(shown, f"cannot read the file ({e.strerror or e})") from e


def pdf_page_count(path: Path) -> int | None:
    """Pages of a PDF, or None when it cannot be opened (loading the page says why)."""
    try:
        doc = _open(path, str(path))
    except PageError:
        return None
    try:
        return len(doc)
    finally:
        doc.close()


def _the_scan(page):
    """The page's one image object when it covers the page, else None (a hidden text layer is allowed)."""
    import pypdfium2.raw as pdfium_c

    images = list(page.get_objects(filter=(pdfium_c.FPDF_PAGEOBJ_IMAGE,)))
    if len(images) != 1:
        return None
    img = images[0]
    left, bottom, right, top = img.get_bounds()
    pw, ph = page.get_size()
    placed = max(0.0, right - left) * max(0.0, top - bottom)
    if pw <= 0 or ph <= 0 or placed < SCAN_COVERAGE * pw * ph:
        return None
    return img


def native_dpi(page) -> float | None:
    """The resolution of the page's one scanned image, or None when the page is not one image."""
    img = _the_scan(page)
    if img is None:
        return None
    left, bottom, right, top = img.get_bounds()
    px_w, px_h = img.get_px_size()
    if px_w <= 0 or px_h <= 0:
        return None
    # pixels per inch over the placed area (placement may rotate the image: use areas)
    return _POINTS_PER_INCH * math.sqrt(px_w * px_h / ((right - left) * (top - bottom)))


def _upright_scan_pixels(page):
    """The scan's own decoded pixels when it is placed upright and unrotated, else None.

    (PDFium's rendered variant of the image can come out a row larger from rounding.)
    """
    img = _the_scan(page)
    if img is None or page.get_rotation() % 360 != 0:
        return None
    m = img.get_matrix()
    if abs(m.b) > 1e-9 or abs(m.c) > 1e-9 or m.a <= 0 or m.d <= 0:
        return None
    im = img.get_bitmap(render=False).to_pil()
    return im if im.size == tuple(img.get_px_size()) else None


def load_pdf_page(path: Path, index: int, shown: str, *, dpi: float, max_pixels: int
                  ) -> tuple[Image.Image, tuple[float, float]]:
    """Page ``index`` (0-based) as an image and the resolution it was read at."""
    doc = _open(path, shown)
    try:
        n = len(doc)
        if not 0 <= index < n:
            raise PageError(shown, f"has {n} page(s), no page {index + 1}")
        try:
            page = doc[index]
            native = native_dpi(page)
        except Exception as e:  # noqa: BLE001 - PDFium reports damage in several ways
            raise PageError(shown, f"damaged PDF page ({e})") from e
        use = round(native, 3) if native else dpi
        pw, ph = page.get_size()
        w, h = int(round(pw * use / _POINTS_PER_INCH)), int(round(ph * use / _POINTS_PER_INCH))
        if w * h > max_pixels:
            raise ImageTooLargeError(shown, f"renders to {w}x{h} = {w * h:,} pixels at {use:g} dpi, over the "
                                            f"limit of {max_pixels:,} (lower --pdf-dpi or raise max_pixels)")
        try:
            im = _upright_scan_pixels(page) if native else None
            if im is None:
                im = page.render(scale=use / _POINTS_PER_INCH, grayscale=True).to_pil()
        except Exception as e:  # noqa: BLE001
            raise PageError(shown, f"cannot render the PDF page ({e})") from e
        rounded = round(use, 1)
        return im, (rounded, rounded)
    finally:
        doc.close()
