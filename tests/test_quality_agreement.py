"""Two readers in the quality estimate: with ``agreement``, a line's doubt also weighs how differently a second
recogniser read it (ocrbench.postprocess.agreement), on a real store with two runs over the same pages."""

from __future__ import annotations

import random

import editdistance
import numpy as np
import pytest

from _quality_support import build_store, ledger_page, start_run, write_page
from ocrbench.postprocess.agreement import AGREE_SCALE
from ocrbench.quality.data import read_snapshot, systems_of
from ocrbench.quality.summary import quality
from ocrbench.store import RunStore


@pytest.fixture()
def two_readers(tmp_path):
    rng = random.Random(4)
    db = tmp_path / "store.sqlite"
    truth = tmp_path / "truth"
    with RunStore(db) as st:
        a, b = start_run(st, "demo-ctc"), start_run(st, "demo-seq")
        for k in range(8):
            pid = f"box{k % 2}/page_{k:03d}.png"
            lines = ledger_page(rng, 10)
            write_page(st, a, pid, lines, rng, (0.6, 1.0))
            if k != 7:                       # the second reader never read the last page
                write_page(st, b, pid, lines, rng, (0.6, 1.0))
            if k < 3:
                p = truth / pid.replace(".png", ".txt")
                p.parent.mkdir(parents=True, exist_ok=True)
                p.write_text("".join(t + "\n" for t in lines), encoding="utf-8")
        st.finish_run(a)
        st.finish_run(b)
    return db, truth, a, b


def test_doubt_adds_the_disagreement_with_the_other_reader(two_readers):
    db, truth, a, b = two_readers
    snap = read_snapshot(db)
    [plain] = systems_of(snap, runs=[a])
    [with_agree] = systems_of(snap, runs=[a], agreement=True)
    text = snap.lines.set_index(["run_id", "page_id", "line_no"])["text"]
    ln = with_agree.lines.merge(plain.lines[["page_id", "line_no", "doubt"]], on=["page_id", "line_no"],
                                suffixes=("", "_plain"))
    added = ln["doubt"].to_numpy() - ln["doubt_plain"].to_numpy()
    # reference: Levenshtein distance (editdistance package) over the longer reading, scaled by AGREE_SCALE and
    # capped at 1 (the documented agreement part); 0 where the other reader has no such line
    want = []
    for pid, no in zip(ln["page_id"], ln["line_no"]):
        mine = text[(a, pid, no)]
        other = text.get((b, pid, no))
        if other is None:
            want.append(0.0)
        else:
            d = editdistance.eval(mine, other) / max(len(mine), len(other), 1)
            want.append(min(1.0, d / AGREE_SCALE))
    assert np.allclose(added, want)
    assert (np.asarray(want) > 0).any() and (np.asarray(want) == 0).any()
    assert any("disagreement with run" in n and "demo-seq" in n for n in with_agree.notes)


def test_quality_with_agreement_runs_and_says_so(two_readers):
    db, truth, a, b = two_readers
    off = quality(db, truth=truth, runs=[a], n_boot=100, permutations=19)
    on = quality(db, truth=truth, runs=[a], n_boot=100, permutations=19, agreement=True)
    assert not off["agreement"] and on["agreement"]
    [s_off], [s_on] = off["systems"], on["systems"]
    # the measured figures do not depend on the doubt; the queue can only grow (doubt only rises)
    for g0, g1 in zip(s_off["groups"], s_on["groups"]):
        assert g0["measured_cer"] == g1["measured_cer"] and g0["pages_done"] == g1["pages_done"]
        assert g1["queued_lines"] >= g0["queued_lines"]
        assert g1["est_low"] <= g1["est_cer"] <= g1["est_high"]


def test_a_run_without_a_second_reader_keeps_its_doubt(tmp_path):
    db, truth, _ = build_store(tmp_path, {"box": (4, (0.6, 1.0))}, keyed={"box": 2})
    snap = read_snapshot(db)
    [plain], [agree] = systems_of(snap), systems_of(snap, agreement=True)
    assert np.array_equal(plain.lines["doubt"].to_numpy(), agree.lines["doubt"].to_numpy())
    assert any("no other recogniser read the same input folder" in n for n in agree.notes)
