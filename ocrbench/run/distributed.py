"""Run the runner on a Dask cluster: many pages at once, one writer, memory that stays flat.

Scale-out wraps the runner and does not change it. Every page is loaded by
:func:`ocrbench.run.engine.load_and_segment` and read by
:func:`ocrbench.run.engine.read_page`, pipelined by the same
:class:`ocrbench.run.engine.Prefetcher` as in the serial runner (the next page of
a task is loaded while this one is recognised), so a page's text and timings
mean the same whichever engine made them. What differs is only where pages are
read and how many at a time:

* Workers (processes of a :class:`distributed.LocalCluster` on this machine, or
  an existing cluster reached at ``tcp://HOST:PORT``) read pages. Each worker
  process opens each recogniser once (before the first page is submitted, or
  on its first page when it joins later) and keeps it in a module-level cache
  keyed by the card hash and the engine options.
* The client process is the single writer: it records each page in the SQLite
  store, in one transaction, as soon as its task completes. SQLite has one
  writer at a time anyway, and a single writer keeps "one transaction per
  page, a killed run loses at most the pages in flight" true.
* Only a bounded number of tasks is in flight (by default four times the cluster's
  threads), so the client holds a few pages' results at a time however large
  the archive is.

Runs are identified exactly as the serial runner identifies them (card hash,
settings, input folder), and the Dask options are not settings: a run started
by one engine is resumed by the other, and ``runs.engine`` records the engine
that ran it last.

When a worker dies mid-page, Dask gives the task to another worker; a task
whose workers died ``distributed.scheduler.allowed-failures`` + 1 times is split
into one task per page, and a page that still kills its workers (a page that
exhausts memory, say) is recorded as failed with that reason, and the run goes
on. Workers of a remote cluster need ocrbench installed and must see the cards
and pages at the same paths as the client.
"""

from __future__ import annotations

import itertools
import json
import logging
import os
import signal
import socket
import threading
import time
import uuid
from collections import Counter, deque
from concurrent.futures import ThreadPoolExecutor
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterator, Sequence

from ocrbench.errors import ClusterError, ConfigError, OcrbenchError
from ocrbench.pages import PageRef
from ocrbench.recognisers.base import Clock, EngineOptions, Recogniser
from ocrbench.recognisers.registry import open_recogniser
from ocrbench.recognisers.card import Card, card_hash_on_disk
from ocrbench.run.engine import (PageOutcome, Prefetcher, RunOptions, as_run_options, load_cards, open_store,
                                 read_page, scan_inputs, with_listing)
from ocrbench.run.host import host_info
from ocrbench.run.writer import (PostProcess, ProgressEvent, RunState, RunSummary, RunWriter, file_sha256, file_stamp,
                                 open_run)
from ocrbench.store import PageRecord, RunStore


# --------------------------------------------------------------------------- addresses and bounds

#: Seconds to reach an existing scheduler (and for it to show a worker) before giving up.
DEFAULT_CONNECT_TIMEOUT = 10.0

#: A local cluster may run at most this many worker threads per core: beyond it workers only
#: queue for the cores and each holds its own copy of every model.
MAX_THREADS_PER_CORE = 2

SCHEMES = ("tcp", "tls")


def scheduler_endpoint(address: str) -> tuple[str, str, int]:
    """``(scheme, host, port)`` of a scheduler address such as ``tcp://10.0.0.5:8786``.

    Checked before any connection is tried: the scheme must be tcp or tls, the
    host non-empty, the port a number from 1 to 65535. Raises ConfigError
    naming the address and what is wrong.
    """
    def bad(why: str) -> ConfigError:
        return ConfigError(address, f"not a Dask scheduler address: {why} (expected tcp://HOST:PORT)")

    scheme, sep, rest = address.partition("://")
    if not sep:
        raise bad("no scheme")
    if scheme.lower() not in SCHEMES:
        raise bad(f"scheme {scheme!r} is not one of {', '.join(SCHEMES)}")
    host, colon, port = rest.rpartition(":")
    if not colon or not host:
        raise bad("no HOST:PORT after the scheme")
    host = host[1:-1] if host.startswith("[") and host.endswith("]") else host     # [::1]
    if not port.isdigit() or not 1 <= int(port) <= 65535:
        raise bad(f"port {port!r} is not a number from 1 to 65535")
    if any(c.isspace() or c in "/?#@" for c in host):
        raise bad(f"host {host!r} is not a host name or address")
    return scheme.lower(), host, int(port)


#: The most pages one task gets when the size is chosen automatically.
MAX_AUTO_PAGES_PER_TASK = 32


def auto_pages_per_task(pages: int, threads: int) -> int:
    """Pages per task when none is given: 1 to 32 pages, about four tasks per worker thread.

    Several pages a task let the worker pipeline them (load the next while
    recognising this one) and keep the scheduler's per-task cost small. A task's
    first page is not hidden: its loading and segmentation (0.23 s of a page's
    0.56 s on the demo pages, measured) run while the prefetch thread idles, once
    per task. Pipelined pages take some 0.34 s each, so a task boundary costs about
    2 % of a 32-page task and 8 % of an 8-page one (the former cap; arithmetic from
    those stage times). With several threads, four tasks each keep them evenly busy
    to the end of the run (a single thread has no one to wait for: up to 32 pages).
    """
    per_thread_tasks = 4 if threads > 1 else 1
    return max(1, min(MAX_AUTO_PAGES_PER_TASK, -(-pages // (per_thread_tasks * max(1, threads)))))


def check_local_size(workers: int, threads_per_worker: int = 1, cores: int | None = None) -> None:
    """Refuse a local cluster of more worker threads than :data:`MAX_THREADS_PER_CORE` per core."""
    cores = cores or os.cpu_count() or 1
    cap = MAX_THREADS_PER_CORE * cores
    if workers * threads_per_worker > cap:
        raise OcrbenchError(f"{workers} workers x {threads_per_worker} threads is more than this machine can use: "
                            f"at most {cap} worker threads ({MAX_THREADS_PER_CORE} per core, {cores} cores); "
                            f"give --workers {max(1, cap // threads_per_worker)} or fewer")


def probe_scheduler(address: str, timeout: float) -> None:
    """Open and close a TCP connection to the scheduler, so a refused port or an unknown host fails at once."""
    _, host, port = scheduler_endpoint(address)
    try:
        with socket.create_connection((host, port), timeout=timeout):
            pass
    except socket.gaierror as e:
        raise ClusterError(f"cannot reach the Dask scheduler at {address}: unknown host {host!r}") from e
    except ConnectionRefusedError as e:
        raise ClusterError(f"cannot reach the Dask scheduler at {address}: connection refused "
                           "(no scheduler listens there)") from e
    except (socket.timeout, TimeoutError) as e:
        raise ClusterError(f"cannot reach the Dask scheduler at {address}: no answer within {timeout:g} s "
                           "(--connect-timeout)") from e
    except OSError as e:
        raise ClusterError(f"cannot reach the Dask scheduler at {address}: {e.strerror or e}") from e


@dataclass(frozen=True)
class DaskOptions:
    """Where and how widely to run. None of these is part of a run's identity.

    ``workers``/``threads_per_worker``/``processes`` shape a LocalCluster started
    for this run (at most :data:`MAX_THREADS_PER_CORE` worker threads per core
    of this machine); ``scheduler`` (``tcp://HOST:PORT``, checked before any
    connection) uses an existing cluster instead, reached within
    ``connect_timeout`` seconds. ``pages_per_task`` groups pages into one task
    (1: each page is a task; None: :func:`auto_pages_per_task`); within a task
    a worker loads and segments the next page while it recognises the current
    one, as the serial runner does. ``max_in_flight`` bounds the tasks
    submitted and not yet written (default: four times the cluster's threads,
    so a worker never waits for the client).
    """

    workers: int | None = None
    threads_per_worker: int = 1
    processes: bool = True
    scheduler: str | None = None
    pages_per_task: int | None = None
    max_in_flight: int | None = None
    connect_timeout: float = DEFAULT_CONNECT_TIMEOUT

    def __post_init__(self) -> None:
        if self.workers is not None and self.workers < 1:
            raise OcrbenchError(f"workers must be at least 1, not {self.workers}")
        if not (self.connect_timeout > 0 and self.connect_timeout < float("inf")):
            raise OcrbenchError(f"the connect timeout must be a positive number of seconds, not {self.connect_timeout}")
        if self.scheduler is not None:
            scheduler_endpoint(self.scheduler)
        elif self.workers is not None:
            check_local_size(self.workers, self.threads_per_worker)
        if self.threads_per_worker < 1:
            raise OcrbenchError(f"threads per worker must be at least 1, not {self.threads_per_worker}")
        if self.pages_per_task is not None and self.pages_per_task < 1:
            raise OcrbenchError(f"pages per task must be at least 1, not {self.pages_per_task}")
        if self.max_in_flight is not None and self.max_in_flight < 1:
            raise OcrbenchError(f"tasks in flight must be at least 1, not {self.max_in_flight}")
        if self.scheduler is not None and self.workers is not None:
            raise OcrbenchError("give either a number of workers (a cluster started here) or a scheduler address "
                                "(an existing cluster), not both")



# --------------------------------------------------------------------------- worker side

_CACHE: dict[tuple[str, str], Recogniser] = {}
_LOADS: Counter = Counter()
_LOCK = threading.Lock()


def _engine_key(options: RunOptions) -> str:
    return json.dumps({**options.engine.to_dict(), "warm_up": options.warm_up}, sort_keys=True)


def worker_recogniser(card: Card, options: RunOptions) -> Recogniser:
    """This process's recogniser for ``card``: opened (and warmed up) on first use, then reused.

    The card's files are hashed again here (:func:`card_hash_on_disk`: the hash only, not a second
    validation, which would import ``onnx``: 0.7 s of every worker's start-up), so a worker that sees
    other model files than the client (a remote worker with a stale copy) is refused rather than
    silently mixing models in one run.
    """
    key = (card.card_hash, _engine_key(options))
    rec = _CACHE.get(key)
    if rec is not None:
        return rec
    with _LOCK:                                   # threads of one worker open it once between them
        rec = _CACHE.get(key)
        if rec is None:
            here = card_hash_on_disk(card)
            if here != card.card_hash:
                raise ClusterError(f"{card.path}: the worker's copy of recogniser {card.name!r} differs from the "
                                   f"client's (card hash {here[:12]} vs {card.card_hash[:12]})")
            rec = open_recogniser(card, options=options.engine, warm_up=options.warm_up)
            _CACHE[key] = rec
            _LOADS[card.card_hash] += 1
    return rec


def recogniser_loads() -> dict[str, int]:
    """card hash -> how many times this process opened that recogniser (for checks: once per worker)."""
    return dict(_LOADS)


def _portable_error(e: BaseException) -> tuple:
    """An exception as plain values: ocrbench's errors take (path, reason) and do not survive pickling as-is."""
    return ("error", type(e).__name__, getattr(e, "path", None), getattr(e, "reason", None), str(e))


def _raise_portable(err: tuple) -> None:
    import ocrbench.errors as errors

    _, cls_name, path, reason, message = err
    cls = getattr(errors, cls_name, None)
    if isinstance(cls, type) and issubclass(cls, errors.InputError) and path is not None and reason is not None:
        raise cls(path, reason)
    if isinstance(cls, type) and issubclass(cls, errors.OcrbenchError) and not issubclass(cls, errors.InputError):
        raise cls(message)
    raise ClusterError(f"a Dask worker failed: {cls_name}: {message}")


#: Below this MALLOC_TRIM_THRESHOLD_ (bytes) a worker's allocator is retuned: see :func:`retune_allocator`.
SMALL_TRIM_THRESHOLD = 16 * 1024 * 1024
_RETUNED: list[bool] = []


def retune_allocator() -> bool:
    """Undo a tiny glibc trim threshold in this worker process; True when it was undone.

    Dask starts worker processes with ``MALLOC_TRIM_THRESHOLD_=65536`` by default.
    Setting it also switches off glibc's adaptive mmap threshold, so every
    page-sized numpy temporary is mapped, zero-filled and unmapped again:
    measured on this project's pages, segmentation ran 2.2x slower (0.20 vs
    0.09 s a page). Clusters started by ocrbench do not set the variable (see
    :func:`connect`); on an existing cluster that does, each worker sets the
    mmap and trim thresholds back to sizes that keep page buffers on the heap.
    Linux with glibc only; elsewhere nothing is done.
    """
    import os
    import sys

    if _RETUNED:
        return _RETUNED[0]
    done = False
    raw = os.environ.get("MALLOC_TRIM_THRESHOLD_")
    try:
        small = raw is not None and int(raw) < SMALL_TRIM_THRESHOLD
    except ValueError:
        small = False
    if small and sys.platform.startswith("linux"):
        try:
            import ctypes

            libc = ctypes.CDLL("libc.so.6")
            m_trim_threshold, m_mmap_threshold = -1, -3          # glibc's <malloc.h> parameter numbers
            done = bool(libc.mallopt(m_mmap_threshold, 32 * 1024 * 1024)) and \
                bool(libc.mallopt(m_trim_threshold, 128 * 1024 * 1024))
        except (OSError, AttributeError):                      # not glibc: leave the allocator alone
            done = False
    _RETUNED.append(done)
    return done


def _preflight(cards: Sequence[Card], options: RunOptions) -> tuple:
    """On a worker: open every recogniser (caught early: a model onnxruntime cannot load) and describe the host."""
    try:
        retuned = retune_allocator()
        return ("ok", [{**host_info(worker_recogniser(c, options)), "allocator_retuned": retuned} for c in cards])
    except Exception as e:  # noqa: BLE001 - sent back and raised in the client as a typed error
        return _portable_error(e)


def _recognise_chunk(refs: Sequence[PageRef], todo: Sequence[Sequence[int]], cards: Sequence[Card],
                     options: RunOptions, postprocess: PostProcess | None) -> tuple:
    """The task: read a few pages; for each, the outcomes of the recognisers listed in ``todo``.

    Pages are pipelined as in the serial runner (:class:`ocrbench.run.engine.Prefetcher`): the next
    page is loaded and segmented in a second thread while this one is recognised.
    """
    try:
        retune_allocator()                        # a worker that joined after the preflight
        recs = [worker_recogniser(c, options) for c in cards]
    except Exception as e:  # noqa: BLE001 - a setup problem stops the run, in the client
        return _portable_error(e)
    out = []
    with Prefetcher(refs, options, time.perf_counter, prefetch=options.use_prefetch()) as pages:
        for i, (ref, idx) in enumerate(zip(refs, todo)):
            out.append((ref.id, read_page(pages.get(i), [recs[j] for j in idx], postprocess=postprocess)))
    return ("ok", out)


# --------------------------------------------------------------------------- client side

#: Entries of diagnostic history kept by the client and a LocalCluster's scheduler (see connect).
HISTORY_ENTRIES = 100


@dataclass
class _Cluster:
    client: object
    description: str
    threads: int
    workers: int
    scheduler: str


@contextmanager
def sigint_ignored() -> Iterator[None]:
    """Ignore Ctrl-C (SIGINT) in this process while worker processes are started or closed.

    An ignored signal stays ignored across fork and exec (POSIX execve), and
    Python installs its KeyboardInterrupt handler only where SIGINT is at its
    default, so the cluster's worker processes never see the terminal's
    Ctrl-C: only this process does, and it closes them itself. (A blocked
    signal would not do: Python's start-up in a spawned process clears the
    mask, measured.) The price: a Ctrl-C pressed during those few seconds is
    dropped; press it again once pages run.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    old = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, old)


def _remote_client(dask: DaskOptions):
    """A client of the existing cluster at ``dask.scheduler``; ClusterError, quickly, when it cannot be used."""
    from distributed import Client

    probe_scheduler(dask.scheduler, dask.connect_timeout)      # a refused port fails here, at once
    try:
        client = Client(dask.scheduler, timeout=dask.connect_timeout)
    except (OSError, TimeoutError) as e:
        raise ClusterError(f"cannot reach the Dask scheduler at {dask.scheduler}: {e}") from e
    try:
        client.wait_for_workers(1, timeout=dask.connect_timeout)
    except (OSError, TimeoutError) as e:
        client.close()
        raise ClusterError(f"the Dask scheduler at {dask.scheduler} has no workers "
                           f"(waited {dask.connect_timeout:g} s, --connect-timeout)") from e
    return client


def _local_cluster(dask: DaskOptions):
    """A LocalCluster of ``dask.workers`` started here, its workers deaf to the terminal's Ctrl-C."""
    from distributed import LocalCluster

    n = dask.workers or 1
    check_local_size(n, dask.threads_per_worker)
    with sigint_ignored():
        try:   # the scheduler's HTTP server always starts: a free port on this machine only
            return LocalCluster(n_workers=n, threads_per_worker=dask.threads_per_worker, processes=dask.processes,
                                dashboard_address="127.0.0.1:0", silence_logs=logging.CRITICAL)
        except Exception as e:  # noqa: BLE001 - anything that stops the cluster from starting
            raise ClusterError(f"cannot start a local Dask cluster of {n} workers: {type(e).__name__}: {e}") from e


@contextmanager
def connect(dask: DaskOptions) -> Iterator[_Cluster]:
    """A Dask client: on a LocalCluster started here (closed on exit), or on the cluster at ``dask.scheduler``."""
    import dask.config as dask_config
    from distributed import Client

    # The client, and the scheduler of a LocalCluster, live in the writer's process. Their diagnostic
    # histories (recent messages, which hold every submitted task; transitions; events) keep 1,000
    # entries each by default: some 15 MB grown over the first ~1,500 pages before they level off.
    # A short history keeps the writer flat from the first page.
    keep = min(int(dask_config.get("distributed.admin.low-level-log-length") or 1000), HISTORY_ENTRIES)
    cluster = None
    # Worker processes started here do not get Dask's MALLOC_TRIM_THRESHOLD_=65536 (None unsets it):
    # it makes segmentation some 2x slower, see retune_allocator. Nor do they run Dask's statistical
    # profiler, which samples every thread's stack every 10 ms while pages are read (measured: page
    # time ~3 % lower without it on this project's pages; the best of several runs on a busy machine).
    # Their event loops check their own health every second instead of every 20 ms, and sample the
    # system every 2 s instead of 0.5 s (dashboards only): idle, a one-worker cluster's processes used
    # 4-5 % of a core between them, now ~2 % (CPU seconds over 10 s idle, measured twice each); the
    # memory monitor that stops a worker running out of memory keeps Dask's 100 ms.
    with dask_config.set({"distributed.admin.low-level-log-length": keep,
                          "distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None,
                          "distributed.worker.profile.enabled": False,
                          "distributed.admin.tick.interval": "1s",
                          "distributed.admin.system-monitor.interval": "2s"}):
        if dask.scheduler is not None:
            client = _remote_client(dask)
        else:
            cluster = _local_cluster(dask)
            try:
                client = Client(cluster)
            except BaseException:
                cluster.close()
                raise
    try:
        nthreads = client.nthreads()
        import distributed

        where = (f"scheduler {dask.scheduler}" if dask.scheduler is not None else
                 f"local {'processes' if dask.processes else 'threads'}")
        desc = (f"dask {distributed.__version__}: {len(nthreads)} workers x "
                f"{max(nthreads.values(), default=0)} threads ({where})")
        yield _Cluster(client, desc, sum(nthreads.values()), len(nthreads), client.scheduler.address)
    finally:
        with sigint_ignored():                  # a second Ctrl-C must not leave workers behind
            client.close()
            if cluster is not None:
                cluster.close()


def _chunks(refs: Sequence[PageRef], states: Sequence[RunState], size: int,
            skipped: set[str]) -> Iterator[tuple[list[PageRef], list[list[int]]]]:
    """Pages still to read, ``size`` at a time, each with the recognisers (by index) that still need it."""
    todo = ((r, [i for i, s in enumerate(states) if r.id not in s.done]) for r in refs if r.id not in skipped)
    while True:
        chunk = list(itertools.islice(todo, size))
        if not chunk:
            return
        yield [r for r, _ in chunk], [idx for _, idx in chunk]


def run_distributed(target: Path | str, cards: Sequence[Card | Path | str], *, store: RunStore | Path | str,
                    options: RunOptions | EngineOptions | None = None, dask: DaskOptions | None = None,
                    clock: Clock = time.perf_counter, progress: Callable[[ProgressEvent], None] | None = None,
                    postprocess: PostProcess | None = None, fresh: bool = False) -> RunSummary:
    """Like :func:`ocrbench.run.engine.run_pages`, with pages read on a Dask cluster and written here as they finish.

    Cards are validated here and every worker opens every recogniser before
    any page is submitted, so a bad card or model stops the run before any
    page runs and the page timings hold no model loading. Raises CardError / StoreError / InputError / ClusterError for
    problems that stop everything; a problem of one page is a failed page.
    ``postprocess`` must be picklable (a module-level function or object).
    ``clock`` times the run and its progress events; the stage timings of each
    page come from the monotonic clock of the worker that read it.
    """
    options = as_run_options(options)
    dask = dask or DaskOptions(workers=1)
    with _connect_while(dask, lambda: (load_cards(cards), scan_inputs(target, options))) as (cl, (card_list, found)):
        listing, input_dir = found
        st, own_store = open_store(store)      # here: a SQLite connection stays in the thread that opened it
        refs = listing.refs
        try:
            client = cl.client
            # Every worker there now opens every recogniser (workers that join later do so on their first page).
            pre = client.run(_preflight, card_list, options)
            for res in pre.values():
                if res[0] == "error":
                    _raise_portable(res)
            hosts = next(iter(pre.values()))[1]
            import onnxruntime as ort

            engine = f"{cl.description} / onnxruntime {ort.__version__}"
            settings = options.settings()
            states = []
            for card, host in zip(card_list, hosts):
                extra = {"dask": {"scheduler": cl.scheduler, "workers": cl.workers, "threads": cl.threads,
                                  "processes": dask.processes if dask.scheduler is None else None}}
                states.append(open_run(st, card, None, settings=settings, input_dir=input_dir, fresh=fresh,
                                       engine=engine, host=lambda host=host, extra=extra: {**host, **extra},
                                       refs=refs))
            window = dask.max_in_flight or max(4, 4 * cl.threads)
            per_task = dask.pages_per_task or auto_pages_per_task(
                sum(1 for r in refs if any(r.id not in s.done for s in states)), cl.threads)
            return with_listing(_write_as_completed(client, refs, states, card_list, st, options, per_task, window,
                                                    clock, progress, postprocess, input_dir), listing)
        finally:
            if own_store:
                st.close()


@contextmanager
def _connect_while(dask: DaskOptions, prepare: Callable[[], object]) -> Iterator[tuple[_Cluster, object]]:
    """:func:`connect`, with ``prepare()`` (validating the cards, listing the pages) run meanwhile in a second
    thread; yields the cluster and what ``prepare`` returned.

    Starting a cluster is mostly waiting for its worker processes (interpreter, imports), and the
    first card's validation imports ``onnx`` (some 0.8 s): done one after the other, the client's
    core idled through the first. A problem ``prepare`` meets (a bad card, a missing folder) is
    raised rather than the cluster's, as when the two ran in that order; it now comes once the
    cluster has started (and is closed again).
    """
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="ocrbench-inputs") as ex:
        fut = ex.submit(prepare)
        with ExitStack() as stack:
            try:
                cl = stack.enter_context(connect(dask))
            except BaseException as e:
                err = fut.exception()
                if err is not None and not isinstance(e, KeyboardInterrupt):
                    raise err from e
                raise
            yield cl, fut.result()


#: Times a chunk is resubmitted after a cluster-level error before the run stops with ClusterError.
CLUSTER_RETRIES = 2


def _write_as_completed(client, refs, states, cards, st: RunStore, options: RunOptions, per_task: int, window: int,
                        clock: Clock, progress, postprocess, input_dir: str) -> RunSummary:
    """Submit at most ``window`` tasks at a time and write each page as its task completes."""
    from distributed import as_completed
    from distributed.scheduler import KilledWorker

    w = RunWriter(refs, states, st, clock, progress, input_dir)
    skipped = w.skipped_ids
    w.emit("start")
    for r in refs:
        if r.id in skipped:
            w.skip(r.id)

    run_token = uuid.uuid4().hex[:12]
    work = _chunks(refs, states, per_task, skipped)
    in_flight: dict[tuple[str, int], tuple[object, list[PageRef], list[list[int]]]] = {}
    counter = itertools.count()
    ac = as_completed()

    def submit(chunk, tries: int = 0) -> None:
        key = (f"ocrbench-pages-{run_token}", next(counter))   # one name: Dask caches per-name data
        fut = client.submit(_recognise_chunk, chunk[0], chunk[1], cards, options, postprocess, key=key, pure=False)
        in_flight[key] = (fut, chunk[0], chunk[1], tries)
        ac.add(fut)

    split: deque = deque()                       # single pages of a chunk whose workers kept dying

    def submit_next() -> None:
        if split:
            submit(split.popleft())
            return
        try:
            chunk = next(work)
        except StopIteration:
            return
        submit(chunk)

    for _ in range(window):
        submit_next()
    try:
        for fut in ac:
            _, chunk_refs, chunk_todo, tries = in_flight.pop(fut.key)
            try:
                res = fut.result()
            except KilledWorker as e:
                if len(chunk_refs) > 1:           # which page kills its workers? each page of the chunk alone
                    split.extend(([r], [idx]) for r, idx in zip(chunk_refs, chunk_todo))
                    submit_next()
                    continue
                res = ("ok", [(chunk_refs[0].id, [_lost(chunk_refs[0], e) for _ in chunk_todo[0]])])
            except Exception as e:  # noqa: BLE001 - the cluster failed, not a page
                if tries < CLUSTER_RETRIES:
                    # A worker dying mid-task can surface as a transient error of Dask's own
                    # (e.g. an asyncio object bound to another loop); pages are idempotent, so
                    # the chunk is simply submitted again.
                    submit((chunk_refs, chunk_todo), tries + 1)
                    continue
                raise ClusterError(f"a Dask task reading {chunk_refs[0].display()} failed: "
                                   f"{type(e).__name__}: {e}") from e
            finally:
                fut.release()
            del fut
            if res[0] == "error":
                _raise_portable(res)
            for (page_id, outcomes), idx in zip(res[1], chunk_todo):
                w.write(page_id, [(states[i], o) for i, o in zip(idx, outcomes)])
            del res
            submit_next()
    finally:
        if in_flight:                             # stopped early: leave nothing running on the cluster
            client.cancel([v[0] for v in in_flight.values()])
            in_flight.clear()
    return w.finish(postprocess)


def _lost(ref: PageRef, e: BaseException) -> PageOutcome:
    """A page whose workers kept dying while reading it (a page that exhausts memory, say)."""
    import dask

    tries = int(dask.config.get("distributed.scheduler.allowed-failures", 3)) + 1
    size, mtime = file_stamp(Path(ref.path))
    return PageOutcome(PageRecord(page_id=ref.id, path=ref.display(), content_hash=file_sha256(Path(ref.path)),
                                  status="failed", file_size=size, file_mtime_ns=mtime,
                                  error=f"the Dask worker reading this page died {tries} times "
                                        f"(out of memory?): {type(e).__name__}"))
