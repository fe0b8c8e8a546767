"""Autoregressive (encoder-decoder) recognisers: encoder once per batch, then one token per step.

The encoder turns a batch of line images into a memory; the decoder then emits
one token per step for every line still running, until each line's end token
or the max-tokens guard. Its cost therefore grows with the length of each
line -- the figure the whole project is about.

Two decoder graphs may be declared by the card:

* ``decoder_step`` (cached): takes the last token and the key/value cache of
  the earlier positions, returns the next-token log-probabilities and the
  extended cache -- one position of work per step;
* ``decoder_full`` (uncached): takes the whole prefix every step and recomputes
  it -- quadratic work, kept for comparison and for models without a cache.

Decoding is greedy (best token each step) or beam search. Greedy runs all
lines of a batch together; a line that emits its end token is either dropped
from the batch (``batch_mode="drop"``: its rows of the cache and memory are
removed) or kept in and ignored (``"mask"``). Beam search also runs every
line's hypotheses together in one decoder call per step and stops a line as
soon as no running hypothesis can beat its best finished one (scores are sums
of log-probabilities and can only fall), so it is exact with respect to its
beam.

Both decodings apply the card's repetition guard (recognisers/repeat.py): a
line (greedy) or hypothesis (beam) whose tokens end in one n-gram repeated past
the card's limits stops there, drops the copy that reached the limit and is
truncated, as at the max-tokens guard, with ``cut_by`` = ``"repeated n-gram"``.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Callable

import numpy as np

from ocrbench.errors import CardError, OcrbenchError
from ocrbench.recognisers.base import NONFINITE, REPEATED_NGRAM, TOKEN_LIMIT, LineResult, Recogniser
from ocrbench.recognisers.batching import PreparedBatch, valid_frames, warm_up_lines
from ocrbench.recognisers.engine import BatchTiming, Clock, EngineOptions, make_session, onnx_dtype, share_time
from ocrbench.recognisers.card import Card
from ocrbench.recognisers.ctc import log_softmax
from ocrbench.recognisers.joint import PrefixScorer, class_scores
from ocrbench.recognisers.repeat import RepeatGuard, RepeatState, advance, filler_tokens
from ocrbench.recognisers.tokens import SymbolTable, TokenizerFile
from ocrbench.recognisers.verify import DraftCheck, best_paths


@dataclass
class Decoded:
    """One line's decoder output before detokenisation."""

    tokens: list[int]                # emitted tokens, end token excluded
    log_probs: list[float]           # log-probability of each decision (end token included when ended)
    ended: bool                      # False: stopped by the max-tokens or the repetition guard (or failed)
    failure: str | None = None       # the decoder's scores for this line were not finite
    dropped: int = 0                 # repetition guard: the tokens of the copy it dropped (0: not cut by it)

    @property
    def steps(self) -> int:
        return len(self.tokens) + self.dropped + (1 if self.ended else 0)

    @property
    def cut_by(self) -> str | None:
        if self.ended or self.failure:
            return None
        return REPEATED_NGRAM if self.dropped else TOKEN_LIMIT

    def drop_tail(self, n: int) -> None:
        """The repetition guard cut the line: its last ``n`` tokens (one copy) go, their steps are counted."""
        del self.tokens[len(self.tokens) - n:]
        del self.log_probs[len(self.log_probs) - n:]
        self.dropped = n


def scores_to_log_probs(y: np.ndarray, logits: bool) -> np.ndarray:
    """A decoder's scores as (rows, vocabulary) log-probabilities: of a (rows, positions, vocabulary) output
    the last position is read (the next token, as generate() reads it); logits get a log-softmax."""
    if y.ndim == 3:
        y = y[:, -1, :]
    return log_softmax(y.astype(np.float32, copy=False), axis=-1) if logits else y


def _bad_rows(lp: np.ndarray) -> np.ndarray:
    """Rows of (R, V) decoder log-probabilities that cannot be decoded (NaN, or no finite best score)."""
    return np.isnan(lp).any(axis=1) | ~np.isfinite(lp.max(axis=1, initial=-np.inf))


class _Guard:
    """The card's repetition guard with the filler tokens of its vocabulary (a recogniser holds None when the
    card turns the guard off)."""

    def __init__(self, guard: RepeatGuard, texts: list[str]):
        self.g = guard
        self.filler = filler_tokens(texts)


def _beam_line(hyps, r: int, r_end: int, lp: np.ndarray, top: np.ndarray, K: int, eos: int, last: bool,
               finished: list, guard: _Guard | None = None) -> list[tuple[tuple, int, int]]:
    """One line's beam step over its hypotheses ``hyps[r:r_end]``: finished ones go to ``finished``;
    returns the surviving (new hypothesis, parent row, token) triples, best first.

    A hypothesis is (line, score, tokens, log_probs, guard state). One the repetition guard cuts finishes
    like one that chose the end token (kept only among the K best candidates), truncated, its last copy
    dropped, at the score it had reached."""
    line = hyps[r][0]
    cands = []
    for rr in range(r, r_end):
        score = hyps[rr][1]
        for tok in sorted(top[rr].tolist()):
            cands.append((score + float(lp[rr, tok]), rr, tok))
    cands.sort(key=lambda c: -c[0])      # stable: ties keep row, then token order
    alive = []
    for rank, (score, rr, tok) in enumerate(cands):
        _, _, toks, lps, state = hyps[rr]
        if tok == eos:
            # an end among the K best candidates finishes a hypothesis; a lower-ranked one is not kept
            # (as the Transformers library's beam search does: transformers generate(), num_beams=K)
            if rank < K:
                finished.append((score, toks, lps + [float(lp[rr, tok])], True, 0))
            continue
        if guard is not None:
            state, n = advance(state, toks, tok, guard.g, guard.filler)
            if n:
                if rank < K:
                    keep = len(toks) + 1 - n
                    finished.append((score, (toks + [tok])[:keep], (lps + [float(lp[rr, tok])])[:keep], False, n))
                continue
        alive.append((score, rr, tok, state))
        if len(alive) == K:
            break
    if last:
        for score, rr, tok, _ in alive:
            _, _, toks, lps, _ = hyps[rr]
            finished.append((score, toks + [tok], lps + [float(lp[rr, tok])], False, 0))
        alive = []
    best_fin = max((f[0] for f in finished), default=None)
    out = []
    if alive and (best_fin is None or alive[0][0] > best_fin):
        for score, rr, tok, state in alive:
            _, _, toks, lps, _ = hyps[rr]
            out.append(((line, score, toks + [tok], lps + [float(lp[rr, tok])], state), rr, tok))
    return out


def _beam_result(finished: list, failed: bool) -> Decoded:
    """A line's best finished hypothesis (the earliest among equal scores)."""
    if failed:
        return Decoded([], [], False, NONFINITE)
    if not finished:
        return Decoded([], [], False)
    best = max(range(len(finished)), key=lambda i: (finished[i][0], -i))
    score, toks, lps, ended, dropped = finished[best]
    return Decoded(list(toks), list(lps), ended, dropped=dropped)


class _Timer:
    """Accumulates the time spent inside decoder session runs."""

    def __init__(self, clock: Clock):
        self.clock = clock
        self.t = 0.0


class SeqRecogniser(Recogniser):
    """A card of kind ``seq``: encoder, then a cached or uncached decoder loop."""

    def __init__(self, card: Card, options: EngineOptions):
        super().__init__(card, options)
        s = self.s = card.seq
        self.cached = bool(options.use_cache and s.decoder_step is not None)
        if not self.cached and s.decoder_full is None:
            raise OcrbenchError(f"{card.path}: uncached decoding was asked for but the card declares no "
                                "[seq.decoder_full] graph")
        self.encoder = make_session(s.encoder.model, options, "encoder")
        self.step_session = make_session(s.decoder_step.model, options, "decoder_step") if self.cached else None
        self.first_session = (make_session(s.decoder_first.model, options, "decoder_first")
                              if self.cached and s.decoder_first is not None else None)
        self.max_tokens = options.max_tokens or s.max_tokens
        self.detok = TokenizerFile(s.tokenizer, card.path) if s.tokenizer else SymbolTable(s.symbols)
        self.guard = _Guard(s.repeat, self.detok.texts()) if s.repeat.enabled else None
        # joint decoding with the encoder's CTC scores: the card's weight, or the run's (0 turns it off)
        w = s.ctc.weight if s.ctc is not None else 0.0
        if options.ctc_weight is not None:
            if s.ctc is None and options.ctc_weight > 0:
                raise OcrbenchError(f"{card.path}: a CTC weight was given but the card declares no [seq.ctc] "
                                    "output to take CTC scores from")
            w = options.ctc_weight
        self.ctc_weight = float(w)
        self.joint = s.ctc if (s.ctc is not None and self.ctc_weight > 0) else None
        self.token_class = np.asarray(s.ctc.token_class, np.int64) if self.joint else None
        # drafted greedy decoding (recognisers/verify.py): the CTC head's reading checked by the uncached
        # decoder graph in one pass, which needs that graph to score every position
        df = s.decoder_full
        self.drafting = bool(options.draft and options.decoding == "greedy" and self.joint is not None
                             and df is not None and df.graph.outputs[df.log_probs].rank == 3)
        self.full_session = (make_session(df.model, options, "decoder_full")
                             if not self.cached or self.drafting else None)
        self.full_tok_dtype = onnx_dtype(df.graph.inputs[df.tokens].elem_type, np.int64) if df is not None else None
        d = s.decoder_step if self.cached else s.decoder_full
        g = d.graph
        self.tok_dtype = onnx_dtype(g.inputs[d.tokens].elem_type, np.int64)
        masked = [x for x in (d, s.decoder_first if self.cached else None) if x is not None and x.memory_mask]
        self.mask_dtype = onnx_dtype(masked[0].graph.inputs[masked[0].memory_mask].elem_type) if masked else None
        if self.cached:
            ds = s.decoder_step
            self.step_dtype = onnx_dtype(g.inputs[ds.step].elem_type, np.int64) if ds.step else None
            self.step_rank = g.inputs[ds.step].rank if ds.step else None
            self.n_past = len(ds.past)
            self.cache_shapes = [(g.inputs[n].shape, onnx_dtype(g.inputs[n].elem_type)) for n in ds.past + ds.static_past]
            self.fetch = [ds.log_probs, *ds.present]
        else:
            self.fetch = [s.decoder_full.log_probs]

    def _sessions(self) -> list:
        return [x for x in (self.encoder, self.first_session, self.step_session, self.full_session) if x is not None]

    # ------------------------------------------------------------------ pieces

    def encode(self, tensor: np.ndarray, widths: np.ndarray) -> tuple[list[np.ndarray], np.ndarray | None]:
        """Run the encoder; return the memory tensors and the (B, frames) memory mask.

        With ``encoder_per_line`` (the default) each line is encoded alone at its own padded width, exactly
        as a batch of one, and the memories are stacked with masked zero frames: a bidirectional encoder's
        output then does not depend on which wider lines share the batch, so a line reads the same whatever
        page or batch it comes in. Otherwise the padded batch is encoded at once.
        """
        memory, valid, _ = self._encode(tensor, widths)
        return memory, self._mask(valid, memory[0].shape[self.s.encoder.frames_axis])

    def _encode(self, tensor: np.ndarray, widths: np.ndarray) -> tuple[list[np.ndarray], np.ndarray, PrefixScorer | None]:
        """(memory, valid frames per line, the CTC prefix scorer when decoding is joint)."""
        e = self.s.encoder
        fa, ba, wa = e.frames_axis, e.batch_axis, self.spec.width_axis
        fetch = list(e.outputs) + ([self.joint.output] if self.joint else [])
        axes = [(fa, ba)] * len(e.outputs)
        if self.joint:
            axes.append((self.joint.layout.index("T"), self.joint.layout.index("B")))
        if not self.options.encoder_per_line or tensor.shape[0] == 1:
            outs = self.encoder.run(fetch, {e.input: tensor})
            valid = valid_frames(widths, tensor.shape[wa], outs[0].shape[fa], self.s.frames_per_pixel)
        else:
            m = self.spec.width_multiple
            parts, vl = [], []
            for i, w in enumerate(widths):
                W_i = self.spec.width or -(-int(w) // m) * m
                line = np.take(tensor[i:i + 1], np.arange(W_i), axis=wa)
                out = self.encoder.run(fetch, {e.input: line})
                parts.append(out)
                vl.append(int(valid_frames([w], W_i, out[0].shape[fa], self.s.frames_per_pixel)[0]))
            valid = np.asarray(vl)
            outs = []
            for j, (f_ax, b_ax) in enumerate(axes):
                S = max(p[j].shape[f_ax] for p in parts)
                pieces = []
                for p in parts:
                    pad = [(0, 0)] * p[j].ndim
                    pad[f_ax] = (0, S - p[j].shape[f_ax])
                    pieces.append(np.pad(p[j], pad) if pad[f_ax][1] else p[j])
                outs.append(np.concatenate(pieces, axis=b_ax))
        memory = outs[:len(e.outputs)]
        scorer = None
        if self.joint:
            y = outs[-1] if self.joint.layout == "BTC" else np.swapaxes(outs[-1], 0, 1)
            if y.shape[2] != len(self.joint.symbols):
                raise CardError(self.card.path, f"field 'seq.ctc.alphabet': the alphabet has {len(self.joint.symbols)} "
                                                f"entries but output '{self.joint.output}' scores {y.shape[2]} classes")
            # the CTC output's real frames in proportion to the memory's (the same when both come from one stack)
            ctc_valid = np.ceil(valid * y.shape[1] / max(1, memory[0].shape[fa])).astype(np.int64)
            scorer = PrefixScorer(class_scores(y, self.joint.output_kind), ctc_valid, self.joint.blank_index,
                                  self.token_class, self.s.eos_index)
        return memory, valid, scorer

    def _mask(self, valid: np.ndarray, S: int) -> np.ndarray | None:
        """The (B, S) memory mask in the card's values: real frames ``< valid``, the rest padding."""
        if self.mask_dtype is None:
            return None
        real = np.arange(S)[None, :] < np.asarray(valid)[:, None]
        if self.mask_dtype == np.bool_:
            return real if self.s.mask_valid else ~real
        return np.where(real, self.s.mask_valid, self.s.mask_padded).astype(self.mask_dtype)

    def _init_cache(self, rows: int) -> list[np.ndarray]:
        ds = self.s.decoder_step
        out = []
        for shape, dtype in self.cache_shapes:
            dims = [int(d) if isinstance(d, int) and d > 0 else 0 for d in shape]
            dims[ds.batch_axis] = rows
            dims[ds.time_axis] = 0
            out.append(np.zeros(dims, dtype))
        return out

    def _step_value(self, step: int) -> np.ndarray:
        v = np.array(step, dtype=self.step_dtype)
        return v.reshape(1) if self.step_rank == 1 else v

    def decoder(self, hist: np.ndarray, cache: list[np.ndarray] | None, memory: list[np.ndarray],
                mask: np.ndarray | None, step: int, timer: _Timer) -> tuple[np.ndarray, list[np.ndarray] | None]:
        """One decoder call for R rows. ``hist``: (R, step+1) tokens so far (BOS first).

        Returns the (R, V) log-probabilities of the next token and the new cache (cached mode). The cache
        list holds the self-attention cache (``past``), then the static inputs (``static_past``): computed
        at step 0 by the first-step graph or the merged graph's no-cache branch, then fed unchanged.
        """
        if not self.cached:
            df = self.s.decoder_full
            feeds = self._memory_feeds(df, memory, mask)
            feeds[df.tokens] = hist.astype(self.tok_dtype, copy=False)
            outs = self._run(self.full_session, self.fetch, feeds, timer)
            return scores_to_log_probs(outs[0], df.scores_are_logits), None
        ds, first = self.s.decoder_step, self.s.decoder_first
        tokens = hist[:, -1:].astype(self.tok_dtype, copy=False)
        if step == 0 and first is not None:
            feeds = self._memory_feeds(first, memory, mask)
            feeds[first.tokens] = tokens
            outs = self._run(self.first_session, [first.log_probs, *first.present, *first.static_present], feeds, timer)
            return scores_to_log_probs(outs[0], first.scores_are_logits), outs[1:]
        feeds = self._memory_feeds(ds, memory, mask)
        feeds[ds.tokens] = tokens
        if ds.step:
            feeds[ds.step] = self._step_value(step)
        for name, c in zip(ds.past + ds.static_past, cache):
            feeds[name] = c
        fetch = self.fetch
        if ds.use_cache_branch:
            feeds[ds.use_cache_branch] = np.array([step > 0], np.bool_).reshape(
                (1,) if ds.graph.inputs[ds.use_cache_branch].rank == 1 else ())
            if step == 0:
                fetch = self.fetch + list(ds.static_present)
        outs = self._run(self.step_session, fetch, feeds, timer)
        new_cache = outs[1:] if step == 0 or not ds.static_past else outs[1:] + cache[self.n_past:]
        return scores_to_log_probs(outs[0], ds.scores_are_logits), new_cache

    def _memory_feeds(self, d, memory: list[np.ndarray], mask: np.ndarray | None) -> dict:
        feeds = {name: m for name, m in zip(d.memory, memory)}
        if d.memory_mask:
            feeds[d.memory_mask] = mask
        return feeds

    @staticmethod
    def _run(session, fetch: list[str], feeds: dict, timer: _Timer) -> list[np.ndarray]:
        t0 = timer.clock()
        outs = session.run(fetch, feeds)
        timer.t += timer.clock() - t0
        return outs

    def _take_rows(self, memory, mask, cache, idx: np.ndarray):
        ba = self.s.encoder.batch_axis
        memory = [np.take(m, idx, axis=ba) for m in memory]
        mask = None if mask is None else mask[idx]
        if cache is not None:
            ca = self.s.decoder_step.batch_axis
            cache = [np.take(c, idx, axis=ca) for c in cache]
        return memory, mask, cache

    # ------------------------------------------------------------------ greedy

    def _joint(self, lp: np.ndarray, scorer: PrefixScorer | None) -> tuple[np.ndarray, np.ndarray | None]:
        """The step's scores: the decoder's own, or mixed with the CTC prefix scores (recognisers/joint.py);
        also the CTC part, which the scorer needs when the chosen tokens are applied."""
        if scorer is None:
            return lp, None
        g = scorer.next_scores(lp.shape[1])
        w = self.ctc_weight
        with np.errstate(invalid="ignore"):
            return ((1.0 - w) * lp.astype(np.float64) + w * g), g

    def _score_all(self, memory, mask, timer: _Timer) -> Callable[[np.ndarray, np.ndarray], np.ndarray]:
        """For drafted decoding: the uncached graph's (rows, positions, V) log-probabilities of ``tokens`` fed to
        lines ``lines`` of this batch's memory."""
        df, ba = self.s.decoder_full, self.s.encoder.batch_axis
        B = memory[0].shape[ba]

        def score_all(tokens: np.ndarray, lines: np.ndarray) -> np.ndarray:
            whole = len(lines) == B and np.array_equal(lines, np.arange(B))
            mem = memory if whole else [np.take(m, lines, axis=ba) for m in memory]
            feeds = self._memory_feeds(df, mem, None if mask is None else (mask if whole else mask[lines]))
            feeds[df.tokens] = tokens.astype(self.full_tok_dtype, copy=False)
            y = self._run(self.full_session, [df.log_probs], feeds, timer)[0]
            return log_softmax(y.astype(np.float32, copy=False), axis=-1) if df.scores_are_logits else y

        return score_all

    def greedy(self, memory, mask, *, timer: _Timer | None = None, max_tokens: int | None = None,
               batch_mode: str | None = None, scorer: PrefixScorer | None = None) -> list[Decoded]:
        """Batched greedy decoding of every line of the batch (joint with the CTC scores when ``scorer``).

        When the recogniser is ``drafting`` (and there is a ``scorer``), the decoder's scores come from
        one-pass checks of the CTC head's best path (recognisers/verify.py) instead of one call per token;
        the tokens chosen are the same."""
        timer = timer or _Timer(time.perf_counter)
        max_tokens = max_tokens or self.max_tokens
        mode = batch_mode or self.options.batch_mode
        s = self.s
        B = memory[0].shape[s.encoder.batch_axis]
        out = [Decoded([], [], False) for _ in range(B)]
        rows = np.arange(B)                     # line of each decoder row
        active = np.ones(B, bool)               # mask mode: rows still running
        hist = np.full((B, 1), s.bos_index, np.int64)
        check = (DraftCheck(best_paths(scorer), self._score_all(memory, mask, timer),
                            s.eos_index, s.eos_index if s.pad_index is None else s.pad_index,
                            max_tokens) if self.drafting and scorer is not None else None)
        cache = self._init_cache(B) if self.cached and check is None else None
        rep = RepeatState(B, self.guard.g, self.guard.filler) if self.guard else None
        for step in range(max_tokens):
            if check is not None:
                lp_att, new_cache = check.next_scores(hist, rows, active if mode == "mask" else None), None
            else:
                lp_att, new_cache = self.decoder(hist, cache, memory, mask, step, timer)
            bad = _bad_rows(lp_att)
            lp, g = self._joint(lp_att, scorer)
            nxt = np.argmax(np.where(np.isnan(lp), -np.inf, lp), axis=1)
            best = lp[np.arange(len(nxt)), nxt]
            if scorer is not None:
                scorer.advance(np.where(bad, s.eos_index, nxt), g[np.arange(len(nxt)), nxt])
            fin = (nxt == s.eos_index) | bad
            cut = rep.step(hist, nxt) if rep is not None else None      # None: no line cut this step
            for r in (range(len(rows)) if mode == "drop" else np.flatnonzero(active)):
                d = out[rows[r]]
                if bad[r]:
                    d.failure = NONFINITE
                    continue
                d.log_probs.append(float(best[r]))
                if fin[r]:
                    d.ended = True
                else:
                    d.tokens.append(int(nxt[r]))
                    if cut is not None and cut[r]:
                        d.drop_tail(int(cut[r]))
            if cut is not None:
                fin |= cut > 0
            cache = new_cache
            if mode == "drop":
                if fin.all():
                    break
                if fin.any():
                    keep = np.flatnonzero(~fin)
                    rows, nxt, hist = rows[keep], nxt[keep], hist[keep]
                    if check is None:
                        memory, mask, cache = self._take_rows(memory, mask, cache, keep)
                    if rep is not None:
                        rep.take(keep)
                    if scorer is not None:
                        scorer.take(keep)
            else:
                active &= ~fin
                if not active.any():
                    break
                nxt = np.where(active, nxt, s.eos_index)
            hist = np.concatenate([hist, nxt[:, None]], axis=1)
        return out

    # ------------------------------------------------------------------ beam

    def beam(self, memory, mask, *, timer: _Timer | None = None, beam_width: int | None = None,
             max_tokens: int | None = None, scorer: PrefixScorer | None = None) -> list[Decoded]:
        """Beam search for every line of the batch, all hypotheses in one decoder call per step (scores joint
        with the CTC prefix scores when ``scorer``: a hypothesis' score is then (1 - w) x its decoder
        log-probabilities + w x its CTC prefix score)."""
        timer = timer or _Timer(time.perf_counter)
        K = beam_width or self.options.beam_width
        max_tokens = max_tokens or self.max_tokens
        s = self.s
        eos = s.eos_index
        B = memory[0].shape[s.encoder.batch_axis]
        # running hypotheses: per row (line, score, tokens, log_probs)
        hyps: list[tuple[int, float, list[int], list[float], tuple | None]] = [(b, 0.0, [], [], None)
                                                                              for b in range(B)]
        # finished: (score, tokens, log_probs, ended, tokens dropped by the repetition guard)
        finished: list[list[tuple[float, list[int], list[float], bool, int]]] = [[] for _ in range(B)]
        hist = np.full((B, 1), s.bos_index, np.int64)
        cache = self._init_cache(B) if self.cached else None
        failed: set[int] = set()                # lines whose decoder scores were not finite
        row_lines = np.arange(B)
        mem_rows, mask_rows = memory, mask
        for step in range(max_tokens):
            lp_att, new_cache = self.decoder(hist, cache, mem_rows, mask_rows, step, timer)
            for rr in np.flatnonzero(_bad_rows(lp_att)):
                failed.add(hyps[rr][0])
            lp, g = self._joint(lp_att, scorer)
            V = lp.shape[1]
            n_top = min(V, K + 1)
            top = np.argpartition(-lp, n_top - 1, axis=1)[:, :n_top] if n_top < V else np.tile(np.arange(V), (len(lp), 1))
            last = step == max_tokens - 1
            new_hyps, parents, next_tok = [], [], []
            r = 0
            while r < len(hyps):
                line = hyps[r][0]
                r_end = r
                while r_end < len(hyps) and hyps[r_end][0] == line:
                    r_end += 1
                if line in failed:
                    r = r_end
                    continue
                for hyp, rr, tok in _beam_line(hyps, r, r_end, lp, top, K, eos, last, finished[line], self.guard):
                    new_hyps.append(hyp)
                    parents.append(rr)
                    next_tok.append(tok)
                r = r_end
            if not new_hyps:
                break
            idx = np.asarray(parents)
            if scorer is not None:
                scorer.take(idx)
                scorer.advance(np.asarray(next_tok, np.int64), g[idx, np.asarray(next_tok, np.int64)])
            hist = np.concatenate([hist[idx], np.asarray(next_tok, np.int64)[:, None]], axis=1)
            if new_cache is not None:
                ca = s.decoder_step.batch_axis
                cache = [np.take(c, idx, axis=ca) for c in new_cache]
            lines = np.asarray([h[0] for h in new_hyps])
            if not np.array_equal(lines, row_lines):
                row_lines = lines
                mem_rows, mask_rows, _ = self._take_rows(memory, mask, None, row_lines)
            hyps = new_hyps
        return [_beam_result(finished[b], b in failed) for b in range(B)]

    # ------------------------------------------------------------------ batch

    def detokenise(self, d: Decoded) -> tuple[str, float, list[float]]:
        """Text, line confidence (geometric mean of the decision probabilities) and per-character confidences."""
        text, chars = self.detok.decode(d.tokens, [float(np.exp(lp)) for lp in d.log_probs])
        conf = float(np.exp(np.mean(d.log_probs))) if d.log_probs else 1.0
        if not d.ended:
            conf = 0.0      # cut by the guard (or failed): the text is incomplete, never "certain"
        return text, conf, chars

    def run_batch(self, pb: PreparedBatch, *, clock: Clock = time.perf_counter,
                  max_tokens: int | None = None) -> tuple[list[LineResult], BatchTiming]:
        t0 = clock()
        memory, valid, scorer = self._encode(pb.tensor, pb.widths)
        mask = self._mask(valid, memory[0].shape[self.s.encoder.frames_axis])
        t1 = clock()
        timer = _Timer(clock)
        if self.options.decoding == "beam":
            decoded = self.beam(memory, mask, timer=timer, max_tokens=max_tokens, scorer=scorer)
        else:
            decoded = self.greedy(memory, mask, timer=timer, max_tokens=max_tokens, scorer=scorer)
        results = []
        for b, d in enumerate(decoded):
            text, conf, chars = self.detokenise(d)
            if d.failure:
                text, chars = "", []
            results.append(LineResult(text=text, confidence=conf, char_confidences=chars, steps=d.steps,
                                      width_px=int(pb.widths[b]), batch_no=pb.batch_no, tokens=len(d.tokens),
                                      truncated=not d.ended and d.failure is None, failure=d.failure,
                                      cut_by=d.cut_by))
        t2 = clock()
        frames = int(memory[0].shape[self.s.encoder.frames_axis])
        n_steps = [r.steps for r in results]
        n_tok = [r.tokens for r in results]
        timing = BatchTiming(batch_no=pb.batch_no, n_lines=len(results), padded_width=pb.padded_width,
                             sum_width=int(np.sum(pb.widths)), frames=frames, steps_max=max(n_steps, default=0),
                             tokens_sum=int(sum(n_tok)), tokens_sq_sum=int(sum(n * n for n in n_tok)),
                             t_preprocess=pb.t_preprocess, t_encode=t1 - t0, t_steps=timer.t,
                             t_collapse=(t2 - t1) - timer.t)
        enc = share_time(timing.t_encode, [float(w) for w in pb.widths])
        dec = share_time(timing.t_steps + timing.t_collapse, [float(n) for n in n_steps])
        for r, a, b in zip(results, enc, dec):
            r.t_line = a + b
        return results, timing

    def warm_up(self) -> None:
        w = max(self.spec.min_width, 32 * self.spec.width_multiple)
        blank = np.full((self.spec.height, w), 255, np.uint8)
        for pb in self.prepare([blank, blank[:, : w // 2]] + warm_up_lines(self.spec, self.options.batch_size)):
            _, timing = self.run_batch(pb, max_tokens=3)
        # a vocabulary axis left free in the graph is checked here, on real output
        pb = self.prepare([blank])[0]
        memory, mask = self.encode(pb.tensor, pb.widths)
        lp, _ = self.decoder(np.full((1, 1), self.s.bos_index, np.int64),
                             self._init_cache(1) if self.cached else None, memory, mask, 0, _Timer(time.perf_counter))
        n = self.s.vocab_size or len(self.s.symbols)
        if lp.shape[-1] != n and not (self.s.tokenizer and lp.shape[-1] > n):
            field = "seq.tokenizer" if self.s.tokenizer else "seq.vocab"
            raise CardError(self.card.path, f"field '{field}': the vocabulary has {n} entries "
                                            f"but the decoder scores {lp.shape[-1]} tokens")
        self._check_scores(lp)

    def _check_scores(self, lp: np.ndarray) -> None:
        """The first decoder step's scores on a blank line: never NaN; declared log-probabilities must be
        log-probabilities (<= 0, exponentials summing to 1 within float32 rounding: common practice 1e-2)."""
        d = self.s.decoder_first if self.cached and self.s.decoder_first else (
            self.s.decoder_step if self.cached else self.s.decoder_full)
        role = {id(self.s.decoder_first): "decoder_first", id(self.s.decoder_step): "decoder_step"}.get(
            id(d), "decoder_full")
        field = f"seq.{role}.{'logits' if d.scores_are_logits else 'log_probs'}"
        if np.isnan(lp).any():
            raise CardError(self.card.path, f"field '{field}': the decoder's scores for a blank line hold NaN")
        if not d.scores_are_logits:
            lse = np.log(np.sum(np.exp(lp.astype(np.float64)), axis=-1))
            if float(np.max(lp)) > 1e-3 or float(np.abs(lse).max()) > 1e-2:
                raise CardError(self.card.path, f"field '{field}': output '{d.log_probs}' does not hold "
                                                "log-probabilities (values above 0 or not summing to 1); if it "
                                                f"holds raw scores, name it with 'logits = \"{d.log_probs}\"'")
