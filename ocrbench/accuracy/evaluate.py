"""Run store (or a folder of recognised texts) + ground-truth folder -> scores: the one place it is done.

``ocrbench score``, ``ocrbench review --truth`` and the report all start here.
A *system* is one recogniser's text: a hypothesis folder, or one run of a store
(raw, or post-processed where the store holds it). Each system's pages pair
with ground-truth files by name (:mod:`ocrbench.io.text`); files on one side
only, unreadable files and pages that failed in the run are kept as lists,
never dropped silently; the rest is scored with
:func:`ocrbench.accuracy.score.score_pages`. Ground-truth files are read once
however many systems use them.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import Enum
from itertools import combinations
from pathlib import Path, PurePosixPath
from typing import Any, Callable, Sequence

import pandas as pd

from ocrbench.accuracy.score import MAX_ALIGN_CHARS, Scores, score_pages
from ocrbench.accuracy.stats import bootstrap_ratio_ci, paired_comparison
from ocrbench.errors import StoreError, TextFileError
from ocrbench.io.text import (Pairing, hypothesis_folders, pair_folders, pair_store_pages, read_text_lines,
                              split_page_id)

__all__ = ["PostText", "System", "TruthReader", "Evaluation", "folder_systems", "store_systems",
           "score_systems", "compare", "compare_systems", "evaluate_store", "evaluate_folders",
           "read_truth_pages"]

#: progress(description, pages done since the last call)
Progress = Callable[[str, int], None]


class PostText(str, Enum):
    """Which text of a store's runs is scored."""

    RAW = "raw"              # the raw recognised text only
    BOTH = "both"            # raw and post-processed, side by side; a run without post-processing is an error
    WHERE_STORED = "stored"  # raw, plus post-processed for the runs whose store holds it


@dataclass
class System:
    """One recogniser's hypotheses: a folder, or one run of a store (raw or post-processed text)."""

    name: str
    run_id: int | None
    rec_hash: str | None
    pairing: Pairing
    load: Callable[[Any], list[str]]
    failed: list[tuple[str, str]] = field(default_factory=list)
    text: str = "raw"                    # "raw" or "post"
    recogniser: str | None = None
    unreadable: list[dict[str, str]] = field(default_factory=list)
    scores: Scores | None = None
    require_truth: bool = False          # a page without ground truth is a problem (else counted and skipped)

    def problems(self) -> bool:
        """True when some input could not be paired, read or recognised (partial ground truth is normal)."""
        return bool(self.pairing.incomplete(require_truth=self.require_truth) or self.unreadable or self.failed)

    @property
    def scored(self) -> bool:
        """True when at least one page was scored."""
        return self.scores is not None and bool(self.scores.summary.get("pages"))

    def report(self) -> dict:
        """The corpus summary with this system's name, run and problem lists (JSON-ready)."""
        out = dict(self.scores.summary) if self.scores is not None else {}
        out.update({
            "system": self.name, "run_id": self.run_id,
            "unpaired": {"hyp_without_truth": list(self.pairing.hyp_only),
                         "truth_without_hyp": list(self.pairing.truth_only)},
            "unreadable": self.unreadable,
            "failed_pages": [{"page_id": p, "error": e} for p, e in self.failed],
        })
        if self.scores is not None:
            groups = by_collection(self.scores.pages)
            if len(groups) > 1:
                out["collections"] = groups
        return out

    def problem_lines(self) -> list[str]:
        """One plain line per problem (for stderr)."""
        if self.require_truth:
            out = [f"{self.name}: no ground truth for {p}" for p in self.pairing.hyp_only]
        else:
            miss = self.pairing.missing_truth_line()
            out = [f"{self.name}: {miss}"] if miss else []
        out += [f"{self.name}: no hypothesis for {p}" for p in self.pairing.truth_only]
        out += [f"{u['path']}: {u['error']}" for u in self.unreadable]
        out += [f"{self.name}: page {pid} failed in the run: {e}" for pid, e in self.failed]
        return out


class TruthReader:
    """Ground-truth files read once each; an unreadable one is remembered as its TextFileError."""

    def __init__(self) -> None:
        self._cache: dict[Path, list[str] | TextFileError] = {}

    def __call__(self, path: Path) -> list[str] | TextFileError:
        if path not in self._cache:
            try:
                self._cache[path] = read_text_lines(path)
            except TextFileError as e:
                self._cache[path] = e
        return self._cache[path]


def read_truth_pages(truth_dir: Path | str, page_ids: Sequence[str],
                     reader: TruthReader | None = None) -> tuple[dict[str, list[str]], Pairing, list[dict]]:
    """Ground truth of the given page ids: (page id -> lines, the pairing, unreadable files as path/error)."""
    reader = reader or TruthReader()
    pairing = pair_store_pages(truth_dir, page_ids)
    truth: dict[str, list[str]] = {}
    unreadable = []
    for pid, path, _ in pairing.pairs:
        t = reader(path)
        if isinstance(t, TextFileError):
            unreadable.append({"path": t.path, "error": t.reason})
        else:
            truth[pid] = t
    return truth, pairing, unreadable


@dataclass
class Evaluation:
    """Every system with its scores, their paired comparisons, and notes worth a line each."""

    systems: list[System]
    comparisons: list[dict]
    profile: str
    notes: list[str] = field(default_factory=list)

    def problems(self) -> bool:
        return any(s.problems() for s in self.systems)

    def payload(self) -> dict:
        """One system: its summary at top level; several: ``systems`` and ``comparisons``."""
        if len(self.systems) == 1:
            return self.systems[0].report()
        return {"systems": [s.report() for s in self.systems], "comparisons": self.comparisons,
                "profile": self.profile}

    def tables(self) -> dict[str, pd.DataFrame]:
        """lines, pages, confusions, amounts: every system's rows, with ``system`` and ``run_id`` first."""
        tables: dict[str, list[pd.DataFrame]] = {"lines": [], "pages": [], "confusions": [], "amounts": []}
        for s in self.systems:
            if s.scores is None:
                continue
            for key in tables:
                df = getattr(s.scores, key)
                if df is None:
                    continue
                df = df.copy()
                df.insert(0, "run_id", pd.array([s.run_id] * len(df), dtype="Int64"))
                df.insert(0, "system", pd.Series([s.name] * len(df), dtype=object))
                tables[key].append(df)
        return {k: pd.concat(v, ignore_index=True) for k, v in tables.items() if v}


def folder_systems(truth_dir: Path | str, hyp_dir: Path | str) -> list[System]:
    """The systems of a hypothesis folder, paired with the truth folder by file stem: the folder itself
    when it holds ``.txt`` files, else one system per subfolder (the layout ``run --text-out`` writes)."""
    return [System(name, None, None, pair_folders(truth_dir, folder), read_text_lines)
            for name, folder in hypothesis_folders(hyp_dir, truth_dir).items()]


def store_systems(store_path: Path | str, truth_dir: Path | str, runs: Sequence[int] | None = None,
                  post: PostText = PostText.RAW) -> tuple[list[System], list[str]]:
    """The systems of a store's runs (default every run) and notes (post-processing coverage).

    Raises StoreError when the store holds no runs, names a missing run, or (``PostText.BOTH``)
    a run has no post-processed text.
    """
    from ocrbench.store import RunStore

    post = PostText(post)
    notes: list[str] = []
    with RunStore(store_path, read_only=True) as store:
        have = store.run_ids()
        # a routed run's re-reading holds only the routed lines (ocrbench/run/routed.py): scored when asked for
        ids = list(runs or [i for i in have if store.run_info(i).settings.get("route_role") != "slow"])
        if not ids:
            raise StoreError(f"{store_path}: the store holds no runs")
        missing = [r for r in ids if r not in have]
        if missing:
            raise StoreError(f"{store_path}: no run {', '.join(map(str, missing))} in this store "
                             f"(runs: {', '.join(map(str, have)) or 'none'})")
        systems = []
        for rid in ids:
            info = store.run_info(rid)
            with_post, n = store.post_coverage(rid)
            if post is PostText.BOTH and store.post_recipe(rid) is None:
                raise StoreError(f"{store_path}: run {rid} ({info.recogniser}) has no post-processed text; make it "
                                 f"with 'ocrbench postprocess {store_path} --run {rid}' or 'ocrbench run ... "
                                 "--postprocess'")
            texts_of = [False]
            if post is PostText.BOTH or (post is PostText.WHERE_STORED and with_post > 0):
                texts_of.append(True)
            for as_post in texts_of:
                texts = store.page_texts(rid, post=as_post)
                label = f"{info.recogniser} (run {rid})" + (" post-processed" if as_post else "")
                systems.append(System(label, rid, info.card_hash, pair_store_pages(truth_dir, texts.keys()),
                                      texts.__getitem__, store.failed_pages(rid),
                                      text="post" if as_post else "raw", recogniser=info.recogniser))
            if post is PostText.BOTH and with_post < n:
                notes.append(f"run {rid}: {n - with_post} of {n} lines have no post-processed text and are "
                             "scored raw")
    return systems, notes


def score_systems(systems: Sequence[System], *, profile: Any = "nfc", classes: bool = True, top: int = 10,
                  n_boot: int = 2000, seed: int = 0, reader: TruthReader | None = None,
                  progress: Progress | None = None) -> None:
    """Read each system's pairs (truth once per file) and score them into ``system.scores``."""
    reader = reader or TruthReader()
    for s in systems:
        pages = []
        for key, tpath, hkey in s.pairing.pairs:
            t = reader(tpath)
            if progress is not None:
                progress("reading texts", 1)
            if isinstance(t, TextFileError):
                s.unreadable.append({"path": t.path, "error": t.reason})
                continue
            try:
                h = s.load(hkey)
            except TextFileError as e:
                s.unreadable.append({"path": e.path, "error": e.reason})
                continue
            pages.append((key, t, h))
        if progress is not None:
            progress(f"scoring {s.name}", 0)
        s.scores = score_pages(pages, profile=profile, classes=classes, recogniser_hash=s.rec_hash,
                               top=top, n_boot=n_boot, seed=seed, too_long="skip")
        truth_of = {key: tpath for key, tpath, _ in s.pairing.pairs}
        for key in s.scores.summary.get("too_long_to_align", []):
            s.unreadable.append({"path": str(truth_of.get(key, key)),
                                 "error": f"page {key}: a line too long for the character alignment (over "
                                          f"{MAX_ALIGN_CHARS:,} characters, truth and recognised together); "
                                          "page left out: score it with --no-classes (distances only)"})


def compare(a: System, b: System, *, n_boot: int = 2000, seed: int = 0) -> dict:
    """Paired CER comparison of two scored systems on their common pages, or ``{a, b, error}``."""
    try:
        return paired_comparison(a.scores, b.scores, n_boot=n_boot, seed=seed, names=(a.name, b.name))
    except ValueError as e:
        return {"a": a.name, "b": b.name, "error": str(e)}


def compare_systems(systems: Sequence[System], *, n_boot: int = 2000, seed: int = 0) -> list[dict]:
    """:func:`compare` for every two systems, in order."""
    return [compare(a, b, n_boot=n_boot, seed=seed) for a, b in combinations(systems, 2)]


def evaluate_store(store_path: Path | str, truth_dir: Path | str, *, runs: Sequence[int] | None = None,
                   post: PostText = PostText.RAW, profile: Any = "nfc", classes: bool = True, top: int = 10,
                   n_boot: int = 2000, seed: int = 0, progress: Progress | None = None) -> Evaluation:
    """Score a store's runs against a ground-truth folder and compare every two of them."""
    systems, notes = store_systems(store_path, truth_dir, runs, post)
    score_systems(systems, profile=profile, classes=classes, top=top, n_boot=n_boot, seed=seed, progress=progress)
    return Evaluation(systems, compare_systems(systems, n_boot=n_boot, seed=seed), _profile_name(profile), notes)


def evaluate_folders(truth_dir: Path | str, hyp_dir: Path | str, *, profile: Any = "nfc", classes: bool = True,
                     top: int = 10, n_boot: int = 2000, seed: int = 0,
                     progress: Progress | None = None) -> Evaluation:
    """Score a folder of recognised ``.txt`` pages against a ground-truth folder."""
    systems = folder_systems(truth_dir, hyp_dir)
    score_systems(systems, profile=profile, classes=classes, top=top, n_boot=n_boot, seed=seed, progress=progress)
    return Evaluation(systems, [], _profile_name(profile))


def _profile_name(profile: Any) -> str:
    return str(getattr(profile, "name", profile))


def collection_of_page(page_id: str) -> str:
    """A page's collection: the folder of its file relative to the scan root (``""`` at the top)."""
    parent = PurePosixPath(split_page_id(str(page_id))[0]).parent.as_posix()
    return "" if parent == "." else parent


def by_collection(pages: pd.DataFrame, *, n_boot: int = 2000, seed: int = 0) -> list[dict]:
    """Corpus CER per collection (sum the edits, then divide) with a page-bootstrap interval each."""
    if pages is None or pages.empty:
        return []
    df = pages.assign(collection=[collection_of_page(p) for p in pages["page_id"]])
    out = []
    for name, g in df.groupby("collection", sort=True):
        refs = g["ref_chars"].astype(float).to_numpy()
        edits = g["char_edits"].astype(float).to_numpy()
        total = float(refs.sum())
        low, high = bootstrap_ratio_ci(edits, refs, n_boot=n_boot, seed=seed)
        out.append({"collection": name, "pages": int(len(g)), "ref_chars": int(total),
                    "char_edits": int(edits.sum()), "cer": float(edits.sum()) / total if total else None,
                    "cer_low": low, "cer_high": high})
    return out
