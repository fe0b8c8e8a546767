"""Walking a folder tree of inputs: every file found, every entry not followed named with a reason.

One walker for page images and text files, so both see the same tree. Links to
files and to folders are followed; a link whose target is missing, a link
loop and a folder reached a second time through a link are reported, never
followed twice. Hidden entries (names starting with ``.``) are reported and
left alone. With ``recurse=False`` subfolders are reported, not read.
"""

from __future__ import annotations

import errno
import os
import stat
from dataclasses import dataclass, field
from pathlib import Path

__all__ = ["Walk", "walk_files"]


@dataclass
class Walk:
    """Files found under a root (sorted by relative path) and the entries left out, with reasons."""

    files: list[Path] = field(default_factory=list)
    skipped: list[tuple[Path, str]] = field(default_factory=list)


def _link_problem(path: Path) -> str | None:
    """Why a link cannot be followed, or None when its target exists."""
    try:
        os.stat(path)
    except OSError as e:
        if e.errno == errno.ELOOP:
            return "link loop (the link points back to itself)"
        if e.errno in (errno.ENOENT, errno.ENOTDIR):
            return f"broken link (its target {os.readlink(path)!r} does not exist)"
        return f"link cannot be followed ({e.strerror or e})"
    return None


def walk_files(root: Path | str, *, recurse: bool = True) -> Walk:
    """Every regular file under ``root`` (a folder), following links, each folder read once."""
    root = Path(root)
    out = Walk()
    seen: set[tuple[int, int]] = set()
    st = os.stat(root)
    seen.add((st.st_dev, st.st_ino))
    _walk(root, out, seen, recurse)
    out.files.sort(key=lambda p: p.relative_to(root).parts)
    out.skipped.sort(key=lambda s: s[0].relative_to(root).parts)
    return out


def _walk(folder: Path, out: Walk, seen: set[tuple[int, int]], recurse: bool) -> None:
    try:
        entries = sorted(os.scandir(folder), key=lambda e: e.name)
    except OSError as e:
        out.skipped.append((folder, f"cannot read the folder ({e.strerror or e})"))
        return
    for entry in entries:
        path = Path(entry.path)
        if entry.name.startswith("."):
            out.skipped.append((path, "hidden (name starts with '.')"))
            continue
        if entry.is_symlink():
            problem = _link_problem(path)
            if problem:
                out.skipped.append((path, problem))
                continue
        try:
            st = os.stat(path)                      # follows links
        except OSError as e:
            out.skipped.append((path, f"cannot be read ({e.strerror or e})"))
            continue
        if stat.S_ISDIR(st.st_mode):
            if not recurse:
                out.skipped.append((path, "subfolder, not read (subfolders are read unless --no-recurse)"))
            elif (st.st_dev, st.st_ino) in seen:
                out.skipped.append((path, "folder already read through another path (link loop)"))
            else:
                seen.add((st.st_dev, st.st_ino))
                _walk(path, out, seen, recurse)
        elif stat.S_ISREG(st.st_mode):
            out.files.append(path)
        else:
            out.skipped.append((path, "not a regular file (device, pipe or socket)"))
