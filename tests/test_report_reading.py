"""The report read from the top: the decision first, and no figure that misleads.

A hand-made store (the store's own API, real SQLite) with invented ledger pages; the report is built by the
library as ``ocrbench report`` builds it. References: hand arithmetic, written beside the checks.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest

from _report_support import collect
from ocrbench.accuracy.stats import paired_comparison
from ocrbench.report import build_report_data
from ocrbench.report.alignview import INVISIBLE_MARK, SPACE_MARK, align_columns, columns_html
from ocrbench.report.html import recipe_steps, render_html
from ocrbench.store import LineRecord, PageRecord, RunStore

# Invented pages: truth, and what the recogniser read (one digit misread on page 2).
PAGES = {
    "p1.png": (["Cash Book 1890", "Jan 2 twine 12.50", "Jan 5 hemp 7.25", "Total 19.75"],
               ["Cash Book 1890", "Jan 2 twine 12.50", "Jan 5 hemp 7.25", "Total 19.75"]),
    "p2.png": (["Cash Book 1890", "Feb 1 rope 3.00", "Feb 7 tar 1.10", "Total 4.10"],
               ["Cash Book 1890", "Feb 1 rope 3.00", "Feb 7 tar 1.70", "Total 4.10"]),
    "p3.png": (["Memoranda", "Paid the carter", "See over"],
               ["Memoranda", "Paid the carter", "See over"]),
}


def _store(tmp_path, line_time=lambda n, k: 0.01):
    db = tmp_path / "s.sqlite"
    truth = tmp_path / "truth"
    truth.mkdir()
    with RunStore(db) as st:
        rid = st.start_run(recogniser="ledger-ctc", kind="ctc", card_path="/m/card.toml", card_hash="c" * 64,
                           settings={"batch_size": 16}, input_dir="/pages", host={"hostname": "h"}, engine="test")
        for k, (pid, (ref, hyp)) in enumerate(PAGES.items()):
            lines = [LineRecord(line_no=i + 1, x0=0, y0=0, x1=1, y1=1, width_px=1, text=h, text_post=None,
                                confidence=0.9, n_chars=len(h), t_line=line_time(len(h), k))
                     for i, h in enumerate(hyp)]
            st.write_page(rid, PageRecord(page_id=pid, path=f"/pages/{pid}", content_hash="x", status="done",
                                          n_lines=len(lines), t_total=0.5 + 0.1 * k), lines)
            (truth / pid.replace(".png", ".txt")).write_text("".join(t + "\n" for t in ref), encoding="utf-8")
        st.finish_run(rid)
    return db, truth


def test_decision_comes_first(tmp_path):
    db, truth = _store(tmp_path)
    data = build_report_data(db, truth=truth, n_boot=200)
    page = render_html(data.summary, {})
    c = collect(page)
    headings = [t for t in c.text if t.strip()]
    assert page.index('id="decision"') < page.index('id="side-by-side"')
    assert headings.index("Decision") < headings.index("Recognisers side by side")
    # without a plan: no recommendation, said in words, and the accuracy of each option with its interval
    block = page[page.index('id="decision"'):page.index("</section>")]
    assert "no option is recommended" in block and 'data-key="recognisers.0.accuracy.cer_low"' in block


def test_negative_time_bound_is_clipped_at_zero_and_said(tmp_path):
    # line time falls with length on one page and rises on another: a flat slope whose interval straddles 0
    times = {0: lambda n: 0.02 - 0.0004 * n, 1: lambda n: 0.002 + 0.0004 * n, 2: lambda n: 0.01}
    db, truth = _store(tmp_path, line_time=lambda n, k: max(times[k](n), 0.0001))
    data = build_report_data(db, truth=truth, n_boot=300)
    run = data.summary["recognisers"][0]
    assert run["seconds_per_char_low"] == 0.0 and run["seconds_per_char_clipped"] is True
    assert all(run[k] >= 0 for k in ("seconds_per_char", "seconds_per_char_low", "seconds_per_char_high"))
    assert "clipped at 0" in render_html(data.summary, {})


def test_p_value_at_the_resampling_floor_is_a_bound():
    # b is worse than a on every one of 12 pages: no resample puts the difference on a's wrong side, so
    # the p-value is the floor of the resampling (hand check: g = 1/(n_boot + 1))
    pages_a = pd.DataFrame({"page_id": [f"p{i}" for i in range(12)], "char_edits": [1] * 12, "ref_chars": [100] * 12})
    pages_b = pages_a.assign(char_edits=5)
    r = paired_comparison(pages_a, pages_b, n_boot=500, seed=0)
    assert r["p_at_floor"] is True and r["p_value"] == r["p_floor"] and r["winner"] == "a"
    more = paired_comparison(pages_a, pages_b, n_boot=5000, seed=0)
    assert more["p_floor"] < r["p_floor"]                      # the floor is the resampling's, not the data's
    summary = {"paired": [{"text": "raw", **r}], "recognisers": []}
    from ocrbench.report.html import _p_value   # noqa: PLC0415 - the cell writer itself
    assert _p_value(summary, 0).startswith("&lt; ")


def test_misread_rate_only_for_checkable_pages(tmp_path):
    db, truth = _store(tmp_path)
    data = build_report_data(db, truth=truth, n_boot=200)
    bal = data.summary["recognisers"][0]["balance"]["raw"]
    assert bal["checkable"] and bal["misread_rate"] is not None
    # a store whose only page cannot be checked (no total line, one amount unreadable)
    with RunStore(tmp_path / "u.sqlite") as st:
        rid = st.start_run(recogniser="x", kind="ctc", card_path="/c", card_hash="d" * 64, settings={},
                           input_dir="/p", host={}, engine="test")
        texts = ["Jan 2 twine 1?.5O", "Jan 5 hemp 7.25"]
        st.write_page(rid, PageRecord(page_id="u.png", path="/p/u.png", content_hash="x", status="done",
                                      n_lines=2, t_total=0.5),
                      [LineRecord(line_no=i + 1, x0=0, y0=0, x1=1, y1=1, width_px=1, text=t, text_post=None,
                                  confidence=0.5, n_chars=len(t), t_line=0.01) for i, t in enumerate(texts)])
        st.finish_run(rid)
    data = build_report_data(tmp_path / "u.sqlite", n_boot=200)
    bal = data.summary["recognisers"][0]["balance"]["raw"]
    assert bal["checkable"] is False and bal["misread_rate"] is None
    page = render_html(data.summary, {})
    section = page[page.index('id="arithmetic"'):]
    assert "not checkable</td>" in section and "100.00 %" not in section


def test_counts_read_as_words():
    from ocrbench.report.html import _plural   # noqa: PLC0415
    assert f"1 {_plural(1, 'edit')}" == "1 edit" and f"2 {_plural(2, 'edit')}" == "2 edits"
    assert f"0 {_plural(0, 'line')}" == "0 lines"


def test_inserted_space_and_invisible_characters_are_visible_marks():
    out = columns_html(align_columns("Cash from", "Cash  from\u200b"))
    ins = re.findall(r'<span class="e-ins" title="([^"]*)">([^<]*)</span>', out)
    assert (("U+0020 SPACE", SPACE_MARK) in ins) and (("U+200B ZERO WIDTH SPACE", INVISIBLE_MARK) in ins)


def test_recipe_reads_as_its_steps():
    assert recipe_steps("pp1|unicode(form=NFC)|whitespace|lexicon(words=ab12,max=2)") == \
        "unicode, whitespace, lexicon"
    assert recipe_steps(None) == "none"


@pytest.mark.parametrize("source", ["the post-processed text where stored, else the raw text"])
def test_no_doubled_article(source):
    from ocrbench.report.html import _plan   # noqa: PLC0415
    page = _plan({"plan": {"spec": {}, "accuracy_source": source, "source": "p.json"}})
    assert "the the" not in page and "CER of the post-processed text" in page


def test_pages_per_hour_is_not_negative(tmp_path):
    db, truth = _store(tmp_path)
    run = build_report_data(db, n_boot=200).summary["recognisers"][0]
    assert run["pages_per_hour_low"] > 0 and run["pages_per_hour_low"] <= run["pages_per_hour"]
    assert np.isfinite(run["pages_per_hour_high"])


def test_pages_per_hour_comes_from_an_ordinary_run_not_a_measuring_one(tmp_path):
    from ocrbench.planning.inputs import SCALING_COLUMNS, save_scaling   # noqa: PLC0415

    db, truth = _store(tmp_path)
    with RunStore(db) as st:     # a later run of the same recogniser, written by measure-scaling
        rid = st.start_run(recogniser="ledger-ctc", kind="ctc", card_path="/m/card.toml", card_hash="c" * 64,
                           settings={"batch_size": 1}, input_dir="/pages", host={"hostname": "h"}, engine="test")
        st.write_page(rid, PageRecord(page_id="p1.png", path="/pages/p1.png", content_hash="x", status="done",
                                      n_lines=0, t_total=9.0), [])
        st.finish_run(rid)
    row = dict.fromkeys(SCALING_COLUMNS, None) | {"recogniser": "ledger-ctc", "workers": 1, "run_id": rid,
                                                 "measured_at": "2026-01-01T00:00:00+00:00"}
    save_scaling(db, pd.DataFrame([row]))
    run = build_report_data(db, n_boot=200).summary["recognisers"][0]
    assert run["run_id"] == 1 and run["purpose"] == "run"
    # asked for by id, the measuring run is shown, and said to be one
    data = build_report_data(db, run_ids=[rid], n_boot=200)
    assert data.summary["recognisers"][0]["purpose"] == "measure-scaling"
    assert "measure-scaling run" in render_html(data.summary, {})


def test_worst_lines_are_shown_as_read_with_inline_marks():
    from ocrbench.report.alignview import inline_html   # noqa: PLC0415

    out = inline_html(align_columns("Cash from bank 12.50", "Cash fr m bank  12.5O"))
    # the text of the view is the line as read (edited spaces made visible)
    assert "".join(collect(out).text) == f"Cash fr{SPACE_MARK}m bank {SPACE_MARK}12.5O"
    assert '<mark class="sub" title="read O where the truth has 0">O</mark>' in out
    assert '<mark class="sub" title="read U+0020 SPACE where the truth has o">' in out
    assert f'<mark class="ins" title="added by the reading: U+0020 SPACE">{SPACE_MARK}</mark>' in out
    # a truth character the reading misses is shown struck through where it belongs
    assert inline_html(align_columns("abc", "ac")) == \
        '<p class="al">a<del title="missing from the reading: b">b</del>c</p>'
    assert "edit" not in out                                  # no per-position letter row


@pytest.mark.parametrize("deadline_h,above", [(1000.0, True), (20.0, False)])
def test_a_far_deadline_is_named_not_drawn(deadline_h, above):
    from ocrbench.report.plots import plan_workers   # noqa: PLC0415

    curve = [{"recogniser": "a", "workers": w, "wall_seconds_p10": 3600 * 8 / w, "wall_seconds_p50": 3600 * 10 / w,
              "wall_seconds_p90": 3600 * 12 / w} for w in (1, 2, 4)]
    summary = {"recognisers": [{"name": "a"}],
               "plan": {"curve": curve, "spec": {"pages": 1000, "deadline": "x"},
                        "rows": {"a": {"deadline_seconds": deadline_h * 3600}}}}
    svg = plan_workers(summary)
    # the highest P90 is 12 h: a deadline over three times that would squash the curves if drawn
    assert ("is above this plot" in svg) is above
    assert ("deadline (x)" in svg) is not above


def test_a_rising_wall_clock_is_explained_in_the_caption():
    from ocrbench.report.html import _curve_note, curve_rises   # noqa: PLC0415

    curve = [{"recogniser": "a", "workers": 1, "wall_seconds_p50": 100.0},
             {"recogniser": "a", "workers": 2, "wall_seconds_p50": 150.0},
             {"recogniser": "a", "workers": 4, "wall_seconds_p50": 80.0},
             {"recogniser": "b", "workers": 1, "wall_seconds_p50": 100.0},
             {"recogniser": "b", "workers": 2, "wall_seconds_p50": 60.0}]
    assert curve_rises(curve) == [("a", 1, 2, 1.5)]
    note = _curve_note({"plan": {"curve": curve, "scaling_measured": ["a", "b"]}})
    assert "a from 1 to 2 workers (×1.50)" in note and "measure-scaling" in note
    unexplained = _curve_note({"plan": {"curve": curve}})      # no measured scaling: only the fact is said
    assert "a from 1 to 2 workers (×1.50)" in unexplained and "measure-scaling" not in unexplained
    assert _curve_note({"plan": {"curve": curve[3:]}}) == ""
