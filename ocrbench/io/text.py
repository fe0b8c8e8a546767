"""Reading ground-truth and hypothesis text files, and pairing them by name.

The only module of :mod:`ocrbench.accuracy` that touches files.

Text files are UTF-8, with or without a byte-order mark, with LF or CRLF line
ends (a lone CR also ends a line). One text line per file line. Only ``\\n``,
``\\r\\n`` and ``\\r`` break lines: ``str.splitlines`` is deliberately not used,
because it also breaks at form feeds, U+2028 and other characters that may sit
inside a transcribed line. A final line break does not start an extra line.

Pairing is by file stem: ``page_001.txt`` in the truth folder goes with
``page_001.txt`` in the hypothesis folder; files on one side only are listed,
never dropped silently. For a run store, a page id (the page's path relative to
the run's input folder, ``#n`` for frame n of a multi-page TIFF) goes with
``<stem>.txt`` or, for a TIFF frame, ``<stem>_<n>.txt`` (``<stem>.txt`` when
the TIFF holds only that one frame).
"""

from __future__ import annotations

import codecs
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from typing import Iterable

from ocrbench.errors import TextFileError

__all__ = ["read_text_lines", "decode_text", "Pairing", "pair_folders", "pair_store_pages",
           "truth_candidates", "hypothesis_folders", "TEXT_SUFFIX"]

TEXT_SUFFIX = ".txt"


def decode_text(data: bytes, name: str | Path = "<bytes>") -> list[str]:
    """Decode UTF-8 bytes (optional BOM) into lines; TextFileError names ``name`` and the byte offset."""
    bom = len(codecs.BOM_UTF8) if data.startswith(codecs.BOM_UTF8) else 0
    try:
        text = data[bom:].decode("utf-8")
    except UnicodeDecodeError as e:
        offset = e.start + bom
        bad = data[offset:offset + 4]
        raise TextFileError(name, f"not valid UTF-8: undecodable byte 0x{data[offset]:02x} at byte offset "
                                  f"{offset} (bytes {bad!r}); save the file as UTF-8") from None
    if "\r" in text:
        text = text.replace("\r\n", "\n").replace("\r", "\n")
    if not text:
        return []
    lines = text.split("\n")
    if lines[-1] == "":
        lines.pop()
    return lines


def read_text_lines(path: str | Path) -> list[str]:
    """The lines of a UTF-8 text file (BOM optional, LF/CRLF); raises TextFileError naming the file."""
    p = Path(path)
    try:
        data = p.read_bytes()
    except IsADirectoryError:
        raise TextFileError(p, "is a folder, not a text file") from None
    except FileNotFoundError:
        raise TextFileError(p, "does not exist") from None
    except OSError as e:
        raise TextFileError(p, f"cannot be read: {e.strerror or e}") from None
    return decode_text(data, p)


@dataclass
class Pairing:
    """Files paired by name. ``pairs``: (key, truth path, hypothesis path or page id).

    ``hyp_only``: hypotheses (files or page ids) with no ground truth.
    ``truth_only``: ground-truth files with no hypothesis.
    """

    pairs: list[tuple[str, Path, Path | str]] = field(default_factory=list)
    hyp_only: list[str] = field(default_factory=list)
    truth_only: list[str] = field(default_factory=list)

    @property
    def complete(self) -> bool:
        """True when every file found a partner."""
        return not self.hyp_only and not self.truth_only

    def incomplete(self, *, require_truth: bool = False) -> bool:
        """Whether the unpaired files count as a failure: ground truth without a hypothesis always; a
        hypothesis without ground truth only with ``require_truth`` (partial ground truth is normal)."""
        return bool(self.truth_only or (require_truth and self.hyp_only))

    def missing_truth_line(self, shown: int = 3) -> str | None:
        """One line counting the hypotheses without ground truth, naming the first few (None: there are none)."""
        miss = self.hyp_only
        if not miss:
            return None
        more = ", ..." if len(miss) > shown else ""
        return f"{len(miss)} page(s) have no ground truth and were not scored ({', '.join(miss[:shown])}{more})"


def _text_files(folder: Path, what: str) -> dict[str, Path]:
    if not folder.exists():
        raise TextFileError(folder, f"{what} folder does not exist")
    if not folder.is_dir():
        raise TextFileError(folder, f"{what} must be a folder of .txt files")
    return {p.stem: p for p in sorted(folder.iterdir())
            if p.suffix.lower() == TEXT_SUFFIX and p.is_file()}


def hypothesis_folders(hyp_dir: str | Path) -> dict[str, Path]:
    """The hypothesis folders under ``hyp_dir``, by name: the folder itself when it holds ``.txt`` files,
    else each subfolder that does (the layout ``run --text-out`` writes: one subfolder per recogniser)."""
    root = Path(hyp_dir)
    if _text_files(root, "hypothesis"):
        return {root.name or str(root): root}
    subs = {p.name: p for p in sorted(root.iterdir()) if p.is_dir() and _text_files(p, "hypothesis")}
    if not subs:
        raise TextFileError(root, "holds no .txt files, neither directly nor in one subfolder per recogniser")
    return subs


def pair_folders(truth_dir: str | Path, hyp_dir: str | Path) -> Pairing:
    """Pair ``*.txt`` files of two folders by stem (one level, sorted by name)."""
    truth = _text_files(Path(truth_dir), "ground-truth")
    hyp = _text_files(Path(hyp_dir), "hypothesis")
    out = Pairing()
    for stem in sorted(set(truth) | set(hyp)):
        if stem in truth and stem in hyp:
            out.pairs.append((stem, truth[stem], hyp[stem]))
        elif stem in hyp:
            out.hyp_only.append(str(hyp[stem]))
        else:
            out.truth_only.append(str(truth[stem]))
    return out


def truth_candidates(page_id: str, *, single_frame: bool = False) -> list[str]:
    """Ground-truth file names (relative, with ``.txt``) that may belong to a page id, best first.

    ``page_001.png`` → ``page_001.txt``; ``book.tif#3`` → ``book_3.txt``, and also
    ``book.txt`` when ``single_frame`` (the TIFF holds only this frame).
    """
    base, sep, frame = page_id.partition("#")
    p = PurePosixPath(base.replace("\\", "/"))
    stem = p.with_suffix("") if p.suffix else p
    if not sep:
        return [f"{stem}{TEXT_SUFFIX}"]
    out = [f"{stem}_{frame}{TEXT_SUFFIX}"]
    if single_frame:
        out.append(f"{stem}{TEXT_SUFFIX}")
    return out


def pair_store_pages(truth_dir: str | Path, page_ids: Iterable[str]) -> Pairing:
    """Pair the page ids of a run with ground-truth files of ``truth_dir`` (see the module docstring)."""
    truth_root = Path(truth_dir)
    truth = _text_files(truth_root, "ground-truth")   # top level, by stem
    ids = sorted(page_ids)
    frames: dict[str, int] = {}
    for pid in ids:
        base = pid.partition("#")[0]
        frames[base] = frames.get(base, 0) + 1
    stems: dict[str, int] = {}
    for pid in ids:
        stem = PurePosixPath(truth_candidates(pid)[0]).stem
        stems[stem] = stems.get(stem, 0) + 1
    used: set[Path] = set()
    out = Pairing()
    for pid in ids:
        base = pid.partition("#")[0]
        found = None
        for cand in truth_candidates(pid, single_frame=frames[base] == 1):
            path = truth_root / cand
            if path.is_file():
                found = path
                break
            # page in a subfolder, truth kept flat: only when no other page shares the stem
            # (box1/page_001.png and box2/page_001.png must not both take page_001.txt)
            flat = truth.get(PurePosixPath(cand).stem) if stems[PurePosixPath(truth_candidates(pid)[0]).stem] == 1 \
                else None
            if flat is not None:
                found = flat
                break
        if found is None:
            out.hyp_only.append(pid)
        else:
            used.add(found.resolve())
            out.pairs.append((pid, found, pid))
    out.truth_only = [str(p) for stem, p in sorted(truth.items()) if p.resolve() not in used]
    return out
