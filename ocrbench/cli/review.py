"""``ocrbench review STORE``: the lines people should check first, how long that takes, and (with ground
truth) how far the recogniser's confidence can be trusted to pick them.

Each run's lines are ranked by doubt (:mod:`ocrbench.postprocess.review`: low
confidence, failed page arithmetic, words missing from the word list). The head
of the queue is shown with the reasons, and the minutes of human review it and
the whole run would take at the stated rate (an assumption, shown with its
range). With ``--truth DIR`` the lines of pages with ground truth give the
calibration figures: AUROC of doubt-by-confidence for "this line holds an
error", with a page-resampled interval, the error rate per confidence decile,
and the share of the lines holding errors that the head of the queue catches.

The queue holds text excerpts of the archive: handle its output under the
holder's data-protection rules.
"""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from rich.table import Table

from ocrbench.cli.common import EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, ProfileName, fail
from ocrbench.cli.show import wide_console
from ocrbench.errors import OcrbenchError


def review(
    store: Path = typer.Argument(..., help="A run store written by 'ocrbench run'."),
    run: list[int] = typer.Option([], "--run", help="Run to rank (repeat; default: every run)."),
    truth: Optional[Path] = typer.Option(None, "--truth", help="Folder of ground-truth .txt files: adds the "
                                                               "calibration figures for pages that have one."),
    word_list: Optional[Path] = typer.Option(None, "--word-list", help="Word list: unlisted words add doubt."),
    post: bool = typer.Option(False, "--post", help="Rank the post-processed text where the run has it."),
    lines: int = typer.Option(20, "--lines", min=0, help="Lines in the head of the queue (shown and timed)."),
    minutes: Optional[float] = typer.Option(None, "--minutes", min=0.0,
                                            help="Instead of --lines: as many lines as fit in this much review."),
    seconds_per_line: float = typer.Option(4.0, "--seconds-per-line", min=0.0,
                                           help="Review rate: seconds to find a line and its image (assumed 4)."),
    chars_per_second: float = typer.Option(10.0, "--chars-per-second", min=0.1,
                                           help="Review rate: characters compared per second (assumed 10)."),
    profile: ProfileName = typer.Option("nfc", "--profile", help="With --truth: normalisation before comparing."),
    out: Optional[Path] = typer.Option(None, "--out", help="Write each run's whole queue as CSV here."),
    agreement: bool = typer.Option(True, "--agreement/--no-agreement",
                                   help="Weigh where another recogniser's run over the same pages read a line "
                                        "differently (and, with --truth, measure how well that predicts errors)."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Rank recognised lines by doubt, time the review, and measure how well confidence predicts errors."""
    from ocrbench.accuracy.normalise import get_profile
    from ocrbench.io.tables import json_text, write_table
    from ocrbench.postprocess.lexicon import read_word_list
    from ocrbench.postprocess.review import ReviewRate
    from ocrbench.postprocess.store_review import review_store

    rate = ReviewRate(seconds_per_line=seconds_per_line, chars_per_second=chars_per_second)
    try:
        lexicon = read_word_list(word_list) if word_list is not None else None
        reviews, problems = review_store(store, run, lexicon=lexicon, rate=rate, post=post, max_lines=lines,
                                         max_minutes=minutes, truth_dir=truth,
                                         normalise=get_profile(profile.value).line,
                                         agreement=agreement)
        results = []
        for rev in reviews:
            res = rev.to_dict()
            if out is not None:
                res["csv"] = str(write_table(rev.queue.table, out, f"review_{rev.recogniser}_run{rev.run_id}",
                                             ("csv",))[0])
            results.append(res)
    except (OcrbenchError, ValueError) as e:
        raise fail(str(e), EXIT_USAGE)

    if as_json:
        typer.echo(json_text({"store": str(store), "rate": rate.describe(), "runs": results, "problems": problems}))
    else:
        con = wide_console()
        con.print(f"review rate: {rate.describe()}", markup=False, highlight=False)
        for res in results:
            _print_run(con, res)
        err = Console(stderr=True)
        for p in problems:
            err.print(f"ocrbench: {p}", markup=False, highlight=False, soft_wrap=True)
    raise typer.Exit(EXIT_SOME_FAILED if problems else EXIT_OK)


def _say(con: Console, text: str) -> None:
    con.print(text, markup=False, highlight=False)


def _print_run(con: Console, res: dict) -> None:
    h, a = res["head"], res["all"]
    t = Table(title=f"{res['recogniser']} (run {res['run_id']}, {res['text']} text): the {h['lines']} most "
                    f"doubtful of {res['lines']} lines", title_justify="left")
    for col in ("page", "line", "doubt", "why", "text"):
        t.add_column(col, justify="right" if col in ("line", "doubt") else "left", overflow="fold")
    for q in res["queue"]:
        t.add_row(q["page_id"], str(q["line_no"]), f"{q['doubt']:.2f}", q["reasons"], q["text"])
    con.print(t)
    _say(con, f"  reviewing these {h['lines']} lines: about {h['minutes']:.1f} min "
              f"(range {h['minutes_low']:.1f}-{h['minutes_high']:.1f}); every line of the run: "
              f"{a['minutes'] / 60:.1f} h (range {a['minutes_low'] / 60:.1f}-{a['minutes_high'] / 60:.1f})")
    cal = res.get("calibration")
    if cal:
        _print_calibration(con, cal, res.get("head_catch"))
    if res.get("agreement"):
        from ocrbench.postprocess.agreement import describe

        for line in describe(res["agreement"], res["agreement"]["partner"]):
            con.print(line, markup=False, highlight=False, soft_wrap=True)
    if res.get("csv"):
        _say(con, f"  whole queue: {res['csv']}")


def _print_calibration(con: Console, cal: dict, hc: dict | None) -> None:
    ci = f" [{cal['auroc_low']:.2f}-{cal['auroc_high']:.2f}]" if cal["auroc_low"] is not None else ""
    auc = "undefined (every line right, or every line wrong)" if cal["auroc"] is None else f"{cal['auroc']:.3f}{ci}"
    _say(con, f"  calibration on {cal['lines']} lines with ground truth, {cal['error_lines']} holding "
              f"errors: AUROC of doubt for 'line holds an error' {auc} (0.5 = no better than chance)")
    d = Table(title="  error rate per confidence decile (1 = least confident)", title_justify="left")
    for col in ("decile", "lines", "confidence", "lines with errors", "CER"):
        d.add_column(col, justify="right")
    for row in cal["deciles"]:
        d.add_row(str(row["decile"]), str(row["lines"]), f"{row['conf_min']:.3f}-{row['conf_max']:.3f}",
                  f"{row['error_line_share']:.1%} [{row['share_low']:.1%}-{row['share_high']:.1%}]",
                  f"{row['cer']:.2%}")
    con.print(d)
    if hc and hc["share_of_error_lines_caught"] is not None:
        _say(con, f"  the head of the queue holds {hc['error_lines_in_head']} of the {hc['error_lines']} lines "
                  f"with errors ({hc['share_of_error_lines_caught']:.0%}); as many lines picked at random would "
                  f"hold {hc['share_if_random']:.0%}")
