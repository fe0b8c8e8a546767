"""What quality figures are made of: one consistent, read-only snapshot of a run store, per line doubt,
per page arithmetic, review-queue counts, and (where keyed) measured edits.

The store is opened read-only (``file:...?mode=ro``) and read inside one read
transaction, so the three tables come from the same moment even while a run
is writing. In WAL mode a reader never blocks the writer: it reads the last
committed state, and the writer goes on appending to the log.

Confidence of a line, here: its weakest character's confidence where the
store holds character confidences, else the line's own. A line with one
misread character is often confident on average; on the validation pages of
``bench_quality`` the weakest character predicted "this line holds an error"
with AUROC 0.91 against 0.77 for the line confidence (CTC demo recogniser).
Doubt is then the review score of :mod:`ocrbench.postprocess.review` with that
confidence.

Groups: ``collection`` (the page's folder relative to the run's input folder,
as the store's ``pages.collection`` holds it; stores before schema version 3
lack it and the folder part of the page id is used; pages at the top are
collection ``"."``),
``day`` (the UTC date the page was finished) or ``run``.
"""

from __future__ import annotations

import json
import sqlite3
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from typing import Callable, Sequence

import numpy as np
import pandas as pd

from ocrbench.accuracy.normalise import get_profile
from ocrbench.accuracy.score import score_pages
from ocrbench.errors import StoreError, TextFileError
from ocrbench.io.text import pair_store_pages, read_text_lines
from ocrbench.ledger.balance import BALANCED, UNBALANCED, PageBalance, check_page
from ocrbench.postprocess.agreement import RunRef, partner_run, with_partner
from ocrbench.postprocess.lexicon import Lexicon
from ocrbench.postprocess.review import line_edits, review_queue
from ocrbench.store import RunStore

__all__ = ["GROUPINGS", "collection_of", "collections", "group_labels", "Snapshot", "read_snapshot", "System", "systems_of",
           "DEFAULT_QUEUE_DOUBT"]

GROUPINGS = ("collection", "day", "run")

#: A line enters the review queue at this doubt: e.g. a confidence of 0.5 or below, or an amount
#: whose one digit would balance an unbalanced page (see ocrbench.postprocess.review for the score).
DEFAULT_QUEUE_DOUBT = 0.5


def collection_of(page_id: str, stored: str | None = None) -> str:
    """The collection of a page (top -> ``.``): ``stored`` (the store's ``pages.collection``) when the store
    has it, else the folder part of its id (``box3/page_001.png`` -> ``box3``). The one place that decides it.
    """
    if isinstance(stored, str):
        return stored or "."
    base = str(page_id).partition("#")[0].replace("\\", "/")
    return str(PurePosixPath(base).parent)


def collections(pages: pd.DataFrame) -> pd.Series:
    """The collection of each page row (columns page_id and, from stores of version 3 on, collection)."""
    stored = pages["collection"] if "collection" in pages.columns else pd.Series(None, index=pages.index)
    return pd.Series([collection_of(p, c) for p, c in zip(pages["page_id"], stored)], index=pages.index,
                     dtype=object)


def group_labels(pages: pd.DataFrame, by: str) -> pd.Series:
    """The group of each page row (columns page_id, finished_at, run_id, collection when stored) for ``by``
    in :data:`GROUPINGS`."""
    if by == "collection":
        return collections(pages)
    if by == "day":
        return pages["finished_at"].fillna("").astype(str).str[:10].replace("", "unknown")
    if by == "run":
        return "run " + pages["run_id"].astype(int).astype(str)
    raise ValueError(f"group by one of {', '.join(GROUPINGS)}, not {by!r}")


@dataclass
class Snapshot:
    """The tables quality needs, read in one transaction."""

    store: Path
    runs: pd.DataFrame      # run_id, recogniser, card_hash, input_dir, settings_json
    pages: pd.DataFrame     # run_id, page_id, path, status, finished_at, collection, flags (NULL in old stores)
    lines: pd.DataFrame     # run_id, page_id, line_no, text, confidence (weakest character, see the notes)


def read_snapshot(store: Path | str, *, post: bool = False, timeout: float = 5.0) -> Snapshot:
    """Read runs, pages and lines of ``store`` read-only, in one read transaction (never blocks a writer)."""
    path = Path(store)
    text = "COALESCE(text_post, text)" if post else "text"
    with RunStore(path, read_only=True, timeout=timeout) as st:
        con = st.con
        # stores before schema version 3 have neither column: collections then come from the page ids
        extra = "collection, flags" if "collection" in [r[1] for r in con.execute("PRAGMA table_info(pages)")] \
            else "NULL AS collection, NULL AS flags"
        try:
            con.execute("BEGIN")
            try:
                runs = pd.read_sql_query("SELECT run_id, recogniser, card_hash, input_dir, settings_json FROM runs "
                                         "ORDER BY run_id", con)
                pages = pd.read_sql_query(f"SELECT run_id, page_id, path, status, finished_at, {extra} FROM pages "
                                          "ORDER BY run_id, page_id", con)
                lines = pd.read_sql_query(f"SELECT run_id, page_id, line_no, {text} AS text, confidence, "
                                          "char_conf_json FROM lines ORDER BY run_id, page_id, line_no", con)
            finally:
                con.execute("COMMIT")
        except (sqlite3.Error, pd.errors.DatabaseError) as e:
            raise StoreError(f"{path}: reading the run store: {e}") from e
    lines["text"] = lines["text"].fillna("").astype(str)
    lines["confidence"] = [_weakest(c, j) for c, j in zip(lines["confidence"], lines.pop("char_conf_json"))]
    return Snapshot(path, runs, pages, lines)


def _weakest(line_conf, char_json) -> float:
    """The weakest character confidence of a line (see the module notes), else the line confidence."""
    if isinstance(char_json, str) and len(char_json) > 2:
        try:
            chars = json.loads(char_json)
            if chars:
                return float(min(chars))
        except (ValueError, TypeError):
            pass
    return float("nan") if line_conf is None else float(line_conf)


@dataclass
class System:
    """One recogniser (same name and card) over all its runs: page and line tables ready for estimates.

    ``pages``: run_id, page_id, group, status, lines, chars, mean_doubt, balance (status string),
    queued (lines at or above the queue doubt), flagged (failed, unbalanced, with a queued line or with
    page sanity flags),
    keyed (has ground truth), edits and ref_chars (measured, keyed pages only).
    ``lines``: run_id, page_id, page (row of ``pages``), doubt, confidence, chars,
    and for keyed pages with matching line counts ``edits``.
    """

    name: str
    card_hash: str
    run_ids: list[int]
    pages: pd.DataFrame
    lines: pd.DataFrame
    problems: list[str]          # inputs that could not be used (unreadable ground truth): exit status 1
    notes: list[str]             # what was left out of the calibration, and why


def _keyed_edits(run_pages: list[str], lines: pd.DataFrame, truth: Path, norm: Callable[[str], str],
                 profile: str, problems: list[str], notes: list[str]) -> tuple[dict[str, tuple[int, int]], dict[tuple[str, int], int]]:
    """Measured (edits, ref chars) per keyed page and edits per line (pages whose line counts match)."""
    pairing = pair_store_pages(truth, run_pages)
    by_page = {pid: g for pid, g in lines.groupby("page_id", sort=False)}
    pages_in, line_edit = [], {}
    for _, tpath, pid in pairing.pairs:
        try:
            ref = read_text_lines(tpath)
        except TextFileError as e:
            problems.append(str(e))
            continue
        g = by_page.get(str(pid))
        hyp = [] if g is None else g["text"].tolist()
        pages_in.append((str(pid), ref, hyp))
        if g is not None and len(hyp) == len(ref):
            for no, k in zip(g["line_no"], line_edits(hyp, ref, normalise=norm)):
                line_edit[(str(pid), int(no))] = int(k)
        else:
            notes.append(f"{tpath}: {len(ref)} ground-truth lines but {len(hyp)} recognised lines on {pid}; "
                            "measured, but left out of the calibration")
    page_meas = {}
    if pages_in:
        sc = score_pages(pages_in, profile=profile, classes=False, n_boot=100)
        page_meas = {r.page_id: (int(r.char_edits), int(r.ref_chars)) for r in sc.pages.itertuples()}
    return page_meas, line_edit


def _balances(page_ids: np.ndarray, texts: np.ndarray) -> dict[str, PageBalance]:
    """The arithmetic of every page, from lines sorted by page and line number."""
    if page_ids.size == 0:
        return {}
    cuts = np.flatnonzero(page_ids[1:] != page_ids[:-1]) + 1
    starts, ends = np.r_[0, cuts], np.r_[cuts, page_ids.size]
    return {str(page_ids[s]): check_page(texts[s:e].tolist()) for s, e in zip(starts, ends)}


def _page_rows(lines: pd.DataFrame, queue_doubt: float) -> pd.DataFrame:
    agg = lines.groupby(["run_id", "page_id"], sort=False).agg(
        lines=("doubt", "size"), chars=("chars", "sum"), mean_doubt=("doubt", "mean"),
        queued=("doubt", lambda d: int((d >= queue_doubt).sum())))
    return agg.reset_index()


def _partners(snap: Snapshot) -> dict[int, int | None]:
    """Each run's second reader (:func:`ocrbench.postprocess.agreement.partner_run`): another recogniser's run
    over the same input folder, sharing the most done pages; None where there is none."""
    refs = []
    for r in snap.runs.itertuples(index=False):
        try:
            role = json.loads(r.settings_json or "{}").get("route_role")
        except (ValueError, AttributeError):
            role = None
        refs.append(RunRef(int(r.run_id), str(r.recogniser), str(r.input_dir), role))
    pg = snap.pages[snap.pages["status"] == "done"]
    done = {int(k): set(g["page_id"]) for k, g in pg.groupby("run_id", sort=False)}
    return {ref.run_id: partner_run(refs, ref.run_id, done) for ref in refs}


def _with_agreement(snap: Snapshot, g: pd.DataFrame, rid: int, partner: int | None, notes: list[str]) -> pd.DataFrame:
    """The run's lines with ``agree_part`` (disagreement with the partner run, 0 without a second reading)."""
    if partner is None:
        notes.append(f"run {rid}: no other recogniser read the same input folder; doubt without agreement")
        return g
    other = snap.lines[snap.lines["run_id"] == partner]
    out = with_partner(g, other)
    name = snap.runs.loc[snap.runs["run_id"] == partner, "recogniser"].iloc[0]
    notes.append(f"run {rid}: doubt includes disagreement with run {partner} ({name}) on "
                 f"{int(out['disagreement'].notna().sum())} of {len(out)} lines")
    return out


def systems_of(snap: Snapshot, *, by: str = "collection", truth: Path | None = None, profile: str = "nfc",
               lexicon: Lexicon | None = None, queue_doubt: float = DEFAULT_QUEUE_DOUBT,
               runs: Sequence[int] | None = None, agreement: bool = False) -> list[System]:
    """Group the snapshot's runs by recogniser and compute per line doubt and per page figures.

    ``agreement``: a line's doubt also weighs its disagreement with a second recogniser's reading of the same
    line (:mod:`ocrbench.postprocess.agreement`) where another recogniser read the same input folder. Off by
    default: on ``bench_quality`` it ranked lines better (AUROC 0.945 against 0.907) but left the collections'
    intervals no tighter (1.13x wider, same coverage; DEVELOPERS.md, quality).
    """
    prof = get_profile(profile)
    norm = prof.line
    out = []
    partners = _partners(snap) if agreement else {}
    runs_df = snap.runs if runs is None else snap.runs[snap.runs["run_id"].isin(list(runs))]
    for (name, chash), rgrp in runs_df.groupby(["recogniser", "card_hash"], sort=False):
        ids = [int(r) for r in rgrp["run_id"]]
        problems: list[str] = []
        notes: list[str] = []
        pages = snap.pages[snap.pages["run_id"].isin(ids)].copy()
        done = pages[pages["status"] == "done"]
        key = pd.MultiIndex.from_frame(done[["run_id", "page_id"]])
        ln = snap.lines.set_index(["run_id", "page_id"])
        ln = ln[ln.index.isin(key)].reset_index().sort_values(["run_id", "page_id", "line_no"], kind="stable")
        doubt_parts, page_status = [], {}
        page_meas: dict[tuple[int, str], tuple[int, int]] = {}
        line_edit: dict[tuple[int, str, int], int] = {}
        for rid, g in ln.groupby("run_id", sort=False):
            bal = _balances(g["page_id"].to_numpy(), g["text"].to_numpy())
            page_status.update({(int(rid), pid): b.status for pid, b in bal.items()})
            cols = ["page_id", "line_no", "text", "confidence"]
            if agreement:
                g = _with_agreement(snap, g, int(rid), partners.get(int(rid)), notes)
                cols += ["agree_part"] if "agree_part" in g else []
            q = review_queue(g[cols], balances=bal, lexicon=lexicon).table
            q["run_id"] = int(rid)
            doubt_parts.append(q[["run_id", "page_id", "line_no", "text", "confidence", "doubt"]])
            if truth is not None:
                pm, le = _keyed_edits(done.loc[done["run_id"] == rid, "page_id"].tolist(), g, truth, norm,
                                      profile, problems, notes)
                page_meas.update({(int(rid), p): v for p, v in pm.items()})
                line_edit.update({(int(rid), p, n): v for (p, n), v in le.items()})
        cols = ["run_id", "page_id", "line_no", "text", "confidence", "doubt"]
        lines = (pd.concat(doubt_parts, ignore_index=True) if doubt_parts else pd.DataFrame(columns=cols))
        lines = lines.sort_values(["run_id", "page_id", "line_no"], kind="stable").reset_index(drop=True)
        lines["doubt"] = lines["doubt"].astype(float)
        lines["chars"] = np.fromiter((len(norm(t)) for t in lines["text"]), dtype=np.int64, count=len(lines))
        lines["edits"] = [line_edit.get((int(r), p, int(n)), -1)
                          for r, p, n in zip(lines["run_id"], lines["page_id"], lines["line_no"])]
        pr = pages[["run_id", "page_id", "status", "finished_at", "collection", "flags"]].merge(
            _page_rows(lines, queue_doubt), on=["run_id", "page_id"], how="left")
        pr[["lines", "chars", "queued"]] = pr[["lines", "chars", "queued"]].fillna(0).astype(np.int64)
        pr["balance"] = [page_status.get((int(r), p), "failed" if s != "done" else "no lines")
                         for r, p, s in zip(pr["run_id"], pr["page_id"], pr["status"])]
        pr["flagged"] = ((pr["status"] != "done") | (pr["balance"] == UNBALANCED) | (pr["queued"] > 0)
                         | (pr["flags"].fillna("").astype(str) != ""))      # the page sanity check's flags
        meas = [page_meas.get((int(r), p)) for r, p in zip(pr["run_id"], pr["page_id"])]
        pr["keyed"] = [m is not None for m in meas]
        pr["edits"] = [m[0] if m else 0 for m in meas]
        pr["ref_chars"] = [m[1] if m else 0 for m in meas]
        pr["group"] = group_labels(pr, by).to_numpy()
        idx = {k: i for i, k in enumerate(zip(pr["run_id"], pr["page_id"]))}
        lines["page"] = [idx[k] for k in zip(lines["run_id"], lines["page_id"])]
        lines = lines.drop(columns=["text"])
        out.append(System(str(name), str(chash), ids, pr, lines, problems, notes))
    return out


def is_balanced(status: pd.Series) -> pd.Series:
    """True where a page's arithmetic balances (only meaningful among checkable pages)."""
    return status == BALANCED
