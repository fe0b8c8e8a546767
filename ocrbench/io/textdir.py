"""Folders of page texts: listing ``.txt`` pages and writing one text file per page.

Reading a text file is :func:`ocrbench.io.text.read_text_lines`; writing one is
:func:`ocrbench.io.files.atomic_write_lines`.
"""

from __future__ import annotations

from pathlib import Path, PurePosixPath

from ocrbench.errors import InputError, TextFileError
from ocrbench.io.files import atomic_write_lines, ensure_folder
from ocrbench.io.text import split_page_id, text_names, text_stem

__all__ = ["list_text_files", "text_paths", "text_stem", "write_texts"]


def list_text_files(target: Path) -> list[Path]:
    """The ``.txt`` files of a folder (one level, sorted by name), or the one file given.

    Raises InputError when the target is missing or holds no text files.
    """
    if not target.exists():
        raise InputError(target, "no such file or folder")
    if target.is_file():
        return [target]
    files = sorted(p for p in target.iterdir() if p.suffix.lower() == ".txt" and p.is_file())
    if not files:
        raise InputError(target, "holds no .txt files")
    return files


def _inside(path: Path, folder: Path) -> bool:
    return path == folder or folder in path.parents


def text_paths(out_dir: Path, recogniser: str, page_ids, *, input_root: Path | None = None) -> dict[str, Path]:
    """Where each page's text goes: ``out_dir/recogniser/<text name>`` (see :func:`text_names`).

    Raises TextFileError, before anything is written, when a path would leave
    ``out_dir/recogniser`` (a recogniser named ``.`` or ``..``, a page id with ``..``)
    or, given the run's ``input_root``, land in a folder that holds the run's pages
    (where it could overwrite their ground truth).
    """
    root = Path(out_dir).resolve()
    folder = (Path(out_dir) / recogniser).resolve()
    if folder == root or root not in folder.parents:
        raise TextFileError(Path(out_dir) / recogniser, f"the folder for {recogniser!r} would not be a subfolder "
                                                        "of the text output folder; rename the recogniser")
    sources: set[Path] = set()
    if input_root is not None and Path(input_root).is_dir():
        base = Path(input_root).resolve()
        sources = {(base / PurePosixPath(split_page_id(pid)[0]).parent).resolve() for pid in page_ids}
    out: dict[str, Path] = {}
    for pid, name in text_names(page_ids).items():
        path = (folder / name).resolve()
        if not _inside(path, folder) or path == folder:
            raise TextFileError(folder / name, f"the text of page {pid!r} would be written outside {folder}")
        if path.parent in sources:
            raise TextFileError(path, "would be written among the input pages (and could overwrite their "
                                      "ground truth); choose a --text-out folder outside the scans")
        out[pid] = path
    return out


def write_texts(out_dir: Path, recogniser: str, texts: dict[str, list[str]], *,
                input_root: Path | None = None) -> int:
    """Write each page's lines to ``out_dir/recogniser/<text name>`` (UTF-8, one line per text line).

    Subfolders of the input (collections) are kept; names follow :func:`text_names`
    (two scans with one stem keep their suffixes). Paths are checked first (:func:`text_paths`).
    """
    paths = text_paths(out_dir, recogniser, texts.keys(), input_root=input_root)
    for page_id, lines in texts.items():
        path = paths[page_id]
        ensure_folder(path.parent)
        atomic_write_lines(path, lines)
    return len(texts)


def run_folders(recognisers: dict[int, str]) -> dict[int, str]:
    """Output folder name per run id: the recogniser's name, or ``<name>-run<id>`` where two runs share it."""
    names = list(recognisers.values())
    return {rid: name if names.count(name) == 1 else f"{name}-run{rid}" for rid, name in recognisers.items()}
