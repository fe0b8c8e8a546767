"""The repetition guard of autoregressive decoding: stop a line that keeps emitting the same n-gram.

An encoder-decoder recogniser can fall into a loop: having read a line it
repeats its last word (``12.50 12.50 12.50 ...``), or it keeps emitting ``_``
for a rule left in the crop, until the max-tokens guard stops it. The line's
text is then garbage at the end and the loop cost every step up to the guard.

After each emitted token the guard looks at the tail of the line's tokens. The
line is cut when, for some n-gram size ``n`` in 1..``max_ngram``, the tail is
``c`` consecutive copies of one n-gram with

* ``c >= min_copies``, and
* ``c * n >= min_tokens`` -- or ``>= min_filler_tokens`` when every token of
  the n-gram is *filler*: its text holds no letter and no digit (dots, dashes,
  underscores, ``=``, spaces).

Why two token thresholds: dotted leaders (``Rent ........ 12.50``, ``. . . .``)
and rules (``______``, ``------``, ``=====``) are legitimate in ledgers and can
run to dozens of characters, so a run of filler is only cut when it is longer
than any leader or rule a line plausibly holds; a run of words or digits
repeated four times over 16 tokens (``1111`` is four tokens, ``Cash Cash
Cash Cash`` twenty) does not occur in a ledger line. Measured: no line of the
demo archive's ground truth (677 lines) and none of 20 000 training-generator
lines triggers with the defaults (models/README.md, "Repetition guard").

When the guard fires, decoding of that line stops and the copy that made the
run reach the limit is dropped: the text keeps the longest part of the run the
guard allows (``c - 1`` copies), so reading the kept text again never triggers.
The line is marked truncated, as the max-tokens guard marks it, with its own
reason (:data:`~ocrbench.recognisers.base.REPEATED_NGRAM`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np


@dataclass(frozen=True)
class RepeatGuard:
    """The card's ``repeat_*`` fields (see the module notes)."""

    enabled: bool = True
    max_ngram: int = 8
    min_copies: int = 4
    min_tokens: int = 16
    min_filler_tokens: int = 96


def filler_tokens(texts: Sequence[str | None]) -> np.ndarray:
    """For each token id: True when its text is non-empty and holds no letter and no digit."""
    return np.array([bool(t) and not any(ch.isalnum() for ch in t) for t in texts], bool)


def repeat_period(tokens: Sequence[int], guard: RepeatGuard, filler: np.ndarray) -> int:
    """The n-gram size at which ``tokens`` (all of them) end in a run the guard cuts; 0 when none does.

    The reference form, written for clarity: decoding keeps the same counts incrementally
    (:class:`RepeatState`, :func:`advance`) and must agree with this at every prefix."""
    toks = list(tokens)
    frun = 0
    while frun < len(toks) and 0 <= toks[-1 - frun] < len(filler) and filler[toks[-1 - frun]]:
        frun += 1
    for n in range(1, guard.max_ngram + 1):
        if n > len(toks):
            break
        run = 0
        while run + n < len(toks) and toks[-1 - run] == toks[-1 - run - n]:
            run += 1
        if _cuts(run + n, n, frun, guard):
            return n
    return 0


def _cuts(length: int, n: int, frun: int, guard: RepeatGuard) -> bool:
    copies = length // n
    need = guard.min_filler_tokens if frun >= n else guard.min_tokens
    return copies >= guard.min_copies and copies * n >= need


def advance(state: tuple[tuple[int, ...], int] | None, tokens: Sequence[int], tok: int, guard: RepeatGuard,
            filler: np.ndarray) -> tuple[tuple[tuple[int, ...], int], int]:
    """One hypothesis's guard state after ``tok`` follows ``tokens``; returns (new state, period cut or 0).

    The state holds, for each n, how many tokens in a row have equalled the token n before them, and how
    many filler tokens end the line (beam search keeps one per hypothesis)."""
    runs, frun = state if state is not None else ((0,) * guard.max_ngram, 0)
    L = len(tokens)
    new = tuple((runs[k] + 1 if L > k and tokens[L - 1 - k] == tok else 0) for k in range(guard.max_ngram))
    frun = frun + 1 if 0 <= tok < len(filler) and filler[tok] else 0
    for k, r in enumerate(new):
        if _cuts(r + k + 1, k + 1, frun, guard):
            return (new, frun), k + 1
    return (new, frun), 0


class RepeatState:
    """The guard's counts for the rows of a greedy batch, updated with numpy once per step.

    Per step: one comparison of the new tokens with the last ``max_ngram`` tokens, the run counts bumped or
    reset, and their maximum against the lowest threshold; the per-size thresholds and the filler test run
    only when some run gets that far (rare), so the guard costs four small array operations per step.
    """

    def __init__(self, rows: int, guard: RepeatGuard, filler: np.ndarray):
        self.filler = filler
        self.runs = np.zeros((rows, guard.max_ngram), np.int64)
        ns = np.arange(1, guard.max_ngram + 1)

        def need(tokens: int) -> np.ndarray:
            """The run count (tokens equal to the one n back) at which n-grams of each size n fire."""
            return np.maximum(guard.min_copies * ns, -(-tokens // ns) * ns) - ns

        self.need, self.need_filler = need(guard.min_tokens), need(guard.min_filler_tokens)
        self.low = np.minimum(self.need, self.need_filler)
        self.lowest = int(self.low.min())

    def _filler(self, toks) -> bool:
        return all(0 <= t < len(self.filler) and self.filler[t] for t in toks)

    def step(self, hist: np.ndarray, nxt: np.ndarray) -> np.ndarray | None:
        """``hist``: (R, 1 + tokens so far), start token first; ``nxt``: the tokens chosen now.
        Returns per row the period the guard cuts at (0: none), or None when no row is cut."""
        c = hist.shape[1]
        m = min(self.runs.shape[1], c - 1)
        if m == 0:
            return None
        runs = self.runs[:, :m]                                       # a view: updated in place
        runs += 1
        runs *= hist[:, c - m:][:, ::-1] == nxt[:, None]             # column k: the token k+1 back
        if runs.max() < self.lowest:                                  # the usual step: no run near a limit
            return None
        hit = runs >= self.low[:m]
        out = np.zeros(len(nxt), np.int64)
        for r in np.flatnonzero(hit.any(axis=1)):
            for k in np.flatnonzero(hit[r]):                          # smallest n first
                n = int(k) + 1
                filler = self._filler([int(nxt[r]), *hist[r, c - n + 1:].tolist()])
                if runs[r, k] >= (self.need_filler[k] if filler else self.need[k]):
                    out[r] = n
                    break
        return out

    def take(self, idx: np.ndarray) -> None:
        self.runs = self.runs[idx]
