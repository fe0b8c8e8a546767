"""Nothing stale, nothing lost: resume identity, file names of any bytes, unreadable and cut lines.

Each case was a failure of the runner before (issue 14), reproduced here for real with the tiny
recognisers of tests/_tiny_models.py (real onnxruntime sessions) and a real SQLite store:

* a page replaced on disk after a run was skipped as done on rerun and kept its old text;
* a changed model file resumed the old run, mixing two models' output in one run;
* a page named with bytes that are not UTF-8 (``caf\\xe9.png``) crashed the store writer;
* a model giving NaN or infinite scores made "done" lines with empty text and no confidence,
  and ``review`` then crashed;
* seq lines cut by the token guard were stored like any other line, the cut recorded nowhere.

References: file names are bytes on POSIX and Python holds undecodable bytes as surrogate
escapes (PEP 383), so ``os.fsdecode(b"caf\\xe9.png")`` is the name ``os.listdir`` gives; NaN and
infinity are IEEE 754 values that onnxruntime passes through (a bias of NaN makes every score NaN).
"""

from __future__ import annotations

import json
import os
import shutil
import sqlite3
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import numpy_helper
from typer.testing import CliRunner

import _tiny_models as tm
from _scaleout_support import assert_whole_pages, small_pages
from ocrbench.cli.app import app
from ocrbench.errors import CardError
from ocrbench.recognisers.base import EngineOptions
from ocrbench.recognisers.card import load_card
from ocrbench.run.engine import RunOptions, run_pages
from ocrbench.run.writer import stale_pages
from ocrbench.store import RunStore, StoredPage

SERIAL = RunOptions(prefetch=False)


@pytest.fixture(scope="module")
def ctc(tmp_path_factory):
    return load_card(tm.write_ctc(tmp_path_factory.mktemp("models") / "ctc"))


@pytest.fixture()
def pages(tmp_path) -> Path:
    return small_pages(tmp_path / "pages", 3, seed=41)


def model_with_bias(folder: Path, bias) -> Path:
    """The tiny CTC recogniser with its class bias replaced (NaN or inf make every score non-finite)."""
    tm.write_ctc(folder)
    m = tm.ctc_model()
    for i, init in enumerate(m.graph.initializer):
        if init.name == "b":
            m.graph.initializer[i].CopyFrom(numpy_helper.from_array(np.array(bias, np.float32), "b"))
    onnx.save(m, str(folder / "model.onnx"))
    return folder


# --------------------------------------------------------------------------- resume identity


def test_a_page_replaced_on_disk_is_read_again(pages, ctc, tmp_path):
    db = tmp_path / "s.sqlite"
    first = run_pages(pages, [ctc], store=db, options=SERIAL)
    with RunStore(db) as st:
        before = st.page_texts(first.recognisers[0].run_id)
    assert before["page_002.png"] != before["page_003.png"]
    shutil.copyfile(pages / "page_003.png", pages / "page_002.png")       # another scan under the same name
    again = run_pages(pages, [ctc], store=db, options=SERIAL)
    assert again.recognisers[0].resumed and again.recognisers[0].run_id == first.recognisers[0].run_id
    assert (again.pages_changed, again.pages_processed, again.pages_skipped) == (1, 1, 2)
    assert again.recognisers[0].pages_changed == 1
    assert any("1 page(s) changed on disk" in n for n in again.notes())
    with RunStore(db) as st:
        after = st.page_texts(again.recognisers[0].run_id)
        stored = st.stored_pages(again.recognisers[0].run_id)
    assert after["page_002.png"] == before["page_003.png"]                # the new scan's text, not the old one
    assert after["page_001.png"] == before["page_001.png"]
    assert stored["page_002.png"].content_hash == stored["page_003.png"].content_hash
    assert stored["page_002.png"].file_size == (pages / "page_002.png").stat().st_size
    third = run_pages(pages, [ctc], store=db, options=SERIAL)
    assert (third.pages_changed, third.pages_processed) == (0, 0)       # settled: nothing read again


def test_size_and_mtime_first_then_the_hash(pages):
    p = pages / "page_001.png"
    st = p.stat()
    from ocrbench.run.writer import file_sha256

    refs = [type("Ref", (), {"id": "page_001.png", "path": p})()]
    same = StoredPage("done", file_sha256(p), st.st_size, st.st_mtime_ns)
    assert stale_pages({"page_001.png": same}, refs) == set()
    # matching size and mtime are trusted without reading the file: a wrong stored hash goes unnoticed
    trusted = StoredPage("done", "0" * 64, st.st_size, st.st_mtime_ns)
    assert stale_pages({"page_001.png": trusted}, refs) == set()
    # a touched file (new mtime, same bytes) is hashed, and is not stale
    os.utime(p, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))
    assert stale_pages({"page_001.png": same}, refs) == set()
    # a changed mtime and a different hash: stale; a store without stamps (version 1) hashes every page
    assert stale_pages({"page_001.png": trusted}, refs) == {"page_001.png"}
    assert stale_pages({"page_001.png": StoredPage("done", "0" * 64, None, None)}, refs) == {"page_001.png"}
    assert stale_pages({"page_001.png": StoredPage("failed", "0" * 64, None, None)}, refs) == set()


def test_a_changed_model_is_a_new_run(pages, tmp_path):
    folder = tm.write_ctc(tmp_path / "m")
    db = tmp_path / "s.sqlite"
    first = run_pages(pages, [folder], store=db, options=SERIAL)
    model_with_bias(folder, [0.0, -2.0, -8.0])                             # other weights, same card and name
    second = run_pages(pages, [folder], store=db, options=SERIAL)
    r1, r2 = first.recognisers[0], second.recognisers[0]
    assert r1.card_hash != r2.card_hash and r2.run_id != r1.run_id and not r2.resumed
    assert r2.pages_new == 3                                               # every page read by the new model
    with RunStore(db) as st:
        assert st.run_ids() == [r1.run_id, r2.run_id]


# --------------------------------------------------------------------------- file names of any bytes


def test_a_file_name_that_is_not_utf8_is_stored_and_shown_safely(pages, ctc, tmp_path):
    raw = os.path.join(os.fsencode(pages), b"caf\xe9.png")               # Latin-1 e-acute: not UTF-8
    shutil.copyfile(pages / "page_001.png", raw)
    name = "caf\\xe9.png"          # a page id writes bytes that are not UTF-8 as \xNN (io/text.printable_name)
    db, out = tmp_path / "s.sqlite", tmp_path / "texts"
    args = ["run", str(pages), "-r", str(ctc.path), "--store", str(db), "--text-out", str(out)]
    res = CliRunner().invoke(app, args + ["--json"])
    assert res.exit_code == 0, res.output
    d = json.loads(res.stdout)
    assert d["pages_total"] == 4 and d["recognisers"][0]["pages_done"] == 4 and d["failed_pages"] == []
    with RunStore(db) as st:
        texts = st.page_texts(1)
        assert texts[name] == texts["page_001.png"]                       # the same string comes back
        shown = st.read_frames()["pages"]["page_id"].tolist()
    assert "caf\\xe9.png" in shown                                        # frames show \xNN
    assert sorted(os.listdir(os.fsencode(out / "tiny-ctc"))) == sorted(
        [b"caf\\xe9.txt", b"page_001.txt", b"page_002.txt", b"page_003.txt"])
    again = CliRunner().invoke(app, args)                                  # resumes: the name is recognised
    assert again.exit_code == 0 and "0 pages worked on, 4 already done" in again.stdout
    con = sqlite3.connect(db)
    assert con.execute("SELECT count(*) FROM pages WHERE typeof(page_id)='blob'").fetchone() == (0,)


def test_a_failing_page_with_such_a_name_is_reported_in_one_line(pages, ctc, tmp_path):
    raw = os.path.join(os.fsencode(pages), b"b\xe9ad.png")
    with open(raw, "wb") as f:
        f.write(b"not an image at all")
    res = CliRunner().invoke(app, ["run", str(pages), "-r", str(ctc.path), "--store", str(tmp_path / "s.sqlite")])
    assert res.exit_code == 1, res.output
    lines = [ln for ln in res.stderr.splitlines() if ln.startswith("ocrbench: ")]
    assert any("b\\xe9ad.png" in ln for ln in lines) and "Traceback" not in res.output
    assert assert_whole_pages(tmp_path / "s.sqlite")[1] == {"page_001.png", "page_002.png", "page_003.png"}


# --------------------------------------------------------------------------- unreadable and cut lines


def test_non_finite_model_output_makes_failed_lines_with_a_reason(pages, tmp_path):
    # A model that reads blank (warm-up) lines but scores NaN wherever there is ink.
    folder = tm.write_ctc(tmp_path / "bad")
    onnx.save(tm.ctc_model(nan_on_ink=True), str(folder / "model.onnx"))
    db = tmp_path / "s.sqlite"
    s = run_pages(pages, [folder], store=db, options=SERIAL)
    r = s.recognisers[0]
    assert r.lines > 0 and r.lines_failed == r.lines and r.pages_done == 3
    assert any("not read" in n for n in s.notes())
    con = sqlite3.connect(db)
    rows = con.execute("SELECT text, confidence, error FROM lines").fetchall()
    assert rows and all(t == "" and c is None and "NaN or infinite" in e for t, c, e in rows)
    # review ranks them first and does not stop at the unknown confidence
    res = CliRunner().invoke(app, ["review", str(db), "--json"])
    assert res.exit_code == 0, res.output
    queue = json.loads(res.stdout)["runs"][0]["queue"]
    assert queue and all(q["confidence"] is None for q in queue)


@pytest.mark.parametrize("bias", [[np.nan, -2.0, -9.0], [np.inf, -2.0, -9.0]], ids=["nan", "inf"])
def test_a_model_non_finite_everywhere_is_refused_before_any_page(pages, tmp_path, bias):
    # Its warm-up batch already scores NaN/inf: a card error naming the card, no page read.
    folder = model_with_bias(tmp_path / "bad", bias)
    db = tmp_path / "s.sqlite"
    with pytest.raises(CardError) as e:
        run_pages(pages, [folder], store=db, options=SERIAL)
    assert "card.toml" in str(e.value) and ("NaN" in str(e.value) or "Inf" in str(e.value))


def test_truncated_lines_are_flagged_counted_and_reviewed_first(pages, tmp_path):
    seq = load_card(tm.write_seq(tmp_path / "seq"))
    db = tmp_path / "s.sqlite"
    s = run_pages(pages, [seq], store=db, options=RunOptions(engine=EngineOptions(max_tokens=1), prefetch=False))
    r = s.recognisers[0]
    assert r.lines > 0 and r.lines_truncated == r.lines                  # one token is never a whole line here
    assert any("cut by the length guard" in n for n in s.notes())
    # room for every line: the tiny decoder's long lines repeat one letter, so the repetition guard is off here
    free = load_card(tm.write_seq(tmp_path / "seq-free", card=tm.SEQ_CARD_NO_REPEAT_GUARD))
    full = run_pages(pages, [free], store=tmp_path / "full.sqlite",
                     options=RunOptions(engine=EngineOptions(max_tokens=1000), prefetch=False))
    assert full.recognisers[0].lines_truncated == 0                      # room enough: every line ends itself
    con = sqlite3.connect(db)
    assert {t for (t,) in con.execute("SELECT truncated FROM lines")} == {1}


def test_review_puts_cut_and_unread_lines_first():
    from ocrbench.postprocess.review import review_queue

    lines = [{"page_id": "p", "line_no": 1, "text": "Cash 12 4 6", "confidence": 0.10},
             {"page_id": "p", "line_no": 2, "text": "Rent", "confidence": 0.99, "truncated": 1},
             {"page_id": "p", "line_no": 3, "text": "", "confidence": None, "error": "NaN scores"},
             {"page_id": "p", "line_no": 4, "text": "Coals", "confidence": 0.50}]
    for row in lines:
        row.setdefault("truncated", 0)
        row.setdefault("error", None)
    q = review_queue(lines)
    assert q.table["line_no"].tolist()[:2] == [3, 2]                     # unread (doubt 1), cut (doubt .01)
    assert q.table["line_no"].tolist()[2:] == [1, 4]                     # then by doubt
    assert "cut by the recogniser's length guard" in q.table["reasons"][1]
    assert q.take(min_doubt=0.6)["line_no"].tolist() == [3, 2, 1]         # the cut line stays in the head
