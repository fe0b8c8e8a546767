"""A tiny CTC recogniser with an LSTM and a MatMul (the operators a quantised variant changes).

Each 4-pixel-wide column block of the 8-pixel-high line becomes one frame
(its mean ink), a bidirectional LSTM (hidden 8, weights from a seeded
generator) reads the frames, and a MatMul + bias scores 3 classes. Built with
onnx.helper and run by onnxruntime, like tests/_tiny_models.py.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

import _tiny_models as tm

HIDDEN = 8
CLASSES = 3
CARD = tm.CTC_CARD.replace('name = "tiny-ctc"', 'name = "tiny-lstm"')


def lstm_ctc_model(seed: int = 4) -> onnx.ModelProto:
    rng = np.random.default_rng(seed)
    h = HIDDEN
    w = rng.normal(0, 1.5, (2, 4 * h, 1)).astype(np.float32)
    r = rng.normal(0, 0.4, (2, 4 * h, h)).astype(np.float32)
    b = rng.normal(0, 0.3, (2, 8 * h)).astype(np.float32)
    proj = rng.normal(0, 1.0, (2 * h, CLASSES)).astype(np.float32)
    bias = np.array([1.0, -0.5, -0.5], np.float32)
    init = [numpy_helper.from_array(a, n) for a, n in
            [(w, "W"), (r, "R"), (b, "B"), (proj, "proj"), (bias, "bias"),
             (np.array([0, -1, 1], np.int64), "shape_bt1"), (np.array([0, 0, 2 * h], np.int64), "shape_bt2h")]]
    nodes = [
        helper.make_node("AveragePool", ["image"], ["pooled"], kernel_shape=[tm.H, 4], strides=[tm.H, 4]),
        helper.make_node("Reshape", ["pooled", "shape_bt1"], ["bt1"]),
        helper.make_node("Transpose", ["bt1"], ["tb1"], perm=[1, 0, 2]),
        helper.make_node("LSTM", ["tb1", "W", "R", "B"], ["y"], hidden_size=h, direction="bidirectional"),
        helper.make_node("Transpose", ["y"], ["y_bt"], perm=[2, 0, 1, 3]),        # (T,2,B,H) -> (B,T,2,H)
        helper.make_node("Reshape", ["y_bt", "shape_bt2h"], ["feat"]),
        helper.make_node("MatMul", ["feat", "proj"], ["scores"]),
        helper.make_node("Add", ["scores", "bias"], ["logits"]),
    ]
    g = helper.make_graph(nodes, "tiny_lstm_ctc",
                          [helper.make_tensor_value_info("image", TensorProto.FLOAT, ["batch", 1, tm.H, "width"])],
                          [helper.make_tensor_value_info("logits", TensorProto.FLOAT, ["batch", "frames", CLASSES])],
                          init)
    return helper.make_model(g, opset_imports=[helper.make_opsetid("", tm.OPSET)])


def write_lstm_ctc(folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    m = lstm_ctc_model()
    onnx.checker.check_model(m)
    onnx.save(m, str(folder / "model.onnx"))
    tm.write_symbols(folder / "alphabet.txt", tm.CTC_CLASSES)
    (folder / "card.toml").write_text(CARD, encoding="utf-8")
    return folder


def lines(n: int = 6, seed: int = 1) -> list[np.ndarray]:
    """Block lines of paper, grey and ink blocks, 10-30 blocks wide."""
    rng = np.random.default_rng(seed)
    return [tm.block_line("".join(rng.choice([" ", "a", "b"], size=int(rng.integers(10, 30))))) for _ in range(n)]
