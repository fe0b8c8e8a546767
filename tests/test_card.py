"""Recogniser cards: parsing, validation against the ONNX graphs, file hashes."""

from __future__ import annotations

import hashlib
import shutil
from pathlib import Path

import pytest

import _tiny_models as tm
from _runner_support import DEMO_CTC, DEMO_SEQ, need_demo
from ocrbench.errors import CardError
from ocrbench.recognisers.card import load_card

DEMO = {"ctc": DEMO_CTC, "seq": DEMO_SEQ}


@pytest.fixture()
def ctc_dir(tmp_path) -> Path:
    return tm.write_ctc(tmp_path / "tiny-ctc")


@pytest.fixture()
def seq_dir(tmp_path) -> Path:
    return tm.write_seq(tmp_path / "tiny-seq")


def edit_card(folder: Path, old: str, new: str) -> Path:
    p = folder / "card.toml"
    text = p.read_text()
    assert old in text, old
    p.write_text(text.replace(old, new, 1))
    return folder


def test_loads_ctc_card_and_hashes_every_file(ctc_dir):
    card = load_card(ctc_dir)
    assert (card.name, card.kind) == ("tiny-ctc", "ctc")
    assert card.input.height == 8 and card.input.min_width == 8
    assert card.ctc.symbols == ("", "a", "b")          # the blank decodes to nothing
    assert set(card.files) == {"model", "alphabet"}
    for role, path in card.files.items():
        # sha256 as computed by Python's hashlib (FIPS 180-4 implementation)
        assert card.file_hashes[role] == hashlib.sha256(path.read_bytes()).hexdigest()
    assert load_card(ctc_dir / "card.toml").card_hash == card.card_hash   # the file or its folder


def test_card_hash_follows_model_bytes(ctc_dir, tmp_path):
    before = load_card(ctc_dir).card_hash
    copy = shutil.copytree(ctc_dir, tmp_path / "copy")
    assert load_card(copy).card_hash == before          # content, not location
    tm._save(tm.ctc_model(), copy / "model.onnx")           # the same model saved again: same bytes
    assert load_card(copy).card_hash == before
    m = tm.ctc_model()
    m.doc_string = "changed"
    tm._save(m, copy / "model.onnx")
    assert load_card(copy).card_hash != before


def test_loads_seq_card(seq_dir):
    card = load_card(seq_dir)
    s = card.seq
    assert card.kind == "seq" and set(card.files) == {"vocab", "encoder", "decoder_step", "decoder_full"}
    assert (s.bos_index, s.eos_index, s.pad_index, s.max_tokens) == (1, 2, 0, 12)
    assert s.symbols[:3] == ("", "", "") and s.symbols[3:] == ("a", "b", "c")
    assert s.decoder_step.past == ("past",) and s.decoder_step.cache_layout == "BTD"
    assert s.encoder.batch_axis == 0 and s.encoder.frames_axis == 1


@pytest.mark.parametrize("kind", ["ctc", "seq"])
def test_demo_cards_load(kind):
    card = load_card(need_demo(DEMO[kind]))
    assert card.kind == kind and len(card.card_hash) == 64


# --------------------------------------------------------------------------- errors


def test_missing_card(tmp_path):
    with pytest.raises(CardError, match="card not found"):
        load_card(tmp_path / "nowhere")


def test_missing_model_file(ctc_dir):
    (ctc_dir / "model.onnx").unlink()
    with pytest.raises(CardError, match=r"ctc\.model.*file not found.*model\.onnx"):
        load_card(ctc_dir)


def test_alphabet_size_must_match_model_output(ctc_dir):
    tm.write_symbols(ctc_dir / "alphabet.txt", ["<blank>", "a", "b", "c"])
    with pytest.raises(CardError, match="4 entries.*scores 3 classes"):
        load_card(ctc_dir)


def test_alphabet_size_checked_by_dry_run_when_axis_is_free(ctc_dir):
    tm._save(tm.ctc_model(free_classes=True), ctc_dir / "model.onnx")
    assert load_card(ctc_dir).ctc.symbols == ("", "a", "b")
    tm.write_symbols(ctc_dir / "alphabet.txt", ["<blank>", "a"])
    with pytest.raises(CardError, match="2 entries.*scores 3 classes"):
        load_card(ctc_dir)


def test_unknown_kind(ctc_dir):
    edit_card(ctc_dir, 'kind = "ctc"', 'kind = "transformer"')
    with pytest.raises(CardError, match="unknown kind 'transformer'"):
        load_card(ctc_dir)


def test_wrong_tensor_name_lists_the_real_ones(ctc_dir):
    edit_card(ctc_dir, 'input = "image"', 'input = "pixels"')
    with pytest.raises(CardError, match="no input named 'pixels'.*image"):
        load_card(ctc_dir)
    edit_card(ctc_dir, 'input = "pixels"', 'input = "image"')
    edit_card(ctc_dir, 'output = "logits"', 'output = "scores"')
    with pytest.raises(CardError, match="no output named 'scores'.*logits"):
        load_card(ctc_dir)


def test_wrong_input_rank(ctc_dir):
    tm._save(tm.ctc_model(input_rank=3), ctc_dir / "model.onnx")
    with pytest.raises(CardError, match="rank 3.*expected rank 4"):
        load_card(ctc_dir)


def test_height_must_match_model(ctc_dir):
    edit_card(ctc_dir, "height = 8", "height = 32")
    with pytest.raises(CardError, match="input.height.*32.*wants height 8"):
        load_card(ctc_dir)


def test_typo_in_field_name_is_reported(ctc_dir):
    edit_card(ctc_dir, "blank_index = 0", "blank_idx = 0")
    with pytest.raises(CardError, match=r"unknown key 'ctc\.blank_idx'.*did you mean 'ctc\.blank_index'"):
        load_card(ctc_dir)


def test_wrong_value_type(ctc_dir):
    edit_card(ctc_dir, "height = 8", 'height = "8"')
    with pytest.raises(CardError, match=r"input\.height must be an integer, not str"):
        load_card(ctc_dir)


def test_not_toml(ctc_dir):
    (ctc_dir / "card.toml").write_text("kind = ctc\n[ctc\n")
    with pytest.raises(CardError, match="not valid TOML"):
        load_card(ctc_dir)


def test_bad_symbol_file(ctc_dir):
    (ctc_dir / "alphabet.txt").write_text('"<blank>"\na\n"b"\n')
    with pytest.raises(CardError, match="line 2 is not a JSON string"):
        load_card(ctc_dir)


def test_blank_index_outside_alphabet(ctc_dir):
    edit_card(ctc_dir, "blank_index = 0", "blank_index = 7")
    with pytest.raises(CardError, match="blank_index.*outside the alphabet"):
        load_card(ctc_dir)


def test_seq_vocab_must_match_decoder(seq_dir):
    tm.write_symbols(seq_dir / "vocab.txt", tm.SEQ_VOCAB + ["d"])
    with pytest.raises(CardError, match="7 entries but decoder_step scores 6"):
        load_card(seq_dir)


def test_seq_needs_a_decoder(seq_dir):
    text = (seq_dir / "card.toml").read_text()
    cut = text[: text.index("[seq.decoder_step]")]
    (seq_dir / "card.toml").write_text(cut)
    with pytest.raises(CardError, match="decoder_step.*decoder_full"):
        load_card(seq_dir)


def test_seq_wrong_cache_names_and_layout(seq_dir):
    edit_card(seq_dir, 'past = ["past"]', 'past = ["past_k"]')
    with pytest.raises(CardError, match="no input named 'past_k'"):
        load_card(seq_dir)
    edit_card(seq_dir, 'past = ["past_k"]', 'past = ["past"]')
    edit_card(seq_dir, 'cache_layout = "BTD"', 'cache_layout = "LBHTD"')
    with pytest.raises(CardError, match="cache_layout.*5 axes.*rank 3"):
        load_card(seq_dir)


def test_seq_special_index_outside_vocab(seq_dir):
    edit_card(seq_dir, "eos_index = 2", "eos_index = 60")
    with pytest.raises(CardError, match="eos_index.*outside the vocabulary"):
        load_card(seq_dir)


def test_kind_and_table_must_agree(ctc_dir):
    edit_card(ctc_dir, 'kind = "ctc"', 'kind = "seq"')
    with pytest.raises(CardError, match="seq card has no \\[ctc\\] table"):
        load_card(ctc_dir)
