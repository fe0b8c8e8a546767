"""``ocrbench run DIR --recogniser PATH ... --store FILE``: recognise pages into a run store.

Every recogniser reads the same line crops of the same pages, so their
timings and texts compare fairly. Rerunning the same command resumes where it
stopped; ``--fresh`` starts new runs. ``--text-out DIR`` also writes
``DIR/<recogniser>/<page stem>.txt``.

``--postprocess`` (or any of ``--post-steps``, ``--post-config``,
``--word-list``) post-processes each page as it is read and stores the result
beside the raw text (``lines.text_post``), which is never overwritten; the
recipe is recorded with the run. ``ocrbench postprocess STORE`` re-applies
another recipe later.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn
from rich.table import Table

from ocrbench.cli.progress import RunProgress
from ocrbench.io.textdir import write_texts
from ocrbench.cli.common import EXIT_INTERRUPTED, EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, fail
from ocrbench.errors import OcrbenchError, TextFileError
from ocrbench.recognisers.base import DECODINGS, EngineOptions
from ocrbench.store import printable




def _fmt(v, spec: str) -> str:
    return "-" if v is None else format(v, spec)


def run(
    target: Path = typer.Argument(..., help="A folder of page images (PNG, JPEG, TIFF), or one image."),
    recogniser: list[Path] = typer.Option(..., "--recogniser", "-r",
                                          help="A recogniser card (card.toml or its folder); repeat to compare."),
    store: Path = typer.Option(..., "--store", help="The run store (SQLite file; created if missing)."),
    text_out: Optional[Path] = typer.Option(None, "--text-out",
                                            help="Also write DIR/<recogniser>/<page stem>.txt per page."),
    batch_size: int = typer.Option(16, "--batch-size", min=1, help="Lines per model batch."),
    threads: int = typer.Option(1, "--threads", min=1, help="Threads inside each model run (intra-op)."),
    inter_threads: int = typer.Option(1, "--inter-threads", min=1,
                                      help="Threads running independent parts of a model in parallel (inter-op)."),
    graph_optimisation: str = typer.Option("all", "--graph-optimisation",
                                           help="onnxruntime graph optimisation: disable, basic, extended or all."),
    provider: list[str] = typer.Option(["CPUExecutionProvider"], "--provider",
                                       help="onnxruntime execution provider, in order of preference (repeat); "
                                            "those not installed are skipped, CPU is always the fallback."),
    decoding: str = typer.Option("greedy", "--decoding", help="greedy or beam."),
    beam_width: int = typer.Option(8, "--beam-width", min=1, help="Hypotheses kept by beam search."),
    no_cache: bool = typer.Option(False, "--no-cache",
                                  help="Seq recognisers: recompute the whole prefix each step (for comparison)."),
    max_tokens: Optional[int] = typer.Option(None, "--max-tokens", min=1,
                                             help="Seq recognisers: stop a line after this many tokens "
                                                  "(default: the card's)."),
    fresh: bool = typer.Option(False, "--fresh", help="Start new runs instead of resuming matching ones."),
    workers: Optional[int] = typer.Option(None, "--workers", min=1,
                                          help="Read pages on a Dask cluster of N workers started on this machine."),
    threads_per_worker: int = typer.Option(1, "--threads-per-worker", min=1,
                                           help="With --workers: pages each worker reads at once."),
    processes: bool = typer.Option(True, "--processes/--no-processes",
                                   help="With --workers: workers as separate processes (default) or threads here."),
    scheduler: Optional[str] = typer.Option(None, "--scheduler",
                                            help="Read pages on an existing Dask cluster (tcp://HOST:PORT)."),
    pages_per_task: Optional[int] = typer.Option(None, "--pages-per-task", min=1,
                                                 help="With --workers/--scheduler: pages sent to a worker at a time "
                                                      "(default: about four tasks per worker thread, at most 8 "
                                                      "pages each)."),
    connect_timeout: float = typer.Option(10.0, "--connect-timeout", min=0.1,
                                          help="With --scheduler: seconds to reach the scheduler and find a worker."),
    postprocess_on: bool = typer.Option(False, "--postprocess",
                                        help="Post-process each page's text and store it beside the raw text "
                                             "(steps: unicode,whitespace; with --word-list also "
                                             "hyphen_join,lexicon). Implied by the three options below."),
    post_steps: Optional[str] = typer.Option(None, "--post-steps",
                                             help="Comma-separated post-processing steps (ocrbench postprocess "
                                                  "--list-steps)."),
    post_config: Optional[Path] = typer.Option(None, "--post-config",
                                               help="TOML file with a [postprocess] table (steps, options, "
                                                    "word_list)."),
    word_list: Optional[Path] = typer.Option(None, "--word-list",
                                             help="Word list for post-processing: one entry per line, # comments."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Recognise every page with every recogniser and record texts and timings in the run store."""
    from ocrbench.postprocess.config import load_pipeline
    from ocrbench.run.engine import RunOptions, run_pages
    from ocrbench.store import RunStore

    if decoding not in DECODINGS:
        raise fail(f"--decoding must be one of {', '.join(DECODINGS)}, not {decoding!r}", EXIT_USAGE)
    if workers is None and scheduler is None and (threads_per_worker != 1 or not processes or pages_per_task is not None
                                                  or connect_timeout != 10.0):
        raise fail("--threads-per-worker, --no-processes, --pages-per-task and --connect-timeout need --workers or "
                   "--scheduler",
                   EXIT_USAGE)
    if workers is not None and scheduler is not None:
        raise fail("give --workers (a cluster started here) or --scheduler (an existing one), not both", EXIT_USAGE)
    err = Console(stderr=True)
    dask = None
    if workers is not None or scheduler is not None:       # checked before anything is opened or started
        from ocrbench.run.distributed import DaskOptions

        try:
            dask = DaskOptions(workers=workers, threads_per_worker=threads_per_worker, processes=processes,
                               scheduler=scheduler, pages_per_task=pages_per_task, connect_timeout=connect_timeout)
        except OcrbenchError as e:
            raise fail(str(e), EXIT_USAGE)
    pipeline = None
    if postprocess_on or post_steps is not None or post_config is not None or word_list is not None:
        try:
            pipeline = load_pipeline(steps=post_steps, config=post_config, word_list=word_list)
        except OcrbenchError as e:
            raise fail(str(e), EXIT_USAGE)
    try:
        if not store.parent.exists():
            try:
                store.parent.mkdir(parents=True)
            except OSError as e:
                raise fail(f"{store}: cannot create the store's folder: {e.strerror or e}", EXIT_USAGE)
        engine = EngineOptions(intra_threads=threads, inter_threads=inter_threads,
                               graph_optimisation=graph_optimisation, providers=tuple(provider),
                               batch_size=batch_size, decoding=decoding,
                               beam_width=beam_width, use_cache=not no_cache, max_tokens=max_tokens)
        with RunStore(store) as st:
            with Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                          TextColumn("pages"), TextColumn("{task.fields[lps]} lines/s"), TimeRemainingColumn(),
                          console=err, transient=False) as bar:
                task = bar.add_task("loading recognisers", total=None, lps="-")
                if dask is None:
                    summary = run_pages(target, recogniser, store=st, options=RunOptions(engine=engine),
                                        progress=RunProgress(bar, task), fresh=fresh, postprocess=pipeline)
                else:
                    from ocrbench.run.distributed import run_distributed

                    summary = run_distributed(target, recogniser, store=st, options=RunOptions(engine=engine),
                                              dask=dask, progress=RunProgress(bar, task), fresh=fresh,
                                              postprocess=pipeline)
            written = {}
            if text_out is not None:
                for r in summary.recognisers:
                    written[r.name] = write_texts(text_out, r.name, st.page_texts(r.run_id, post=True))
    except KeyboardInterrupt:
        raise fail("interrupted; finished pages are in the store: rerun the same command to resume",
                   EXIT_INTERRUPTED)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)

    failed = summary.failed_pages
    if as_json:
        d = summary.to_dict()
        d["store"] = str(store)
        d["text_out"] = {k: str(text_out / k) for k in written} if text_out is not None else None
        typer.echo(json.dumps(d, ensure_ascii=False))
    else:
        out = Console()
        if not out.is_terminal:
            out = Console(width=max(out.width, 132))
        table = Table(title=f"Run summary: {printable(summary.input_dir)}")
        for col in ("recogniser", "kind", "run", "pages done", "failed", "lines", "page s p50", "p90", "p99",
                    "pages/hour", "lines/s"):
            table.add_column(col, justify="left" if col in ("recogniser", "kind") else "right")
        for r in summary.recognisers:
            table.add_row(r.name, r.kind, f"{r.run_id}{' (resumed)' if r.resumed else ''}", str(r.pages_done),
                          str(r.pages_failed), str(r.lines), _fmt(r.page_seconds_p50, ".3f"),
                          _fmt(r.page_seconds_p90, ".3f"), _fmt(r.page_seconds_p99, ".3f"),
                          _fmt(r.pages_per_hour, ",.0f"), _fmt(r.lines_per_second, ".1f"))
        out.print(table)
        out.print(f"{summary.pages_processed} pages worked on, {summary.pages_skipped} already done, "
                  f"{summary.wall_seconds:.1f} s; store: {printable(store)}", markup=False, highlight=False)
        for note in summary.notes():
            out.print(note, markup=False, highlight=False, soft_wrap=True)
        if text_out is not None:
            out.print(f"texts{' (post-processed)' if pipeline is not None else ''}: "
                      f"{', '.join(str(text_out / k) for k in written)}")
        if pipeline is not None:
            out.print(f"post-processed text stored beside the raw text; recipe: {pipeline.recipe}", markup=False,
                      highlight=False, soft_wrap=True)
    for r in summary.recognisers:
        for page_id, error in r.post_failures:
            err.print(f"ocrbench: {r.name}: {printable(page_id)}: post-processing refused this page ({error}); "
                      "its raw text is kept", markup=False, highlight=False, soft_wrap=True)
        if r.post_incomplete:
            err.print(f"ocrbench: {r.name}: run {r.run_id}: {r.lines - r.post_lines} lines have no post-processed "
                      f"text (pages added without post-processing); refill with: ocrbench postprocess {store} "
                      f"--run {r.run_id}", markup=False, highlight=False, soft_wrap=True)
    for r in summary.recognisers:
        for page_id, error in r.failures:
            err.print(f"ocrbench: {r.name}: {printable(page_id)}: {printable(error)}", markup=False, highlight=False,
                      soft_wrap=True)
    if failed:
        err.print(f"ocrbench: {len(failed)} of {summary.pages_total} pages failed", markup=False, highlight=False,
                  soft_wrap=True)
        raise typer.Exit(EXIT_SOME_FAILED)
    raise typer.Exit(EXIT_OK)


