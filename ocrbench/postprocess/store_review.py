"""A run store's review: each run's queue (with a second reader's disagreement weighed in where
another run read the same pages) and, with ground truth, its calibration."""

from __future__ import annotations

from typing import Any, Callable, Sequence

from ocrbench.postprocess import agreement as agree
from ocrbench.postprocess.lexicon import Lexicon
import pandas as pd

from ocrbench.postprocess.review import (ReviewRate, RunReview, calibrate_on_truth, flagged_page_rows, review_queue,
                                         run_lines)


def review_store(store_path: Any, runs: Sequence[int] = (), *, lexicon: Lexicon | None = None,
                 rate: ReviewRate = ReviewRate(), post: bool = False, max_lines: int | None = 20,
                 max_minutes: float | None = None, truth_dir: Any = None,
                 normalise: Callable[[str], str] | None = None,
                 agreement: bool = True) -> tuple[list[RunReview], list[str]]:
    """Rank the lines of a store's runs (default every run) and, with ``truth_dir``, calibrate them.

    ``agreement``: where another run of the store read the same pages (the other
    kind of recogniser), its per-line disagreement adds doubt, and with truth the
    AUROC of confidence alone is measured beside the agreement-weighted doubt.
    Returns the reviews and the problems (one line each, naming the file or page).
    Raises StoreError for a missing run or an unusable store.
    """
    from ocrbench.errors import StoreError
    from ocrbench.store import RunStore

    select: dict = {"max_minutes": max_minutes} if max_minutes is not None else {"max_lines": max_lines}
    out: list[RunReview] = []
    problems: list[str] = []
    with RunStore(store_path, read_only=True) as st:
        have = st.run_ids()
        missing = [r for r in runs if r not in have]
        if missing:
            raise StoreError(f"{store_path}: no run {', '.join(map(str, missing))} in this store "
                             f"(runs: {', '.join(map(str, have)) or 'none'})")
        frames = st.read_frames(have if agreement else (list(runs) or have))
        refs = [agree.RunRef(i, x.recogniser, x.input_dir, x.settings.get("route_role"))
                for i in have for x in [st.run_info(i)]]
        pg = frames["pages"]
        done_of = {i: set(pg.loc[(pg["run_id"] == i) & (pg["status"] == "done"), "page_id"]) for i in have}
        # a routed run's re-reading holds only the routed lines (ocrbench/run/routed.py): reviewed when asked for
        for rid in list(runs) or [r.run_id for r in refs if r.route_role != "slow"]:
            out.append(_review_run(st, frames, rid, refs, done_of, lexicon=lexicon, rate=rate, post=post,
                                   select=select, truth_dir=truth_dir, normalise=normalise, agreement=agreement,
                                   problems=problems))
    return out, problems


def _review_run(st, frames, rid: int, refs, done_of, *, lexicon, rate, post: bool, select: dict, truth_dir,
                normalise, agreement: bool, problems: list[str]) -> RunReview:
    info = st.run_info(rid)
    use_post = post and st.post_recipe(rid) is not None
    ln, done = run_lines(frames, rid, post=use_post)
    cols = ["page_id", "line_no", "text", "confidence", "truncated", "error"]
    partner = agree.partner_run(refs, rid, done_of) if agreement else None
    if partner is not None:
        other, _ = run_lines(frames, partner, post=post and st.post_recipe(partner) is not None)
        ln = agree.with_partner(ln, other)
        cols.append("agree_part")
    pg = frames["pages"]
    mine = pg[(pg["run_id"] == rid) & (pg["status"] == "done")]
    # sanity flags of the run's pages (none in stores before version 3): flagged pages head the queue
    flags = {str(p): f for p, f in zip(mine["page_id"], mine["flags"]) if isinstance(f, str) and f}
    queue_lines = ln[cols].assign(flags=[flags.get(str(p), "") for p in ln["page_id"]])
    extra = flagged_page_rows(flags, queue_lines)
    if len(extra):
        queue_lines = pd.concat([queue_lines, extra], ignore_index=True)
    q = review_queue(queue_lines, lexicon=lexicon, rate=rate, problems=problems)
    rev = RunReview(rid, info.recogniser, "post-processed" if use_post else "raw", q, q.take(**select), select,
                    partner_run=partner)
    if truth_dir is not None:
        rev.truth = calibrate_on_truth(ln, truth_dir, page_ids=done, normalise=normalise)
        problems += rev.truth.problems
        if rev.truth.calibration is None:
            problems.append(f"{truth_dir}: no page of run {rid} has usable ground truth")
        elif partner is not None and rev.truth.lines is not None:
            cal = rev.truth.lines
            rev.agreement = agree.agreement_calibration(
                (cal["edits"] > 0).to_numpy(), cal["confidence"].astype(float).to_numpy(),
                cal["disagreement"].astype(float).to_numpy(), groups=cal["page_id"].tolist())
            rev.agreement["partner"] = f"{st.run_info(partner).recogniser} (run {partner})"
    return rev
