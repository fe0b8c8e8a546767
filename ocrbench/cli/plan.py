"""``ocrbench plan``: how long, how much, how many people and corrections a whole archive would take.

The cost model is fitted on a calibration store (pages recognised and timed on
this machine, or on another machine whose store is given); the archive is
described by a sample folder (segmented only), an earlier run store, or
numbers. The plan file format is printed by ``ocrbench plan --plan-format``.
"""

from __future__ import annotations

from enum import Enum
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from rich.markup import escape
from rich.table import Table

from ocrbench.cli.common import EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, fail
from ocrbench.errors import OcrbenchError


class ReviewMode(str, Enum):
    full = "full"
    targeted = "targeted"
    none = "none"


def render(table, console: Console) -> None:
    """The side-by-side table and the plan's statements, for people."""
    from ocrbench.planning.present import statements, table_lines

    heads, lines = table_lines(table)
    t = Table(title="Archive plan", show_lines=False)
    t.add_column("")
    for h in heads:
        t.add_column(escape(h), justify="right")
    for label, cells in lines:
        t.add_row(escape(label), *[escape(c) for c in cells])
    console.print(t)
    style = {"warning": "[yellow]warning:[/yellow] ", "assumption": "[dim]assumption: "}
    for kind, text in statements(table):
        head = style.get(kind, f"[bold]{kind}:[/bold] ")
        console.print(head + escape(text) + ("[/dim]" if kind == "assumption" else ""))


def _o(default, *flags, **kw):
    return typer.Option(default, *flags, **kw)


# Over 80 lines because the signature is the command's option list (one option per line or two, as
# typer reads it); the body itself is about 30 lines.
def plan(
    calibration: list[str] = _o([], "--calibration", "-c", help="A calibration run store (repeat for other "
                                "machines; NAME=STORE names the machine profile)."),
    plan_file: Optional[Path] = _o(None, "--plan", help="A plan file (TOML); options given here win."),
    plan_format: bool = _o(False, "--plan-format", help="Print the plan file format and exit."),
    recogniser: list[str] = _o([], "--recogniser", "-r", help="Plan only these recognisers (names)."),
    sample: Optional[Path] = _o(None, "--sample", help="A folder of sample pages (segmented only)."),
    sample_pages: Optional[int] = _o(None, "--sample-pages", min=1, help="Pages of the sample to segment (20)."),
    archive_store: Optional[Path] = _o(None, "--archive-store", help="Describe the archive by a run store's pages."),
    pages: Optional[int] = _o(None, "--pages", min=1, help="Pages in the archive."),
    lines_per_page: Optional[str] = _o(None, "--lines-per-page", help="N or A-B (uniform)."),
    chars_per_line: Optional[str] = _o(None, "--chars-per-line", help="N or A-B (uniform)."),
    page_size: Optional[str] = _o(None, "--page-size", help="WIDTHxHEIGHT pixels of a page."),
    workers: Optional[int] = _o(None, "--workers", min=1, help="Worker processes per machine."),
    threads: Optional[int] = _o(None, "--threads", min=1, help="Intra-op threads per worker."),
    machines: Optional[int] = _o(None, "--machines", min=1, help="Machines of this profile."),
    pages_per_job: Optional[int] = _o(None, "--pages-per-job", min=1,
                                      help="Split the archive into jobs of this many pages (each starts anew)."),
    deadline: Optional[str] = _o(None, "--deadline", help="e.g. 6w, 42d, 1000h."),
    budget: Optional[float] = _o(None, "--budget", min=0, help="Money available (compute + people)."),
    target_cer: Optional[float] = _o(None, "--target-cer", min=0, max=1, help="Choose the cheapest option "
                                     "(recogniser, variant, route and threshold) whose CER upper bound is at most "
                                     "this (0.004 = 0.4 %)."),
    route: Optional[str] = _o(None, "--route", help="Plan this route: 'FAST -> SLOW if doubt > X', or 'FAST -> SLOW' "
                              "to try thresholds."),
    currency: Optional[str] = _o(None, "--currency", help="ISO 4217 code of every amount (e.g. GBP, EUR)."),
    price_core_hour: Optional[float] = _o(None, "--price-core-hour", min=0),
    price_machine_hour: Optional[float] = _o(None, "--price-machine-hour", min=0),
    review: Optional[ReviewMode] = _o(None, "--review", help="Who reads the text: every line (full, default), "
                                      "the queue's most doubtful lines (targeted) or nobody (none)."),
    seconds_per_error: Optional[float] = _o(None, "--seconds-per-error", min=0,
                                            help="Correction time per character error (default 10 s)."),
    seconds_per_line: Optional[float] = _o(None, "--seconds-per-line", min=0,
                                           help="Reading: seconds per line (default 4, as `ocrbench review`)."),
    chars_per_second: Optional[float] = _o(None, "--chars-per-second", min=0.1,
                                           help="Reading: characters compared per second (default 10)."),
    review_share: Optional[float] = _o(None, "--review-share", min=0, max=1,
                                       help="Targeted: share of lines read (default 0.1)."),
    catch_rate: Optional[float] = _o(None, "--catch-rate", min=0, max=1, help="Targeted: share of errors in "
                                     "the lines read (`ocrbench review --truth`)."),
    correctors: Optional[int] = _o(None, "--correctors", min=1, help="People correcting (default: the plan "
                                   "says how many the deadline needs)."),
    corrector_hours: Optional[float] = _o(None, "--corrector-hours-per-week", min=0.1, max=168,
                                          help="Hours each corrector corrects a week (default 37.5)."),
    correction_price_hour: Optional[float] = _o(None, "--price-correction-hour", min=0,
                                                help="Cost of an hour of review or correction."),
    truth: Optional[Path] = _o(None, "--truth", help="Ground truth of the calibration pages (for CER)."),
    cer_margin: Optional[float] = _o(None, "--cer-margin", min=0, help="Absolute half-width of the CER interval "
                                     "wanted from ground truth (instead of the relative margin)."),
    cer_relative: Optional[float] = _o(None, "--cer-relative-margin", min=0.001,
                                       help="Half-width of the CER interval relative to the CER (default 0.2)."),
    draws: Optional[int] = _o(None, "--draws", min=50, help="Monte Carlo draws (default 2000)."),
    seed: Optional[int] = _o(None, "--seed", help="Random seed of the simulation."),
    speed_drift: Optional[float] = _o(None, "--speed-drift", min=0.0, max=0.99,
                                      help="Machine speed spread between calibration and run (coefficient of "
                                           "variation; default 0.08, measured on a shared virtual machine)."),
    as_json: bool = _o(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Plan an archive: wall-clock P10/P50/P90, money, people's hours, deadline and budget fit, configurations."""
    # Over 80 lines only because typer declares the options in the signature; the body is short.
    from ocrbench.planning import inputs as planio
    from ocrbench.planning import service

    if plan_format:
        typer.echo(planio.PLAN_FILE_FORMAT, nl=False)
        raise typer.Exit(EXIT_OK)
    err = Console(stderr=True)
    try:
        base = planio.load_plan_file(plan_file) if plan_file else planio.PlanRequest()
        req = planio.merge_request(base, {
            "calibration": calibration, "recognisers": recogniser or None, "sample": sample,
            "sample_pages": sample_pages, "archive_store": archive_store, "pages": pages,
            "lines_per_page": lines_per_page, "chars_per_line": chars_per_line,
            "page_size": planio.parse_page_size(page_size), "workers": workers, "threads": threads,
            "machines": machines, "pages_per_job": pages_per_job, "deadline": deadline, "budget": budget,
            "currency": currency, "price_core_hour": price_core_hour, "price_machine_hour": price_machine_hour,
            "review": review.value if review else None, "seconds_per_error": seconds_per_error,
            "seconds_per_line": seconds_per_line, "chars_per_second": chars_per_second,
            "review_share": review_share, "catch_rate": catch_rate, "correctors": correctors,
            "corrector_hours_per_week": corrector_hours, "correction_price_hour": correction_price_hour,
            "truth": truth, "cer_margin": cer_margin, "cer_relative_margin": cer_relative, "draws": draws,
            "seed": seed, "speed_drift": speed_drift, "target_cer": target_cer, "route": route})
        with err.status("planning") as status:
            result = service.plan(req, progress=lambda m: status.update(m))
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    if as_json:
        doc = service.plan_json(result.table)
        doc["sample_failures"] = [{"page": p, "error": e} for p, e in result.sample_failures]
        typer.echo(service.json_dumps(doc))
    else:
        render(result.table, Console())
    for p, e in result.sample_failures:
        err.print(f"ocrbench: {p}: {e}", markup=False)
    if result.sample_failures:
        err.print(f"ocrbench: {len(result.sample_failures)} sample page(s) could not be segmented (listed above)")
        raise typer.Exit(EXIT_SOME_FAILED)
    raise typer.Exit(EXIT_OK)
