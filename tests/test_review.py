"""Review queue (doubt ranking, review time) and confidence calibration (AUROC, deciles)."""

from __future__ import annotations

import itertools
import random

import editdistance
import numpy as np
import pandas as pd
import pytest

from ocrbench.postprocess.lexicon import Lexicon
from ocrbench.postprocess.review import (DoubtWeights, ReviewRate, auroc, auroc_interval, calibration,
                                         error_by_decile, line_edits, review_queue)


def pairwise_auc(y, s):
    """Direct count over every (positive, negative) pair: 1 if the positive scores higher, ½ on a tie
    (Mann & Whitney 1947; Hanley & McNeil 1982 show the ROC area equals this probability)."""
    pos = [b for a, b in zip(y, s) if a]
    neg = [b for a, b in zip(y, s) if not a]
    wins = sum(1.0 if p > n else 0.5 if p == n else 0.0 for p, n in itertools.product(pos, neg))
    return wins / (len(pos) * len(neg))


def test_auroc_agrees_with_pairwise_count():
    y = [1, 0, 1, 1, 0, 0, 1, 0, 0, 1]
    s = [0.9, 0.1, 0.4, 0.4, 0.4, 0.2, 0.8, 0.7, 0.4, 0.3]      # ties across classes on purpose
    assert auroc(y, s) == pytest.approx(pairwise_auc(y, s))
    # hand count: 5 positives x 5 negatives = 25 pairs; 16 wins and 4 ties (the 0.4s) -> 18/25
    assert auroc(y, s) == pytest.approx(18 / 25)
    rng = random.Random(1)
    for _ in range(50):
        n = rng.randint(2, 40)
        yy = [rng.random() < 0.4 for _ in range(n)]
        ss = [rng.choice([0.1, 0.2, 0.5, 0.9]) if rng.random() < 0.5 else rng.random() for _ in range(n)]
        if 0 < sum(yy) < n:
            assert auroc(yy, ss) == pytest.approx(pairwise_auc(yy, ss))
    assert auroc([1, 1], [0.2, 0.3]) is None       # one class only: undefined


def test_auroc_agrees_with_scikit_learn():
    import sklearn.metrics as metrics   # reference only (the test extra installs scikit-learn)

    rng = np.random.default_rng(0)
    y = rng.random(200) < 0.3
    s = np.round(rng.random(200) + y * 0.3, 2)
    assert auroc(y, s) == pytest.approx(metrics.roc_auc_score(y, s))   # reference: scikit-learn


def test_auroc_interval():
    rng = np.random.default_rng(2)
    y = rng.random(300) < 0.3
    s = rng.random(300) + 0.5 * y
    point = auroc(y, s)
    lo, hi = auroc_interval(y, s, n_boot=400, seed=1)
    assert lo < point < hi and hi - lo < 0.2
    pages = np.repeat(np.arange(30), 10)
    glo, ghi = auroc_interval(y, s, groups=pages, n_boot=400, seed=1)
    assert glo < point < ghi
    assert auroc_interval([0, 0, 0], [1, 2, 3]) is None


def test_line_edits_match_editdistance():
    texts = ["Jan 9 L. Tarnby soap 521.32", "Total 16,215.46", "", "ﬁne"]
    truths = ["Jan 9 L. Tarnby soap 527.32", "Tota1 16,215.46", "abc", "fine"]
    # reference: the editdistance package (Levenshtein distance)
    assert line_edits(truths, texts).tolist() == [editdistance.eval(a, b) for a, b in zip(truths, texts)]
    with pytest.raises(ValueError):
        line_edits([], ["a"])


def test_error_by_decile():
    conf = np.linspace(0.0, 0.99, 100)
    edits = (conf < 0.3).astype(int) * 2               # the least confident lines hold the errors
    ref = np.full(100, 10)
    t = error_by_decile(conf, edits, ref)
    assert t["lines"].tolist() == [10] * 10 and t["decile"].tolist() == list(range(1, 11))
    assert t["error_line_share"].tolist()[:3] == [1.0, 1.0, 1.0]
    assert t["error_line_share"].tolist()[3:] == [0.0] * 7
    assert t["cer"].iloc[0] == pytest.approx(0.2)
    assert (t["share_low"] <= t["error_line_share"]).all() and (t["error_line_share"] <= t["share_high"]).all()
    assert len(error_by_decile([0.5, 0.7], [0, 1], [4, 4])) == 2
    assert error_by_decile([], [], []).empty


def test_calibration_on_lines_with_truth():
    rng = random.Random(4)
    truths, texts, confs, pages = [], [], [], []
    for i in range(200):
        t = f"Jan {i % 28 + 1} A. Brem hemp {rng.randint(1, 999)}.{rng.randint(0, 99):02d}"
        c = rng.random()
        wrong = rng.random() < (1 - c) * 0.8              # doubtful lines are wrong more often
        texts.append(t.replace("e", "c", 1) if wrong else t)
        truths.append(t)
        confs.append(c)
        pages.append(i // 20)
    cal = calibration(truths, texts, confs, page_ids=pages, n_boot=300)
    assert cal.lines == 200 and 20 < cal.error_lines < 140
    assert cal.auroc == pytest.approx(pairwise_auc([a != b for a, b in zip(texts, truths)], [1 - c for c in confs]))
    assert 0.5 < cal.auroc_low < cal.auroc < cal.auroc_high
    assert cal.deciles["error_line_share"].iloc[0] > cal.deciles["error_line_share"].iloc[-1]
    assert set(cal.to_dict()) >= {"auroc", "auroc_low", "auroc_high", "deciles"}


PAGE = ["Marrowby & Kettle Cash Book Folio 1", "Date Payee Particulars Amount",
        "Jan 9 H. Brem hemp 12.50", "Jan 12 L. Tarnby soap 7.25", "Jan 14 P. Radmore twine 3.00",
        "Total 22.75"]


def _rows(page_id, texts, confs):
    return [{"page_id": page_id, "line_no": i, "text": t, "confidence": c} for i, (t, c) in enumerate(zip(texts, confs))]


def test_review_queue_ranks_by_documented_score():
    bad = list(PAGE)
    bad[3] = "Jan 12 L. Tarnby soap 1.25"        # misread 7 -> 1: the page is off by 6.00
    rows = _rows("a", PAGE, [0.9, 0.9, 0.95, 0.9, 0.6, 0.99]) + _rows("b", bad, [0.9, 0.9, 0.95, 0.9, 0.9, 0.99])
    q = review_queue(rows, lexicon=Lexicon.from_words(["Brem", "Tarnby", "Radmore", "hemp", "soap", "twine", "Jan"]))
    top = q.table.iloc[0]
    assert (top["page_id"], top["line_no"]) == ("b", 3)
    assert top["ledger_part"] == 1.0 and "one digit here would balance it" in top["reasons"]
    # the documented formula: doubt = 1*(1-conf) + 1*ledger_part + 0.5*unknown_word_share
    t = q.table
    assert np.allclose(t["doubt"], (1 - t["confidence"]) + t["ledger_part"] + 0.5 * t["word_part"])
    # other amount lines of the unbalanced page get half weight; the balanced page none
    assert set(t[(t.page_id == "b") & t.line_no.isin([2, 4, 5])]["ledger_part"]) <= {0.5, 1.0}
    assert (t[t.page_id == "a"]["ledger_part"] == 0).all()
    assert t.iloc[0]["doubt"] >= t.iloc[1]["doubt"] >= t.iloc[-1]["doubt"]


def test_review_minutes_at_the_documented_rate():
    rows = _rows("a", PAGE, [0.5] * len(PAGE))
    q = review_queue(pd.DataFrame(rows), rate=ReviewRate(seconds_per_line=4, chars_per_second=10))
    est = q.minutes()
    chars = sum(len(t) for t in PAGE)
    # hand-worked: 4 s per line + 1 s per 10 characters
    assert est["minutes"] == pytest.approx((4 * len(PAGE) + chars / 10) / 60)
    assert est["minutes_low"] == pytest.approx(est["minutes"] / 2) and est["minutes_high"] == pytest.approx(est["minutes"] * 2)
    assert "assumed" in est["assumption"]
    two = q.minutes(max_lines=2)
    assert two["lines"] == 2
    assert q.take(max_minutes=0.25)["seconds"].sum() <= 15
    assert q.take(min_doubt=10).empty


def test_unknown_confidence_and_custom_weights():
    rows = _rows("a", ["Jan 9 H. Brem hemp 12.50", "Total 12.50"], [None, 0.9])
    q = review_queue(rows, weights=DoubtWeights(confidence=2.0, arithmetic=0.0, unknown_words=0.0))
    assert q.table.iloc[0]["line_no"] == 0 and q.table.iloc[0]["doubt"] == pytest.approx(2.0)
    assert "confidence unknown" in q.table.iloc[0]["reasons"]
    with pytest.raises(ValueError, match="page_id"):
        review_queue([{"text": "x"}])


def test_lines_of_flagged_pages_head_the_queue_with_the_flags_as_reason():
    from ocrbench.postprocess.review import flagged_page_rows

    rows = pd.DataFrame(_rows("a", PAGE, [0.5] * len(PAGE)) + _rows("b", PAGE, [0.99] * len(PAGE)))
    rows["flags"] = np.where(rows["page_id"] == "b", "rotated_180", "")
    rows = pd.concat([rows, flagged_page_rows({"b": "rotated_180", "c": "blank", "a": ""}, rows)],
                     ignore_index=True)
    assert rows["page_id"].tolist().count("c") == 1                   # one row for the page stored without lines
    q = review_queue(rows)
    t = q.table
    # every line of the flagged pages comes first, though page a's lines are far less confident
    assert set(t.head(len(PAGE) + 1)["page_id"]) == {"b", "c"} and t.head(len(PAGE) + 1)["flagged"].all()
    assert not t.iloc[len(PAGE) + 1:]["flagged"].any()
    assert t[t.page_id == "b"]["reasons"].str.startswith("page flagged: rotated_180").all()
    assert t[t.page_id == "c"]["reasons"].iloc[0].startswith("page flagged: blank; no line of it was read")
    assert len(q.take(min_doubt=10)) == len(PAGE) + 1                 # the flagged head is kept by any doubt cut
    # without a flags column nothing changes
    assert not review_queue(_rows("a", PAGE, [0.5] * len(PAGE))).table["flagged"].any()


def test_store_review_puts_flagged_pages_first(tmp_path):
    from ocrbench.postprocess.store_review import review_store
    from ocrbench.store import LineRecord, PageRecord, RunStore

    db = tmp_path / "s.sqlite"
    with RunStore(db) as st:
        rid = st.start_run(recogniser="r", kind="ctc", card_path="/c.toml", card_hash="h", settings={},
                           input_dir="/p", host={}, engine="x")
        for pid, flags, conf in (("box1/a.png", "", 0.4), ("box1/b.png", "rotated_90", 0.99)):
            lines = [LineRecord(line_no=i + 1, x0=0, y0=0, x1=9, y1=9, width_px=9, text=t, text_post=None,
                                confidence=conf, n_chars=len(t)) for i, t in enumerate(PAGE)]
            st.write_page(rid, PageRecord(page_id=pid, path=pid, content_hash="c", status="done",
                                          n_lines=len(PAGE), collection="box1", flags=flags), lines)
        st.write_page(rid, PageRecord(page_id="box2/blank.png", path="x", content_hash="c", status="done", n_lines=0,
                                      collection="box2", flags="blank"))
    [rev], problems = review_store(db, max_lines=None)
    t = rev.queue.table
    assert set(t.head(len(PAGE) + 1)["page_id"]) == {"box1/b.png", "box2/blank.png"}
    assert t[t.page_id == "box2/blank.png"]["line_no"].tolist() == [0]
    assert rev.to_dict()["queue"][0]["reasons"].startswith("page flagged: ")
