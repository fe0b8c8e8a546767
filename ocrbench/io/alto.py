"""Reading ALTO XML (Analyzed Layout and Text Object, the Library of Congress standard) as text lines.

Ground truth often exists as ALTO. Each ``TextLine`` is one line; its text is the
``CONTENT`` of its ``String`` elements in document order, joined by one space
(ALTO marks the space between words with ``SP``; a ``HYP`` adds its ``CONTENT``
to the line's end). Any ALTO version is read: elements are matched by local name,
whatever the namespace. Writing ALTO is the run store's export
(:mod:`ocrbench.store.alto`).
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from pathlib import Path

from ocrbench.errors import TextFileError

__all__ = ["alto_lines"]


def _local(tag: str) -> str:
    return tag.rpartition("}")[2]


def alto_lines(data: bytes, name: str | Path = "<bytes>") -> list[str]:
    """The text lines of an ALTO document; TextFileError names ``name`` when it is not ALTO.

    Python's expat parser refuses external entities and limits entity expansion
    (CPython 3.11 with expat >= 2.4), so a hostile file cannot reach out or blow up.
    """
    try:
        root = ET.fromstring(data)
    except ET.ParseError as e:
        raise TextFileError(name, f"not well-formed XML ({e})") from None
    if _local(root.tag) != "alto":
        raise TextFileError(name, f"not an ALTO file (its root element is <{_local(root.tag)}>, not <alto>)")
    lines: list[str] = []
    for el in root.iter():
        if _local(el.tag) != "TextLine":
            continue
        words: list[str] = []
        hyphen = ""
        for child in el:
            kind = _local(child.tag)
            if kind == "String":
                words.append(child.get("CONTENT", ""))
            elif kind == "HYP":
                hyphen = child.get("CONTENT", "")
        lines.append(" ".join(words) + hyphen)
    return lines
