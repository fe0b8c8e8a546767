"""``ocrbench report STORE --out DIR``: a self-contained HTML report, CSV/Parquet tables and a JSON summary.

With ``--truth DIR`` the recognisers are scored against the ground truth
(``<page stem>.txt`` files); with ``--plan FILE`` (a TOML plan file in the
format ``ocrbench plan`` reads, or JSON plan results) the archive plan is
shown too. ``--profile`` names the
normalisation profile used for scoring.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console

from ocrbench.cli.common import EXIT_OK, EXIT_USAGE, ProfileName, fail
from ocrbench.errors import OcrbenchError


def report(
    store: Path = typer.Argument(..., help="A run store written by 'ocrbench run'."),
    out: Path = typer.Option(..., "--out", help="Folder for report.html, summary.json and tables/."),
    truth: Optional[Path] = typer.Option(None, "--truth", help="Folder of ground-truth .txt files (by page stem)."),
    plan: Optional[Path] = typer.Option(None, "--plan", help="A plan file (TOML, as 'ocrbench plan' reads; this "
                                                               "store calibrates when it names none) or plan "
                                                               "results (JSON from 'ocrbench plan --json')."),
    profile: ProfileName = typer.Option("nfc", "--profile", help="Normalisation profile for scoring."),
    run: Optional[list[int]] = typer.Option(None, "--run", help="Show these run ids (repeat); default: the latest "
                                                                "run of each recogniser."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Write the comparison report of a run store: tables, figures, worst pages, plan and cautions."""
    from ocrbench.report import write_report

    err = Console(stderr=True)
    try:
        with err.status("writing the report", spinner="line"):
            files = write_report(store, out, truth=truth, plan=plan, profile=profile.value, run_ids=run or None)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    if as_json:
        typer.echo(json.dumps({"html": str(files.html), "summary": str(files.summary),
                               "tables": [str(p) for p in files.tables]}, ensure_ascii=False))
    else:
        c = Console()
        c.print(f"report: {files.html}", markup=False, highlight=False, soft_wrap=True)
        c.print(f"summary: {files.summary}", markup=False, highlight=False, soft_wrap=True)
        c.print(f"tables: {files.folder / 'tables'} ({len(files.tables)} files)", markup=False, highlight=False,
                soft_wrap=True)
    raise typer.Exit(EXIT_OK)
