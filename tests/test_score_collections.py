"""score groups its figures by collection (the page's folder) when a run covers more than one."""

from __future__ import annotations

import json

import editdistance
from typer.testing import CliRunner

from ocrbench.accuracy.evaluate import by_collection, collection_of_page
from ocrbench.accuracy.score import score_pages
from ocrbench.cli.app import app


def test_collection_is_the_page_folder():
    assert collection_of_page("box1/vol2/folio_7.png") == "box1/vol2"
    assert collection_of_page("book.tif#3") == ""
    assert collection_of_page("box1/book.pdf#2") == "box1"


def test_corpus_cer_per_collection_sums_edits_then_divides():
    items = [("a/p1.png", ["abcd"], ["abce"]), ("a/p2.png", ["xy"], ["xy"]), ("b/p3.png", ["hello"], ["hallo!"])]
    rows = {r["collection"]: r for r in by_collection(score_pages(items, classes=False).pages, n_boot=200)}
    # reference: the editdistance package, summed over a collection's pages, divided by its characters
    assert rows["a"]["char_edits"] == editdistance.eval("abcd", "abce") + 0 and rows["a"]["ref_chars"] == 6
    assert abs(rows["a"]["cer"] - 1 / 6) < 1e-12
    assert rows["b"]["char_edits"] == editdistance.eval("hello", "hallo!") and rows["b"]["pages"] == 1


def test_score_command_reports_collections(tmp_path):
    truth, hyp = tmp_path / "truth", tmp_path / "hyp"
    for root, texts in ((truth, ("abcd", "hello")), (hyp, ("abce", "hello"))):
        for box, text in zip(("box1", "box2"), texts):
            (root / box).mkdir(parents=True)
            (root / box / "page_001.txt").write_text(text + "\n", encoding="utf-8")
    res = CliRunner().invoke(app, ["score", "--truth", str(truth), "--hyp", str(hyp), "--json"])
    assert res.exit_code == 0, res.output
    cols = {r["collection"]: r for r in json.loads(res.stdout)["collections"]}
    assert cols["box1"]["cer"] == 0.25 and cols["box2"]["cer"] == 0.0
