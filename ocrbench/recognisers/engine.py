"""The engine side of a recogniser: run options, onnxruntime sessions, per-batch timing records.

Every field of :class:`EngineOptions` is recorded with a run; :class:`BatchTiming`
is the one shape of per-batch figures both kinds report, so the planner can fit
one cost model over both.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Callable, Sequence

import numpy as np

from ocrbench.errors import CardError, OcrbenchError

Clock = Callable[[], float]

GRAPH_LEVELS = ("disable", "basic", "extended", "all")
DECODINGS = ("greedy", "beam")
BATCH_MODES = ("drop", "mask")


@dataclass(frozen=True)
class EngineOptions:
    """How to run a recogniser. Every field is recorded with the run.

    ``batch_mode`` (seq greedy only): ``"drop"`` removes a line from the decoder
    batch as soon as it emits its end token; ``"mask"`` keeps it in and ignores
    its outputs. ``encoder_per_line`` (seq): encode each line alone so its memory
    does not depend on the padding of its batch (see ``SeqRecogniser.encode``).
    ``ctc_prune``: in CTC beam search, classes whose posterior is below this are
    not tried at a frame (0 tries every class). ``ctc_weight`` (seq cards with a
    ``[seq.ctc]`` output): the CTC prefix scores' share in joint decoding, in
    place of the card's ``seq.ctc.weight``; 0 decodes with the decoder alone.
    ``draft`` (seq greedy, joint decoding, a ``decoder_full`` graph that scores
    every position): the CTC head's best path is a draft that the decoder checks in
    one pass over all its positions; the decoder steps on from a line's first
    disagreement with a new pass (same text as token-by-token greedy; fewer decoder
    calls). False decodes token by token.
    """

    intra_threads: int = 1
    inter_threads: int = 1
    graph_optimisation: str = "all"
    providers: tuple[str, ...] = ("CPUExecutionProvider",)
    batch_size: int = 16
    decoding: str = "greedy"
    beam_width: int = 8
    use_cache: bool = True
    max_tokens: int | None = None
    batch_mode: str = "drop"
    encoder_per_line: bool = True
    max_pad_ratio: float = 1.3
    ctc_prune: float = 1e-3
    ctc_weight: float | None = None
    draft: bool = True
    allow_cpu_fallback: bool = False
    provider_options: tuple[tuple[str, str], ...] = ()   # (key, value) for the first requested provider

    def __post_init__(self) -> None:
        if self.graph_optimisation not in GRAPH_LEVELS:
            raise OcrbenchError(f"graph optimisation must be one of {', '.join(GRAPH_LEVELS)}, "
                                f"not {self.graph_optimisation!r}")
        if self.decoding not in DECODINGS:
            raise OcrbenchError(f"decoding must be one of {', '.join(DECODINGS)}, not {self.decoding!r}")
        if self.batch_mode not in BATCH_MODES:
            raise OcrbenchError(f"batch mode must be one of {', '.join(BATCH_MODES)}, not {self.batch_mode!r}")
        for name in ("intra_threads", "inter_threads", "batch_size", "beam_width"):
            if getattr(self, name) < (0 if name.endswith("threads") else 1):
                raise OcrbenchError(f"{name.replace('_', ' ')} must be at least 1, not {getattr(self, name)}")
        if self.ctc_weight is not None and not 0.0 <= self.ctc_weight < 1.0:
            raise OcrbenchError(f"CTC weight must be at least 0 and below 1, not {self.ctc_weight}")
        if self.max_tokens is not None and self.max_tokens < 1:
            raise OcrbenchError(f"max tokens must be at least 1, not {self.max_tokens}")
        if self.max_pad_ratio < 1.0:
            raise OcrbenchError(f"max pad ratio must be at least 1, not {self.max_pad_ratio}")
        object.__setattr__(self, "providers", tuple(self.providers))
        object.__setattr__(self, "provider_options", tuple((str(k), str(v)) for k, v in self.provider_options))

    def to_dict(self) -> dict:
        d = asdict(self)
        d["providers"] = list(self.providers)
        d["provider_options"] = dict(self.provider_options)
        return d


class ProviderError(OcrbenchError):
    """An execution provider was asked for that this onnxruntime does not know or does not have."""


def parse_provider_options(items: Sequence[str]) -> tuple[tuple[str, str], ...]:
    """``key=value`` strings (``--provider-option``) as pairs; a malformed one is a ProviderError."""
    out = []
    for item in items:
        key, sep, value = item.partition("=")
        if not sep or not key.strip():
            raise ProviderError(f"provider option {item!r} is not key=value")
        out.append((key.strip(), value.strip()))
    return tuple(out)


@dataclass
class BatchTiming:
    """Sizes and stage times of one model batch (seconds)."""

    batch_no: int
    n_lines: int
    padded_width: int
    sum_width: int
    frames: int                      # frames of the padded batch (CTC output / encoder memory)
    steps_max: int                   # decoder iterations (seq) or frames (CTC)
    tokens_sum: int
    tokens_sq_sum: int
    t_preprocess: float = 0.0
    t_encode: float = 0.0            # CTC model run, or seq encoder run
    t_steps: float = 0.0             # seq decoder session runs
    t_collapse: float = 0.0          # CTC collapse/beam; seq bookkeeping between decoder runs


def _graph_level(name: str):
    import onnxruntime as ort

    return {
        "disable": ort.GraphOptimizationLevel.ORT_DISABLE_ALL,
        "basic": ort.GraphOptimizationLevel.ORT_ENABLE_BASIC,
        "extended": ort.GraphOptimizationLevel.ORT_ENABLE_EXTENDED,
        "all": ort.GraphOptimizationLevel.ORT_ENABLE_ALL,
    }[name]


def resolve_providers(requested: Sequence[str], allow_cpu_fallback: bool = False) -> tuple[list[str], list[str]]:
    """(providers to use, warnings): the requested execution providers this onnxruntime has, then CPU.

    A name onnxruntime does not know (a misspelling) is always a ProviderError naming the nearest known
    one. A known provider this installation lacks is a ProviderError too, unless ``allow_cpu_fallback``:
    then it is skipped with a warning, and the run goes on without it.
    """
    import difflib

    import onnxruntime as ort

    known, have = list(ort.get_all_providers()), set(ort.get_available_providers())
    out, warnings = [], []
    for p in requested:
        if p not in known:
            close = difflib.get_close_matches(p, known, n=1)
            hint = f" (did you mean {close[0]}?)" if close else f"; known: {', '.join(known)}"
            raise ProviderError(f"execution provider {p!r} is not one onnxruntime knows{hint}")
        if p not in have:
            msg = (f"execution provider {p} is not installed in this onnxruntime "
                   f"(installed: {', '.join(sorted(have))})")
            if not allow_cpu_fallback:
                raise ProviderError(msg + "; pass --allow-cpu-fallback to run without it")
            warnings.append(msg + "; running without it")
        elif p != "CPUExecutionProvider" and p not in out:
            out.append(p)
    return out + ["CPUExecutionProvider"], warnings


def make_session(path, options: EngineOptions, role: str):
    """An onnxruntime session for one model file with the options' threads and optimisation level."""
    import onnxruntime as ort

    so = ort.SessionOptions()
    so.intra_op_num_threads = options.intra_threads
    so.inter_op_num_threads = options.inter_threads
    so.graph_optimization_level = _graph_level(options.graph_optimisation)
    so.log_severity_level = 3
    providers, _ = resolve_providers(options.providers, options.allow_cpu_fallback)
    if options.provider_options:   # they belong to the first requested provider (when it is there)
        first = options.providers[0] if options.providers else "CPUExecutionProvider"
        providers = [(p, dict(options.provider_options)) if p == first else p for p in providers]
    try:
        return ort.InferenceSession(str(path), so, providers=providers)
    except Exception as e:  # onnxruntime raises its own Fail/InvalidGraph types
        text = str(e).strip().splitlines()
        raise CardError(path, f"{role}: onnxruntime cannot load it ({type(e).__name__}: "
                              f"{(text[0] if text else '')[:300]})") from e


def onnx_dtype(elem_type: int, default=np.float32):
    """numpy dtype of an ONNX element type (the few a recogniser interface uses)."""
    return {1: np.float32, 6: np.int32, 7: np.int64, 9: np.bool_, 10: np.float16, 11: np.float64}.get(elem_type, default)


def share_time(total: float, weights: Sequence[float]) -> list[float]:
    """Split ``total`` in proportion to ``weights`` (equal shares when all weights are 0)."""
    s = float(sum(weights))
    if s <= 0:
        return [total / max(1, len(weights))] * len(weights)
    return [total * w / s for w in weights]
