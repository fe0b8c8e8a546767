"""``ocrbench export STORE --out DIR``: the run store's tables as Parquet or CSV files."""

from __future__ import annotations

import json
from pathlib import Path

import typer
from rich.console import Console

from ocrbench.cli.common import EXIT_OK, EXIT_USAGE, TableFormat, fail
from ocrbench.errors import OcrbenchError


def export_cmd(
    store: Path = typer.Argument(..., help="A run store written by 'ocrbench run'."),
    out: Path = typer.Option(..., "--out", help="Folder for runs, pages, lines and batches files."),
    fmt: TableFormat = typer.Option("parquet", "--format", help="File format of the tables."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Write the runs, pages, lines, batches and postprocessing tables of a run store to files."""
    from ocrbench.store import export

    try:
        written = export(store, out, fmt.value)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    if as_json:
        typer.echo(json.dumps({"store": str(store), "format": fmt.value, "files": [str(p) for p in written]}))
    else:
        Console().print("\n".join(str(p) for p in written), markup=False, highlight=False)
    raise typer.Exit(EXIT_OK)
