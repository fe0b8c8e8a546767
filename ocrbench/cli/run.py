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

from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

from ocrbench.cli.common import EXIT_INTERRUPTED, EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, fail
from ocrbench.cli.engineopts import Decoding, GraphLevel, provider_options, warn_before_run
from ocrbench.cli.progress import RunProgress
from ocrbench.cli.show_run import print_run_problems, print_run_summary
from ocrbench.io.tables import json_text
from ocrbench.errors import OcrbenchError
from ocrbench.io.textdir import write_texts
from ocrbench.pages import DEFAULT_PDF_DPI
from ocrbench.recognisers.base import EngineOptions



def run(
    target: Path = typer.Argument(..., help="A folder of page images (PNG, JPEG, TIFF, JPEG 2000, WebP, BMP, GIF, "
                                            "PDF), read with its subfolders (collections); or one file."),
    recogniser: list[Path] = typer.Option(..., "--recogniser", "-r",
                                          help="A recogniser card (card.toml or its folder); repeat to compare."),
    store: Path = typer.Option(..., "--store", help="The run store (SQLite file; created if missing)."),
    text_out: Optional[Path] = typer.Option(None, "--text-out",
                                            help="Also write DIR/<recogniser>/<page stem>.txt per page."),
    batch_size: int = typer.Option(16, "--batch-size", min=1, help="Lines per model batch."),
    threads: int = typer.Option(1, "--threads", min=1, help="Threads inside each model run (intra-op)."),
    inter_threads: int = typer.Option(1, "--inter-threads", min=1,
                                      help="Threads running independent parts of a model in parallel (inter-op)."),
    graph_optimisation: GraphLevel = typer.Option("all", "--graph-optimisation",
                                                  help="onnxruntime graph optimisation level."),
    provider: list[str] = typer.Option(["CPUExecutionProvider"], "--provider",
                                       help="onnxruntime execution provider, in order of preference (repeat). "
                                            "One this onnxruntime lacks stops the run (exit 2) unless "
                                            "--allow-cpu-fallback; CPU is always last."),
    allow_cpu_fallback: bool = typer.Option(False, "--allow-cpu-fallback",
                                            help="A requested provider that is not installed is a warning "
                                                 "(recorded with the run's settings) and the run goes on."),
    provider_option: list[str] = typer.Option([], "--provider-option",
                                              help="key=value for the first --provider (repeat)."),
    decoding: Decoding = typer.Option("greedy", "--decoding", help="Decoding: greedy, or beam search."),
    beam_width: int = typer.Option(8, "--beam-width", min=1, help="Hypotheses kept by beam search."),
    no_cache: bool = typer.Option(False, "--no-cache",
                                  help="Seq recognisers: recompute the whole prefix each step (for comparison)."),
    max_tokens: Optional[int] = typer.Option(None, "--max-tokens", min=1,
                                             help="Seq recognisers: stop a line after this many tokens "
                                                  "(default: the card's)."),
    ctc_weight: Optional[float] = typer.Option(None, "--ctc-weight", min=0.0, max=0.99,
                                               help="Seq recognisers with a CTC output ([seq.ctc]): its share in "
                                                    "joint decoding (default: the card's; 0: the decoder alone)."),
    token_by_token: bool = typer.Option(False, "--token-by-token",
                                        help="Seq recognisers with a CTC output: one decoder call per token instead "
                                             "of checking the CTC head's reading in one pass (the same text; for "
                                             "comparison)."),
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
                                               help="TOML file with a \\[postprocess] table (steps, options, "
                                                    "word_list)."),
    word_list: Optional[Path] = typer.Option(None, "--word-list",
                                             help="Word list for post-processing: one entry per line, # comments."),
    route: Optional[str] = typer.Option(None, "--route",
                                        help="'FAST -> SLOW if doubt > X': FAST reads every line, SLOW re-reads the "
                                             "lines whose review doubt is above X; both readings and the kept one "
                                             "are stored (two of the --recogniser cards, by name or path)."),
    recurse: bool = typer.Option(True, "--recurse/--no-recurse", help="Read subfolders (collections) too."),
    pdf_dpi: float = typer.Option(DEFAULT_PDF_DPI, "--pdf-dpi", min=30, max=1200,
                                  help="Resolution for PDF pages that are not one scanned image."),
    auto_rotate: bool = typer.Option(False, "--auto-rotate", help="Turn pages whose text is turned 90/180/270° "
                                     "upright and read them (else they are flagged and stored without text)."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Recognise every page with every recogniser and record texts and timings in the run store."""
    # Over 80 lines only because typer declares the 31 options in the signature; the body is short.
    from ocrbench.postprocess.config import load_pipeline

    if workers is None and scheduler is None and (threads_per_worker != 1 or not processes or pages_per_task is not None
                                                  or connect_timeout != 10.0):
        raise fail("--threads-per-worker, --no-processes, --pages-per-task and --connect-timeout need --workers or "
                   "--scheduler", EXIT_USAGE)
    if workers is not None and scheduler is not None:
        raise fail("give --workers (a cluster started here) or --scheduler (an existing one), not both", EXIT_USAGE)
    if route is not None and (workers is not None or scheduler is not None or postprocess_on or post_steps
                              or post_config is not None or word_list is not None or len(recogniser) != 2):
        raise fail("--route takes exactly two --recogniser cards and runs here, without post-processing "
                   "(not with --workers, --scheduler or --post...)", EXIT_USAGE)
    engine = EngineOptions(intra_threads=threads, inter_threads=inter_threads,
                           graph_optimisation=graph_optimisation.value, providers=tuple(provider),
                           allow_cpu_fallback=allow_cpu_fallback,
                           provider_options=provider_options(provider_option),
                           batch_size=batch_size, decoding=decoding.value,
                           beam_width=beam_width, use_cache=not no_cache, max_tokens=max_tokens,
                           ctc_weight=ctc_weight, draft=not token_by_token)
    dask = None
    if workers is not None or scheduler is not None:       # checked before anything is opened or started
        from ocrbench.run.distributed import DaskOptions

        try:
            dask = DaskOptions(workers=workers, threads_per_worker=threads_per_worker, processes=processes,
                               scheduler=scheduler, pages_per_task=pages_per_task, connect_timeout=connect_timeout)
        except OcrbenchError as e:
            raise fail(str(e), EXIT_USAGE)
    if not target.exists():                               # before any progress bar or store
        raise fail(f"{target}: no such file or folder", EXIT_USAGE)
    warn_before_run(recogniser, engine)
    try:
        pipeline = None
        if postprocess_on or post_steps is not None or post_config is not None or word_list is not None:
            pipeline = load_pipeline(steps=post_steps, config=post_config, word_list=word_list)
        from ocrbench.run.engine import RunOptions

        options = RunOptions(engine=engine, pdf_dpi=pdf_dpi, auto_rotate=auto_rotate, recurse=recurse)
        summary, written = _recognise(target, recogniser, store, options, dask, fresh, pipeline, text_out,
                                      route)
    except KeyboardInterrupt:
        raise fail("interrupted; finished pages are in the store: rerun the same command to resume",
                   EXIT_INTERRUPTED)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    if as_json:
        d = summary.to_dict()
        d["store"] = str(store)
        d["text_out"] = {k: str(text_out / k) for k in written} if text_out is not None else None
        typer.echo(json_text(d))
    else:
        print_run_summary(summary, store, text_out, written, pipeline)
    print_run_problems(summary, store)
    raise typer.Exit(EXIT_SOME_FAILED if summary.failed_pages else EXIT_OK)


def _recognise(target: Path, cards: list[Path], store: Path, options, dask, fresh: bool, pipeline,
               text_out: Path | None, route: str | None = None):
    """Run the pages (here, or on Dask when ``dask`` is given) with a progress bar; write the texts."""
    from ocrbench.io.files import ensure_folder
    from ocrbench.run.engine import run_pages
    from ocrbench.store import RunStore

    ensure_folder(store.parent)
    with RunStore(store) as st:
        with Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                      TextColumn("pages"), TextColumn("{task.fields[lps]} lines/s"), TimeRemainingColumn(),
                      console=Console(stderr=True), transient=False) as bar:
            progress = RunProgress(bar, bar.add_task("loading recognisers", total=None, lps="-"))
            if route is not None:
                from ocrbench.run.route import parse_route
                from ocrbench.run.routed import run_routed

                summary = run_routed(target, cards, parse_route(route), store=st, options=options,
                                     progress=progress, fresh=fresh)
            elif dask is None:
                summary = run_pages(target, cards, store=st, options=options,
                                    progress=progress, fresh=fresh, postprocess=pipeline)
            else:
                from ocrbench.run.distributed import run_distributed

                summary = run_distributed(target, cards, store=st, options=options, dask=dask,
                                          progress=progress, fresh=fresh, postprocess=pipeline)
        written = {}
        if text_out is not None:
            for r in summary.recognisers:
                written[r.name] = write_texts(text_out, r.name, st.page_texts(r.run_id, post=True),
                                          input_root=target)
    return summary, written

