"""Variants of a recogniser: an int8-quantised copy of its ONNX files with a card of its own.

Why: on CPU the cheapest route to the same accuracy is sometimes the same model
with 8-bit weights. Which operators pay off depends on the model and the CPU
(measured on the demo CTC model, DEVELOPERS.md "Variants"): dynamic int8 of the
LSTM and MatMul weights made the model faster, integer convolutions made it
several times slower. So the operator set is chosen by the user (``ops``) and
every variant is measured against its source before it is trusted.

What :func:`quantise_card` writes into ``out_dir``:

* each ONNX file of the card, quantised with ``onnxruntime.quantization``
  (``quantize_dynamic``; ``quantize_static`` when calibration lines are given,
  CTC cards only, activations calibrated by min/max over those lines);
* every other file the card names (alphabet, vocabulary), copied unchanged;
* ``card.toml``: the source card's fields with the name suffixed and file paths
  pointing at the copies, plus a ``[variant]`` table recording the provenance
  (source card name and hash, method, operators quantised, onnxruntime version,
  calibration lines, time). The card hash therefore differs from the source's,
  and every run of the variant is traced to it.
"""

from __future__ import annotations

import difflib
import json
import logging
import math
import re
import shutil
import tempfile
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from ocrbench.errors import CardError, ConfigError, OcrbenchError
from ocrbench.recognisers.card import CARD_FILE, Card, load_card
from ocrbench.recognisers.batching import prepare_line
from ocrbench.recognisers.preprocess import make_batch, width_batches

#: ``--ops`` names -> ONNX operator types passed to onnxruntime's quantiser.
OP_GROUPS: dict[str, tuple[str, ...]] = {
    "lstm": ("LSTM",),
    "gru": ("GRU",),
    "matmul": ("MatMul",),
    "gemm": ("Gemm",),
    "conv": ("Conv",),
    "attention": ("Attention",),
}
DEFAULT_OPS = ("lstm", "matmul")
ALL = "all"
METHODS = ("dynamic", "static")

#: card role -> the dotted key of the card field that names the file
FILE_KEYS: dict[str, tuple[str, ...]] = {
    "model": ("ctc", "model"),
    "alphabet": ("ctc", "alphabet"),
    "vocab": ("seq", "vocab"),
    "encoder": ("seq", "encoder", "model"),
    "decoder_step": ("seq", "decoder_step", "model"),
    "decoder_full": ("seq", "decoder_full", "model"),
}
ONNX_ROLES = ("model", "encoder", "decoder_step", "decoder_full")


def parse_ops(text: str | Sequence[str] | None) -> tuple[str, ...] | None:
    """``"lstm,matmul"`` -> ("lstm", "matmul"); ``"all"`` -> None (every operator the quantiser supports).

    Raises ConfigError naming the unknown name and the nearest known one.
    """
    if text is None:
        return DEFAULT_OPS
    items = [s.strip().lower() for s in (text.split(",") if isinstance(text, str) else text) if s.strip()]
    if items == [ALL]:
        return None
    if not items:
        raise ConfigError("--ops", f"names no operator; use {ALL} or some of {', '.join(OP_GROUPS)}")
    for s in items:
        if s not in OP_GROUPS:
            close = difflib.get_close_matches(s, [*OP_GROUPS, ALL], n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            raise ConfigError("--ops", f"unknown operator group {s!r}{hint}; use {ALL} or some of "
                                       f"{', '.join(OP_GROUPS)}")
    return tuple(dict.fromkeys(items))


def op_types(ops: tuple[str, ...] | None) -> list[str] | None:
    """ONNX operator types for onnxruntime's ``op_types_to_quantize`` (None: all it supports)."""
    return None if ops is None else [t for o in ops for t in OP_GROUPS[o]]


@dataclass(frozen=True)
class VariantResult:
    """What :func:`quantise_card` wrote."""

    card: Card                        # the variant's card, loaded and checked
    source: Card
    method: str                       # "dynamic" | "static"
    operators: tuple[str, ...]        # operator groups asked for ("all" when every one)
    quantised_nodes: dict[str, int]   # ONNX role -> nodes whose type the quantiser changed or added
    bytes_before: dict[str, int]      # ONNX role -> file size of the source
    bytes_after: dict[str, int]
    calibration_lines: int

    def to_dict(self) -> dict:
        return {"card": str(self.card.path), "name": self.card.name, "card_hash": self.card.card_hash,
                "source": str(self.source.path), "source_card_hash": self.source.card_hash,
                "method": self.method, "operators": list(self.operators),
                "quantised_nodes": self.quantised_nodes, "bytes_before": self.bytes_before,
                "bytes_after": self.bytes_after, "calibration_lines": self.calibration_lines}


def variant_name(source: str, method: str, ops: tuple[str, ...] | None) -> str:
    """``ledger-ctc`` -> ``ledger-ctc-int8`` (dynamic), ``-int8-static``; ``-all`` added when every operator."""
    name = f"{source}-int8" + ("-static" if method == "static" else "")
    return name + ("-all" if ops is None else "")


def quantise_card(source: Card | Path | str, out_dir: Path | str, *, ops: tuple[str, ...] | None = DEFAULT_OPS,
                  calibration: Sequence[np.ndarray] | None = None, name: str | None = None,
                  per_channel: bool = False, overwrite: bool = False) -> VariantResult:
    """Write an int8-quantised copy of ``source`` with its own card into ``out_dir``; return it loaded.

    ``ops``: operator groups (:data:`OP_GROUPS`) or None for all. ``calibration``:
    grey line crops (uint8, ink dark); given, the quantisation is static
    (activations calibrated on them), else dynamic. Raises CardError for a bad
    source card, ConfigError for bad options or an ``out_dir`` that already holds
    a card (unless ``overwrite``), OcrbenchError when onnxruntime cannot
    quantise a graph.
    """
    src = source if isinstance(source, Card) else load_card(source)
    method = "dynamic" if calibration is None else "static"
    if method == "static" and src.kind != "ctc":
        raise ConfigError(src.path, "static quantisation needs calibration inputs for every graph; ocrbench makes "
                                    "them for ctc cards only (use dynamic quantisation for a seq card)")
    if method == "static" and not len(calibration):  # type: ignore[arg-type]
        raise ConfigError("--calibration", "holds no line to calibrate on")
    out = Path(out_dir)
    if out.resolve() == src.folder:
        raise ConfigError(out, "is the source card's own folder; write the variant somewhere else")
    if (out / CARD_FILE).exists() and not overwrite:
        raise ConfigError(out, f"already holds a {CARD_FILE}; choose another folder")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise ConfigError(out, f"cannot create the folder ({e.strerror or e})") from e
    targets = _target_names(src)
    before, after, changed = {}, {}, {}
    for role, f in src.files.items():
        dest = out / targets[role]
        if role in ONNX_ROLES:
            before[role] = f.stat().st_size
            feeds = _calibration_feeds(src, calibration) if method == "static" else None
            _quantise_file(f, dest, op_types(ops), feeds, per_channel)
            after[role] = dest.stat().st_size
            changed[role] = _changed_nodes(f, dest)
        else:
            shutil.copyfile(f, dest)
    vname = name or variant_name(src.name, method, ops)
    provenance = {
        "source_name": src.name, "source_card_hash": src.card_hash, "source_card": str(src.path),
        "method": f"{method} int8", "operators": list(ops) if ops is not None else [ALL],
        "tool": "onnxruntime.quantization", "onnxruntime": _ort_version(),
        "calibration_lines": 0 if calibration is None else len(calibration),
    }
    (out / CARD_FILE).write_text(card_text(src, vname, targets, provenance), encoding="utf-8")
    card = load_card(out)
    return VariantResult(card=card, source=src, method=method, operators=tuple(ops) if ops else (ALL,),
                         quantised_nodes=changed, bytes_before=before, bytes_after=after,
                         calibration_lines=provenance["calibration_lines"])


def _ort_version() -> str:
    import onnxruntime as ort

    return ort.__version__


def _target_names(src: Card) -> dict[str, str]:
    """File name of each role in the variant's folder: the source's name, the role's where two collide."""
    names: dict[str, str] = {}
    for role, f in src.files.items():
        n = f.name
        if n in names.values() or n == CARD_FILE:
            n = f"{role}_{f.name}"
        names[role] = n
    return names


def _quantise_file(src: Path, dest: Path, types: list[str] | None, feeds: list[dict] | None,
                   per_channel: bool) -> None:
    from onnxruntime.quantization import QuantFormat, QuantType, quantize_dynamic, quantize_static

    root = logging.getLogger()
    level = root.level
    root.setLevel(logging.ERROR)  # the quantiser logs advice on the root logger; ocrbench prints its own lines
    try:
        if feeds is None:
            quantize_dynamic(str(src), str(dest), op_types_to_quantize=types, weight_type=QuantType.QInt8,
                             per_channel=per_channel)
            return
        from onnxruntime.quantization import CalibrationDataReader
        from onnxruntime.quantization.shape_inference import quant_pre_process

        class Reader(CalibrationDataReader):
            def __init__(self):
                self.it = iter(feeds)

            def get_next(self):
                return next(self.it, None)

        with tempfile.TemporaryDirectory() as td:
            pre = Path(td) / "pre.onnx"
            # onnx shape inference only (onnxruntime's symbolic inference needs sympy, not a dependency)
            quant_pre_process(str(src), str(pre), skip_symbolic_shape=True)
            quantize_static(str(pre), str(dest), Reader(), quant_format=QuantFormat.QOperator,
                            op_types_to_quantize=types, activation_type=QuantType.QUInt8,
                            weight_type=QuantType.QInt8, per_channel=per_channel)
    except OcrbenchError:
        raise
    except Exception as e:  # noqa: BLE001 - onnxruntime's quantiser raises many kinds
        raise OcrbenchError(f"{src}: onnxruntime cannot quantise it ({type(e).__name__}: {e})") from e
    finally:
        root.setLevel(level)


def _calibration_feeds(src: Card, crops: Sequence[np.ndarray], batch_size: int = 16) -> list[dict]:
    """Model inputs for static calibration: the crops prepared as the recogniser prepares them."""
    spec = src.input
    resized = []
    for i, c in enumerate(crops):
        try:
            resized.append(prepare_line(c, spec))
        except ValueError as e:
            raise ConfigError("--calibration", f"line {i + 1}: {e}") from e
    feeds = []
    for idx in width_batches([r.shape[1] for r in resized], batch_size):
        tensor, _ = make_batch([resized[i] for i in idx], spec)
        feeds.append({src.ctc.input: tensor})  # type: ignore[union-attr]
    return feeds


def _changed_nodes(src: Path, dest: Path) -> int:
    """Nodes of the quantised graph whose operator type the source graph lacks or has fewer of."""
    import collections

    import onnx

    a = collections.Counter(n.op_type for n in onnx.load(str(src), load_external_data=False).graph.node)
    b = collections.Counter(n.op_type for n in onnx.load(str(dest), load_external_data=False).graph.node)
    return int(sum((b - a).values()))


# --------------------------------------------------------------------------- card text

_BARE = re.compile(r"^[A-Za-z0-9_-]+$")


def card_text(src: Card, name: str, targets: dict[str, str], provenance: dict[str, Any]) -> str:
    """The variant's card: the source card's fields (name and file paths replaced) plus ``[variant]``."""
    try:
        data = tomllib.loads(src.path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as e:  # load_card read it a moment ago
        raise CardError(src.path, f"cannot read it again ({e})") from e
    data["name"] = name
    for role, key in FILE_KEYS.items():
        if role in targets:
            t = data
            for k in key[:-1]:
                t = t[k]
            t[key[-1]] = targets[role]
    data["variant"] = provenance
    head = (f"# Recogniser card written by 'ocrbench variant quantise' from {src.path.name} of {src.name}.\n"
            "# See models/README.md for every field; [variant] records where this copy came from.\n")
    return head + toml_dumps(data)


def _key(k: str) -> str:
    return k if _BARE.match(k) else _string(k)


def _string(s: str) -> str:
    # JSON's escapes (\" \\ \n \t \uXXXX) are TOML basic-string escapes too; DEL must be escaped in TOML
    return json.dumps(s, ensure_ascii=False).replace("\x7f", "\\u007f")


def _value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return _string(v)
    if isinstance(v, list):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    raise TypeError(f"cannot write {type(v).__name__} as a TOML value")


def toml_dumps(data: dict[str, Any], prefix: tuple[str, ...] = ()) -> str:
    """A TOML document of plain values and nested tables (what a card holds); ``tomllib`` reads it back equal."""
    lines = [f"{_key(k)} = {_value(v)}" for k, v in data.items() if not isinstance(v, dict)]
    out = "\n".join(lines) + ("\n" if lines else "")
    for k, v in data.items():
        if isinstance(v, dict):
            path = (*prefix, k)
            out += f"\n[{'.'.join(_key(p) for p in path)}]\n" + toml_dumps(v, path)
    return out
