"""``ocrbench tune``: measure a small grid of threads x batch size x workers, keep the fastest for the planner."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from rich.markup import escape
from rich.table import Table

from ocrbench.cli.common import EXIT_OK, EXIT_USAGE, fail
from ocrbench.errors import OcrbenchError


def _ints(text: str, flag: str) -> list[int]:
    try:
        vals = [int(x) for x in text.split(",") if x.strip()]
    except ValueError:
        vals = []
    if not vals or min(vals) < 1:
        raise fail(f"{flag} takes whole numbers above 0 separated by commas, not {text!r}", EXIT_USAGE)
    return vals


def tune_cmd(
    target: Path = typer.Argument(..., help="A folder of sample pages."),
    recogniser: Path = typer.Option(..., "--recogniser", "-r", help="A recogniser card."),
    store: Path = typer.Option(..., "--store", help="Calibration store: the chosen configuration's timed run and "
                                                    "throughput rows are added to it."),
    threads: str = typer.Option("1,2", "--threads", help="Intra-op threads per worker to try."),
    batch_sizes: str = typer.Option("8,16,32", "--batch-sizes", help="Batch sizes to try."),
    workers: str = typer.Option("1,2", "--workers", help="Worker processes to try."),
    pages: int = typer.Option(6, "--pages", min=1, help="Sample pages timed per configuration."),
    max_seconds: float = typer.Option(300.0, "--max-seconds", min=1.0,
                                      help="Stop starting new configurations after this long."),
    cores: Optional[int] = typer.Option(None, "--cores", min=1, help="Cores to allow (default: this machine's)."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Time threads x batch size x workers on TARGET (bounded), keep the fastest in the store for `ocrbench plan`."""
    from ocrbench.planning.throughput import tune

    grid = {"threads": _ints(threads, "--threads"), "batch_sizes": _ints(batch_sizes, "--batch-sizes"),
            "workers": _ints(workers, "--workers")}
    err = Console(stderr=True)
    try:
        with err.status("tuning") as status:
            res = tune(target, recogniser, store=store, pages=pages, max_seconds=max_seconds, cores=cores,
                       progress=lambda m: status.update(m), **grid)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    if as_json:
        typer.echo(json.dumps(res, indent=1, allow_nan=False))
        raise typer.Exit(EXIT_OK)
    t = Table(title=f"Configurations timed on {res['pages']} pages ({res['cores']} cores)")
    for h in ("threads", "batch size", "workers", "pages/s", ""):
        t.add_column(h, justify="right")
    for g in sorted(res["grid"], key=lambda g: -(g["pages_per_second"] or 0)):
        pps = "-" if g["pages_per_second"] is None else f"{g['pages_per_second']:.3g}"
        mark = "chosen" if g == res["best"] else (g["skipped"] or "")
        t.add_row(str(g["threads"]), str(g["batch_size"]), str(g["workers"]), pps, escape(mark))
    Console().print(t)
    b = res["best"]
    Console().print(f"chosen: {b['workers']} worker(s) x {b['threads']} thread(s), batch size {b['batch_size']} "
                    f"({b['pages_per_second']:.3g} pages/s); saved in {escape(str(store))} — plan with "
                    f"`ocrbench plan -c {escape(str(store))} --workers {b['workers']} --threads {b['threads']} ...`")
    raise typer.Exit(EXIT_OK)
