"""``ocrbench measure-scaling``: time each recogniser on this machine at 1..K workers, for the planner."""

from __future__ import annotations

import json
from pathlib import Path

import typer
from rich.console import Console
from rich.markup import escape
from rich.table import Table

from ocrbench.cli.common import EXIT_OK, EXIT_USAGE, fail
from ocrbench.cli.engineopts import Decoding, GraphLevel, provider_options, warn_before_run
from ocrbench.recognisers.base import EngineOptions
from ocrbench.errors import OcrbenchError


def measure_scaling_cmd(
    target: Path = typer.Argument(..., help="A folder of calibration pages."),
    recogniser: list[Path] = typer.Option(..., "--recogniser", "-r", help="A recogniser card; repeat for more."),
    store: Path = typer.Option(..., "--store", help="The calibration store: the timed run and the throughput "
                                                    "table are added to it."),
    workers: int = typer.Option(1, "--workers", min=1,
                                help="Measure 1..K workers (2 or more: a local Dask run, as 'ocrbench run --workers K')."),
    threads: int = typer.Option(1, "--threads", min=1, help="Intra-op threads per worker."),
    sessions: int = typer.Option(2, "--sessions", min=1,
                                 help="Time one worker this many times (each a fresh process): the plan's range "
                                      "includes their spread."),
    batch_size: int = typer.Option(16, "--batch-size", min=1,
                                   help="Lines per model batch (as 'ocrbench run --batch-size')."),
    inter_threads: int = typer.Option(1, "--inter-threads", min=1, help="As 'ocrbench run --inter-threads'."),
    graph_optimisation: GraphLevel = typer.Option("all", "--graph-optimisation",
                                                  help="As 'ocrbench run --graph-optimisation'."),
    provider: list[str] = typer.Option(["CPUExecutionProvider"], "--provider", help="As 'ocrbench run --provider'."),
    allow_cpu_fallback: bool = typer.Option(False, "--allow-cpu-fallback",
                                            help="As 'ocrbench run --allow-cpu-fallback'."),
    provider_option: list[str] = typer.Option([], "--provider-option", help="As 'ocrbench run --provider-option'."),
    decoding: Decoding = typer.Option("greedy", "--decoding", help="As 'ocrbench run --decoding'."),
    beam_width: int = typer.Option(8, "--beam-width", min=1, help="As 'ocrbench run --beam-width'."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Time a run of each recogniser on TARGET (process start, loading, pages/s) and, with --workers K, 2..K."""
    from ocrbench.planning.throughput import measure_table

    engine = EngineOptions(inter_threads=inter_threads, graph_optimisation=graph_optimisation.value,
                           providers=tuple(provider), allow_cpu_fallback=allow_cpu_fallback,
                           provider_options=provider_options(provider_option), decoding=decoding.value,
                           beam_width=beam_width)
    warn_before_run(recogniser, engine)
    err = Console(stderr=True)
    try:
        with err.status("timing the recognisers on this machine") as status:
            df, notes = measure_table(target, recogniser, store=store, workers=workers, threads=threads,
                                      batch_size=batch_size, engine=engine, sessions=sessions,
                                      progress=lambda m: status.update(m))
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    cols = ["recogniser", "workers", "threads", "pages", "pages_per_second", "speedup", "speedup_low",
            "speedup_high", "process_start_seconds", "startup_seconds", "idle_seconds_per_page",
            "overlap_seconds_per_page"]
    if as_json:
        rec = df[cols].astype(object).where(df[cols].notna(), None).to_dict(orient="records")
        typer.echo(json.dumps({"scaling": rec, "explanations": notes}, indent=1, allow_nan=False))
        raise typer.Exit(EXIT_OK)
    t = Table(title=f"Throughput on this machine (saved in {escape(str(store))})")
    heads = ["recogniser", "workers", "threads", "pages", "pages/s", "speed-up", "95% interval",
             "process start s", "loading+warm-up s", "idle between pages s", "overlapped s/page"]
    for h in heads:
        t.add_column(h, justify="left" if h == "recogniser" else "right")
    for r in df[cols].to_dict(orient="records"):
        iv = "-" if r["speedup_low"] != r["speedup_low"] else f"{r['speedup_low']:.3g}-{r['speedup_high']:.3g}"
        cells = [r["recogniser"], r["workers"], r["threads"], r["pages"], r["pages_per_second"], r["speedup"], iv,
                 r["process_start_seconds"], r["startup_seconds"], r["idle_seconds_per_page"],
                 r["overlap_seconds_per_page"]]
        t.add_row(*[escape(f"{v:.3g}" if isinstance(v, float) else str(v)) for v in cells])
    Console().print(t)
    for n in notes:
        Console().print(f"[yellow]note:[/yellow] {escape(n)}")
    raise typer.Exit(EXIT_OK)
