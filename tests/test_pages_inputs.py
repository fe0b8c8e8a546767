"""Loading page images: every format and mode archives hold, and every kind of bad input.

Images are built here with Pillow and with tifffile (an independent TIFF writer).
Expected grey values come from outside the project:
* ITU-R BT.601 luma, Y = 0.299 R + 0.587 G + 0.114 B (the conversion Pillow documents
  for ``convert("L")``);
* Porter & Duff (1984), "Compositing Digital Images": ``A over B`` = a*A + (1 - a)*B,
  here a page on white paper;
* 16-bit to 8-bit: v * 255 / 65535 = v / 257 (common practice);
* EXIF 2.32 (CIPA DC-008), tag 0x0112 Orientation: 3 = rotated 180 degrees, 6 = the 0th row
  is the visual right-hand side, 8 = the 0th row is the visual left-hand side;
* PNG (ISO/IEC 15948) section 11.2.2, the IHDR chunk, for the crafted headers.
"""

from __future__ import annotations

import io
import json
import resource
import struct
import subprocess
import sys
import zlib
from pathlib import Path

import numpy as np
import pytest
import tifffile
from PIL import Image
from typer.testing import CliRunner

from ocrbench.cli.app import app
from ocrbench.errors import ImageTooLargeError, InputError, PageError
from ocrbench.pages import PageRef, analyse_page, list_pages, load_page

ROOT = Path(__file__).resolve().parents[1]


def display_page() -> np.ndarray:
    """An upright test page: white, a black bar top-left, a grey (128) block bottom-right."""
    a = np.full((60, 90), 255, np.uint8)
    a[10:20, 5:40] = 0
    a[35:50, 50:85] = 128
    return a


def check_pattern(gray: np.ndarray, *, grey: float = 128, tol: float = 2) -> None:
    assert gray.dtype == np.uint8 and gray.shape == (60, 90)
    assert abs(float(np.median(gray[12:18, 8:37])) - 0) <= tol
    assert abs(float(np.median(gray[38:47, 53:82])) - grey) <= tol
    assert abs(float(np.median(gray[25:32, 5:85])) - 255) <= tol


def load(path: Path, frame: int | None = None, **kw):
    return load_page(PageRef(path, frame), **kw)


# --------------------------------------------------------------------------- formats and modes


def test_png_grey_and_bilevel(tmp_path):
    Image.fromarray(display_page()).save(tmp_path / "g.png")
    check_pattern(load(tmp_path / "g.png").gray, tol=0)
    bw = display_page().copy()
    bw[bw == 128] = 0
    Image.fromarray(bw).convert("1").save(tmp_path / "b.png")
    check_pattern(load(tmp_path / "b.png").gray, grey=0, tol=0)


def test_16_bit_png_and_tiff(tmp_path):
    a16 = display_page().astype(np.uint16) * 257          # 0, 32896, 65535
    Image.fromarray(a16).save(tmp_path / "p16.png")
    tifffile.imwrite(tmp_path / "t16.tif", a16, compression="zlib")
    for name in ("p16.png", "t16.tif"):
        got = load(tmp_path / name).gray
        check_pattern(got, tol=0)                           # v / 257 exactly
    ramp = np.arange(0, 65536, 257, dtype=np.uint16).reshape(1, -1).repeat(4, axis=0)
    tifffile.imwrite(tmp_path / "ramp.tif", ramp)
    got = load(tmp_path / "ramp.tif").gray
    assert got[0].tolist() == list(range(256))


def test_rgb_palette_rgba_cmyk(tmp_path):
    base = display_page()
    rgb = np.stack([base] * 3, axis=-1)
    rgb[35:50, 50:85] = (200, 100, 50)
    luma = 0.299 * 200 + 0.587 * 100 + 0.114 * 50          # ITU-R BT.601: 124.2
    Image.fromarray(rgb).save(tmp_path / "c.png")
    check_pattern(load(tmp_path / "c.png").gray, grey=luma, tol=1)
    Image.fromarray(rgb).save(tmp_path / "c.jpg", quality=95)
    check_pattern(load(tmp_path / "c.jpg").gray, grey=luma, tol=6)
    Image.fromarray(rgb).save(tmp_path / "c.tif", compression="tiff_lzw")
    check_pattern(load(tmp_path / "c.tif").gray, grey=luma, tol=1)

    pal = Image.fromarray(rgb).quantize(colors=4)
    assert pal.mode == "P"
    pal.save(tmp_path / "p.png")
    pal.save(tmp_path / "p.tif")
    for name in ("p.png", "p.tif"):
        check_pattern(load(tmp_path / name).gray, grey=luma, tol=1)

    rgba = np.zeros((60, 90, 4), np.uint8)                  # transparent black everywhere...
    rgba[10:20, 5:40] = (0, 0, 0, 255)                       # ...an opaque black bar
    rgba[35:50, 50:85] = (0, 0, 0, 128)                      # ...and half-transparent black
    Image.fromarray(rgba, "RGBA").save(tmp_path / "a.png")
    tifffile.imwrite(tmp_path / "a.tif", rgba, photometric="rgb", extrasamples=["unassalpha"])
    over_white = 255 * (1 - 128 / 255)                       # Porter-Duff "over" white paper: 127
    for name in ("a.png", "a.tif"):
        check_pattern(load(tmp_path / name).gray, grey=over_white, tol=1)

    cmyk = np.zeros((60, 90, 4), np.uint8)                   # no ink = white paper
    cmyk[10:20, 5:40, 3] = 255                               # full black (K)
    cmyk[35:50, 50:85, 3] = 127                              # half black: 255 * (1 - 127/255) = 128
    Image.fromarray(cmyk, "CMYK").save(tmp_path / "k.jpg", quality=95)
    Image.fromarray(cmyk, "CMYK").save(tmp_path / "k.tif")
    check_pattern(load(tmp_path / "k.jpg").gray, tol=6)
    check_pattern(load(tmp_path / "k.tif").gray, tol=1)


def test_tiff_compressions_archives_use(tmp_path):
    bw = display_page().copy()
    bw[bw == 128] = 0
    Image.fromarray(bw).convert("1").save(tmp_path / "g4.tif", compression="group4")
    Image.fromarray(display_page()).save(tmp_path / "lzw.tif", compression="tiff_lzw")
    with Image.open(tmp_path / "g4.tif") as im:
        assert im.info["compression"] == "group4"
    with Image.open(tmp_path / "lzw.tif") as im:
        assert im.info["compression"] == "tiff_lzw"
    check_pattern(load(tmp_path / "g4.tif").gray, grey=0, tol=0)
    check_pattern(load(tmp_path / "lzw.tif").gray, tol=0)
    # a min-is-white bilevel TIFF (photometric 0), written by tifffile
    tifffile.imwrite(tmp_path / "miw.tif", (bw == 0), photometric="miniswhite")
    check_pattern(load(tmp_path / "miw.tif").gray, grey=0, tol=0)


def test_multi_page_tiff_frames(tmp_path):
    frames = []
    for k in range(3):
        a = np.full((60, 90), 255, np.uint8)
        a[10:20, 5 + 20 * k: 25 + 20 * k] = 0               # the bar moves right frame by frame
        frames.append(a)
    with tifffile.TiffWriter(tmp_path / "book.tif") as tw:   # independent writer
        for a in frames:
            tw.write(a, compression="zlib")
    imgs = [Image.fromarray(a).convert("1") for a in frames]
    imgs[0].save(tmp_path / "fax.tif", save_all=True, append_images=imgs[1:], compression="group4")
    refs = list_pages(tmp_path)
    assert [r.id for r in refs] == ["book.tif#1", "book.tif#2", "book.tif#3",
                                    "fax.tif#1", "fax.tif#2", "fax.tif#3"]
    assert refs[1].display() == f"{tmp_path / 'book.tif'}#2"
    for r in refs:
        g = load_page(r).gray
        k = r.frame - 1
        assert np.array_equal(g, frames[k]), r.id
    with pytest.raises(PageError, match=r"book\.tif#4.*no frame 4"):
        load(tmp_path / "book.tif", 4)


@pytest.mark.parametrize("orientation, stored_from_display", [
    (3, lambda d: np.rot90(d, 2)),
    (6, lambda d: np.rot90(d, 1)),     # 0th row = visual right side: display turned 90 degrees ccw
    (8, lambda d: np.rot90(d, -1)),    # 0th row = visual left side: display turned 90 degrees cw
])
def test_exif_orientation_is_honoured(tmp_path, orientation, stored_from_display):
    stored = np.ascontiguousarray(stored_from_display(display_page()))
    exif = Image.Exif()
    exif[0x0112] = orientation
    Image.fromarray(stored).save(tmp_path / "o.jpg", quality=95, exif=exif, dpi=(300, 200))
    page = load(tmp_path / "o.jpg")
    check_pattern(page.gray, tol=6)
    # a quarter turn swaps the axes, and with them the horizontal and vertical resolution
    assert page.dpi == ((200.0, 300.0) if orientation in (6, 8) else (300.0, 200.0))


def test_dpi_is_read_when_present(tmp_path):
    a = display_page()
    Image.fromarray(a).save(tmp_path / "d.png", dpi=(300, 300))
    Image.fromarray(a).save(tmp_path / "d.jpg", dpi=(200, 200))
    tifffile.imwrite(tmp_path / "d.tif", a, resolution=(150, 150), resolutionunit="INCH")
    tifffile.imwrite(tmp_path / "cm.tif", a, resolution=(118.11, 118.11), resolutionunit="CENTIMETER")
    Image.fromarray(a).save(tmp_path / "none.png")
    assert load(tmp_path / "d.png").dpi == (300.0, 300.0)
    assert load(tmp_path / "d.jpg").dpi == (200.0, 200.0)
    assert load(tmp_path / "d.tif").dpi == (150.0, 150.0)
    assert load(tmp_path / "cm.tif").dpi == (300.0, 300.0)  # 118.11 per cm * 2.54 cm per inch
    assert load(tmp_path / "none.png").dpi is None


# --------------------------------------------------------------------------- bad inputs


def png_header_only(width: int, height: int) -> bytes:
    """A PNG that is only its signature, an IHDR chunk (8-bit grey) and IEND: no pixel data at all."""
    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))
    ihdr = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)
    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IEND", b"")


def test_declared_40000_square_is_refused_before_decoding(tmp_path):
    p = tmp_path / "bomb.png"
    p.write_bytes(png_header_only(40000, 40000))
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss        # KiB on Linux
    with pytest.raises(ImageTooLargeError) as e:
        load(p)
    grown_mib = (resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - before) / 1024
    assert "bomb.png" in str(e.value) and "1,600,000,000 pixels" in str(e.value)
    assert grown_mib < 100          # 40000 x 40000 grey would be 1.6 GB
    assert isinstance(e.value, PageError)


def test_size_limit_is_checked_on_the_header_not_the_pixels(tmp_path):
    # Only a header: decoding would fail as truncated, so ImageTooLargeError proves the check came first.
    p = tmp_path / "big.png"
    p.write_bytes(png_header_only(3000, 2000))
    with pytest.raises(ImageTooLargeError, match=r"big\.png.*3000x2000"):
        load(p, max_pixels=5_000_000)
    with pytest.raises(PageError, match=r"big\.png.*(damaged|truncated)") as e:
        load(p, max_pixels=10_000_000)
    assert not isinstance(e.value, ImageTooLargeError)


@pytest.mark.parametrize("name", ["empty.png", "empty.jpg", "empty.tif"])
def test_zero_byte_files(tmp_path, name):
    (tmp_path / name).write_bytes(b"")
    with pytest.raises(PageError, match=rf"{name.replace('.', r'[.]')}: empty file"):
        load(tmp_path / name)


def _encoded(fmt: str, **kw) -> bytes:
    rng = np.random.default_rng(0)
    a = np.clip(rng.normal(200, 40, (120, 160)), 0, 255).astype(np.uint8)    # does not compress away
    buf = io.BytesIO()
    Image.fromarray(a).save(buf, format=fmt, **kw)
    return buf.getvalue()


@pytest.mark.parametrize("name, data", [
    ("half.png", _encoded("PNG")[: len(_encoded("PNG")) // 2]),
    ("half.jpg", _encoded("JPEG")[: len(_encoded("JPEG")) // 2]),
    ("half_lzw.tif", _encoded("TIFF", compression="tiff_lzw")[: len(_encoded("TIFF", compression="tiff_lzw")) // 2]),
    ("header.png", _encoded("PNG")[:40]),
    ("text.png", b"Dec 1 Radstead & Quilby repairs - 5 -\n"),
    ("text.tif", b"not a tiff at all\n" * 20),
])
def test_truncated_and_non_image_files(tmp_path, name, data):
    (tmp_path / name).write_bytes(data)
    with pytest.raises(PageError) as e:
        load(tmp_path / name)
    assert name in str(e.value) and e.value.path.endswith(name)
    assert not isinstance(e.value, ImageTooLargeError)


def test_truncated_tiff_pixel_data(tmp_path):
    # tifffile puts the directory before the strips: cut the strips short.
    p = tmp_path / "cut.tif"
    rng = np.random.default_rng(1)
    tifffile.imwrite(p, rng.integers(0, 255, (200, 200), dtype=np.uint8), compression="zlib")
    data = p.read_bytes()
    p.write_bytes(data[: len(data) - len(data) // 3])
    with pytest.raises(PageError, match=r"cut\.tif: damaged or truncated"):
        load(p)


def test_other_formats_and_missing_files(tmp_path):
    # BMP is read now (issue 16); a format we do not read (PPM) still gets the one-line refusal
    Image.fromarray(display_page()).save(tmp_path / "really_a_ppm.png", format="PPM")
    with pytest.raises(PageError, match=r"really_a_ppm\.png: not a PNG, JPEG, TIFF, JPEG 2000, WebP, BMP, GIF or PDF"):
        load(tmp_path / "really_a_ppm.png")
    with pytest.raises(PageError, match=r"gone\.png: file not found"):
        load(tmp_path / "gone.png")
    with pytest.raises(InputError, match="no such file or folder"):
        list_pages(tmp_path / "nowhere")


def test_one_pixel_and_blank_pages_are_handled(tmp_path):
    Image.new("L", (1, 1), 0).save(tmp_path / "dot.png")
    Image.new("L", (1, 1), 255).save(tmp_path / "white.png")
    Image.new("L", (400, 300), 255).save(tmp_path / "blank.png")
    for name in ("dot.png", "white.png", "blank.png"):
        page = load(tmp_path / name)
        layout = analyse_page(page.gray)
        assert layout.lines == [] and layout.skew_degrees == 0.0
        assert layout.deskewed.shape == page.gray.shape


def test_list_pages_keeps_unreadable_files_for_their_error(tmp_path):
    Image.fromarray(display_page()).save(tmp_path / "b.png")
    (tmp_path / "a.tif").write_bytes(b"II*\x00garbage")
    (tmp_path / "notes.txt").write_text("not a page")
    (tmp_path / "c.JPG").write_bytes(_encoded("JPEG"))
    refs = list_pages(tmp_path)
    assert [r.id for r in refs] == ["a.tif", "b.png", "c.JPG"]
    with pytest.raises(PageError, match=r"a\.tif: damaged or truncated TIFF"):
        load_page(refs[0])
    assert list_pages(tmp_path / "b.png") == [PageRef(tmp_path / "b.png")]


# --------------------------------------------------------------------------- the pages command


def _mixed_folder(tmp_path: Path, demo_dir: Path) -> Path:
    d = tmp_path / "batch"
    d.mkdir()
    for stem in ("page_003", "page_004"):
        for f in demo_dir.glob(f"{stem}.*"):
            if f.suffix != ".json":
                (d / f.name).write_bytes(f.read_bytes())
    (d / "page_002.png").write_bytes(b"this is a text file named like a page\n")
    return d


def test_pages_command_goes_on_after_a_bad_file_and_exits_1(tmp_path, demo_dir):
    d = _mixed_folder(tmp_path, demo_dir)
    res = CliRunner().invoke(app, ["pages", str(d), "--json"])
    assert res.exit_code == 1, res.output
    doc = json.loads(res.stdout)
    rows = {Path(p["path"]).name: p for p in doc["pages"]}
    assert set(rows) == {"page_002.png", "page_003.png", "page_004.tif"}
    assert rows["page_002.png"]["error"] == "not a PNG, JPEG, TIFF, JPEG 2000, WebP, BMP, GIF or PDF file"
    assert rows["page_002.png"]["lines"] is None
    for name in ("page_003.png", "page_004.tif"):
        truth = (d / name).with_suffix(".txt").read_text(encoding="utf-8").splitlines()
        assert rows[name]["error"] is None and rows[name]["lines"] == len(truth)
    # the table lists the failure too, and says so on stderr
    res = CliRunner().invoke(app, ["pages", str(d)])
    assert res.exit_code == 1
    assert "page_002.png" in res.stdout and "2 of 3 pages usable" in res.stdout
    assert "page_002.png: not a PNG, JPEG, TIFF, JPEG 2000, WebP, BMP, GIF or PDF file" in res.stderr


def test_pages_command_usage_errors(tmp_path):
    res = CliRunner().invoke(app, ["pages", str(tmp_path / "missing")])
    assert res.exit_code == 2 and "no such file or folder" in res.stderr
    (tmp_path / "empty").mkdir()
    res = CliRunner().invoke(app, ["pages", str(tmp_path / "empty")])
    assert res.exit_code == 2 and "no page images found" in res.stderr


@pytest.mark.slow
def test_pages_command_on_the_demo_archive(demo_dir):
    # The real console entry point, as a user runs it: stdout must be pure JSON.
    proc = subprocess.run([sys.executable, "-m", "ocrbench", "pages", str(demo_dir), "--json"],
                          capture_output=True, text=True, timeout=300, cwd=ROOT)
    assert proc.returncode == 0, proc.stderr
    doc = json.loads(proc.stdout)
    images = sorted(p for p in demo_dir.iterdir() if p.suffix in (".png", ".jpg", ".tif"))
    assert len(doc["pages"]) == len(images) == 24
    for row, img in zip(doc["pages"], images):
        assert Path(row["path"]).name == img.name
        truth = img.with_suffix(".txt").read_text(encoding="utf-8").splitlines()
        assert row["error"] is None
        assert row["lines"] == len(truth), img.name
        meta = json.loads(img.with_suffix(".json").read_text(encoding="utf-8"))
        assert abs(row["skew_degrees"] - meta["rotation_degrees_ccw"]) <= 0.3, img.name
