"""CTC recognisers: one parallel model run per batch, then a cheap decode per line.

The model scores every class (the blank included) at every frame. Decoding
turns those scores into a labelling:

* greedy (best path): take the best class at each frame, merge repeats, drop
  blanks (Graves et al. 2006, section 3.2);
* prefix beam search: keep the ``beam_width`` most probable prefixes, each with
  the probability of ending in a blank and in a non-blank, so that paths which
  collapse to the same labelling are summed (Graves et al. 2006; Hannun et al.
  2014, "First-pass large vocabulary continuous speech recognition using
  bi-directional recurrent DNNs", algorithm 1, without a language model).

Confidences come from the posteriors along an alignment of the chosen
labelling: a character's confidence is the highest posterior of its label over
the frames aligned to it; the line's is the geometric mean of the posteriors
along the whole alignment (blank frames included), so 1.0 means every frame
was certain. For greedy decoding the alignment is the best path itself; for
beam search it is the most probable path that collapses to the chosen
labelling (Viterbi forced alignment).
"""

from __future__ import annotations

import math
import time
from typing import Sequence

import numpy as np

from ocrbench.recognisers.base import LineResult, Recogniser, nonfinite_failure
from ocrbench.recognisers.batching import PreparedBatch, valid_frames, warm_up_lines
from ocrbench.recognisers.engine import BatchTiming, Clock, EngineOptions, make_session, share_time
from ocrbench.errors import CardError
from ocrbench.recognisers.card import Card

NEG_INF = float("-inf")


def log_softmax(x: np.ndarray, axis: int = -1) -> np.ndarray:
    """Numerically stable log-softmax."""
    m = np.max(x, axis=axis, keepdims=True)
    y = x - m
    return y - np.log(np.sum(np.exp(y), axis=axis, keepdims=True))


def greedy_path(logp: np.ndarray, blank: int = 0) -> tuple[list[int], np.ndarray]:
    """Best-path decode of one line's (T, C) log-posteriors.

    Returns the labelling and the best class per frame (the alignment).
    """
    best = np.argmax(logp, axis=1)
    if best.size == 0:
        return [], best
    keep = np.ones(best.shape, bool)
    keep[1:] = best[1:] != best[:-1]
    keep &= best != blank
    return best[keep].tolist(), best


def _lae(a: float, b: float) -> float:
    """log(exp(a) + exp(b)) for two floats."""
    if a == NEG_INF:
        return b
    if b == NEG_INF:
        return a
    if a > b:
        return a + math.log1p(math.exp(b - a))
    return b + math.log1p(math.exp(a - b))


def prefix_beam_search(logp: np.ndarray, *, blank: int = 0, beam_width: int = 8,
                       prune: float = 0.0) -> list[tuple[tuple[int, ...], float]]:
    """CTC prefix beam search over one line's (T, C) log-posteriors.

    Returns up to ``beam_width`` (labelling, log probability) pairs, best first.
    With a beam at least as wide as the number of distinct prefixes and
    ``prune=0`` the probabilities are exact (every path is summed), so the
    first labelling is the most probable one. ``prune`` > 0 skips, at each
    frame, the classes whose posterior is below it (a common speed-up).
    """
    T, C = logp.shape
    lp = logp.tolist()
    log_prune = math.log(prune) if prune > 0 else NEG_INF
    # prefix -> [log P(prefix, ends in blank), log P(prefix, ends in non-blank)]
    beams: dict[tuple[int, ...], list[float]] = {(): [0.0, NEG_INF]}
    classes_all = [c for c in range(C) if c != blank]
    for t in range(T):
        row = lp[t]
        if log_prune > NEG_INF:
            cand = [c for c in classes_all if row[c] >= log_prune]
        else:
            cand = classes_all
        nxt: dict[tuple[int, ...], list[float]] = {}
        pb_blank = row[blank]
        for prefix, (pb, pnb) in beams.items():
            total = _lae(pb, pnb)
            # 1. a blank: the prefix stays, now ending in blank
            e = nxt.get(prefix)
            if e is None:
                e = nxt[prefix] = [NEG_INF, NEG_INF]
            e[0] = _lae(e[0], total + pb_blank)
            last = prefix[-1] if prefix else -1
            # 2. the last label repeated without a blank in between: the prefix stays
            if last >= 0:
                e[1] = _lae(e[1], pnb + row[last])
            # 3. a new label extends the prefix
            for c in cand:
                ext = prefix + (c,)
                f = nxt.get(ext)
                if f is None:
                    f = nxt[ext] = [NEG_INF, NEG_INF]
                # a repeated label needs a blank in between: only the blank-ending mass extends
                f[1] = _lae(f[1], (pb if c == last else total) + row[c])
        if len(nxt) > beam_width:
            ranked = sorted(nxt.items(), key=lambda kv: _lae(kv[1][0], kv[1][1]), reverse=True)
            beams = dict(ranked[:beam_width])
        else:
            beams = nxt
    ranked = sorted(((p, _lae(v[0], v[1])) for p, v in beams.items()), key=lambda kv: kv[1], reverse=True)
    return ranked[:beam_width]


def forced_alignment(logp: np.ndarray, labels: Sequence[int], blank: int = 0) -> np.ndarray:
    """The most probable frame path (class per frame) that collapses to ``labels`` (Viterbi).

    An empty labelling (a blank line) aligns to blanks only: the extended label
    sequence then has one state, and the one- and two-state moves do not exist.
    """
    T = logp.shape[0]
    ext = [blank]
    for c in labels:
        ext += [c, blank]
    S = len(ext)
    if T == 0:
        return np.empty(0, np.int64)
    ext_a = np.array(ext)
    emit = logp[:, ext_a]                       # (T, S)
    # allowed skip s-2 -> s when ext[s] is a label different from ext[s-2]
    skip = np.zeros(S, bool)
    skip[2:] = (ext_a[2:] != blank) & (ext_a[2:] != ext_a[:-2])
    score = np.full(S, NEG_INF)
    score[0] = emit[0, 0]
    if S > 1:
        score[1] = emit[0, 1]
    back = np.zeros((T, S), np.int64)
    idx = np.arange(S)
    step1 = np.full(S, NEG_INF)
    step2 = np.full(S, NEG_INF)
    for t in range(1, T):
        step1[1:] = score[:-1]
        step2[2:] = score[:-2]
        choice = np.stack([score, step1, np.where(skip, step2, NEG_INF)])
        arg = np.argmax(choice, axis=0)
        score = choice[arg, idx] + emit[t]
        back[t] = idx - arg
    end = S - 1 if S == 1 or score[S - 1] >= score[S - 2] else S - 2
    path = np.empty(T, np.int64)
    s = end
    for t in range(T - 1, -1, -1):
        path[t] = ext[s]
        s = back[t, s] if t > 0 else s
    return path


def path_confidences(logp: np.ndarray, path: np.ndarray, blank: int = 0) -> tuple[float, list[float]]:
    """(line confidence, per-character confidences) along an alignment path."""
    T = path.shape[0]
    if T == 0:
        return 1.0, []
    frame_lp = logp[np.arange(T), path]
    line = float(np.exp(np.mean(frame_lp)))
    starts = np.flatnonzero(np.concatenate(([True], path[1:] != path[:-1])))
    run_max = np.maximum.reduceat(frame_lp, starts)
    chars = [float(np.exp(v)) for v, s in zip(run_max, starts) if path[s] != blank]
    return line, chars


class CtcRecogniser(Recogniser):
    """A card of kind ``ctc``: image batch -> per-frame class scores -> labelling."""

    def __init__(self, card: Card, options: EngineOptions):
        super().__init__(card, options)
        self.c = card.ctc
        self.session = make_session(self.c.model, options, "ctc model")

    def _sessions(self) -> list:
        return [self.session]

    def posteriors(self, tensor: np.ndarray) -> np.ndarray:
        """The model's output as (B, T, C) log-posteriors."""
        y = self.session.run([self.c.output], {self.c.input: tensor})[0]
        return self.to_log_probs(y)

    def to_log_probs(self, y: np.ndarray) -> np.ndarray:
        if self.c.layout == "TBC":
            y = np.transpose(y, (1, 0, 2))
        y = y.astype(np.float32, copy=False)
        if self.c.output_kind == "log_probs":
            return y
        if self.c.output_kind == "probs":
            with np.errstate(divide="ignore", invalid="ignore"):
                return np.log(np.maximum(y, 0.0))
        return log_softmax(y, axis=-1)

    def decode_line(self, logp: np.ndarray) -> tuple[list[int], float, list[float]]:
        """Labelling, line confidence and character confidences of one line's (T, C) log-posteriors."""
        blank = self.c.blank_index
        if self.options.decoding == "beam":
            ranked = prefix_beam_search(logp, blank=blank, beam_width=self.options.beam_width,
                                        prune=self.options.ctc_prune)
            labels = list(ranked[0][0]) if ranked else []
            path = forced_alignment(logp, labels, blank)
        else:
            labels, path = greedy_path(logp, blank)
        conf, chars = path_confidences(logp, path, blank)
        return labels, conf, chars

    def run_batch(self, pb: PreparedBatch, *, clock: Clock = time.perf_counter) -> tuple[list[LineResult], BatchTiming]:
        t0 = clock()
        y = self.session.run([self.c.output], {self.c.input: pb.tensor})[0]
        t1 = clock()
        logp = self.to_log_probs(y)
        B, T, _ = logp.shape
        valid = valid_frames(pb.widths, pb.padded_width, T, self.c.frames_per_pixel)
        sym = self.c.symbols
        results = []
        for b in range(B):
            lp = logp[b, : valid[b]]
            failure = nonfinite_failure(lp)
            if failure:
                results.append(LineResult(text="", confidence=0.0, char_confidences=[], steps=int(valid[b]),
                                          width_px=int(pb.widths[b]), batch_no=pb.batch_no, failure=failure))
                continue
            labels, conf, chars = self.decode_line(lp)
            text = "".join(sym[k] for k in labels)
            results.append(LineResult(text=text, confidence=conf, char_confidences=chars, steps=int(valid[b]),
                                      width_px=int(pb.widths[b]), batch_no=pb.batch_no, tokens=len(labels)))
        t2 = clock()
        n_tok = [r.tokens for r in results]
        timing = BatchTiming(batch_no=pb.batch_no, n_lines=B, padded_width=pb.padded_width,
                             sum_width=int(np.sum(pb.widths)), frames=int(T), steps_max=int(valid.max(initial=0)),
                             tokens_sum=int(sum(n_tok)), tokens_sq_sum=int(sum(n * n for n in n_tok)),
                             t_preprocess=pb.t_preprocess, t_encode=t1 - t0, t_steps=0.0, t_collapse=t2 - t1)
        shares = share_time(timing.t_encode + timing.t_collapse, [float(w) for w in pb.widths])
        for r, s in zip(results, shares):
            r.t_line = s
        return results, timing

    def warm_up(self) -> None:
        w = max(self.spec.min_width, 32 * self.spec.width_multiple)
        blank = np.full((self.spec.height, w), 255, np.uint8)
        pb = self.prepare(warm_up_lines(self.spec, self.options.batch_size))[0]
        check_output_kind(self.card.path, self.session.run([self.c.output], {self.c.input: pb.tensor})[0],
                          self.c.output_kind)
        self.recognise([blank, blank[:, : w // 2]])
        self.recognise(warm_up_lines(self.spec, self.options.batch_size))


#: Tolerances of the warm-up output check: float32 rounding of a softmax sum over a few hundred classes
#: stays far inside 1e-2 (common practice for float32 normalisation checks).
SUM_TOLERANCE = 1e-2


def check_output_kind(card_path, y: np.ndarray, kind: str) -> None:
    """A CardError when the raw class scores of a warm-up batch do not fit ``ctc.output_kind``.

    NaN is never right; log-probabilities are <= 0 and their exponentials sum to 1 over the classes;
    probabilities lie in [0, 1] and sum to 1. (Logits may be anything finite.)
    """
    y = np.asarray(y, np.float64)
    if np.isnan(y).any():
        raise CardError(card_path, "field 'ctc.output': the model's scores for blank warm-up lines hold NaN")
    if kind == "log_probs":
        top = float(y.max(initial=-np.inf))
        sums = np.exp(log_softmax_sum(y))
        if top > 1e-3 or np.abs(sums - 1.0).max(initial=0.0) > SUM_TOLERANCE:
            raise CardError(card_path, f"field 'ctc.output_kind' is \"log_probs\" but the output is not: its largest "
                                       f"value is {top:.3g} and its exponentials sum to {float(sums.max()):.3g} per "
                                       "frame (log-probabilities are <= 0 and sum to 1); try \"logits\" or \"probs\"")
    elif kind == "probs":
        lo, hi = float(y.min(initial=0.0)), float(y.max(initial=0.0))
        sums = y.sum(axis=-1)
        if lo < -1e-6 or hi > 1 + 1e-6 or np.abs(sums - 1.0).max(initial=0.0) > SUM_TOLERANCE:
            raise CardError(card_path, f"field 'ctc.output_kind' is \"probs\" but the output is not: its values span "
                                       f"{lo:.3g}..{hi:.3g} (probabilities lie in [0, 1] and sum to 1 per frame); "
                                       "try \"logits\" or \"log_probs\"")
    elif not np.isfinite(y).all() and np.isposinf(y).any():
        raise CardError(card_path, "field 'ctc.output': the model's scores for blank warm-up lines hold +Inf")


def log_softmax_sum(y: np.ndarray) -> np.ndarray:
    """log(sum(exp(y))) over the last axis, computed stably."""
    m = np.max(y, axis=-1, keepdims=True)
    m = np.where(np.isfinite(m), m, 0.0)
    return (m + np.log(np.sum(np.exp(y - m), axis=-1, keepdims=True)))[..., 0]
