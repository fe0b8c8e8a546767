"""``ocrbench plan``: how long, how much and how many corrections a whole archive would take, per recogniser.

The cost model is fitted on a calibration store (pages recognised and timed on
this machine, or on another machine whose store is given); the archive is
described by a sample folder (segmented only), an earlier run store, or
numbers. The plan file format is printed by ``ocrbench plan --plan-format``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from rich.table import Table

from ocrbench.cli.common import EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, fail
from ocrbench.errors import OcrbenchError


def _money(v) -> str:
    return "-" if v is None else (f"{v:,.2f}" if abs(v) >= 0.01 or v == 0 else f"{v:.2g}")


def _amount(v) -> str:
    """A quantity with sensible precision: 12,345 / 123.4 / 1.23 / 0.00123."""
    if v is None:
        return "-"
    a = abs(v)
    return f"{v:,.0f}" if a >= 1000 else f"{v:.1f}" if a >= 10 else f"{v:.3g}"


def _num(v, spec=",.0f") -> str:
    return "-" if v is None else format(v, spec)


def _yes(v) -> str:
    return "-" if v is None else ("yes" if v else "NO")


def render(table, console: Console) -> None:
    """The side-by-side table and the plan's statements, for people."""
    from ocrbench.planning.numerics import format_duration

    rows = table.to_dict(orient="records")
    t = Table(title="Archive plan", show_lines=False)
    t.add_column("")
    for r in rows:
        t.add_column(f"{r['recogniser']} ({r['kind']})\n{r['profile']}", justify="right")

    def line(label, fn):
        t.add_row(label, *[fn(r) for r in rows])

    line("pages", lambda r: _num(r["pages"]))
    line("characters (P50)", lambda r: _num(r["characters"]))
    line("resources", lambda r: f"{r['machines']} x {r['workers']} workers x {r['threads']} threads")
    line("wall-clock P10", lambda r: format_duration(r["wall_seconds_p10"]))
    line("wall-clock P50", lambda r: format_duration(r["wall_seconds_p50"]))
    line("wall-clock P90", lambda r: format_duration(r["wall_seconds_p90"]))
    line("core-hours (P50 / P90)", lambda r: f"{_amount(r['core_hours'])} / {_amount(r['core_hours_p90'])}")
    line("compute cost (P50 / P90)", lambda r: f"{_money(r['compute_cost'])} / {_money(r['compute_cost_p90'])}")
    line("CER (95% interval)", lambda r: "-" if r["cer"] is None else
         f"{100 * r['cer']:.2f}% ({100 * r['cer_low']:.2f}-{100 * r['cer_high']:.2f})")
    line("character errors", lambda r: "-" if r["char_errors"] is None else
         f"{r['char_errors']:,.0f} ({r['char_errors_low']:,.0f}-{r['char_errors_high']:,.0f})")
    line("correction hours", lambda r: "-" if r["correction_hours"] is None else
         f"{_amount(r['correction_hours'])} ({_amount(r['correction_hours_low'])}-"
         f"{_amount(r['correction_hours_high'])})")
    line("total cost (P50 / high)", lambda r: f"{_money(r['cost'])} / {_money(r['cost_high'])}")
    line("meets deadline (P90)", lambda r: _yes(r["meets_deadline"]) + (
        "" if r["p_meets_deadline"] is None else f" ({100 * r['p_meets_deadline']:.0f}%)"))
    line("meets budget", lambda r: _yes(r["meets_budget"]))
    line("ground truth to transcribe", lambda r: "-" if r.get("gt_sample_pages") is None else
         f"{r['gt_sample_pages']:,} pages")
    line("fit R² batch / page", lambda r: f"{r['fit_r2_batch']:.3f} / {r['fit_r2_page']:.3f}")
    line("extrapolated", lambda r: "yes" if r["extrapolated"] else "no")
    console.print(t)
    rec = table.attrs.get("recommendation") or {}
    if rec.get("text"):
        console.print(f"[bold]Choice:[/bold] {rec['text']}")
    for c in table.attrs.get("crossover", []):
        console.print(f"[bold]Crossover:[/bold] {c['text']}")
    margin = table.attrs.get("cer_margin")
    for name, s in (table.attrs.get("sample_sizes") or {}).items():
        if s.get("pages"):
            console.print(f"[bold]Ground truth:[/bold] {name}: transcribe {s['pages']:,} pages"
                          + (f" (~{s['lines']:,} lines)" if s.get("lines") else "")
                          + f" for a CER interval of ±{100 * margin:.2g} points")
    for w in table.attrs.get("warnings", []):
        console.print(f"[yellow]warning:[/yellow] {w}")
    for a in table.attrs.get("assumptions", []):
        console.print(f"[dim]assumption: {a}[/dim]")


def plan(
    calibration: list[str] = typer.Option([], "--calibration", "-c",
                                          help="A calibration run store (repeat for other machines; "
                                               "NAME=STORE names the machine profile)."),
    plan_file: Optional[Path] = typer.Option(None, "--plan", help="A plan file (TOML); options given here win."),
    plan_format: bool = typer.Option(False, "--plan-format", help="Print the plan file format and exit."),
    recogniser: list[str] = typer.Option([], "--recogniser", "-r", help="Plan only these recognisers (names)."),
    sample: Optional[Path] = typer.Option(None, "--sample", help="A folder of sample pages (segmented only)."),
    sample_pages: Optional[int] = typer.Option(None, "--sample-pages", min=1,
                                               help="Pages of the sample folder to segment (default 20)."),
    archive_store: Optional[Path] = typer.Option(None, "--archive-store",
                                                 help="Describe the archive by an earlier run store's pages."),
    pages: Optional[int] = typer.Option(None, "--pages", min=1, help="Pages in the archive."),
    lines_per_page: Optional[str] = typer.Option(None, "--lines-per-page", help="N or A-B (uniform)."),
    chars_per_line: Optional[str] = typer.Option(None, "--chars-per-line", help="N or A-B (uniform)."),
    page_size: Optional[str] = typer.Option(None, "--page-size", help="WIDTHxHEIGHT pixels of a page."),
    workers: Optional[int] = typer.Option(None, "--workers", min=1, help="Worker processes per machine."),
    threads: Optional[int] = typer.Option(None, "--threads", min=1, help="Intra-op threads per worker."),
    machines: Optional[int] = typer.Option(None, "--machines", min=1, help="Machines of this profile."),
    deadline: Optional[str] = typer.Option(None, "--deadline", help="e.g. 6w, 42d, 1000h."),
    budget: Optional[float] = typer.Option(None, "--budget", min=0, help="Money available (compute + correction)."),
    price_core_hour: Optional[float] = typer.Option(None, "--price-core-hour", min=0),
    price_machine_hour: Optional[float] = typer.Option(None, "--price-machine-hour", min=0),
    seconds_per_error: Optional[float] = typer.Option(None, "--seconds-per-error", min=0,
                                                      help="Correction time per character error (default 10 s)."),
    correction_price_hour: Optional[float] = typer.Option(None, "--price-correction-hour", min=0,
                                                          help="Cost of an hour of correction."),
    truth: Optional[Path] = typer.Option(None, "--truth", help="Ground truth of the calibration pages (for CER)."),
    cer_margin: Optional[float] = typer.Option(None, "--cer-margin", min=0,
                                               help="Wanted half-width of the CER interval (default 0.005)."),
    draws: Optional[int] = typer.Option(None, "--draws", min=50, help="Monte Carlo draws (default 2000)."),
    seed: Optional[int] = typer.Option(None, "--seed", help="Random seed of the simulation."),
    speed_drift: Optional[float] = typer.Option(None, "--speed-drift", min=0.0, max=0.99,
                                                help="How much the machine's speed may differ between calibration "
                                                     "and run, as a coefficient of variation (default 0.08, "
                                                     "measured on a shared virtual machine; 0 for a dedicated one)."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Plan an archive: wall-clock P10/P50/P90, core-hours, money, correction hours, deadline and budget fit."""
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
            "machines": machines, "deadline": deadline, "budget": budget, "price_core_hour": price_core_hour,
            "price_machine_hour": price_machine_hour, "seconds_per_error": seconds_per_error,
            "correction_price_hour": correction_price_hour, "truth": truth, "cer_margin": cer_margin,
            "draws": draws, "seed": seed, "speed_drift": speed_drift})
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
        err.print(f"ocrbench: {p}: {e}")
    if result.sample_failures:
        err.print(f"ocrbench: {len(result.sample_failures)} sample page(s) could not be segmented (listed above)")
        raise typer.Exit(EXIT_SOME_FAILED)
    raise typer.Exit(EXIT_OK)


def measure_scaling_cmd(
    target: Path = typer.Argument(..., help="A folder of calibration pages."),
    recogniser: list[Path] = typer.Option(..., "--recogniser", "-r", help="A recogniser card; repeat for more."),
    store: Path = typer.Option(..., "--store", help="The calibration store: the timed run and the throughput "
                                                    "table are added to it."),
    workers: int = typer.Option(1, "--workers", min=1, help="Measure 1..K worker processes."),
    threads: int = typer.Option(1, "--threads", min=1, help="Intra-op threads per worker."),
    batch_size: int = typer.Option(16, "--batch-size", min=1, help="Lines per model batch (as 'ocrbench run "
                                                                  "--batch-size')."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Time a run of each recogniser on TARGET (start-up, pages/s) and, with --workers K, 2..K workers too."""
    import pandas as pd

    from ocrbench.planning import inputs as planio
    from ocrbench.planning.service import json_dumps
    from ocrbench.recognisers.base import EngineOptions
    from ocrbench.run.measure import measure_scaling, measure_session

    err = Console(stderr=True)
    rows = []
    try:
        for card in recogniser:
            with err.status(f"timing {card} on one worker"):
                one = measure_session(target, card, store=store,
                                      options=EngineOptions(intra_threads=threads, batch_size=batch_size))
            rows.append(one)
            if workers > 1:
                with err.status(f"timing {card} on 2..{workers} workers"):
                    more = measure_scaling(target, card, workers=range(2, workers + 1), threads=threads,
                                           batch_size=batch_size)
                rows += more.drop(columns=["speedup"]).to_dict(orient="records")
        df = pd.DataFrame(rows)
        planio.save_scaling(store, df)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    df["speedup"] = df["pages_per_second"] / df.groupby("recogniser")["pages_per_second"].transform("first")
    cols = ["recogniser", "workers", "threads", "pages", "pages_per_second", "speedup", "startup_seconds",
            "gap_seconds_per_page"]
    if as_json:
        rec = df[cols].astype(object).where(df[cols].notna(), None).to_dict(orient="records")
        typer.echo(json_dumps({"scaling": rec}))
        raise typer.Exit(EXIT_OK)
    t = Table(title=f"Throughput on this machine (saved in {store})")
    heads = ["recogniser", "workers", "threads", "pages", "pages/s", "speed-up", "start-up s", "gap s/page"]
    for h in heads:
        t.add_column(h, justify="left" if h == "recogniser" else "right")
    for r in df[cols].to_dict(orient="records"):
        t.add_row(*[f"{v:.3g}" if isinstance(v, float) else str(v) for v in r.values()])
    Console().print(t)
    raise typer.Exit(EXIT_OK)
