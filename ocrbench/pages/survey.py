"""One page surveyed before recognition: loaded, turned, deskewed, cut into lines, checked.

What ``ocrbench pages`` lists for each page; a page that cannot be used gets its
reason instead, and the survey of the others goes on.
"""

from __future__ import annotations

from ocrbench.errors import InputError, OcrbenchError
from ocrbench.pages.analyse import analyse_page
from ocrbench.pages.listing import PageRef
from ocrbench.pages.load import DEFAULT_MAX_PIXELS, load_page
from ocrbench.pages.orient import detect_rotation, turn_upright
from ocrbench.pages.pdf import DEFAULT_PDF_DPI
from ocrbench.pages.sanity import DEFAULT_MAX_ASPECT, PageCheck, check_page


def inspect_page(gray, *, deskew: bool = True, auto_rotate: bool = False,
                 max_aspect: float = DEFAULT_MAX_ASPECT):
    """(layout, check) of a loaded grey page: analysed, its rotation detected (and, with
    ``auto_rotate``, undone before the lines are found), and its sanity flags. What both
    ``ocrbench pages`` and a run do with every page."""
    layout = analyse_page(gray, deskew=deskew)
    found = (layout.deskewed, [(ln.x0, ln.y0, ln.x1, ln.y1) for ln in layout.lines]) if deskew else None
    rotation = detect_rotation(gray, found=found)
    if auto_rotate and rotation:
        layout = analyse_page(turn_upright(gray, rotation), deskew=deskew)
        layout.rotation = rotation
    check: PageCheck = check_page(layout, rotation=rotation, max_aspect=max_aspect)
    return layout, check


def survey_page(ref: PageRef, *, max_pixels: int = DEFAULT_MAX_PIXELS, deskew: bool = True,
                pdf_dpi: float = DEFAULT_PDF_DPI, auto_rotate: bool = False,
                max_aspect: float = DEFAULT_MAX_ASPECT) -> dict:
    """path, collection, lines, skew_degrees, width, height, dpi, rotation, flags, error of one page."""
    row: dict = {"path": ref.display(), "collection": ref.collection, "lines": None, "skew_degrees": None,
                 "error": None, "width": None, "height": None, "dpi": None, "rotation": None, "flags": []}
    try:
        page = load_page(ref, max_pixels=max_pixels, pdf_dpi=pdf_dpi)
    except InputError as e:
        row["error"] = e.reason
        return row
    except OcrbenchError as e:
        row["error"] = str(e)
        return row
    h, w = page.gray.shape
    row.update(width=int(w), height=int(h), dpi=list(page.dpi) if page.dpi else None)
    layout, check = inspect_page(page.gray, deskew=deskew, auto_rotate=auto_rotate, max_aspect=max_aspect)
    row.update(lines=len(layout.lines), skew_degrees=round(float(layout.skew_degrees), 2) + 0.0,
               rotation=check.rotation, flags=check.flags)
    return row
