"""What every recogniser shares: engine options, results, per-batch timings, sessions.

A recogniser turns a list of grey line crops into text. Both kinds prepare
lines the same way (resize to the card height, sort by width, cut into batches
of similar width so little is padded) and report the same per-batch timings,
so the planner can fit one cost model over both.
"""

from __future__ import annotations

import time
from dataclasses import asdict, dataclass, field
from typing import Callable, Sequence

import numpy as np

from ocrbench.errors import CardError, OcrbenchError
from ocrbench.recognisers.card import Card
from ocrbench.pages.segment import split_at_gaps
from ocrbench.recognisers.preprocess import InputSpec, make_batch, resize_line, width_batches

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
    not tried at a frame (0 tries every class).
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
        if self.max_tokens is not None and self.max_tokens < 1:
            raise OcrbenchError(f"max tokens must be at least 1, not {self.max_tokens}")
        if self.max_pad_ratio < 1.0:
            raise OcrbenchError(f"max pad ratio must be at least 1, not {self.max_pad_ratio}")
        object.__setattr__(self, "providers", tuple(self.providers))

    def to_dict(self) -> dict:
        d = asdict(self)
        d["providers"] = list(self.providers)
        return d


@dataclass
class LineResult:
    """One recognised line.

    ``confidence`` is the geometric mean of the probabilities of the decisions
    that made the line (CTC: the best-path frame posteriors over the line's
    frames; seq: the chosen tokens, end token included), so 1 means every
    decision was certain. ``steps``: seq = decoder steps (tokens + end token);
    CTC = the line's frames.
    """

    text: str
    confidence: float
    char_confidences: list[float]
    steps: int
    width_px: int
    batch_no: int
    tokens: int = 0                  # emitted symbols (CTC: characters after collapse)
    truncated: bool = False          # seq: stopped by the max-tokens guard
    t_line: float = 0.0              # the line's share of its batch's model + decode time


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


@dataclass
class PreparedBatch:
    """A batch ready for the model: the tensor, the lines it holds and their widths."""

    batch_no: int
    indices: list[int]
    tensor: np.ndarray               # (B, 1, H, W) float32
    widths: np.ndarray               # resized width of each line before padding
    t_preprocess: float


def _graph_level(name: str):
    import onnxruntime as ort

    return {
        "disable": ort.GraphOptimizationLevel.ORT_DISABLE_ALL,
        "basic": ort.GraphOptimizationLevel.ORT_ENABLE_BASIC,
        "extended": ort.GraphOptimizationLevel.ORT_ENABLE_EXTENDED,
        "all": ort.GraphOptimizationLevel.ORT_ENABLE_ALL,
    }[name]


def resolve_providers(requested: Sequence[str]) -> list[str]:
    """The requested execution providers that this onnxruntime has, then CPU as the fallback."""
    import onnxruntime as ort

    have = set(ort.get_available_providers())
    out = [p for p in requested if p in have and p != "CPUExecutionProvider"]
    return out + ["CPUExecutionProvider"]


def make_session(path, options: EngineOptions, role: str):
    """An onnxruntime session for one model file with the options' threads and optimisation level."""
    import onnxruntime as ort

    so = ort.SessionOptions()
    so.intra_op_num_threads = options.intra_threads
    so.inter_op_num_threads = options.inter_threads
    so.graph_optimization_level = _graph_level(options.graph_optimisation)
    so.log_severity_level = 3
    try:
        return ort.InferenceSession(str(path), so, providers=resolve_providers(options.providers))
    except Exception as e:  # onnxruntime raises its own Fail/InvalidGraph types
        raise CardError(path, f"{role}: onnxruntime cannot load it ({type(e).__name__}: {e})") from e


def onnx_dtype(elem_type: int, default=np.float32):
    """numpy dtype of an ONNX element type (the few a recogniser interface uses)."""
    return {1: np.float32, 6: np.int32, 7: np.int64, 9: np.bool_, 10: np.float16, 11: np.float64}.get(elem_type, default)


def valid_frames(widths: np.ndarray, padded_width: int, frames: int, frames_per_pixel: float | None) -> np.ndarray:
    """Frames of each line that hold the line (the rest stem from padding)."""
    w = np.asarray(widths, dtype=np.float64)
    if frames_per_pixel is None:
        v = np.ceil(w * frames / max(1, padded_width))
    else:
        v = np.ceil(w * frames_per_pixel - 1e-9)
    return np.clip(v.astype(np.int64), 1, frames)


class Recogniser:
    """Base class: preprocessing and batching shared by both kinds."""

    card: Card
    options: EngineOptions

    def __init__(self, card: Card, options: EngineOptions):
        self.card = card
        self.options = options

    @property
    def spec(self) -> InputSpec:
        return self.card.input

    @property
    def providers(self) -> list[str]:
        """The execution providers the sessions actually use."""
        return list(self._sessions()[0].get_providers())

    def _sessions(self) -> list:
        raise NotImplementedError

    def prepare(self, crops: Sequence[np.ndarray], *, clock: Clock = time.perf_counter) -> list[PreparedBatch]:
        """Resize every crop, group by width, and stack each group into a padded tensor."""
        spec = self.spec
        resized, t_resize = [], []
        for i, c in enumerate(crops):
            t0 = clock()
            try:
                resized.append(resize_line(np.asarray(c), spec))
            except ValueError as e:
                raise ValueError(f"line {i + 1}: {e}") from e
            t_resize.append(clock() - t0)
        groups = width_batches([r.shape[1] for r in resized], self.options.batch_size, self.options.max_pad_ratio)
        out = []
        for b, idx in enumerate(groups):
            t0 = clock()
            tensor, widths = make_batch([resized[i] for i in idx], spec)
            t = clock() - t0 + sum(t_resize[i] for i in idx)
            out.append(PreparedBatch(b, idx, tensor, widths, t))
        return out

    def recognise(self, crops: Sequence[np.ndarray], *,
                  clock: Clock = time.perf_counter) -> tuple[list[LineResult], list[BatchTiming]]:
        """Recognise line crops (uint8 grey, ink dark). Results come back in the crops' order.

        With the card's ``split_gap`` set, each line is cut at wide blank gaps, the
        pieces are recognised as lines of their own and joined with one space.
        """
        if self.spec.split_gap > 0:
            return self._recognise_split(crops, clock=clock)
        return self._recognise_whole(crops, clock=clock)

    def _recognise_split(self, crops, *, clock):
        pieces, owner = [], []
        for i, c in enumerate(crops):
            g = np.asarray(c)
            for a, b in split_at_gaps(g, self.spec.split_gap) if g.ndim == 2 and g.size else [(0, g.shape[-1] if g.ndim else 0)]:
                pieces.append(g[:, a:b] if g.ndim == 2 else g)
                owner.append(i)
        part_results, timings = self._recognise_whole(pieces, clock=clock)
        merged: list[LineResult | None] = [None] * len(crops)
        groups: dict[int, list[LineResult]] = {}
        for i, r in zip(owner, part_results):
            groups.setdefault(i, []).append(r)
        for i, rs in groups.items():
            if len(rs) == 1:
                merged[i] = rs[0]
                continue
            kept = [r for r in rs if r.text.strip()] or rs[:1]
            text = " ".join(r.text.strip() for r in kept)
            chars: list[float] = []
            for k, r in enumerate(kept):
                if k:
                    chars.append(1.0)
                chars.extend(r.char_confidences[: len(r.text)])
            steps = sum(r.steps for r in rs)
            # geometric mean over every decision of every piece
            logc = sum(r.steps * float(np.log(max(r.confidence, 1e-12))) for r in rs)
            merged[i] = LineResult(text=text, confidence=float(np.exp(logc / max(1, steps))),
                                   char_confidences=chars, steps=steps,
                                   width_px=sum(r.width_px for r in rs), batch_no=rs[0].batch_no,
                                   tokens=sum(r.tokens for r in rs), truncated=any(r.truncated for r in rs),
                                   t_line=sum(r.t_line for r in rs))
        return merged, timings  # type: ignore[return-value]

    def _recognise_whole(self, crops, *, clock):
        results: list[LineResult | None] = [None] * len(crops)
        timings = []
        for pb in self.prepare(crops, clock=clock):
            lines, timing = self.run_batch(pb, clock=clock)
            for i, r in zip(pb.indices, lines):
                results[i] = r
            timings.append(timing)
        return results, timings  # type: ignore[return-value]

    def run_batch(self, pb: PreparedBatch, *, clock: Clock = time.perf_counter) -> tuple[list[LineResult], BatchTiming]:
        raise NotImplementedError

    def warm_up(self) -> None:
        """Run the models once on blank lines so first-call costs stay out of the timings."""
        raise NotImplementedError


#: Warm-up lines are this many line heights wide (about the widest ledger line seen on the demo pages).
WARM_UP_WIDTH_HEIGHTS = 48


def warm_up_lines(spec: InputSpec, batch_size: int) -> list[np.ndarray]:
    """Blank lines for a warm-up batch as large as real ones (``batch_size`` lines, capped at 32, wide).

    onnxruntime plans and allocates memory for a shape when it first sees it; a
    warm-up on one small line left that cost to the first real batches (measured:
    the first demo page's model time per pixel 25-30 % above the others'), and so
    to every short calibration. Warming up on a full-size batch moves it out of
    the timings.
    """
    w = max(spec.min_width, min(spec.max_width, WARM_UP_WIDTH_HEIGHTS * spec.height))
    return [np.full((spec.height, w), 255, np.uint8)] * max(1, min(32, batch_size))


def share_time(total: float, weights: Sequence[float]) -> list[float]:
    """Split ``total`` in proportion to ``weights`` (equal shares when all weights are 0)."""
    s = float(sum(weights))
    if s <= 0:
        return [total / max(1, len(weights))] * len(weights)
    return [total * w / s for w in weights]


