"""The browser-rendered test set (issue 17): HTML ledger and register tables drawn by headless Chromium.

tests/fixtures/browser_set/ holds the committed sample: the HTML sources, one grey crop per table row
and truth.tsv (its README says how build.py made them and with which faces). Two checks:

* the committed truth is what the HTML says (re-parsed here with the standard library's
  ``html.parser``; no browser needed), every crop exists and is 8-bit grey, and every character is one
  the demo models can emit, so the set cannot drift from its sources;
* the issue's target: greedy CER, whitespace collapsed, at most 3 % for both demo recognisers, each run
  with its own card through the engine's public API (as the runner runs it). The edit distance is
  rapidfuzz's Levenshtein distance; the interval printed is a 95 % bootstrap over lines.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from PIL import Image

from _browser_set import SET_DIR, html_rows, measure, read_truth
from ocrbench.synth import ALPHABET

ROOT = Path(__file__).resolve().parents[1]
CTC = ROOT / "models" / "ledger-ctc"
SEQ = ROOT / "models" / "ledger-seq"

#: Issue 17, "Targets": the browser-rendered set, <= 3 % CER for both demo recognisers.
TARGET = 0.03
#: What the shipped models measure here (models/README.md): a regression guard while the target is
#: not met. ledger-ctc retrained on many faces 18.3 % -> 3.01 % -> 2.07 % (second retraining, target met);
#: ledger-seq 22.7 % -> 2.42 % (retrained with the CTC model's encoder, joint decoding with its CTC output,
#: whole lines; target met; the decoder alone on whole lines read 50.8 % of this set).
SHIPPED = {"ledger-ctc": 0.0207, "ledger-seq": 0.0242}


def test_truth_matches_html_sources():
    truth = read_truth()
    from_html = [(f"lines/{line}.png", text) for page in sorted((SET_DIR / "html").glob("t*.html"))
                 for line, text in html_rows(page)]
    assert len(from_html) >= 150
    assert truth == from_html
    assert len({name for name, _ in truth}) == len(truth)
    bad = sorted({ch for _, text in truth for ch in text if ch not in ALPHABET})
    assert not bad, f"characters the models cannot emit: {bad}"
    for name, text in truth:
        assert text and text == " ".join(text.split()), name
        with Image.open(SET_DIR / name) as im:
            assert im.mode == "L" and im.height >= 8 and im.width > im.height, name
    # nothing in lines/ without a truth line
    assert sorted(p.name for p in (SET_DIR / "lines").glob("*.png")) == sorted(Path(n).name for n, _ in truth)


def test_committed_set_stays_small():
    size = sum(p.stat().st_size for p in SET_DIR.rglob("*") if p.is_file())
    assert size < 2 * 1024 * 1024


@pytest.mark.slow
@pytest.mark.parametrize("folder", [CTC, SEQ], ids=["ctc", "seq"])
def test_browser_set_cer_target(folder):
    """Accuracy, not timing: the issue's <= 3 % CER on the browser-rendered set, greedy, card as shipped."""
    score = measure(folder)
    print(score.summary())
    worst = sorted(score.pairs, key=lambda p: -p[3])[:5]
    for name, ref, hyp, edits in worst:
        print(f"  {name} ({edits} edits)\n    ref: {ref}\n    hyp: {hyp}")
    assert score.lines == len(read_truth())
    cer = score.cer
    assert cer <= SHIPPED[folder.name] * 1.05, score.summary()         # no worse than the shipped figure
    if cer > TARGET:                                                  # stated, not hidden: the target
        pytest.xfail(f"issue 17 target {100 * TARGET:.0f} % not met yet: {score.summary()}")
