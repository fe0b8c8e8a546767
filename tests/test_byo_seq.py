"""Bring your own encoder-decoder recogniser: the Transformers ecosystem's standard ONNX export runs
unchanged through ``ocrbench card draft``, and reads exactly what the library's own generate() reads.

Reference: the Transformers library's ``generate()`` (num_beams=1, do_sample=False; and num_beams=3 with
length_penalty=0), recorded by ``tests/fixtures/build_byo.py`` on tiny random-weight models of two decoder
styles exported with the library's ONNX exporter (see that script; it needs torch and transformers, this
test does not). ``expected.json`` holds the token ids and the text ``batch_decode(skip_special_tokens=True)``
gives for each line image.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from typer.testing import CliRunner

from ocrbench.cli.app import app
from ocrbench.errors import CardError
from ocrbench.recognisers.base import EngineOptions
from ocrbench.recognisers.card import load_card
from ocrbench.recognisers.registry import open_recogniser
from ocrbench.recognisers.tokens import TokenizerFile

FIXTURES = Path(__file__).resolve().parent / "fixtures" / "byo"
STYLES = ["selfcache", "crosscache"]
runner = CliRunner()


def drafted(tmp_path: Path, style: str, *, merged_only: bool = False) -> Path:
    folder = shutil.copytree(FIXTURES / style, tmp_path / style)
    if merged_only:         # an export folder holding only the merged decoder
        (folder / "decoder_model.onnx").unlink()
        (folder / "decoder_with_past_model.onnx").unlink()
    res = runner.invoke(app, ["card", "draft", str(folder)])
    assert res.exit_code == 0, res.output
    return folder


def guard_off(folder: Path) -> None:
    """``repeat_guard = false`` in the card's [seq] table."""
    card = folder / "card.toml"
    text = card.read_text(encoding="utf-8")
    assert "\n[seq]\n" in text
    card.write_text(text.replace("\n[seq]\n", "\n[seq]\nrepeat_guard = false\n", 1), encoding="utf-8")


def expected(folder: Path) -> dict:
    return json.loads((folder / "expected.json").read_text(encoding="utf-8"))


def crops(folder: Path, exp: dict) -> list[np.ndarray]:
    return [np.asarray(Image.open(folder / r["image"]).convert("L")) for r in exp["lines"]]


def generated_tokens(ids: list[int], eos: int, max_length: int) -> list[int]:
    """generate()'s output without the start token and the end token (when the line ended)."""
    new = ids[1:]
    return new[:-1] if new and new[-1] == eos and (len(ids) < max_length or eos in new) else new


def decode_ids(rec, crops_: list[np.ndarray], beam: bool) -> list[list[int]]:
    out: dict[int, list[int]] = {}
    for pb in rec.prepare(crops_):
        memory, mask = rec.encode(pb.tensor, pb.widths)
        for i, d in zip(pb.indices, rec.beam(memory, mask) if beam else rec.greedy(memory, mask)):
            out[i] = d.tokens
    return [out[i] for i in range(len(crops_))]


@pytest.mark.parametrize("style", STYLES)
@pytest.mark.parametrize("mode", ["greedy", "greedy-no-cache", "greedy-mask", "greedy-one-by-one", "beam3",
                                  "greedy-merged", "beam3-merged"])
def test_export_reads_exactly_like_generate(tmp_path, style, mode):
    folder = drafted(tmp_path, style, merged_only=mode.endswith("merged"))
    # generate() as recorded has no repetition control, and a random-weight decoder loops on one token:
    # the reference is matched with the card's repetition guard off (with it on: tests/test_seq_repeat.py)
    guard_off(folder)
    exp = expected(folder)
    beam = mode.startswith("beam")
    # "mask" keeps ended lines in the batch; the default "drop" removes their cache rows (static ones included)
    opts = EngineOptions(decoding="beam" if beam else "greedy", beam_width=3, use_cache=mode != "greedy-no-cache",
                         batch_mode="mask" if mode == "greedy-mask" else "drop",
                         batch_size=1 if mode == "greedy-one-by-one" else 16)
    rec = open_recogniser(load_card(folder), options=opts)
    lines = crops(folder, exp)
    key = "beam3" if beam else "greedy"
    want_ids = [generated_tokens(r[key]["ids"], rec.s.eos_index, exp["max_length"]) for r in exp["lines"]]
    assert decode_ids(rec, lines, beam) == want_ids
    results, _ = rec.recognise(lines)
    assert [r.text for r in results] == [r[key]["text"] for r in exp["lines"]]
    ended = [len(r[key]["ids"]) < exp["max_length"] for r in exp["lines"]]
    assert [not r.truncated for r in results] == ended
    if not beam:
        assert any(ended) and not all(ended)     # lines that end and a line the guard cuts
    for r in results:
        assert len(r.char_confidences) == len(r.text)


@pytest.mark.parametrize("style", STYLES)
def test_drafted_card_says_where_each_field_came_from(tmp_path, style):
    folder = drafted(tmp_path, style)
    text = (folder / "card.toml").read_text(encoding="utf-8")
    assert "# preprocessor_config.json size.height" in text and "# generation_config.json eos_token_id" in text
    card = load_card(folder)
    assert card.input.channels == 3 and card.input.width == 128 and card.input.resize == "stretch"
    assert "# flatten = true" in text and not card.input.flatten          # crop clean-up offered, left off
    assert card.seq.tokenizer is not None and card.seq.decoder_first is not None
    if style == "selfcache":
        assert card.seq.bos_index == card.seq.eos_index == 2          # the end token starts the decoder
    else:
        assert len(card.seq.decoder_step.static_past) == 4            # cross-attention keys/values fed once
    res = runner.invoke(app, ["card", "check", str(folder)])
    assert res.exit_code == 0 and "loads and warms up" in res.output


def test_draft_refuses_to_overwrite_and_names_unknown_layouts(tmp_path):
    folder = drafted(tmp_path, "crosscache")
    res = runner.invoke(app, ["card", "draft", str(folder)])
    assert res.exit_code == 2 and "already there" in res.output
    empty = tmp_path / "empty"
    empty.mkdir()
    res = runner.invoke(app, ["card", "draft", str(empty)])
    assert res.exit_code == 2 and "no known export layout" in res.output


def test_unapplied_generate_settings_are_warnings(tmp_path):
    folder = shutil.copytree(FIXTURES / "crosscache", tmp_path / "m")
    gen = json.loads((folder / "generation_config.json").read_text())
    gen.update(no_repeat_ngram_size=3, forced_eos_token_id=2, length_penalty=2.0)
    (folder / "generation_config.json").write_text(json.dumps(gen))
    res = runner.invoke(app, ["card", "draft", str(folder)])
    assert res.exit_code == 0
    card = load_card(folder)
    joined = "\n".join(card.warnings)
    for key in ("no_repeat_ngram_size = 3", "forced_eos_token_id = 2", "length_penalty = 2.0"):
        assert key in joined
    res = runner.invoke(app, ["card", "check", str(folder)])
    assert res.exit_code == 0 and "no_repeat_ngram_size" in res.output


def test_card_check_turns_a_bad_card_into_one_line_and_exit_2(tmp_path):
    folder = drafted(tmp_path, "crosscache")
    card = folder / "card.toml"
    card.write_text(card.read_text().replace("channels = 3", "channels = 1"))
    res = runner.invoke(app, ["card", "check", str(folder)])
    assert res.exit_code == 2
    assert "card.toml" in res.output and "Traceback" not in res.output


# --------------------------------------------------------------------------- the tokenizer


def test_byte_level_bpe_round_trips_pound_half_e_acute_and_dash():
    # Reference: the tokenizers library's own encode/decode of the fixture's byte-level BPE tokenizer.
    tok = TokenizerFile(FIXTURES / "crosscache" / "tokenizer.json", FIXTURES / "crosscache" / "card.toml")
    for text in ["£ ½ é —", "Paid the café ½ a crown — £3 7s. 6d.", "6½"]:
        ids = tok.tok.encode(text).ids
        assert tok.text(ids) == text
        got, chars = tok.decode(ids, [0.9] * len(ids))
        assert got == text and len(chars) == len(text)
    # "£" needs two bytes; split over two single-byte tokens, neither alone is a character, and the pound
    # sign takes the lower probability of the two
    b = [tok.tok.token_to_id(t) for t in ("Â", "£")]
    assert None not in b
    assert tok.text([b[0]]) == "\ufffd" and tok.text(b) == "£"
    got, chars = tok.decode(b, [0.8, 0.6])
    assert got == "£" and chars == [0.6]


def test_a_card_with_both_vocab_and_tokenizer_is_refused(tmp_path):
    folder = drafted(tmp_path, "crosscache")
    (folder / "vocab.txt").write_text('"a"\n')
    card = folder / "card.toml"
    card.write_text(card.read_text().replace('tokenizer = "tokenizer.json"',
                                             'tokenizer = "tokenizer.json"\nvocab = "vocab.txt"'))
    with pytest.raises(CardError, match=r"either 'vocab'.*or 'tokenizer'.*not both"):
        load_card(folder)


def test_logits_declared_as_log_probs_are_a_card_error(tmp_path):
    folder = drafted(tmp_path, "crosscache")
    card = folder / "card.toml"
    card.write_text(card.read_text().replace('logits = "logits"', 'log_probs = "logits"'))
    with pytest.raises(CardError, match=r"seq\.decoder_first\.log_probs.*does not hold log-probabilities.*"
                                        r"logits = \"logits\""):
        open_recogniser(load_card(folder))
