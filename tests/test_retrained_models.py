"""The shipped demo recognisers on print they were not trained on.

Accuracy checks, not timings. Lines are rendered by ``models/linegen.py`` in the
**held-out design families** only (whole families never seen in training:
Century Schoolbook, Avant Garde, Inconsolata, EB Garamond, Courier Prime, Lato
and Carlito, Caladea — Debian font packages; ``.ci/run`` installs them). The
recognisers are driven exactly as a run drives them (their cards, greedy
decoding); CER is the Levenshtein distance from rapidfuzz (reference library)
over the reference length, whitespace collapsed on both sides (ground truth is
keyed with a single space between fields: common practice).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
from rapidfuzz.distance import Levenshtein

from _runner_support import DEMO_CTC, DEMO_SEQ, open_demo

MODELS = Path(__file__).resolve().parents[1] / "models"
sys.path.insert(0, str(MODELS))

import linegen  # noqa: E402

N_LINES = 150          # per condition (clean, degraded); fixed seed inside linegen

# The targets: held-out families, clean and degraded, greedy.
TARGET = {"ctc": 0.02, "seq": 0.03}
# What the shipped models measure on these lines (models/README.md), a regression guard while the
# targets are not met: ledger-ctc retrained twice (first build: 31.8 % clean, 42.4 % degraded; first
# retraining 4.68 % / 11.29 %); ledger-seq retrained with the CTC model's encoder and decoding jointly with
# its CTC output, whole lines (first build: 40.21 % / 54.59 %; the same weights decoded by the decoder
# alone, lines cut at gaps: 5.89 % / 22.38 %). Until the generator kept to the 6 px x-height floor
# and stopped thinning thin faces to nothing (models/README.md, "Lines with no text left"), the same
# models then shipped measured 2.36 % / 7.70 % (ctc) and 1.58 % / 6.50 % (seq) on its lines, and 1.29 % /
# 4.63 % and 0.70 % / 3.25 % on the corrected lines. Shipped now: seq trained on to step 13,282 on the
# corrected lines, ledger-ctc its encoder and CTC head; those weights read 0.97 % / 3.98 % (ctc) and
# 0.58 % / 2.78 % (seq) before their cards trimmed loose crops ([input] trim, tests/test_crop_trim.py), and
# 0.83 % / 2.90 % (ctc) after. Shipped now: that CTC model trained on for 2,233 steps on the CTC loss
# alone, on training lines trimmed as the cards trim crops (0.86 % / 2.65 %), then 6,482 steps more with
# three in five lines in small type (0.61 % / 2.23 %), then a third CTC-only stage of 6,799 steps with seven
# in ten (models/README.md, "third CTC-only stage"). Its degraded figure, 2.00 %, is inside the 2 % target by a
# fraction of one edit; the xfail below stays for a machine whose arithmetic moves it by one.
SHIPPED = {("ctc", False): 0.0070, ("ctc", True): 0.0200, ("seq", False): 0.0055, ("seq", True): 0.0215}




def _read(rec, images) -> list[str]:
    out = []
    for i in range(0, len(images), 32):
        results, _ = rec.recognise([np.asarray(im) for im in images[i:i + 32]])
        out += [r.text for r in results]
    return out


def _cer(refs, hyps) -> float:
    refs = [" ".join(r.split()) for r in refs]
    hyps = [" ".join(h.split()) for h in hyps]
    return sum(Levenshtein.distance(r, h) for r, h in zip(refs, hyps)) / sum(len(r) for r in refs)


def _heldout(degraded: bool):
    missing = [f.name for f in linegen.HELDOUT_FAMILIES if not linegen.faces([f])]
    assert not missing, (f"held-out font families not installed: {missing}; "
                         "install the Debian packages listed in models/linegen.py (.ci/run does)")
    return linegen.heldout_family_lines(N_LINES, degraded=degraded)


def test_heldout_families_are_whole_families_never_trained_on():
    train = {p.name for _, p, _ in linegen.faces(linegen.TRAIN_FAMILIES)}
    held = {p.name for _, p, _ in linegen.faces(linegen.HELDOUT_FAMILIES)}
    assert held and not train & held
    assert len({f.name for f in linegen.HELDOUT_FAMILIES}) >= 6
    lines = linegen.heldout_family_lines(40, degraded=False)
    assert {fam for _, _, fam in lines} <= {f.name for f in linegen.HELDOUT_FAMILIES}
    assert len({fam for _, _, fam in lines}) >= 5                       # the set spans the families


@pytest.mark.slow
@pytest.mark.parametrize("kind, folder", [("ctc", DEMO_CTC), ("seq", DEMO_SEQ)])
@pytest.mark.parametrize("degraded", [False, True], ids=["clean", "degraded"])
def test_heldout_font_families_are_read_within_the_target(kind, folder, degraded):
    lines = _heldout(degraded)
    hyps = _read(open_demo(folder), [im for im, _, _ in lines])
    cer = _cer([t for _, t, _ in lines], hyps)
    print(f"{kind} {'degraded' if degraded else 'clean'}: CER {100 * cer:.2f} % on {len(lines)} lines")
    assert cer <= SHIPPED[kind, degraded] * 1.05, f"{kind}: {100 * cer:.2f} %, worse than the shipped models"
    if cer > TARGET[kind]:                                            # stated, not hidden: the target
        pytest.xfail(f"issue 17 target {100 * TARGET[kind]:.0f} % not met yet: {kind} {100 * cer:.2f} %")
