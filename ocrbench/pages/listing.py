"""Which pages a target holds: files of a folder tree, frames of multi-frame files.

A :class:`PageRef` names one page (a file, or one frame of a TIFF or page of a
PDF); :func:`scan_pages` walks a folder (subfolders too unless ``recurse=False``)
and accounts for every entry: a page, or skipped with its reason. Page ids are
paths relative to the folder read (``box1/folio_1.png``, ``book.pdf#3``); a
page's *collection* is its folder relative to that root (``box1``, ``""`` at the top).

Animated GIF, PNG (APNG) and WebP files are read as one page, their first frame,
with a note: animation frames are deltas of one picture, not the pages of a
document (multi-page documents come as TIFF or PDF, whose frames are pages).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from pathlib import Path

from PIL import Image

from ocrbench.errors import InputError
from ocrbench.io.text import printable_name
from ocrbench.io.tree import walk_files

#: Image files read as pages (Pillow decodes them; JPEG 2000 through OpenJPEG).
IMAGE_SUFFIXES = {".png", ".jpg", ".jpeg", ".tif", ".tiff", ".jp2", ".j2k", ".jpf", ".jpx", ".j2c",
                  ".webp", ".bmp", ".gif"}
PDF_SUFFIXES = {".pdf"}
#: Everything read as pages.
PAGE_SUFFIXES = IMAGE_SUFFIXES | PDF_SUFFIXES
#: Files expected beside the pages (ground truth, line boxes, ALTO): counted, not listed one by one.
COMPANION_SUFFIXES = {".txt", ".json", ".xml"}
_MULTI_FRAME = {".tif", ".tiff"} | PDF_SUFFIXES
_MAYBE_ANIMATED = {".gif", ".png", ".webp"}


@dataclass(frozen=True)
class PageRef:
    """One page: a file, or one frame (1-based) of a multi-page TIFF or PDF.

    ``root``: the folder the page was listed from; the page id and the collection
    are relative to it (a file given alone has no root: its id is its name).
    """

    path: Path
    frame: int | None = None
    root: Path | None = None

    @property
    def relpath(self) -> str:
        """The file's path relative to ``root`` (POSIX separators), or its name."""
        p = Path(self.path)
        if self.root is not None:
            try:
                return p.relative_to(self.root).as_posix()
            except ValueError:
                pass
        return p.name

    @property
    def id(self) -> str:
        """Relative path, with ``#frame`` for a frame; non-UTF-8 bytes written ``\\xNN``."""
        name = printable_name(self.relpath)
        return name if self.frame is None else f"{name}#{self.frame}"

    @property
    def collection(self) -> str:
        """The page's folder relative to the root (``box1/vol2``), ``""`` at the top."""
        parent = Path(self.relpath).parent.as_posix()
        return "" if parent == "." else printable_name(parent)

    def display(self) -> str:
        """The path as given, with ``#frame`` for a frame; safe to print."""
        shown = printable_name(str(self.path))
        return shown if self.frame is None else f"{shown}#{self.frame}"


@dataclass
class Listing:
    """The pages of a target and every file or folder not read as a page.

    ``skipped``: (shown path, reason); ``companions``: files of
    :data:`COMPANION_SUFFIXES` (ground truth and the like), not pages; ``notes``:
    (shown path, remark) for pages read with a caveat (first frame of an animation).
    """

    refs: list[PageRef] = field(default_factory=list)
    skipped: list[tuple[str, str]] = field(default_factory=list)
    companions: list[str] = field(default_factory=list)
    notes: list[tuple[str, str]] = field(default_factory=list)


def _frames(path: Path) -> int | None:
    """Frames of an image (pages of a PDF), or None when it cannot be read (load_page will say why)."""
    if path.suffix.lower() in PDF_SUFFIXES:
        from ocrbench.pages.pdf import pdf_page_count   # same package; pypdfium2 loaded only for PDFs

        return pdf_page_count(path)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")      # load_page reports what matters
            with Image.open(path) as im:
                return int(getattr(im, "n_frames", 1))
    except Exception:  # noqa: BLE001 - a damaged file must not stop the listing
        return None


def _refs_of(f: Path, root: Path | None, out: Listing) -> None:
    suffix = f.suffix.lower()
    if suffix in _MULTI_FRAME:
        n = _frames(f)
        if n is not None and n > 1:
            out.refs.extend(PageRef(f, i, root) for i in range(1, n + 1))
            return
    elif suffix in _MAYBE_ANIMATED:
        n = _frames(f)
        if n is not None and n > 1:
            out.notes.append((printable_name(str(f)), f"animated, {n} frames: only the first is read"))
    out.refs.append(PageRef(f, None, root))


def scan_pages(target: Path | str, *, recurse: bool = True) -> Listing:
    """Pages of ``target`` (a file, or a folder tree walked in name order) and everything left out.

    Multi-page TIFFs and PDFs expand into one :class:`PageRef` per frame. A file
    that cannot be opened still becomes a page so that :func:`load_page` reports it
    with its reason, and a batch goes on with the others. Raises :class:`InputError`
    only if ``target`` does not exist.
    """
    p = Path(target)
    if not p.exists():
        if p.is_symlink():
            raise InputError(printable_name(str(p)), "broken link (its target does not exist)")
        raise InputError(printable_name(str(p)), "no such file or folder")
    out = Listing()
    if not p.is_dir():
        _refs_of(p, None, out)
        return out
    walk = walk_files(p, recurse=recurse)
    out.skipped.extend((printable_name(str(s)), why) for s, why in walk.skipped)
    for f in walk.files:
        suffix = f.suffix.lower()
        if suffix in PAGE_SUFFIXES:
            _refs_of(f, p, out)
        elif suffix in COMPANION_SUFFIXES:
            out.companions.append(printable_name(str(f)))
        else:
            out.skipped.append((printable_name(str(f)), f"not a page image ({_kind(f)})"))
    _drop_clashing_ids(out)
    return out


def _kind(f: Path) -> str:
    return f"suffix {printable_name(f.suffix)}" if f.suffix else "no suffix"


def _drop_clashing_ids(out: Listing) -> None:
    """Two files whose printable ids coincide (a name with a literal ``\\xNN`` beside
    the same name in other bytes): the second is skipped, never confused with the first."""
    seen: dict[str, PageRef] = {}
    kept = []
    for r in out.refs:
        if r.id in seen and seen[r.id].path != r.path:
            out.skipped.append((r.display(), f"its page id {r.id!r} is taken by {seen[r.id].display()}"))
            continue
        seen[r.id] = r
        kept.append(r)
    out.refs = kept


def list_pages(target: Path | str, *, recurse: bool = True) -> list[PageRef]:
    """The pages of ``target`` (see :func:`scan_pages`, which also says what was left out)."""
    return scan_pages(target, recurse=recurse).refs
