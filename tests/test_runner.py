"""The runner: page-by-page recognition into the store, resume, failures, timings, the run and export commands."""

from __future__ import annotations

import json
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

import _tiny_models as tm
from ocrbench import synth
from ocrbench.cli.app import app
from ocrbench.recognisers.base import EngineOptions
from ocrbench.recognisers.card import load_card
from ocrbench.run.engine import RunOptions, run_pages
from ocrbench.store import RunStore

N_PAGES = 4


@pytest.fixture(scope="module")
def pages(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("pages")
    synth.write_archive(out, synth.ArchiveSpec(n_pages=N_PAGES, lines_per_page=(3, 5), seed=9))
    for p in out.glob("*"):
        if p.suffix in (".txt", ".json"):
            p.unlink()
    return out


@pytest.fixture(scope="module")
def cards(tmp_path_factory):
    root = tmp_path_factory.mktemp("models")
    return [load_card(tm.write_ctc(root / "ctc")), load_card(tm.write_seq(root / "seq"))]


@pytest.fixture()
def with_bad_page(pages, tmp_path) -> Path:
    out = tmp_path / "pages"
    shutil.copytree(pages, out)
    (out / "page_000_broken.png").write_bytes(b"\x89PNG\r\n\x1a\n truncated")
    return out


def count_rows(db: Path, table: str) -> dict[tuple, int]:
    con = sqlite3.connect(db)
    keys = "run_id, page_id" + (", line_no" if table == "lines" else "")
    rows = con.execute(f"SELECT {keys}, COUNT(*) FROM {table} GROUP BY {keys}").fetchall()
    con.close()
    return {tuple(r[:-1]): r[-1] for r in rows}


# --------------------------------------------------------------------------- runs


def test_every_page_with_every_recogniser(pages, cards, tmp_path):
    db = tmp_path / "s.sqlite"
    with RunStore(db) as st:
        s = run_pages(pages, cards, store=st)
        f = st.read_frames()
    assert s.pages_total == N_PAGES and s.pages_processed == N_PAGES and not s.failed_pages
    assert [r.name for r in s.recognisers] == ["tiny-ctc", "tiny-seq"]
    assert all(r.pages_done == N_PAGES for r in s.recognisers)
    p = f["pages"]
    assert sorted(p.page_id.unique()) == sorted(x.name for x in pages.glob("*.*"))
    assert (p.status == "done").all()
    # both recognisers read the same line boxes of the same pages
    ln = f["lines"]
    by_run = [ln[ln.run_id == r.run_id][["page_id", "line_no", "x0", "y0", "x1", "y1"]].reset_index(drop=True)
              for r in s.recognisers]
    assert by_run[0].equals(by_run[1]) and len(by_run[0]) > 3 * N_PAGES
    # batches account for every line; line shares add up to their batches' model + decode time
    b = f["batches"]
    assert (b.groupby(["run_id", "page_id"]).n_lines.sum() == p.set_index(["run_id", "page_id"]).n_lines).all()
    model = (b.t_encode + b.t_steps + b.t_collapse).sum()
    assert ln.t_line.sum() == pytest.approx(model, rel=1e-6)
    stage = p.t_load + p.t_segment + p.t_preprocess + p.t_encode + p.t_steps + p.t_collapse + p.t_postprocess
    assert (p.t_total >= stage - 1e-9).all()
    runs = f["runs"]
    host = json.loads(runs.host_json[0])
    assert {"cpu_model", "cores", "os", "python", "onnxruntime", "providers", "intra_threads", "inter_threads",
            "hostname"} <= set(host)
    assert host["providers"][-1] == "CPUExecutionProvider"
    assert set(runs.card_hash) == {c.card_hash for c in cards}


def test_prefetch_changes_nothing_but_speed(with_bad_page, cards, tmp_path):
    texts = []
    for prefetch in (False, True):
        with RunStore(tmp_path / f"s{prefetch}.sqlite") as st:
            s = run_pages(with_bad_page, cards, store=st, options=RunOptions(prefetch=prefetch))
            texts.append([st.page_texts(r.run_id) for r in s.recognisers])
            assert s.failed_pages == ["page_000_broken.png"]
    assert texts[0] == texts[1]


@pytest.mark.slow
def test_rerun_resumes_and_fresh_starts_again(pages, cards, tmp_path):
    db = tmp_path / "s.sqlite"
    first = run_pages(pages, cards, store=db)
    again = run_pages(pages, cards, store=db)
    assert [r.run_id for r in again.recognisers] == [r.run_id for r in first.recognisers]
    assert all(r.resumed and r.pages_new == 0 for r in again.recognisers)
    assert again.pages_skipped == N_PAGES and again.pages_processed == 0
    other = run_pages(pages, cards, store=db, options=EngineOptions(batch_size=2))   # other settings: other runs
    assert not any(r.resumed for r in other.recognisers)
    fresh = run_pages(pages, cards, store=db, fresh=True)
    ids = {r.run_id for r in first.recognisers} | {r.run_id for r in other.recognisers}
    assert not ({r.run_id for r in fresh.recognisers} & ids)
    assert all(n == 1 for n in count_rows(db, "pages").values())


class Stop(Exception):
    pass


@pytest.mark.slow
def test_interrupted_run_resumes_with_every_page_once(pages, cards, tmp_path):
    clean = tmp_path / "clean.sqlite"
    run_pages(pages, cards, store=clean)
    db = tmp_path / "s.sqlite"

    def stop_after_two(ev):
        if ev.kind == "page" and ev.pages_done == 2:
            raise Stop()
    with pytest.raises(Stop):
        run_pages(pages, cards, store=db, progress=stop_after_two)
    with RunStore(db) as st:
        assert [len(st.page_status(run_id)) for run_id in st.run_ids()] == [2, 2]   # two whole pages, nothing else
    s = run_pages(pages, cards, store=db)
    assert s.pages_skipped == 2 and s.pages_processed == N_PAGES - 2
    assert all(r.resumed and r.pages_done == N_PAGES for r in s.recognisers)
    assert all(n == 1 for n in count_rows(db, "pages").values())
    assert all(n == 1 for n in count_rows(db, "lines").values())
    with RunStore(db) as a, RunStore(clean) as b:
        for r in s.recognisers:
            assert a.page_texts(r.run_id) == b.page_texts(r.run_id)


KILLED = r"""
import sys, time
sys.path.insert(0, sys.argv[4])
from ocrbench.run.engine import run_pages
def slow(ev):
    if ev.kind == "page":
        print("page", ev.page_id, flush=True)
        time.sleep(0.5)
run_pages(sys.argv[1], [sys.argv[2], sys.argv[3]], store=sys.argv[5], progress=slow)
"""


@pytest.mark.slow
def test_killed_run_resumes_with_every_page_once(pages, cards, tmp_path):
    # SIGKILL ends the process at once, mid-page (signal(7)); the rerun must complete without duplicates.
    db = tmp_path / "s.sqlite"
    proc = subprocess.Popen([sys.executable, "-c", KILLED, str(pages), str(cards[0].path), str(cards[1].path),
                             str(Path(__file__).parent), str(db)], stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().startswith("page")
    finally:
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
    with RunStore(db) as st:
        done_before = len(st.page_status(1))
    assert 1 <= done_before < N_PAGES
    s = run_pages(pages, cards, store=db)
    assert s.pages_skipped == done_before
    assert all(r.resumed and r.pages_done == N_PAGES for r in s.recognisers)
    assert all(n == 1 for n in count_rows(db, "pages").values())


def test_bad_page_is_recorded_and_the_run_goes_on(with_bad_page, cards, tmp_path):
    s = run_pages(with_bad_page, cards, store=tmp_path / "s.sqlite")
    assert s.failed_pages == ["page_000_broken.png"]
    for r in s.recognisers:
        assert r.pages_done == N_PAGES and r.pages_failed == 1
        assert "PNG" in r.failures[0][1] or "image" in r.failures[0][1]


def test_postprocess_fills_text_post_and_keeps_raw(pages, cards, tmp_path):
    seen = []

    def shout(texts, confidences):
        seen.append((len(texts), len(confidences)))
        return [t.upper() + "!" for t in texts]
    with RunStore(tmp_path / "s.sqlite") as st:
        s = run_pages(pages, cards[:1], store=st, postprocess=shout)
        raw = st.page_texts(s.recognisers[0].run_id)
        post = st.page_texts(s.recognisers[0].run_id, post=True)
    assert len(seen) == N_PAGES and all(a == b for a, b in seen)
    assert post == {k: [t.upper() + "!" for t in v] for k, v in raw.items()}


class FakeClock:
    """Time stands still unless the test moves it."""

    def __init__(self):
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def test_fake_clock_timings(pages, cards, tmp_path):
    clock = FakeClock()

    def post(texts, confidences):
        clock.now += 2.5
        return texts
    with RunStore(tmp_path / "s.sqlite") as st:
        s = run_pages(pages, cards[:1], store=st, clock=clock, postprocess=post, options=RunOptions(prefetch=False))
        p = st.read_frames()["pages"]
    assert p.t_postprocess.tolist() == [2.5] * N_PAGES
    assert p.t_total.tolist() == [2.5] * N_PAGES
    assert (p[["t_load", "t_segment", "t_preprocess", "t_encode", "t_steps", "t_collapse"]] == 0).all().all()
    r = s.recognisers[0]
    assert r.page_seconds_p50 == r.page_seconds_p99 == 2.5
    assert r.pages_per_hour == pytest.approx(3600 / 2.5)
    assert s.wall_seconds == pytest.approx(2.5 * N_PAGES)


def test_ticking_clock_times_each_stage(pages, cards, tmp_path):
    # a clock that moves one second per reading: every stage timed by two readings lasts exactly 1 s
    class Tick:
        t = 0.0

        def __call__(self):
            self.t += 1.0
            return self.t
    with RunStore(tmp_path / "s.sqlite") as st:
        run_pages(pages, cards[:1], store=st, clock=Tick(), options=RunOptions(warm_up=False, prefetch=False))
        p = st.read_frames()["pages"]
    assert (p.t_load == 1.0).all() and (p.t_segment == 1.0).all()


# --------------------------------------------------------------------------- commands


def test_run_command_text_out_json_and_exit_code(with_bad_page, cards, tmp_path):
    db = tmp_path / "s.sqlite"
    out = tmp_path / "texts"
    args = ["run", str(with_bad_page), "--recogniser", str(cards[0].folder), "--recogniser", str(cards[1].folder),
            "--store", str(db), "--text-out", str(out), "--json"]
    res = CliRunner().invoke(app, args)
    assert res.exit_code == 1, res.output
    doc = json.loads(res.stdout)
    assert doc["failed_pages"] == ["page_000_broken.png"]
    assert "1 of 5 pages failed" in res.stderr
    with RunStore(db) as st:
        for r in doc["recognisers"]:
            for page_id, lines in st.page_texts(r["run_id"]).items():
                f = out / r["name"] / (Path(page_id).stem + ".txt")
                assert f.read_text(encoding="utf-8") == "".join(line + "\n" for line in lines)
    assert len(list((out / "tiny-ctc").glob("*.txt"))) == N_PAGES
    res = CliRunner().invoke(app, args[:-1])        # again, human output: resumes, still reports the bad page
    assert res.exit_code == 1 and "resumed" in res.stdout


def test_run_command_fatal_errors(pages, tmp_path):
    res = CliRunner().invoke(app, ["run", str(pages), "--recogniser", str(tmp_path / "none"),
                                   "--store", str(tmp_path / "s.sqlite")])
    assert res.exit_code == 2 and "card not found" in res.stderr
    res = CliRunner().invoke(app, ["run", str(pages), "--recogniser", str(tmp_path), "--store",
                                   str(tmp_path / "s.sqlite"), "--decoding", "sampling"])
    assert res.exit_code == 2 and "--decoding" in res.stderr


def test_export_command(pages, cards, tmp_path):
    db = tmp_path / "s.sqlite"
    run_pages(pages, cards[:1], store=db)
    res = CliRunner().invoke(app, ["export", str(db), "--out", str(tmp_path / "x"), "--format", "csv", "--json"])
    assert res.exit_code == 0, res.output
    files = json.loads(res.stdout)["files"]
    assert [Path(f).name for f in files] == ["runs.csv", "pages.csv", "lines.csv", "batches.csv",
                                             "postprocessing.csv"]
    res = CliRunner().invoke(app, ["export", str(tmp_path / "missing.sqlite"), "--out", str(tmp_path / "y")])
    assert res.exit_code == 2 and "not found" in res.stderr


def test_text_out_names_follow_the_ground_truth_pairing():
    # The pairing rule (ocrbench/io/textdir.py): page_001.png <-> page_001.txt; a TIFF frame book.tif#3 <-> book_3.txt
    from ocrbench.io.textdir import text_stem

    assert text_stem("page_001.png") == "page_001"
    assert text_stem("book.tif#3") == "book_3"
    assert text_stem("book.tif") == "book"


@pytest.mark.slow
def test_run_command_beam_decoding(pages, cards, tmp_path):
    res = CliRunner().invoke(app, ["run", str(pages), "-r", str(cards[0].folder), "-r", str(cards[1].folder),
                                   "--store", str(tmp_path / "s.sqlite"), "--decoding", "beam", "--beam-width", "3",
                                   "--no-cache", "--json"])
    assert res.exit_code == 0, res.stderr
    doc = json.loads(res.stdout)
    with RunStore(tmp_path / "s.sqlite") as st:
        for r in doc["recognisers"]:
            settings = st.run_info(r["run_id"]).settings
            assert (settings["decoding"], settings["beam_width"], settings["use_cache"]) == ("beam", 3, False)
            assert r["pages_done"] == N_PAGES
