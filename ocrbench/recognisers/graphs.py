"""ONNX graph inspection and checks: what a card's tensor names, ranks and sizes are checked against.

The card loader reads each model's interface (inputs and outputs with their
element types and shapes, without loading the weights), then asks this module
whether a named tensor exists with the rank it needs. Everything wrong raises
:class:`~ocrbench.errors.CardError` naming the card, the field and the graph.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from ocrbench.errors import CardError

#: ONNX element types by number (onnx.TensorProto.DataType), for messages.
ELEM_NAMES = {1: "float32", 2: "uint8", 3: "int8", 5: "int16", 6: "int32", 7: "int64", 9: "bool",
              10: "float16", 11: "float64 (double)", 16: "bfloat16"}


FLOAT32 = (1,)
INT_TYPES = (6, 7)              # int32, int64
MASK_TYPES = (1, 9, 10, 11)     # float32, bool, float16, double: the mask is built in the input's own type


def elem_name(elem_type: int) -> str:
    return ELEM_NAMES.get(elem_type, f"ONNX type {elem_type}")


@dataclass(frozen=True)
class TensorInfo:
    """Name, element type and shape of one graph input or output (None or a string for a free axis)."""

    name: str
    elem_type: int
    shape: tuple[int | str | None, ...] | None

    @property
    def rank(self) -> int | None:
        return None if self.shape is None else len(self.shape)

    def static(self, axis: int) -> int | None:
        if self.shape is None:
            return None
        d = self.shape[axis]
        return d if isinstance(d, int) and d > 0 else None


@dataclass(frozen=True)
class GraphInfo:
    """The interface of one ONNX file: its inputs and outputs by name, and its external data files."""

    path: Path
    inputs: dict[str, TensorInfo]
    outputs: dict[str, TensorInfo]
    opset: int
    external: tuple[str, ...] = ()   # ``location`` of every initializer stored outside the .onnx file


def read_graph(card: Path, role: str, path: Path) -> GraphInfo:
    """The interface of one model file, read without loading its weights."""
    import onnx

    try:
        m = onnx.load(str(path), load_external_data=False)
    except Exception as e:  # onnx raises DecodeError and friends
        raise CardError(path, f"{role}: not a readable ONNX model ({type(e).__name__})") from e
    init = {i.name for i in m.graph.initializer}

    def info(v) -> TensorInfo:
        tt = v.type.tensor_type
        shape = None
        if tt.HasField("shape"):
            shape = tuple((d.dim_value if d.HasField("dim_value") else (d.dim_param or None)) for d in tt.shape.dim)
        return TensorInfo(v.name, tt.elem_type, shape)

    opset = max((o.version for o in m.opset_import if o.domain in ("", "ai.onnx")), default=0)
    return GraphInfo(path, {v.name: info(v) for v in m.graph.input if v.name not in init},
                     {v.name: info(v) for v in m.graph.output}, opset, external_files(m))


def _tensors(graph):
    """Every TensorProto of a graph: initializers and tensor attributes, subgraphs included."""
    yield from graph.initializer
    for node in graph.node:
        for a in node.attribute:
            if a.HasField("t"):
                yield a.t
            yield from a.tensors
            if a.HasField("g"):
                yield from _tensors(a.g)
            for sub in a.graphs:
                yield from _tensors(sub)


def external_files(model) -> tuple[str, ...]:
    """Relative ``location`` of every tensor the model keeps in external data files (ONNX external data format:
    ``data_location = EXTERNAL`` with a ``location`` entry, onnx/docs/ExternalData.md)."""
    locs: list[str] = []
    for t in _tensors(model.graph):
        if t.data_location == 1:  # onnx.TensorProto.EXTERNAL
            for kv in t.external_data:
                if kv.key == "location" and kv.value not in locs:
                    locs.append(kv.value)
    return tuple(locs)


def need_tensor(card: Path, role: str, g: GraphInfo, name: str, *, output: bool,
                rank: int | tuple[int, ...] | None, key: str) -> TensorInfo:
    """The named input/output of a graph; a CardError naming the field when it is absent or of the wrong rank."""
    pool = g.outputs if output else g.inputs
    what = "output" if output else "input"
    if name not in pool:
        have = ", ".join(sorted(pool)) or "none"
        raise CardError(card, f"field '{key}': {role} model {g.path.name} has no {what} named '{name}' "
                              f"(its {what}s: {have})")
    t = pool[name]
    ranks = (rank,) if isinstance(rank, int) else rank
    if ranks is not None and t.rank is not None and t.rank not in ranks:
        want = " or ".join(str(r) for r in ranks)
        raise CardError(card, f"field '{key}': {what} '{name}' of {g.path.name} has rank {t.rank} "
                              f"(shape {list(t.shape)}), expected rank {want}")
    return t


def need_dtype(card: Path, g: GraphInfo, t: TensorInfo, allowed: tuple[int, ...], key: str, why: str) -> None:
    """A CardError when a tensor's element type is not one the engine feeds."""
    if t.elem_type and t.elem_type not in allowed:
        want = " or ".join(elem_name(a) for a in allowed)
        raise CardError(card, f"field '{key}': input '{t.name}' of {g.path.name} has element type "
                              f"{elem_name(t.elem_type)}; {why} ({want})")


def class_count(t: TensorInfo, axis: int) -> int | None:
    return t.static(axis) if t.shape is not None else None
