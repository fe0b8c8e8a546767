"""Drafted greedy decoding: the CTC head's reading checked by the decoder in one pass.

A seq recogniser with a CTC output on its encoder (``[seq.ctc]``) reads each line twice over: the CTC head
gives a whole reading at once (its best path: the best class at every frame, repeats merged, blanks
dropped), the decoder gives one token per call. Where the two agree, the decoder's calls only confirm what
the CTC head already said. So the draft (the best path as decoder tokens) is fed to the uncached decoder
graph in one call, which scores the next token after *every* position of ``start + draft`` at once
(causal self-attention: a position's scores do not depend on the tokens after it). Greedy decoding then
walks the line as usual, choosing each token from those scores (joint with the CTC prefix scores, the
repetition guard applied as always); while its choice equals the token that was fed at that position, the
scores of the next position are already there. At the first disagreement the line's prefix is fed again
with a new draft after it (the rest of the best path, aligned to what the decoder emitted), in one more
call for every line that needs one at that step.

The text is the token-by-token greedy reading's: every token is chosen from the decoder's scores for the
prefix actually emitted. Only where the draft is right is work saved; a line that disagrees everywhere
costs one pass per token, each over its whole prefix (the uncached graph has no key/value cache).
Checking several tokens in one pass is the idea behind speculative decoding (Leviathan et al., 2023,
"Fast Inference from Transformers via Speculative Decoding"), here with the model's own CTC head drafting.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from ocrbench.recognisers.joint import PrefixScorer


def best_paths(scorer: PrefixScorer) -> list[list[int]]:
    """Every line's CTC best path (its real frames only) as decoder tokens; classes without a token are left out."""
    cls_tok = np.full(scorer.lp.shape[2], -1, np.int64)
    cls_tok[scorer.cls_of_tok[::-1]] = scorer.tok_of_class[::-1]         # the first token of each class
    best = scorer.lp.argmax(axis=2)                                      # (lines, frames)
    out = []
    for line, n in enumerate(scorer.valid):
        b = best[line, : int(n)]
        keep = np.ones(len(b), bool)
        keep[1:] = b[1:] != b[:-1]
        c = b[keep & (b != scorer.blank)]
        t = cls_tok[c]
        out.append(t[t >= 0].tolist())
    return out


def continuation(draft: list[int], emitted: list[int]) -> list[int]:
    """The rest of ``draft`` after ``emitted``: the draft is aligned to the emitted tokens by edit distance
    (Levenshtein; the end of the emitted tokens to any point of the draft), and what follows the best
    point is the continuation (the latest point among equally good ones)."""
    n = len(draft)
    if not emitted:
        return list(draft)
    prev = list(range(n + 1))                 # cost of emitted[:0] against draft[:j]: j insertions
    for e in emitted:
        cur = [prev[0] + 1]
        for j in range(1, n + 1):
            cur.append(min(prev[j] + 1, cur[j - 1] + 1, prev[j - 1] + (draft[j - 1] != e)))
        prev = cur
    best = min(prev)
    j = max(i for i, v in enumerate(prev) if v == best)
    return list(draft[j:])


class DraftCheck:
    """Drafted greedy decoding's state for one batch.

    ``drafts``: every line's draft (decoder tokens); ``score_all``: runs the uncached decoder on (lines, tokens)
    and returns (rows, positions, vocabulary) next-token log-probabilities; ``end``: the end
    token; ``pad``: fills rows shorter than the longest in a pass; ``limit``: the most positions a pass feeds (the
    max-tokens guard).
    """

    def __init__(self, drafts: list[list[int]], score_all: Callable[[np.ndarray, np.ndarray], np.ndarray],
                 end: int, pad: int, limit: int):
        self.drafts, self.score_all = drafts, score_all
        self.end, self.pad, self.limit = end, pad, limit
        self.fed: list[list[int] | None] = [None] * len(drafts)
        self.scores: list[np.ndarray | None] = [None] * len(drafts)

    def _covered(self, line: int, hist_row: np.ndarray, step: int) -> bool:
        x = self.fed[line]
        return x is not None and len(x) > step and x[step] == int(hist_row[step])

    def next_scores(self, hist: np.ndarray, lines: np.ndarray, live: np.ndarray | None = None) -> np.ndarray:
        """(rows, V) log-probabilities of the token after ``hist`` (rows of lines ``lines``, start token first);
        lines whose prefix left their last pass are fed again first, all in one call. Rows not ``live`` (lines
        that have ended but stay in the batch) are not fed: their row is the end token, certain."""
        step = hist.shape[1] - 1
        live = np.ones(len(lines), bool) if live is None else live
        need = [r for r, line in enumerate(lines) if live[r] and not self._covered(int(line), hist[r], step)]
        if need:
            feeds = []
            for r in need:
                h = hist[r].tolist()
                x = (h + continuation(self.drafts[int(lines[r])], h[1:]))[: max(self.limit, len(h))]
                feeds.append(x)
            n = max(len(x) for x in feeds)
            tokens = np.full((len(need), n), self.pad, np.int64)
            for i, x in enumerate(feeds):
                tokens[i, : len(x)] = x
            idx = np.asarray([int(lines[r]) for r in need], np.int64)
            y = self.score_all(tokens, idx)
            for i, x in enumerate(feeds):
                self.fed[int(idx[i])] = x
                self.scores[int(idx[i])] = y[i, : len(x)]
        # every line was fed at step 0 (all rows are live then), so its scores give the vocabulary size
        ended = np.full(self.scores[int(lines[0])].shape[1], -np.inf, np.float32)
        ended[self.end] = 0.0
        return np.stack([self.scores[int(line)][step] if live[r] else ended for r, line in enumerate(lines)])
