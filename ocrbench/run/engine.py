"""Run recognisers over pages, page by page, timing every stage and writing the run store.

For each page: load it, find its lines (once, shared by every recogniser so
they compare on the same crops), then let each recogniser read the lines and
write the page with its lines and batches to the store in one transaction.
A page that cannot be loaded or read is written as failed with the reason and
the run goes on. Rerunning the same command resumes: the same card hash, the
same settings and the same input folder name the same run, and its finished
pages are skipped.

Time is read from ``clock`` (monotonic, replaceable in tests). Session
creation and warm-up happen before the first page, outside every timing.
"""

from __future__ import annotations

import hashlib
import os
import platform
import socket
import time
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable, Sequence

import numpy as np

from ocrbench.errors import InputError, OcrbenchError, StoreError
from ocrbench.pages import DEFAULT_MAX_PIXELS, Layout, PageRef, analyse_page, list_pages, load_page
from ocrbench.recognisers.base import Clock, EngineOptions, LineResult, Recogniser
from ocrbench.recognisers.registry import open_recogniser
from ocrbench.recognisers.card import Card, load_card
from ocrbench.store import BatchRecord, LineRecord, PageRecord, RunStore

PostProcess = Callable[[list[str], list[float]], list[str]]


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

    def use_prefetch(self) -> bool:
        if self.prefetch is not None:
            return self.prefetch
        return (os.cpu_count() or 1) > self.engine.intra_threads

    def settings(self) -> dict:
        d = self.engine.to_dict()
        d.update(deskew=self.deskew, max_pixels=self.max_pixels)
        return d


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

    @property
    def failed_pages(self) -> list[str]:
        """Distinct page ids that failed for at least one recogniser."""
        return sorted({pid for r in self.recognisers for pid, _ in r.failures})

    def to_dict(self) -> dict:
        d = asdict(self)
        d["failed_pages"] = self.failed_pages
        for r in d["recognisers"]:
            r["failures"] = [{"page_id": p, "error": e} for p, e in r["failures"]]
        return d


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
                res.failures.append((page_id, _reason(e)))
                continue
            res.pages += 1
            res.lines += len(rows)
            res.changed_lines += sum(a != b for a, b in zip(texts, out))
            yield page_id, [(r[0], t) for r, t in zip(rows, out)]

    st.rewrite_post(run_id, pages(), recipe)
    return res


def file_sha256(path: Path) -> str | None:
    """sha256 of a page file, or None when it cannot be read."""
    h = hashlib.sha256()
    try:
        with open(path, "rb") as f:
            for chunk in iter(lambda: f.read(1 << 20), b""):
                h.update(chunk)
    except OSError:
        return None
    return h.hexdigest()


def _cpu_model() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.lower().startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def host_info(rec: Recogniser) -> dict:
    """What the planner needs to know about the machine and engine a run was measured on."""
    import onnxruntime as ort

    try:
        import psutil

        physical = psutil.cpu_count(logical=False)
    except Exception:  # noqa: BLE001 - psutil is optional here
        physical = None
    return {"cpu_model": _cpu_model(), "cores": os.cpu_count(), "physical_cores": physical,
            "os": platform.platform(), "python": platform.python_version(), "onnxruntime": ort.__version__,
            "providers": rec.providers, "intra_threads": rec.options.intra_threads,
            "inter_threads": rec.options.inter_threads, "hostname": socket.gethostname()}


def _percentile(values: Sequence[float], q: float) -> float | None:
    return float(np.percentile(np.asarray(values, dtype=float), q)) if len(values) else None


def _line_records(layout_lines, results: list[LineResult], post: list[str] | None) -> list[LineRecord]:
    out = []
    for i, (box, r) in enumerate(zip(layout_lines, results)):
        out.append(LineRecord(line_no=i + 1, x0=int(box.x0), y0=int(box.y0), x1=int(box.x1), y1=int(box.y1),
                              width_px=r.width_px, text=r.text, text_post=None if post is None else post[i],
                              confidence=float(r.confidence), char_conf=list(r.char_confidences),
                              n_chars=len(r.text), steps=r.steps, batch_no=r.batch_no, t_line=r.t_line))
    return out


@dataclass
class RunState:
    card: Card
    rec: Recogniser
    run_id: int
    resumed: bool
    done: set[str]
    new: int = 0


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
    target = Path(target)
    refs = list_pages(target)
    input_dir = input_folder(target)
    own_store = not isinstance(store, RunStore)
    st = RunStore(store) if own_store else store
    try:
        settings = options.settings()
        states: list[RunState] = []
        for card in cards:
            rec = open_recogniser(card, options=options.engine, warm_up=options.warm_up)
            states.append(open_run(st, card, rec, settings=settings, input_dir=input_dir, fresh=fresh,
                                   engine=f"onnxruntime {_ort_version()}", host=lambda rec=rec: host_info(rec)))
        return _run(refs, states, st, options, clock, progress, postprocess, input_dir)
    finally:
        if own_store:
            st.close()


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


def open_run(st: RunStore, card: Card, rec: Recogniser | None, *, settings: dict, input_dir: str, fresh: bool,
             engine: str, host: Callable[[], dict]) -> RunState:
    """Resume the run with this card, settings and input folder, or start one; ``host()`` is asked only then.

    Whichever engine ran it before, a resumed run records ``engine`` as the one that ran it last.
    """
    run_id = None if fresh else st.find_run(card_hash=card.card_hash, settings=settings, input_dir=input_dir)
    resumed = run_id is not None
    if run_id is None:
        run_id = st.start_run(recogniser=card.name, kind=card.kind, card_path=str(card.path),
                              card_hash=card.card_hash, settings=settings, input_dir=input_dir,
                              host=host(), engine=engine)
    else:
        st.set_engine(run_id, engine)
    done = {pid for pid, (status, _) in st.page_status(run_id).items() if status == "done"}
    return RunState(card, rec, run_id, resumed, done)  # type: ignore[arg-type]


def _ort_version() -> str:
    import onnxruntime as ort

    return ort.__version__


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
        self.done = self.failed = self.lines = self.processed = 0

    def emit(self, kind, page_id=None, failed=False, skipped=False) -> None:
        if self.progress is not None:
            self.progress(ProgressEvent(kind=kind, pages_total=self.total, pages_done=self.done,
                                        pages_skipped=len(self.skipped_ids), pages_failed=self.failed,
                                        lines_done=self.lines, page_id=page_id, failed=failed, skipped=skipped,
                                        elapsed=self.clock() - self.start))

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
                recipe = post_recipe(postprocess)
                stored = self.st.post_recipe(s.run_id)
                with_post, n = self.st.post_coverage(s.run_id)
                if s.resumed and (stored != recipe or with_post < n):
                    post_failures[s.run_id] = apply_postprocess(self.st, s.run_id, postprocess).failures
                elif stored != recipe:
                    self.st.set_post_recipe(s.run_id, recipe)
            self.st.finish_run(s.run_id)
        wall = self.clock() - self.start
        return RunSummary(input_dir=self.input_dir, pages_total=self.total, pages_processed=self.processed,
                          pages_skipped=len(self.skipped_ids), wall_seconds=wall,
                          recognisers=[_summary(self.st, s, post_failures.get(s.run_id, [])) for s in self.states])


def _run(refs: list[PageRef], states: list[RunState], st: RunStore, options: RunOptions, clock: Clock,
         progress, postprocess, input_dir: str) -> RunSummary:
    w = RunWriter(refs, states, st, clock, progress, input_dir)
    work = [r for r in refs if r.id not in w.skipped_ids]
    pool = (ThreadPoolExecutor(max_workers=1, thread_name_prefix="ocrbench-prefetch")
            if options.use_prefetch() and len(work) > 1 else None)
    ahead: dict[int, Future] = {}

    def loaded(i: int) -> LoadedPage:
        """Page ``work[i]``; when prefetching it was loaded in the background, and ``work[i + 1]`` starts now."""
        if pool is None:
            return load_and_segment(work[i], options=options, clock=clock)
        fut = ahead.pop(i, None) or pool.submit(load_and_segment, work[i], options=options, clock=clock)
        if i + 1 < len(work):
            ahead[i + 1] = pool.submit(load_and_segment, work[i + 1], options=options, clock=clock)
        return fut.result()

    w.emit("start")
    try:
        for ref in refs:
            page_id = ref.id
            if page_id in w.skipped_ids:
                w.skip(page_id)
                continue
            todo = [s for s in states if page_id not in s.done]
            outcomes = read_page(loaded(w.processed), [s.rec for s in todo], clock=clock, postprocess=postprocess)
            w.write(page_id, zip(todo, outcomes))
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)
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

    @property
    def page_id(self) -> str:
        return self.ref.id


def load_and_segment(ref: PageRef, *, options: RunOptions, clock: Clock = time.perf_counter) -> LoadedPage:
    """Load one page and find its lines; a problem of the page is returned as ``error``, never raised."""
    chash = file_sha256(Path(ref.path))
    t0 = clock()
    t_load = None
    try:
        page = load_page(ref, max_pixels=options.max_pixels)
        t1 = clock()
        t_load = t1 - t0
        layout = analyse_page(page.gray, deskew=options.deskew)
        t_segment = clock() - t1
    except StoreError:
        raise
    except Exception as e:  # noqa: BLE001 - one bad page must not stop the run; the reason is stored
        return LoadedPage(ref, chash, t_load, None, error=_reason(e))
    h, w = page.gray.shape[:2]
    return LoadedPage(ref, chash, t_load, t_segment, width=w, height=h, layout=layout)


def read_page(loaded: LoadedPage, recognisers: Sequence[Recogniser], *, clock: Clock = time.perf_counter,
              postprocess: PostProcess | None = None) -> list[PageOutcome]:
    """Let each recogniser read the lines of a loaded page; one outcome per recogniser (failures included)."""
    page_id, path, chash = loaded.page_id, loaded.ref.display(), loaded.content_hash
    t_load, t_segment = loaded.t_load, loaded.t_segment
    if loaded.error is not None or loaded.layout is None:
        return [PageOutcome(PageRecord(page_id=page_id, path=path, content_hash=chash, status="failed",
                                       error=loaded.error, t_load=t_load, t_segment=t_segment))
                for _ in recognisers]
    layout = loaded.layout
    crops = [lb.crop for lb in layout.lines]
    w, h = loaded.width, loaded.height
    out: list[PageOutcome] = []
    for rec_ in recognisers:
        t3 = clock()
        try:
            results, timings = rec_.recognise(crops, clock=clock) if crops else ([], [])
            t4 = clock()
            post = None
            if postprocess is not None:
                post = post_texts(postprocess, [r.text for r in results], [r.confidence for r in results],
                                  [list(r.char_confidences) for r in results])
            t5 = clock()
        except StoreError:
            raise
        except Exception as e:  # noqa: BLE001 - recorded as a failed page
            out.append(PageOutcome(PageRecord(page_id=page_id, path=path, content_hash=chash, status="failed",
                                              error=_reason(e), width=w, height=h, n_lines=len(crops),
                                              skew_degrees=layout.skew_degrees, t_load=t_load,
                                              t_segment=t_segment)))
            continue
        rec = PageRecord(
            page_id=page_id, path=path, content_hash=chash, status="done", width=w, height=h,
            n_lines=len(crops), skew_degrees=float(layout.skew_degrees), t_load=t_load, t_segment=t_segment,
            t_preprocess=sum(b.t_preprocess for b in timings), t_encode=sum(b.t_encode for b in timings),
            t_steps=sum(b.t_steps for b in timings), t_collapse=sum(b.t_collapse for b in timings),
            t_postprocess=(t5 - t4) if postprocess is not None else 0.0,
            t_total=t_load + t_segment + (t5 - t3))
        out.append(PageOutcome(rec, _line_records(layout.lines, results, post),
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


def _reason(e: BaseException) -> str:
    if isinstance(e, InputError):
        return e.reason
    if isinstance(e, OcrbenchError):
        return str(e)
    return f"{type(e).__name__}: {e}"


def _summary(st: RunStore, s: RunState, post_failures: list[tuple[str, str]] | None = None) -> RecogniserSummary:
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
        post_failures=list(post_failures or []))
