"""A corpus of bad and odd inputs through ``ocrbench run`` then ``ocrbench score``, with both engines.

Nothing may stop the run or the scoring: every unusable file gets one line on stderr naming it,
and every other input is processed. Checks against references outside the code under test:

* file formats written by Pillow (PNG, JPEG, TIFF incl. multi-frame and 16-bit) and cut with
  plain byte slicing; the 40,000 x 40,000 PNG is written by hand from the PNG specification
  (signature, IHDR, IDAT, IEND chunks with CRC-32: W3C PNG 2nd edition, sections 5.2-5.3, 11.2.2);
* 16-bit samples v * 257 map back to exactly v (65535 / 255 = 257: common practice for 8 <-> 16 bit),
  so the 16-bit TIFF must read exactly as its 8-bit source; frames of a multi-page TIFF must read
  exactly as the pages they were made from (lossless);
* Latin-1 bytes such as 0xA3 ("£") are not valid UTF-8 (RFC 3629, section 3);
* a BOM (EF BB BF) and CRLF line ends change nothing in the text (Unicode Standard, section 23.8;
  RFC 5198 line ends), so such a truth scores exactly as its plain copy.
"""

from __future__ import annotations

import json
import shutil
import sqlite3
import struct
import zlib
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from typer.testing import CliRunner

import _tiny_models as tm
from ocrbench import synth
from ocrbench.cli.app import app

BAD_PAGES = {                          # file -> words its one-line reason must contain (lower case)
    "empty.png": "empty",
    "cut.png": "truncated",
    "cut.tif": "",
    "words.png": "not",
    "huge.png": "1,600,000,000",        # 40,000 x 40,000
}


def png_chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)


def declared_huge_png() -> bytes:
    """A PNG whose header declares 40,000 x 40,000 8-bit grey pixels, with almost no data behind it."""
    ihdr = struct.pack(">IIBBBBB", 40_000, 40_000, 8, 0, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + png_chunk(b"IHDR", ihdr) + png_chunk(b"IDAT", zlib.compress(b"\0" * 64))
            + png_chunk(b"IEND", b""))


@pytest.fixture(scope="module")
def corpus(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("corpus")
    truths = {}
    for i in range(1, 4):
        spec = synth.PageSpec(seed=700 + i, lines_per_page=2, width=600, chars_per_line=30, folio=i)
        truths[i] = synth.write_page(d, f"page_{i:03d}", spec, "png").lines
        (d / f"page_{i:03d}.json").unlink()
    grey = [Image.open(d / f"page_{i:03d}.png").convert("L") for i in range(1, 4)]
    good_png = (d / "page_001.png").read_bytes()

    # pages that cannot be used
    (d / "empty.png").write_bytes(b"")
    (d / "cut.png").write_bytes(good_png[: len(good_png) // 2])
    grey[1].save(d / "full.tif", format="TIFF")
    tif = (d / "full.tif").read_bytes()
    (d / "full.tif").unlink()
    (d / "cut.tif").write_bytes(tif[: len(tif) // 3])
    (d / "words.png").write_text("Marrowby & Kettle, day book\n", encoding="utf-8")
    (d / "huge.png").write_bytes(declared_huge_png())

    # odd pages that must be read
    Image.new("L", (1, 1), 255).save(d / "dot.png")
    grey[0].convert("CMYK").save(d / "cmyk.jpg", format="JPEG", quality=95)
    Image.fromarray(np.asarray(grey[0]).astype(np.uint16) * 257).save(d / "deep.tif", format="TIFF")
    grey[0].save(d / "book.tif", format="TIFF", save_all=True, append_images=grey[1:])

    # ground truth: good, Latin-1, BOM + CRLF, empty, line count that does not match
    for name, lines in [("cmyk", truths[1]), ("deep", truths[1]), ("book_1", truths[1]), ("book_2", truths[2]),
                        ("book_3", truths[3])]:
        (d / f"{name}.txt").write_text("\n".join(lines) + "\n", encoding="utf-8")
    (d / "page_001.txt").write_bytes(b"\xef\xbb\xbf" + "\r\n".join(truths[1]).encode("utf-8") + b"\r\n")
    latin = [ln + " \u00a3" for ln in truths[2]]                        # a pound sign in each line
    (d / "page_002.txt").write_bytes("\n".join(latin).encode("latin-1"))
    (d / "page_003.txt").write_bytes(b"")
    (d / "dot.txt").write_text("a line the 1 x 1 image cannot hold\nand another\n", encoding="utf-8")
    return d


@pytest.fixture(scope="module")
def card(tmp_path_factory) -> Path:
    return tm.write_ctc(tmp_path_factory.mktemp("models") / "ctc")


def reasons(stderr: str) -> list[str]:
    return [ln for ln in stderr.splitlines() if ln.startswith("ocrbench:")]


@pytest.mark.slow
@pytest.mark.parametrize("engine", ["serial", "dask"])
def test_bad_inputs_neither_stop_the_run_nor_the_scoring(engine, corpus, card, tmp_path):
    db = tmp_path / "s.sqlite"
    args = ["run", str(corpus), "-r", str(card), "--store", str(db), "--json"]
    if engine == "dask":
        args += ["--workers", "2"]
    res = CliRunner().invoke(app, args)
    assert res.exit_code == 1, res.output                     # some inputs failed, listed; not a crash (2)
    summary = json.loads(res.stdout)
    failed = {f["page_id"]: f["error"] for f in summary["recognisers"][0]["failures"]}
    assert set(failed) == set(BAD_PAGES)
    lines = reasons(res.stderr)
    for name, word in BAD_PAGES.items():
        mine = [ln for ln in lines if f": {name}: " in ln]
        assert len(mine) == 1, (name, lines)                  # one line each, naming the file
        assert word in mine[0].lower(), mine[0]
    assert len(lines) == len(BAD_PAGES) + 1                   # plus the count line
    assert lines[-1] == f"ocrbench: {len(BAD_PAGES)} of {summary['pages_total']} pages failed"

    con = sqlite3.connect(db)
    rows = {pid: (status, n) for pid, status, n in con.execute("SELECT page_id, status, n_lines FROM pages")}
    texts: dict[str, list[str]] = {}
    for pid, text in con.execute("SELECT page_id, text FROM lines ORDER BY page_id, line_no"):
        texts.setdefault(pid, []).append(text)
    con.close()
    readable = {"page_001.png", "page_002.png", "page_003.png", "dot.png", "cmyk.jpg", "deep.tif",
                "book.tif#1", "book.tif#2", "book.tif#3"}
    assert {p for p, (s, _) in rows.items() if s == "done"} == readable
    assert rows["dot.png"] == ("done", 0)                      # read; nothing on it
    assert texts["deep.tif"] == texts["page_001.png"]          # 16-bit samples v*257 read back as v
    for k in (1, 2, 3):
        assert texts[f"book.tif#{k}"] == texts[f"page_{k:03d}.png"]    # each frame is its own page
    assert rows["cmyk.jpg"][1] == rows["page_001.png"][1]      # CMYK JPEG: same page, same lines

    res = CliRunner().invoke(app, ["score", "--truth", str(corpus), "--store", str(db), "--json", "--boot", "200"])
    assert res.exit_code == 1, res.output                     # problems listed, the rest scored
    report = json.loads(res.stdout)
    lines = reasons(res.stderr)
    latin = [ln for ln in lines if "page_002.txt" in ln]
    assert len(latin) == 1 and "utf-8" in latin[0].lower(), lines        # Latin-1: one line naming the file
    first_pound = (corpus / "page_002.txt").read_bytes().index(b"\xa3")   # 0xA3 alone is invalid UTF-8
    assert f"byte offset {first_pound} " in latin[0]
    assert [u["path"] for u in report["unreadable"]] == [str(corpus / "page_002.txt")]
    for name in BAD_PAGES:                                    # failed pages are named again, once each
        assert len([ln for ln in lines if name in ln]) == 1, (name, lines)
    assert report["empty_reference"] == ["page_003.png"]
    # Line counts are compared after dropping blank lines (the scoring's documented rule); the 1 x 1
    # page (no lines, two truth lines) must be among the mismatches, listed by page.
    truth_of = {"page_001.png": "page_001", "page_003.png": "page_003", "dot.png": "dot", "cmyk.jpg": "cmyk",
                "deep.tif": "deep", "book.tif#1": "book_1", "book.tif#2": "book_2", "book.tif#3": "book_3"}
    expected = sorted(pid for pid, stem in truth_of.items()
                      if sum(1 for t in texts.get(pid, []) if t.strip())
                      != sum(1 for t in (corpus / f"{stem}.txt").read_text(encoding="utf-8-sig").splitlines()
                             if t.strip()))
    assert "dot.png" in expected and sorted(report["line_count_mismatch"]) == expected
    assert report["pages"] == len(readable) - 1               # every readable page but the Latin-1 one

    # The BOM + CRLF truth of page_001 scores exactly as the same lines saved plainly for deep.tif,
    # whose text is identical to page_001's.
    res2 = CliRunner().invoke(app, ["score", "--truth", str(corpus), "--store", str(db), "--out",
                                    str(tmp_path / "tables"), "--json", "--boot", "200"])
    import pandas as pd

    pages = pd.read_csv(tmp_path / "tables" / "pages.csv").set_index("page_id")
    assert pages.loc["page_001.png", "ref_chars"] == pages.loc["deep.tif", "ref_chars"] > 0
    assert pages.loc["page_001.png", "char_edits"] == pages.loc["deep.tif", "char_edits"]
    assert res2.exit_code == 1


def test_a_folder_of_nothing_but_bad_pages_still_finishes(card, tmp_path):
    d = tmp_path / "bad"
    d.mkdir()
    (d / "empty.png").write_bytes(b"")
    (d / "huge.png").write_bytes(declared_huge_png())
    shutil.copy(d / "empty.png", d / "also_empty.tif")
    res = CliRunner().invoke(app, ["run", str(d), "-r", str(card), "--store", str(tmp_path / "s.sqlite")])
    assert res.exit_code == 1, res.output
    assert len(reasons(res.stderr)) == 3 + 1
