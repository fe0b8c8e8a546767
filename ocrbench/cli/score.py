"""``ocrbench score --truth DIR (--hyp DIR | --store FILE)``: CER and WER against ground truth.

Ground truth and hypotheses pair by file stem (``page_001.txt`` with
``page_001.txt``; a store's ``page_001.png`` with ``page_001.txt``, a TIFF frame
``book.tif#3`` with ``book_3.txt``). Pages without ground truth are counted in
one line and skipped (partial ground truth is normal; ``--require-truth`` makes
them an error). Ground truth without a hypothesis, unreadable files and pages
that failed in a run are listed and make the exit status 1; the rest is scored
(:mod:`ocrbench.accuracy.evaluate`). ``--hyp`` takes a folder of ``.txt`` files
or the folder ``run --text-out`` writes (one subfolder per recogniser).

With ``--json`` stdout carries one JSON object. For one recogniser (a ``--hyp``
folder, or a store with one run or one ``--run``) the corpus figures are
top-level fields (``cer``, ``cer_low``, ``cer_high``, ``wer``, …, ``classes``,
``recipe``) next to ``unpaired`` and ``unreadable``. For several runs the object
holds ``systems`` (one such object each) and ``comparisons`` (paired CER
comparisons of every two runs on their common pages). ``--post`` scores each
run's raw and post-processed text side by side (two systems per run), so the
comparisons include post-processing's paired effect.
"""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn

from ocrbench.cli.common import EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, ProfileName, fail
from ocrbench.cli.show import print_comparisons, print_scores
from ocrbench.errors import OcrbenchError


def score_cmd(
    truth: Path = typer.Option(..., "--truth", help="Folder of ground-truth .txt files (UTF-8, one text line per line)."),
    hyp: Optional[Path] = typer.Option(None, "--hyp", help="Folder of recognised .txt files, paired by file name."),
    store: Optional[Path] = typer.Option(None, "--store", help="A run store written by 'ocrbench run' (instead of --hyp)."),
    run: Optional[list[int]] = typer.Option(None, "--run", metavar="ID", help="Store run id to score; repeat for several "
                                                                "(default: every run in the store)."),
    profile: ProfileName = typer.Option("nfc", "--profile", help="Normalisation profile."),
    out: Optional[Path] = typer.Option(None, "--out", help="Folder for lines/pages/confusions/amounts tables "
                                                           "(CSV and Parquet) and summary.json."),
    post: bool = typer.Option(False, "--post", help="Store only: score each run's raw and post-processed text "
                                                    "side by side (with their paired comparison)."),
    top: int = typer.Option(10, "--top", min=0, help="How many confusion pairs to show and report."),
    no_classes: bool = typer.Option(False, "--no-classes", help="Distances only: skip the alignment, so no "
                                                                "classes, confusions or amounts (faster)."),
    boot: int = typer.Option(2000, "--boot", min=100, help="Bootstrap resamples for the intervals."),
    seed: int = typer.Option(0, "--seed", help="Seed of the bootstrap (same seed, same interval)."),
    require_truth: bool = typer.Option(False, "--require-truth", help="A page without ground truth is an error "
                                                                      "(exit 1); by default it is counted and skipped."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Score recognised text against ground truth: CER and WER with intervals, character classes, confusions."""
    from ocrbench.accuracy.evaluate import (Evaluation, PostText, compare_systems, folder_systems, score_systems,
                                            store_systems)
    from ocrbench.io.tables import json_text, write_json, write_tables

    if (hyp is None) == (store is None):
        raise fail("give exactly one of --hyp DIR or --store FILE", EXIT_USAGE)
    if store is None and (run or post):
        raise fail("--run and --post need --store", EXIT_USAGE)
    err = Console(stderr=True)
    try:
        if hyp is not None:
            systems, notes = folder_systems(truth, hyp), []
        else:
            systems, notes = store_systems(store, truth, run, PostText.BOTH if post else PostText.RAW)
        for s in systems:
            s.require_truth = require_truth
        for note in notes:
            err.print(f"ocrbench: {note}", markup=False, highlight=False, soft_wrap=True)
        with Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), console=err,
                      transient=True) as bar:
            task = bar.add_task("reading texts", total=sum(len(s.pairing.pairs) for s in systems))
            score_systems(systems, profile=profile.value, classes=not no_classes, top=top, n_boot=boot, seed=seed,
                          progress=lambda what, n: bar.update(task, description=what, advance=n))
        ev = Evaluation(systems, compare_systems(systems, n_boot=boot, seed=seed), profile.value, notes)
        payload = ev.payload()
        written = []
        if out is not None:
            written = write_tables(ev.tables(), out) + [write_json(out / "summary.json", payload)]
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)

    for s in systems:
        for line in s.problem_lines():
            typer.echo(f"ocrbench: {line}", err=True)
    if as_json:
        typer.echo(json_text(payload))
    else:
        con = Console()
        for s in systems:
            print_scores(con, s.report(), top)
        if ev.comparisons:
            print_comparisons(con, ev.comparisons)
        for p in written:
            con.print(f"wrote {p}", markup=False, highlight=False)
    raise typer.Exit(EXIT_SOME_FAILED if ev.problems() else EXIT_OK)
