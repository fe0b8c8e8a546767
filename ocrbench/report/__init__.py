"""Batch reports: one self-contained HTML page, CSV/Parquet tables and a JSON summary, from a run store.

Modules: :mod:`.data` gathers every figure into one summary (built first);
:mod:`.display` writes a figure for people (one function for HTML and
console); :mod:`.plots` draws the figures as SVG; :mod:`.alignview` lays out
line alignments; :mod:`.html` writes the page (the decision first). Scores
come from :mod:`ocrbench.accuracy.evaluate`, the plan from
:mod:`ocrbench.planning.service`.

:func:`write_report` is what ``ocrbench report`` and ``ocrbench demo`` call.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

from ocrbench.errors import ReportError, TextFileError
from ocrbench.io.files import atomic_write_text
from ocrbench.io.tables import TABLE_FORMATS, write_tables
from ocrbench.report.data import CAUTIONS, ReportData, build_report_data, resolve
from ocrbench.report.display import fmt
from ocrbench.planning.service import PlanRequest, PlanResults, load_plan_file

__all__ = ["ReportFiles", "write_report", "build_report_data", "ReportData", "PlanRequest", "PlanResults",
           "load_plan_file", "fmt", "resolve", "CAUTIONS", "ReportError"]


@dataclass(frozen=True)
class ReportFiles:
    """What :func:`write_report` wrote."""

    folder: Path
    html: Path
    summary: Path
    tables: list[Path]
    data: ReportData


def write_report(store: Path | str, out_dir: Path | str, *, truth: Path | str | None = None,
                 plan: PlanRequest | PlanResults | Path | str | None = None, profile: str = "nfc",
                 run_ids: Sequence[int] | None = None, n_boot: int = 2000, seed: int = 0,
                 currency: str = "", curve_max_workers: int = 16, title: str | None = None,
                 table_formats: Sequence[str] = ("csv", "parquet")) -> ReportFiles:
    """Write ``report.html``, ``summary.json`` and ``tables/<name>.csv|parquet`` into ``out_dir``.

    The summary is built first (:func:`build_report_data`); the HTML and the
    tables are written from it. ``plan`` may be a :class:`PlanRequest`, plan
    results, or a path to a plan file (see :mod:`ocrbench.planning.service`).
    """
    from ocrbench.report.html import render_html
    from ocrbench.report.plots import render_figures

    if isinstance(plan, (str, Path)):
        plan = load_plan_file(plan)
    data = build_report_data(store, truth=truth, plan=plan, profile=profile, run_ids=run_ids, n_boot=n_boot,
                             seed=seed, currency=currency, curve_max_workers=curve_max_workers, title=title)
    unknown = [f for f in table_formats if f not in TABLE_FORMATS]
    if unknown:
        raise ReportError(f"unknown table format {unknown[0]!r} ({' or '.join(TABLE_FORMATS)})")
    out = Path(out_dir)
    summary_path, html_path = out / "summary.json", out / "report.html"
    try:
        (out / "tables").mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise ReportError(f"{out}: cannot create the report folder ({e.strerror or e})") from e
    try:
        atomic_write_text(summary_path, data.to_json() + "\n")
        svgs = render_figures(data.summary, page_scores=data.page_scores, line_times=data.line_times)
        atomic_write_text(html_path, render_html(data.summary, svgs))
        written = write_tables(data.tables, out / "tables", table_formats)
    except TextFileError as e:
        raise ReportError(str(e)) from e
    return ReportFiles(folder=out, html=html_path, summary=summary_path, tables=written, data=data)
