"""Frame helpers that wire post-processing to the run store: exercised on a real SQLite store."""

from __future__ import annotations

import json

import pandas as pd

from ocrbench.postprocess import balance_lines_frame, build_pipeline, postprocess_lines_frame, review_queue
from ocrbench.postprocess.lexicon import Lexicon
from ocrbench.store import LineRecord, PageRecord, RunStore

PAGE = ["Marrowby & Kettle Cash Book Folio 1", "Date Payee Particulars Amount",
        "Jan 9 H. Brem  hemp 12.50", "Jan 12 L. Tarnbv soap 7.25", "Total 19.75"]


def _store(tmp_path):
    st = RunStore(tmp_path / "runs.sqlite")
    run = st.start_run(recogniser="demo", kind="ctc", card_path="x", card_hash="h", settings={},
                       input_dir=str(tmp_path), host={}, engine="test")
    for pid, lines in (("p1.png", PAGE), ("p2.png", PAGE[:3] + ["Jan 12 L. Tarnbv soap 1.25", PAGE[4]])):
        recs = []
        for i, t in enumerate(lines):
            conf = [0.99] * len(t)
            if "Tarnbv" in t:
                conf[t.index("Tarnbv") + 5] = 0.3
            recs.append(LineRecord(line_no=i, x0=0, y0=0, x1=1, y1=1, width_px=1, text=t, text_post=None,
                                   confidence=min(conf), char_conf=conf, n_chars=len(t)))
        st.write_page(run, PageRecord(page_id=pid, path=pid, content_hash=None, status="done"), recs)
    return st, run


def test_postprocess_and_balance_from_store_frames(tmp_path):
    st, run = _store(tmp_path)
    lines = st.read_frames([run])["lines"]
    assert isinstance(lines["char_conf_json"].iloc[0], str) and json.loads(lines["char_conf_json"].iloc[0])
    pipe = build_pipeline(["unicode", "whitespace", "lexicon"], lexicon=Lexicon.from_words(["Tarnby", "hemp"]))
    post = postprocess_lines_frame(lines, pipe)
    assert post.index.equals(lines.index)
    by_key = dict(zip(zip(lines["page_id"], lines["line_no"]), post))
    assert by_key[("p1.png", 2)] == "Jan 9 H. Brem hemp 12.50"
    assert by_key[("p1.png", 3)] == "Jan 12 L. Tarnby soap 7.25"     # per-character confidence opened the gate
    bal = balance_lines_frame(lines.assign(text=post))
    assert bal[["page_id", "status", "difference"]].values.tolist() == [
        ["p1.png", "balanced", "0.00"], ["p2.png", "unbalanced", "6.00"]]
    q = review_queue(lines.assign(text=post), balances=dict(zip(bal["page_id"], bal["balance"])))
    assert (q.table.iloc[0]["page_id"], q.table.iloc[0]["line_no"]) == ("p2.png", 3)
    st.close()


def test_pipeline_is_a_runner_hook():
    pipe = build_pipeline(["whitespace"])
    assert pipe(["a  b", " c"], [0.5, 0.9]) == ["a b", "c"]
    assert postprocess_lines_frame(pd.DataFrame(columns=["page_id", "line_no", "text"]), pipe).empty
