"""File helpers shared by the ``balance`` and ``postprocess`` commands (the library stays free of I/O)."""

from __future__ import annotations

from pathlib import Path

from ocrbench.errors import InputError, TextFileError


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


def text_stem(page_id: str) -> str:
    """File stem of a page's text: ``page_001.png`` -> ``page_001``, ``book.tif#3`` -> ``book_3``."""
    name, _, frame = page_id.partition("#")
    stem = Path(name).stem
    return f"{stem}_{frame}" if frame else stem


def write_texts(out_dir: Path, recogniser: str, texts: dict[str, list[str]]) -> int:
    """Write each page's lines to ``out_dir/recogniser/<stem>.txt`` (UTF-8, one line per text line)."""
    folder = out_dir / recogniser
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise TextFileError(folder, f"cannot create the folder ({e.strerror or e})") from e
    for page_id, lines in texts.items():
        path = folder / f"{text_stem(page_id)}.txt"
        tmp = path.with_name(path.name + ".part")
        try:
            tmp.write_text("".join(f"{ln}\n" for ln in lines), encoding="utf-8")
            tmp.replace(path)
        except OSError as e:
            raise TextFileError(path, f"cannot write ({e.strerror or e})") from e
    return len(texts)
