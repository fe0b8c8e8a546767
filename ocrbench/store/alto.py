"""Exporting a run store as ALTO XML (version 4.4) or as plain text files, one file per page.

ALTO (Analyzed Layout and Text Object) is the open standard maintained for the
Library of Congress in which libraries deliver recognised text. Each done page of
each run becomes ``<out>/<recogniser>/<text name>.alto.xml`` (the names of
``--text-out``: ``page_001.png`` -> ``page_001.alto.xml``, frame 3 of ``book.tif``
-> ``book_3.alto.xml``; a recogniser with several runs in the store gets
``<recogniser>-run<id>``). What a file holds:

* ``Description``: ``MeasurementUnit`` pixel; ``sourceImageInformation/fileName`` the
  page file as the run read it; a ``Processing`` step with the recogniser's name,
  card hash and settings (JSON in ``processingStepSettings``), and a second one
  with the post-processing recipe when the text is post-processed (``text="post"``).
* ``Layout/Page`` (``PHYSICAL_IMG_NR`` = the frame of a TIFF or PDF, else 1) with
  the page size, one ``PrintSpace`` and one ``TextBlock``, a ``TextLine`` per line
  with its box in page pixels (the box found on the deskewed page, same canvas).
* A ``String`` per word (text split at single spaces, so the line reads back
  exactly) with ``WC`` = the mean confidence of its characters (0-1), and ``SP``
  between words. Word positions are the line box shared out by character count:
  the recognisers do not report where a word lies, and ALTO asks for no more.

Characters XML 1.0 cannot hold (most control characters) are written as U+FFFD.
"""

from __future__ import annotations

import json
import math
import re
import xml.etree.ElementTree as ET
from contextlib import contextmanager
from pathlib import Path, PurePosixPath

from ocrbench.errors import StoreError
from ocrbench.io.text import split_page_id, text_names
from ocrbench.io.textdir import text_paths, write_texts

ALTO_NS = "http://www.loc.gov/standards/alto/ns-v4#"
ALTO_SCHEMA = "http://www.loc.gov/alto/v4/alto-4-4.xsd"
XSI_NS = "http://www.w3.org/2001/XMLSchema-instance"
ALTO_SUFFIX = ".alto.xml"
TEXT_CHOICES = ("raw", "post")

_NOT_XML = re.compile("[^\u0009\u000a\u000d\u0020-\ud7ff\ue000-\ufffd\U00010000-\U0010ffff]")


def _xml_text(s: str) -> str:
    return _NOT_XML.sub("\ufffd", s)


def _q(tag: str) -> str:
    return f"{{{ALTO_NS}}}{tag}"


def _num(v: float) -> str:
    return f"{float(v):g}"


def run_folders(infos) -> dict[int, str]:
    """Output folder per run id: the recogniser's name, ``<name>-run<id>`` when the name repeats."""
    seen: dict[str, int] = {}
    for info in infos:
        seen[info.recogniser] = seen.get(info.recogniser, 0) + 1
    return {i.run_id: i.recogniser if seen[i.recogniser] == 1 else f"{i.recogniser}-run{i.run_id}" for i in infos}


def _words(text: str, chars: list[float] | None, line_conf: float | None,
           box: tuple[float, float, float, float]) -> list[dict]:
    """Each word's text, confidence and box (the line box shared out by character count)."""
    x0, y0, x1, y1 = box
    parts = text.split(" ")
    per_char = (x1 - x0) / max(1, len(text))
    out, at = [], 0
    for word in parts:
        confs = chars[at: at + len(word)] if chars and len(chars) >= at + len(word) else []
        confs = [c for c in confs if c is not None and math.isfinite(c)]
        wc = sum(confs) / len(confs) if confs else line_conf
        out.append({"text": word, "wc": None if wc is None or not math.isfinite(wc) else min(1.0, max(0.0, wc)),
                    "hpos": x0 + at * per_char, "width": max(0.0, len(word) * per_char)})
        at += len(word) + 1
    return out


def _description(root: ET.Element, info, page_path: str, text: str, recipe: str | None) -> None:
    desc = ET.SubElement(root, _q("Description"))
    ET.SubElement(desc, _q("MeasurementUnit")).text = "pixel"
    src = ET.SubElement(desc, _q("sourceImageInformation"))
    ET.SubElement(src, _q("fileName")).text = _xml_text(page_path)
    steps = [("recognition", "contentGeneration", "text recognition of each line by the recogniser",
              {"recogniser": info.recogniser, "kind": info.kind, "card_hash": info.card_hash,
               "settings": info.settings, "engine": info.engine})]
    if text == "post" and recipe:
        steps.append(("postprocessing", "contentModification", "post-processing of the recognised text",
                      {"recipe": recipe}))
    for pid, category, what, settings in steps:
        proc = ET.SubElement(desc, _q("Processing"), {"ID": pid})
        ET.SubElement(proc, _q("processingCategory")).text = category
        when = info.finished_at or info.started_at
        if when:
            ET.SubElement(proc, _q("processingDateTime")).text = when
        ET.SubElement(proc, _q("processingStepDescription")).text = what
        ET.SubElement(proc, _q("processingStepSettings")).text = _xml_text(json.dumps(settings, sort_keys=True))
        sw = ET.SubElement(proc, _q("processingSoftware"))
        ET.SubElement(sw, _q("softwareName")).text = "ocrbench"
        if info.ocrbench_version:
            ET.SubElement(sw, _q("softwareVersion")).text = info.ocrbench_version


def alto_document(info, page: dict, lines: list[dict], *, text: str = "raw", recipe: str | None = None) -> bytes:
    """One page as an ALTO 4.4 document (UTF-8 bytes). ``page``: a row of ``pages``; ``lines``: its rows of ``lines``."""
    ET.register_namespace("", ALTO_NS)
    ET.register_namespace("xsi", XSI_NS)
    root = ET.Element(_q("alto"), {f"{{{XSI_NS}}}schemaLocation": f"{ALTO_NS} {ALTO_SCHEMA}"})
    file_part, frame = split_page_id(str(page.get("path") or page["page_id"]))
    _description(root, info, file_part, text, recipe)
    layout = ET.SubElement(root, _q("Layout"))
    w, h = page.get("width") or 0, page.get("height") or 0
    pg = ET.SubElement(layout, _q("Page"), {"ID": "page_1", "PHYSICAL_IMG_NR": str(frame or 1),
                                           "WIDTH": _num(w), "HEIGHT": _num(h), "PROCESSING": "recognition"})
    space = ET.SubElement(pg, _q("PrintSpace"), {"HPOS": "0", "VPOS": "0", "WIDTH": _num(w), "HEIGHT": _num(h)})
    if not lines:
        return ET.tostring(root, encoding="utf-8", xml_declaration=True)
    bx0 = min(ln["x0"] for ln in lines)
    by0 = min(ln["y0"] for ln in lines)
    bx1 = max(ln["x1"] for ln in lines)
    by1 = max(ln["y1"] for ln in lines)
    block = ET.SubElement(space, _q("TextBlock"), {"ID": "block_1", "HPOS": _num(bx0), "VPOS": _num(by0),
                                                   "WIDTH": _num(bx1 - bx0), "HEIGHT": _num(by1 - by0)})
    for ln in lines:
        x0, y0, x1, y1 = (float(ln[k]) for k in ("x0", "y0", "x1", "y1"))
        tl = ET.SubElement(block, _q("TextLine"), {"ID": f"line_{ln['line_no']}", "HPOS": _num(x0), "VPOS": _num(y0),
                                                   "WIDTH": _num(x1 - x0), "HEIGHT": _num(y1 - y0)})
        words = _words(ln["text"], ln.get("chars"), ln.get("confidence"), (x0, y0, x1, y1))
        for k, wd in enumerate(words):
            if k:
                prev = words[k - 1]
                ET.SubElement(tl, _q("SP"), {"WIDTH": _num(wd["hpos"] - prev["hpos"] - prev["width"]),
                                             "HPOS": _num(prev["hpos"] + prev["width"]), "VPOS": _num(y0)})
            attrs = {"ID": f"string_{ln['line_no']}_{k + 1}", "CONTENT": _xml_text(wd["text"]),
                     "HPOS": _num(wd["hpos"]), "VPOS": _num(y0), "WIDTH": _num(wd["width"]), "HEIGHT": _num(y1 - y0)}
            if wd["wc"] is not None:
                attrs["WC"] = f"{wd['wc']:.4f}"
            ET.SubElement(tl, _q("String"), attrs)
    ET.indent(root)
    return ET.tostring(root, encoding="utf-8", xml_declaration=True)


def _line_rows(frame, post: bool) -> list[dict]:
    rows = []
    for r in frame.itertuples(index=False):
        text = r.text_post if post and isinstance(r.text_post, str) else r.text
        chars = json.loads(r.char_conf_json) if isinstance(r.char_conf_json, str) and r.char_conf_json else None
        if post and isinstance(r.text_post, str) and r.text_post != r.text:
            chars = None                     # the characters changed: their confidences no longer apply
        conf = None if r.confidence is None or (isinstance(r.confidence, float) and math.isnan(r.confidence)) \
            else float(r.confidence)
        rows.append({"line_no": int(r.line_no), "x0": r.x0, "y0": r.y0, "x1": r.x1, "y1": r.y1,
                     "text": text if isinstance(text, str) else "", "chars": chars, "confidence": conf})
    return rows


@contextmanager
def _runs(store_path: Path | str, text: str):
    """The store opened read-only, its runs and each run's output folder name (``text`` checked first)."""
    from ocrbench.store import RunStore     # the store package's run store (this module adds to it)

    if text not in TEXT_CHOICES:
        raise StoreError(f"text must be one of {', '.join(TEXT_CHOICES)}, not {text!r}")
    with RunStore(store_path, read_only=True) as st:
        infos = [st.run_info(r) for r in st.run_ids()]
        yield st, infos, run_folders(infos)


def export_alto(store_path: Path | str, out_dir: Path | str, *, text: str = "raw") -> list[Path]:
    """Write one ALTO file per done page of every run; returns the files written."""
    written: list[Path] = []
    with _runs(store_path, text) as (st, infos, folders):
        for info in infos:
            frames = st.read_frames([info.run_id])
            pages = frames["pages"][frames["pages"]["status"] == "done"]
            names = text_names(pages["page_id"].tolist())
            lines = frames["lines"]
            recipe = st.post_recipe(info.run_id) if text == "post" else None
            for page in pages.to_dict("records"):
                rows = _line_rows(lines[lines["page_id"] == page["page_id"]].sort_values("line_no"), text == "post")
                rel = PurePosixPath(names[page["page_id"]])
                path = _out_path(out_dir, folders[info.run_id], rel.with_name(rel.name[: -len(".txt")] + ALTO_SUFFIX))
                _write(path, alto_document(info, page, rows, text=text, recipe=recipe))
                written.append(path)
    return written


def export_texts(store_path: Path | str, out_dir: Path | str, *, text: str = "raw") -> list[Path]:
    """Write each done page's lines as ``<out>/<recogniser>/<text name>`` (what ``run --text-out`` writes)."""
    written: list[Path] = []
    with _runs(store_path, text) as (st, infos, folders):
        for info in infos:
            texts = st.page_texts(info.run_id, post=text == "post")
            paths = text_paths(Path(out_dir), folders[info.run_id], texts.keys())
            write_texts(Path(out_dir), folders[info.run_id], texts)
            written.extend(paths[pid] for pid in sorted(texts))
    return written


def _out_path(out_dir: Path | str, folder: str, rel: PurePosixPath) -> Path:
    """``out_dir/folder/rel``, refused (StoreError) when it would leave ``out_dir/folder``."""
    base = (Path(out_dir) / folder).resolve()
    root = Path(out_dir).resolve()
    path = (base / rel).resolve()
    if base == root or root not in base.parents or base not in path.parents:
        raise StoreError(f"{Path(out_dir) / folder / rel}: would be written outside {Path(out_dir) / folder}")
    return path


def _write(path: Path, data: bytes) -> None:
    tmp = path.with_name(path.name + ".part")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp.write_bytes(data)
        tmp.replace(path)
    except OSError as e:
        raise StoreError(f"{path}: cannot write the export ({e.strerror or e})") from e
