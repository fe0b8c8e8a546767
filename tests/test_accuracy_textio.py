"""Reading text files (BOM, CRLF, bad bytes) and pairing truth with hypotheses by name."""

from __future__ import annotations

import codecs

import pytest

from ocrbench.io.text import pair_folders, pair_store_pages, read_text_lines, truth_candidates
from ocrbench.errors import TextFileError

LINES = ["Marrowby & Kettle Cash Book Folio 1", "", "15 Jan 1887 A. Kestford rope £12 7s 6½d"]


@pytest.mark.parametrize("encoded", [
    "\n".join(LINES).encode("utf-8") + b"\n",                       # LF
    "\r\n".join(LINES).encode("utf-8") + b"\r\n",                   # CRLF
    codecs.BOM_UTF8 + "\r\n".join(LINES).encode("utf-8") + b"\r\n",  # BOM + CRLF (codecs.BOM_UTF8: EF BB BF)
    codecs.BOM_UTF8 + "\n".join(LINES).encode("utf-8"),             # BOM, no final newline
])
def test_bom_and_line_ends(tmp_path, encoded):
    p = tmp_path / "page_001.txt"
    p.write_bytes(encoded)
    assert read_text_lines(p) == LINES


def test_only_newlines_break_lines(tmp_path):
    # str.splitlines would also break at form feed and U+2028 (Python docs); a
    # transcribed line may contain them, so they stay inside the line.
    p = tmp_path / "a.txt"
    p.write_text("one\x0ctwo\u2028three\rfour\n", encoding="utf-8")
    assert read_text_lines(p) == ["one\x0ctwo\u2028three", "four"]


def test_empty_file(tmp_path):
    (tmp_path / "e.txt").write_bytes(b"")
    assert read_text_lines(tmp_path / "e.txt") == []
    (tmp_path / "b.txt").write_bytes(codecs.BOM_UTF8)
    assert read_text_lines(tmp_path / "b.txt") == []


@pytest.mark.parametrize("prefix,bad,offset", [
    (b"abc\n", b"\xff", 4),                 # 0xFF never occurs in UTF-8 (RFC 3629)
    (codecs.BOM_UTF8 + b"ab", b"\xc3(", 5),  # truncated two-byte sequence; offset counts the BOM
    ("£".encode("latin-1"), b"", 0),        # a Latin-1 file: 0xA3 is a lone continuation byte
])
def test_bad_bytes_name_file_and_offset(tmp_path, prefix, bad, offset):
    p = tmp_path / "page_007.txt"
    p.write_bytes(prefix + bad + b"\n")
    with pytest.raises(TextFileError) as e:
        read_text_lines(p)
    assert e.value.path == str(p) and f"byte offset {offset}" in str(e.value)
    # the offset really points at the first undecodable byte (Python's codec agrees)
    with pytest.raises(UnicodeDecodeError) as u:
        p.read_bytes().decode("utf-8")
    assert u.value.start == offset


def test_missing_file_and_folder(tmp_path):
    with pytest.raises(TextFileError, match="does not exist"):
        read_text_lines(tmp_path / "nope.txt")
    with pytest.raises(TextFileError, match="is a folder"):
        read_text_lines(tmp_path)


def test_pair_folders_lists_both_kinds_of_orphan(tmp_path):
    truth, hyp = tmp_path / "truth", tmp_path / "hyp"
    truth.mkdir()
    hyp.mkdir()
    for name in ("page_001.txt", "page_002.txt", "page_003.txt", "notes.json", "page_001.png"):
        (truth / name).write_text("x\n")
    for name in ("page_001.txt", "page_003.txt", "page_004.txt"):
        (hyp / name).write_text("x\n")
    pr = pair_folders(truth, hyp)
    assert [k for k, _, _ in pr.pairs] == ["page_001", "page_003"]
    assert pr.truth_only == [str(truth / "page_002.txt")]
    assert pr.hyp_only == [str(hyp / "page_004.txt")]
    assert not pr.complete
    with pytest.raises(TextFileError, match="does not exist"):
        pair_folders(tmp_path / "missing", hyp)


def test_store_page_ids_pair_by_stem_and_frame(tmp_path):
    for name in ("page_001.txt", "book_2.txt", "single.txt", "orphan.txt"):
        (tmp_path / name).write_text("x\n")
    ids = ["page_001.png", "book.tif#1", "book.tif#2", "single.tif#1", "page_009.jpg"]
    pr = pair_store_pages(tmp_path, ids)
    assert {k: p.name for k, p, _ in pr.pairs} == {"page_001.png": "page_001.txt", "book.tif#2": "book_2.txt",
                                                   "single.tif#1": "single.txt"}
    assert pr.hyp_only == ["book.tif#1", "page_009.jpg"]
    assert pr.truth_only == [str(tmp_path / "orphan.txt")]
    assert truth_candidates("sub/page_001.png") == ["sub/page_001.txt"]
    assert truth_candidates("book.tif#3", single_frame=True) == ["book_3.txt", "book.txt"]
