"""Drafted greedy decoding (ocrbench/recognisers/verify.py): the CTC head's best path checked by the decoder
in one pass.

* The best path against its definition (Graves et al. 2006, ICML, "Connectionist Temporal Classification",
  section 3.2, best path decoding: the most probable class at every frame, then repeats merged and blanks
  dropped), written here with ``itertools.groupby``; padded frames are not read.
* The continuation after what the decoder emitted: edit-distance alignment (Levenshtein's distance,
  checked against rapidfuzz, a reference library).
* On the shipped ledger-seq model: drafted greedy reads exactly what token-by-token greedy reads (cached
  and uncached, drop and mask batches; browser-rendered table rows and demo lines, which the model reads
  with disagreements between its two heads), with fewer decoder calls; a ``decoder_full`` graph that
  scores only the last position is read token by token, with the same text, and ``card check`` says which;
  ``run --token-by-token`` stores the same text and records the setting.
"""

from __future__ import annotations

import itertools
import shutil
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper
from PIL import Image
from rapidfuzz.distance import Levenshtein       # reference library for the edit distance

from _browser_set import SET_DIR, read_truth
from _runner_support import DEMO_SEQ, need_demo
from ocrbench.recognisers.base import EngineOptions
from ocrbench.recognisers.card import load_card
from ocrbench.recognisers.joint import PrefixScorer
from ocrbench.recognisers.registry import open_recogniser
from ocrbench.recognisers.verify import best_paths, continuation


def _scorer(lp: np.ndarray, valid, token_class) -> PrefixScorer:
    return PrefixScorer(lp, np.asarray(valid), 0, np.asarray(token_class), eos=2)


def test_best_path_is_the_argmax_collapse_of_the_real_frames():
    rng = np.random.default_rng(3)
    L, T, C = 5, 30, 6
    x = rng.normal(size=(L, T, C)) * 3
    lp = x - np.log(np.exp(x).sum(-1, keepdims=True))
    # tokens 0-2 are start/end/padding; token 3+k reads class k+1 (class 0 is blank), token 8 has no class;
    # class 5 has no token, so it is left out of a draft
    token_class = [-1, -1, -1, 1, 2, 3, 4, -1]
    valid = [30, 17, 1, 9, 30]
    got = best_paths(_scorer(lp, valid, token_class))
    tok_of = {1: 3, 2: 4, 3: 5, 4: 6}
    for line in range(L):
        best = lp[line, : valid[line]].argmax(-1)
        want = [tok_of[c] for c, _ in itertools.groupby(best.tolist()) if c != 0 and c in tok_of]
        assert got[line] == want
    assert any(len(g) > 3 for g in got)


def test_continuation_follows_the_best_alignment():
    d = [5, 6, 7, 8, 9]
    assert continuation(d, []) == d
    assert continuation(d, [5, 6]) == [7, 8, 9]                   # agreement so far
    assert continuation(d, [5, 4]) == [7, 8, 9]                   # a different token in place of 6
    assert continuation(d, [5, 7]) == [8, 9]                      # the decoder left 6 out
    assert continuation(d, [5, 6, 7, 8, 9, 9]) == []              # past the end of the draft
    assert continuation([], [4]) == []
    # the cut point is where the emitted tokens align best (Levenshtein distance, by rapidfuzz); among equal
    # points the latest
    rng = np.random.default_rng(5)
    for _ in range(200):
        draft = rng.integers(3, 7, rng.integers(0, 12)).tolist()
        emitted = rng.integers(3, 7, rng.integers(1, 12)).tolist()
        rest = continuation(draft, emitted)
        j = len(draft) - len(rest)
        assert draft[j:] == rest
        dists = [Levenshtein.distance(emitted, draft[:k]) for k in range(len(draft) + 1)]
        assert dists[j] == min(dists) and all(dists[k] > dists[j] for k in range(j + 1, len(dists)))


def _browser_crops(n: int) -> list[np.ndarray]:
    truth = read_truth()
    truth = truth[:: max(1, len(truth) // n)][:n]
    return [np.asarray(Image.open(SET_DIR / name).convert("L")) for name, _ in truth]


def _demo_lines(n: int) -> list[np.ndarray]:
    import random

    from ocrbench import synth

    rng = random.Random(33)
    return [np.asarray(synth.line_sample(rng)[0]) for _ in range(n)]


def _read(card, crops, **opts):
    rec = open_recogniser(card, options=EngineOptions(batch_size=8, **opts))
    calls = {"n": 0}
    run = rec._run

    def counted(session, fetch, feeds, timer):
        calls["n"] += 1
        return run(session, fetch, feeds, timer)

    rec._run = counted
    results, _ = rec.recognise(crops)
    return [r.text for r in results], [r.truncated for r in results], calls["n"], rec


def test_drafted_greedy_reads_what_token_by_token_greedy_reads():
    card = load_card(need_demo(DEMO_SEQ))
    crops = _browser_crops(24) + _demo_lines(16)
    drafted, cut_d, calls_d, rec = _read(card, crops)
    assert rec.drafting
    token, cut_t, calls_t, rec_t = _read(card, crops, draft=False)
    assert not rec_t.drafting
    assert drafted == token and cut_d == cut_t
    assert sum(len(t) for t in drafted) > 600
    # the decoder is called far less often: one pass per batch plus one per step where a line disagreed
    # (here 25 calls for 8 batches, against 406)
    batches = len(rec.prepare(crops))
    assert batches < calls_d < 0.5 * calls_t, (batches, calls_d, calls_t)
    # mask batches and the uncached decoder read the same
    assert _read(card, crops, batch_mode="mask")[0] == drafted
    assert _read(card, crops, use_cache=False)[0] == drafted


def _last_position_only(src: Path, dst: Path) -> None:
    """A copy of ``src``'s card whose decoder_full graph returns the last position's scores only (as the
    first demo build's did)."""
    shutil.copytree(src, dst)
    m = onnx.load(str(dst / "decoder_full.onnx"))
    out = m.graph.output[0]
    node = next(n for n in m.graph.node if out.name in n.output)
    node.output[list(node.output).index(out.name)] = "all_positions"
    m.graph.node.append(helper.make_node("Gather", ["all_positions", "last_position"], [out.name], axis=1))
    m.graph.initializer.append(helper.make_tensor("last_position", TensorProto.INT64, [], [-1]))
    V = out.type.tensor_type.shape.dim[2].dim_value
    m.graph.output.remove(out)
    m.graph.output.append(helper.make_tensor_value_info(out.name, TensorProto.FLOAT, ["batch", V]))
    onnx.checker.check_model(m)
    onnx.save(m, str(dst / "decoder_full.onnx"))


def test_a_decoder_scoring_the_last_position_only_is_read_token_by_token(tmp_path):
    from typer.testing import CliRunner

    from ocrbench.cli.app import app

    folder = tmp_path / "last"
    _last_position_only(need_demo(DEMO_SEQ), folder)
    card = load_card(folder)
    crops = _browser_crops(6)
    texts, _, _, rec = _read(card, crops)
    assert not rec.drafting
    assert texts == _read(load_card(DEMO_SEQ), crops)[0]
    assert texts == _read(card, crops, use_cache=False)[0]
    res = CliRunner().invoke(app, ["card", "check", str(folder)])
    assert res.exit_code == 0 and "greedy decoding is token by token" in res.output, res.output
    res = CliRunner().invoke(app, ["card", "check", str(DEMO_SEQ)])
    assert res.exit_code == 0 and "greedy decoding is drafted" in res.output, res.output


def test_run_token_by_token_stores_the_same_text(tmp_path):
    from typer.testing import CliRunner

    from ocrbench.cli.app import app
    from ocrbench.store import RunStore

    pages = tmp_path / "pages"
    pages.mkdir()
    src = sorted((DEMO_SEQ.parents[1] / "scans_demo").glob("page_001.*"))
    for p in src:
        shutil.copy(p, pages / p.name)
    texts, settings = {}, {}
    for flag in ([], ["--token-by-token"]):
        store = tmp_path / f"s{len(flag)}.sqlite"
        res = CliRunner().invoke(app, ["run", str(pages), "--recogniser", str(need_demo(DEMO_SEQ)),
                                       "--store", str(store), *flag])
        assert res.exit_code == 0, res.output
        with RunStore(store) as st:
            texts[len(flag)] = st.page_texts(st.run_ids()[0])
            settings[len(flag)] = st.run_info(st.run_ids()[0]).settings
    assert texts[0] == texts[1] and sum(len(t) for v in texts[0].values() for t in v) > 500
    assert settings[0]["draft"] is True and settings[1]["draft"] is False     # recorded with each run
