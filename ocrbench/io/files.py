"""File helpers every stage shares: atomic writes and content hashes.

An atomic write goes through ``<name>.part`` beside the target and
``os.replace``, so a crash or a full disk leaves the old file or the new one,
never half of either. Errors are :class:`~ocrbench.errors.TextFileError`
naming the file.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

from ocrbench.errors import TextFileError

__all__ = ["atomic_write_text", "atomic_write_lines", "sha256_file", "ensure_folder", "is_sqlite_file", "SQLITE_MAGIC"]

_CHUNK = 1 << 20


def atomic_write_text(path: str | Path, text: str) -> Path:
    """Write ``text`` as UTF-8 to ``path`` through a temporary file; TextFileError names the file."""
    p = Path(path)
    tmp = p.with_name(p.name + ".part")
    try:
        tmp.write_text(text, encoding="utf-8", newline="\n")
        os.replace(tmp, p)
    except OSError as e:
        try:
            tmp.unlink(missing_ok=True)
        except OSError:
            pass
        raise TextFileError(p, f"cannot write ({e.strerror or e})") from e
    return p


def atomic_write_lines(path: str | Path, lines: list[str]) -> Path:
    """Write lines as UTF-8 with ``\\n`` endings (each line ended), atomically."""
    return atomic_write_text(path, "".join(f"{ln}\n" for ln in lines))


def ensure_folder(folder: str | Path) -> Path:
    """Create ``folder`` (and parents) if missing; TextFileError names it when that fails."""
    p = Path(folder)
    try:
        p.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise TextFileError(p, f"cannot create the folder ({e.strerror or e})") from e
    return p


def sha256_file(path: str | Path) -> str:
    """Hex sha256 of a file, read in 1 MiB chunks (OSError propagates)."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(_CHUNK), b""):
            h.update(chunk)
    return h.hexdigest()


SQLITE_MAGIC = b"SQLite format 3\x00"     # the first 16 bytes of every SQLite 3 database file


def is_sqlite_file(path: str | Path) -> bool:
    """True for an SQLite file (a run store, or something to refuse with a clear error when opened)."""
    p = Path(path)
    try:
        with open(p, "rb") as f:
            return p.is_file() and f.read(16) == SQLITE_MAGIC
    except OSError:
        return False
