"""``ocrbench balance DIR``: check the column totals of ledger pages given as text files.

Works on recognised or transcribed text, one ``.txt`` per page. Each page is
reported balanced, unbalanced (with the difference: stated total minus brought
forward plus entries) or not checkable (with the reason). Over the judged pages
it estimates how often amounts are misread, with intervals, needing no
ground truth.
"""

from __future__ import annotations

import json
from pathlib import Path

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn
from rich.table import Table

from ocrbench.cli.common import EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, fail
from ocrbench.io.text import read_text_lines
from ocrbench.io.textdir import list_text_files
from ocrbench.errors import OcrbenchError
from ocrbench.ledger import balance as ledger

_STYLE = {ledger.BALANCED: "green", ledger.UNBALANCED: "red", ledger.NOT_CHECKABLE: "yellow"}


def balance(
    target: Path = typer.Argument(..., help="A folder of .txt pages (one line of text per ledger line), or one .txt file."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
    decimal_comma: bool = typer.Option(False, "--decimal-comma",
                                       help="Decimal amounts are written 1.234,56 (comma before the cents)."),
    level: float = typer.Option(0.95, "--level", min=0.5, max=0.999, help="Confidence level of the intervals."),
) -> None:
    """Check that each page's entries add up to its total or carried-forward line."""
    try:
        files = list_text_files(target)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    mark = "," if decimal_comma else "."
    results: list[tuple[Path, ledger.PageBalance]] = []
    failed: list[dict] = []
    err = Console(stderr=True)
    with Progress(TextColumn("checking"), BarColumn(), MofNCompleteColumn(), console=err,
                  transient=True, disable=len(files) < 2) as progress:
        task = progress.add_task("balance", total=len(files))
        for path in files:
            try:
                results.append((path, ledger.check_page(read_text_lines(path), decimal_mark=mark)))
            except OcrbenchError as e:
                failed.append({"path": str(path), "error": str(e)})
            except ValueError as e:   # e.g. an amount of thousands of digits, beyond reading as a number
                failed.append({"path": str(path), "error": f"{path}: cannot check the page ({e})"})
            progress.advance(task)
    est = ledger.estimate_misreads([b for _, b in results], level=level)
    pages = [{"path": str(p), "status": b.status, "difference": b.difference_text, "form": b.form,
              "reason": b.reason, "amounts": len(b.amount_lines),
              "unreadable_lines": [ln.line_no + 1 for ln in b.unreadable_lines]} for p, b in results]
    if as_json:
        typer.echo(json.dumps({"pages": pages, "failed": failed, "estimate": est.to_dict()}, ensure_ascii=False))
    else:
        out = Console()
        table = Table(title=f"Column totals: {target}")
        for col in ("page", "status", "difference", "note"):
            table.add_column(col, justify="right" if col == "difference" else "left")
        for p, b in results:
            table.add_row(p.name, f"[{_STYLE[b.status]}]{b.status}[/]", b.difference_text or "", b.reason or "")
        out.print(table)
        counts = {s: sum(b.status == s for _, b in results) for s in _STYLE}
        out.print(f"{counts[ledger.BALANCED]} balanced, {counts[ledger.UNBALANCED]} unbalanced, "
                  f"{counts[ledger.NOT_CHECKABLE]} not checkable, {len(failed)} unreadable")
        if est.failed_share is not None:
            pct = int(round(level * 100))
            out.print(f"pages failing the check: {est.failed_share:.1%} "
                      f"({pct}% interval {est.failed_share_low:.1%} to {est.failed_share_high:.1%}, "
                      f"{est.pages_failed} of {est.pages_judged})")
            out.print(f"estimated misread rate per amount: {est.per_amount_rate:.2%} "
                      f"({pct}% interval {est.per_amount_low:.2%} to {est.per_amount_high:.2%}, "
                      f"{est.amounts} amounts; assumes independent misreads, see --json 'model')")
        for f in failed:
            err.print(f"ocrbench: {f['error']}", markup=False, highlight=False)
    raise typer.Exit(EXIT_SOME_FAILED if failed else EXIT_OK)
