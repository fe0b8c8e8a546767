"""Review queue and confidence calibration.

Why: nobody can check every line of a million-page archive. The review queue
ranks lines by *doubt* so people check the likeliest errors first, and says how
long a queue of a given length takes. The calibration figures, measured on
pages with ground truth, say how far the recogniser's confidence can be trusted
to rank lines at all.

Doubt score of a line (documented formula, all parts within 0..1)::

    doubt = w_conf  * (1 - confidence)            # unknown confidence counts as 0
          + w_sums  * ledger_part
          + w_words * unknown_word_share
          + w_agree * agree_part                    # only with a second reader (postprocess/agreement.py)

* ``ledger_part`` is 1.0 for a line whose amount cannot be read, or for a line
  on an unbalanced page in which changing one digit of the amount would
  balance the page; 0.5 for any other amount line on an unbalanced page and for
  a line opening with an impossible date (31 Feb); 0 otherwise.
* ``unknown_word_share`` is the share of the line's letter words (3+ letters)
  that are not in the word list; 0 without a word list.

Default weights 1, 1, 0.5 (:class:`DoubtWeights`): failed arithmetic is as
strong a sign as a confidence of zero; an unlisted word is weaker, since word
lists are never complete. Ties are broken by page and line order.

Lines known to be incomplete come before every other line, whatever their
doubt: a line one of the recogniser's guards cut (``truncated``: the token limit, or
the repetition guard when ``truncated`` is 2, the store's code; the reason names
which) and a line the model could not read (``error``, e.g. NaN output; its confidence is unknown).
Ahead of them come the lines of pages the page sanity check flagged (a ``flags``
column: comma-separated names such as ``rotated_90``; see pages/sanity.py), the
flags as the first reason; a flagged page stored without lines (blank, not
text-like) is one row with ``line_no`` 0 and no text (see :func:`flagged_page_rows`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Mapping, Sequence

import numpy as np
import pandas as pd
from rapidfuzz.distance import Levenshtein

from ocrbench.accuracy.stats import bootstrap_statistic, wilson_interval
from ocrbench.ledger import balance as _ledger
from ocrbench.postprocess.lexicon import Lexicon, unknown_words
from ocrbench.store import TRUNCATED_CODES


@dataclass(frozen=True)
class DoubtWeights:
    """Weights of the three parts of the doubt score (see the module notes)."""

    confidence: float = 1.0
    arithmetic: float = 1.0
    unknown_words: float = 0.5
    agreement: float = 1.0           # a second reader's disagreement (postprocess/agreement.py)


@dataclass(frozen=True)
class ReviewRate:
    """How long a person takes to check one line against its image.

    Assumption, reasoned rather than measured: finding the line and its image
    takes about ``seconds_per_line`` = 4 s, then the text is compared with the
    image at about ``chars_per_second`` = 10 characters a second, roughly 100
    words a minute, well under half of ordinary silent reading speed (common
    practice puts that near 250 words a minute), because every digit must be
    looked at. A 45-character ledger line thus takes 8.5 s. The range
    ``low_factor``..``high_factor`` (x0.5..x2) brackets reviewers and material
    and is an assumption band, not a statistical interval. Measure your own
    reviewers and pass their rate.
    """

    seconds_per_line: float = 4.0
    chars_per_second: float = 10.0
    low_factor: float = 0.5
    high_factor: float = 2.0

    def seconds(self, n_chars: int | np.ndarray) -> float | np.ndarray:
        return self.seconds_per_line + np.asarray(n_chars) / self.chars_per_second

    def describe(self) -> str:
        return (f"{self.seconds_per_line:g} s per line + 1 s per {self.chars_per_second:g} characters "
                f"(assumed; range x{self.low_factor:g}..x{self.high_factor:g})")


def _as_frame(lines: pd.DataFrame | Sequence[Mapping[str, Any]]) -> pd.DataFrame:
    df = lines.copy() if isinstance(lines, pd.DataFrame) else pd.DataFrame(list(lines))
    for col in ("page_id", "line_no", "text"):
        if col not in df.columns:
            raise ValueError(f"review queue needs a {col!r} column; got {list(df.columns)}")
    if "confidence" not in df.columns:
        df["confidence"] = np.nan
    df["confidence"] = pd.to_numeric(df["confidence"], errors="coerce").astype(float)   # NULL -> NaN
    df["text"] = df["text"].fillna("").astype(str)
    return df


def _incomplete(df: pd.DataFrame, reasons: list[list[str]]) -> np.ndarray:
    """Lines cut by a guard or left unread (see the module notes); their reasons come first."""
    code = (pd.to_numeric(df["truncated"], errors="coerce").fillna(0).astype(int).to_numpy()
            if "truncated" in df.columns else np.zeros(len(df), dtype=int))
    cut = code != 0
    failed = df["error"].notna().to_numpy() if "error" in df.columns else np.zeros(len(df), dtype=bool)
    for i in np.flatnonzero(failed):
        reasons[i].insert(0, f"not read: {df['error'].iloc[i]}")
    for i in np.flatnonzero(cut):
        reasons[i].insert(0, "cut by the recogniser's repetition guard (the same n-gram over and over)"
                          if code[i] == TRUNCATED_CODES["repeated n-gram"] else "cut by the recogniser's length guard")
    return cut | failed


def _flagged(df: pd.DataFrame, reasons: list[list[str]]) -> np.ndarray:
    """Lines of pages with sanity flags (the ``flags`` column); the flags become their first reason."""
    if "flags" not in df.columns:
        return np.zeros(len(df), dtype=bool)
    flags = df["flags"].fillna("").astype(str).to_numpy()
    out = flags != ""
    whole_page = (df["whole_page"].fillna(False).astype(bool).to_numpy() if "whole_page" in df.columns
                  else np.zeros(len(df), dtype=bool))
    for i in np.flatnonzero(out):
        whole = "; no line of it was read" if whole_page[i] else ""
        reasons[i].insert(0, f"page flagged: {flags[i].replace(',', ', ')}{whole}")
    return out


def flagged_page_rows(flags: Mapping[str, str], lines: pd.DataFrame) -> pd.DataFrame:
    """One row (``line_no`` 0, no text, unknown confidence, ``whole_page`` set) for each flagged page
    that has no line in ``lines``, so a page stored without text (blank, not text-like, turned) still
    heads the queue."""
    have = set(lines["page_id"]) if len(lines) else set()
    rows = [{"page_id": pid, "line_no": 0, "text": "", "confidence": np.nan, "flags": f, "whole_page": True}
            for pid, f in sorted(flags.items()) if f and pid not in have]
    return pd.DataFrame(rows, columns=["page_id", "line_no", "text", "confidence", "flags", "whole_page"])


def ledger_parts(balance: _ledger.PageBalance) -> dict[int, tuple[float, str]]:
    """line_no (0-based within the page) -> (ledger_part, reason) for lines the arithmetic doubts."""
    out: dict[int, tuple[float, str]] = {}
    for ln in balance.lines:
        if ln.date is not None and not ln.date.valid:
            out[ln.line_no] = (0.5, f"no such date {ln.date.text!r}")
    for ln in balance.unreadable_lines:
        out[ln.line_no] = (1.0, "amount not readable")
    if balance.status == _ledger.UNBALANCED:
        diff = balance.difference_text
        fixable = {fx.line_no for fx in _ledger.single_digit_fixes(balance)}
        for ln in balance.amount_lines:
            if ln.line_no in fixable:
                out[ln.line_no] = (1.0, f"page off by {diff}; one digit here would balance it")
            elif out.get(ln.line_no, (0.0, ""))[0] < 0.5:
                out[ln.line_no] = (0.5, f"page off by {diff}")
    return out


@dataclass
class ReviewQueue:
    """Lines ranked by doubt (incomplete lines, then the most doubtful, first) and the time to review them.

    ``table`` columns: page_id, line_no, text, confidence, doubt, conf_part,
    ledger_part, word_part, reasons, seconds (expected review time of the line),
    incomplete (cut by a recogniser's guard, not read, or on a flagged page: always at the head),
    flagged (on a page with sanity flags: ahead of every other line).
    """

    table: pd.DataFrame
    rate: ReviewRate
    weights: DoubtWeights

    def take(self, *, max_lines: int | None = None, min_doubt: float | None = None,
             max_minutes: float | None = None) -> pd.DataFrame:
        """The head of the queue: at most ``max_lines``, doubt at least ``min_doubt``,
        and no more than ``max_minutes`` of review in all."""
        t = self.table
        if min_doubt is not None:
            t = t[(t["doubt"] >= min_doubt) | t["incomplete"]]
        if max_lines is not None:
            t = t.head(max_lines)
        if max_minutes is not None:
            t = t[t["seconds"].cumsum() <= max_minutes * 60.0]
        return t

    def minutes(self, **select: Any) -> dict[str, Any]:
        """Estimated minutes to review the selected head (arguments as :meth:`take`), with a range."""
        t = self.take(**select)
        m = float(t["seconds"].sum()) / 60.0
        return {"lines": int(len(t)), "chars": int(t["text"].str.len().sum()), "minutes": m,
                "minutes_low": m * self.rate.low_factor, "minutes_high": m * self.rate.high_factor,
                "assumption": self.rate.describe()}


def review_queue(lines: pd.DataFrame | Sequence[Mapping[str, Any]], *,
                 balances: Mapping[Any, _ledger.PageBalance] | None = None,
                 lexicon: Lexicon | None = None, weights: DoubtWeights = DoubtWeights(),
                 rate: ReviewRate = ReviewRate(), decimal_mark: str = ".",
                 problems: list[str] | None = None) -> ReviewQueue:
    """Rank lines by doubt.

    ``lines``: rows with page_id, line_no, text and (optionally) confidence, one
    row per recognised line (e.g. the store's ``lines`` table, with ``text`` set
    to the raw or post-processed column). ``balances``: page_id -> PageBalance;
    computed from the lines themselves when not given. A page whose arithmetic
    cannot be checked at all (an amount beyond what can be read as a number)
    keeps its lines in the queue without the arithmetic part; the page and the
    reason are appended to ``problems`` when given.
    """
    df = _as_frame(lines).sort_values(["page_id", "line_no"], kind="stable").reset_index(drop=True)
    conf = pd.to_numeric(df["confidence"], errors="coerce")
    df["conf_part"] = (1.0 - conf.clip(0.0, 1.0)).fillna(1.0)
    ledger_col = np.zeros(len(df))
    reasons: list[list[str]] = [[] for _ in range(len(df))]
    for page_id, grp in df.groupby("page_id", sort=False):
        bal = balances.get(page_id) if balances is not None else None
        if bal is None:
            try:
                bal = _ledger.check_page(grp["text"].tolist(), decimal_mark=decimal_mark)
            except ValueError as e:   # e.g. an amount of thousands of digits
                if problems is not None:
                    problems.append(f"{page_id}: arithmetic not checked ({e}); its lines are ranked without it")
                continue
        parts = ledger_parts(bal)
        for pos, idx in enumerate(grp.index):
            if pos in parts:
                ledger_col[idx], why = parts[pos]
                reasons[idx].append(why)
    df["ledger_part"] = ledger_col
    word_col = np.zeros(len(df))
    if lexicon is not None:
        for i, text in enumerate(df["text"]):
            n, unk = unknown_words(text, lexicon)
            if n:
                word_col[i] = unk / n
                if unk:
                    reasons[i].append(f"{unk}/{n} words not in the word list")
    df["word_part"] = word_col
    for i, c in enumerate(conf):
        reasons[i].insert(0, "confidence unknown" if pd.isna(c) else f"confidence {c:.2f}")
    df["incomplete"] = _incomplete(df, reasons)
    df["flagged"] = _flagged(df, reasons)
    df["incomplete"] |= df["flagged"]
    df["doubt"] = (weights.confidence * df["conf_part"] + weights.arithmetic * df["ledger_part"]
                   + weights.unknown_words * df["word_part"])
    if "agree_part" in df.columns:  # hook: two readers' disagreement, 0..1 (postprocess/agreement.py)
        df["agree_part"] = pd.to_numeric(df["agree_part"], errors="coerce").fillna(0.0).clip(0.0, 1.0)
        df["doubt"] += weights.agreement * df["agree_part"]
        for i in np.flatnonzero(df["agree_part"].to_numpy() > 0):
            reasons[i].append("another recogniser read it differently")
    df["reasons"] = ["; ".join(r) for r in reasons]
    df["seconds"] = rate.seconds(df["text"].str.len().to_numpy())
    df = df.sort_values(["flagged", "incomplete", "doubt"], ascending=[False, False, False],
                        kind="stable").reset_index(drop=True)
    cols = ["page_id", "line_no", "text", "confidence", "doubt", "conf_part", "ledger_part",
            "word_part", "reasons", "seconds"]
    extra = [c for c in df.columns if c not in cols]
    return ReviewQueue(df[cols + extra], rate, weights)


# --------------------------------------------------------------------------- calibration


def auroc(y_true: Sequence[bool] | np.ndarray, score: Sequence[float] | np.ndarray) -> float | None:
    """Area under the ROC curve: the probability that a random positive scores above a random
    negative, ties counting half (Mann–Whitney U / (n_pos * n_neg), with midranks).

    Truth first, score second. None when either class is empty.
    """
    y = np.asarray(y_true, dtype=bool)
    s = np.asarray(score, dtype=float)
    if y.shape != s.shape:
        raise ValueError(f"y_true and score differ in length ({y.size} vs {s.size})")
    n_pos = int(y.sum())
    n_neg = int(y.size - n_pos)
    if n_pos == 0 or n_neg == 0:
        return None
    ranks = pd.Series(s).rank(method="average").to_numpy()
    u = ranks[y].sum() - n_pos * (n_pos + 1) / 2.0
    return float(u / (n_pos * n_neg))


def auroc_interval(y_true: Sequence[bool] | np.ndarray, score: Sequence[float] | np.ndarray, *,
                   groups: Sequence[Any] | None = None, n_boot: int = 1000, level: float = 0.95,
                   seed: int = 0) -> tuple[float, float] | None:
    """Percentile bootstrap interval of :func:`auroc`.

    With ``groups`` (page ids) whole pages are resampled, because lines of one
    page share scan quality and are not independent; otherwise lines are.
    Resamples with a single class are skipped. None when AUROC is undefined.
    """
    y = np.asarray(y_true, dtype=bool)
    s = np.asarray(score, dtype=float)
    if auroc(y, s) is None:
        return None
    if groups is None:
        members = [np.array([i]) for i in range(y.size)]
    else:
        codes, _ = pd.factorize(pd.Series(list(groups)))
        members = [np.flatnonzero(codes == g) for g in range(codes.max() + 1)]
    return bootstrap_statistic(lambda idx: auroc(y[idx], s[idx]), members, n_boot=n_boot, level=level, seed=seed)


def line_edits(truths: Sequence[str], texts: Sequence[str], *,
               normalise: Callable[[str], str] | None = None) -> np.ndarray:
    """Character edits (Levenshtein distance) of each recognised line against its truth (truth first)."""
    if len(texts) != len(truths):
        raise ValueError(f"{len(truths)} truth lines but {len(texts)} recognised lines")
    f = normalise or (lambda t: t)
    return np.array([Levenshtein.distance(f(r), f(h)) for r, h in zip(truths, texts)], dtype=np.int64)


def error_by_decile(confidences: Sequence[float], edits: Sequence[int], ref_chars: Sequence[int], *,
                    n_bins: int = 10, level: float = 0.95) -> pd.DataFrame:
    """Error rate per confidence decile (bin 1 = least confident tenth of the lines).

    Bins hold equal numbers of lines (ties split by line order). Per bin: lines,
    confidence range and mean, lines with at least one error and their share with
    a Wilson interval, and the bin's CER (total edits / total truth characters).
    """
    c = np.asarray(confidences, dtype=float)
    e = np.asarray(edits, dtype=np.int64)
    r = np.asarray(ref_chars, dtype=np.int64)
    keep = ~np.isnan(c)
    c, e, r = c[keep], e[keep], r[keep]
    cols = ["decile", "lines", "conf_min", "conf_max", "conf_mean", "error_lines", "error_line_share",
            "share_low", "share_high", "edits", "ref_chars", "cer"]
    if c.size == 0:
        return pd.DataFrame(columns=cols)
    order = np.argsort(c, kind="stable")
    bins = np.array_split(order, min(n_bins, c.size))
    rows = []
    for k, idx in enumerate(bins, start=1):
        err = int((e[idx] > 0).sum())
        lo, hi = wilson_interval(err, idx.size, level=level)  # type: ignore[misc]
        ref = int(r[idx].sum())
        rows.append({"decile": k, "lines": int(idx.size), "conf_min": float(c[idx].min()),
                     "conf_max": float(c[idx].max()), "conf_mean": float(c[idx].mean()),
                     "error_lines": err, "error_line_share": err / idx.size, "share_low": lo, "share_high": hi,
                     "edits": int(e[idx].sum()), "ref_chars": ref,
                     "cer": float(e[idx].sum() / ref) if ref else float("nan")})
    return pd.DataFrame(rows, columns=cols)


@dataclass(frozen=True)
class Calibration:
    """How well line confidence predicts that a line holds errors."""

    lines: int
    error_lines: int
    auroc: float | None           # of (1 - confidence) predicting "line has >= 1 error"
    auroc_low: float | None
    auroc_high: float | None
    deciles: pd.DataFrame
    level: float

    def to_dict(self) -> dict[str, Any]:
        return {"lines": self.lines, "error_lines": self.error_lines, "auroc": self.auroc,
                "auroc_low": self.auroc_low, "auroc_high": self.auroc_high, "level": self.level,
                "deciles": self.deciles.to_dict(orient="records")}


def calibration(truths: Sequence[str], texts: Sequence[str], confidences: Sequence[float | None], *,
                page_ids: Sequence[Any] | None = None, normalise: Callable[[str], str] | None = None,
                n_bins: int = 10, n_boot: int = 1000, level: float = 0.95, seed: int = 0) -> Calibration:
    """Calibration figures on lines with ground truth (aligned lists, one entry per line; truth first).

    Truth first, then the recognised text and its confidence. A line "holds
    errors" when its edit distance to the truth (after ``normalise``, e.g. the
    accuracy module's profile) is above zero. Lines with no confidence (None
    or NaN: a line the model could not read) are left out.
    """
    conf = np.array([np.nan if c is None else c for c in confidences], dtype=float)
    edits = line_edits(truths, texts, normalise=normalise)
    f = normalise or (lambda t: t)
    ref = np.array([len(f(t)) for t in truths], dtype=np.int64)
    keep = ~np.isnan(conf)
    y = edits[keep] > 0
    doubt = 1.0 - conf[keep]
    groups = None if page_ids is None else [g for g, k in zip(page_ids, keep) if k]
    a = auroc(y, doubt)
    ci = auroc_interval(y, doubt, groups=groups, n_boot=n_boot, level=level, seed=seed) if a is not None else None
    return Calibration(lines=int(keep.sum()), error_lines=int(y.sum()), auroc=a,
                       auroc_low=ci[0] if ci else None, auroc_high=ci[1] if ci else None,
                       deciles=error_by_decile(conf, edits, ref, n_bins=n_bins, level=level), level=level)


# --------------------------------------------------------------------------- a store's runs


def head_catch(truth_edits: Mapping[tuple[str, int], int], head_keys: set[tuple[str, int]]) -> dict | None:
    """How many of the lines with errors (among lines with ground truth) are in the head of the queue."""
    keys = list(truth_edits)
    err = [k for k in keys if truth_edits[k] > 0]
    if not keys:
        return None
    in_head = [k for k in keys if k in head_keys]
    caught = [k for k in err if k in head_keys]
    return {"lines_with_truth": len(keys), "error_lines": len(err), "head_lines_with_truth": len(in_head),
            "error_lines_in_head": len(caught),
            "share_of_error_lines_caught": len(caught) / len(err) if err else None,
            # what checking the same number of lines picked at random would catch, on average
            "share_if_random": len(in_head) / len(keys)}


def run_lines(frames: Mapping[str, pd.DataFrame], run_id: int, *, post: bool) -> tuple[pd.DataFrame, list[str]]:
    """The lines of a run's done pages (``text`` the post-processed text where stored when ``post``),
    and the done page ids."""
    ln = frames["lines"][frames["lines"]["run_id"] == run_id].copy()
    pages = frames["pages"]
    done = sorted(set(pages.loc[(pages["run_id"] == run_id) & (pages["status"] == "done"), "page_id"]))
    ln = ln[ln["page_id"].isin(done)]
    if post:
        ln["text"] = ln["text_post"].where(ln["text_post"].notna(), ln["text"])
    return ln, done


@dataclass
class TruthCalibration:
    """Calibration on the lines of pages with ground truth, and what could not be used (one line each)."""

    calibration: Calibration | None
    edits: dict[tuple[str, int], int]
    problems: list[str]
    lines: pd.DataFrame | None = None   # the calibrated lines in order (page_id, line_no, edits, confidence)


def calibrate_on_truth(lines: pd.DataFrame, truth_dir: Any, *, page_ids: Sequence[str] | None = None,
                       normalise: Callable[[str], str] | None = None, seed: int = 0) -> TruthCalibration:
    """Pair a run's pages with ground-truth files, align line by line and measure the calibration.

    ``page_ids``: the run's done pages (default: the pages ``lines`` holds). A page
    whose line count differs from its truth's, or whose truth cannot be read, is
    left out and named in ``problems``.
    """
    from ocrbench.accuracy.evaluate import read_truth_pages

    ids = sorted(set(lines["page_id"].astype(str)) if page_ids is None else page_ids)
    truth, pairing, unreadable = read_truth_pages(truth_dir, ids)
    problems = [f"{u['path']}: {u['error']}" for u in unreadable]
    paths = {pid: path for pid, path, _ in pairing.pairs}
    by_page = {str(pid): g.sort_values("line_no") for pid, g in lines.groupby("page_id")}
    texts, confs, truths, groups = [], [], [], []
    edits: dict[tuple[str, int], int] = {}
    used = []
    for pid in sorted(truth):
        ref, g = truth[pid], by_page.get(pid)
        if g is None or len(g) != len(ref):
            problems.append(f"{paths[pid]}: {len(ref)} ground-truth lines but {0 if g is None else len(g)} "
                            f"recognised lines on {pid}; left out of the calibration")
            continue
        hyp = g["text"].fillna("").tolist()
        for no, k in zip(g["line_no"], line_edits(ref, hyp, normalise=normalise)):
            edits[(pid, int(no))] = int(k)
        texts += hyp
        confs += pd.to_numeric(g["confidence"], errors="coerce").astype(float).tolist()
        truths += ref
        groups += [pid] * len(ref)
        used.append(g.assign(page_id=pid, edits=[edits[(pid, int(no))] for no in g["line_no"]]))
    cal = calibration(truths, texts, confs, page_ids=groups, normalise=normalise, seed=seed) if texts else None
    return TruthCalibration(cal, edits, problems, pd.concat(used, ignore_index=True) if used else None)


@dataclass
class RunReview:
    """One run's review: its queue, the head chosen, the time both take, and (with truth) the calibration."""

    run_id: int
    recogniser: str
    text: str                       # "raw" or "post-processed"
    queue: ReviewQueue
    head: pd.DataFrame
    select: dict
    truth: TruthCalibration | None = None
    partner_run: int | None = None          # the other reader weighed in (postprocess/agreement.py)
    agreement: dict[str, Any] | None = None  # with truth: AUROC of confidence alone vs agreement-weighted doubt

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "run_id": self.run_id, "recogniser": self.recogniser, "text": self.text,
            "lines": int(len(self.queue.table)), "head": self.queue.minutes(**self.select),
            "all": self.queue.minutes(),
            "queue": [{"page_id": r.page_id, "line_no": int(r.line_no), "doubt": round(float(r.doubt), 4),
                       "confidence": None if pd.isna(r.confidence) else float(r.confidence),
                       "reasons": r.reasons, "text": r.text} for r in self.head.itertuples()]}
        if self.truth is not None:
            cal = self.truth.calibration
            out["calibration"] = cal.to_dict() if cal is not None else None
            if cal is not None:
                keys = {(str(r.page_id), int(r.line_no)) for r in self.head.itertuples()}
                out["head_catch"] = head_catch(self.truth.edits, keys)
        out["partner_run"] = self.partner_run
        if self.agreement is not None:
            out["agreement"] = self.agreement
        return out
