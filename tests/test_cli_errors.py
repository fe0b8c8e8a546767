"""No traceback reaches a user: each case one line naming the file or the problem, and the right exit code.

Exit codes as the README defines them: 0 ok, 1 some inputs failed (the rest done), 2 usage or fatal
error, 130 interrupted.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import typer
from typer.testing import CliRunner

from ocrbench.accuracy.score import MAX_ALIGN_CHARS, score_pages
from ocrbench.cli.app import DEBUG_ENV, app, guarded
from ocrbench.errors import InputError
from ocrbench.store import LineRecord, PageRecord, RunStore

import pytest

runner = CliRunner()
ROOT = Path(__file__).resolve().parents[1]

# An invented page whose second entry has 5,000 digits: beyond what Python reads as an int by default
# (the 4,300-digit limit of int(str), CPython 3.11+), so the arithmetic check cannot read it.
HUGE = "9" * 5000
BIG_PAGE = ["Brought forward 1.00", f"To coals {HUGE}.00", "Total 3.00"]
GOOD_PAGE = ["Brought forward 1.00", "To coals 2.00", "Total 3.00"]


def _no_traceback(text: str) -> None:
    assert "Traceback" not in text and 'File "' not in text, text


def test_balance_on_a_5000_digit_amount_names_the_file_and_checks_the_rest(tmp_path):
    (tmp_path / "p1.txt").write_text("\n".join(BIG_PAGE) + "\n", encoding="utf-8")
    (tmp_path / "p2.txt").write_text("\n".join(GOOD_PAGE) + "\n", encoding="utf-8")
    r = runner.invoke(app, ["balance", str(tmp_path), "--json"])
    assert r.exit_code == 1, r.output
    _no_traceback(r.output)
    doc = json.loads(r.stdout)
    assert [p["status"] for p in doc["pages"]] == ["balanced"]               # p2 still checked
    [f] = doc["failed"]
    assert f["path"].endswith("p1.txt") and "p1.txt" in f["error"]


def _store_with_pages(tmp_path: Path, pages: dict[str, list[str]]) -> Path:
    db = tmp_path / "s.sqlite"
    with RunStore(db) as st:
        rid = st.start_run(recogniser="demo-ctc", kind="ctc", card_path="/m/card.toml", card_hash="c" * 64,
                           settings={}, input_dir="/pages", host={}, engine="test")
        for pid, texts in pages.items():
            lines = [LineRecord(line_no=i + 1, x0=0, y0=0, x1=1, y1=1, width_px=1, text=t, text_post=None,
                                confidence=0.9) for i, t in enumerate(texts)]
            st.write_page(rid, PageRecord(page_id=pid, path=f"/pages/{pid}", content_hash="x", status="done",
                                          n_lines=len(lines)), lines)
        st.finish_run(rid)
    return db


def test_review_ranks_the_queue_and_names_the_page_it_cannot_check(tmp_path):
    db = _store_with_pages(tmp_path, {"big.png": BIG_PAGE, "good.png": GOOD_PAGE})
    r = runner.invoke(app, ["review", str(db), "--json"])
    _no_traceback(r.output)
    assert r.exit_code == 1, r.output
    doc = json.loads(r.stdout)
    [res] = doc["runs"]
    assert res["lines"] == len(BIG_PAGE) + len(GOOD_PAGE)                     # every line still ranked
    [problem] = doc["problems"]
    assert problem.startswith("big.png: ") and "arithmetic not checked" in problem


def test_postprocess_list_steps_needs_no_source():
    r = runner.invoke(app, ["postprocess", "--list-steps"])
    assert r.exit_code == 0, r.output
    assert "unicode" in r.stdout and "lexicon" in r.stdout
    r = runner.invoke(app, ["postprocess"])
    assert r.exit_code == 2 and "--list-steps" in r.output


@pytest.mark.parametrize("args,option", [(["run", "--help"], "--post-config"),
                                         (["postprocess", "--help"], "--config")])
def test_help_keeps_the_postprocess_table_name(args, option):
    # rich reads "[postprocess]" as markup and drops it unless escaped
    r = runner.invoke(app, args, env={"COLUMNS": "200"}, terminal_width=200)
    assert r.exit_code == 0
    line = next(ln for ln in r.stdout.splitlines() if option in ln)
    assert "[postprocess]" in line, line


def test_measure_scaling_batch_size_has_help():
    r = runner.invoke(app, ["measure-scaling", "--help"], env={"COLUMNS": "200"}, terminal_width=200)
    line = next(ln for ln in r.stdout.splitlines() if "--batch-size" in ln)
    assert "Lines per model batch" in line, line


def test_a_line_too_long_to_align_is_a_stated_limit():
    ok = "To Kettle for coals 12.50"
    with pytest.raises(InputError, match="p1") as e:
        score_pages([("p1", ["x" * MAX_ALIGN_CHARS], [ok])])
    assert f"{MAX_ALIGN_CHARS:,}" in str(e.value)
    # distances only: no limit, and the same CER the alignment would give
    s = score_pages([("p1", ["x" * MAX_ALIGN_CHARS], [ok])], classes=False)
    assert s.summary["char_edits"] == MAX_ALIGN_CHARS and s.summary["pages"] == 1
    skipped = score_pages([("p1", ["x" * MAX_ALIGN_CHARS], [ok]), ("p2", [ok], [ok])], too_long="skip")
    assert skipped.summary["too_long_to_align"] == ["p1"] and skipped.summary["pages"] == 1


def _score_peak_rss(truth: Path, hyp: Path, *extra: str) -> tuple[int, int, str]:
    """Peak resident memory (KiB) of ``ocrbench score`` in a child process, its exit code and stderr."""
    code = ("import resource, sys\n"
            "from ocrbench.cli import main\n"
            "try:\n    main()\n"
            "except SystemExit as e:\n"
            "    rc = e.code\n"
            "print('RSS', resource.getrusage(resource.RUSAGE_SELF).ru_maxrss, file=sys.stderr)\n"
            "sys.exit(rc)\n")
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    p = subprocess.run([sys.executable, "-c", code, "score", "--truth", str(truth), "--hyp", str(hyp), *extra],
                       capture_output=True, text=True, env=env, timeout=300)
    rss = int(p.stderr.rsplit("RSS", 1)[1].split()[0])
    return rss, p.returncode, p.stderr


@pytest.mark.slow
def test_scoring_a_5mb_truth_line_keeps_memory_bounded(tmp_path):
    truth, hyp = tmp_path / "t", tmp_path / "h"
    truth.mkdir()
    hyp.mkdir()
    line = "To Kettle for coals 12.50"
    (truth / "small.txt").write_text(line + "\n", encoding="utf-8")
    (hyp / "small.txt").write_text(line.replace("coals", "coal") + "\n", encoding="utf-8")
    base_rss, rc, _ = _score_peak_rss(truth, hyp)
    assert rc == 0
    (truth / "huge.txt").write_text((line + " ") * 200_000 + "\n", encoding="utf-8")   # 5.2 MB, one line
    (hyp / "huge.txt").write_text(line + "\n", encoding="utf-8")
    rss, rc, err = _score_peak_rss(truth, hyp)
    assert rc == 1                                      # the rest scored, the long page named
    _no_traceback(err)
    named = [ln for ln in err.splitlines() if "huge.txt" in ln]
    assert len(named) == 1 and "--no-classes" in named[0]
    # Before: 1.5 GB for this one line (~10x the tiny run); the limit keeps it near the tiny run's.
    assert rss < 3 * base_rss, (rss, base_rss)
    rss, rc, err = _score_peak_rss(truth, hyp, "--no-classes")
    assert rc == 0 and rss < 3 * base_rss, (rss, base_rss, err)


def _tiny_app(fn) -> typer.Typer:
    a = typer.Typer()
    a.command()(guarded(fn))
    return a


def test_an_unexpected_error_is_one_line_with_a_hint_and_exit_2():
    def broken() -> None:
        {}["missing"]

    r = runner.invoke(_tiny_app(broken), [], env={DEBUG_ENV: ""})
    assert r.exit_code == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "KeyError" in lines[0] and "report" in lines[0] and DEBUG_ENV in lines[0]
    _no_traceback(r.output)
    # with the debug switch the exception itself comes through (its traceback printed by Python)
    r = runner.invoke(_tiny_app(broken), [], env={DEBUG_ENV: "1"})
    assert isinstance(r.exception, KeyError)


def test_ctrl_c_is_one_line_and_exit_130():
    def interrupted() -> None:
        raise KeyboardInterrupt

    r = runner.invoke(_tiny_app(interrupted), [])
    assert r.exit_code == 130
    assert r.stderr.strip() == "ocrbench: interrupted"


def test_every_command_is_guarded():
    from ocrbench.cli import app as app_module

    for info in app_module.app.registered_commands:
        assert getattr(info.callback, "__wrapped__", None) is not None, info.name


def test_review_of_lines_without_confidence_and_text(tmp_path):
    # a model that emitted NaN: pages stored with empty text and no confidence must still be ranked
    db = tmp_path / "nan.sqlite"
    with RunStore(db) as st:
        rid = st.start_run(recogniser="x", kind="ctc", card_path="/c", card_hash="d" * 64, settings={},
                           input_dir="/p", host={}, engine="test")
        lines = [LineRecord(line_no=1, x0=0, y0=0, x1=1, y1=1, width_px=1, text="", text_post=None,
                            confidence=float("nan")),
                 LineRecord(line_no=2, x0=0, y0=0, x1=1, y1=1, width_px=1, text="", text_post=None, confidence=None)]
        st.write_page(rid, PageRecord(page_id="a.png", path="/p/a.png", content_hash="x", status="done", n_lines=2),
                      lines)
        st.finish_run(rid)
    r = runner.invoke(app, ["review", str(db), "--json"])
    _no_traceback(r.output)
    assert r.exit_code == 0, r.output
    [res] = json.loads(r.stdout)["runs"]
    assert [q["confidence"] for q in res["queue"]] == [None, None]
    assert all("confidence unknown" in q["reasons"] for q in res["queue"])


@pytest.mark.slow
def test_ctrl_c_during_run_is_one_line_and_exit_130(tmp_path, demo_dir):
    import signal
    import sqlite3
    import time

    db = tmp_path / "s.sqlite"
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    p = subprocess.Popen([sys.executable, "-m", "ocrbench", "run", str(demo_dir), "-r", str(ROOT / "models/ledger-seq"),
                          "--store", str(db)], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    t0, done = time.time(), 0
    while time.time() - t0 < 240 and not done and p.poll() is None:
        time.sleep(0.3)
        try:
            done = sqlite3.connect(db).execute("SELECT COUNT(*) FROM pages WHERE status='done'").fetchone()[0]
        except sqlite3.Error:
            continue
    assert done, "no page was finished before the time limit"
    p.send_signal(signal.SIGINT)          # what Ctrl-C sends
    _, err = p.communicate(timeout=240)
    assert p.returncode == 130, err[-2000:]
    _no_traceback(err)
    said = [ln for ln in err.splitlines() if ln.startswith("ocrbench:")]
    assert len(said) == 1 and "interrupted" in said[0] and "resume" in said[0]
    # what was finished stays in the store
    assert sqlite3.connect(db).execute("SELECT COUNT(*) FROM pages WHERE status='done'").fetchone()[0] >= done
