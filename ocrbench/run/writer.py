"""The run writer: opens or resumes runs, writes each page's outcomes, counts, and closes with a summary.

One writer serves both engines (serial and Dask): whatever reads a page, the
page is written here, in one transaction per recogniser, so "a killed run loses
at most the pages in flight" holds for both.

Resuming: the same card hash, settings and input folder name the same run
(:func:`open_run`), and its done pages are skipped, except a page whose file
changed since it was read (:func:`stale_pages`): its size and modification
time are compared with those stored, and only when they differ is the file
hashed and compared with the stored content hash. Changed pages are read again
and counted (``pages_changed``).
"""

from __future__ import annotations

import os
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable, Iterable, Sequence

import numpy as np

from ocrbench.io.files import sha256_file
from ocrbench.errors import InputError, OcrbenchError
from ocrbench.pages import PageRef
from ocrbench.recognisers.base import Clock, Recogniser
from ocrbench.recognisers.card import Card
from ocrbench.store import RunStore, StoredPage, printable

PostProcess = Callable[[list[str], list[float]], list[str]]


def failure_reason(e: BaseException) -> str:
    """One line saying why a page (or line) failed: an ocrbench error's own words, else the exception's."""
    if isinstance(e, InputError):
        return e.reason
    if isinstance(e, OcrbenchError):
        return str(e)
    return f"{type(e).__name__}: {e}"


def file_sha256(path: Path) -> str | None:
    """sha256 of a page file (:func:`ocrbench.io.files.sha256_file`), or None when it cannot be read."""
    try:
        return sha256_file(path)
    except OSError:
        return None


def file_stamp(path: Path) -> tuple[int | None, int | None]:
    """(size in bytes, modification time in ns) of a page file, (None, None) when it cannot be read."""
    try:
        st = os.stat(path)
    except OSError:
        return None, None
    return int(st.st_size), int(st.st_mtime_ns)


# --------------------------------------------------------------------------- events and summaries


@dataclass(frozen=True)
class ProgressEvent:
    """Passed to the progress callback: once at the start ("start") and after each page ("page")."""

    kind: str
    pages_total: int
    pages_done: int                  # pages finished in this call, skipped ones included
    pages_skipped: int               # pages every recogniser had already finished (resume)
    pages_failed: int
    lines_done: int                  # lines recognised in this call, summed over recognisers
    page_id: str | None = None
    failed: bool = False
    skipped: bool = False            # this page was finished before (resume)
    elapsed: float = 0.0
    pages_changed: int = 0           # done pages whose file changed since: read again


@dataclass
class RecogniserSummary:
    """One recogniser's run, counted over the whole run (earlier, resumed sessions included)."""

    name: str
    kind: str
    run_id: int
    card_hash: str
    resumed: bool
    pages_done: int
    pages_failed: int
    pages_new: int                   # pages written in this call
    lines: int
    chars: int
    model_seconds: float             # encoder/model + decoder steps + collapse, summed over pages
    page_seconds_p50: float | None
    page_seconds_p90: float | None
    page_seconds_p99: float | None
    pages_per_hour: float | None     # one stream: 3600 * pages / sum of page times
    lines_per_second: float | None
    failures: list[tuple[str, str]] = field(default_factory=list)
    post_recipe: str | None = None   # the post-processing behind lines.text_post (None: no post-processed text)
    post_lines: int = 0              # lines of done pages that have post-processed text
    post_failures: list[tuple[str, str]] = field(default_factory=list)   # pages post-processing refused
    pages_changed: int = 0           # done pages read again in this call because their file changed
    lines_truncated: int = 0         # lines of done pages cut by one of the recogniser's guards
    lines_repeat_cut: int = 0        # of those, the lines the repetition guard cut (the rest: the token limit)
    lines_failed: int = 0            # lines of done pages without text (e.g. the model gave NaN)
    flagged: dict[str, list[str]] = field(default_factory=dict)   # page_id -> sanity flags (done pages)

    @property
    def post_incomplete(self) -> bool:
        """Some lines of done pages lack post-processed text (pages added by a run without post-processing)."""
        return self.post_recipe is not None and self.post_lines < self.lines


@dataclass
class RunSummary:
    input_dir: str
    pages_total: int
    pages_processed: int             # pages at least one recogniser worked on in this call
    pages_skipped: int
    wall_seconds: float
    recognisers: list[RecogniserSummary]
    pages_changed: int = 0           # distinct done pages read again because their file changed
    skipped_files: list[tuple[str, str]] = field(default_factory=list)   # (shown path, why): not read as pages
    page_notes: list[tuple[str, str]] = field(default_factory=list)      # (shown path, note): read with a caveat

    @property
    def failed_pages(self) -> list[str]:
        """Distinct page ids that failed for at least one recogniser."""
        return sorted({pid for r in self.recognisers for pid, _ in r.failures})

    def notes(self) -> list[str]:
        """Lines worth a user's attention beyond the table: pages read again, lines cut or not read."""
        out = []
        if self.pages_changed:
            out.append(f"{self.pages_changed} page(s) changed on disk since they were read: read again")
        for r in self.recognisers:
            if r.flagged:
                counts: dict[str, int] = {}
                for flags in r.flagged.values():
                    for f in flags:
                        counts[f] = counts.get(f, 0) + 1
                out.append(f"{r.name}: {len(r.flagged)} page(s) flagged ("
                           + ", ".join(f"{f} {n}" for f, n in sorted(counts.items()))
                           + "); blank, not text-like and turned pages not turned back are stored without text; "
                             "flagged pages come first in `ocrbench review`")
            if r.lines_truncated:
                by_limit = r.lines_truncated - r.lines_repeat_cut
                why = ([f"{by_limit} cut by the length guard (--max-tokens)"] if by_limit else []) + (
                    [f"{r.lines_repeat_cut} cut by the repetition guard (the same n-gram over and over)"]
                    if r.lines_repeat_cut else [])
                out.append(f"{r.name}: {r.lines_truncated} line(s) truncated, {', '.join(why)}; "
                           "flagged in the store and first in `ocrbench review`")
            if r.lines_failed:
                out.append(f"{r.name}: {r.lines_failed} line(s) not read (the model gave NaN or infinite scores); "
                           "stored without text, first in `ocrbench review`")
        return out

    def to_dict(self) -> dict:
        """The summary as JSON-ready values (names that are not UTF-8 shown with ``\\xNN``)."""
        d = asdict(self)
        d["input_dir"] = printable(self.input_dir)
        d["failed_pages"] = [printable(p) for p in self.failed_pages]
        d["notes"] = self.notes()
        for r in d["recognisers"]:
            r["failures"] = [{"page_id": printable(p), "error": printable(e)} for p, e in r["failures"]]
            r["post_failures"] = [{"page_id": printable(p), "error": printable(e)} for p, e in r["post_failures"]]
        return d


# --------------------------------------------------------------------------- post-processing


def _callable_name(fn) -> str:
    return f"{getattr(fn, '__module__', '?')}.{getattr(fn, '__qualname__', type(fn).__name__)}"


def post_recipe(postprocess: PostProcess) -> str:
    """How a post-processing is named in the store: a pipeline's recipe, else the callable's dotted name."""
    recipe = getattr(postprocess, "recipe", None)
    return recipe if isinstance(recipe, str) else _callable_name(postprocess)


def post_texts(postprocess: PostProcess, texts: list[str], confidences: list[float | None],
               char_confidences: list[list[float] | None]) -> list[str]:
    """One page through a post-processing; a pipeline also gets per-character confidences (its word gate)."""
    from ocrbench.postprocess.steps import Pipeline

    if isinstance(postprocess, Pipeline):
        out = list(postprocess(texts, confidences, char_confidences))
    else:
        out = list(postprocess(texts, confidences))
    if len(out) != len(texts):
        raise OcrbenchError(f"post-processing returned {len(out)} lines for {len(texts)}")
    return out


@dataclass
class PostApplied:
    """What :func:`apply_postprocess` did to one run."""

    run_id: int
    recipe: str
    pages: int
    lines: int
    changed_lines: int
    failures: list[tuple[str, str]] = field(default_factory=list)   # (page id, reason): text_post left empty


def apply_postprocess(st: RunStore, run_id: int, postprocess: PostProcess) -> PostApplied:
    """Fill a run's ``lines.text_post`` anew from its raw text, every done page, in one transaction.

    The raw ``text`` column is never written. A page the post-processing
    refuses keeps no post-processed text and is listed with the reason; the
    other pages go on. The recipe is recorded with the run, so the column never
    holds the output of two recipes.
    """
    recipe = post_recipe(postprocess)
    res = PostApplied(run_id=run_id, recipe=recipe, pages=0, lines=0, changed_lines=0)

    def pages():
        for page_id in st.done_page_ids(run_id):
            rows = st.page_lines(run_id, page_id)
            texts = [r[1] for r in rows]
            try:
                out = post_texts(postprocess, texts, [r[2] for r in rows], [r[3] for r in rows])
            except Exception as e:  # noqa: BLE001 - one page's problem; the run's other pages go on
                res.failures.append((page_id, failure_reason(e)))
                continue
            res.pages += 1
            res.lines += len(rows)
            res.changed_lines += sum(a != b for a, b in zip(texts, out))
            yield page_id, [(r[0], t) for r, t in zip(rows, out)]

    st.rewrite_post(run_id, pages(), recipe)
    return res


# --------------------------------------------------------------------------- opening runs


@dataclass
class RunState:
    """One recogniser's run while pages are written: its card, its recogniser (None on a Dask client),
    the run id, whether it was resumed, the pages done, and the counts of this call."""

    card: Card
    rec: Recogniser | None
    run_id: int
    resumed: bool
    done: set[str]
    new: int = 0
    stale: set[str] = field(default_factory=set)   # done pages whose file changed on disk: read again

    @property
    def changed(self) -> int:
        return len(self.stale)


def stale_pages(stored: dict[str, StoredPage], refs: Iterable[PageRef]) -> set[str]:
    """Done pages whose file is no longer what was read: size or mtime differ *and* so does the content hash.

    A file whose size and mtime match is trusted without reading it; one that
    was only touched (same bytes) is not stale. Frames of one TIFF share one
    file, which is hashed once.
    """
    hashes: dict[str, str | None] = {}
    out: set[str] = set()
    for ref in refs:
        s = stored.get(ref.id)
        if s is None or s.status != "done":
            continue
        path = Path(ref.path)
        if s.file_size is not None and (s.file_size, s.file_mtime_ns) == file_stamp(path):
            continue
        key = os.fsdecode(path)
        if key not in hashes:
            hashes[key] = file_sha256(path)
        if hashes[key] != s.content_hash:
            out.add(ref.id)
    return out


def open_run(st: RunStore, card: Card, rec: Recogniser | None, *, settings: dict, input_dir: str, fresh: bool,
             engine: str, host: Callable[[], dict], refs: Sequence[PageRef] = ()) -> RunState:
    """Resume the run with this card, settings and input folder, or start one; ``host()`` is asked only then.

    Whichever engine ran it before, a resumed run records ``engine`` as the one
    that ran it last. Done pages among ``refs`` whose file changed since are
    taken out of ``done`` (so they are read again) and kept in ``stale``.
    """
    run_id = None if fresh else st.find_run(card_hash=card.card_hash, settings=settings, input_dir=input_dir)
    resumed = run_id is not None
    if run_id is None:
        run_id = st.start_run(recogniser=card.name, kind=card.kind, card_path=str(card.path),
                              card_hash=card.card_hash, settings=settings, input_dir=input_dir,
                              host=host(), engine=engine)
        return RunState(card, rec, run_id, False, set())
    st.set_engine(run_id, engine)
    stored = st.stored_pages(run_id)
    stale = stale_pages(stored, refs)
    done = {pid for pid, p in stored.items() if p.status == "done"} - stale
    return RunState(card, rec, run_id, resumed, done, stale=stale)


# --------------------------------------------------------------------------- the writer


def _percentile(values: Sequence[float], q: float) -> float | None:
    return float(np.percentile(np.asarray(values, dtype=float), q)) if len(values) else None


class RunWriter:
    """The single writer of a run, shared by the serial and the Dask engines: it writes
    each page's outcomes (one transaction per recogniser), counts pages and lines,
    reports progress events and closes the runs with their summary."""

    def __init__(self, refs: list[PageRef], states: list[RunState], st: RunStore, clock: Clock, progress,
                 input_dir: str):
        self.states, self.st, self.clock, self.progress, self.input_dir = states, st, clock, progress, input_dir
        self.start = clock()
        self.total = len(refs)
        self.skipped_ids = {r.id for r in refs if all(r.id in s.done for s in states)}
        self.changed = len(set().union(*(s.stale for s in states)))
        self.done = self.failed = self.lines = self.processed = 0

    def emit(self, kind, page_id=None, failed=False, skipped=False) -> None:
        if self.progress is not None:
            self.progress(ProgressEvent(kind=kind, pages_total=self.total, pages_done=self.done,
                                        pages_skipped=len(self.skipped_ids), pages_failed=self.failed,
                                        lines_done=self.lines, page_id=page_id, failed=failed, skipped=skipped,
                                        elapsed=self.clock() - self.start, pages_changed=self.changed))

    def skip(self, page_id: str) -> None:
        """A page every recogniser already finished in an earlier session."""
        self.done += 1
        self.emit("page", page_id, skipped=True)

    def write(self, page_id: str, pairs) -> None:
        """Record one page: ``pairs`` of (recogniser state, its PageOutcome)."""
        self.processed += 1
        page_failed = False
        for s, o in pairs:
            self.st.write_page(s.run_id, o.page, o.lines, o.batches)
            s.new += 1
            if o.failed:
                page_failed = True
                s.done.discard(page_id)
            else:
                s.done.add(page_id)
                self.lines += len(o.lines)
        self.done += 1
        self.failed += page_failed
        self.emit("page", page_id, failed=page_failed)

    def finish(self, postprocess: PostProcess | None = None) -> RunSummary:
        """Close the runs. With post-processing, a resumed run whose earlier pages hold another recipe's
        output (or none) gets its post-processed text refilled, so one recipe stands behind the column."""
        post_failures: dict[int, list[tuple[str, str]]] = {}
        for s in self.states:
            if postprocess is not None:
                post_failures[s.run_id] = self._settle_post(s, postprocess)
            self.st.finish_run(s.run_id)
        wall = self.clock() - self.start
        return RunSummary(input_dir=self.input_dir, pages_total=self.total, pages_processed=self.processed,
                          pages_skipped=len(self.skipped_ids), wall_seconds=wall,
                          recognisers=[summarise(self.st, s, post_failures.get(s.run_id, [])) for s in self.states],
                          pages_changed=self.changed)

    def _settle_post(self, s: RunState, postprocess: PostProcess) -> list[tuple[str, str]]:
        recipe = post_recipe(postprocess)
        stored = self.st.post_recipe(s.run_id)
        with_post, n = self.st.post_coverage(s.run_id)
        if s.resumed and (stored != recipe or with_post < n):
            return apply_postprocess(self.st, s.run_id, postprocess).failures
        if stored != recipe:
            self.st.set_post_recipe(s.run_id, recipe)
        return []


def summarise(st: RunStore, s: RunState, post_failures: list[tuple[str, str]] | None = None) -> RecogniserSummary:
    """One recogniser's summary, counted from the store over the whole run."""
    tot = st.run_totals(s.run_id)
    recipe = st.post_recipe(s.run_id)
    times = tot["t_total"]
    busy = sum(times)
    return RecogniserSummary(
        name=s.card.name, kind=s.card.kind, run_id=s.run_id, card_hash=s.card.card_hash, resumed=s.resumed,
        pages_done=tot["pages_done"], pages_failed=tot["pages_failed"], pages_new=s.new, lines=tot["lines"],
        chars=tot["chars"], model_seconds=tot["model_seconds"], page_seconds_p50=_percentile(times, 50),
        page_seconds_p90=_percentile(times, 90), page_seconds_p99=_percentile(times, 99),
        pages_per_hour=3600.0 * len(times) / busy if busy > 0 else None,
        lines_per_second=tot["lines"] / busy if busy > 0 else None,
        failures=st.failed_pages(s.run_id), post_recipe=recipe,
        post_lines=st.post_coverage(s.run_id)[0] if recipe is not None else 0,
        post_failures=list(post_failures or []), pages_changed=s.changed,
        lines_truncated=tot["lines_truncated"], lines_repeat_cut=tot["lines_repeat_cut"], lines_failed=tot["lines_failed"], flagged=st.page_flags(s.run_id))
