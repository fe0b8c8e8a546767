"""``ocrbench postprocess SRC [OUT]``: apply a post-processing pipeline to text pages or to a run store.

For a folder of text pages (or one ``.txt``), the source files are never
overwritten: results go to OUT, one ``.txt`` per page with the same name.
For a run store (the SQLite file of ``ocrbench run``), the post-processed
text of each run (``--run`` to choose) is filled anew from the raw text, which
is never written; the recipe is recorded with the run, and ``ocrbench score
--post`` scores the result. With OUT, each run's post-processed pages are also
written to ``OUT/<recogniser>/<page stem>.txt``. The pipeline comes from ``--steps`` or
from a TOML file's ``[postprocess]`` table; ``--word-list`` (or the table's
``word_list``) gives the lexicon for hyphen joining and word correction.
Plain text files carry no confidences, so every word counts as below the
lexicon's confidence gate unless ``--line-confidence`` says otherwise.
"""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn

from ocrbench.cli.common import EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, fail
from ocrbench.cli.show_run import print_postprocess_runs
from ocrbench.errors import OcrbenchError
from ocrbench.io.files import is_sqlite_file
from ocrbench.io.tables import json_text
from ocrbench.io.textdir import list_text_files, run_folders, write_texts
from ocrbench.postprocess.config import load_pipeline
from ocrbench.postprocess.steps import Pipeline, describe_steps


def postprocess(
    source: Optional[Path] = typer.Argument(None, help="Folder of .txt pages, one .txt file, or a run store "
                                                       "(.sqlite)."),
    out_dir: Optional[Path] = typer.Argument(None, help="Folder for the results (created; must differ from the "
                                                        "source). Optional for a run store."),
    run: list[int] = typer.Option([], "--run", help="Run store only: the run to post-process (repeat; "
                                                    "default: every run)."),
    steps: str = typer.Option(None, "--steps", help="Comma-separated step names, e.g. unicode,whitespace,lexicon. "
                              "Default: unicode,whitespace (+ hyphen_join,lexicon with a word list)."),
    config: Path = typer.Option(None, "--config", help="TOML file with a \\[postprocess] table (steps, options, "
                                                       "word_list)."),
    word_list: Path = typer.Option(None, "--word-list", help="Word list: one entry per line, # for comments."),
    line_confidence: float = typer.Option(None, "--line-confidence", min=0.0, max=1.0,
                                          help="Confidence to assume for every line (text files carry none)."),
    list_steps: bool = typer.Option(False, "--list-steps", help="Describe the available steps and exit "
                                                                "(no source needed)."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Normalise and correct recognised text: a folder of pages into another folder, or a run store's
    post-processed text refilled from its raw text (the originals are never overwritten)."""
    if list_steps:
        for name, doc in describe_steps().items():
            typer.echo(f"{name:14s} {doc}")
        raise typer.Exit(EXIT_OK)
    if source is None:
        raise fail("give a source: a folder of .txt pages, one .txt file or a run store "
                   "(or --list-steps to see the steps)", EXIT_USAGE)
    try:
        pipeline = load_pipeline(steps=steps, config=config, word_list=word_list)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    if is_sqlite_file(source):
        _postprocess_store(source, out_dir, run, pipeline, as_json)
    if run:
        raise fail("--run needs a run store as the source", EXIT_USAGE)
    if out_dir is None:
        raise fail(f"{source}: give an output folder for the post-processed text pages", EXIT_USAGE)
    _postprocess_folder(source, out_dir, pipeline, line_confidence, as_json)


def _postprocess_folder(source: Path, out_dir: Path, pipeline: Pipeline, line_confidence: float | None,
                        as_json: bool) -> None:
    """Post-process text pages into ``out_dir``; exits (0, or 1 when a page failed)."""
    from ocrbench.postprocess.files import check_output_folder, postprocess_file

    try:
        files = list_text_files(source)
        check_output_folder(source, out_dir)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    pages: list[dict] = []
    failed: list[dict] = []
    err = Console(stderr=True)
    with Progress(TextColumn("post-processing"), BarColumn(), MofNCompleteColumn(), console=err,
                  transient=True, disable=len(files) < 2) as progress:
        task = progress.add_task("postprocess", total=len(files))
        for path in files:
            try:
                pages.append(postprocess_file(path, out_dir, pipeline, line_confidence))
            except OcrbenchError as e:
                failed.append({"path": str(path), "error": str(e)})
            progress.advance(task)
    if as_json:
        typer.echo(json_text({"recipe": pipeline.recipe, "pages": pages, "failed": failed}))
    else:
        out = Console()
        changed = sum(p["changed_lines"] for p in pages)
        total = sum(p["lines"] for p in pages)
        out.print(f"recipe: {pipeline.recipe}", markup=False, highlight=False, soft_wrap=True)
        out.print(f"{len(pages)} pages written to {out_dir}; {changed} of {total} lines changed", markup=False)
        for f in failed:
            err.print(f"ocrbench: {f['error']}", markup=False, highlight=False)
    raise typer.Exit(EXIT_SOME_FAILED if failed else EXIT_OK)


def _postprocess_store(source: Path, out_dir: Path | None, runs: list[int], pipeline: Pipeline,
                       as_json: bool) -> None:
    """Refill the post-processed text of a store's runs; exits (0, or 1 when a page was refused)."""
    from ocrbench.run.engine import apply_postprocess
    from ocrbench.store import RunStore

    err = Console(stderr=True)
    results = []
    written: dict[str, str] = {}
    try:
        with RunStore(source) as st:
            have = st.run_ids()
            missing = [r for r in runs if r not in have]
            if missing:
                raise fail(f"{source}: no run {', '.join(map(str, missing))} in this store "
                           f"(runs: {', '.join(map(str, have)) or 'none'})", EXIT_USAGE)
            todo = runs or have
            infos = {rid: st.run_info(rid) for rid in todo}
            folders = run_folders({rid: i.recogniser for rid, i in infos.items()})
            with Progress(TextColumn("post-processing runs"), BarColumn(), MofNCompleteColumn(), console=err,
                          transient=True, disable=len(todo) < 2) as progress:
                task = progress.add_task("postprocess", total=len(todo))
                for rid in todo:
                    res = apply_postprocess(st, rid, pipeline)
                    results.append({"run_id": rid, "recogniser": infos[rid].recogniser, "pages": res.pages,
                                    "lines": res.lines, "changed_lines": res.changed_lines,
                                    "failed": [{"page_id": p, "error": e} for p, e in res.failures]})
                    if out_dir is not None:
                        write_texts(out_dir, folders[rid], st.page_texts(rid, post=True))
                        written[folders[rid]] = str(out_dir / folders[rid])
                    progress.advance(task)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    failed = [(r, f) for r in results for f in r["failed"]]
    if as_json:
        typer.echo(json_text({"recipe": pipeline.recipe, "store": str(source), "runs": results,
                              "text_out": written or None}))
    else:
        print_postprocess_runs(pipeline.recipe, results, list(written.values()))
    raise typer.Exit(EXIT_SOME_FAILED if failed else EXIT_OK)
