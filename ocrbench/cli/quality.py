"""``ocrbench quality STORE``: per collection (or day, or run), how good the text is while a run goes on.

Per group: pages read, estimated CER with its interval (calibrated on the pages
that have ground truth in ``--truth``), measured CER where truth exists, ledger
balance rate, share of flagged pages, lines in the review queue, and drift from
the keyed sample. Reads the store read-only and never blocks a run writing it;
``--watch SECONDS`` refreshes until Ctrl-C (with ``--json``: one JSON object a line).
Exit status 1 when a ground-truth file could not be read (it is named; the rest is used).
"""

from __future__ import annotations

import json
import time
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from rich.table import Table

from ocrbench.cli.common import EXIT_INTERRUPTED, EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, fail
from ocrbench.errors import OcrbenchError


def _pct(v, lo=None, hi=None) -> str:
    if v is None:
        return "-"
    s = f"{100 * v:.2f}%"
    return s + (f" [{100 * lo:.2f}-{100 * hi:.2f}]" if lo is not None and hi is not None else "")


def _print(res: dict) -> None:
    con = Console()
    if not con.is_terminal:
        con = Console(width=max(con.width, 160))
    for s in res["systems"]:
        cal = s["calibration"]
        head = (f"calibrated on {cal['pages']} keyed pages, {cal['lines']} lines (CER {_pct(cal['cer'], cal['cer_low'], cal['cer_high'])})"
                if cal else "no keyed pages: no estimated CER (give --truth DIR)")
        t = Table(title=f"{s['recogniser']} (runs {', '.join(map(str, s['runs']))}): {head}", title_justify="left")
        for col in (res["by"], "pages", "keyed", "estimated CER", "measured CER", "balance", "flagged", "queue", "drift"):
            t.add_column(col, justify="left" if col in (res["by"], "drift") else "right", overflow="fold")
        for g in s["groups"]:
            est = _pct(g["est_cer"], g["est_low"], g["est_high"]) + (" (extrapolated)" if g["extrapolated"] else "")
            bal = "-" if g["balance_rate"] is None else f"{100 * g['balance_rate']:.0f}% of {g['checkable_pages']}"
            drift = g.get("drift")
            t.add_row(g["group"], f"{g['pages_done']}" + (f" (+{g['pages_failed']} failed)" if g["pages_failed"] else ""),
                      str(g["keyed_pages"]), est, _pct(g["measured_cer"], g["measured_low"], g["measured_high"]), bal,
                      "-" if g["flagged_share"] is None else f"{100 * g['flagged_share']:.0f}%", str(g["queued_lines"]),
                      "-" if drift is None else ("; ".join(drift["reasons"]) or "no"))
        con.print(t)
        for p in s["problems"] + s["notes"]:
            typer.echo(f"ocrbench: {p}", err=True)
    if not res["systems"]:
        con.print(f"{res['store']}: no runs in this store yet", markup=False, highlight=False)


def _write_pages(res: dict, path: Path) -> None:
    import pandas as pd

    frames = []
    for s in res["systems"]:
        df = s.pop("pages", None)
        if df is not None:
            frames.append(df.assign(recogniser=s["recogniser"]))
    if not frames:
        typer.echo("ocrbench: no keyed pages, so no page estimates to write (give --truth DIR)", err=True)
        return
    try:
        pd.concat(frames, ignore_index=True).to_csv(path, index=False)
    except OSError as e:
        raise fail(f"{path}: cannot write the page estimates ({e.strerror or e})", EXIT_USAGE)


def quality_cmd(
    store: Path = typer.Argument(..., help="A run store written by 'ocrbench run' (read-only; a run may be writing it)."),
    truth: Optional[Path] = typer.Option(None, "--truth", help="Ground truth of the keyed pages (.txt beside or "
                                                               "mirroring the images): calibrates the estimates."),
    by: str = typer.Option("collection", "--by", help="Group pages by collection (folder), day or run."),
    run: list[int] = typer.Option([], "--run", help="Only these runs (repeat; default: every run)."),
    word_list: Optional[Path] = typer.Option(None, "--word-list", help="Word list: unlisted words add doubt."),
    post: bool = typer.Option(False, "--post", help="Use the post-processed text where the run has it."),
    agreement: bool = typer.Option(False, "--agreement", help="Doubt also weighs a second recogniser's "
                                                              "disagreement where one read the same pages."),
    profile: str = typer.Option("nfc", "--profile", help="Normalisation before comparing with the truth."),
    boot: int = typer.Option(400, "--boot", min=50, help="Bootstrap rounds for the intervals."),
    seed: int = typer.Option(0, "--seed", help="Seed of the bootstrap and permutation tests."),
    pages_csv: Optional[Path] = typer.Option(None, "--pages-csv", help="Also write every page's estimated CER "
                                                                      "with its interval to this CSV."),
    watch: Optional[float] = typer.Option(None, "--watch", min=0.1, metavar="SECONDS",
                                          help="Refresh every SECONDS until Ctrl-C."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Estimated and measured CER, balance rate, flagged pages and drift per collection, day or run."""
    from ocrbench.accuracy.normalise import PROFILES
    from ocrbench.postprocess.lexicon import read_word_list
    from ocrbench.quality.data import GROUPINGS
    from ocrbench.quality.summary import quality

    if by not in GROUPINGS:
        raise fail(f"--by must be one of {', '.join(GROUPINGS)}, not {by!r}", EXIT_USAGE)
    if profile not in PROFILES:
        raise fail(f"--profile must be one of {', '.join(PROFILES)}, not {profile!r}", EXIT_USAGE)
    if truth is not None and not truth.is_dir():
        raise fail(f"{truth}: --truth must be a folder of .txt files", EXIT_USAGE)
    try:
        lexicon = read_word_list(word_list) if word_list is not None else None
        while True:
            res = quality(store, truth=truth, by=by, profile=profile, lexicon=lexicon, post=post, runs=run or None,
                          n_boot=boot, seed=seed, with_pages=pages_csv is not None, agreement=agreement)
            if pages_csv is not None:
                _write_pages(res, pages_csv)
            if as_json:
                typer.echo(json.dumps(res, ensure_ascii=False, default=float))
            else:
                _print(res)
            if watch is None:
                break
            time.sleep(watch)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    except KeyboardInterrupt:
        raise typer.Exit(EXIT_INTERRUPTED)
    if as_json:
        for s in res["systems"]:
            for p in s["problems"]:
                typer.echo(f"ocrbench: {p}", err=True)
    raise typer.Exit(EXIT_SOME_FAILED if any(s["problems"] for s in res["systems"]) else EXIT_OK)
