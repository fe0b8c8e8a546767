"""Run recognisers over pages, page by page, timing every stage and writing the run store.

For each page: load it, find its lines (once, shared by every recogniser so
they compare on the same crops), then let each recogniser read the lines and
write the page with its lines and batches to the store in one transaction.
A page that cannot be loaded or read is written as failed with the reason and
the run goes on. Rerunning the same command resumes: the same card hash, the
same settings and the same input folder name the same run, and its finished
pages are skipped unless their file changed since (see run/writer.py, which
also holds the writer both engines share; run/host.py describes the machine).

Time is read from ``clock`` (monotonic, replaceable in tests). Session
creation and warm-up happen before the first page, outside every timing.
"""

from __future__ import annotations

import math
import os
import time
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable, Sequence

from ocrbench.errors import OcrbenchError, StoreError
from ocrbench.pages import (DEFAULT_MAX_PIXELS, DEFAULT_PDF_DPI, Layout, Listing, PageRef, inspect_page, load_page,
                            scan_pages)
from ocrbench.recognisers.base import Clock, EngineOptions, LineResult, Recogniser
from ocrbench.recognisers.card import Card, load_card
from ocrbench.recognisers.registry import open_recogniser
from ocrbench.run.host import host_info, ort_version
from ocrbench.run.writer import (PostApplied, PostProcess, ProgressEvent, RecogniserSummary, RunState, RunSummary,
                                 RunWriter, apply_postprocess, failure_reason, file_sha256, file_stamp, open_run,
                                 post_recipe, post_texts)
from ocrbench.store import TRUNCATED_CODES, BatchRecord, LineRecord, PageRecord, RunStore

# Names that moved to run/writer.py and run/host.py, kept importable from here for callers of the engine.
__all__ = ["RunOptions", "run_pages", "recognise_page", "read_page", "load_and_segment", "LoadedPage", "PageOutcome",
           "as_run_options", "with_listing", "load_cards", "input_folder", "line_records", "PostApplied", "PostProcess",
           "ProgressEvent", "RecogniserSummary", "RunState", "RunSummary", "RunWriter", "apply_postprocess",
           "file_sha256", "host_info", "open_run", "post_recipe", "post_texts"]


@dataclass(frozen=True)
class RunOptions:
    """Options of a run: the engine options plus page handling.

    All but ``warm_up`` and ``prefetch`` are recorded as the run's settings
    (they decide what a run is). Post-processing is not a setting: it never
    changes what the recogniser read, and its recipe is kept per run beside
    the post-processed text (see :func:`apply_postprocess`). ``prefetch`` loads and segments the next page
    in a second thread while the current one is recognised; ``None`` turns it
    on when the machine has a core to spare beyond the model's intra-op
    threads. With prefetch the clock is read from two threads, so tests that
    step a fake clock turn it off.
    """

    engine: EngineOptions = field(default_factory=EngineOptions)
    deskew: bool = True
    max_pixels: int = DEFAULT_MAX_PIXELS
    warm_up: bool = True
    prefetch: bool | None = None
    pdf_dpi: float = DEFAULT_PDF_DPI     # PDF pages that are not one scanned image are rendered at this
    auto_rotate: bool = False            # text turned 90/180/270 degrees is turned upright and read
    recurse: bool = True                 # subfolders (collections) are read too; not a setting (it only lists)

    def use_prefetch(self) -> bool:
        if self.prefetch is not None:
            return self.prefetch
        return (os.cpu_count() or 1) > self.engine.intra_threads

    def settings(self) -> dict:
        d = self.engine.to_dict()
        d.update(deskew=self.deskew, max_pixels=self.max_pixels)
        # recorded only when not the default, so runs started before these options existed still resume
        if self.pdf_dpi != DEFAULT_PDF_DPI:
            d["pdf_dpi"] = self.pdf_dpi
        if self.auto_rotate:
            d["auto_rotate"] = True
        return d


def run_pages(target: Path | str, cards: Sequence[Card | Path | str], *, store: RunStore | Path | str,
              options: RunOptions | EngineOptions | None = None, clock: Clock = time.perf_counter,
              progress: Callable[[ProgressEvent], None] | None = None, postprocess: PostProcess | None = None,
              fresh: bool = False) -> RunSummary:
    """Recognise every page of ``target`` (a folder or one file) with every card, into ``store``.

    ``postprocess`` (optional) maps a page's (raw texts, line confidences) to
    corrected texts, stored in ``lines.text_post``; the raw text is kept.
    ``fresh`` starts new runs instead of resuming matching ones. Raises
    CardError / StoreError / InputError for problems that stop everything;
    problems of one page are recorded as a failed page.
    """
    options = as_run_options(options)
    cards = load_cards(cards)
    listing, input_dir, st, own_store = open_inputs(target, options, store)
    refs = listing.refs
    try:
        settings = options.settings()
        states: list[RunState] = []
        for card in cards:
            rec = open_recogniser(card, options=options.engine, warm_up=options.warm_up)
            states.append(open_run(st, card, rec, settings=settings, input_dir=input_dir, fresh=fresh,
                                   engine=f"onnxruntime {ort_version()}", host=lambda rec=rec: host_info(rec),
                                   refs=refs))
        return with_listing(_run(refs, states, st, options, clock, progress, postprocess, input_dir), listing)
    finally:
        if own_store:
            st.close()


def open_inputs(target: Path | str, options: RunOptions, store: RunStore | Path | str
                ) -> tuple[Listing, str, RunStore, bool]:
    """What every engine starts from: the listing of ``target`` (pages, and every file not read), the input
    folder as runs record it, and the run store, opened here when given as a path (then the bool is True
    and the caller closes it)."""
    listing, folder = scan_inputs(target, options)
    return (listing, folder, *open_store(store))


def scan_inputs(target: Path | str, options: RunOptions) -> tuple[Listing, str]:
    """The listing of ``target`` and the input folder as runs record it (the store-free half of open_inputs)."""
    target = Path(target)
    return scan_pages(target, recurse=options.recurse), input_folder(target)


def open_store(store: RunStore | Path | str) -> tuple[RunStore, bool]:
    """The run store, opened here when given as a path (then the bool is True and the caller closes it)."""
    own = not isinstance(store, RunStore)
    return (RunStore(store) if own else store), own


def with_listing(summary: RunSummary, listing: Listing) -> RunSummary:
    """The summary with the files of the input that were not read as pages (and notes on those read with a
    caveat), so the caller can name every one."""
    summary.skipped_files = list(listing.skipped)
    summary.page_notes = list(listing.notes)
    return summary


def as_run_options(options: RunOptions | EngineOptions | None) -> RunOptions:
    """RunOptions from what callers may pass (engine options alone, or nothing for the defaults)."""
    if isinstance(options, EngineOptions):
        return RunOptions(engine=options)
    return options or RunOptions()


def load_cards(cards: Sequence[Card | Path | str]) -> list[Card]:
    """Load and validate every card (CardError on the first bad one); their names must differ."""
    cards = [c if isinstance(c, Card) else load_card(c) for c in cards]
    if not cards:
        raise OcrbenchError("no recogniser given")
    names = [c.name for c in cards]
    if len(set(names)) != len(names):
        raise OcrbenchError(f"two recognisers share the name {sorted({n for n in names if names.count(n) > 1})[0]!r}; "
                            "give each card a distinct name")
    return cards


def input_folder(target: Path) -> str:
    """The run's input folder (part of the run identity): the folder itself, or a file's folder."""
    return str((target if target.is_dir() else target.parent).resolve())


class Prefetcher:
    """Pages in order, each loaded and segmented; with a pool, page ``i + 1`` is loaded while ``i`` is read.

    Used by the serial runner and by each Dask task, so both hide page loading
    behind recognition the same way.
    """

    def __init__(self, work: Sequence[PageRef], options: RunOptions, clock: Clock, *, prefetch: bool):
        self.work, self.options, self.clock = list(work), options, clock
        self.pool = (ThreadPoolExecutor(max_workers=1, thread_name_prefix="ocrbench-prefetch")
                     if prefetch and len(self.work) > 1 else None)
        self.ahead: dict[int, Future] = {}

    def _submit(self, i: int) -> Future:
        pool = self.pool
        assert pool is not None
        return pool.submit(load_and_segment, self.work[i], options=self.options, clock=self.clock)

    def get(self, i: int) -> "LoadedPage":
        """Page ``work[i]``; when prefetching it was loaded in the background, and ``work[i + 1]`` starts now."""
        if self.pool is None:
            return load_and_segment(self.work[i], options=self.options, clock=self.clock)
        fut = self.ahead.pop(i, None) or self._submit(i)
        if i + 1 < len(self.work):
            self.ahead[i + 1] = self._submit(i + 1)
        return fut.result()

    def close(self) -> None:
        if self.pool is not None:
            self.pool.shutdown(wait=True, cancel_futures=True)

    def __enter__(self) -> "Prefetcher":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def _run(refs: list[PageRef], states: list[RunState], st: RunStore, options: RunOptions, clock: Clock,
         progress, postprocess, input_dir: str) -> RunSummary:
    w = RunWriter(refs, states, st, clock, progress, input_dir)
    work = [r for r in refs if r.id not in w.skipped_ids]
    w.emit("start")
    with Prefetcher(work, options, clock, prefetch=options.use_prefetch()) as pages:
        for ref in refs:
            page_id = ref.id
            if page_id in w.skipped_ids:
                w.skip(page_id)
                continue
            todo = [s for s in states if page_id not in s.done]
            outcomes = read_page(pages.get(w.processed), [s.rec for s in todo], clock=clock, postprocess=postprocess)
            w.write(page_id, zip(todo, outcomes))
    return w.finish(postprocess)


@dataclass
class PageOutcome:
    """What one recogniser made of one page, ready to be written to the store in one transaction."""

    page: PageRecord
    lines: list[LineRecord] = field(default_factory=list)
    batches: list[BatchRecord] = field(default_factory=list)

    @property
    def failed(self) -> bool:
        return self.page.status == "failed"


@dataclass
class LoadedPage:
    """A page loaded and segmented (or the reason it could not be), before any recogniser reads it."""

    ref: PageRef
    content_hash: str | None
    t_load: float | None
    t_segment: float | None
    width: int | None = None
    height: int | None = None
    layout: Layout | None = None
    error: str | None = None
    file_size: int | None = None
    file_mtime_ns: int | None = None
    flags: list[str] | None = None       # sanity flags (pages/sanity.py); None when the page was not checked

    @property
    def page_id(self) -> str:
        return self.ref.id

    @property
    def unreadable(self) -> bool:
        """Flagged so that its text would be confident garbage: blank, not text, or turned and not turned back
        (without ``--auto-rotate``). Such a page is stored done with its flags and no lines, never as text."""
        flags = self.flags or []
        turned_back = self.layout is not None and self.layout.rotation != 0
        return bool(set(flags) & UNREAD_FLAGS) or (not turned_back and any(f.startswith("rotated_") for f in flags))

    def record(self, status: str, **kw) -> PageRecord:
        """This page's row of ``pages`` with what loading measured, plus ``kw``."""
        return PageRecord(page_id=self.page_id, path=self.ref.display(), content_hash=self.content_hash,
                          status=status, t_load=self.t_load, t_segment=self.t_segment, file_size=self.file_size,
                          file_mtime_ns=self.file_mtime_ns, collection=self.ref.collection,
                          flags=None if self.flags is None else ",".join(self.flags), **kw)


#: Flags of pages that are not read at all: nothing on them is text (see pages/sanity.py).
UNREAD_FLAGS = frozenset({"blank", "not_text_like"})


def load_and_segment(ref: PageRef, *, options: RunOptions, clock: Clock = time.perf_counter) -> LoadedPage:
    """Load one page and find its lines; a problem of the page is returned as ``error``, never raised."""
    size, mtime = file_stamp(Path(ref.path))          # before hashing: a later change shows as a difference
    chash = file_sha256(Path(ref.path))
    t0 = clock()
    t_load = None
    try:
        page = load_page(ref, max_pixels=options.max_pixels, pdf_dpi=options.pdf_dpi)
        t1 = clock()
        t_load = t1 - t0
        # over-wide lines are not flagged here: each recogniser cuts them to its own card's width
        layout, check = inspect_page(page.gray, deskew=options.deskew, auto_rotate=options.auto_rotate,
                                     max_aspect=math.inf)
        t_segment = clock() - t1
    except StoreError:
        raise
    except Exception as e:  # noqa: BLE001 - one bad page must not stop the run; the reason is stored
        return LoadedPage(ref, chash, t_load, None, error=failure_reason(e), file_size=size, file_mtime_ns=mtime)
    h, w = page.gray.shape[:2]
    return LoadedPage(ref, chash, t_load, t_segment, width=w, height=h, layout=layout, file_size=size,
                      file_mtime_ns=mtime, flags=list(check.flags))


#: Why a line whose model output was NaN or infinite has no text.
NON_FINITE = "the model gave NaN or infinite scores for this line; no text kept"


def _finite(r: LineResult) -> bool:
    """False when the recogniser flagged the line as unreadable (``LineResult.failure``) or its scores are not
    finite."""
    if r.failure:
        return False
    return math.isfinite(r.confidence) and all(math.isfinite(c) for c in r.char_confidences)


def line_records(layout_lines, results: Sequence[LineResult], post: Sequence[str | None] | None) -> list[LineRecord]:
    """The ``lines`` rows of one page: a line whose scores are not finite is stored failed, with the reason."""
    out = []
    for i, (box, r) in enumerate(zip(layout_lines, results)):
        common = dict(line_no=i + 1, x0=int(box.x0), y0=int(box.y0), x1=int(box.x1), y1=int(box.y1),
                      width_px=r.width_px, steps=r.steps, batch_no=r.batch_no, t_line=r.t_line,
                      truncated=TRUNCATED_CODES.get(r.cut_by or "token limit", 1) if r.truncated else 0)
        if not _finite(r):
            out.append(LineRecord(text="", text_post=None, confidence=None, char_conf=[], n_chars=0,
                                  error=NON_FINITE, **common))
            continue
        out.append(LineRecord(text=r.text, text_post=None if post is None else post[i],
                              confidence=float(r.confidence), char_conf=list(r.char_confidences),
                              n_chars=len(r.text), **common))
    return out


def _post(postprocess: PostProcess, results: Sequence[LineResult]) -> list[str | None]:
    """Post-processed text of a page's lines; lines without a finite score pass as empty and get none."""
    ok = [_finite(r) for r in results]
    texts = [r.text if g else "" for r, g in zip(results, ok)]
    out = post_texts(postprocess, texts, [r.confidence if g else None for r, g in zip(results, ok)],
                     [list(r.char_confidences) if g else None for r, g in zip(results, ok)])
    return [t if g else None for t, g in zip(out, ok)]


def read_page(loaded: LoadedPage, recognisers: Sequence[Recogniser], *, clock: Clock = time.perf_counter,
              postprocess: PostProcess | None = None) -> list[PageOutcome]:
    """Let each recogniser read the lines of a loaded page; one outcome per recogniser (failures included)."""
    if loaded.error is not None or loaded.layout is None:
        return [PageOutcome(loaded.record("failed", error=loaded.error)) for _ in recognisers]
    layout = loaded.layout
    if loaded.unreadable:
        rec = loaded.record("done", width=loaded.width, height=loaded.height, n_lines=0,
                            skew_degrees=float(layout.skew_degrees), t_preprocess=0.0, t_encode=0.0, t_steps=0.0,
                            t_collapse=0.0, t_postprocess=0.0, t_total=loaded.t_load + loaded.t_segment)
        return [PageOutcome(rec) for _ in recognisers]
    crops = [lb.crop for lb in layout.lines]
    size = dict(width=loaded.width, height=loaded.height, n_lines=len(crops),
                skew_degrees=float(layout.skew_degrees))
    out: list[PageOutcome] = []
    for rec_ in recognisers:
        t3 = clock()
        try:
            results, timings = rec_.recognise(crops, clock=clock) if crops else ([], [])
            t4 = clock()
            post = _post(postprocess, results) if postprocess is not None else None
            t5 = clock()
        except StoreError:
            raise
        except Exception as e:  # noqa: BLE001 - recorded as a failed page
            out.append(PageOutcome(loaded.record("failed", error=failure_reason(e), **size)))
            continue
        rec = loaded.record(
            "done", **size, t_preprocess=sum(b.t_preprocess for b in timings),
            t_encode=sum(b.t_encode for b in timings), t_steps=sum(b.t_steps for b in timings),
            t_collapse=sum(b.t_collapse for b in timings),
            t_postprocess=(t5 - t4) if postprocess is not None else 0.0,
            t_total=loaded.t_load + loaded.t_segment + (t5 - t3))
        out.append(PageOutcome(rec, line_records(layout.lines, results, post),
                               [BatchRecord(**asdict(b)) for b in timings]))
    return out


def recognise_page(ref: PageRef, recognisers: Sequence[Recogniser], *, options: RunOptions,
                   clock: Clock = time.perf_counter, postprocess: PostProcess | None = None) -> list[PageOutcome]:
    """Load and segment one page once, then let each recogniser read its lines; one outcome per recogniser.

    Touches no store, so the serial runner and the scale-out workers share it.
    A problem of the page (unreadable, too large, a recogniser failing on it)
    becomes a failed outcome carrying the reason; it is never raised.
    """
    return read_page(load_and_segment(ref, options=options, clock=clock), recognisers, clock=clock,
                     postprocess=postprocess)
