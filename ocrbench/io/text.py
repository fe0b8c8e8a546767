"""Reading ground-truth and hypothesis text files, and pairing them by name.

The only module of :mod:`ocrbench.accuracy` that touches files.

Text files are UTF-8, with or without a byte-order mark, with LF or CRLF line
ends (a lone CR also ends a line). One text line per file line. Only ``\\n``,
``\\r\\n`` and ``\\r`` break lines: ``str.splitlines`` is deliberately not used,
because it also breaks at form feeds, U+2028 and other characters that may sit
inside a transcribed line. A final line break does not start an extra line.

Page ids and text names (one home for both, used by ``--text-out``, pairing and
export). A page id is the page's path relative to the run's input folder (POSIX
separators), with ``#n`` for frame n of a multi-frame file. ``#`` marks a frame
only after a multi-frame suffix (:data:`MULTI_FRAME_SUFFIXES`: TIFF, PDF) and
only when digits follow: ``Ledger #12.png`` is a plain file. File names that are
not UTF-8 (bytes held as surrogate escapes) and control characters are written
with backslash escapes (``caf\\xe9.png``) in ids and everything shown.

A page's text file is ``<stem>.txt`` beside where the page sits in the tree
(``box1/folio_1.png`` -> ``box1/folio_1.txt``; frame n of ``book.tif`` ->
``book_n.txt``). When two pages of a run would get one text name (``folio_12.png``
and ``folio_12.jpg``; compared ignoring case, as on Windows and macOS disks),
each keeps its file suffix instead: ``folio_12.png.txt``, ``folio_12.jpg.txt``.

Pairing with ground truth uses the same names. ``page_001.txt`` in the truth
folder goes with ``page_001.txt`` in the hypothesis folder, at the same place
in the tree; files on one side only are listed, never dropped silently. For a
run store, each page id goes with the truth file of its text name (for a
TIFF/PDF frame also ``<stem>.txt`` when the run holds only that one frame). A
page whose stem is shared pairs only with its own ``<name>.txt``
(``folio_12.png.txt``); a shared ``folio_12.txt`` pairs with none of them and
is listed as ambiguous. Truth kept flat for pages in subfolders is found by
stem when the stem is unique in the run. ALTO XML truth (``<stem>.alto.xml``)
is read beside or instead of ``.txt`` (``.txt`` wins when both exist).
"""

from __future__ import annotations

import codecs
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from typing import Iterable

from ocrbench.errors import TextFileError
from ocrbench.io.tree import walk_files

__all__ = ["read_text_lines", "read_text", "decode_text", "decode_utf8", "split_lines", "Pairing", "pair_folders",
           "pair_store_pages", "truth_candidates", "TEXT_SUFFIX", "ALTO_SUFFIX", "MULTI_FRAME_SUFFIXES",
           "printable_name", "hypothesis_folders", "split_page_id", "text_stem", "text_names"]

TEXT_SUFFIX = ".txt"
ALTO_SUFFIX = ".alto.xml"
#: Files whose pages are addressed ``file#n`` (1-based); ``#`` in any other name is part of the name.
MULTI_FRAME_SUFFIXES = (".tif", ".tiff", ".pdf")


def decode_utf8(data: bytes, name: str | Path = "<bytes>") -> str:
    """Decode UTF-8 bytes (optional BOM dropped); TextFileError names ``name`` and the byte offset."""
    bom = len(codecs.BOM_UTF8) if data.startswith(codecs.BOM_UTF8) else 0
    try:
        return data[bom:].decode("utf-8")
    except UnicodeDecodeError as e:
        offset = e.start + bom
        bad = data[offset:offset + 4]
        raise TextFileError(name, f"not valid UTF-8: undecodable byte 0x{data[offset]:02x} at byte offset "
                                  f"{offset} (bytes {bad!r}); save the file as UTF-8") from None


def decode_text(data: bytes, name: str | Path = "<bytes>") -> list[str]:
    """Decode UTF-8 bytes (optional BOM) into lines; TextFileError names ``name`` and the byte offset."""
    return split_lines(decode_utf8(data, name))


def split_lines(text: str) -> list[str]:
    """Lines of a text: only LF, CRLF and a lone CR end a line; a final line end starts no extra line."""
    if "\r" in text:
        text = text.replace("\r\n", "\n").replace("\r", "\n")
    if not text:
        return []
    lines = text.split("\n")
    if lines[-1] == "":
        lines.pop()
    return lines


def read_text_lines(path: str | Path) -> list[str]:
    """The lines of a text file (UTF-8, BOM optional, LF/CRLF); raises TextFileError naming the file.

    An ALTO file (``*.alto.xml``) gives its ``TextLine`` texts (see :mod:`ocrbench.io.alto`).
    """
    if Path(path).name.lower().endswith(ALTO_SUFFIX):
        from ocrbench.io.alto import alto_lines   # same package

        return alto_lines(_read_bytes(Path(path)), printable_name(str(path)))
    return split_lines(read_text(path))


def read_text(path: str | Path) -> str:
    """A UTF-8 text file's whole text (BOM dropped, line ends kept); raises TextFileError naming the file."""
    p = Path(path)
    return decode_utf8(_read_bytes(p), printable_name(str(p)))


def _read_bytes(p: Path) -> bytes:
    shown = printable_name(str(p))
    try:
        data = p.read_bytes()
    except IsADirectoryError:
        raise TextFileError(shown, "is a folder, not a text file") from None
    except FileNotFoundError:
        raise TextFileError(shown, "does not exist") from None
    except OSError as e:
        raise TextFileError(shown, f"cannot be read: {e.strerror or e}") from None
    return data


# --------------------------------------------------------------------------- names


def printable_name(name: str) -> str:
    """``name`` as text that always encodes as UTF-8 and prints on one line.

    Bytes of a non-UTF-8 file name (held by Python as surrogate escapes) become
    ``\\xNN``; control characters become ``\\xNN`` too. Other names are returned unchanged.
    """
    if name.isprintable():
        try:
            name.encode("utf-8")
            return name
        except UnicodeEncodeError:
            pass
    try:
        text = name.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")
    except UnicodeEncodeError:          # a lone surrogate that is not an escaped byte
        text = name.encode("utf-8", "backslashreplace").decode("utf-8")
    return "".join(c if c.isprintable() or c == " " else f"\\x{ord(c):02x}" for c in text)


def split_page_id(page_id: str) -> tuple[str, int | None]:
    """(file part, frame or None) of a page id: ``book.tif#3`` -> ("book.tif", 3);
    ``Ledger #12.png`` -> ("Ledger #12.png", None)."""
    base, sep, frame = page_id.rpartition("#")
    if sep and frame.isascii() and frame.isdigit() and PurePosixPath(base).suffix.lower() in MULTI_FRAME_SUFFIXES:
        return base, int(frame)
    return page_id, None


def text_stem(page_id: str) -> str:
    """Text file name of a page without ``.txt``, folders kept: ``box1/page_001.png`` ->
    ``box1/page_001``; ``book.tif#3`` -> ``book_3``."""
    name, frame = split_page_id(page_id)
    p = PurePosixPath(name)
    stem = str(p.with_suffix("")) if p.suffix else str(p)
    return stem if frame is None else f"{stem}_{frame}"


def _full_stem(page_id: str) -> str:
    """The text name that keeps the file's suffix: ``folio_12.png``, ``book.tif_3``."""
    name, frame = split_page_id(page_id)
    name = str(PurePosixPath(name))
    return name if frame is None else f"{name}_{frame}"


def text_names(page_ids: Iterable[str]) -> dict[str, str]:
    """Each page id's text file (relative, with ``.txt``), unique even ignoring case.

    Pages whose stems clash keep their file suffix (``folio_12.png.txt``); a clash
    that remains (never from one folder listing) gets ``~2``, ``~3``... in id order.
    """
    ids = sorted(set(page_ids))
    names = {pid: text_stem(pid) for pid in ids}
    for _ in range(2):
        seen: dict[str, list[str]] = {}
        for pid in ids:
            seen.setdefault(names[pid].casefold(), []).append(pid)
        clashes = [group for group in seen.values() if len(group) > 1]
        if not clashes:
            break
        for group in clashes:
            for pid in group:
                names[pid] = _full_stem(pid)
    taken: set[str] = set()
    out: dict[str, str] = {}
    for pid in ids:
        stem, k = names[pid], 1
        while (stem if k == 1 else f"{stem}~{k}").casefold() in taken:
            k += 1
        final = stem if k == 1 else f"{stem}~{k}"
        taken.add(final.casefold())
        out[pid] = final + TEXT_SUFFIX
    return out


# --------------------------------------------------------------------------- pairing


@dataclass
class Pairing:
    """Files paired by name. ``pairs``: (key, truth path, hypothesis path or page id).

    ``hyp_only``: hypotheses (files or page ids) with no ground truth.
    ``truth_only``: ground-truth files with no hypothesis.
    ``ambiguous``: truth files named by a stem several pages share (``folio_12.txt``
    for ``folio_12.png`` and ``folio_12.jpg``), with those page ids; they are also in ``truth_only``.
    """

    pairs: list[tuple[str, Path, Path | str]] = field(default_factory=list)
    hyp_only: list[str] = field(default_factory=list)
    truth_only: list[str] = field(default_factory=list)
    ambiguous: dict[str, list[str]] = field(default_factory=dict)

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


def _text_files(folder: Path, what: str, *, alto: bool = False) -> dict[str, Path]:
    """Text files of a tree by key (relative path without suffix, as printable text).

    With ``alto``, ``<stem>.alto.xml`` files count too; ``<stem>.txt`` wins when both exist.
    """
    if not folder.exists():
        raise TextFileError(folder, f"{what} folder does not exist")
    if not folder.is_dir():
        raise TextFileError(folder, f"{what} must be a folder of .txt files")
    found: dict[str, Path] = {}
    for p in walk_files(folder).files:
        rel = printable_name(p.relative_to(folder).as_posix())
        low = rel.lower()
        if low.endswith(TEXT_SUFFIX):
            found[rel[: -len(TEXT_SUFFIX)]] = p
        elif alto and low.endswith(ALTO_SUFFIX):
            found.setdefault(rel[: -len(ALTO_SUFFIX)], p)
    return found


def hypothesis_folders(hyp_dir: str | Path, truth_dir: str | Path | None = None) -> dict[str, Path]:
    """The hypothesis folders under ``hyp_dir``, by name: the folder itself when it holds ``.txt`` files,
    else each subfolder that does (the layout ``run --text-out`` writes: one subfolder per recogniser).

    A tree of collections (``box1/``, ``box2/``) looks like that layout too; when every subfolder's
    name is also a folder of ``truth_dir``, the folder is read as one tree, not as recognisers.
    """
    root = Path(hyp_dir)
    _text_files(root, "hypothesis")                     # names a missing folder or a file
    if any(p.is_file() and p.name.lower().endswith(TEXT_SUFFIX) for p in root.iterdir()):
        return {root.name or str(root): root}
    subs = {p.name: p for p in sorted(root.iterdir()) if p.is_dir() and _text_files(p, "hypothesis")}
    if not subs:
        raise TextFileError(root, "holds no .txt files, neither directly nor in one subfolder per recogniser")
    if truth_dir is not None and all((Path(truth_dir) / name).is_dir() for name in subs):
        return {root.name or str(root): root}
    return subs


def pair_folders(truth_dir: str | Path, hyp_dir: str | Path) -> Pairing:
    """Pair the text files of two trees by relative path and stem (ALTO truth read too)."""
    truth = _text_files(Path(truth_dir), "ground-truth", alto=True)
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


def truth_candidates(page_id: str, *, single_frame: bool = False, text_name: str | None = None) -> list[str]:
    """Ground-truth file names (relative, with ``.txt``) that may belong to a page id, best first.

    ``page_001.png`` -> ``page_001.txt``; ``book.tif#3`` -> ``book_3.txt``, and also
    ``book.txt`` when ``single_frame`` (the run holds only this frame). ``text_name``:
    the page's name from :func:`text_names` when its stem is shared (``folio_12.png.txt``).
    An ALTO file of the same stem (``.alto.xml``) stands in for each.
    """
    if text_name is not None and text_name != text_stem(page_id) + TEXT_SUFFIX:
        return [text_name]
    name, frame = split_page_id(page_id)
    out = [text_stem(page_id) + TEXT_SUFFIX]
    if frame is not None and single_frame:
        p = PurePosixPath(name)
        out.append((str(p.with_suffix("")) if p.suffix else str(p)) + TEXT_SUFFIX)
    return out


def pair_store_pages(truth_dir: str | Path, page_ids: Iterable[str]) -> Pairing:
    """Pair the page ids of a run with ground-truth files of ``truth_dir`` (see the module docstring)."""
    truth_root = Path(truth_dir)
    truth = _text_files(truth_root, "ground-truth", alto=True)
    ids = sorted(set(page_ids))
    names = text_names(ids)
    frames: dict[str, int] = {}
    stems: dict[str, list[str]] = {}
    for pid in ids:
        base = split_page_id(pid)[0]
        frames[base] = frames.get(base, 0) + 1
        stems.setdefault(PurePosixPath(text_stem(pid)).name, []).append(pid)
    flat = {k: p for k, p in truth.items() if "/" not in k}
    used: set[str] = set()
    out = Pairing()
    for pid in ids:
        found = None
        for cand in truth_candidates(pid, single_frame=frames[split_page_id(pid)[0]] == 1, text_name=names[pid]):
            cand = cand[: -len(TEXT_SUFFIX)]
            name = PurePosixPath(cand).name
            if cand in truth:
                found = cand
            elif "/" in cand and name in flat and len(stems.get(name, ())) == 1:
                found = name              # page in a subfolder, truth kept flat, stem unique in the run
            if found:
                break
        if found is None:
            out.hyp_only.append(pid)
        else:
            used.add(found)
            out.pairs.append((pid, truth[found], pid))
    for pid in ids:
        plain = text_stem(pid)
        if names[pid][: -len(TEXT_SUFFIX)] != plain and plain in truth and plain not in used:
            out.ambiguous.setdefault(str(truth[plain]), []).append(pid)
    out.truth_only = [str(p) for key, p in sorted(truth.items()) if key not in used]
    return out
