"""Folders of page texts: listing ``.txt`` pages and writing one text file per page.

Reading a text file is :func:`ocrbench.io.text.read_text_lines`; writing one is
:func:`ocrbench.io.files.atomic_write_lines`.
"""

from __future__ import annotations

from pathlib import Path

from ocrbench.errors import InputError
from ocrbench.io.files import atomic_write_lines, ensure_folder


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


def text_stem(page_id: str) -> str:
    """File stem of a page's text: ``page_001.png`` -> ``page_001``, ``book.tif#3`` -> ``book_3``."""
    name, _, frame = page_id.partition("#")
    stem = Path(name).stem
    return f"{stem}_{frame}" if frame else stem


def write_texts(out_dir: Path, recogniser: str, texts: dict[str, list[str]]) -> int:
    """Write each page's lines to ``out_dir/recogniser/<stem>.txt`` (UTF-8, one line per text line)."""
    folder = ensure_folder(out_dir / recogniser)
    for page_id, lines in texts.items():
        atomic_write_lines(folder / f"{text_stem(page_id)}.txt", lines)
    return len(texts)


def run_folders(recognisers: dict[int, str]) -> dict[int, str]:
    """Output folder name per run id: the recogniser's name, or ``<name>-run<id>`` where two runs share it."""
    names = list(recognisers.values())
    return {rid: name if names.count(name) == 1 else f"{name}-run{rid}" for rid, name in recognisers.items()}
