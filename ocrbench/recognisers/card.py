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

import hashlib
import json
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ocrbench.errors import CardError, ConfigError
from ocrbench.io.files import sha256_file
from ocrbench.io.config import Key, check_table
from ocrbench.recognisers.draft import generation_warnings
from ocrbench.recognisers.graphs import (FLOAT32, INT_TYPES, MASK_TYPES, GraphInfo, TensorInfo, class_count,
                                        need_dtype, need_tensor, read_graph)
from ocrbench.recognisers.repeat import RepeatGuard
from ocrbench.recognisers.preprocess import FILTERS, LAYOUTS, RESIZE_MODES, InputSpec, make_batch, resize_line

CARD_FILE = "card.toml"
KINDS = ("ctc", "seq")
CTC_LAYOUTS = ("BTC", "TBC")
OUTPUT_KINDS = ("logits", "log_probs", "probs")
DEFAULT_MASK_VALID = 0.0
DEFAULT_MASK_PADDED = -1e9

# --------------------------------------------------------------------------- data


@dataclass(frozen=True)
class CtcSpec:
    """The ``[ctc]`` table: one graph from image to per-frame class scores."""

    model: Path
    input: str
    output: str
    layout: str                      # "BTC" or "TBC"
    output_kind: str                 # "logits" | "log_probs" | "probs"
    frames_per_pixel: float | None   # valid frames = ceil(width * this); None: proportional to the padded width
    blank_index: int
    symbols: tuple[str, ...]         # class index -> text ("" for the blank)
    graph: GraphInfo = field(repr=False, compare=False)

    @property
    def output_is_log_probs(self) -> bool:
        return self.output_kind == "log_probs"


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
    log_probs: str                   # the scores output (log-probabilities, or logits when scores_are_logits)
    cache_layout: str
    graph: GraphInfo = field(repr=False, compare=False)
    scores_are_logits: bool = False
    static_past: tuple[str, ...] = ()        # inputs fed once per line (cross-attention keys/values)
    static_present: tuple[str, ...] = ()     # outputs giving them at step 0 (merged graph)
    use_cache_branch: str | None = None      # merged graph: boolean input, false at step 0, true after

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
    scores_are_logits: bool = False


@dataclass(frozen=True)
class DecoderFirstSpec:
    """The graph of the first decoder step (no cache in): its outputs start the cache and the static inputs."""

    model: Path
    tokens: str
    memory: tuple[str, ...]
    memory_mask: str | None
    log_probs: str
    present: tuple[str, ...]                 # -> decoder_step.past, by position
    static_present: tuple[str, ...]          # -> decoder_step.static_past, by position
    graph: GraphInfo = field(repr=False, compare=False)
    scores_are_logits: bool = False


@dataclass(frozen=True)
class JointCtcSpec:
    """The ``[seq.ctc]`` table: a CTC output of the encoder whose prefix scores steer decoding (recognisers/joint.py)."""

    output: str                      # an output of the encoder graph: per-frame class scores
    layout: str                      # "BTC" or "TBC"
    output_kind: str                 # "logits" | "log_probs" | "probs"
    blank_index: int
    symbols: tuple[str, ...]         # class index -> text ("" for the blank)
    token_class: tuple[int, ...]     # decoder token -> CTC class (-1: none)
    weight: float                    # share of the CTC prefix score in the joint score (0: attention only)


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
    decoder_first: DecoderFirstSpec | None = None
    tokenizer: Path | None = None            # a tokenizer.json decoding whole sequences (else ``symbols``)
    vocab_size: int = 0                      # entries of the symbol table or tokenizer
    repeat: RepeatGuard = RepeatGuard()      # the repetition guard (recognisers/repeat.py)
    ctc: JointCtcSpec | None = None          # joint decoding with the encoder's CTC scores (recognisers/joint.py)


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
    warnings: tuple[str, ...] = ()   # settings beside the model that ocrbench does not apply (shown, not fatal)

    @property
    def symbols(self) -> tuple[str, ...]:
        return self.ctc.symbols if self.ctc else self.seq.symbols  # type: ignore[union-attr]



# --------------------------------------------------------------------------- schemas
#
# The typed pass (names, types, ranges, unknown keys with the nearest valid name)
# goes through ocrbench.io.config.check_table; the checks against the ONNX graphs
# and the symbol files follow in the loaders below.


def _str(default: Any = None, *, required: bool = False, **kw) -> Key:
    return Key((str,), default, required=required, **kw)


def _pos_int(default: int) -> Key:
    return Key((int,), default, low=1)


def _names(default: Any = None, *, required: bool = False) -> Key:
    """A tensor name or a list of them."""
    return Key((list, str), default, required=required, items=(str,))


def _layout_key(default: Any, letters: str) -> Key:
    def check(v: str) -> str | None:
        if len(set(v)) != len(v) or not set(letters) <= set(v):
            return f"must name each axis with one letter and contain {', '.join(letters)} (got {v!r})"
        return None
    return Key((str,), default, required=default is None, check=check)


def _channel_values(positive: bool):
    def check(v) -> str | None:
        vals = v if isinstance(v, list) else [v]
        if not vals:
            return "must be a number or a non-empty list of numbers (one per channel)"
        if positive and any(x <= 0 for x in vals):
            return "must be greater than 0 (every channel)"
        return None
    return check


_D = InputSpec()
INPUT_SCHEMA = {
    "height": _pos_int(_D.height),
    "width_multiple": _pos_int(_D.width_multiple),
    "min_width": _pos_int(_D.min_width),
    "max_width": _pos_int(_D.max_width),
    "invert": Key((bool,), _D.invert),
    "scale": Key((float,), _D.scale, check=lambda v: None if v != 0 else "must be a non-zero number"),
    "mean": Key((float, list), _D.mean, items=(float,), check=_channel_values(False)),
    "std": Key((float, list), _D.std, items=(float,), low=0, low_open=True, check=_channel_values(True)),
    "split_gap": Key((float,), _D.split_gap, low=0),
    "channels": Key((int,), _D.channels, choices=(1, 3)),
    "layout": _str(_D.layout, choices=LAYOUTS),
    "width": Key((int,), None, low=1),
    "resize": _str(_D.resize, choices=RESIZE_MODES),
    "filter": _str(_D.filter, choices=tuple(FILTERS)),
    "flatten": Key((bool,), _D.flatten),
    "remove_rules": Key((bool,), _D.remove_rules),
    "trim": Key((bool,), _D.trim),
}
TOP_SCHEMA = {
    "name": _str(),
    "kind": _str(required=True),
    "description": _str(""),
    "version": Key((str, int), "1"),
    "input": INPUT_SCHEMA,
    "ctc": Key((dict,)),
    "seq": Key((dict,)),
    "variant": Key((dict,)),
}
#: [variant]: written by recognisers/variant.py (documented in models/README.md); source_card_hash is required.
VARIANT_SCHEMA = {
    "source_name": Key((str,)), "source_card_hash": Key((str,), required=True), "source_card": Key((str,)),
    "method": Key((str,)), "operators": Key((list,), items=(str,)), "tool": Key((str,)),
    "onnxruntime": Key((str,)), "calibration_lines": Key((int,), low=0),
}
CTC_SCHEMA = {
    "model": _str(required=True),
    "input": _str("image"),
    "output": _str("logits"),
    "layout": _str("BTC", choices=CTC_LAYOUTS),
    "output_kind": _str(None, choices=OUTPUT_KINDS),
    "output_is_log_probs": Key((bool,), None),
    "frames_per_pixel": Key((float,), None, low=0, low_open=True),
    "blank_index": Key((int,), 0, low=0),
    "alphabet": _str(required=True),
}
SEQ_SCHEMA = {
    "vocab": _str(),
    "tokenizer": _str(),
    "bos_index": Key((int,), required=True, low=0),
    "eos_index": Key((int,), required=True, low=0),
    "pad_index": Key((int,), None, low=0),
    "special_indices": Key((list,), [], items=(int,)),
    "max_tokens": _pos_int(256),
    "frames_per_pixel": Key((float,), None, low=0, low_open=True),
    "memory_mask_valid": Key((float,), DEFAULT_MASK_VALID),
    "memory_mask_padded": Key((float,), DEFAULT_MASK_PADDED),
    # the repetition guard: defaults and their reasons in recognisers/repeat.py and models/README.md
    "repeat_guard": Key((bool,), RepeatGuard.enabled),
    "repeat_max_ngram": Key((int,), RepeatGuard.max_ngram, low=1, high=64),
    "repeat_min_copies": Key((int,), RepeatGuard.min_copies, low=2),
    "repeat_min_tokens": Key((int,), RepeatGuard.min_tokens, low=2),
    "repeat_min_filler_tokens": Key((int,), RepeatGuard.min_filler_tokens, low=2),
    "encoder": {
        "model": _str(required=True),
        "input": _str("image"),
        "outputs": _names(required=True),
        "layout": _layout_key("BTD", "BT"),
    },
    "decoder_step": Key((dict,)),
    "decoder_full": Key((dict,)),
    "decoder_first": Key((dict,)),
    "ctc": Key((dict,)),
}
JOINT_SCHEMA = {
    "output": _str(required=True),
    "layout": _str("BTC", choices=CTC_LAYOUTS),
    "output_kind": _str("log_probs", choices=OUTPUT_KINDS),
    "alphabet": _str(required=True),
    "blank_index": Key((int,), 0, low=0),
    "weight": Key((float,), 0.5, low=0, high=0.99),
}
_SCORES = {"log_probs": _str(), "logits": _str()}
STEP_SCHEMA = {
    "model": _str(required=True),
    "tokens": _str("tokens"),
    "step": _str(""),
    "past": _names(required=True),
    "present": _names(required=True),
    "memory": _names(),
    "memory_mask": _str(""),
    **_SCORES,
    "cache_layout": _layout_key(None, "BT"),
    "static_past": _names(()),
    "static_present": _names(()),
    "use_cache_branch": _str(""),
}
FULL_SCHEMA = {
    "model": _str(required=True),
    "tokens": _str("tokens"),
    "memory": _names(),
    "memory_mask": _str(""),
    **_SCORES,
}
FIRST_SCHEMA = {**FULL_SCHEMA, "present": _names(required=True), "static_present": _names(())}


def checked(p: Path, doc: dict, schema: dict, prefix: str = "") -> dict:
    """``doc`` through the typed-table check, its ConfigError turned into a CardError naming the card."""
    try:
        return check_table(doc, schema, source=p, prefix=prefix)
    except CardError:
        raise
    except ConfigError as e:
        raise CardError(p, e.reason) from e


def _names_of(p: Path, v: Any, key: str) -> tuple[str, ...]:
    names = (v,) if isinstance(v, str) else tuple(v)
    if not names or not all(names):
        raise CardError(p, f"field '{key}': must be a non-empty list of tensor names")
    return names


# --------------------------------------------------------------------------- helpers




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
            raise CardError(path, f"{key}: line {i} is not a JSON string ({e.msg} at column {e.colno})") from e
        if not isinstance(s, str):
            raise CardError(path, f"{key}: line {i} must be a JSON string, got {type(s).__name__}")
        out.append(s)
    if not out:
        raise CardError(path, f"{key}: the symbol file is empty")
    return out


def _check_input_image(card: Path, role: str, g: GraphInfo, name: str, key: str, spec: InputSpec) -> None:
    """The image input: rank 4, float32, and every fixed axis equal to what the card's [input] makes."""
    t = need_tensor(card, role, g, name, output=False, rank=4, key=key)
    need_dtype(card, g, t, FLOAT32, key, "ocrbench feeds line images as")
    if t.rank is None:
        return
    axes = {"channels": 1, "height": 2, "width": 3} if spec.layout == "NCHW" else {"height": 1, "width": 2, "channels": 3}
    where = f"input '{name}' of {g.path.name} (shape {list(t.shape)}, read as {spec.layout})"
    c, h, w = (t.static(axes[k]) for k in ("channels", "height", "width"))
    if c is not None and c != spec.channels:
        hint = "; is input.layout right?" if c not in (1, 3) else ""
        raise CardError(card, f"field 'input.channels' is {spec.channels} but {where} has {c} channels{hint}")
    if h is not None and h != spec.height:
        raise CardError(card, f"field 'input.height' is {spec.height} but {where} wants height {h}")
    if w is not None and spec.width is None:
        raise CardError(card, f"field 'input.width' is not set but {where} has a fixed width of {w}: "
                              f"set input.width = {w}")
    if w is not None and w != spec.width:
        raise CardError(card, f"field 'input.width' is {spec.width} but {where} wants width {w}")


def _check_rank(p: Path, key: str, layout: str, rank: int | None) -> str:
    if rank is not None and len(layout) != rank:
        raise CardError(p, f"field '{key}': has {len(layout)} axes but the tensor has rank {rank}")
    return layout


class _Files:
    """The files a card names, resolved against its folder, with the role each plays (hashed together).

    A path must stay inside the card's folder once resolved (``..``, absolute paths and symbolic links
    included): the card format says paths are relative to the card's folder, and a card must not make
    ocrbench read elsewhere unless the user allowed it (``allow_outside``).
    """

    def __init__(self, card: Path, folder: Path, allow_outside: bool):
        self.card, self.folder, self.allow_outside = card, folder, allow_outside
        self.paths: dict[str, Path] = {}

    def __call__(self, rel: str, key: str, role: str) -> Path:
        f = (self.folder / rel).resolve()
        if not self.allow_outside and not f.is_relative_to(self.folder):
            raise CardError(self.card, f"field '{key}': {rel!r} leads outside the card's folder {self.folder} "
                                       "(paths are relative to the card's folder; allow other places explicitly "
                                       "with --allow-outside-paths)")
        if not f.is_file():
            raise CardError(self.card, f"field '{key}': file not found: {f}")
        self.paths[role] = f
        return f

    def external(self, g: GraphInfo, key: str, role: str) -> None:
        """Add a model's external data files (resolved beside the model, ONNX external data format)."""
        for loc in g.external:
            f = (g.path.parent / loc).resolve()
            if not self.allow_outside and not f.is_relative_to(self.folder):
                raise CardError(self.card, f"field '{key}': {g.path.name} keeps weights in {loc!r}, outside the "
                                           f"card's folder {self.folder}")
            if not f.is_file():
                raise CardError(self.card, f"field '{key}': {g.path.name} keeps weights in {loc!r}, "
                                           f"which is not there ({f})")
            self.paths[f"{role}:{loc}"] = f

    def graph(self, rel: str, key: str, role: str) -> GraphInfo:
        """Read the model a field names; its external data files become part of the card's files."""
        g = read_graph(self.card, role, self(rel, key, role))
        self.external(g, key, role)
        return g


#: Card names become folder and file names of outputs: letters and digits (any script), then also
#: space ``_ - . + ( )``; no path separators, no control characters, not ``.`` or ``..``.
NAME_PATTERN = re.compile(r"[^\W_](?:[\w .+()-]{0,79})", re.UNICODE)


def check_name(p: Path, name: str) -> str:
    if not NAME_PATTERN.fullmatch(name) or name != name.strip():
        raise CardError(p, f"field 'name': {name!r} is not a safe name (start with a letter or digit, then "
                           "letters, digits, space, _ - . + ( ); at most 80 characters)")
    return name


# --------------------------------------------------------------------------- loader


def _read_card(p: Path) -> tuple[bytes, dict]:
    if not p.exists():
        raise CardError(p, "recogniser card not found")
    try:
        text = p.read_bytes()
        return text, tomllib.loads(text.decode("utf-8"))
    except UnicodeDecodeError as e:
        raise CardError(p, f"not UTF-8 text (byte {e.start})") from e
    except tomllib.TOMLDecodeError as e:
        raise CardError(p, f"not valid TOML: {e}") from e


def _input_spec(p: Path, t: dict) -> InputSpec:
    t = dict(t)
    for key in ("mean", "std"):
        if isinstance(t[key], list):
            if len(t[key]) not in (1, t["channels"]):
                raise CardError(p, f"field 'input.{key}': has {len(t[key])} values but input.channels is "
                                   f"{t['channels']} (give one value, or one per channel)")
            t[key] = tuple(float(x) for x in t[key]) if len(t[key]) > 1 else float(t[key][0])
    spec = InputSpec(**t)
    if spec.min_width > spec.max_width:
        raise CardError(p, f"field 'input.min_width': {spec.min_width} is larger than max_width {spec.max_width}")
    if spec.resize == "stretch" and spec.width is None:
        raise CardError(p, "field 'input.resize': \"stretch\" needs a fixed input.width")
    return spec


def _card_hash(text: bytes, hashes: dict[str, str]) -> str:
    """sha256 over the card's text and, role by role, each file's sha256."""
    h = hashlib.sha256(text)
    for role in sorted(hashes):
        h.update(f"\n{role}={hashes[role]}".encode())
    return h.hexdigest()


def card_hash_on_disk(card: Card) -> str:
    """The hash of ``card``'s files as they are now on this machine, without validating the card again.

    For a process that was handed a card validated elsewhere (a Dask worker): the card text and every
    file it names are hashed as :func:`load_card` hashes them, so a changed or different copy shows as a
    different hash, but the graphs are not inspected (no ``onnx`` import, some 0.7 s in a fresh process).
    Raises CardError when a file is missing or unreadable.
    """
    try:
        text = card.path.read_bytes()
        hashes = {role: sha256_file(f) for role, f in card.files.items()}
    except OSError as e:
        raise CardError(Path(e.filename or card.path), f"cannot read it: {e.strerror or e}") from e
    return _card_hash(text, hashes)


def load_card(path: Path | str, *, allow_outside: bool = False) -> Card:
    """Load and validate a recogniser card (``card.toml`` or the folder holding it).

    Checks that every file exists, that tensor names exist in the graphs with
    the expected ranks, and that the symbol table has exactly as many entries as
    the model scores (from the graph's static shape, else by one dry run with
    onnxruntime). Raises CardError naming the file and field on any problem.
    ``allow_outside``: let file paths lead outside the card's folder.
    """
    p = Path(path)
    if p.is_dir():
        p = p / CARD_FILE
    text, data = _read_card(p)
    folder = p.parent.resolve()
    if "kind" in data and isinstance(data["kind"], str) and data["kind"] not in KINDS:
        raise CardError(p, f"field 'kind': unknown kind {data['kind']!r}; use one of {', '.join(KINDS)}")
    top = checked(p, data, TOP_SCHEMA)
    kind = top["kind"]
    name = check_name(p, top["name"] if top["name"] is not None else folder.name)
    spec = _input_spec(p, top["input"])
    files = _Files(p, folder, allow_outside)
    other = "seq" if kind == "ctc" else "ctc"
    if top[other] is not None:
        raise CardError(p, f"table [{other}]: a {kind} card has no [{other}] table")
    if top[kind] is None:
        raise CardError(p, f"field '{kind}': table is required but missing")
    ctc = _load_ctc(p, checked(p, top["ctc"], CTC_SCHEMA, "ctc."), spec, files) if kind == "ctc" else None
    seq = _load_seq(p, top["seq"], spec, files) if kind == "seq" else None
    hashes = {role: sha256_file(f) for role, f in files.paths.items()}
    warnings = tuple(generation_warnings(folder)) if kind == "seq" else ()
    return Card(name=name, kind=kind, description=top["description"], version=str(top["version"]),
                path=p.resolve(), folder=folder, card_hash=_card_hash(text, hashes), files=files.paths,
                file_hashes=hashes,
                input=spec, ctc=ctc, seq=seq, warnings=warnings,
                variant=None if top["variant"] is None else checked(p, top["variant"], VARIANT_SCHEMA, "variant."))


def _load_ctc(p: Path, t: dict, spec: InputSpec, files: _Files) -> CtcSpec:
    g = files.graph(t["model"], "ctc.model", "model")
    model = g.path
    inp, out, blank = t["input"], t["output"], t["blank_index"]
    sym_path = files(t["alphabet"], "ctc.alphabet", "alphabet")
    _check_input_image(p, "ctc", g, inp, "ctc.input", spec)
    ot = need_tensor(p, "ctc", g, out, output=True, rank=3, key="ctc.output")
    symbols = _read_symbols(p, "ctc.alphabet", sym_path)
    if blank >= len(symbols):
        raise CardError(p, f"field 'ctc.blank_index': {blank} is outside the alphabet ({len(symbols)} entries)")
    n_out = class_count(ot, 2)
    if n_out is None:
        n_out = _dry_run_classes(p, model, {inp: "image"}, out, spec, axis=2)
    if n_out != len(symbols):
        raise CardError(p, f"field 'ctc.alphabet': {sym_path.name} has {len(symbols)} entries (blank included) "
                           f"but the model scores {n_out} classes per frame")
    syms = list(symbols)
    syms[blank] = ""
    kind, is_log = t["output_kind"], t["output_is_log_probs"]
    if kind is not None and is_log is not None and (kind == "log_probs") != is_log:
        raise CardError(p, f"field 'ctc.output_is_log_probs': {str(is_log).lower()} contradicts ctc.output_kind "
                           f"{kind!r} (give output_kind alone)")
    kind = kind or ("log_probs" if is_log else "logits")
    return CtcSpec(model=model, input=inp, output=out, layout=t["layout"], output_kind=kind,
                   frames_per_pixel=t["frames_per_pixel"], blank_index=blank, symbols=tuple(syms), graph=g)


def _vocabulary(p: Path, t: dict, files: _Files) -> tuple[tuple[str, ...], Path, Path | None, frozenset[int]]:
    """(token texts, the file, the tokenizer file or None, the tokenizer's special ids) of ``vocab``/``tokenizer``."""
    if (t["vocab"] is None) == (t["tokenizer"] is None):
        raise CardError(p, "table [seq]: give either 'vocab' (a symbol table) or 'tokenizer' (a tokenizer.json), "
                           "not both" if t["vocab"] else "table [seq]: 'vocab' or 'tokenizer' is required")
    if t["vocab"] is not None:
        path = files(t["vocab"], "seq.vocab", "vocab")
        return tuple(_read_symbols(p, "seq.vocab", path)), path, None, frozenset()
    from ocrbench.recognisers.tokens import TokenizerFile

    path = files(t["tokenizer"], "seq.tokenizer", "tokenizer")
    tok = TokenizerFile(path, p)
    return tuple(tok.token(i) or "" for i in range(len(tok))), path, path, tok.special


def _load_seq(p: Path, raw: dict, spec: InputSpec, files: _Files) -> SeqSpec:
    t = checked(p, raw, SEQ_SCHEMA, "seq.")
    symbols, sym_path, tokenizer, tok_special = _vocabulary(p, t, files)
    n = len(symbols)
    for key in ("bos_index", "eos_index", "pad_index"):
        if t[key] is not None and t[key] >= n:
            raise CardError(p, f"field 'seq.{key}': {t[key]} is outside the vocabulary ({n} entries)")
    bos, eos = t["bos_index"], t["eos_index"]       # bos == eos is a common decoder-start convention
    pad = eos if t["pad_index"] is None else t["pad_index"]
    extra = t["special_indices"]
    if not all(0 <= i < n for i in extra):
        raise CardError(p, f"field 'seq.special_indices': must be a list of indices inside the vocabulary ({n} entries)")
    enc, rank = _load_encoder(p, t["encoder"], spec, files)
    decs: dict[str, Any] = {}
    for role, schema, loader in (("decoder_step", STEP_SCHEMA, _load_step), ("decoder_first", FIRST_SCHEMA, _load_first),
                                 ("decoder_full", FULL_SCHEMA, _load_full)):
        if t[role] is not None:
            decs[role] = loader(p, checked(p, t[role], schema, f"seq.{role}."), enc, rank, files)
            _check_vocab(p, sym_path, n, decs[role].graph.outputs[decs[role].log_probs], role, tokenizer is not None)
    step, first, full = decs.get("decoder_step"), decs.get("decoder_first"), decs.get("decoder_full")
    if step is None and full is None:
        raise CardError(p, "table [seq]: needs a [seq.decoder_step] table (cached decoder), a [seq.decoder_full] "
                           "table (uncached decoder), or both")
    _check_first_and_static(p, step, first)
    special = frozenset({bos, eos, pad, *extra, *tok_special})
    syms = [("" if i in special else s) for i, s in enumerate(symbols)]
    joint = (_load_joint(p, checked(p, t["ctc"], JOINT_SCHEMA, "seq.ctc."), enc, syms, files)
             if t["ctc"] is not None else None)
    return SeqSpec(symbols=tuple(syms), bos_index=bos, eos_index=eos, pad_index=pad, special=special,
                   max_tokens=t["max_tokens"], frames_per_pixel=t["frames_per_pixel"],
                   mask_valid=t["memory_mask_valid"], mask_padded=t["memory_mask_padded"], encoder=enc,
                   decoder_step=step, decoder_full=full, decoder_first=first, tokenizer=tokenizer, vocab_size=n,
                   repeat=RepeatGuard(t["repeat_guard"], t["repeat_max_ngram"], t["repeat_min_copies"],
                                      t["repeat_min_tokens"], t["repeat_min_filler_tokens"]), ctc=joint)


def token_classes(token_texts: list[str] | tuple[str, ...], class_texts: list[str] | tuple[str, ...],
                  blank: int) -> "np.ndarray":
    """The CTC class of each decoder token, matched by text (-1 where none: special tokens, or text the
    CTC alphabet lacks). Here, not in recognisers/joint.py, so that loading a card imports no engine."""
    import numpy as np

    index = {t: i for i, t in enumerate(class_texts) if i != blank and t}
    return np.array([index.get(t, -1) if t else -1 for t in token_texts], dtype=np.int64)


def _load_joint(p: Path, t: dict, enc: EncoderSpec, token_texts: list[str], files: _Files) -> JointCtcSpec:
    """``[seq.ctc]``: the encoder output exists with rank 3, the alphabet has as many entries as it scores
    classes (when the graph fixes that axis; else the warm-up checks it), and every text token of the
    vocabulary is one class of the alphabet (joint decoding cannot score a token the CTC output lacks)."""
    if t["output"] in enc.outputs:
        raise CardError(p, f"field 'seq.ctc.output': '{t['output']}' is one of seq.encoder.outputs (the decoder's "
                           "memory); name the encoder's CTC scores output")
    ot = need_tensor(p, "encoder", enc.graph, t["output"], output=True, rank=3, key="seq.ctc.output")
    sym_path = files(t["alphabet"], "seq.ctc.alphabet", "ctc_alphabet")
    symbols = _read_symbols(p, "seq.ctc.alphabet", sym_path)
    blank = t["blank_index"]
    if blank >= len(symbols):
        raise CardError(p, f"field 'seq.ctc.blank_index': {blank} is outside the alphabet ({len(symbols)} entries)")
    n_out = class_count(ot, 2)
    if n_out is not None and n_out != len(symbols):
        raise CardError(p, f"field 'seq.ctc.alphabet': {sym_path.name} has {len(symbols)} entries (blank included) "
                           f"but output '{t['output']}' scores {n_out} classes per frame")
    syms = list(symbols)
    syms[blank] = ""
    tc = token_classes(token_texts, syms, blank)
    missing = [s for s, c in zip(token_texts, tc) if s and c < 0]
    if missing:
        raise CardError(p, f"field 'seq.ctc.alphabet': {len(missing)} token(s) of the vocabulary are not entries of "
                           f"{sym_path.name} (joint decoding scores tokens of one CTC class each)")
    return JointCtcSpec(output=t["output"], layout=t["layout"], output_kind=t["output_kind"], blank_index=blank,
                        symbols=tuple(syms), token_class=tuple(int(c) for c in tc), weight=float(t["weight"]))


def _check_first_and_static(p: Path, step: DecoderStepSpec | None, first: DecoderFirstSpec | None) -> None:
    """The first-step graph and the static inputs must pair up with the step graph, by position."""
    if first is not None:
        if step is None:
            raise CardError(p, "table [seq.decoder_first]: needs a [seq.decoder_step] table to continue from")
        if step.use_cache_branch:
            raise CardError(p, "table [seq.decoder_first]: not with seq.decoder_step.use_cache_branch (a merged "
                               "graph makes its own first step)")
        if len(first.present) != len(step.past):
            raise CardError(p, f"field 'seq.decoder_first.present': lists {len(first.present)} tensors but "
                               f"seq.decoder_step.past lists {len(step.past)}; they pair by position")
        if len(first.static_present) != len(step.static_past):
            raise CardError(p, f"field 'seq.decoder_first.static_present': lists {len(first.static_present)} "
                               f"tensors but seq.decoder_step.static_past lists {len(step.static_past)}")
    elif step is not None and step.static_past:
        if not step.use_cache_branch:
            raise CardError(p, "field 'seq.decoder_step.static_past': needs a [seq.decoder_first] graph or "
                               "seq.decoder_step.use_cache_branch to compute them at the first step")
        if len(step.static_present) != len(step.static_past):
            raise CardError(p, f"field 'seq.decoder_step.static_present': lists {len(step.static_present)} tensors "
                               f"but static_past lists {len(step.static_past)}; they pair by position")


def _load_encoder(p: Path, et: dict, spec: InputSpec, files: _Files) -> tuple[EncoderSpec, int | None]:
    eg = files.graph(et["model"], "seq.encoder.model", "encoder")
    emodel = eg.path
    einp = et["input"]
    eouts = _names_of(p, et["outputs"], "seq.encoder.outputs")
    _check_input_image(p, "encoder", eg, einp, "seq.encoder.input", spec)
    ranks = {need_tensor(p, "encoder", eg, o, output=True, rank=None, key="seq.encoder.outputs").rank for o in eouts}
    rank = next(iter(ranks)) if len(ranks) == 1 else None
    elayout = _check_rank(p, "seq.encoder.layout", et["layout"], rank)
    return EncoderSpec(model=emodel, input=einp, outputs=eouts, layout=elayout, graph=eg), rank


def _memory_inputs(p: Path, role: str, g: GraphInfo, t: dict, enc: EncoderSpec, rank: int | None,
                   ) -> tuple[tuple[str, ...], str | None]:
    """The decoder inputs fed with the encoder's outputs (``memory = []``: none, e.g. a decoder that reads
    cross-attention keys/values from static inputs instead) and the memory mask."""
    if t["memory"] is None:
        memory = enc.outputs
    elif t["memory"] == [] or t["memory"] == ():
        memory = ()
    else:
        memory = _names_of(p, t["memory"], f"seq.{role}.memory")
    if memory and len(memory) != len(enc.outputs):
        raise CardError(p, f"field 'seq.{role}.memory': lists {len(memory)} tensors but the encoder gives "
                           f"{len(enc.outputs)}; they pair by position")
    for x in memory:
        need_tensor(p, role, g, x, output=False, rank=rank, key=f"seq.{role}.memory")
    mmask = t["memory_mask"] or None
    if mmask:
        tm = need_tensor(p, role, g, mmask, output=False, rank=2, key=f"seq.{role}.memory_mask")
        need_dtype(p, g, tm, MASK_TYPES, f"seq.{role}.memory_mask", "the memory mask is fed as")
    return memory, mmask


def _scores(p: Path, role: str, g: GraphInfo, t: dict) -> tuple[str, bool]:
    """The scores output: ``log_probs`` (log-probabilities) or ``logits`` (ocrbench applies log-softmax),
    rank 2 (rows, vocabulary) or 3 (rows, positions, vocabulary: the last position is read)."""
    if t["log_probs"] and t["logits"]:
        raise CardError(p, f"table [seq.{role}]: give 'log_probs' or 'logits', not both")
    name, logits = (t["logits"], True) if t["logits"] else (t["log_probs"] or "log_probs", False)
    need_tensor(p, role, g, name, output=True, rank=(2, 3), key=f"seq.{role}.{'logits' if logits else 'log_probs'}")
    return name, logits


def _tokens_input(p: Path, role: str, g: GraphInfo, name: str) -> None:
    tt = need_tensor(p, role, g, name, output=False, rank=2, key=f"seq.{role}.tokens")
    need_dtype(p, g, tt, INT_TYPES, f"seq.{role}.tokens", "token ids are fed as")


def _outputs(p: Path, role: str, g: GraphInfo, t: dict, key: str, rank: int | None) -> tuple[str, ...]:
    names = () if t[key] in ((), []) else _names_of(p, t[key], f"seq.{role}.{key}")
    for x in names:
        need_tensor(p, role, g, x, output=True, rank=rank, key=f"seq.{role}.{key}")
    return names


def _load_step(p: Path, st: dict, enc: EncoderSpec, rank: int | None, files: _Files) -> DecoderStepSpec:
    sg = files.graph(st["model"], "seq.decoder_step.model", "decoder_step")
    tok, step = st["tokens"], st["step"] or None
    past = _names_of(p, st["past"], "seq.decoder_step.past")
    present = _names_of(p, st["present"], "seq.decoder_step.present")
    if len(past) != len(present):
        raise CardError(p, f"field 'seq.decoder_step.present': lists {len(present)} tensors but 'past' lists "
                           f"{len(past)}; they pair by position")
    memory, mmask = _memory_inputs(p, "decoder_step", sg, st, enc, rank)
    _tokens_input(p, "decoder_step", sg, tok)
    if step:
        ts = need_tensor(p, "decoder_step", sg, step, output=False, rank=(0, 1), key="seq.decoder_step.step")
        need_dtype(p, sg, ts, INT_TYPES, "seq.decoder_step.step", "the step is fed as")
    static = () if st["static_past"] in ((), []) else _names_of(p, st["static_past"], "seq.decoder_step.static_past")
    prank = {need_tensor(p, "decoder_step", sg, x, output=False, rank=None, key="seq.decoder_step.past").rank
             for x in past}
    cl = _check_rank(p, "seq.decoder_step.cache_layout", st["cache_layout"],
                     next(iter(prank)) if len(prank) == 1 else None)
    for key, names in (("past", past), ("static_past", static)):
        for x in names:
            ti = need_tensor(p, "decoder_step", sg, x, output=False, rank=len(cl), key=f"seq.decoder_step.{key}")
            free = [a for a, d in enumerate(ti.shape or ()) if a not in (cl.index("B"), cl.index("T"))
                    and not (isinstance(d, int) and d > 0)]
            if free:
                raise CardError(p, f"field 'seq.decoder_step.{key}': input '{x}' of {sg.path.name} must have fixed "
                                   f"sizes on every axis but batch and positions (cache_layout {cl!r}); "
                                   f"axis {free[0]} is free")
    present = _outputs(p, "decoder_step", sg, st, "present", len(cl))
    static_present = _outputs(p, "decoder_step", sg, st, "static_present", len(cl))
    ucb = st["use_cache_branch"] or None
    if ucb:
        tb = need_tensor(p, "decoder_step", sg, ucb, output=False, rank=(0, 1), key="seq.decoder_step.use_cache_branch")
        need_dtype(p, sg, tb, (9,), "seq.decoder_step.use_cache_branch", "the branch flag is fed as")
    scores, logits = _scores(p, "decoder_step", sg, st)
    return DecoderStepSpec(model=sg.path, tokens=tok, step=step, past=past, present=present, memory=memory,
                           memory_mask=mmask, log_probs=scores, cache_layout=cl, graph=sg, scores_are_logits=logits,
                           static_past=static, static_present=static_present, use_cache_branch=ucb)


def _load_first(p: Path, ft: dict, enc: EncoderSpec, rank: int | None, files: _Files) -> DecoderFirstSpec:
    fg = files.graph(ft["model"], "seq.decoder_first.model", "decoder_first")
    memory, mmask = _memory_inputs(p, "decoder_first", fg, ft, enc, rank)
    _tokens_input(p, "decoder_first", fg, ft["tokens"])
    scores, logits = _scores(p, "decoder_first", fg, ft)
    present = _outputs(p, "decoder_first", fg, ft, "present", None)
    static_present = _outputs(p, "decoder_first", fg, ft, "static_present", None)
    return DecoderFirstSpec(model=fg.path, tokens=ft["tokens"], memory=memory, memory_mask=mmask, log_probs=scores,
                            present=present, static_present=static_present, graph=fg, scores_are_logits=logits)


def _load_full(p: Path, ft: dict, enc: EncoderSpec, rank: int | None, files: _Files) -> DecoderFullSpec:
    fg = files.graph(ft["model"], "seq.decoder_full.model", "decoder_full")
    memory, mmask = _memory_inputs(p, "decoder_full", fg, ft, enc, rank)
    _tokens_input(p, "decoder_full", fg, ft["tokens"])
    scores, logits = _scores(p, "decoder_full", fg, ft)
    return DecoderFullSpec(model=fg.path, tokens=ft["tokens"], memory=memory, memory_mask=mmask,
                           log_probs=scores, graph=fg, scores_are_logits=logits)


def _check_vocab(p: Path, sym_path: Path, n: int, lpt: TensorInfo, role: str, tokenizer: bool) -> None:
    n_out = class_count(lpt, (lpt.rank or 2) - 1)
    if n_out is None:
        return  # a free vocabulary axis is checked by the recogniser's warm-up run (see seq.SeqRecogniser)
    if n_out != n and not (tokenizer and n_out > n):
        raise CardError(p, f"field 'seq.{'tokenizer' if tokenizer else 'vocab'}': {sym_path.name} has {n} entries "
                           f"but {role} scores {n_out} tokens")


def _dry_run_classes(p: Path, model: Path, feeds: dict[str, str], out: str, spec: InputSpec, axis: int) -> int:
    """Run the model once on a blank line to learn the size of a free output axis."""
    import numpy as np
    import onnxruntime as ort

    w = max(spec.min_width, 8 * spec.width_multiple)
    img = make_batch([resize_line(np.full((spec.height, w), 255, np.uint8), spec)], spec)[0]
    try:
        sess = ort.InferenceSession(str(model), providers=["CPUExecutionProvider"])
        y = sess.run([out], {name: img for name in feeds})[0]
    except Exception as e:
        raise CardError(model, f"dry run on a blank line failed: {type(e).__name__}: {first_line(e)}") from e
    return int(y.shape[axis])


def first_line(e: BaseException, limit: int = 300) -> str:
    """The first line of an exception's message, cut to ``limit`` characters (onnxruntime's run a page)."""
    text = str(e).strip().splitlines()
    return (text[0] if text else "")[:limit]
