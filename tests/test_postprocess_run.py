"""Post-processing inside `ocrbench run`, re-applied to a store by `ocrbench postprocess STORE`, and scored by
`ocrbench score --post`: the raw text is never overwritten, one recipe stands behind the post-processed column.

Reference for every post-processed text: the pipeline applied directly (``Pipeline.apply_texts``) to the raw
text and confidences the store holds; the steps themselves are checked against their own references in
tests/test_postprocess_steps.py and tests/test_postprocess_lexicon.py. Real demo model and demo pages.
"""

from __future__ import annotations

import json
import re
import sqlite3
from pathlib import Path

import pytest
from typer.testing import CliRunner

from _runner_support import DEMO_CTC, SCANS, demo_pages, need_demo
from ocrbench.cli.app import app
from ocrbench.postprocess.config import load_pipeline

runner = CliRunner()


def _invoke(*args) -> object:
    return runner.invoke(app, [str(a) for a in args])


def _lines(db: Path, run_id: int) -> dict[str, list[tuple]]:
    """page -> [(raw text, post text, line confidence, per-character confidences)], read with plain sqlite3."""
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        out: dict[str, list[tuple]] = {}
        for pid, text, post, conf, cj in con.execute("SELECT page_id, text, text_post, confidence, char_conf_json "
                                                     "FROM lines WHERE run_id=? ORDER BY page_id, line_no",
                                                     (run_id,)):
            out.setdefault(pid, []).append((text, post, conf, json.loads(cj) if cj else None))
        return out
    finally:
        con.close()


def _recipe(db: Path, run_id: int) -> str | None:
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        row = con.execute("SELECT recipe FROM postprocessing WHERE run_id=?", (run_id,)).fetchone()
        return None if row is None else row[0]
    finally:
        con.close()


def _expected(pipeline, lines: dict[str, list[tuple]]) -> dict[str, list[str]]:
    return {pid: pipeline.apply_texts([r[0] for r in rows], confidences=[r[2] for r in rows],
                                      char_confidences=[r[3] for r in rows])
            for pid, rows in lines.items()}


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    """Two demo pages, their raw CTC text, and a word list that makes the lexicon step change words:
    every word of four or more letters in the raw text, with its last letter doubled (one edit away)."""
    need_demo(DEMO_CTC)
    tmp = tmp_path_factory.mktemp("post_run")
    pages = demo_pages(tmp, 2)
    raw_db = tmp / "raw.sqlite"
    r = _invoke("run", pages, "-r", DEMO_CTC, "--store", raw_db, "--json")
    assert r.exit_code == 0, r.output
    rid = json.loads(r.stdout)["recognisers"][0]["run_id"]
    raw = {pid: [x[0] for x in rows] for pid, rows in _lines(raw_db, rid).items()}
    words = sorted({w for t in sum(raw.values(), []) for w in re.findall(r"[A-Za-z]{4,}", t)})
    wl = tmp / "words.txt"
    wl.write_text("".join(w + w[-1] + "\n" for w in words), encoding="utf-8")
    cfg = tmp / "post.toml"
    cfg.write_text('[postprocess]\nsteps = ["whitespace", "lexicon"]\n[postprocess.lexicon]\ngate = 1.0\n',
                   encoding="utf-8")
    truth = tmp / "truth"                         # the two pages' ground truth (scans_demo/<stem>.txt)
    truth.mkdir()
    for pid in raw:
        (truth / f"{Path(pid).stem}.txt").write_bytes((SCANS / f"{Path(pid).stem}.txt").read_bytes())
    return {"tmp": tmp, "pages": pages, "raw": raw, "words": wl, "config": cfg, "truth": truth}


@pytest.mark.slow
def test_run_stores_post_processed_text_beside_the_raw_text(setup):
    tmp = setup["tmp"]
    db, out = tmp / "runs" / "post.sqlite", tmp / "texts"          # the store's folder does not exist yet
    r = _invoke("run", setup["pages"], "-r", DEMO_CTC, "--store", db, "--post-config", setup["config"],
                "--word-list", setup["words"], "--text-out", out, "--json")
    assert r.exit_code == 0, r.output
    rec = json.loads(r.stdout)["recognisers"][0]
    pipeline = load_pipeline(steps=None, config=setup["config"], word_list=setup["words"])
    lines = _lines(db, rec["run_id"])
    assert {pid: [x[0] for x in rows] for pid, rows in lines.items()} == setup["raw"]   # raw text as without
    post = {pid: [x[1] for x in rows] for pid, rows in lines.items()}
    assert post == _expected(pipeline, lines)
    changed = sum(a != b for pid in post for a, b in zip(post[pid], setup["raw"][pid]))
    assert changed > 0                                  # the crafted word list did change words
    assert rec["post_recipe"] == pipeline.recipe == _recipe(db, rec["run_id"])
    assert rec["post_lines"] == rec["lines"]
    for pid, texts in post.items():                     # --text-out writes the post-processed text
        assert (out / "ledger-ctc" / f"{Path(pid).stem}.txt").read_text(encoding="utf-8") == \
            "".join(t + "\n" for t in texts)


@pytest.mark.slow
def test_rerun_with_another_recipe_resumes_and_refills(setup):
    tmp = setup["tmp"]
    db = tmp / "again.sqlite"
    first = json.loads(_invoke("run", setup["pages"], "-r", DEMO_CTC, "--store", db, "--post-config",
                               setup["config"], "--word-list", setup["words"], "--json").stdout)["recognisers"][0]
    r = _invoke("run", setup["pages"], "-r", DEMO_CTC, "--store", db, "--post-steps", "unicode,whitespace", "--json")
    assert r.exit_code == 0, r.output
    again = json.loads(r.stdout)["recognisers"][0]
    assert again["run_id"] == first["run_id"] and again["resumed"] and again["pages_new"] == 0   # nothing re-read
    pipeline = load_pipeline(steps="unicode,whitespace", config=None, word_list=None)
    lines = _lines(db, again["run_id"])
    assert {pid: [x[1] for x in rows] for pid, rows in lines.items()} == _expected(pipeline, lines)
    assert _recipe(db, again["run_id"]) == pipeline.recipe == again["post_recipe"]


@pytest.mark.slow
def test_postprocess_command_reapplies_to_a_store(setup):
    tmp = setup["tmp"]
    db = tmp / "later.sqlite"
    rid = json.loads(_invoke("run", setup["pages"], "-r", DEMO_CTC, "--store", db,
                             "--json").stdout)["recognisers"][0]["run_id"]
    assert _recipe(db, rid) is None
    r = _invoke("score", "--truth", setup["truth"], "--store", db, "--post")
    assert r.exit_code == 2 and "no post-processed text" in r.output      # nothing to score yet: said so

    r = _invoke("postprocess", db, tmp / "later_texts", "--config", setup["config"], "--word-list", setup["words"],
                "--run", rid, "--json")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    pipeline = load_pipeline(steps=None, config=setup["config"], word_list=setup["words"])
    lines = _lines(db, rid)
    expected = _expected(pipeline, lines)
    assert {pid: [x[1] for x in rows] for pid, rows in lines.items()} == expected
    assert {pid: [x[0] for x in rows] for pid, rows in lines.items()} == setup["raw"]   # raw never written
    [run] = doc["runs"]
    assert run["run_id"] == rid and run["pages"] == 2 and run["lines"] == sum(map(len, expected.values()))
    assert run["changed_lines"] == sum(a != b for pid in expected for a, b in zip(expected[pid], setup["raw"][pid]))
    assert doc["recipe"] == _recipe(db, rid) == pipeline.recipe
    page = sorted(expected)[0]
    assert (tmp / "later_texts" / "ledger-ctc" / f"{Path(page).stem}.txt").read_text(encoding="utf-8") == \
        "".join(t + "\n" for t in expected[page])

    r = _invoke("score", "--truth", setup["truth"], "--store", db, "--post", "--json", "--boot", 200)
    assert r.exit_code == 0, r.output
    raw_sys, post_sys = json.loads(r.stdout)["systems"]     # raw and post-processed, side by side
    assert post_sys["system"].endswith("post-processed") and raw_sys["run_id"] == post_sys["run_id"] == rid

    assert _invoke("postprocess", db, "--run", 99, "--steps", "whitespace").exit_code == 2   # no such run
    assert _invoke("postprocess", setup["pages"], "--run", rid).exit_code == 2             # --run needs a store
    assert _invoke("postprocess", setup["words"]).exit_code == 2                          # a text needs OUT


@pytest.mark.slow
def test_pages_added_without_post_processing_are_flagged_and_refilled(setup, tmp_path):
    pages = tmp_path / "pages"
    pages.mkdir()
    first, second = sorted(setup["pages"].iterdir())[:2]
    (pages / first.name).symlink_to(first.resolve())
    db = tmp_path / "s.sqlite"
    r = _invoke("run", pages, "-r", DEMO_CTC, "--store", db, "--post-steps", "whitespace", "--json")
    assert r.exit_code == 0, r.output
    (pages / second.name).symlink_to(second.resolve())
    r = _invoke("run", pages, "-r", DEMO_CTC, "--store", db, "--json")          # resumed, no post-processing
    assert r.exit_code == 0, r.output
    rec = json.loads(r.stdout)["recognisers"][0]
    assert rec["resumed"] and rec["pages_new"] == 1 and 0 < rec["post_lines"] < rec["lines"]
    assert "have no post-processed text" in r.stderr
    r = _invoke("postprocess", db, "--steps", "whitespace", "--run", rec["run_id"])
    assert r.exit_code == 0, r.output
    assert all(x[1] is not None for rows in _lines(db, rec["run_id"]).values() for x in rows)


@pytest.mark.slow
def test_dask_engine_post_processes_as_the_serial_runner(setup, tmp_path):
    from ocrbench.run.distributed import DaskOptions, run_distributed
    from ocrbench.run.engine import run_pages

    pipeline = load_pipeline(steps=None, config=setup["config"], word_list=setup["words"])
    a = run_pages(setup["pages"], [DEMO_CTC], store=tmp_path / "a.sqlite", postprocess=pipeline)
    b = run_distributed(setup["pages"], [DEMO_CTC], store=tmp_path / "b.sqlite", postprocess=pipeline,
                        dask=DaskOptions(workers=1))
    la, lb = _lines(tmp_path / "a.sqlite", a.recognisers[0].run_id), _lines(tmp_path / "b.sqlite",
                                                                           b.recognisers[0].run_id)
    assert {p: [x[:2] for x in r] for p, r in la.items()} == {p: [x[:2] for x in r] for p, r in lb.items()}
    assert b.recognisers[0].post_recipe == pipeline.recipe
