"""Which pages a target holds: files of a folder, frames of multi-page files.

A :class:`PageRef` names one page (a file, or one frame of a multi-frame file);
:func:`list_pages` expands a folder or a file into them.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from pathlib import Path

from PIL import Image

from ocrbench.errors import InputError

IMAGE_SUFFIXES = {".png", ".jpg", ".jpeg", ".tif", ".tiff"}


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
