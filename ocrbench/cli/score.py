"""``ocrbench score --truth DIR (--hyp DIR | --store FILE)``: CER and WER against ground truth.

Ground truth and hypotheses pair by file stem (``page_001.txt`` with
``page_001.txt``; a store's ``page_001.png`` with ``page_001.txt``, a TIFF frame
``book.tif#3`` with ``book_3.txt``). Pages without ground truth are counted in
one line and skipped (partial ground truth is normal; ``--require-truth`` makes
them an error). Ground truth without a hypothesis, unreadable files and pages
that failed in a run are listed and make the exit status 1; the rest is scored.
``--hyp`` takes a folder of ``.txt`` files or the folder ``run --text-out``
writes (one subfolder per recogniser, each scored as one system).

With ``--json`` stdout carries one JSON object. For one recogniser (a ``--hyp``
folder, or a store with one run or one ``--run``) the corpus figures are
top-level fields (``cer``, ``cer_low``, ``cer_high``, ``wer``, …, ``classes``,
``recipe``) next to ``unpaired`` and ``unreadable``. For several runs the object
holds ``systems`` (one such object each) and ``comparisons`` (paired CER
comparisons of every two runs on their common pages). ``--post`` scores each
run's raw and post-processed text side by side (two systems per run), so the
comparisons include post-processing's paired effect.
"""

from __future__ import annotations

import json
import math
from itertools import combinations
from pathlib import Path
from typing import Any, Callable, Optional

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn
from rich.table import Table

from ocrbench.cli.common import EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, fail
from ocrbench.errors import OcrbenchError, TextFileError


def _show_char(ch: str) -> str:
    if ch == "":
        return "(none)"
    if ch == " ":
        return "space"
    if ch == "\n":
        return "line break"
    if not ch.isprintable() or ch.isspace():
        return f"U+{ord(ch):04X}"
    return ch


def _pct(v: float | None) -> str:
    return "-" if v is None or (isinstance(v, float) and math.isnan(v)) else f"{100 * v:.2f}%"


def _interval(lo: float | None, hi: float | None) -> str:
    return "-" if lo is None or hi is None else f"{100 * lo:.2f}% – {100 * hi:.2f}%"


class _System:
    """One recogniser's hypotheses: a folder, or one run of a store."""

    require_truth = False   # set by --require-truth: a page without ground truth is then a problem

    def __init__(self, name: str, run_id: int | None, rec_hash: str | None, pairing,
                 load: Callable[[Any], list[str]], failed: list[tuple[str, str]] | None = None):
        self.name, self.run_id, self.rec_hash = name, run_id, rec_hash
        self.pairing, self.load, self.failed = pairing, load, failed or []
        self.unreadable: list[dict[str, str]] = []
        self.scores = None

    def problems(self) -> bool:
        return bool(self.pairing.incomplete(require_truth=self.require_truth) or self.unreadable or self.failed)

    def report(self) -> dict:
        out = dict(self.scores.summary) if self.scores is not None else {}
        out.update({
            "system": self.name, "run_id": self.run_id,
            "unpaired": {"hyp_without_truth": list(self.pairing.hyp_only),
                         "truth_without_hyp": list(self.pairing.truth_only)},
            "unreadable": self.unreadable,
            "failed_pages": [{"page_id": p, "error": e} for p, e in self.failed],
        })
        return out


def _store_systems(store_path: Path, truth: Path, runs: list[int] | None, post: bool) -> list[_System]:
    try:
        from ocrbench.store import RunStore
    except ImportError:
        raise fail("--store: store support needs ocrbench.store, which this installation lacks", EXIT_USAGE)
    from ocrbench.io.text import pair_store_pages

    store = RunStore(store_path, read_only=True)
    try:
        ids = runs or store.run_ids()
        if not ids:
            raise fail(f"{store_path}: the store holds no runs", EXIT_USAGE)
        systems = []
        for rid in ids:
            info = store.run_info(rid)
            if post and store.post_recipe(rid) is None:
                raise fail(f"{store_path}: run {rid} ({info.recogniser}) has no post-processed text; make it with "
                           f"'ocrbench postprocess {store_path} --run {rid}' or 'ocrbench run ... --postprocess'",
                           EXIT_USAGE)
            for as_post in ((False, True) if post else (False,)):
                texts = store.page_texts(rid, post=as_post)
                pairing = pair_store_pages(truth, texts.keys())
                label = f"{info.recogniser} (run {rid})" + (" post-processed" if as_post else "")
                systems.append(_System(label, rid, info.card_hash, pairing, texts.__getitem__,
                                       store.failed_pages(rid)))
            if post:
                with_post, n = store.post_coverage(rid)
                if with_post < n:
                    Console(stderr=True).print(
                        f"ocrbench: run {rid}: {n - with_post} of {n} lines have no post-processed text and are "
                        "scored raw", markup=False, highlight=False, soft_wrap=True)
        return systems
    finally:
        store.close()


def _write_tables(out: Path, systems: list[_System], payload: dict) -> list[Path]:
    import pandas as pd

    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise TextFileError(out, f"cannot create the output folder ({e.strerror or e})") from e
    written = []
    tables: dict[str, list] = {"lines": [], "pages": [], "confusions": [], "amounts": []}
    for s in systems:
        if s.scores is None:
            continue
        for key in tables:
            df = getattr(s.scores, key)
            if df is None:
                continue
            df = df.copy()
            df.insert(0, "run_id", pd.array([s.run_id] * len(df), dtype="Int64"))
            df.insert(0, "system", pd.Series([s.name] * len(df), dtype=object))
            tables[key].append(df)
    try:
        for key, frames in tables.items():
            if not frames:
                continue
            df = pd.concat(frames, ignore_index=True)
            for ext in ("csv", "parquet"):
                path = out / f"{key}.{ext}"
                if ext == "csv":
                    df.to_csv(path, index=False)
                else:
                    df.to_parquet(path, index=False)
                written.append(path)
        path = out / "summary.json"
        path.write_text(json.dumps(payload, indent=1, ensure_ascii=False, allow_nan=False) + "\n", encoding="utf-8")
        written.append(path)
    except OSError as e:
        raise TextFileError(out, f"cannot write the tables ({e.strerror or e})") from e
    return written


def _print_system(con: Console, s: _System, top: int) -> None:
    sm = s.scores.summary
    t = Table(title=f"{s.name} — profile {sm['profile']}, {sm['pages']} pages", title_justify="left")
    t.add_column("figure")
    t.add_column("value", justify="right")
    t.add_column(f"{100 * sm['interval']['level']:g}% interval", justify="right")
    t.add_column("counts", justify="right")
    t.add_row("CER (corpus)", _pct(sm["cer"]), _interval(sm["cer_low"], sm["cer_high"]),
              f"{sm['char_edits']:,} edits / {sm['ref_chars']:,} chars")
    t.add_row("WER (corpus)", _pct(sm["wer"]), _interval(sm["wer_low"], sm["wer_high"]),
              f"{sm['word_edits']:,} edits / {sm['ref_words']:,} words")
    t.add_row("CER (page mean)", _pct(sm["cer_page_mean"]), "-", "mean of page rates")
    if sm["subs"] is not None:
        t.add_row("substitutions / deletions / insertions", "", "",
                  f"{sm['subs']:,} / {sm['dels']:,} / {sm['ins']:,}")
    if sm["amounts"]:
        a = sm["amounts"]
        t.add_row("amounts with digits right", _pct(a["share_right"]), _interval(a["low"], a["high"]),
                  f"{a['right']:,} of {a['found']:,}")
    con.print(t)
    if sm["classes"]:
        c = Table(title="by character class (substitutions and deletions charged to the truth character; "
                        "insertions to the inserted one)", title_justify="left")
        for col in ("class", "truth chars", "errors", "error rate", "interval", "inserted"):
            c.add_column(col, justify="left" if col == "class" else "right")
        for name, v in sm["classes"].items():
            c.add_row(name, f"{v['ref_chars']:,}", f"{v['errors']:,}", _pct(v["rate"]),
                      _interval(v["low"], v["high"]), f"{v['inserted']:,}")
        con.print(c)
    if sm["confusions"] and top:
        f = Table(title=f"most frequent confusions (truth → recognised), top {top}", title_justify="left")
        for col in ("truth", "recognised", "kind", "count"):
            f.add_column(col, justify="right" if col == "count" else "left")
        for row in sm["confusions"][:top]:
            f.add_row(_show_char(row["ref"]), _show_char(row["hyp"]), row["op"], f"{row['count']:,}")
        con.print(f)
    if sm["line_count_mismatch"]:
        con.print(f"{len(sm['line_count_mismatch'])} page(s) had different line counts and were aligned "
                  "as one text each.", markup=False, highlight=False)
    con.print(f"recipe: {sm['recipe']}", markup=False, highlight=False, style="dim", soft_wrap=True)


def _print_problems(s: _System) -> None:
    """One plain line per problem on stderr (not wrapped, so it can be grepped)."""
    if s.pairing.hyp_only and not s.require_truth:
        typer.echo(f"ocrbench: {s.name}: {s.pairing.missing_truth_line()}", err=True)
    for p in s.pairing.hyp_only if s.require_truth else ():
        typer.echo(f"ocrbench: {s.name}: no ground truth for {p}", err=True)
    for p in s.pairing.truth_only:
        typer.echo(f"ocrbench: {s.name}: no hypothesis for {p}", err=True)
    for u in s.unreadable:
        typer.echo(f"ocrbench: {u['path']}: {u['error']}", err=True)
    for pid, e in s.failed:
        typer.echo(f"ocrbench: {s.name}: page {pid} failed in the run: {e}", err=True)


def score_cmd(
    truth: Path = typer.Option(..., "--truth", help="Folder of ground-truth .txt files (UTF-8, one text line per line)."),
    hyp: Optional[Path] = typer.Option(None, "--hyp", help="Folder of recognised .txt files, paired by file name."),
    store: Optional[Path] = typer.Option(None, "--store", help="A run store written by 'ocrbench run' (instead of --hyp)."),
    run: Optional[list[int]] = typer.Option(None, "--run", metavar="ID", help="Store run id to score; repeat for several "
                                                                "(default: every run in the store)."),
    profile: str = typer.Option("nfc", "--profile", help="Normalisation: exact, nfc, loose or ledger."),
    out: Optional[Path] = typer.Option(None, "--out", help="Folder for lines/pages/confusions/amounts tables "
                                                           "(CSV and Parquet) and summary.json."),
    post: bool = typer.Option(False, "--post", help="Store only: score each run's raw and post-processed text "
                                                    "side by side (with their paired comparison)."),
    top: int = typer.Option(10, "--top", min=0, help="How many confusion pairs to show and report."),
    no_classes: bool = typer.Option(False, "--no-classes", help="Distances only: skip the alignment, so no "
                                                                "classes, confusions or amounts (faster)."),
    boot: int = typer.Option(2000, "--boot", min=100, help="Bootstrap resamples for the intervals."),
    seed: int = typer.Option(0, "--seed", help="Seed of the bootstrap (same seed, same interval)."),
    as_json: bool = typer.Option(False, "--json", help="Print machine-readable JSON to stdout, nothing else."),
    require_truth: bool = typer.Option(False, "--require-truth", help="A page without ground truth is an error "
                                                                      "(exit 1); by default it is counted and skipped."),
) -> None:
    """Score recognised text against ground truth: CER and WER with intervals, character classes, confusions."""
    from ocrbench.accuracy.normalise import PROFILES
    from ocrbench.accuracy.score import score_pages
    from ocrbench.accuracy.stats import paired_comparison
    from ocrbench.io.text import hypothesis_folders, pair_folders, read_text_lines

    if (hyp is None) == (store is None):
        raise fail("give exactly one of --hyp DIR or --store FILE", EXIT_USAGE)
    if store is None and (run or post):
        raise fail("--run and --post need --store", EXIT_USAGE)
    if profile not in PROFILES:
        raise fail(f"--profile must be one of {', '.join(PROFILES)}, not {profile!r}", EXIT_USAGE)
    err = Console(stderr=True)

    try:
        if hyp is not None:
            systems = [_System(name, None, None, pair_folders(truth, folder), read_text_lines)
                       for name, folder in hypothesis_folders(hyp).items()]
        else:
            systems = _store_systems(store, truth, run, post)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    for s in systems:
        s.require_truth = require_truth

    truth_cache: dict[Path, list[str] | TextFileError] = {}

    def truth_lines(path: Path) -> list[str] | TextFileError:
        if path not in truth_cache:
            try:
                truth_cache[path] = read_text_lines(path)
            except TextFileError as e:
                truth_cache[path] = e
        return truth_cache[path]

    total = sum(len(s.pairing.pairs) for s in systems)
    with Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), console=err,
                  transient=True) as bar:
        task = bar.add_task("reading texts", total=total)
        for s in systems:
            pages = []
            for key, tpath, hkey in s.pairing.pairs:
                t = truth_lines(tpath)
                bar.advance(task)
                if isinstance(t, TextFileError):
                    s.unreadable.append({"path": t.path, "error": t.reason})
                    continue
                try:
                    h = s.load(hkey)
                except TextFileError as e:
                    s.unreadable.append({"path": e.path, "error": e.reason})
                    continue
                pages.append((key, t, h))
            bar.update(task, description=f"scoring {s.name}")
            s.scores = score_pages(pages, profile=profile, classes=not no_classes, recogniser_hash=s.rec_hash,
                                   top=top, n_boot=boot, seed=seed)

    comparisons = []
    for a, b in combinations(systems, 2):
        try:
            comparisons.append(paired_comparison(a.scores, b.scores, n_boot=boot, seed=seed,
                                                 names=(a.name, b.name)))
        except ValueError as e:
            comparisons.append({"a": a.name, "b": b.name, "error": str(e)})

    if len(systems) == 1:
        payload = systems[0].report()
    else:
        payload = {"systems": [s.report() for s in systems], "comparisons": comparisons,
                   "profile": profile}

    try:
        written = _write_tables(out, systems, payload) if out is not None else []
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)

    for s in systems:
        _print_problems(s)
    if as_json:
        typer.echo(json.dumps(payload, ensure_ascii=False, allow_nan=False))
    else:
        con = Console()
        for s in systems:
            _print_system(con, s, top)
        if comparisons:
            c = Table(title="paired comparisons (CER, same pages)", title_justify="left")
            for col in ("a", "b", "CER a − b", "interval", "p-value", "better"):
                c.add_column(col)
            for r in comparisons:
                if "error" in r:
                    c.add_row(r["a"], r["b"], "-", "-", "-", r["error"])
                    continue
                c.add_row(r["a"], r["b"], _pct(r["diff"]), _interval(r["low"], r["high"]),
                          "-" if r["p_value"] is None else f"{r['p_value']:.3g}",
                          r["winner"] or "no clear difference")
            con.print(c)
        for p in written:
            con.print(f"wrote {p}", markup=False, highlight=False)
    raise typer.Exit(EXIT_SOME_FAILED if any(s.problems() for s in systems) else EXIT_OK)
