"""`ocrbench review STORE`: the doubt queue, its review minutes and the calibration figures, through the CLI.

References: AUROC as the share of (error line, clean line) pairs in which the error line has the lower
confidence, ties counting one half (the Mann-Whitney reading of the area under the ROC curve; Hanley &
McNeil 1982), counted pair by pair in the test; review time by hand at the documented assumed rate
(4 s a line + 1 s per 10 characters); edit distances from the `editdistance` package.
"""

from __future__ import annotations

import itertools
import json

import editdistance
from typer.testing import CliRunner

from ocrbench.cli.app import app
from ocrbench.store import LineRecord, PageRecord, RunStore

runner = CliRunner()

# Invented ledger page: (truth, recognised, confidence). The last line's total is right, so the page balances
# only if the amounts are read right; line 3 is misread (7 -> 1), which unbalances the page (one digit of any
# entry could balance it again, so confidence decides the order).
PAGE = [
    ("Cash Book 1890", "Cash Book 1890", 0.99),
    ("Jan 2 Ashcombe & Co. twine 12.50", "Jan 2 Ashcombe & Co. twlne 12.50", 0.93),
    ("Jan 5 Brindle hemp 7.25", "Jan 5 Brindle hemp 1.25", 0.90),
    ("Jan 9 Coldharbour rope 3.00", "Jan 9 Coldharbour rope 3.00", 0.97),
    ("Total 22.75", "Total 22.75", 0.98),
]


def _store(tmp_path):
    db = tmp_path / "s.sqlite"
    with RunStore(db) as st:
        rid = st.start_run(recogniser="demo-ctc", kind="ctc", card_path="/m/card.toml", card_hash="c" * 64,
                           settings={}, input_dir="/pages", host={}, engine="test")
        lines = [LineRecord(line_no=i + 1, x0=0, y0=0, x1=1, y1=1, width_px=1, text=h, text_post=None, confidence=c)
                 for i, (_, h, c) in enumerate(PAGE)]
        st.write_page(rid, PageRecord(page_id="page_001.png", path="/pages/page_001.png", content_hash="x",
                                      status="done", n_lines=len(lines)), lines)
        st.finish_run(rid)
    truth = tmp_path / "truth"
    truth.mkdir()
    (truth / "page_001.txt").write_text("".join(t + "\n" for t, _, _ in PAGE), encoding="utf-8")
    return db, truth, rid


def test_review_queue_minutes_and_calibration(tmp_path):
    db, truth, rid = _store(tmp_path)
    r = runner.invoke(app, ["review", str(db), "--truth", str(truth), "--lines", "2", "--json"])
    assert r.exit_code == 0, r.output
    [res] = json.loads(r.stdout)["runs"]
    assert res["run_id"] == rid and res["lines"] == len(PAGE)
    # the misread amount's line: low-ish confidence plus failed arithmetic (one digit would balance) comes first
    assert res["queue"][0]["line_no"] == 3 and "would balance" in res["queue"][0]["reasons"]
    # review time by hand at 4 s per line + 1 s per 10 characters
    head_chars = sum(len(q["text"]) for q in res["queue"])
    assert abs(res["head"]["minutes"] - (2 * 4 + head_chars / 10) / 60) < 1e-9
    all_chars = sum(len(h) for _, h, _ in PAGE)
    assert abs(res["all"]["minutes"] - (len(PAGE) * 4 + all_chars / 10) / 60) < 1e-9

    cal = res["calibration"]
    wrong = [editdistance.eval(h, t) > 0 for t, h, _ in PAGE]        # editdistance package
    assert cal["error_lines"] == sum(wrong) == 2
    pos = [c for (_, _, c), w in zip(PAGE, wrong) if w]
    neg = [c for (_, _, c), w in zip(PAGE, wrong) if not w]
    pairs = [1.0 if p < n else 0.5 if p == n else 0.0 for p, n in itertools.product(pos, neg)]
    assert abs(cal["auroc"] - sum(pairs) / len(pairs)) < 1e-12       # pairwise count (Hanley & McNeil 1982)
    assert res["head_catch"]["error_lines_in_head"] == 2              # both wrong lines lead the queue here
    assert abs(res["head_catch"]["share_if_random"] - 2 / len(PAGE)) < 1e-12


def test_review_refusals_and_csv(tmp_path):
    db, truth, rid = _store(tmp_path)
    assert runner.invoke(app, ["review", str(db), "--run", "7"]).exit_code == 2
    assert runner.invoke(app, ["review", str(tmp_path / "none.sqlite")]).exit_code == 2
    bad = tmp_path / "bad_truth"
    bad.mkdir()
    (bad / "page_001.txt").write_text("only one line\n", encoding="utf-8")
    r = runner.invoke(app, ["review", str(db), "--truth", str(bad), "--out", str(tmp_path / "q")])
    assert r.exit_code == 1 and "left out of the calibration" in r.stderr   # named, and the rest still shown
    csv = (tmp_path / "q" / f"review_demo-ctc_run{rid}.csv").read_text(encoding="utf-8")
    assert csv.count("\n") == len(PAGE) + 1
