"""Recogniser cards: a TOML file that tells ocrbench how to drive an ONNX recogniser.

A card sits in a folder beside its model files. It says which kind of
recogniser it is (``ctc``: one parallel pass and a collapse; ``seq``: an
encoder and an autoregressive decoder), how line images must be prepared, the
tensor names and layouts, and the symbol table with its special entries. The
format is documented field by field in ``models/README.md`` so that users can
bring their own model; this module parses it, checks it against the ONNX
graphs (names, ranks, vocabulary size) and records the sha256 of every file, so
a run can say exactly which model produced its text.

Everything wrong with a card raises :class:`~ocrbench.errors.CardError` naming
the file and the field.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ocrbench.errors import CardError
from ocrbench.recognisers.preprocess import InputSpec

CARD_FILE = "card.toml"
KINDS = ("ctc", "seq")
CTC_LAYOUTS = ("BTC", "TBC")
DEFAULT_MASK_VALID = 0.0
DEFAULT_MASK_PADDED = -1e9

# --------------------------------------------------------------------------- data


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
    """The interface of one ONNX file: its inputs and outputs by name."""

    path: Path
    inputs: dict[str, TensorInfo]
    outputs: dict[str, TensorInfo]
    opset: int


@dataclass(frozen=True)
class CtcSpec:
    """The ``[ctc]`` table: one graph from image to per-frame class scores."""

    model: Path
    input: str
    output: str
    layout: str                      # "BTC" or "TBC"
    output_is_log_probs: bool
    frames_per_pixel: float | None   # valid frames = ceil(width * this); None: proportional to the padded width
    blank_index: int
    symbols: tuple[str, ...]         # class index -> text ("" for the blank)
    graph: GraphInfo = field(repr=False, compare=False)


@dataclass(frozen=True)
class EncoderSpec:
    model: Path
    input: str
    outputs: tuple[str, ...]
    layout: str                      # letters of each output's axes; must contain B (batch) and T (frames)
    graph: GraphInfo = field(repr=False, compare=False)

    @property
    def batch_axis(self) -> int:
        return self.layout.index("B")

    @property
    def frames_axis(self) -> int:
        return self.layout.index("T")


@dataclass(frozen=True)
class DecoderStepSpec:
    """A decoder graph that takes one token per row plus the key/value cache."""

    model: Path
    tokens: str
    step: str | None
    past: tuple[str, ...]
    present: tuple[str, ...]
    memory: tuple[str, ...]
    memory_mask: str | None
    log_probs: str
    cache_layout: str
    graph: GraphInfo = field(repr=False, compare=False)

    @property
    def batch_axis(self) -> int:
        return self.cache_layout.index("B")

    @property
    def time_axis(self) -> int:
        return self.cache_layout.index("T")


@dataclass(frozen=True)
class DecoderFullSpec:
    """A decoder graph that takes the whole prefix every step (no cache)."""

    model: Path
    tokens: str
    memory: tuple[str, ...]
    memory_mask: str | None
    log_probs: str
    graph: GraphInfo = field(repr=False, compare=False)


@dataclass(frozen=True)
class SeqSpec:
    """The ``[seq]`` tables: encoder, cached and/or uncached decoder, vocabulary."""

    symbols: tuple[str, ...]         # token index -> text ("" for special tokens)
    bos_index: int
    eos_index: int
    pad_index: int
    special: frozenset[int]          # indices never written into text
    max_tokens: int
    frames_per_pixel: float | None
    mask_valid: float
    mask_padded: float
    encoder: EncoderSpec
    decoder_step: DecoderStepSpec | None
    decoder_full: DecoderFullSpec | None


@dataclass(frozen=True)
class Card:
    """A parsed, validated recogniser card."""

    name: str
    kind: str                        # "ctc" | "seq"
    description: str
    version: str
    path: Path                       # the card.toml
    folder: Path
    card_hash: str                   # sha256 over the card text and every file's sha256
    files: dict[str, Path]           # role -> file, e.g. {"model": ..., "alphabet": ...}
    file_hashes: dict[str, str]      # role -> sha256 hex
    input: InputSpec
    ctc: CtcSpec | None = None
    seq: SeqSpec | None = None
    variant: dict | None = None      # [variant]: provenance of a quantised copy (recognisers/variant.py)

    @property
    def symbols(self) -> tuple[str, ...]:
        return self.ctc.symbols if self.ctc else self.seq.symbols  # type: ignore[union-attr]


# --------------------------------------------------------------------------- helpers


def sha256_file(path: Path) -> str:
    """Hex sha256 of a file, read in 1 MiB chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


class _Table:
    """Typed access to one TOML table, with errors naming the card and the field."""

    def __init__(self, card: Path, data: dict, where: str):
        self.card, self.data, self.where = card, data, where
        self.used: set[str] = set()

    def _name(self, key: str) -> str:
        return f"{self.where}.{key}" if self.where else key

    def err(self, key: str | None, msg: str) -> CardError:
        at = f"field '{self._name(key)}'" if key else (f"table [{self.where}]" if self.where else "card")
        return CardError(self.card, f"{at}: {msg}")

    def has(self, key: str) -> bool:
        return key in self.data

    def get(self, key: str, typ: type | tuple, default: Any = ..., *, check=None) -> Any:
        self.used.add(key)
        if key not in self.data:
            if default is ...:
                raise self.err(key, "is required but missing")
            return default
        v = self.data[key]
        types = typ if isinstance(typ, tuple) else (typ,)
        if float in types and isinstance(v, int) and not isinstance(v, bool):
            v = float(v)
        if not isinstance(v, types) or (isinstance(v, bool) and bool not in types):
            names = " or ".join(t.__name__ for t in types)
            raise self.err(key, f"must be {names}, got {type(v).__name__} {v!r}")
        if check is not None:
            problem = check(v)
            if problem:
                raise self.err(key, problem)
        return v

    def str_list(self, key: str, default: Any = ...) -> tuple[str, ...]:
        v = self.get(key, (list, str), default)
        if isinstance(v, str):
            return (v,)
        if not v or not all(isinstance(s, str) and s for s in v):
            raise self.err(key, "must be a non-empty list of tensor names")
        return tuple(v)

    def table(self, key: str, required: bool = True) -> "_Table | None":
        self.used.add(key)
        if key not in self.data:
            if required:
                raise self.err(key, "table is required but missing")
            return None
        v = self.data[key]
        if not isinstance(v, dict):
            raise self.err(key, "must be a table")
        return _Table(self.card, v, self._name(key))

    def finish(self) -> None:
        """Reject fields the format does not know (a typo must not be ignored silently)."""
        unknown = sorted(set(self.data) - self.used)
        if unknown:
            k = unknown[0]
            close = difflib.get_close_matches(k, sorted(self.used), n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            raise self.err(k, f"is not a field of this table{hint}")


def _positive(v) -> str | None:
    return None if v > 0 else "must be greater than 0"


def _non_negative(v) -> str | None:
    return None if v >= 0 else "must be 0 or more"


def _read_graph(card: Path, role: str, path: Path) -> GraphInfo:
    import onnx

    try:
        m = onnx.load(str(path), load_external_data=False)
    except Exception as e:  # onnx raises DecodeError and friends
        raise CardError(path, f"{role}: not a readable ONNX model ({type(e).__name__}: {e})") from e
    init = {i.name for i in m.graph.initializer}

    def info(v) -> TensorInfo:
        tt = v.type.tensor_type
        shape = None
        if tt.HasField("shape"):
            shape = tuple((d.dim_value if d.HasField("dim_value") else (d.dim_param or None)) for d in tt.shape.dim)
        return TensorInfo(v.name, tt.elem_type, shape)

    opset = max((o.version for o in m.opset_import if o.domain in ("", "ai.onnx")), default=0)
    return GraphInfo(path, {v.name: info(v) for v in m.graph.input if v.name not in init},
                     {v.name: info(v) for v in m.graph.output}, opset)


def _need(card: Path, role: str, g: GraphInfo, name: str, *, output: bool, rank: int | tuple[int, ...] | None,
          key: str) -> TensorInfo:
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


def _read_symbols(card: Path, key: str, path: Path) -> list[str]:
    """A symbol file: one JSON string per line (UTF-8), line n = class/token index n-1."""
    try:
        raw = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError as e:
        raise CardError(path, f"{key}: not UTF-8 text (byte {e.start})") from e
    lines = raw.split("\n")
    if lines and lines[-1] == "":
        lines.pop()
    out = []
    for i, line in enumerate(lines, 1):
        line = line.rstrip("\r")
        try:
            s = json.loads(line)
        except json.JSONDecodeError as e:
            raise CardError(path, f"{key}: line {i} is not a JSON string ({e.msg}): {line[:40]!r}") from e
        if not isinstance(s, str):
            raise CardError(path, f"{key}: line {i} must be a JSON string, got {type(s).__name__}")
        out.append(s)
    if not out:
        raise CardError(path, f"{key}: the symbol file is empty")
    return out


def _check_input_image(card: Path, role: str, g: GraphInfo, name: str, key: str, spec: InputSpec) -> None:
    t = _need(card, role, g, name, output=False, rank=4, key=key)
    if t.rank is None:
        return
    c, h = t.static(1), t.static(2)
    if c is not None and c != 1:
        raise CardError(card, f"field '{key}': input '{name}' of {g.path.name} has {c} channels; "
                              "ocrbench feeds grey lines as (batch, 1, height, width)")
    if h is not None and h != spec.height:
        raise CardError(card, f"field 'input.height' is {spec.height} but input '{name}' of {g.path.name} "
                              f"wants height {h}")


def _layout(tab: _Table, key: str, default: str, letters: str, rank: int | None) -> str:
    def check(v: str) -> str | None:
        if len(set(v)) != len(v) or not set(letters) <= set(v):
            return f"must name each axis with one letter and contain {', '.join(letters)} (got {v!r})"
        if rank is not None and len(v) != rank:
            return f"has {len(v)} axes but the tensor has rank {rank}"
        return None
    v = tab.get(key, str, default, check=check)
    problem = check(v)
    if problem:
        raise tab.err(key, problem)
    return v


def _class_count(t: TensorInfo, axis: int) -> int | None:
    return t.static(axis) if t.shape is not None else None


# --------------------------------------------------------------------------- loader


def load_card(path: Path | str) -> Card:
    """Load and validate a recogniser card (``card.toml`` or the folder holding it).

    Checks that every file exists, that tensor names exist in the graphs with
    the expected ranks, and that the symbol table has exactly as many entries as
    the model scores (from the graph's static shape, else by one dry run with
    onnxruntime). Raises CardError naming the file and field on any problem.
    """
    p = Path(path)
    if p.is_dir():
        p = p / CARD_FILE
    if not p.exists():
        raise CardError(p, "recogniser card not found")
    try:
        text = p.read_bytes()
        data = tomllib.loads(text.decode("utf-8"))
    except UnicodeDecodeError as e:
        raise CardError(p, f"not UTF-8 text (byte {e.start})") from e
    except tomllib.TOMLDecodeError as e:
        raise CardError(p, f"not valid TOML: {e}") from e
    folder = p.parent.resolve()
    top = _Table(p, data, "")
    kind = top.get("kind", str)
    if kind not in KINDS:
        raise top.err("kind", f"unknown kind {kind!r}; use one of {', '.join(KINDS)}")
    name = top.get("name", str, folder.name, check=lambda v: None if v.strip() else "must not be empty")
    if any(c in name for c in "/\\:\0"):
        raise top.err("name", f"must not contain path separators: {name!r}")
    description = top.get("description", str, "")
    version = str(top.get("version", (str, int), "1"))

    itab = top.table("input", required=False)
    if itab is None:
        spec = InputSpec()
    else:
        d = InputSpec()
        spec = InputSpec(
            height=itab.get("height", int, d.height, check=_positive),
            width_multiple=itab.get("width_multiple", int, d.width_multiple, check=_positive),
            min_width=itab.get("min_width", int, d.min_width, check=_positive),
            max_width=itab.get("max_width", int, d.max_width, check=_positive),
            invert=itab.get("invert", bool, d.invert),
            scale=itab.get("scale", float, d.scale, check=lambda v: None if math.isfinite(v) and v != 0 else "must be a non-zero number"),
            mean=itab.get("mean", float, d.mean),
            std=itab.get("std", float, d.std, check=lambda v: None if v > 0 else "must be greater than 0"),
            split_gap=itab.get("split_gap", float, d.split_gap, check=lambda v: None if v >= 0 else "must be 0 (off) or more"),
        )
        if spec.min_width > spec.max_width:
            raise itab.err("min_width", f"{spec.min_width} is larger than max_width {spec.max_width}")
        itab.finish()

    files: dict[str, Path] = {}

    def file_of(tab: _Table, key: str, role: str) -> Path:
        rel = tab.get(key, str)
        f = (folder / rel).resolve()
        if not f.is_file():
            raise CardError(p, f"field '{tab._name(key)}': file not found: {f}")
        files[role] = f
        return f

    ctc = seq = None
    if kind == "ctc":
        if top.has("seq"):
            raise top.err("seq", "a ctc card has no [seq] table")
        ctc = _load_ctc(p, top.table("ctc"), spec, file_of)
    else:
        if top.has("ctc"):
            raise top.err("ctc", "a seq card has no [ctc] table")
        seq = _load_seq(p, top.table("seq"), spec, file_of)
    variant = _load_variant(top.table("variant", required=False))
    top.finish()

    hashes = {role: sha256_file(f) for role, f in files.items()}
    h = hashlib.sha256(text)
    for role in sorted(hashes):
        h.update(f"\n{role}={hashes[role]}".encode())
    return Card(name=name, kind=kind, description=description, version=version, path=p.resolve(),
                folder=folder, card_hash=h.hexdigest(), files=files, file_hashes=hashes, input=spec,
                ctc=ctc, seq=seq, variant=variant)


#: [variant] fields (written by recognisers/variant.py, documented in models/README.md) -> type
VARIANT_FIELDS = {"source_name": str, "source_card_hash": str, "source_card": str, "method": str,
                  "operators": list, "tool": str, "onnxruntime": str, "calibration_lines": int}


def _load_variant(t: _Table | None) -> dict | None:
    if t is None:
        return None
    out = {k: t.get(k, typ, None) for k, typ in VARIANT_FIELDS.items()}
    t.get("source_card_hash", str)  # required: what the copy was made from
    t.finish()
    return out


def _load_ctc(p: Path, t: _Table, spec: InputSpec, file_of) -> CtcSpec:
    model = file_of(t, "model", "model")
    g = _read_graph(p, "ctc", model)
    inp = t.get("input", str, "image")
    out = t.get("output", str, "logits")
    layout = t.get("layout", str, "BTC",
                   check=lambda v: None if v in CTC_LAYOUTS else f"must be one of {', '.join(CTC_LAYOUTS)}")
    is_log = t.get("output_is_log_probs", bool, False)
    fpp = t.get("frames_per_pixel", float, None, check=_positive)
    blank = t.get("blank_index", int, 0, check=_non_negative)
    sym_path = file_of(t, "alphabet", "alphabet")
    t.finish()
    _check_input_image(p, "ctc", g, inp, "ctc.input", spec)
    ot = _need(p, "ctc", g, out, output=True, rank=3, key="ctc.output")
    symbols = _read_symbols(p, "ctc.alphabet", sym_path)
    if blank >= len(symbols):
        raise t.err("blank_index", f"{blank} is outside the alphabet ({len(symbols)} entries)")
    n_out = _class_count(ot, 2)
    if n_out is None:
        n_out = _dry_run_classes(p, model, {inp: "image"}, out, spec, axis=2)
    if n_out != len(symbols):
        raise CardError(p, f"field 'ctc.alphabet': {sym_path.name} has {len(symbols)} entries (blank included) "
                           f"but the model scores {n_out} classes per frame")
    syms = list(symbols)
    syms[blank] = ""
    return CtcSpec(model=model, input=inp, output=out, layout=layout, output_is_log_probs=is_log,
                   frames_per_pixel=fpp, blank_index=blank, symbols=tuple(syms), graph=g)


def _load_seq(p: Path, t: _Table, spec: InputSpec, file_of) -> SeqSpec:
    sym_path = file_of(t, "vocab", "vocab")
    symbols = _read_symbols(p, "seq.vocab", sym_path)
    n = len(symbols)

    def index(key: str, default) -> int:
        return t.get(key, int, default, check=lambda v: None if 0 <= v < n else f"{v} is outside the vocabulary ({n} entries)")

    bos = index("bos_index", ...)
    eos = index("eos_index", ...)
    pad = index("pad_index", eos)
    extra = t.get("special_indices", list, [])
    if not all(isinstance(i, int) and 0 <= i < n for i in extra):
        raise t.err("special_indices", f"must be a list of indices inside the vocabulary ({n} entries)")
    if bos == eos:
        raise t.err("eos_index", "must differ from bos_index")
    max_tokens = t.get("max_tokens", int, 256, check=_positive)
    fpp = t.get("frames_per_pixel", float, None, check=_positive)
    mask_valid = t.get("memory_mask_valid", float, DEFAULT_MASK_VALID)
    mask_padded = t.get("memory_mask_padded", float, DEFAULT_MASK_PADDED)

    et = t.table("encoder")
    emodel = file_of(et, "model", "encoder")
    eg = _read_graph(p, "encoder", emodel)
    einp = et.get("input", str, "image")
    eouts = et.str_list("outputs")
    _check_input_image(p, "encoder", eg, einp, "seq.encoder.input", spec)
    ranks = set()
    for i, o in enumerate(eouts):
        ranks.add(_need(p, "encoder", eg, o, output=True, rank=None, key="seq.encoder.outputs").rank)
    rank = next(iter(ranks)) if len(ranks) == 1 else None
    elayout = _layout(et, "layout", "BTD", "BT", rank)
    et.finish()
    enc = EncoderSpec(model=emodel, input=einp, outputs=eouts, layout=elayout, graph=eg)

    step_spec = full_spec = None
    st = t.table("decoder_step", required=False)
    if st is not None:
        smodel = file_of(st, "model", "decoder_step")
        sg = _read_graph(p, "decoder_step", smodel)
        tok = st.get("tokens", str, "tokens")
        step = st.get("step", str, None) or None
        past = st.str_list("past")
        present = st.str_list("present")
        memory = st.str_list("memory", tuple(eouts))
        mmask = st.get("memory_mask", str, None) or None
        lp = st.get("log_probs", str, "log_probs")
        if len(past) != len(present):
            raise st.err("present", f"lists {len(present)} tensors but 'past' lists {len(past)}; they pair by position")
        if len(memory) != len(eouts):
            raise st.err("memory", f"lists {len(memory)} tensors but the encoder gives {len(eouts)}; they pair by position")
        _need(p, "decoder_step", sg, tok, output=False, rank=2, key="seq.decoder_step.tokens")
        if step:
            _need(p, "decoder_step", sg, step, output=False, rank=(0, 1), key="seq.decoder_step.step")
        prank = {_need(p, "decoder_step", sg, x, output=False, rank=None, key="seq.decoder_step.past").rank for x in past}
        cl = _layout(st, "cache_layout", ..., "BT", next(iter(prank)) if len(prank) == 1 else None)
        for x in past:
            ti = sg.inputs[x]
            if ti.shape is not None:
                free = [a for a, d in enumerate(ti.shape) if a not in (cl.index("B"), cl.index("T"))
                        and not (isinstance(d, int) and d > 0)]
                if free:
                    raise st.err("past", f"input '{x}' of {smodel.name} must have fixed sizes on every axis but "
                                         f"batch and positions (cache_layout {cl!r}); axis {free[0]} is free")
        for x in present:
            _need(p, "decoder_step", sg, x, output=True, rank=len(cl), key="seq.decoder_step.present")
        for x in memory:
            _need(p, "decoder_step", sg, x, output=False, rank=rank, key="seq.decoder_step.memory")
        if mmask:
            _need(p, "decoder_step", sg, mmask, output=False, rank=2, key="seq.decoder_step.memory_mask")
        lpt = _need(p, "decoder_step", sg, lp, output=True, rank=2, key="seq.decoder_step.log_probs")
        st.finish()
        _check_vocab(p, sym_path, n, lpt, "decoder_step")
        step_spec = DecoderStepSpec(model=smodel, tokens=tok, step=step, past=past, present=present, memory=memory,
                                    memory_mask=mmask, log_probs=lp, cache_layout=cl, graph=sg)
    ft = t.table("decoder_full", required=False)
    if ft is not None:
        fmodel = file_of(ft, "model", "decoder_full")
        fg = _read_graph(p, "decoder_full", fmodel)
        tok = ft.get("tokens", str, "tokens")
        memory = ft.str_list("memory", tuple(eouts))
        mmask = ft.get("memory_mask", str, None) or None
        lp = ft.get("log_probs", str, "log_probs")
        if len(memory) != len(eouts):
            raise ft.err("memory", f"lists {len(memory)} tensors but the encoder gives {len(eouts)}; they pair by position")
        _need(p, "decoder_full", fg, tok, output=False, rank=2, key="seq.decoder_full.tokens")
        for x in memory:
            _need(p, "decoder_full", fg, x, output=False, rank=rank, key="seq.decoder_full.memory")
        if mmask:
            _need(p, "decoder_full", fg, mmask, output=False, rank=2, key="seq.decoder_full.memory_mask")
        lpt = _need(p, "decoder_full", fg, lp, output=True, rank=2, key="seq.decoder_full.log_probs")
        ft.finish()
        _check_vocab(p, sym_path, n, lpt, "decoder_full")
        full_spec = DecoderFullSpec(model=fmodel, tokens=tok, memory=memory, memory_mask=mmask, log_probs=lp, graph=fg)
    if step_spec is None and full_spec is None:
        raise t.err(None, "needs a [seq.decoder_step] table (cached decoder), a [seq.decoder_full] table "
                          "(uncached decoder), or both")
    t.finish()
    special = frozenset({bos, eos, pad, *extra})
    syms = [("" if i in special else s) for i, s in enumerate(symbols)]
    return SeqSpec(symbols=tuple(syms), bos_index=bos, eos_index=eos, pad_index=pad, special=special,
                   max_tokens=max_tokens, frames_per_pixel=fpp, mask_valid=mask_valid, mask_padded=mask_padded,
                   encoder=enc, decoder_step=step_spec, decoder_full=full_spec)


def _check_vocab(p: Path, sym_path: Path, n: int, lpt: TensorInfo, role: str) -> None:
    n_out = _class_count(lpt, 1)
    if n_out is not None and n_out != n:
        raise CardError(p, f"field 'seq.vocab': {sym_path.name} has {n} entries but {role} scores {n_out} tokens")
    # A free vocabulary axis is checked by the recogniser's warm-up run (see seq.SeqRecogniser).


def _dry_run_classes(p: Path, model: Path, feeds: dict[str, str], out: str, spec: InputSpec, axis: int) -> int:
    """Run the model once on a blank line to learn the size of a free output axis."""
    import numpy as np
    import onnxruntime as ort

    w = max(spec.min_width, 8 * spec.width_multiple)
    img = np.zeros((1, 1, spec.height, w), np.float32)
    try:
        sess = ort.InferenceSession(str(model), providers=["CPUExecutionProvider"])
        y = sess.run([out], {name: img for name in feeds})[0]
    except Exception as e:
        raise CardError(model, f"dry run on a blank line failed: {type(e).__name__}: {e}") from e
    return int(y.shape[axis])
