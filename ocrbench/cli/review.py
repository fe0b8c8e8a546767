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

import json
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from rich.table import Table

from ocrbench.cli.common import EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, fail
from ocrbench.errors import OcrbenchError, TextFileError


def _head_catch(truth_edits: dict[tuple[str, int], int], head_keys: set[tuple[str, int]]) -> dict | None:
    """How many of the lines with errors (among lines with ground truth) are in the head of the queue."""
    keys = [k for k in truth_edits]
    err = [k for k in keys if truth_edits[k] > 0]
    if not keys:
        return None
    in_head = [k for k in keys if k in head_keys]
    caught = [k for k in err if k in head_keys]
    return {"lines_with_truth": len(keys), "error_lines": len(err), "head_lines_with_truth": len(in_head),
            "error_lines_in_head": len(caught),
            "share_of_error_lines_caught": len(caught) / len(err) if err else None,
            # what checking the same number of lines picked at random would catch, on average
            "share_if_random": len(in_head) / len(keys)}


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
    profile: str = typer.Option("nfc", "--profile", help="With --truth: normalisation before comparing."),
    out: Optional[Path] = typer.Option(None, "--out", help="Write each run's whole queue as CSV here."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
) -> None:
    """Rank recognised lines by doubt, time the review, and measure how well confidence predicts errors."""
    from ocrbench.accuracy.normalise import PROFILES, get_profile
    from ocrbench.io.text import pair_store_pages, read_text_lines
    from ocrbench.postprocess.lexicon import read_word_list
    from ocrbench.postprocess.review import ReviewRate, calibration, line_edits, review_queue
    from ocrbench.store import RunStore

    if profile not in PROFILES:
        raise fail(f"--profile must be one of {', '.join(PROFILES)}, not {profile!r}", EXIT_USAGE)
    rate = ReviewRate(seconds_per_line=seconds_per_line, chars_per_second=chars_per_second)
    err = Console(stderr=True)
    problems: list[str] = []
    results = []
    try:
        lexicon = read_word_list(word_list) if word_list is not None else None
        norm = get_profile(profile).line
        with RunStore(store, read_only=True) as st:
            have = st.run_ids()
            missing = [r for r in run if r not in have]
            if missing:
                raise fail(f"{store}: no run {', '.join(map(str, missing))} in this store "
                           f"(runs: {', '.join(map(str, have)) or 'none'})", EXIT_USAGE)
            frames = st.read_frames(run or have)
            for rid in run or have:
                info = st.run_info(rid)
                ln = frames["lines"][frames["lines"]["run_id"] == rid].copy()
                done = set(frames["pages"].query("run_id == @rid and status == 'done'")["page_id"])
                ln = ln[ln["page_id"].isin(done)]
                use_post = post and st.post_recipe(rid) is not None
                if use_post:
                    ln["text"] = ln["text_post"].where(ln["text_post"].notna(), ln["text"])
                q = review_queue(ln[["page_id", "line_no", "text", "confidence", "truncated", "error"]],
                                 lexicon=lexicon, rate=rate)
                select = {"max_minutes": minutes} if minutes is not None else {"max_lines": lines}
                head = q.take(**select)
                res = {"run_id": rid, "recogniser": info.recogniser, "text": "post-processed" if use_post else "raw",
                       "lines": int(len(q.table)), "head": q.minutes(**select),
                       "all": q.minutes(),
                       "queue": [{"page_id": r.page_id, "line_no": int(r.line_no), "doubt": round(float(r.doubt), 4),
                                  "confidence": None if r.confidence != r.confidence else float(r.confidence),
                                  "reasons": r.reasons, "text": r.text} for r in head.itertuples()]}
                if out is not None:
                    try:
                        out.mkdir(parents=True, exist_ok=True)
                        path = out / f"review_{info.recogniser}_run{rid}.csv"
                        q.table.to_csv(path, index=False)
                    except OSError as e:
                        raise TextFileError(out, f"cannot write the queue ({e.strerror or e})") from e
                    res["csv"] = str(path)
                if truth is not None:
                    texts, confs, truths, groups = [], [], [], []
                    edits: dict[tuple[str, int], int] = {}
                    pairing = pair_store_pages(truth, sorted(done))
                    by_page = {pid: g.sort_values("line_no") for pid, g in ln.groupby("page_id")}
                    for _, tpath, pid in pairing.pairs:
                        try:
                            ref = read_text_lines(tpath)
                        except TextFileError as e:
                            problems.append(str(e))
                            continue
                        g = by_page.get(str(pid))
                        if g is None or len(g) != len(ref):
                            problems.append(f"{tpath}: {len(ref)} ground-truth lines but {0 if g is None else len(g)} "
                                            f"recognised lines on {pid}; left out of the calibration")
                            continue
                        hyp = g["text"].fillna("").tolist()
                        e = line_edits(ref, hyp, normalise=norm)
                        for no, k in zip(g["line_no"], e):
                            edits[(str(pid), int(no))] = int(k)
                        texts += hyp
                        confs += g["confidence"].astype(float).tolist()
                        truths += ref
                        groups += [str(pid)] * len(ref)
                    if texts:
                        cal = calibration(truths, texts, confs, page_ids=groups, normalise=norm)
                        res["calibration"] = cal.to_dict()
                        res["head_catch"] = _head_catch(edits, {(r.page_id, int(r.line_no)) for r in head.itertuples()})
                    else:
                        res["calibration"] = None
                        problems.append(f"{truth}: no page of run {rid} has usable ground truth")
                results.append(res)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    except ValueError as e:
        raise fail(str(e), EXIT_USAGE)

    if as_json:
        typer.echo(json.dumps({"store": str(store), "rate": rate.describe(), "runs": results, "problems": problems},
                              ensure_ascii=False, default=float))
    else:
        con = Console()
        if not con.is_terminal:
            con = Console(width=max(con.width, 132))
        con.print(f"review rate: {rate.describe()}", markup=False, highlight=False)
        for res in results:
            h, a = res["head"], res["all"]
            t = Table(title=f"{res['recogniser']} (run {res['run_id']}, {res['text']} text): the {h['lines']} most "
                            f"doubtful of {res['lines']} lines", title_justify="left")
            for col in ("page", "line", "doubt", "why", "text"):
                t.add_column(col, justify="right" if col in ("line", "doubt") else "left", overflow="fold")
            for q in res["queue"]:
                t.add_row(q["page_id"], str(q["line_no"]), f"{q['doubt']:.2f}", q["reasons"], q["text"])
            con.print(t)
            con.print(f"  reviewing these {h['lines']} lines: about {h['minutes']:.1f} min "
                      f"(range {h['minutes_low']:.1f}-{h['minutes_high']:.1f}); every line of the run: "
                      f"{a['minutes'] / 60:.1f} h (range {a['minutes_low'] / 60:.1f}-{a['minutes_high'] / 60:.1f})",
                      markup=False, highlight=False)
            cal = res.get("calibration")
            if cal:
                ci = (f" [{cal['auroc_low']:.2f}-{cal['auroc_high']:.2f}]" if cal["auroc_low"] is not None else "")
                auc = "undefined (every line right, or every line wrong)" if cal["auroc"] is None else \
                    f"{cal['auroc']:.3f}{ci}"
                con.print(f"  calibration on {cal['lines']} lines with ground truth, {cal['error_lines']} holding "
                          f"errors: AUROC of doubt for 'line holds an error' {auc} (0.5 = no better than chance)",
                          markup=False, highlight=False)
                d = Table(title="  error rate per confidence decile (1 = least confident)", title_justify="left")
                for col in ("decile", "lines", "confidence", "lines with errors", "CER"):
                    d.add_column(col, justify="right")
                for row in cal["deciles"]:
                    d.add_row(str(row["decile"]), str(row["lines"]),
                              f"{row['conf_min']:.3f}-{row['conf_max']:.3f}",
                              f"{row['error_line_share']:.1%} [{row['share_low']:.1%}-{row['share_high']:.1%}]",
                              f"{row['cer']:.2%}")
                con.print(d)
                hc = res.get("head_catch")
                if hc and hc["share_of_error_lines_caught"] is not None:
                    con.print(f"  the head of the queue holds {hc['error_lines_in_head']} of the "
                              f"{hc['error_lines']} lines with errors ({hc['share_of_error_lines_caught']:.0%}); "
                              f"as many lines picked at random would hold {hc['share_if_random']:.0%}",
                              markup=False, highlight=False)
            if res.get("csv"):
                con.print(f"  whole queue: {res['csv']}", markup=False, highlight=False)
        for p in problems:
            err.print(f"ocrbench: {p}", markup=False, highlight=False, soft_wrap=True)
    raise typer.Exit(EXIT_SOME_FAILED if problems else EXIT_OK)
