"""File helpers shared by the ``balance`` and ``postprocess`` commands (the library stays free of I/O)."""

from __future__ import annotations

from pathlib import Path, PurePosixPath

from ocrbench.errors import InputError, TextFileError
from ocrbench.io.text import split_page_id, text_names, text_stem

__all__ = ["list_text_files", "read_lines", "write_lines", "text_paths", "text_stem", "write_texts"]


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


def read_lines(path: Path) -> list[str]:
    """Lines of a UTF-8 text file (BOM allowed, LF or CRLF). TextFileError names the file and the bad byte."""
    try:
        data = path.read_bytes()
    except OSError as e:
        raise TextFileError(path, f"cannot read: {e.strerror or e}") from e
    skip = 3 if data.startswith(b"\xef\xbb\xbf") else 0     # byte-order mark
    try:
        text = data[skip:].decode("utf-8")
    except UnicodeDecodeError as e:
        at = e.start + skip
        raise TextFileError(path, f"not UTF-8 text (bad byte 0x{data[at]:02x} at offset {at})") from e
    text = text.replace("\r\n", "\n").replace("\r", "\n")
    lines = text.split("\n")
    if lines and lines[-1] == "":
        lines.pop()          # the newline that ends the last line
    return lines


def write_lines(path: Path, lines: list[str]) -> None:
    """Write lines as UTF-8 with ``\n`` endings, through a temporary file so a crash leaves no half file."""
    tmp = path.with_name(path.name + ".part")
    try:
        tmp.write_text("".join(f"{ln}\n" for ln in lines), encoding="utf-8")
        tmp.replace(path)
    except OSError as e:
        raise TextFileError(path, f"cannot write: {e.strerror or e}") from e


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
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as e:
            raise TextFileError(path.parent, f"cannot create the folder ({e.strerror or e})") from e
        write_lines(path, lines)
    return len(texts)
