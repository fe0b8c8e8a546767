"""Console output of ``run`` and ``postprocess``: the run summary table and one line per problem."""

from __future__ import annotations

from pathlib import Path

from rich.console import Console
from rich.table import Table

from ocrbench.store import printable

from ocrbench.cli.show import wide_console

__all__ = ["print_run_summary", "print_run_problems", "print_postprocess_runs"]


def _fmt(v, spec: str) -> str:
    return "-" if v is None else format(v, spec)


def print_run_summary(summary, store: Path, text_out: Path | None, written: dict, pipeline) -> None:
    """The run summary table, what was written and the post-processing recipe (stdout)."""
    out = wide_console()
    table = Table(title=f"Run summary: {printable(summary.input_dir)}")
    for col in ("recogniser", "kind", "run", "pages done", "failed", "lines", "page s p50", "p90", "p99",
                "pages/hour", "lines/s"):
        table.add_column(col, justify="left" if col in ("recogniser", "kind") else "right")
    for r in summary.recognisers:
        table.add_row(r.name, r.kind, f"{r.run_id}{' (resumed)' if r.resumed else ''}", str(r.pages_done),
                      str(r.pages_failed), str(r.lines), _fmt(r.page_seconds_p50, ".3f"),
                      _fmt(r.page_seconds_p90, ".3f"), _fmt(r.page_seconds_p99, ".3f"),
                      _fmt(r.pages_per_hour, ",.0f"), _fmt(r.lines_per_second, ".1f"))
    out.print(table)
    rs = summary.recognisers
    if len(rs) == 3 and rs[2].kind == "route" and rs[0].lines:     # FAST, SLOW (routed lines), the kept text
        f, sl = rs[0], rs[1]
        out.print(f"route: {sl.name} re-read {sl.lines} of {f.lines} lines ({sl.lines / f.lines:.1%}); model time "
                  f"{f.model_seconds:.1f} s + {sl.model_seconds:.1f} s", markup=False, highlight=False)
    out.print(f"{summary.pages_processed} pages worked on, {summary.pages_skipped} already done, "
              f"{summary.wall_seconds:.1f} s; store: {printable(store)}", markup=False, highlight=False)
    for note in summary.notes():
        out.print(note, markup=False, highlight=False, soft_wrap=True)
    if text_out is not None:
        out.print(f"texts{' (post-processed)' if pipeline is not None else ''}: "
                  f"{', '.join(str(text_out / k) for k in written)}", markup=False, highlight=False)
    if pipeline is not None:
        out.print(f"post-processed text stored beside the raw text; recipe: {pipeline.recipe}", markup=False,
                  highlight=False, soft_wrap=True)


def print_run_problems(summary, store: Path) -> None:
    """One stderr line per failed page or post-processing problem, then the count of failed pages."""
    err = Console(stderr=True)

    def say(text: str) -> None:
        err.print(f"ocrbench: {text}", markup=False, highlight=False, soft_wrap=True)

    for path, note in summary.page_notes:
        say(f"{path}: {note}")
    for path, why in summary.skipped_files:          # every file of the input not read as a page, with why
        say(f"{path}: skipped: {why}")
    for r in summary.recognisers:
        for page_id, error in r.post_failures:
            say(f"{r.name}: {printable(page_id)}: post-processing refused this page ({error}); its raw text is kept")
        if r.post_incomplete:
            say(f"{r.name}: run {r.run_id}: {r.lines - r.post_lines} lines have no post-processed text (pages "
                f"added without post-processing); refill with: ocrbench postprocess {store} --run {r.run_id}")
    for r in summary.recognisers:
        for page_id, error in r.failures:
            say(f"{r.name}: {printable(page_id)}: {printable(error)}")
    if summary.failed_pages:
        say(f"{len(summary.failed_pages)} of {summary.pages_total} pages failed")


def print_postprocess_runs(recipe: str, results: list[dict], folders: list[str]) -> None:
    """What ``postprocess STORE`` did per run (stdout), then each refused page (stderr, one line each)."""
    out, err = Console(), Console(stderr=True)
    out.print(f"recipe: {recipe}", markup=False, highlight=False, soft_wrap=True)
    for r in results:
        out.print(f"run {r['run_id']} ({r['recogniser']}): {r['pages']} pages, {r['changed_lines']} of "
                  f"{r['lines']} lines changed; post-processed text stored beside the raw text",
                  markup=False, highlight=False)
    for folder in folders:
        out.print(f"texts: {folder}", markup=False, highlight=False)
    for r in results:
        for f in r["failed"]:
            err.print(f"ocrbench: run {r['run_id']}: {f['page_id']}: post-processing refused this page "
                      f"({f['error']})", markup=False, highlight=False, soft_wrap=True)
