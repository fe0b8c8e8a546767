"""Tiny recognisers built with onnx.helper for fast tests of the card, decoding and runner code.

They are real ONNX models run by onnxruntime, just small and with weights
chosen by hand (CTC) or drawn from a seeded generator (seq), so that every
test can run them in milliseconds and without the trained demo models.

Tiny CTC: each 4-pixel-wide column of the (8-pixel-high) line image becomes
one frame whose feature is the mean ink x in [0, 1] (0 = paper). The class
scores are linear in x: blank 0, "a" 10x - 2, "b" 20x - 9, so a frame reads
blank for x < 0.2, "a" for 0.2 < x < 0.7 and "b" above 0.7.

Tiny seq: the encoder maps each frame's mean ink through tanh(x * w + b) to a
D-vector; the decoder embeds the token (plus position * p), attends over its
own earlier embeddings (the cache) and over the memory, and scores the next
token with a linear layer whose end-token score grows with the position, so
every line ends after a few tokens. ``decoder_full`` computes the same thing
from the whole prefix, without a cache.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

OPSET = 17
H = 8
CTC_CLASSES = ["<blank>", "a", "b"]
SEQ_VOCAB = ["<pad>", "<bos>", "<eos>", "a", "b", "c"]
D = 8
MEM_SCALE = 3.0
END_RATE = 0.5     # a line ends near step END_RATE * frames


def _save(model: onnx.ModelProto, path: Path) -> None:
    onnx.checker.check_model(model)
    onnx.save(model, str(path))


def _init(name: str, arr) -> onnx.TensorProto:
    return numpy_helper.from_array(np.asarray(arr), name)


def _frames_nodes(img: str, out: str) -> list:
    """(B,1,H,W) -> (B,T,1) mean per 4-pixel column block."""
    return [
        helper.make_node("AveragePool", [img], ["pooled"], kernel_shape=[H, 4], strides=[H, 4]),
        helper.make_node("Reshape", ["pooled", "shape_bt1"], [out]),
    ]


def ctc_model(*, classes: int = 3, input_rank: int = 4, free_classes: bool = False,
              input_type: int = TensorProto.FLOAT, nan_on_ink: bool = False) -> onnx.ModelProto:
    """``input_type``: the declared element type of the image (cast to float inside).
    ``nan_on_ink``: frames with ink score NaN (sqrt of the negated ink), blank frames stay finite."""
    w = np.array([[0.0, 10.0, 20.0][:classes] + [0.0] * max(0, classes - 3)], np.float32)
    b = np.array([0.0, -2.0, -9.0][:classes] + [-50.0] * max(0, classes - 3), np.float32)
    nodes = []
    img = "image"
    if input_type != TensorProto.FLOAT:
        nodes.append(helper.make_node("Cast", ["image"], ["image_f"], to=TensorProto.FLOAT))
        img = "image_f"
    if input_rank == 3:
        nodes.append(helper.make_node("Unsqueeze", [img, "axis1"], ["image4"]))
        img = "image4"
    nodes += _frames_nodes(img, "x")
    nodes += [helper.make_node("MatMul", ["x", "w"], ["xw"]),
              helper.make_node("Add", ["xw", "b"], ["logits0" if nan_on_ink else "logits"])]
    if nan_on_ink:
        nodes += [helper.make_node("Neg", ["x"], ["negx"]), helper.make_node("Sqrt", ["negx"], ["nan_or_0"]),
                  helper.make_node("Add", ["logits0", "nan_or_0"], ["logits"])]
    inits = [_init("shape_bt1", np.array([0, -1, 1], np.int64)), _init("w", w), _init("b", b),
             _init("axis1", np.array([1], np.int64))]
    in_shape = ["batch", 1, H, "width"] if input_rank == 4 else ["batch", H, "width"]
    g = helper.make_graph(nodes, "tiny_ctc", [helper.make_tensor_value_info("image", input_type, in_shape)],
                          [helper.make_tensor_value_info("logits", TensorProto.FLOAT,
                                                         ["batch", "frames", "classes" if free_classes else classes])],
                          inits)
    return helper.make_model(g, opset_imports=[helper.make_opsetid("", OPSET)])


CTC_CARD = """name = "tiny-ctc"
kind = "ctc"
description = "test model"

[input]
height = 8
width_multiple = 4
min_width = 8

[ctc]
model = "model.onnx"
input = "image"
output = "logits"
layout = "BTC"
frames_per_pixel = 0.25
blank_index = 0
alphabet = "alphabet.txt"
"""


def write_symbols(path: Path, symbols) -> None:
    path.write_text("".join(json.dumps(s, ensure_ascii=False) + "\n" for s in symbols), encoding="utf-8")


def write_ctc(folder: Path, *, card: str = CTC_CARD, **model_kw) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    _save(ctc_model(**model_kw), folder / "model.onnx")
    write_symbols(folder / "alphabet.txt", CTC_CLASSES)
    (folder / "card.toml").write_text(card, encoding="utf-8")
    return folder


# --------------------------------------------------------------------------- seq


def _seq_weights(seed: int = 2) -> dict[str, np.ndarray]:
    rng = np.random.RandomState(seed)
    V = len(SEQ_VOCAB)
    q = np.zeros(V, np.float32)
    q[2] = 1.5                       # the end token's score grows with the position past END_RATE * frames
    bo = rng.normal(0, 0.5, V).astype(np.float32)
    bo[0] = bo[1] = -4.0             # pad and bos are unlikely but possible
    bo[2] = -2.0
    return {
        "we": rng.normal(0, 2.0, (1, D)).astype(np.float32),
        "be": rng.normal(0, 0.5, D).astype(np.float32),
        "emb": rng.normal(0, 0.6, (V, D)).astype(np.float32),
        "pos": rng.normal(0, 0.09, D).astype(np.float32),
        "wo": rng.normal(0, 1.0, (D, V)).astype(np.float32),
        "bo": bo,
        "end_w": q,
    }


def seq_encoder(*, nan_on_ink: bool = False) -> onnx.ModelProto:
    """``nan_on_ink``: memory frames with ink are NaN (sqrt of the negated ink), blank frames stay finite."""
    W = _seq_weights()
    nodes = _frames_nodes("image", "x") + [
        helper.make_node("MatMul", ["x", "we"], ["xw"]),
        helper.make_node("Add", ["xw", "be"], ["pre"]),
        helper.make_node("Tanh", ["pre"], ["mem0"]),
        helper.make_node("Mul", ["mem0", "mem_scale"], ["mem1" if nan_on_ink else "memory"]),
    ]
    if nan_on_ink:
        nodes += [helper.make_node("Neg", ["x"], ["negx"]), helper.make_node("Sqrt", ["negx"], ["nan_or_0"]),
                  helper.make_node("Add", ["mem1", "nan_or_0"], ["memory"])]
    g = helper.make_graph(nodes, "tiny_encoder",
                          [helper.make_tensor_value_info("image", TensorProto.FLOAT, ["batch", 1, H, "width"])],
                          [helper.make_tensor_value_info("memory", TensorProto.FLOAT, ["batch", "frames", D])],
                          [_init("shape_bt1", np.array([0, -1, 1], np.int64)), _init("we", W["we"]),
                           _init("be", W["be"]), _init("mem_scale", np.array(MEM_SCALE, np.float32))])
    return helper.make_model(g, opset_imports=[helper.make_opsetid("", OPSET)])


def _attend_and_score(q: str, keys: str, pos: str, prefix: str = "") -> list:
    """Nodes from query q (B,1,D), keys (B,t,D), memory, mask and position (float scalar) to log_probs (B,V)."""
    return [
        helper.make_node("Transpose", [keys], ["keys_t"], perm=[0, 2, 1]),
        helper.make_node("MatMul", [q, "keys_t"], ["s_self"]),
        helper.make_node("Softmax", ["s_self"], ["a_self"], axis=-1),
        helper.make_node("MatMul", ["a_self", keys], ["y_self"]),
        helper.make_node("Transpose", ["memory"], ["mem_t"], perm=[0, 2, 1]),
        helper.make_node("MatMul", [q, "mem_t"], ["s_cross0"]),
        helper.make_node("Unsqueeze", ["memory_mask", "axis1"], ["mask3"]),
        helper.make_node("Add", ["s_cross0", "mask3"], ["s_cross"]),
        helper.make_node("Softmax", ["s_cross"], ["a_cross"], axis=-1),
        helper.make_node("MatMul", ["a_cross", "memory"], ["y_cross"]),
        helper.make_node("Add", [q, "y_self"], ["h0"]),
        helper.make_node("Add", ["h0", "y_cross"], ["h"]),
        helper.make_node("MatMul", ["h", "wo"], ["l0"]),
        helper.make_node("Add", ["l0", "bo"], ["l1"]),
        helper.make_node("Greater", ["memory_mask", "minus_one"], ["real"]),
        helper.make_node("Cast", ["real"], ["realf"], to=TensorProto.FLOAT),
        helper.make_node("ReduceSum", ["realf", "axis1"], ["n_frames"], keepdims=1),    # (B,1)
        helper.make_node("Mul", ["n_frames", "end_rate"], ["n_half"]),
        helper.make_node("Sub", [pos, "n_half"], ["due"]),                              # (B,1)
        helper.make_node("Unsqueeze", ["due", "axis1"], ["due3"]),                      # (B,1,1)
        helper.make_node("Mul", ["due3", "end_w"], ["lq"]),
        helper.make_node("Add", ["l1", "lq"], ["l2"]),
        helper.make_node("Squeeze", ["l2", "axis1"], ["l3"]),
        helper.make_node("LogSoftmax", ["l3"], ["log_probs"], axis=-1),
    ]


def _common_inits(W) -> list:
    return [_init("emb", W["emb"]), _init("pos_w", W["pos"]), _init("wo", W["wo"]), _init("bo", W["bo"]),
            _init("end_w", W["end_w"]), _init("axis1", np.array([1], np.int64)),
            _init("minus_one", np.array(-1.0, np.float32)), _init("end_rate", np.array(END_RATE, np.float32))]


def _mem_inputs() -> list:
    return [helper.make_tensor_value_info("memory", TensorProto.FLOAT, ["batch", "frames", D]),
            helper.make_tensor_value_info("memory_mask", TensorProto.FLOAT, ["batch", "frames"])]


def seq_decoder_step() -> onnx.ModelProto:
    W = _seq_weights()
    nodes = [
        helper.make_node("Gather", ["emb", "tokens"], ["e0"]),                 # (B,1,D)
        helper.make_node("Cast", ["step"], ["pos"], to=TensorProto.FLOAT),
        helper.make_node("Mul", ["pos", "pos_w"], ["pe"]),
        helper.make_node("Add", ["e0", "pe"], ["e"]),
        helper.make_node("Concat", ["past", "e"], ["present"], axis=1),         # (B,t+1,D)
    ] + _attend_and_score("e", "present", "pos")
    g = helper.make_graph(
        nodes, "tiny_decoder_step",
        [helper.make_tensor_value_info("tokens", TensorProto.INT64, ["batch", 1]),
         helper.make_tensor_value_info("step", TensorProto.INT64, []),
         helper.make_tensor_value_info("past", TensorProto.FLOAT, ["batch", "past", D])] + _mem_inputs(),
        [helper.make_tensor_value_info("log_probs", TensorProto.FLOAT, ["batch", len(SEQ_VOCAB)]),
         helper.make_tensor_value_info("present", TensorProto.FLOAT, ["batch", "total", D])],
        _common_inits(W))
    return helper.make_model(g, opset_imports=[helper.make_opsetid("", OPSET)])


def seq_decoder_full(vocab: int | None = None) -> onnx.ModelProto:
    W = _seq_weights()
    nodes = [
        helper.make_node("Gather", ["emb", "tokens"], ["e0"]),                 # (B,t,D)
        helper.make_node("Shape", ["tokens"], ["tshape"]),
        helper.make_node("Gather", ["tshape", "one"], ["t"]),                   # scalar t
        helper.make_node("Range", ["zero", "t", "one"], ["r"]),
        helper.make_node("Cast", ["r"], ["rf"], to=TensorProto.FLOAT),
        helper.make_node("Unsqueeze", ["rf", "axis1"], ["rf2"]),                # (t,1)
        helper.make_node("Mul", ["rf2", "pos_w"], ["pe"]),                      # (t,D)
        helper.make_node("Add", ["e0", "pe"], ["e"]),                           # (B,t,D)
        helper.make_node("Sub", ["t", "one"], ["last"]),
        helper.make_node("Unsqueeze", ["last", "axis0"], ["last1"]),
        helper.make_node("Gather", ["e", "last1"], ["query"], axis=1),              # (B,1,D)
        helper.make_node("Cast", ["last"], ["pos"], to=TensorProto.FLOAT),
    ] + _attend_and_score("query", "e", "pos")
    inits = _common_inits(W) + [_init("zero", np.array(0, np.int64)), _init("one", np.array(1, np.int64)),
                                _init("axis0", np.array([0], np.int64))]
    g = helper.make_graph(
        nodes, "tiny_decoder_full",
        [helper.make_tensor_value_info("tokens", TensorProto.INT64, ["batch", "length"])] + _mem_inputs(),
        [helper.make_tensor_value_info("log_probs", TensorProto.FLOAT, ["batch", vocab or len(SEQ_VOCAB)])],
        inits)
    return helper.make_model(g, opset_imports=[helper.make_opsetid("", OPSET)])


SEQ_CARD = """name = "tiny-seq"
kind = "seq"

[input]
height = 8
width_multiple = 4
min_width = 8

[seq]
vocab = "vocab.txt"
bos_index = 1
eos_index = 2
pad_index = 0
max_tokens = 12
frames_per_pixel = 0.25

[seq.encoder]
model = "encoder.onnx"
input = "image"
outputs = ["memory"]
layout = "BTD"

[seq.decoder_step]
model = "decoder_step.onnx"
tokens = "tokens"
step = "step"
past = ["past"]
present = ["present"]
memory = ["memory"]
memory_mask = "memory_mask"
log_probs = "log_probs"
cache_layout = "BTD"

[seq.decoder_full]
model = "decoder_full.onnx"
tokens = "tokens"
memory = ["memory"]
memory_mask = "memory_mask"
log_probs = "log_probs"
"""


#: The tiny seq card with the repetition guard off: the tiny decoder's lines are one letter over and over
#: (up to 16 ``c`` in a row on wide lines), which the guard would cut; tests of the token limit use this.
SEQ_CARD_NO_REPEAT_GUARD = SEQ_CARD.replace("[seq]\n", "[seq]\nrepeat_guard = false\n", 1)


def write_seq(folder: Path, *, card: str = SEQ_CARD) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    _save(seq_encoder(), folder / "encoder.onnx")
    _save(seq_decoder_step(), folder / "decoder_step.onnx")
    _save(seq_decoder_full(), folder / "decoder_full.onnx")
    write_symbols(folder / "vocab.txt", SEQ_VOCAB)
    (folder / "card.toml").write_text(card, encoding="utf-8")
    return folder


#: The scripted decoder's vocabulary: special tokens, then one character per token.
SCRIPT_VOCAB = ["<pad>", "<bos>", "<eos>"] + list(" .-_=,/&£abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789")
SCRIPT_LEN = 320   # rows of the scripted table: past any max_tokens the tests use


def scripted_table(script: str | list[int], *, end: bool = True, loop: bool = False) -> np.ndarray:
    """(SCRIPT_LEN, V) log-probabilities: at position k the script's k-th token is likeliest (p ~ 0.95), the
    next vocabulary entry second (p ~ 0.05: a runner-up for beam search), the rest (the end token included)
    near e^-12, so even a 300-token script outscores stopping at once. ``end``: the end token follows
    the script (else its last token repeats); ``loop``: the script repeats to the end of the table instead."""
    ids = [SCRIPT_VOCAB.index(c) for c in script] if isinstance(script, str) else list(script)
    seq = (ids * (SCRIPT_LEN // max(1, len(ids)) + 1) if loop else ids + [2] * SCRIPT_LEN)[:SCRIPT_LEN]
    if not end and not loop:
        seq = (ids + [ids[-1]] * SCRIPT_LEN)[:SCRIPT_LEN]
    V = len(SCRIPT_VOCAB)
    scores = np.zeros((SCRIPT_LEN, V), np.float64)
    for k, t in enumerate(seq):
        scores[k, t] = 12.0
        scores[k, 3 + (t - 2) % (V - 3)] += 9.0 if t != 2 else 0.0      # a runner-up that is not the end token
    scores[:, 0] = scores[:, 1] = -20.0
    lp = scores - np.log(np.exp(scores).sum(axis=1, keepdims=True))
    return lp.astype(np.float32)


def scripted_decoder_full(table: np.ndarray) -> onnx.ModelProto:
    """An uncached decoder that ignores the image: its next-token log-probabilities are row (prefix length - 1)
    of ``table``, the same for every line and every hypothesis (a scripted reader, for decoding tests)."""
    V = table.shape[1]
    nodes = [
        helper.make_node("Shape", ["tokens"], ["tshape"]),
        helper.make_node("Gather", ["tshape", "one"], ["length"], axis=0),
        helper.make_node("Sub", ["length", "one"], ["pos"]),
        helper.make_node("Gather", ["table", "pos"], ["row"], axis=0),
        helper.make_node("Slice", ["tshape", "zero1", "one1"], ["batch"]),
        helper.make_node("Concat", ["batch", "vocab"], ["out_shape"], axis=0),
        helper.make_node("Expand", ["row", "out_shape"], ["row_b"]),
        # the memory enters with weight 0, so the graph reads every input it declares
        helper.make_node("ReduceMean", ["memory"], ["mem_mean"], keepdims=0),
        helper.make_node("Mul", ["mem_mean", "zero_f"], ["nothing"]),
        helper.make_node("Add", ["row_b", "nothing"], ["log_probs"]),
    ]
    inits = [_init("table", table), _init("one", np.array(1, np.int64)), _init("zero1", np.array([0], np.int64)),
             _init("one1", np.array([1], np.int64)), _init("vocab", np.array([V], np.int64)),
             _init("zero_f", np.array(0.0, np.float32))]
    g = helper.make_graph(
        nodes, "scripted_decoder",
        [helper.make_tensor_value_info("tokens", TensorProto.INT64, ["batch", "length"]),
         helper.make_tensor_value_info("memory", TensorProto.FLOAT, ["batch", "frames", D])],
        [helper.make_tensor_value_info("log_probs", TensorProto.FLOAT, ["batch", V])], inits)
    return helper.make_model(g, opset_imports=[helper.make_opsetid("", OPSET)])


SCRIPT_CARD = """name = "scripted-seq"
kind = "seq"

[input]
height = 8
width_multiple = 4
min_width = 8

[seq]
vocab = "vocab.txt"
bos_index = 1
eos_index = 2
pad_index = 0
max_tokens = {max_tokens}
frames_per_pixel = 0.25
{extra}
[seq.encoder]
model = "encoder.onnx"
input = "image"
outputs = ["memory"]
layout = "BTD"

[seq.decoder_full]
model = "decoder_full.onnx"
tokens = "tokens"
memory = ["memory"]
log_probs = "log_probs"
"""


def write_scripted_seq(folder: Path, table: np.ndarray, *, max_tokens: int = 200, extra: str = "") -> Path:
    """A seq recogniser whose decoder reads ``table`` (see :func:`scripted_table`), whatever the image;
    ``extra``: more lines of the card's [seq] table."""
    folder.mkdir(parents=True, exist_ok=True)
    _save(seq_encoder(), folder / "encoder.onnx")
    _save(scripted_decoder_full(table), folder / "decoder_full.onnx")
    write_symbols(folder / "vocab.txt", SCRIPT_VOCAB)
    (folder / "card.toml").write_text(SCRIPT_CARD.format(max_tokens=max_tokens, extra=extra), encoding="utf-8")
    return folder


def block_line(pattern: str, *, grey: int = 128, block: int = 8) -> np.ndarray:
    """An 8-pixel-high line crop: per character of ``pattern``, a block of paper (' '), grey ('a') or ink ('b')."""
    value = {" ": 255, "a": grey, "b": 0}
    cols = [np.full((H, block), value[c], np.uint8) for c in pattern]
    return np.concatenate(cols, axis=1)


# --------------------------------------------------------------------------- CTC layouts (bring your own model)


def ctc_layout_model(*, layout: str = "NCHW", channels: int = 1, height: int = H, blank_last: bool = False,
                     out_layout: str = "BTC", kind: str = "logits", width: int | None = None,
                     mean: tuple[float, ...] = (0.0,), std: tuple[float, ...] = (1.0,)) -> onnx.ModelProto:
    """The tiny CTC recogniser in another export layout: image axes ``layout``, ``channels`` (averaged),
    line ``height``, the blank as the last class, output axes ``out_layout`` (BTC/TBC), output ``kind``
    (logits / log_probs / probs), a fixed input ``width``. ``mean``/``std``: the per-channel normalisation
    the card applies, undone first, so every variant reads the same ink x per 4-pixel column block."""
    order = [1, 2, 0] if blank_last else [0, 1, 2]
    w = np.array([[0.0, 10.0, 20.0]], np.float32)[:, order]
    b = np.array([0.0, -2.0, -9.0], np.float32)[order]
    nodes, img = [], "image"
    if layout == "NHWC":
        nodes.append(helper.make_node("Transpose", [img], ["nchw"], perm=[0, 3, 1, 2]))
        img = "nchw"
    c_shape = [1, channels, 1, 1]
    nodes += [helper.make_node("Mul", [img, "std"], ["unstd"]), helper.make_node("Add", ["unstd", "mean"], ["raw"]),
              helper.make_node("ReduceMean", ["raw"], ["grey"], axes=[1], keepdims=1),
              helper.make_node("AveragePool", ["grey"], ["pooled"], kernel_shape=[height, 4], strides=[height, 4]),
              helper.make_node("Reshape", ["pooled", "shape_bt1"], ["x"]),
              helper.make_node("MatMul", ["x", "w"], ["xw"]), helper.make_node("Add", ["xw", "b"], ["scores"])]
    last = "scores"
    if kind != "logits":
        nodes.append(helper.make_node("LogSoftmax" if kind == "log_probs" else "Softmax", [last], ["norm"], axis=-1))
        last = "norm"
    if out_layout == "TBC":
        nodes.append(helper.make_node("Transpose", [last], ["tbc"], perm=[1, 0, 2]))
        last = "tbc"
    nodes.append(helper.make_node("Identity", [last], ["output"]))
    W = width or "width"
    in_shape = ["batch", channels, height, W] if layout == "NCHW" else ["batch", height, W, channels]
    out_shape = ["batch", "frames", 3] if out_layout == "BTC" else ["frames", "batch", 3]
    inits = [_init("shape_bt1", np.array([0, -1, 1], np.int64)), _init("w", w), _init("b", b),
             _init("axis1", np.array([1], np.int64)),
             _init("std", np.broadcast_to(np.asarray(std, np.float32), (channels,)).reshape(c_shape).copy()),
             _init("mean", np.broadcast_to(np.asarray(mean, np.float32), (channels,)).reshape(c_shape).copy())]
    g = helper.make_graph(nodes, "tiny_ctc_layout", [helper.make_tensor_value_info("image", TensorProto.FLOAT, in_shape)],
                          [helper.make_tensor_value_info("output", TensorProto.FLOAT, out_shape)], inits)
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", OPSET)])
    return m


def write_ctc_layout(folder: Path, card_extra: str = "", ctc_extra: str = "", **kw) -> Path:
    """A card folder for :func:`ctc_layout_model` (``card_extra``: more [input] lines; ``ctc_extra``: [ctc])."""
    folder.mkdir(parents=True, exist_ok=True)
    _save(ctc_layout_model(**kw), folder / "model.onnx")
    classes = CTC_CLASSES[1:] + CTC_CLASSES[:1] if kw.get("blank_last") else CTC_CLASSES
    write_symbols(folder / "alphabet.txt", classes)
    (folder / "card.toml").write_text(
        f'name = "{folder.name}"\nkind = "ctc"\n\n[input]\nheight = {kw.get("height", H)}\nwidth_multiple = 4\n'
        f'min_width = 8\n{card_extra}\n[ctc]\nmodel = "model.onnx"\ninput = "image"\noutput = "output"\n'
        f'frames_per_pixel = 0.25\nalphabet = "alphabet.txt"\nblank_index = {2 if kw.get("blank_last") else 0}\n'
        f'{ctc_extra}', encoding="utf-8")
    return folder
