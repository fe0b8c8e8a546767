"""Page images: load, check, binarise, deskew and cut into text lines.

This is the first stage of every run. It turns a scanned page (PNG, JPEG, TIFF,
JPEG 2000, WebP, BMP, GIF, or a PDF page; any of the modes scanners and archives produce) into an 8-bit grey array,
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

Modules, in the order a page meets them: ``listing`` (which pages a target holds),
``load`` (decode to grey), ``binarise``, ``skew``, ``components`` (runs and
8-connected components), ``segment`` (rules out, line boxes, lines cut at wide
gaps), ``crops`` (padded line crops and their clean-up), ``orient`` (text turned
90/180/270 degrees), ``analyse`` (all of it for one page), ``sanity`` (flags for
pages that are blank, not text, turned or too wide), ``pdf`` (PDF pages). The
public names of each are re-exported here.

Boxes are in the coordinates of the deskewed page; with ``deskew`` the page is
rotated back about its centre on the same canvas, so boxes line up with the
unrotated original.
"""

from __future__ import annotations

from ocrbench.pages.analyse import Layout, LineBox, analyse_page, lines_from_ink, segment_lines
from ocrbench.pages.binarise import MIN_CONTRAST, binarise, flatten_illumination, otsu_threshold
from ocrbench.pages.components import Components, connected_components, row_runs
from ocrbench.pages.crops import (CROP_PAD_HORIZONTAL, CROP_PAD_VERTICAL, clean_crop, crop_line, flatten_crop,
                                  remove_crop_rules, trim_crop, trim_rows)
from ocrbench.pages.listing import (COMPANION_SUFFIXES, IMAGE_SUFFIXES, PAGE_SUFFIXES, PDF_SUFFIXES, Listing, PageRef,
                                    list_pages, scan_pages)
from ocrbench.pages.load import DEFAULT_MAX_PIXELS, Page, load_page
from ocrbench.pages.orient import detect_rotation, turn_upright
from ocrbench.pages.pdf import DEFAULT_PDF_DPI
from ocrbench.pages.sanity import PageCheck, check_page
from ocrbench.pages.survey import inspect_page, survey_page
from ocrbench.pages.segment import MIN_LINE_HEIGHT, cut_overwide, find_line_boxes, remove_rules, split_at_gaps
from ocrbench.pages.skew import MIN_DESKEW_DEGREES, deskew, estimate_skew, skew_from_ink

__all__ = [
    "COMPANION_SUFFIXES", "CROP_PAD_HORIZONTAL", "CROP_PAD_VERTICAL", "Components", "DEFAULT_MAX_PIXELS",
    "DEFAULT_PDF_DPI", "IMAGE_SUFFIXES", "Listing", "PAGE_SUFFIXES", "PDF_SUFFIXES", "scan_pages",
    "PageCheck", "check_page", "detect_rotation", "turn_upright", "clean_crop", "flatten_crop", "remove_crop_rules",
    "trim_crop", "trim_rows", "survey_page", "inspect_page", "cut_overwide",
    "Layout", "LineBox", "MIN_CONTRAST", "MIN_DESKEW_DEGREES", "MIN_LINE_HEIGHT", "Page", "PageRef",
    "analyse_page", "binarise", "connected_components", "crop_line", "deskew", "estimate_skew",
    "find_line_boxes", "flatten_illumination", "lines_from_ink", "list_pages", "load_page",
    "otsu_threshold", "remove_rules", "row_runs", "segment_lines", "skew_from_ink", "split_at_gaps",
]
