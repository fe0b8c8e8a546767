"""Joint decoding: an encoder-decoder's next-token scores mixed with a CTC head's prefix scores.

Some encoder-decoder recognisers are trained with a second, CTC-trained output on the encoder (joint
CTC-attention training, common practice). Its per-frame class scores can steer the decoder while it
decodes: a token that the frames do not support loses, and the end token is only likely once the frames
are used up. That keeps an attention decoder from losing its place on long lines with wide gaps (it
repeats a field, skips one, or runs on to the token limit) while it still emits one token per step.

For a prefix ``h`` (the tokens emitted so far, mapped to CTC classes) the CTC prefix score is
``log P_ctc(h...)``: the probability, summed over every frame alignment, that the line's labelling
begins with ``h`` (Graves 2012, "Supervised Sequence Labelling with Recurrent Neural Networks", section
7.5; used this way in hybrid CTC/attention decoding, Watanabe et al. 2017, IEEE JSTSP 11(8)). The forward
variables of a prefix, ``rn[t]`` (paths over frames ``0..t`` that collapse to ``h`` and end in ``h``'s
last label) and ``rb[t]`` (same, ending in blank), extend to ``h + c`` by the recursions

    phi[t]     = rb[t] + rn[t]  (or rb[t] alone when c repeats h's last label)
    rn'[t]     = (rn'[t-1] + phi[t-1]) * p_t(c)
    rb'[t]     = (rb'[t-1] + rn'[t-1]) * p_t(blank)
    P(h + c...) = sum_t phi[t-1] * p_t(c)

in probability space (``phi[-1]`` is 1 for the empty prefix, else 0). Both recursions are first-order
linear, so they are solved in log space with cumulative sums and ``np.logaddexp.accumulate`` over the
frames, without a Python loop; the prefix score of every class at once is one matrix product per row.
The end token scores ``log P_ctc(h)`` = ``log(rn[T-1] + rb[T-1])``, the whole labelling.

The joint score of token ``c`` after ``h`` is ``(1 - w) * log p_att(c | h) + w * (log P_ctc(h + c...) -
log P_ctc(h...))``: never above 0 (a prefix's probability can only fall as it grows), so a hypothesis'
running sum is ``(1 - w) * sum log p_att + w * log P_ctc(h...)`` and beam search's "scores only fall" stop
stays exact. Tokens without a CTC class (the start, padding and special tokens) score minus infinity.
"""

from __future__ import annotations

import numpy as np

from ocrbench.recognisers.ctc import log_softmax

FLOOR = -1e4        # log-probabilities are clamped here: exp(-1e4) is 0 in float64, and cumulative sums over a
                    # few thousand frames stay near 1e7, where float64 still resolves 1e-9


def class_scores(scores: np.ndarray, kind: str) -> np.ndarray:
    """(rows, frames, classes) CTC scores as float64 log-probabilities (``kind``: logits, log_probs, probs)."""
    x = scores.astype(np.float64, copy=False)
    if kind == "probs":
        with np.errstate(divide="ignore"):
            return np.log(x)
    return log_softmax(x) if kind == "logits" else x


class PrefixScorer:
    """CTC prefix scores for the running hypotheses of one batch.

    ``log_probs``: (lines, frames, classes) log-probabilities; ``valid``: the real frames of each line (the
    rest is padding and is read as certain blank); ``token_class``: the CTC class of each decoder token
    (-1: none); ``eos``: the end token. Hypothesis state is kept per row (``rows`` maps a row to its line),
    so rows can be dropped (greedy) or copied from parents (beam) with :meth:`take`.
    """

    def __init__(self, log_probs: np.ndarray, valid: np.ndarray, blank: int, token_class: np.ndarray, eos: int):
        lp = np.maximum(np.nan_to_num(np.asarray(log_probs, dtype=np.float64), nan=FLOOR), FLOOR)
        L, T, C = lp.shape
        valid = np.clip(np.asarray(valid, dtype=np.int64), 1, T)
        pad = np.arange(T)[None, :] >= valid[:, None]
        lp[pad] = 0.0                      # padding: any finite value for the sums; its frames are masked out
        p = np.exp(lp)
        p[pad] = 0.0                       # ... and no label is read from them
        self.lp, self.p, self.pad = lp, p, pad
        self.blank, self.eos, self.valid = blank, eos, valid
        self.token_class = np.asarray(token_class, dtype=np.int64)
        self.has_class = self.token_class >= 0
        self.has_class[eos] = False
        self.tok_of_class = np.flatnonzero(self.has_class)
        self.cls_of_tok = self.token_class[self.tok_of_class]
        # per row: line, forward variables, last class, whether the prefix is non-empty, its prefix score
        self.rows = np.arange(L)
        self.rn = np.full((L, T), -np.inf)
        self.rb = np.where(pad, -np.inf, np.cumsum(lp[:, :, blank], axis=1))
        self.last = np.full(L, -1, np.int64)
        self.started = np.zeros(L, bool)
        self.score = np.zeros(L)
        self._rows_p: np.ndarray | None = None     # p of the current rows (gathered once per set of rows)

    def take(self, idx: np.ndarray) -> None:
        """Keep rows ``idx`` (in that order; a row may appear twice)."""
        idx = np.asarray(idx, dtype=np.int64)
        for name in ("rows", "rn", "rb", "last", "started", "score"):
            setattr(self, name, getattr(self, name)[idx])
        self._rows_p = None

    def _p(self) -> np.ndarray:
        """(rows, T, C) class probabilities of the rows' lines, gathered once per set of rows."""
        if self._rows_p is None:
            self._rows_p = self.p[self.rows]
        return self._rows_p

    def _shifted(self, a: np.ndarray) -> np.ndarray:
        """``a[t-1]`` per row, with the empty prefix's start value (1, or 0 once it has a label) at t = 0."""
        start = np.where(self.started, -np.inf, 0.0)[:, None]
        return np.concatenate([start, a[:, :-1]], axis=1)

    def next_scores(self, V: int) -> np.ndarray:
        """(rows, V): ``log P_ctc(h + c...) - log P_ctc(h...)`` for every token ``c``; the end token gets
        ``log P_ctc(h) - log P_ctc(h...)``; tokens without a class get minus infinity."""
        R = len(self.rows)
        p = self._p()                                          # (R, T, C)
        phi = self._shifted(np.logaddexp(self.rb, self.rn))
        m = phi.max(axis=1, keepdims=True)
        m = np.where(np.isfinite(m), m, 0.0)
        with np.errstate(divide="ignore"):
            psi = m + np.log(np.einsum("rt,rtc->rc", np.exp(phi - m), p))
            same = self.started
            if same.any():
                rs = np.flatnonzero(same)
                prb = np.concatenate([np.full((len(rs), 1), -np.inf), self.rb[rs, :-1]], axis=1)
                m2 = prb.max(axis=1, keepdims=True)
                m2 = np.where(np.isfinite(m2), m2, 0.0)
                psi[rs, self.last[rs]] = m2[:, 0] + np.log(np.einsum("rt,rt->r", np.exp(prb - m2),
                                                                     p[rs, :, self.last[rs]]))
        out = np.full((R, V), -np.inf)
        out[:, self.tok_of_class] = psi[:, self.cls_of_tok]
        end = self.valid[self.rows] - 1
        ar = np.arange(R)
        out[:, self.eos] = np.logaddexp(self.rn[ar, end], self.rb[ar, end])
        return np.minimum(out - self.score[:, None], 0.0)

    def advance(self, tokens: np.ndarray, gain: np.ndarray) -> None:
        """Every row emits ``tokens[r]`` (with ``gain[r]`` from :meth:`next_scores`); the end token and tokens
        without a class leave a row's state as it was."""
        tokens = np.asarray(tokens, dtype=np.int64)
        move = self.has_class[tokens]
        if not move.any():
            return
        rs = np.flatnonzero(move)
        c = self.token_class[tokens[rs]]
        lines = self.rows[rs]
        xc = self.lp[lines[:, None], np.arange(self.lp.shape[1])[None, :], c[:, None]]   # (r, T)
        xb = self.lp[lines, :, self.blank]
        started = self.started[rs]
        phi = np.where((c == self.last[rs])[:, None] & started[:, None], self.rb[rs],
                       np.logaddexp(self.rb[rs], self.rn[rs]))
        start = np.where(started, -np.inf, 0.0)[:, None]
        phi1 = np.concatenate([start, phi[:, :-1]], axis=1)
        S = np.cumsum(xc, axis=1)
        S1 = np.concatenate([np.zeros((len(rs), 1)), S[:, :-1]], axis=1)
        with np.errstate(invalid="ignore"):
            rn = S + np.logaddexp.accumulate(phi1 - S1, axis=1)
            Bc = np.cumsum(xb, axis=1)
            B1 = np.concatenate([np.zeros((len(rs), 1)), Bc[:, :-1]], axis=1)
            rn1 = np.concatenate([np.full((len(rs), 1), -np.inf), rn[:, :-1]], axis=1)
            rb = Bc + np.logaddexp.accumulate(rn1 - B1, axis=1)
        pad = self.pad[self.rows[rs]]
        self.rn[rs], self.rb[rs] = np.where(pad, -np.inf, rn), np.where(pad, -np.inf, rb)
        self.last[rs], self.started[rs] = c, True
        self.score[rs] = self.score[rs] + np.asarray(gain, dtype=np.float64)[rs]

