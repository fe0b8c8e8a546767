"""``ocrbench demo``: the whole job on the invented demo archive, in one command.

Recognises ``scans_demo/`` with both demo recognisers, post-processes,
scores against the ground truth, plans an invented archive (its assumptions
are printed first), writes the report and prints the headline figures and
the report's path.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

from ocrbench.cli.common import EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, fail
from ocrbench.cli.progress import RunProgress
from ocrbench.errors import OcrbenchError


def demo(
    out: Path = typer.Option(Path("ocrbench-out/demo"), "--out", help="Folder for the store, the report and the "
                                                                       "firm's word list (rerun to resume)."),
    workers: int = typer.Option(4, "--workers", min=1, help="Workers planned for the invented archive (as many per machine as this "
                                                      "one has cores, the rest on more machines like it)."),
    models: Optional[Path] = typer.Option(None, "--models", help="Folder holding ledger-ctc/ and ledger-seq/ "
                                                                 "(default: models/ of the source tree)."),
    scans: Optional[Path] = typer.Option(None, "--scans", help="Folder of demo pages with ground truth "
                                                               "(default: scans_demo/ of the source tree)."),
    pages: Optional[int] = typer.Option(None, "--pages", min=2, help="Use only the first N pages."),
    fresh: bool = typer.Option(False, "--fresh", help="Start new runs instead of resuming the store."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Run the whole job on the demo archive: recognise, post-process, score, plan, report."""
    from ocrbench.demo import DemoArchive, run_demo

    err = Console(stderr=True)
    con = Console(soft_wrap=True)
    echo = (lambda line: err.print(line, markup=False, highlight=False)) if as_json else \
        (lambda line: con.print(line, markup=False, highlight=False))
    try:
        with Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TextColumn("pages"),
                      TimeRemainingColumn(), console=err, transient=True) as bar:
            task = bar.add_task("loading recognisers", total=None)
            result = run_demo(out_dir=out, models_dir=models, scans_dir=scans, workers=workers, max_pages=pages,
                              archive=DemoArchive(), fresh=fresh, progress=RunProgress(bar, task), echo=echo)
    except KeyboardInterrupt:
        raise fail("interrupted; finished pages are in the store: rerun the same command to resume", EXIT_USAGE)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    s = result.summary
    failed = sorted({f["page_id"] for r in s["recognisers"] for f in r.get("failures") or []})
    if as_json:
        typer.echo(json.dumps({
            "report": str(result.report.html), "summary": str(result.report.summary), "store": str(result.store),
            "wall_seconds": result.wall_seconds, "assumptions": result.assumptions, "headline": result.headline,
            "recognisers": [{k: r.get(k) for k in ("name", "kind", "pages_done", "pages_failed", "pages_per_hour",
                                                   "pages_per_hour_low", "pages_per_hour_high")}
                            | {"cer": (r.get("accuracy") or {}).get("cer"),
                               "cer_low": (r.get("accuracy") or {}).get("cer_low"),
                               "cer_high": (r.get("accuracy") or {}).get("cer_high"),
                               "cer_post": (r.get("accuracy_post") or {}).get("cer"),
                               "plan": r.get("plan")} for r in s["recognisers"]],
            "recommendation": ((s.get("plan") or {}).get("recommendation") or {}).get("text"),
            "failed_pages": failed,
        }, ensure_ascii=False))
    else:
        con.print("")
        con.print("headline figures (95 % intervals in brackets):", markup=False)
        for line in result.headline:
            con.print(line, markup=False, highlight=False)
        con.print("")
        con.print(f"report: {result.report.html}", markup=False, highlight=False)
        con.print(f"(tables in {result.report.folder / 'tables'}, figures' numbers in {result.report.summary}; "
                  f"demo took {result.wall_seconds:.1f} s)", markup=False, highlight=False)
    if failed:
        err.print(f"ocrbench: {len(failed)} pages failed: {', '.join(failed)}", markup=False, highlight=False)
        raise typer.Exit(EXIT_SOME_FAILED)
    raise typer.Exit(EXIT_OK)
