"""``ocrbench export STORE --out DIR``: the run store's tables as Parquet or CSV files, or its pages
as ALTO XML or text files."""

from __future__ import annotations

import json
from pathlib import Path

import typer
from rich.console import Console

from ocrbench.cli.common import EXIT_OK, EXIT_USAGE, choices, fail
from ocrbench.errors import OcrbenchError

ExportFormat = choices("ExportFormat", ("parquet", "csv", "alto", "text"))
TextKind = choices("TextKind", ("raw", "post"))


def export_cmd(
    store: Path = typer.Argument(..., help="A run store written by 'ocrbench run'."),
    out: Path = typer.Option(..., "--out", help="Folder for runs, pages, lines and batches files."),
    fmt: ExportFormat = typer.Option("parquet", "--format", help="parquet or csv (the tables); alto (one ALTO 4.4 "
                                                                 "XML file per page) or text (one .txt per page, "
                                                                 "as --text-out)."),
    text: TextKind = typer.Option("raw", "--text", help="For alto and text: raw (recognised) or post "
                                                        "(post-processed where present) text."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Write the tables of a run store to files, or each page as ALTO XML or text."""
    from ocrbench.store import export
    from ocrbench.store.alto import export_alto, export_texts

    try:
        if fmt.value == "alto":
            written = export_alto(store, out, text=text.value)
        elif fmt.value == "text":
            written = export_texts(store, out, text=text.value)
        else:
            written = export(store, out, fmt.value)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    if as_json:
        typer.echo(json.dumps({"store": str(store), "format": fmt.value, "files": [str(p) for p in written]}))
    else:
        Console().print("\n".join(str(p) for p in written), markup=False, highlight=False)
    raise typer.Exit(EXIT_OK)
