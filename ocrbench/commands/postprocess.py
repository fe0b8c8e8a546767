"""``ocrbench postprocess SRC OUT``: apply a post-processing pipeline to a folder of text pages.

The source files are never overwritten: results go to another folder, one
``.txt`` per page with the same name. The pipeline comes from ``--steps`` or
from a TOML file's ``[postprocess]`` table; ``--word-list`` (or the table's
``word_list``) gives the lexicon for hyphen joining and word correction.
Plain text files carry no confidences, so every word counts as below the
lexicon's confidence gate unless ``--line-confidence`` says otherwise.
"""

from __future__ import annotations

import json
import tomllib
from pathlib import Path
from typing import Any

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn

from ocrbench.cli import EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, app, fail
from ocrbench.commands._postprocess_io import list_text_files, read_lines, write_lines
from ocrbench.errors import InputError, OcrbenchError
from ocrbench.postprocess.lexicon import Lexicon, read_word_list
from ocrbench.postprocess.steps import LineText, Pipeline, describe_steps, pipeline_from_config


def load_pipeline(*, steps: str | None, config: Path | None, word_list: Path | None) -> Pipeline:
    """The pipeline the options describe (``--steps`` wins over the config's list). Raises OcrbenchError."""
    table: dict[str, Any] = {}
    if config is not None:
        try:
            doc = tomllib.loads(config.read_text(encoding="utf-8"))
        except OSError as e:
            raise InputError(config, f"cannot read: {e.strerror or e}") from e
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as e:
            raise InputError(config, f"not valid TOML: {e}") from e
        table = dict(doc.get("postprocess", doc))
        if word_list is None and "word_list" in table:
            word_list = (config.parent / str(table["word_list"])).resolve()
    lexicon: Lexicon | None = read_word_list(word_list) if word_list is not None else None
    if steps is not None:
        table["steps"] = [s.strip() for s in steps.split(",") if s.strip()]
    if "steps" not in table:
        table["steps"] = ["unicode", "whitespace"] + (["hyphen_join", "lexicon"] if lexicon else [])
    return pipeline_from_config(table, lexicon=lexicon)


@app.command("postprocess")
def postprocess(
    source: Path = typer.Argument(..., help="Folder of .txt pages (or one .txt file) to post-process."),
    out_dir: Path = typer.Argument(..., help="Folder for the results (created; must differ from the source)."),
    steps: str = typer.Option(None, "--steps", help="Comma-separated step names, e.g. unicode,whitespace,lexicon. "
                              "Default: unicode,whitespace (+ hyphen_join,lexicon with a word list)."),
    config: Path = typer.Option(None, "--config", help="TOML file with a [postprocess] table (steps, options, word_list)."),
    word_list: Path = typer.Option(None, "--word-list", help="Word list: one entry per line, # for comments."),
    line_confidence: float = typer.Option(None, "--line-confidence", min=0.0, max=1.0,
                                          help="Confidence to assume for every line (text files carry none)."),
    list_steps: bool = typer.Option(False, "--list-steps", help="Describe the available steps and exit."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Normalise and correct recognised text pages into another folder (the originals stay as they are)."""
    if list_steps:
        for name, doc in describe_steps().items():
            typer.echo(f"{name:14s} {doc}")
        raise typer.Exit(EXIT_OK)
    try:
        pipeline = load_pipeline(steps=steps, config=config, word_list=word_list)
        files = list_text_files(source)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    src_dir = source if source.is_dir() else source.parent
    if out_dir.resolve() == src_dir.resolve():
        raise fail(f"{out_dir}: the output folder must differ from the source (originals are never overwritten)")
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise fail(f"{out_dir}: cannot create the output folder: {e.strerror or e}")
    pages: list[dict] = []
    failed: list[dict] = []
    err = Console(stderr=True)
    with Progress(TextColumn("post-processing"), BarColumn(), MofNCompleteColumn(), console=err,
                  transient=True, disable=len(files) < 2) as progress:
        task = progress.add_task("postprocess", total=len(files))
        for path in files:
            try:
                lines = read_lines(path)
                res = pipeline.apply_page([LineText(t, None, line_confidence) for t in lines])
                target = out_dir / path.name
                write_lines(target, res.texts)
            except OcrbenchError as e:
                failed.append({"path": str(path), "error": str(e)})
            else:
                pages.append({"path": str(path), "out": str(target), "lines": len(lines),
                              "changed_lines": len({c.line_no for c in res.changes}),
                              "changes": [{"step": c.step, "line": c.line_no + 1, "before": c.before,
                                           "after": c.after, "detail": c.detail} for c in res.changes]})
            progress.advance(task)
    if as_json:
        typer.echo(json.dumps({"recipe": pipeline.recipe, "pages": pages, "failed": failed}, ensure_ascii=False))
    else:
        out = Console()
        changed = sum(p["changed_lines"] for p in pages)
        total = sum(p["lines"] for p in pages)
        out.print(f"recipe: {pipeline.recipe}", markup=False, highlight=False, soft_wrap=True)
        out.print(f"{len(pages)} pages written to {out_dir}; {changed} of {total} lines changed", markup=False)
        for f in failed:
            err.print(f"ocrbench: {f['error']}", markup=False, highlight=False)
    raise typer.Exit(EXIT_SOME_FAILED if failed else EXIT_OK)
