"""ALTO XML out of a run store and back in as ground truth (issue 16).

Reference: the official ALTO 4.4 schema (Library of Congress, ALTO Editorial Board), a copy with its
XLink import at ../shared/standards/ (see its README), validated with the ``xmlschema`` package.
"""

from __future__ import annotations

import json
import os
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest
import xmlschema
from PIL import Image
from typer.testing import CliRunner

import _tiny_models as tm
from ocrbench import synth
from ocrbench.cli.app import app
from ocrbench.errors import TextFileError
from ocrbench.io.text import pair_folders, read_text_lines
from ocrbench.store import RunStore

ROOT = Path(__file__).resolve().parents[1]
NS = {"a": "http://www.loc.gov/standards/alto/ns-v4#"}


def _standards() -> Path:
    """The schema folder: $OCRBENCH_STANDARDS, else ../shared/standards beside the checkout (CI),
    else one level further up (a worktree inside a folder beside shared/)."""
    cands = [Path(os.environ["OCRBENCH_STANDARDS"])] if os.environ.get("OCRBENCH_STANDARDS") else []
    cands += [ROOT.parent / "shared" / "standards", ROOT.parents[1] / "shared" / "standards"]
    for c in cands:
        if (c / "alto-4-4.xsd").is_file():
            return c
    pytest.fail(f"the ALTO 4.4 schema is not at {' or '.join(map(str, cands))} (see shared/standards/README.md)")


@pytest.fixture(scope="module")
def schema() -> xmlschema.XMLSchema:
    return xmlschema.XMLSchema(str(_standards() / "alto-4-4.xsd"))


@pytest.fixture(scope="module")
def store(tmp_path_factory) -> tuple[Path, Path, Path]:
    """A run of the tiny CTC recogniser over a small tree: two pages, one in a subfolder, and a 2-frame TIFF."""
    root = tmp_path_factory.mktemp("alto")
    pages = root / "pages"
    synth.write_archive(pages, synth.ArchiveSpec(n_pages=3, lines_per_page=(3, 5), seed=11))
    for p in pages.glob("*"):
        if p.suffix in (".txt", ".json"):
            p.unlink()
    imgs = sorted(pages.iterdir())
    (pages / "box1").mkdir()
    imgs[1].rename(pages / "box1" / imgs[1].name)
    third = Image.open(imgs[2]).convert("L")
    third.save(pages / "book.tif", save_all=True, append_images=[third.rotate(0)])
    imgs[2].unlink()
    ctc = tm.write_ctc(root / "ctc")
    db = root / "s.sqlite"
    res = CliRunner().invoke(app, ["run", str(pages), "-r", str(ctc), "--store", str(db), "--text-out",
                                   str(root / "texts"), "--json"])
    assert res.exit_code == 0, res.output
    return db, root, pages


def test_exported_alto_validates_and_holds_the_run(store, schema, tmp_path):
    db, _, _ = store
    out = tmp_path / "alto"
    res = CliRunner().invoke(app, ["export", str(db), "--format", "alto", "--out", str(out), "--json"])
    assert res.exit_code == 0, res.output
    files = sorted(Path(f) for f in json.loads(res.stdout)["files"])
    with RunStore(db, read_only=True) as st:
        [rid] = st.run_ids()
        info = st.run_info(rid)
        texts = st.page_texts(rid)
    rel = sorted(f.relative_to(out / info.recogniser).as_posix() for f in files)
    assert rel == ["book_1.alto.xml", "book_2.alto.xml", f"box1/{sorted(texts)[2].split('/')[1].rsplit('.', 1)[0]}"
                   ".alto.xml", f"{sorted(texts)[3].rsplit('.', 1)[0]}.alto.xml"]
    for f in files:
        schema.validate(str(f))                       # raises with the element and the reason
        root = ET.parse(f).getroot()
        assert root.find("a:Description/a:MeasurementUnit", NS).text == "pixel"
        assert root.find("a:Description/a:sourceImageInformation/a:fileName", NS).text
        settings = json.loads(root.find("a:Description/a:Processing/a:processingStepSettings", NS).text)
        assert settings["card_hash"] == info.card_hash and settings["recogniser"] == info.recogniser
        lines = root.findall(".//a:TextLine", NS)
        assert all(0 <= float(s.get("WC")) <= 1 for s in root.findall(".//a:String", NS) if s.get("WC"))
        assert all(float(t.get("WIDTH")) > 0 and float(t.get("HEIGHT")) > 0 for t in lines)
    frame2 = (out / info.recogniser / "book_2.alto.xml")
    assert ET.parse(frame2).getroot().find("a:Layout/a:Page", NS).get("PHYSICAL_IMG_NR") == "2"


def test_alto_read_back_as_ground_truth_scores_zero(store, tmp_path):
    db, _, _ = store
    out = tmp_path / "alto"
    assert CliRunner().invoke(app, ["export", str(db), "--format", "alto", "--out", str(out)]).exit_code == 0
    with RunStore(db, read_only=True) as st:
        [rid] = st.run_ids()
        truth = out / st.run_info(rid).recogniser
    res = CliRunner().invoke(app, ["score", "--truth", str(truth), "--store", str(db), "--json", "--boot", "100"])
    assert res.exit_code == 0, res.output
    doc = json.loads(res.stdout)
    assert doc["cer"] == 0.0 and doc["wer"] == 0.0 and doc["pages"] == 4 and doc["ref_chars"] > 0


def test_text_export_equals_text_out(store, tmp_path):
    db, root, _ = store
    out = tmp_path / "txt"
    res = CliRunner().invoke(app, ["export", str(db), "--format", "text", "--out", str(out), "--text", "post"])
    assert res.exit_code == 0, res.output
    mine = sorted(p.relative_to(out).as_posix() for p in out.rglob("*.txt"))
    theirs = sorted(p.relative_to(root / "texts").as_posix() for p in (root / "texts").rglob("*.txt"))
    assert mine == theirs and len(mine) == 4
    for rel in mine:
        assert (out / rel).read_bytes() == (root / "texts" / rel).read_bytes()
    pr = pair_folders(out, root / "texts")
    assert pr.complete and len(pr.pairs) == 4
    bad = CliRunner().invoke(app, ["export", str(db), "--format", "pdf", "--out", str(out)])
    assert bad.exit_code == 2 and "--format" in bad.stderr and "pdf" in bad.stderr   # typer's choice check


def test_alto_truth_of_other_versions_and_hyphens(tmp_path):
    # An ALTO v3 file written by hand from the standard's element names: lines from TextLine/String,
    # words joined by one space, a HYP's CONTENT at the line's end.
    (tmp_path / "p.alto.xml").write_text(
        '<?xml version="1.0" encoding="UTF-8"?>'
        '<alto xmlns="http://www.loc.gov/standards/alto/ns-v3#"><Layout><Page ID="p" PHYSICAL_IMG_NR="1">'
        '<PrintSpace><TextBlock ID="b"><TextLine ID="l1"><String CONTENT="To"/><SP/><String CONTENT="Kettle"/>'
        '<SP/><String CONTENT="for"/></TextLine><TextLine ID="l2"><String CONTENT="coals"/><SP/>'
        '<String CONTENT="12l.&#160;7s."/><SP/><String CONTENT="carri"/><HYP CONTENT="-"/></TextLine>'
        '</TextBlock></PrintSpace></Page></Layout></alto>', encoding="utf-8")
    assert read_text_lines(tmp_path / "p.alto.xml") == ["To Kettle for", "coals 12l.\u00a07s. carri-"]
    (tmp_path / "q.alto.xml").write_text("<page><not-alto/></page>", encoding="utf-8")
    with pytest.raises(TextFileError, match=r"q\.alto\.xml: not an ALTO file"):
        read_text_lines(tmp_path / "q.alto.xml")
    (tmp_path / "r.alto.xml").write_text("<alto><TextLine>", encoding="utf-8")
    with pytest.raises(TextFileError, match=r"r\.alto\.xml: not well-formed XML"):
        read_text_lines(tmp_path / "r.alto.xml")
    # .txt wins over .alto.xml of the same stem; ALTO alone pairs too
    (tmp_path / "hyp").mkdir()
    for n in ("p", "s"):
        (tmp_path / "hyp" / f"{n}.txt").write_text("x\n", encoding="utf-8")
    (tmp_path / "s.alto.xml").write_text((tmp_path / "p.alto.xml").read_text(encoding="utf-8"), encoding="utf-8")
    (tmp_path / "s.txt").write_text("x\n", encoding="utf-8")
    pr = pair_folders(tmp_path, tmp_path / "hyp")
    assert {k: t.name for k, t, _ in pr.pairs} == {"p": "p.alto.xml", "s": "s.txt"}
