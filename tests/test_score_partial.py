"""`ocrbench score` with partial ground truth and with the folder `run --text-out` writes.

Reference: per-page edit distances from the `editdistance` package; CER = Σ edits / Σ reference characters.
"""

from __future__ import annotations

import json

import editdistance
from typer.testing import CliRunner

from ocrbench.cli.app import app
from ocrbench.io.text import hypothesis_folders
from ocrbench.store import LineRecord, PageRecord, RunStore

runner = CliRunner()
PAGES = {"page_001": (["Jan 2 twine 12.50", "Total 12.50"], ["Jan 2 twlne 12.50", "Total 12.50"]),
         "page_002": (["Feb 3 hemp 7.25", "Total 7.25"], ["Feb 3 hemp 1.25", "Total 7.25"]),
         "page_003": (["Mar 4 rope 3.00"], ["Mar 4 rope 3.00"])}


def _folders(tmp_path, keyed=("page_001", "page_002")):
    truth = tmp_path / "truth"
    truth.mkdir()
    for stem in keyed:
        (truth / f"{stem}.txt").write_text("".join(t + "\n" for t in PAGES[stem][0]), encoding="utf-8")
    text_out = tmp_path / "text"
    for rec in ("ctc", "seq"):
        (text_out / rec).mkdir(parents=True)
        for stem, (_, hyp) in PAGES.items():
            (text_out / rec / f"{stem}.txt").write_text("".join(h + "\n" for h in hyp), encoding="utf-8")
    return truth, text_out


def _cer(stems):
    edits = sum(editdistance.eval("".join(PAGES[s][0]), "".join(PAGES[s][1])) for s in stems)   # editdistance reference
    return edits / sum(len("".join(PAGES[s][0])) for s in stems)


def test_partial_truth_scores_what_it_has_and_exits_0(tmp_path):
    truth, text_out = _folders(tmp_path)
    r = runner.invoke(app, ["score", "--truth", str(truth), "--hyp", str(text_out / "ctc"), "--json", "--boot", "200"])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert doc["pages"] == 2 and abs(doc["cer"] - _cer(["page_001", "page_002"])) < 1e-12
    lines = [ln for ln in r.stderr.splitlines() if "no ground truth" in ln]
    assert len(lines) == 1 and "1 page(s) have no ground truth" in lines[0]
    r = runner.invoke(app, ["score", "--truth", str(truth), "--hyp", str(text_out / "ctc"), "--require-truth"])
    assert r.exit_code == 1 and "no ground truth for" in r.stderr


def test_text_out_folder_scores_one_system_per_recogniser(tmp_path):
    truth, text_out = _folders(tmp_path, keyed=tuple(PAGES))
    assert list(hypothesis_folders(text_out)) == ["ctc", "seq"]
    r = runner.invoke(app, ["score", "--truth", str(truth), "--hyp", str(text_out), "--json", "--boot", "200"])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert [s["system"] for s in doc["systems"]] == ["ctc", "seq"]
    assert all(abs(s["cer"] - _cer(PAGES)) < 1e-12 for s in doc["systems"])
    empty = tmp_path / "empty"
    empty.mkdir()
    r = runner.invoke(app, ["score", "--truth", str(truth), "--hyp", str(empty)])
    assert r.exit_code == 2 and "neither directly nor in one subfolder" in r.output


def test_store_with_partial_truth_exits_0(tmp_path):
    truth, _ = _folders(tmp_path, keyed=("page_002",))
    db = tmp_path / "s.sqlite"
    with RunStore(db) as st:
        rid = st.start_run(recogniser="ctc", kind="ctc", card_path="c", card_hash="a" * 64, settings={},
                           input_dir="/p", host={}, engine="test")
        for stem, (_, hyp) in PAGES.items():
            st.write_page(rid, PageRecord(page_id=f"{stem}.png", path="x", content_hash="x", status="done",
                                          n_lines=len(hyp)),
                          [LineRecord(line_no=i, x0=0, y0=0, x1=1, y1=1, width_px=1, text=h, text_post=None,
                                      confidence=0.9) for i, h in enumerate(hyp)])
    r = runner.invoke(app, ["score", "--truth", str(truth), "--store", str(db), "--json", "--boot", "200"])
    assert r.exit_code == 0, r.output
    assert json.loads(r.stdout)["pages"] == 1 and "2 page(s) have no ground truth" in r.stderr


def test_pairing_policy_for_missing_truth(tmp_path):
    from ocrbench.io.text import pair_folders

    truth, text_out = _folders(tmp_path, keyed=("page_001",))
    p = pair_folders(truth, text_out / "ctc")
    assert not p.incomplete() and p.incomplete(require_truth=True)
    assert p.missing_truth_line().startswith("2 page(s) have no ground truth and were not scored (")
    (truth / "page_404.txt").write_text("x\n", encoding="utf-8")
    assert pair_folders(truth, text_out / "ctc").incomplete()       # truth without a hypothesis: always
