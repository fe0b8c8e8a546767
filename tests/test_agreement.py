"""Two readers' disagreement as a doubt signal: the distance, the pairing, the queue hook, the AUROCs.

References: normalised edit distances worked by hand; AUROC against scikit-learn's roc_auc_score.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import roc_auc_score
from typer.testing import CliRunner

from ocrbench.cli.app import app
from ocrbench.postprocess.agreement import (AGREE_SCALE, RunRef, agree_part, agreement_calibration,
                                            disagreement_column, line_disagreement, partner_run, with_partner)
from ocrbench.postprocess.review import DoubtWeights, review_queue
from ocrbench.store import LineRecord, PageRecord, RunStore


def test_line_disagreement_by_hand():
    assert line_disagreement("abc", "abc") == 0.0
    assert line_disagreement("abc", "abd") == pytest.approx(1 / 3)        # 1 substitution / 3
    assert line_disagreement("Total 12.50", "Total 12.58") == pytest.approx(1 / 11)
    assert line_disagreement("ab", "abcd") == pytest.approx(2 / 4)        # 2 insertions / longer length 4
    assert line_disagreement("", "") == 0.0 and line_disagreement("", "xy") == 1.0
    assert list(agree_part([0.0, AGREE_SCALE / 2, 0.5])) == [0.0, 0.5, 1.0]


def test_disagreement_pairs_by_page_and_line():
    a = pd.DataFrame({"page_id": ["p1", "p1", "p2"], "line_no": [1, 2, 1], "text": ["abc", "xy", "q"]},
                     index=[10, 11, 12])
    b = pd.DataFrame({"page_id": ["p1", "p1"], "line_no": [2, 1], "text": ["xz", "abc"]})
    d = disagreement_column(a, b)
    assert list(d.index) == [10, 11, 12]
    assert d[10] == 0.0 and d[11] == pytest.approx(0.5) and np.isnan(d[12])
    w = with_partner(a, b)
    assert list(w["agree_part"]) == [0.0, 1.0, 0.0]      # 0.5 >= scale: full; no second reading: 0


def test_partner_run():
    runs = [RunRef(1, "ctc", "/p"), RunRef(2, "seq", "/p"), RunRef(3, "seq", "/other"), RunRef(4, "seq", "/p")]
    done = {1: {"a", "b"}, 2: {"a", "b"}, 4: {"a"}}
    assert partner_run(runs, 1, done) == 2            # most shared pages, not the latest
    assert partner_run(runs, 1) == 4                  # without page sets: the latest
    assert partner_run(runs, 3) is None               # no other recogniser over /other
    assert partner_run(runs, 2, done) == 1
    # a routed run's re-reading (some lines only) and kept text are never partners
    routed = runs + [RunRef(5, "seq", "/p", "slow"), RunRef(6, "ctc->seq", "/p", "kept")]
    assert partner_run(routed, 1) == 4


def test_queue_weighs_disagreement():
    lines = pd.DataFrame({"page_id": ["p"] * 3, "line_no": [1, 2, 3], "text": ["aa", "bb", "cc"],
                          "confidence": [0.9, 0.8, 0.95], "agree_part": [0.0, 0.0, 1.0]})
    q = review_queue(lines, weights=DoubtWeights(arithmetic=0.0))
    t = q.table.set_index("line_no")
    assert t.loc[3, "doubt"] == pytest.approx(0.05 + 1.0) and t.loc[2, "doubt"] == pytest.approx(0.2)
    assert list(q.table["line_no"]) == [3, 2, 1]
    assert "another recogniser read it differently" in t.loc[3, "reasons"]
    assert "another" not in t.loc[2, "reasons"]
    plain = review_queue(lines.drop(columns="agree_part"), weights=DoubtWeights(arithmetic=0.0))
    assert list(plain.table["line_no"]) == [2, 1, 3] and "agree_part" not in plain.table.columns


def test_agreement_calibration_against_scikit_learn():
    rng = np.random.default_rng(3)
    n = 400
    y = rng.random(n) < 0.2
    conf = np.clip(0.9 - 0.2 * y + rng.normal(0, 0.1, n), 0, 1)
    dis = np.where(y & (rng.random(n) < 0.7), rng.random(n) * 0.3, np.where(rng.random(n) < 0.05, 0.05, 0.0))
    pages = np.repeat(np.arange(40), 10)
    cal = agreement_calibration(y, conf, dis, groups=pages, n_boot=300)
    # reference: scikit-learn's roc_auc_score on the same scores
    assert cal["confidence"]["auroc"] == pytest.approx(roc_auc_score(y, 1 - conf))
    assert cal["disagreement"]["auroc"] == pytest.approx(roc_auc_score(y, dis))
    assert cal["weighted"]["auroc"] == pytest.approx(roc_auc_score(y, (1 - conf) + np.minimum(1, dis / AGREE_SCALE)))
    for k in ("confidence", "disagreement", "weighted"):
        assert cal[k]["low"] <= cal[k]["auroc"] <= cal[k]["high"]
    d = cal["weighted_minus_confidence"]
    assert d["diff"] == pytest.approx(cal["weighted"]["auroc"] - cal["confidence"]["auroc"])
    assert d["low"] <= d["diff"] <= d["high"]
    # lines without a second reading are left out of all three alike
    dis2 = dis.copy()
    dis2[:100] = np.nan
    assert agreement_calibration(y, conf, dis2, n_boot=50)["lines"] == n - 100


PAGE = [  # truth, reader A (with confidence), reader B
    ("Jan 2 Ashcombe twine 12.50", "Jan 2 Ashcombe twlne 12.50", 0.93, "Jan 2 Ashcombe twine 12.50"),
    ("Jan 5 Brindle hemp 7.25", "Jan 5 Brindle hemp 1.25", 0.97, "Jan 5 Brindle hemp 7.25"),
    ("Jan 9 Coldharbour rope 3.00", "Jan 9 Coldharbour rope 3.00", 0.90, "Jan 9 Coldharbour rope 3.00"),
    ("Cash 1890", "Cash 1890", 0.99, "Cash 1890"),
    ("Jan 11 Dunmore tar 4.10", "Jan 11 Dunmore tar 4.10", 0.80, "Jan 11 Dunmore tar 4.70"),
]


def test_review_command_reports_agreement(tmp_path):
    db = tmp_path / "s.sqlite"
    with RunStore(db) as st:
        for name, col in (("reader-a", 1), ("reader-b", 3)):
            rid = st.start_run(recogniser=name, kind="ctc", card_path="/m", card_hash=name * 8, settings={},
                               input_dir="/pages", host={}, engine="test")
            lines = [LineRecord(line_no=i + 1, x0=0, y0=0, x1=1, y1=1, width_px=1, text=row[col], text_post=None,
                                confidence=row[2]) for i, row in enumerate(PAGE)]
            st.write_page(rid, PageRecord(page_id="page_001.png", path="/pages/page_001.png", content_hash="x",
                                          status="done", n_lines=len(lines)), lines)
            st.finish_run(rid)
    truth = tmp_path / "truth"
    truth.mkdir()
    (truth / "page_001.txt").write_text("".join(r[0] + "\n" for r in PAGE), encoding="utf-8")
    r = CliRunner().invoke(app, ["review", str(db), "--run", "1", "--truth", str(truth), "--json"])
    assert r.exit_code == 0, r.output
    res = json.loads(r.stdout)["runs"][0]
    assert res["partner_run"] == 2
    queue = {q["line_no"]: q for q in res["queue"]}
    assert "another recogniser read it differently" in queue[1]["reasons"]
    assert "another recogniser" not in queue[3]["reasons"]
    ag = res["agreement"]
    y = [1, 1, 0, 0, 0]
    assert ag["lines"] == 5 and ag["error_lines"] == 2
    assert ag["confidence"]["auroc"] == pytest.approx(roc_auc_score(y, [1 - r[2] for r in PAGE]))
    dis = [line_disagreement(r[1], r[3]) for r in PAGE]
    assert ag["disagreement"]["auroc"] == pytest.approx(roc_auc_score(y, dis))
    r = CliRunner().invoke(app, ["review", str(db), "--run", "1", "--truth", str(truth)])
    assert r.exit_code == 0 and "agreement with reader-b (run 2)" in r.stdout
    r = CliRunner().invoke(app, ["review", str(db), "--run", "1", "--no-agreement", "--json"])
    assert json.loads(r.stdout)["runs"][0]["partner_run"] is None
