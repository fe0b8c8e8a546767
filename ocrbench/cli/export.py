"""``ocrbench export STORE --out DIR``: the run store's tables as Parquet or CSV files, or its pages
as ALTO XML or text files."""

from __future__ import annotations

import json
from pathlib import Path

import typer
from rich.console import Console

from ocrbench.cli.common import EXIT_OK, EXIT_USAGE, fail
from ocrbench.errors import OcrbenchError


def export_cmd(
    store: Path = typer.Argument(..., help="A run store written by 'ocrbench run'."),
    out: Path = typer.Option(..., "--out", help="Folder for runs, pages, lines and batches files."),
    fmt: str = typer.Option("parquet", "--format", help="parquet or csv (the tables); alto (one ALTO 4.4 XML "
                                                       "file per page) or text (one .txt per page, as --text-out)."),
    text: str = typer.Option("raw", "--text", help="For alto and text: raw (recognised) or post (post-processed "
                                                   "where present) text."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Write the tables of a run store to files, or each page as ALTO XML or text."""
    from ocrbench.store import export
    from ocrbench.store.alto import export_alto, export_texts

    if fmt not in ("parquet", "csv", "alto", "text"):
        raise fail(f"--format must be parquet, csv, alto or text, not {fmt!r}", EXIT_USAGE)
    if text not in ("raw", "post"):
        raise fail(f"--text must be raw or post, not {text!r}", EXIT_USAGE)
    try:
        if fmt == "alto":
            written = export_alto(store, out, text=text)
        elif fmt == "text":
            written = export_texts(store, out, text=text)
        else:
            written = export(store, out, fmt)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    if as_json:
        typer.echo(json.dumps({"store": str(store), "format": fmt, "files": [str(p) for p in written]}))
    else:
        Console().print("\n".join(str(p) for p in written), markup=False, highlight=False)
    raise typer.Exit(EXIT_OK)
