"""``ocrbench pages DIR``: check a batch of scans before spending anything on recognition.

Each page (a file, or a frame of a multi-page TIFF) is loaded, deskewed and cut
into lines; the command lists the line count, the skew and any error. A page
that cannot be used is listed with its reason and the others go on.
"""

from __future__ import annotations

import json
from pathlib import Path

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn
from rich.table import Table

from ocrbench.cli.common import EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, fail
from ocrbench.errors import InputError, OcrbenchError
from ocrbench.pages import DEFAULT_MAX_PIXELS, PageRef, analyse_page, list_pages, load_page


def check_page(ref: PageRef, *, max_pixels: int, deskew: bool) -> dict:
    """One row of the listing: path, lines, skew_degrees, error (and size, dpi when loaded)."""
    row: dict = {"path": ref.display(), "lines": None, "skew_degrees": None, "error": None,
                 "width": None, "height": None, "dpi": None}
    try:
        page = load_page(ref, max_pixels=max_pixels)
    except InputError as e:
        row["error"] = e.reason
        return row
    except OcrbenchError as e:
        row["error"] = str(e)
        return row
    h, w = page.gray.shape
    row.update(width=int(w), height=int(h), dpi=list(page.dpi) if page.dpi else None)
    layout = analyse_page(page.gray, deskew=deskew)
    row.update(lines=len(layout.lines), skew_degrees=round(float(layout.skew_degrees), 2) + 0.0)
    return row


def pages_command(
    target: Path = typer.Argument(..., help="A folder of page images (PNG, JPEG, TIFF), or one image."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
    max_pixels: int = typer.Option(DEFAULT_MAX_PIXELS, "--max-pixels", min=1,
                                   help="Refuse pages declaring more pixels than this (decompression-bomb guard)."),
    deskew: bool = typer.Option(True, "--deskew/--no-deskew", help="Estimate and remove the skew before finding lines."),
) -> None:
    """List each page with its line count, skew and any error (exit 1 when some pages failed)."""
    if not target.exists():
        raise fail(f"{target}: no such file or folder", EXIT_USAGE)
    try:
        refs = list_pages(target)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    if not refs:
        raise fail(f"{target}: no page images found (looked for .png, .jpg, .jpeg, .tif, .tiff)", EXIT_USAGE)

    err = Console(stderr=True)
    rows: list[dict] = []
    with Progress(TextColumn("checking pages"), BarColumn(), MofNCompleteColumn(), TimeRemainingColumn(),
                  console=err, transient=True, disable=len(refs) < 2) as progress:
        task = progress.add_task("pages", total=len(refs))
        for ref in refs:
            rows.append(check_page(ref, max_pixels=max_pixels, deskew=deskew))
            progress.advance(task)
    failed = [r for r in rows if r["error"] is not None]

    if as_json:
        typer.echo(json.dumps({"pages": rows}, ensure_ascii=False))
    else:
        table = Table(show_edge=False, header_style="bold")
        for col, justify in (("page", "left"), ("lines", "right"), ("skew °", "right"),
                             ("size", "right"), ("dpi", "right"), ("error", "left")):
            table.add_column(col, justify=justify, overflow="fold")
        for ref, r in zip(refs, rows):
            size = f"{r['width']}×{r['height']}" if r["width"] else ""
            dpi = f"{r['dpi'][0]:g}" if r["dpi"] else ""
            table.add_row(ref.id if target.is_dir() else r["path"], "" if r["lines"] is None else str(r["lines"]),
                          "" if r["skew_degrees"] is None else f"{r['skew_degrees']:+.2f}", size, dpi,
                          r["error"] or "")
        out = Console()
        out.print(table)
        n_lines = sum(r["lines"] or 0 for r in rows)
        out.print(f"{len(rows) - len(failed)} of {len(rows)} pages usable, {n_lines} lines found",
                  markup=False, highlight=False)
        for r in failed:
            err.print(f"ocrbench: {r['path']}: {r['error']}", markup=False, highlight=False, soft_wrap=True)
    raise typer.Exit(EXIT_SOME_FAILED if failed else EXIT_OK)
