"""``ocrbench pages DIR``: check a batch of scans before spending anything on recognition.

Each page (a file, a frame of a multi-page TIFF or a page of a PDF, in the folder
and its subfolders) is loaded, checked for orientation, deskewed and cut into
lines; the command lists the line count, the skew, the sanity flags and any
error, and names every file it did not read, with the reason.
"""

from __future__ import annotations

import json
from pathlib import Path

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn
from rich.table import Table

from ocrbench.cli.common import EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, fail
from ocrbench.errors import OcrbenchError
from ocrbench.pages import DEFAULT_MAX_PIXELS, DEFAULT_PDF_DPI, PAGE_SUFFIXES, scan_pages, survey_page


def _print_table(refs, rows, target: Path) -> None:
    table = Table(show_edge=False, header_style="bold")
    for col, justify in (("page", "left"), ("lines", "right"), ("skew °", "right"), ("size", "right"),
                         ("dpi", "right"), ("flags", "left"), ("error", "left")):
        table.add_column(col, justify=justify, overflow="fold")
    for ref, r in zip(refs, rows):
        size = f"{r['width']}×{r['height']}" if r["width"] else ""
        dpi = f"{r['dpi'][0]:g}" if r["dpi"] else ("unknown" if r["width"] else "")
        table.add_row(ref.id if target.is_dir() else r["path"], "" if r["lines"] is None else str(r["lines"]),
                      "" if r["skew_degrees"] is None else f"{r['skew_degrees']:+.2f}", size, dpi,
                      " ".join(r["flags"]), r["error"] or "")
    out = Console()
    out.print(table, markup=False, highlight=False)
    n_lines = sum(r["lines"] or 0 for r in rows)
    failed = sum(r["error"] is not None for r in rows)
    flagged = sum(bool(r["flags"]) for r in rows)
    out.print(f"{len(rows) - failed} of {len(rows)} pages usable, {n_lines} lines found, {flagged} flagged",
              markup=False, highlight=False)


def pages_command(
    target: Path = typer.Argument(..., help="A folder of page images (PNG, JPEG, TIFF, JPEG 2000, WebP, BMP, GIF, "
                                            "PDF), read with its subfolders; or one file."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
    max_pixels: int = typer.Option(DEFAULT_MAX_PIXELS, "--max-pixels", min=1,
                                   help="Refuse pages declaring more pixels than this (decompression-bomb guard)."),
    deskew: bool = typer.Option(True, "--deskew/--no-deskew", help="Estimate and remove the skew before finding lines."),
    recurse: bool = typer.Option(True, "--recurse/--no-recurse", help="Read subfolders (collections) too."),
    pdf_dpi: float = typer.Option(DEFAULT_PDF_DPI, "--pdf-dpi", min=30, max=1200,
                                  help="Resolution for PDF pages that are not one scanned image "
                                       "(a scanned page is read at its own resolution)."),
    auto_rotate: bool = typer.Option(False, "--auto-rotate", help="Turn pages whose text is turned 90/180/270° "
                                                                  "upright before finding lines."),
) -> None:
    """List each page with its line count, skew, flags and any error (exit 1 when some pages failed)."""
    try:
        listing = scan_pages(target, recurse=recurse)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    err = Console(stderr=True)
    refs = listing.refs
    if not refs:
        for path, why in listing.skipped:
            err.print(f"ocrbench: {path}: {why}", markup=False, highlight=False, soft_wrap=True)
        looked = ", ".join(sorted(PAGE_SUFFIXES))
        raise fail(f"{target}: no page images found (looked for {looked})", EXIT_USAGE)

    rows: list[dict] = []
    with Progress(TextColumn("checking pages"), BarColumn(), MofNCompleteColumn(), TimeRemainingColumn(),
                  console=err, transient=True, disable=len(refs) < 2) as progress:
        task = progress.add_task("pages", total=len(refs))
        for ref in refs:
            rows.append(survey_page(ref, max_pixels=max_pixels, deskew=deskew, pdf_dpi=pdf_dpi,
                                    auto_rotate=auto_rotate))
            progress.advance(task)
    failed = [r for r in rows if r["error"] is not None]

    if as_json:
        typer.echo(json.dumps({"pages": rows, "skipped": [{"path": p, "reason": w} for p, w in listing.skipped],
                               "notes": [{"path": p, "note": n} for p, n in listing.notes],
                               "companions": len(listing.companions)}, ensure_ascii=False))
    else:
        _print_table(refs, rows, target)
        for path, note in listing.notes:
            err.print(f"ocrbench: {path}: {note}", markup=False, highlight=False, soft_wrap=True)
        for path, why in listing.skipped:
            err.print(f"ocrbench: {path}: skipped: {why}", markup=False, highlight=False, soft_wrap=True)
        if listing.companions:
            err.print(f"ocrbench: {len(listing.companions)} text/JSON/XML files beside the pages (ground truth, "
                      "boxes) were not read as pages", markup=False, highlight=False, soft_wrap=True)
        for r in failed:
            err.print(f"ocrbench: {r['path']}: {r['error']}", markup=False, highlight=False, soft_wrap=True)
    raise typer.Exit(EXIT_SOME_FAILED if failed else EXIT_OK)
