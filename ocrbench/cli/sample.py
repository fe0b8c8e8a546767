"""``ocrbench sample STORE --pages N | --lines N | --margin M --out DIR``: which pages to key by hand next.

Pages are stratified by collection and by doubt and allocated by Neyman
(optimum) allocation; within a stratum they are drawn at random (seeded). With
``--margin`` each collection gets the pages its CER needs for that relative
margin at 95 % (see :mod:`ocrbench.quality.sample`). DIR
receives ``sample.csv`` and one keying template per page (the recognised text,
one line per line, at ``<folder>/<stem>.txt``): correct the templates and pass
DIR as ``--truth`` to ``quality`` or ``score``.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from rich.table import Table

from ocrbench.cli.common import EXIT_OK, EXIT_USAGE, fail
from ocrbench.errors import OcrbenchError


def sample_cmd(
    store: Path = typer.Argument(..., help="A run store written by 'ocrbench run'."),
    out: Path = typer.Option(..., "--out", help="Folder for sample.csv and the keying templates."),
    pages: Optional[int] = typer.Option(None, "--pages", min=1, help="Pages to key."),
    lines: Optional[int] = typer.Option(None, "--lines", min=1, help="Instead of --pages: a budget of lines to key."),
    margin: Optional[float] = typer.Option(None, "--margin", min=0.001, max=10.0,
                                           help="Instead of a budget: key what each collection needs for its CER "
                                                "to be known within +-MARGIN relative (0.2 = 20 %) at 95 %; "
                                                "needs --truth with a first keyed sample."),
    truth: Optional[Path] = typer.Option(None, "--truth", help="Ground truth keyed so far: those pages are not "
                                                               "chosen again, and they calibrate the doubt."),
    run: Optional[int] = typer.Option(None, "--run", help="Run whose pages and text to use (default: the one "
                                                          "with most pages)."),
    word_list: Optional[Path] = typer.Option(None, "--word-list", help="Word list: unlisted words add doubt."),
    bands: int = typer.Option(3, "--bands", min=1, help="Doubt bands per collection."),
    post: bool = typer.Option(False, "--post", help="Templates from the post-processed text where the run has it."),
    seed: int = typer.Option(0, "--seed", help="Seed of the random choice within strata."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Pick pages to key next (stratified by collection and doubt) and write keying templates."""
    from ocrbench.postprocess.lexicon import read_word_list
    from ocrbench.quality.data import read_snapshot, systems_of
    from ocrbench.quality.estimate import calibrate
    from ocrbench.quality.sample import plan_sample, write_sample

    if sum(x is not None for x in (pages, lines, margin)) != 1:
        raise fail("give exactly one of --pages N, --lines N or --margin M", EXIT_USAGE)
    if truth is not None and not truth.is_dir():
        raise fail(f"{truth}: --truth must be a folder of .txt files", EXIT_USAGE)
    try:
        snap = read_snapshot(store, post=post)
        have = [int(r) for r in snap.runs["run_id"]]
        if run is not None and run not in have:
            raise fail(f"{store}: no run {run} in this store (runs: {', '.join(map(str, have)) or 'none'})", EXIT_USAGE)
        lexicon = read_word_list(word_list) if word_list is not None else None
        systems = systems_of(snap, truth=truth, lexicon=lexicon, runs=[run] if run is not None else None)
        if not systems:
            raise fail(f"{store}: the store holds no runs", EXIT_USAGE)
        system = max(systems, key=lambda s: int((s.pages["status"] == "done").sum()))
        plan = plan_sample(snap, system, calibrate(system), pages=pages, lines=lines, margin=margin, run_id=run,
                           bands=bands, seed=seed)
        csv, kept = write_sample(plan, out)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    for p in kept:
        typer.echo(f"ocrbench: {p}: already exists; left as it is", err=True)
    for p in system.problems + system.notes:
        typer.echo(f"ocrbench: {p}", err=True)
    res = {"csv": str(csv), "recogniser": system.name, "pages": int(len(plan.pages)),
           "lines": int(plan.pages["lines"].sum()), "method": plan.method,
           "strata": plan.strata.to_dict(orient="records"), "chosen": plan.pages.to_dict(orient="records"),
           "targets": None if plan.targets is None else plan.targets.to_dict(orient="records")}
    if as_json:
        typer.echo(json.dumps(res, ensure_ascii=False, default=float))
        raise typer.Exit(EXIT_OK)
    con = Console()
    t = Table(title=f"{res['pages']} pages ({res['lines']} lines) to key, {plan.method}", title_justify="left")
    for col in ("collection", "doubt band", "pages", "spread of expected edits", "lines a page", "chosen"):
        t.add_column(col, justify="left" if col == "collection" else "right")
    for r in res["strata"]:
        t.add_row(r["collection"], str(r["band"]), str(r["N"]), f"{r['S']:.2f}", f"{r['cost']:.1f}", str(r["n"]))
    con.print(t)
    for r in res["targets"] or []:
        con.print(f"{r['collection']}: CER {100 * r['cer']:.2f} % ({r['cer_source']}) needs {r['chars_needed']:,.0f} "
                  f"characters ({r['size_from']}), {r['pages_needed']} pages; {r['keyed']} keyed, {r['to_key']} to key",
                  markup=False, highlight=False)
    con.print(f"list: {csv}; templates beside it: correct them, then pass {out} as --truth", markup=False,
              highlight=False)
    raise typer.Exit(EXIT_OK)
