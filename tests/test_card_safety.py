"""Cards that try to read elsewhere, carry bad numbers or bad models, and outputs that are not numbers.

Each case was accepted before (or crashed with a traceback) and is refused or
flagged now: paths stay inside the card's folder, messages never quote file
contents, names are safe as file names, numbers are finite and in range, input
element types match what ocrbench feeds, external weight files are hashed, and
NaN scores fail the line with a reason instead of giving empty "done" text.
"""

from __future__ import annotations

import os

import numpy as np
import onnx
import pytest
from onnx import TensorProto

import _tiny_models as tm
from _runner_support import DEMO_CTC, need_demo
from ocrbench.errors import CardError
from ocrbench.recognisers.base import NONFINITE, EngineOptions
from ocrbench.recognisers.card import load_card
from ocrbench.recognisers.ctc import forced_alignment, log_softmax
from ocrbench.recognisers.registry import open_recogniser


@pytest.fixture()
def ctc_dir(tmp_path):
    return tm.write_ctc(tmp_path / "tiny-ctc")


def edit(folder, old: str, new: str):
    p = folder / "card.toml"
    text = p.read_text()
    assert old in text, old
    p.write_text(text.replace(old, new, 1))
    return folder


# --------------------------------------------------------------------------- paths


def test_relative_path_out_of_the_folder_is_refused(ctc_dir, tmp_path):
    (tmp_path / "elsewhere.txt").write_text((ctc_dir / "alphabet.txt").read_text())
    edit(ctc_dir, 'alphabet = "alphabet.txt"', 'alphabet = "../elsewhere.txt"')
    with pytest.raises(CardError, match=r"ctc\.alphabet.*'\.\./elsewhere\.txt' leads outside the card's folder"):
        load_card(ctc_dir)
    assert load_card(ctc_dir, allow_outside=True).files["alphabet"] == (tmp_path / "elsewhere.txt").resolve()


def test_absolute_path_is_refused(ctc_dir, tmp_path):
    (tmp_path / "abs.onnx").write_bytes((ctc_dir / "model.onnx").read_bytes())
    edit(ctc_dir, 'model = "model.onnx"', f'model = "{(tmp_path / "abs.onnx").as_posix()}"')
    with pytest.raises(CardError, match=r"ctc\.model.*leads outside"):
        load_card(ctc_dir)


def test_symlink_inside_the_folder_pointing_out_is_refused(ctc_dir, tmp_path):
    (tmp_path / "outside.onnx").write_bytes((ctc_dir / "model.onnx").read_bytes())
    (ctc_dir / "model.onnx").unlink()
    os.symlink(tmp_path / "outside.onnx", ctc_dir / "model.onnx")
    with pytest.raises(CardError, match=r"ctc\.model.*leads outside"):
        load_card(ctc_dir)
    # a link that stays inside the folder is fine
    (ctc_dir / "model.onnx").unlink()
    (ctc_dir / "real.onnx").write_bytes((tmp_path / "outside.onnx").read_bytes())
    os.symlink(ctc_dir / "real.onnx", ctc_dir / "model.onnx")
    assert load_card(ctc_dir).files["model"] == (ctc_dir / "real.onnx").resolve()


def test_error_messages_do_not_quote_file_contents(ctc_dir, tmp_path):
    secret = tmp_path / "passwd"
    secret.write_text("root:x:0:0:SECRET-LINE:/root:/bin/sh\ndaemon:x:1:1\n")
    edit(ctc_dir, 'alphabet = "alphabet.txt"', '''alphabet = "../passwd"''')
    with pytest.raises(CardError) as e:
        load_card(ctc_dir, allow_outside=True)
    assert "line 1 is not a JSON string" in str(e.value)
    assert "root:x" not in str(e.value) and "SECRET" not in str(e.value)
    (ctc_dir / "model.onnx").write_text("SECRET-MODEL-TEXT not protobuf\n")
    with pytest.raises(CardError) as e:
        load_card(ctc_dir)
    assert "not a readable ONNX model" in str(e.value) and "SECRET" not in str(e.value)


# --------------------------------------------------------------------------- names


@pytest.mark.parametrize("name", [".", "..", "a/b", "a\\\\b", "..\\\\x", "tab\\there", "bell\\u0007", " lead", "",
                                  "x" * 81])
def test_unsafe_names_are_refused(ctc_dir, name):
    edit(ctc_dir, 'name = "tiny-ctc"', f'name = "{name}"')
    with pytest.raises(CardError, match="field 'name'.*not a safe name"):
        load_card(ctc_dir)


@pytest.mark.parametrize("name", ["tiny-ctc", "Ledger model (1820s) v1.2", "rôle_é+2"])
def test_safe_names_load(ctc_dir, name):
    edit(ctc_dir, 'name = "tiny-ctc"', f'name = "{name}"')
    assert load_card(ctc_dir).name == name


# --------------------------------------------------------------------------- numbers


@pytest.mark.parametrize("old,new,where", [
    ("min_width = 8", "min_width = 8\nmean = nan", r"input\.mean must be a finite number"),
    ("min_width = 8", "min_width = 8\nstd = inf", r"input\.std must be a finite number"),
    ("min_width = 8", "min_width = 8\nscale = -inf", r"input\.scale must be a finite number"),
    ("frames_per_pixel = 0.25", "frames_per_pixel = inf", r"ctc\.frames_per_pixel must be a finite number"),
    ("frames_per_pixel = 0.25", "frames_per_pixel = 0.0", r"ctc\.frames_per_pixel must be > 0"),
    ("min_width = 8", "min_width = 8\nsplit_gap = nan", r"input\.split_gap must be a finite number"),
    ("min_width = 8", "min_width = 0", r"input\.min_width must be >= 1"),
])
def test_card_numbers_must_be_finite_and_in_range(ctc_dir, old, new, where):
    edit(ctc_dir, old, new)
    with pytest.raises(CardError, match=where):
        load_card(ctc_dir)


# --------------------------------------------------------------------------- dtypes


@pytest.mark.parametrize("elem,name", [(TensorProto.DOUBLE, "float64"), (TensorProto.INT64, "int64")])
def test_image_input_of_another_dtype_is_a_card_error(ctc_dir, elem, name):
    tm._save(tm.ctc_model(input_type=elem), ctc_dir / "model.onnx")
    with pytest.raises(CardError, match=rf"ctc\.input.*element type {name}.*float32"):
        load_card(ctc_dir)


# --------------------------------------------------------------------------- external data


def save_external(folder, location="weights.bin"):
    m = tm.ctc_model()
    onnx.save_model(m, str(folder / "model.onnx"), save_as_external_data=True, all_tensors_to_one_file=True,
                    location=location, size_threshold=0)


def test_external_data_files_are_part_of_the_card_hash(ctc_dir):
    save_external(ctc_dir)
    card = load_card(ctc_dir)
    assert "model:weights.bin" in card.files
    before = card.card_hash
    # same size, other weights: onnx's external data is raw little-endian tensor bytes
    raw = bytearray((ctc_dir / "weights.bin").read_bytes())
    raw[-1] ^= 0x01
    (ctc_dir / "weights.bin").write_bytes(bytes(raw))
    assert load_card(ctc_dir).card_hash != before


def test_missing_external_data_file_is_a_card_error(ctc_dir):
    save_external(ctc_dir)
    (ctc_dir / "weights.bin").unlink()
    with pytest.raises(CardError, match=r"ctc\.model.*weights\.bin.*not there"):
        load_card(ctc_dir)


# --------------------------------------------------------------------------- beam warm-up


def test_forced_alignment_of_an_empty_labelling():
    lp = log_softmax(np.random.RandomState(0).normal(size=(7, 3)))
    assert forced_alignment(lp, [], 0).tolist() == [0] * 7
    assert forced_alignment(lp[:1], [], 0).tolist() == [0]
    assert forced_alignment(lp[:0], [], 0).tolist() == []


def test_ctc_beam_warms_up_on_blank_lines(ctc_dir):
    rec = open_recogniser(load_card(ctc_dir), options=EngineOptions(decoding="beam"))
    res, _ = rec.recognise([tm.block_line("  ab  a ")])
    assert res[0].text == "aba"


def test_demo_ctc_beam_warms_up():
    rec = open_recogniser(load_card(need_demo(DEMO_CTC)), options=EngineOptions(decoding="beam", batch_size=2))
    assert rec.options.decoding == "beam"


# --------------------------------------------------------------------------- NaN outputs, truncation


def test_nan_ctc_output_fails_the_line_with_a_reason(ctc_dir):
    tm._save(tm.ctc_model(nan_on_ink=True), ctc_dir / "model.onnx")
    rec = open_recogniser(load_card(ctc_dir))          # blank warm-up lines stay finite
    res, _ = rec.recognise([tm.block_line("  ab  "), np.full((8, 24), 255, np.uint8)])
    assert res[0].failure == NONFINITE and res[0].failed and res[0].text == "" and res[0].confidence == 0.0
    assert res[1].failure is None and res[1].text == ""


@pytest.mark.parametrize("decoding", ["greedy", "beam"])
def test_nan_seq_output_fails_the_line_with_a_reason(tmp_path, decoding):
    folder = tm.write_seq(tmp_path / "tiny-seq")
    tm._save(tm.seq_encoder(nan_on_ink=True), folder / "encoder.onnx")
    rec = open_recogniser(load_card(folder), options=EngineOptions(decoding=decoding, beam_width=3))
    res, _ = rec.recognise([tm.block_line("  ab a "), np.full((8, 40), 255, np.uint8)])
    assert res[0].failure == NONFINITE and res[0].text == "" and res[0].confidence == 0.0
    assert not res[0].truncated
    assert res[1].failure is None


@pytest.mark.parametrize("decoding", ["greedy", "beam"])
def test_lines_cut_by_the_token_guard_never_read_as_certain(tmp_path, decoding):
    card = load_card(tm.write_seq(tmp_path / "tiny-seq"))
    rec = open_recogniser(card, options=EngineOptions(decoding=decoding, max_tokens=2, beam_width=2))
    res, _ = rec.recognise([tm.block_line("ab ba a")])
    assert res[0].truncated and res[0].tokens == 2
    assert res[0].confidence == 0.0
    whole = open_recogniser(card, options=EngineOptions(decoding=decoding))
    full, _ = whole.recognise([tm.block_line("ab ba a")])
    assert not full[0].truncated and full[0].confidence > 0
