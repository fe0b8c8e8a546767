"""File names and file metadata of pages (issue 14): frame markers, shared stems, non-UTF-8
names, where texts may be written, TIFF resolution and PNG metadata.

References: the TIFF 6.0 specification (XResolution/YResolution, tags 282/283, have no
default: without them the resolution is unknown); the PNG specification, 2nd edition,
section 11.3 (tEXt/zTXt/iTXt are ancillary metadata chunks a decoder may skip); POSIX
file names are bytes, which Python holds as surrogate escapes (PEP 383).
"""

from __future__ import annotations

import json
import os
import sqlite3
from pathlib import Path

import numpy as np
import pytest
import tifffile
from PIL import Image, PngImagePlugin
from typer.testing import CliRunner

import _tiny_models as tm
from ocrbench import synth
from ocrbench.cli.app import app
from ocrbench.errors import TextFileError
from ocrbench.io.text import pair_store_pages, printable_name, split_page_id, text_names
from ocrbench.io.textdir import write_texts
from ocrbench.pages import PageRef, analyse_page, list_pages, load_page


def _page(path: Path, seed: int = 3) -> list[str]:
    """One invented page (synth) saved at ``path``; returns its lines."""
    tmp = path.parent / f".tmp_{seed}"
    synth.write_archive(tmp, synth.ArchiveSpec(n_pages=1, lines_per_page=(3, 4), seed=seed))
    src = [f for f in sorted(tmp.iterdir()) if f.suffix in (".png", ".jpg", ".tif")][0]
    lines = src.with_suffix(".txt").read_text(encoding="utf-8").splitlines()
    Image.open(src).save(path)
    for f in tmp.iterdir():
        f.unlink()
    tmp.rmdir()
    return lines


# --------------------------------------------------------------------------- '#' in names


def test_hash_is_a_frame_marker_only_after_a_multi_frame_suffix(tmp_path):
    assert split_page_id("Ledger #12.png") == ("Ledger #12.png", None)
    assert split_page_id("book.tif#3") == ("book.tif", 3)
    assert split_page_id("book.pdf#12") == ("book.pdf", 12)
    assert split_page_id("book.tif#x") == ("book.tif#x", None)
    assert split_page_id("box #2/scan.tiff#1") == ("box #2/scan.tiff", 1)
    Image.new("L", (40, 30), 255).save(tmp_path / "Ledger #12.png")
    (tmp_path / "Ledger #12.txt").write_text("x\n", encoding="utf-8")
    refs = list_pages(tmp_path)
    assert [r.id for r in refs] == ["Ledger #12.png"]
    assert text_names([refs[0].id]) == {"Ledger #12.png": "Ledger #12.txt"}
    pr = pair_store_pages(tmp_path, [refs[0].id])
    assert [(k, p.name) for k, p, _ in pr.pairs] == [("Ledger #12.png", "Ledger #12.txt")]
    out = tmp_path / "out"
    write_texts(out, "ctc", {refs[0].id: ["a line"]})
    assert (out / "ctc" / "Ledger #12.txt").read_text(encoding="utf-8") == "a line\n"


# --------------------------------------------------------------------------- one stem, two scans


def test_two_scans_with_one_stem_get_two_texts_and_a_clear_pairing(tmp_path):
    ids = ["folio_12.jpg", "folio_12.png", "folio_13.png"]
    assert text_names(ids) == {"folio_12.jpg": "folio_12.jpg.txt", "folio_12.png": "folio_12.png.txt",
                               "folio_13.png": "folio_13.txt"}
    # names that differ only in case clash on Windows and macOS disks
    # (their suffixed names clash too, so the second gets a counter)
    assert text_names(["Folio.png", "folio.png"]) == {"Folio.png": "Folio.png.txt", "folio.png": "folio.png~2.txt"}
    # frames and files: book.tif#3 and book_3.png would both be book_3.txt
    assert text_names(["book.tif#3", "book_3.png"]) == {"book.tif#3": "book.tif_3.txt", "book_3.png": "book_3.png.txt"}
    out = tmp_path / "out"
    write_texts(out, "ctc", {"folio_12.png": ["from png"], "folio_12.jpg": ["from jpg"]})
    assert (out / "ctc" / "folio_12.png.txt").read_text(encoding="utf-8") == "from png\n"
    assert (out / "ctc" / "folio_12.jpg.txt").read_text(encoding="utf-8") == "from jpg\n"
    # pairing: each scan pairs with its own <name>.txt; a shared folio_12.txt pairs with neither
    truth = tmp_path / "truth"
    truth.mkdir()
    for name in ("folio_12.txt", "folio_12.png.txt", "folio_13.txt"):
        (truth / name).write_text("x\n", encoding="utf-8")
    pr = pair_store_pages(truth, ids)
    assert {k: p.name for k, p, _ in pr.pairs} == {"folio_12.png": "folio_12.png.txt", "folio_13.png": "folio_13.txt"}
    assert pr.hyp_only == ["folio_12.jpg"]
    assert pr.ambiguous == {str(truth / "folio_12.txt"): ["folio_12.jpg", "folio_12.png"]}
    assert pr.truth_only == [str(truth / "folio_12.txt")]


# --------------------------------------------------------------------------- non-UTF-8 names


def _bytes_name_ok(tmp_path: Path) -> bool:
    try:
        fd = os.open(os.fsencode(tmp_path) + b"/probe\xe9", os.O_CREAT | os.O_WRONLY)
    except OSError:
        return False
    os.close(fd)
    os.unlink(os.fsencode(tmp_path) + b"/probe\xe9")
    return True


def test_non_utf8_file_names_are_listed_loaded_and_shown_safely(tmp_path):
    if not _bytes_name_ok(tmp_path):
        pytest.skip("this file system refuses non-UTF-8 names")   # environment, not our code
    pages = tmp_path / "pages"
    pages.mkdir()
    _page(pages / "a.png", seed=4)
    raw = os.fsencode(pages) + b"/caf\xe9.png"
    Image.new("L", (300, 120), 255).save(raw.decode("utf-8", "surrogateescape"), format="PNG")
    refs = list_pages(pages)
    assert [r.id for r in refs] == ["a.png", "caf\\xe9.png"]
    assert refs[1].display().endswith("caf\\xe9.png")
    refs[1].id.encode("utf-8")                                   # storable and printable
    assert load_page(refs[1]).gray.shape == (120, 300)
    assert printable_name("tab\there") == "tab\\x09here"
    res = CliRunner().invoke(app, ["pages", str(pages), "--json"])
    assert res.exit_code == 0, res.output
    assert {Path(r["path"]).name for r in json.loads(res.stdout)["pages"]} == {"a.png", "caf\\xe9.png"}
    res = CliRunner().invoke(app, ["pages", str(pages)])
    assert res.exit_code == 0 and "caf\\xe9.png" in res.stdout
    # ground truth named in the same bytes pairs with the page
    truth = tmp_path / "truth"
    truth.mkdir()
    with open(os.fsencode(truth) + b"/caf\xe9.txt", "w", encoding="utf-8") as f:
        f.write("x\n")
    pr = pair_store_pages(truth, [r.id for r in refs])
    assert [k for k, _, _ in pr.pairs] == ["caf\\xe9.png"] and pr.hyp_only == ["a.png"]


def test_run_with_a_non_utf8_page_name_stores_every_page(tmp_path):
    if not _bytes_name_ok(tmp_path):
        pytest.skip("this file system refuses non-UTF-8 names")
    pages = tmp_path / "pages"
    pages.mkdir()
    _page(pages / "a.png", seed=4)
    bad = (os.fsencode(pages) + b"/caf\xe9.png").decode("utf-8", "surrogateescape")
    _page(Path(bad), seed=5)
    _page(pages / "z.png", seed=6)                              # a page after it is still read
    ctc = tm.write_ctc(tmp_path / "ctc")
    db, out = tmp_path / "s.sqlite", tmp_path / "texts"
    args = ["run", str(pages), "-r", str(ctc), "--store", str(db), "--text-out", str(out), "--json"]
    res = CliRunner().invoke(app, args)
    assert res.exit_code == 0, res.output
    ids = sorted(r[0] for r in sqlite3.connect(db).execute("SELECT page_id FROM pages WHERE status='done'"))
    assert ids == ["a.png", "caf\\xe9.png", "z.png"]
    rec = json.loads(res.stdout)["recognisers"][0]["name"]
    assert sorted(p.name for p in (out / rec).iterdir()) == ["a.txt", "caf\\xe9.txt", "z.txt"]
    res = CliRunner().invoke(app, args)                          # the rerun resumes, no crash
    assert res.exit_code == 0, res.output


# --------------------------------------------------------------------------- where texts go


def test_text_output_stays_in_its_folder_and_never_among_the_inputs(tmp_path):
    scans = tmp_path / "scans"
    scans.mkdir()
    (scans / "page_001.txt").write_text("the ground truth\n", encoding="utf-8")
    texts = {"page_001.png": ["recognised"]}
    for name in (".", "..", "a/../.."):
        with pytest.raises(TextFileError, match="subfolder of the text output folder"):
            write_texts(scans, name, texts)
    with pytest.raises(TextFileError, match="outside"):
        write_texts(tmp_path / "out", "ctc", {"../../escape.png": ["x"]})
    assert not (tmp_path / "escape.txt").exists()
    # --text-out pointing at the scans, a recogniser folder that is a collection of the input
    (scans / "ctc").mkdir()
    (scans / "ctc" / "p.txt").write_text("truth of ctc/p.png\n", encoding="utf-8")
    with pytest.raises(TextFileError, match="among the input pages"):
        write_texts(scans, "ctc", {"ctc/p.png": ["x"], "p.png": ["y"]}, input_root=scans)
    assert (scans / "page_001.txt").read_text(encoding="utf-8") == "the ground truth\n"
    assert (scans / "ctc" / "p.txt").read_text(encoding="utf-8") == "truth of ctc/p.png\n"
    # the same recogniser folder is fine when it holds no input pages
    write_texts(scans, "ctc", {"p.png": ["y"]}, input_root=scans)
    assert (scans / "ctc" / "p.txt").read_text(encoding="utf-8") == "y\n"


# --------------------------------------------------------------------------- file metadata


def test_tiff_without_resolution_tags_has_unknown_dpi(tmp_path):
    a = np.full((60, 80), 255, np.uint8)
    Image.fromarray(a).save(tmp_path / "nores.tif")               # Pillow writes no 282/283 tags
    with tifffile.TiffFile(tmp_path / "nores.tif") as tf:         # independent reader: no resolution tags
        assert "XResolution" not in tf.pages[0].tags
    Image.fromarray(a).save(tmp_path / "res.tif", dpi=(300, 300))
    assert load_page(PageRef(tmp_path / "nores.tif")).dpi is None
    assert load_page(PageRef(tmp_path / "res.tif")).dpi == (300.0, 300.0)
    res = CliRunner().invoke(app, ["pages", str(tmp_path), "--json"])
    dpis = {Path(r["path"]).name: r["dpi"] for r in json.loads(res.stdout)["pages"]}
    assert dpis == {"nores.tif": None, "res.tif": [300.0, 300.0]}


def test_png_with_large_metadata_chunks_is_read(tmp_path):
    lines = _page(tmp_path / "plain.png", seed=7)
    g = np.asarray(Image.open(tmp_path / "plain.png").convert("L"))
    info = PngImagePlugin.PngInfo()
    info.add_text("scanner-log", "x" * 3_000_000, zip=True)      # 3 MB of text: over Pillow's 1 MB chunk limit
    info.add_text("note", "y" * 70_000)
    Image.fromarray(g).save(tmp_path / "meta.png", pnginfo=info)
    page = load_page(PageRef(tmp_path / "meta.png"))
    assert np.array_equal(page.gray, g)
    assert len(analyse_page(page.gray).lines) == len(lines)
