"""Bring your own CTC recogniser: the export layouts models come in run unchanged, checked against a
direct decode written here (our own resize, normalisation, onnxruntime run, best path and collapse).

The models are the tiny CTC recogniser of ``_tiny_models`` rebuilt in each layout (image NCHW/NHWC,
grey or RGB, line height 8 or 48, blank first or last, output BTC/TBC, logits / log-probabilities /
probabilities, a fixed input width), so the expected text of a block pattern is also known exactly.
"""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import onnxruntime as ort
from onnx import numpy_helper
import pytest
from PIL import Image

import _tiny_models as tm
from typer.testing import CliRunner

from ocrbench.cli.app import app
from ocrbench.errors import CardError
from ocrbench.recognisers.base import EngineOptions
from ocrbench.recognisers.engine import ProviderError, parse_provider_options
from ocrbench.recognisers.card import load_card
from ocrbench.recognisers.ctc import log_softmax, prefix_beam_search
from ocrbench.recognisers.registry import open_recogniser

PATTERNS = ["  ab  a ", "b a b", "aa  bb a", " ", "ab"]
runner = CliRunner()
EXPECT = ["aba", "bab", "aba", "", "ab"]     # the tiny model reads a block of grey as "a", of ink as "b"

VARIANTS = {
    "nchw-grey": dict(kw={}),
    "nhwc-grey": dict(kw=dict(layout="NHWC"), card='layout = "NHWC"\n'),
    "rgb-h48": dict(kw=dict(channels=3, height=48, mean=(0.5, 0.4, 0.3), std=(0.5, 0.25, 0.2)),
                    card="channels = 3\nmean = [0.5, 0.4, 0.3]\nstd = [0.5, 0.25, 0.2]\n"),
    "nhwc-rgb": dict(kw=dict(layout="NHWC", channels=3), card='layout = "NHWC"\nchannels = 3\n'),
    "blank-last": dict(kw=dict(blank_last=True)),
    "tbc": dict(kw=dict(out_layout="TBC"), ctc='layout = "TBC"\n'),
    "probs": dict(kw=dict(kind="probs"), ctc='output_kind = "probs"\n'),
    "log-probs": dict(kw=dict(kind="log_probs"), ctc='output_kind = "log_probs"\n'),
    "fixed-width": dict(kw=dict(width=96), card="width = 96\n"),
    "fixed-width-stretch": dict(kw=dict(width=96), card='width = 96\nresize = "stretch"\nfilter = "nearest"\n'),
}


def reference_text(folder, kw: dict, crop: np.ndarray, *, stretch: bool = False, beam: int = 0) -> str:
    """Direct decode: resize to the line height (or stretch to the fixed width), ink = (255 - p) / 255, the
    card's per-channel normalisation, the model's layout, onnxruntime, best class per frame, collapse
    (Graves et al. 2006, section 3.2)."""
    h_img, w_img = crop.shape
    H, C, W = kw.get("height", tm.H), kw.get("channels", 1), kw.get("width")
    new_w = W if stretch else max(8, int(round(w_img * H / h_img)))
    resample = Image.NEAREST if stretch else Image.BILINEAR
    img = np.asarray(Image.fromarray(crop).resize((new_w, H), resample), np.float32)
    padded = W or int(math.ceil(new_w / 4) * 4)
    ink = np.zeros((H, padded), np.float32)
    ink[:, :new_w] = (255.0 - img) / 255.0
    mean = np.broadcast_to(np.asarray(kw.get("mean", (0.0,)), np.float32), (C,))
    std = np.broadcast_to(np.asarray(kw.get("std", (1.0,)), np.float32), (C,))
    x = (ink[None, :, :] - mean[:, None, None]) / std[:, None, None]          # (C, H, W)
    x = x[None] if kw.get("layout", "NCHW") == "NCHW" else x.transpose(1, 2, 0)[None]
    sess = ort.InferenceSession(str(folder / "model.onnx"), providers=["CPUExecutionProvider"])
    y = sess.run(None, {"image": np.ascontiguousarray(x, np.float32)})[0]
    if kw.get("out_layout") == "TBC":
        y = y.transpose(1, 0, 2)
    frames = y[0, : max(1, math.ceil(new_w * 0.25))]
    symbols = ["a", "b", None] if kw.get("blank_last") else [None, "a", "b"]
    if beam:
        kind = kw.get("kind", "logits")
        lp = frames if kind == "log_probs" else (np.log(frames) if kind == "probs" else log_softmax(frames))
        labels = prefix_beam_search(lp.astype(np.float32), blank=symbols.index(None), beam_width=beam)[0][0]
        return "".join(symbols[k] for k in labels)
    best = [k for k, _ in itertools.groupby(np.argmax(frames, axis=1).tolist())]
    return "".join(symbols[k] for k in best if symbols[k] is not None)


@pytest.mark.parametrize("variant", sorted(VARIANTS))
@pytest.mark.parametrize("decoding", ["greedy", "beam"])
def test_ctc_layout_reads_like_a_direct_decode(tmp_path, variant, decoding):
    v = VARIANTS[variant]
    folder = tm.write_ctc_layout(tmp_path / variant, card_extra=v.get("card", ""), ctc_extra=v.get("ctc", ""),
                                 **v["kw"])
    rec = open_recogniser(load_card(folder), options=EngineOptions(decoding=decoding, beam_width=4, ctc_prune=0.0))
    crops = [tm.block_line(p) for p in PATTERNS]
    got = [r.text for r in rec.recognise(crops)[0]]
    stretch = "stretch" in variant
    want = [reference_text(folder, v["kw"], c, stretch=stretch) for c in crops]
    if decoding == "beam":       # the same search over the directly computed frames
        want = [reference_text(folder, v["kw"], c, stretch=stretch, beam=4) for c in crops]
    assert got == want
    if decoding == "greedy" and not stretch:
        assert got == EXPECT
    for r in rec.recognise(crops)[0]:
        assert 0.0 <= r.confidence <= 1.0 and all(0.0 <= c <= 1.0 for c in r.char_confidences)


# --------------------------------------------------------------------------- mismatches are card errors


@pytest.mark.parametrize("kw,card,match", [
    (dict(channels=3), "", r"input\.channels' is 1 but input 'image' of model\.onnx .* has 3 channels"),
    (dict(layout="NHWC", channels=3), "channels = 3\n", r"input\.channels' is 3 but .* has 8 channels; is input\.layout right"),
    (dict(height=48), "", r"input\.height' is 8 but .* wants height 48"),
    (dict(width=96), "", r"input\.width' is not set but .* fixed width of 96: set input\.width = 96"),
    (dict(width=96), "width = 64\n", r"input\.width' is 64 but .* wants width 96"),
])
def test_graph_axes_that_disagree_with_the_card_name_the_field(tmp_path, kw, card, match):
    folder = tm.write_ctc_layout(tmp_path / "m", card_extra=card, **kw)
    folder.joinpath("card.toml").write_text(folder.joinpath("card.toml").read_text().replace(
        f"height = {kw.get('height', 8)}\n", "height = 8\n"))
    with pytest.raises(CardError, match=match) as e:
        load_card(folder)
    assert str(folder / "card.toml") in str(e.value)


@pytest.mark.parametrize("kind,declared,match", [
    ("probs", 'output_kind = "log_probs"', r"output_kind' is \"log_probs\" but the output is not"),
    ("probs", "output_is_log_probs = true", r"output_kind' is \"log_probs\" but the output is not"),
    ("logits", 'output_kind = "probs"', r"output_kind' is \"probs\" but the output is not"),
    ("logits", 'output_kind = "log_probs"', r"output_kind' is \"log_probs\" but the output is not"),
])
def test_output_kind_is_checked_on_the_warm_up_batch(tmp_path, kind, declared, match):
    folder = tm.write_ctc_layout(tmp_path / "m", ctc_extra=declared + "\n", kind=kind)
    card = load_card(folder)
    with pytest.raises(CardError, match=match):
        open_recogniser(card)


def test_nan_on_the_warm_up_batch_is_a_card_error(tmp_path):
    folder = tm.write_ctc(tmp_path / "m", nan_on_ink=True)
    folder.joinpath("card.toml").write_text(folder.joinpath("card.toml").read_text().replace(
        "min_width = 8\n", "min_width = 8\ninvert = false\n"))            # paper now reads as ink: NaN
    with pytest.raises(CardError, match=r"ctc\.output.*blank warm-up lines hold NaN"):
        open_recogniser(load_card(folder))


def test_warm_up_failure_is_a_card_error_not_a_traceback(tmp_path):
    # The graph declares a free width but reshapes its frames to a constant 16 (a width of 64 only): the
    # interface check passes and onnxruntime fails on the first warm-up batch.
    folder = tm.write_ctc(tmp_path / "m")
    m = tm.ctc_model()
    for init in m.graph.initializer:
        if init.name == "shape_bt1":
            init.CopyFrom(numpy_helper.from_array(np.array([0, 16, 1], np.int64), "shape_bt1"))
    tm._save(m, folder / "model.onnx")
    card = load_card(folder)
    with pytest.raises(CardError, match=r"card\.toml: warm-up on blank lines failed \(.+\)") as e:
        open_recogniser(card)
    assert "Traceback" not in str(e.value) and "\n" not in str(e.value)


def test_per_channel_values_must_match_channels(tmp_path):
    folder = tm.write_ctc_layout(tmp_path / "m", card_extra="mean = [0.5, 0.5]\n")
    with pytest.raises(CardError, match=r"input\.mean': has 2 values but input\.channels is 1"):
        load_card(folder)


def test_stretch_needs_a_fixed_width(tmp_path):
    folder = tm.write_ctc_layout(tmp_path / "m", card_extra='resize = "stretch"\n')
    with pytest.raises(CardError, match=r"input\.resize.*needs a fixed input\.width"):
        load_card(folder)


# --------------------------------------------------------------------------- execution providers


def test_a_provider_that_is_not_installed_stops_unless_the_fallback_is_allowed(tmp_path):
    # CUDAExecutionProvider is a name onnxruntime knows (get_all_providers) that the CPU build lacks.
    import onnxruntime

    if "CUDAExecutionProvider" in onnxruntime.get_available_providers():
        pytest.skip("this onnxruntime has CUDA; the case needs a provider it lacks")
    folder = tm.write_ctc(tmp_path / "m")
    card = load_card(folder)
    opts = dict(providers=("CUDAExecutionProvider", "CPUExecutionProvider"))
    with pytest.raises(ProviderError, match="CUDAExecutionProvider is not installed.*--allow-cpu-fallback"):
        open_recogniser(card, options=EngineOptions(**opts))
    rec = open_recogniser(card, options=EngineOptions(allow_cpu_fallback=True, **opts))
    assert rec.providers == ["CPUExecutionProvider"]
    assert any("CUDAExecutionProvider is not installed" in w for w in rec.provider_warnings)
    res = runner.invoke(app, ["card", "check", str(folder), "--provider", "CUDAExecutionProvider"])
    assert res.exit_code == 2 and "not installed" in res.output
    res = runner.invoke(app, ["card", "check", str(folder), "--provider", "CUDAExecutionProvider",
                              "--allow-cpu-fallback"])
    assert res.exit_code == 0 and "warning: execution provider CUDAExecutionProvider" in res.output


def test_a_misspelt_provider_names_the_nearest_one(tmp_path):
    card = load_card(tm.write_ctc(tmp_path / "m"))
    for allow in (False, True):
        with pytest.raises(ProviderError, match="'CPUExecutionProvidr' is not one onnxruntime knows "
                                                r"\(did you mean CPUExecutionProvider\?\)"):
            open_recogniser(card, options=EngineOptions(providers=("CPUExecutionProvidr",), allow_cpu_fallback=allow))


def test_provider_options_are_parsed_passed_and_recorded(tmp_path):
    # The CPU provider accepts any options and reports none back (onnxruntime 1.x), so what can be checked
    # on a CPU-only machine is that they are parsed, recorded with the run, and do not stop the session.
    folder = tm.write_ctc(tmp_path / "m")
    opts = EngineOptions(provider_options=parse_provider_options(["arena_extend_strategy = kSameAsRequested"]))
    assert opts.to_dict()["provider_options"] == {"arena_extend_strategy": "kSameAsRequested"}
    rec = open_recogniser(load_card(folder), options=opts)
    assert rec.recognise([tm.block_line(" ab ")])[0][0].text == "ab"
    with pytest.raises(ProviderError, match="not key=value"):
        parse_provider_options(["no-equals-sign"])
    res = runner.invoke(app, ["card", "check", str(folder), "--provider-option", "no-equals-sign"])
    assert res.exit_code == 2 and "not key=value" in res.output


# --------------------------------------------------------------------------- card draft on CTC exports


@pytest.mark.parametrize("variant", ["nchw-grey", "nhwc-rgb", "blank-last", "probs", "log-probs", "fixed-width"])
def test_card_draft_writes_a_card_that_reads_like_the_direct_decode(tmp_path, variant):
    v = VARIANTS[variant]
    folder = tm.write_ctc_layout(tmp_path / variant, **v["kw"])
    (folder / "card.toml").unlink()
    # a plain symbol list, one per line, as many exports ship it
    syms = [json.loads(line) for line in (folder / "alphabet.txt").read_text().splitlines()]
    (folder / "alphabet.txt").unlink()
    (folder / "classes.txt").write_text("".join(s + "\n" for s in syms), encoding="utf-8")
    res = runner.invoke(app, ["card", "draft", str(folder)])
    assert res.exit_code == 0, res.output
    text = (folder / "card.toml").read_text()
    assert "GUESSED" in text
    card = load_card(folder)
    assert card.input.layout == v["kw"].get("layout", "NCHW") and card.input.channels == v["kw"].get("channels", 1)
    assert card.ctc.output_kind == v["kw"].get("kind", "logits")
    assert card.ctc.blank_index == (2 if v["kw"].get("blank_last") else 0)
    crops = [tm.block_line(p) for p in PATTERNS]
    got = [r.text for r in open_recogniser(card).recognise(crops)[0]]
    assert got == [reference_text(folder, v["kw"], c) for c in crops] == EXPECT
    assert runner.invoke(app, ["card", "check", str(folder)]).exit_code == 0
    # the crop clean-up is drafted off, as comments that become valid keys when uncommented
    assert not (card.input.flatten or card.input.trim or card.input.remove_rules)
    on = "\n".join(line[2:] if line.startswith(("# flatten =", "# trim =", "# remove_rules =")) else line
                   for line in text.splitlines())
    (folder / "card.toml").write_text(on + "\n", encoding="utf-8")
    card = load_card(folder)
    assert card.input.flatten and card.input.trim and card.input.remove_rules
