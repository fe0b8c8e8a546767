"""What every recogniser shares: the line result and the base class (batching, gap splitting, recognise).

A recogniser turns a list of grey line crops into text. Both kinds prepare
lines the same way (resize to the card height, sort by width, cut into batches
of similar width so little is padded: ``batching``) and report the same
per-batch timings (``engine.BatchTiming``), so the planner can fit one cost
model over both. Engine options and sessions live in ``engine``; this module
re-exports the names callers use with a recogniser.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ocrbench.recognisers.batching import PreparedBatch, prepare_batches, valid_frames, warm_up_lines
from ocrbench.recognisers.card import Card
from ocrbench.recognisers.engine import (BATCH_MODES, DECODINGS, GRAPH_LEVELS, BatchTiming, Clock, EngineOptions,
                                         make_session, onnx_dtype, resolve_providers, share_time)
from ocrbench.pages.crops import clean_crop
from ocrbench.pages.segment import cut_overwide, split_at_gaps
from ocrbench.recognisers.preprocess import InputSpec

__all__ = ["BATCH_MODES", "DECODINGS", "GRAPH_LEVELS", "BatchTiming", "Clock", "EngineOptions", "LineResult",
           "NONFINITE", "PreparedBatch", "REPEATED_NGRAM", "TOKEN_LIMIT", "Recogniser", "nonfinite_failure", "make_session", "onnx_dtype", "resolve_providers", "share_time",
           "valid_frames", "warm_up_lines"]

@dataclass
class LineResult:
    """One recognised line.

    ``confidence`` is the geometric mean of the probabilities of the decisions
    that made the line (CTC: the best-path frame posteriors over the line's
    frames; seq: the chosen tokens, end token included), so 1 means every
    decision was certain; a line cut by the max-tokens or the repetition guard
    (``truncated``, why in ``cut_by``) or failed (``failure``) has confidence 0,
    so it never reads as certain and heads any queue ordered by confidence.
    ``steps``: seq = decoder steps (tokens + end token; a line cut by the
    repetition guard also counts the steps of the copy it dropped); CTC = the
    line's frames.
    """

    text: str
    confidence: float
    char_confidences: list[float]
    steps: int
    width_px: int
    batch_no: int
    tokens: int = 0                  # emitted symbols (CTC: characters after collapse)
    truncated: bool = False          # seq: stopped by a guard (its text is incomplete); which one: ``cut_by``
    t_line: float = 0.0              # the line's share of its batch's model + decode time
    failure: str | None = None       # set when the line could not be read (e.g. NaN model output); text is ""
    cut_by: str | None = None        # a truncated line: TOKEN_LIMIT or REPEATED_NGRAM

    @property
    def failed(self) -> bool:
        return self.failure is not None


#: Why a truncated line was cut (``LineResult.cut_by``): the max-tokens guard, or the repetition guard
#: (the line kept repeating one n-gram; see recognisers/repeat.py).
TOKEN_LIMIT = "token limit"
REPEATED_NGRAM = "repeated n-gram"

#: The reason given for lines whose model scores hold NaN or +/-Inf.
NONFINITE = "the model's scores for this line hold NaN or infinite values"


def nonfinite_failure(log_probs: np.ndarray) -> str | None:
    """:data:`NONFINITE` when a line's (steps, classes) log-probabilities cannot be decoded, else None.

    NaN anywhere, or a step whose best score is not finite (+Inf, or every class at -Inf), makes the line
    unreadable; -Inf for some classes is a legitimate log-probability of 0.
    """
    if log_probs.size == 0:
        return None
    if np.isnan(log_probs).any() or not np.isfinite(log_probs.max(axis=-1)).all():
        return NONFINITE
    return None


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
    def provider_warnings(self) -> list[str]:
        """Requested execution providers this onnxruntime lacks (only when the CPU fallback was allowed)."""
        return resolve_providers(self.options.providers, self.options.allow_cpu_fallback)[1]

    @property
    def providers(self) -> list[str]:
        """The execution providers the sessions actually use."""
        return list(self._sessions()[0].get_providers())

    def _sessions(self) -> list:
        raise NotImplementedError

    def prepare(self, crops: Sequence[np.ndarray], *, clock: Clock = time.perf_counter,
                spent: Sequence[float] | None = None) -> list[PreparedBatch]:
        """Clean and resize every crop, group by width, and stack each group into a padded tensor
        (``spent``: :func:`~ocrbench.recognisers.batching.prepare_batches`)."""
        return prepare_batches(crops, self.spec, self.options.batch_size, self.options.max_pad_ratio, clock=clock,
                               spent=spent)

    def recognise(self, crops: Sequence[np.ndarray], *,
                  clock: Clock = time.perf_counter) -> tuple[list[LineResult], list[BatchTiming]]:
        """Recognise line crops (uint8 grey, ink dark). Results come back in the crops' order.

        With the card's ``split_gap`` set, each line is cut at wide blank gaps, the
        pieces are recognised as lines of their own and joined with one space (with the card's ``trim``, the
        whole line is cleaned and trimmed first, so every piece keeps the line's height). A
        line wider than the card's ``max_width`` once scaled to its height (cards
        without a fixed ``width``) is cut the same way
        (:func:`~ocrbench.pages.segment.cut_overwide`: at blank gaps, else at the
        column with least ink) instead of being squeezed; pieces cut where there
        was no gap are joined without a space.
        """
        spent = None
        if self.spec.trim:
            crops, spent = self._cleaned(crops, clock)
        spans = [self._spans(np.asarray(c)) for c in crops]
        if self.spec.split_gap > 0 or any(len(sp) > 1 for sp in spans):
            return self._recognise_split(crops, spans, clock=clock, spent=spent)
        return self._recognise_whole(crops, clock=clock, spent=spent)

    def _cleaned(self, crops, clock) -> tuple[list, list[float]]:
        """Every crop cleaned as the card says (:func:`~ocrbench.pages.crops.clean_crop`) and the seconds each took."""
        out, spent = [], []
        sp = self.spec
        for c in crops:
            t0 = clock()
            g = np.asarray(c)
            out.append(clean_crop(g, flatten=sp.flatten, remove_rules=sp.remove_rules, trim=sp.trim)
                       if g.ndim == 2 and g.size else g)
            spent.append(clock() - t0)
        return out, spent

    def _spans(self, g: np.ndarray) -> list[tuple[int, int]]:
        """Column spans of the pieces a crop is read in: one (the whole crop) unless split or over-wide."""
        if g.ndim != 2 or not g.size:
            return [(0, g.shape[-1] if g.ndim else 0)]
        spans = split_at_gaps(g, self.spec.split_gap) if self.spec.split_gap > 0 else [(0, g.shape[1])]
        if self.spec.width is None and g.shape[1] * self.spec.height > self.spec.max_width * g.shape[0]:
            max_aspect = self.spec.max_width / self.spec.height
            spans = [(a + c, a + d) for a, b in spans for c, d in cut_overwide(g[:, a:b], max_aspect)]
        return spans

    def _recognise_split(self, crops, spans, *, clock, spent=None):
        pieces, owner, glue, piece_spent = [], [], [], []
        for i, (c, sp) in enumerate(zip(crops, spans)):
            g = np.asarray(c)
            for k, (a, b) in enumerate(sp):
                pieces.append(g[:, a:b] if g.ndim == 2 else g)
                owner.append(i)
                # a cut where there was no gap (cut_overwide's last resort) leaves adjacent spans: no space
                glue.append("" if k and sp[k - 1][1] == a else " ")
                piece_spent.append(spent[i] if spent is not None and k == 0 else 0.0)
        part_results, timings = self._recognise_whole(pieces, clock=clock,
                                                      spent=piece_spent if spent is not None else None)
        merged: list[LineResult | None] = [None] * len(crops)
        groups: dict[int, list[tuple[LineResult, str]]] = {}
        for i, r, j in zip(owner, part_results, glue):
            groups.setdefault(i, []).append((r, j))
        for i, pairs in groups.items():
            rs = [r for r, _ in pairs]
            if len(rs) == 1:
                merged[i] = rs[0]
                continue
            kept = [(r, j) for r, j in pairs if r.text.strip()] or pairs[:1]
            text = ""
            chars: list[float] = []
            for k, (r, j) in enumerate(kept):
                if k and j:
                    text += j
                    chars.append(1.0)
                text += r.text.strip()
                chars.extend(r.char_confidences[: len(r.text)])
            steps = sum(r.steps for r in rs)
            # geometric mean over every decision of every piece
            logc = sum(r.steps * float(np.log(max(r.confidence, 1e-12))) for r in rs)
            failure = next((r.failure for r in rs if r.failure), None)
            truncated = any(r.truncated for r in rs)
            cut_by = next((r.cut_by for r in rs if r.truncated), None)
            conf = 0.0 if failure or truncated else float(np.exp(logc / max(1, steps)))
            merged[i] = LineResult(text="" if failure else text, confidence=conf,
                                   char_confidences=[] if failure else chars, steps=steps,
                                   width_px=sum(r.width_px for r in rs), batch_no=rs[0].batch_no,
                                   tokens=sum(r.tokens for r in rs), truncated=truncated,
                                   t_line=sum(r.t_line for r in rs), failure=failure, cut_by=cut_by)
        return merged, timings  # type: ignore[return-value]

    def _recognise_whole(self, crops, *, clock, spent=None):
        """``spent``: the crops were cleaned already, in these seconds each."""
        results: list[LineResult | None] = [None] * len(crops)
        timings = []
        for pb in self.prepare(crops, clock=clock, spent=spent):
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
