"""The whole job on the demo archive, as one library call: recognise, post-process, score, plan, report.

``ocrbench demo`` calls :func:`run_demo`. What it does, in order:

1. finds the two demo recognisers (``models/ledger-ctc``, ``models/ledger-seq``
   beside the package source, or another folder holding both) and the demo
   pages (``scans_demo/``, ground truth beside each image);
2. recognises every page with both recognisers into a run store, with the
   post-processing pipeline as the runner's hook, so the post-processed text
   is stored beside the raw text (never over it). The pipeline: Unicode NFC,
   whitespace, word correction against the invented firm's word list (payees,
   places, goods, ledger headings) for doubtful words only, and the ledger
   rule that changes one doubtful digit when that alone balances a page;
3. writes the report (scores against the ground truth, paired comparison,
   ledger arithmetic, worst pages, figures) with an archive plan for an
   invented archive whose size, deadline, budget, workers and prices are
   stated in :class:`DemoArchive` and printed;
4. returns the headline figures as lines of text, written from the report's
   JSON summary with the report's own formatting function.

Rerunning with the same output folder resumes the run store (finished pages
are skipped) and rewrites the report; ``fresh=True`` starts new runs.
"""

from __future__ import annotations

import os
import random
import re
import shutil
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable

from ocrbench.errors import InputError, OcrbenchError
from ocrbench.io.files import atomic_write_lines
from ocrbench.report import ReportFiles, fmt, write_report
from ocrbench.planning.service import PlanRequest

__all__ = ["DemoArchive", "DemoResult", "run_demo", "repo_root", "find_demo_models", "firm_words",
           "demo_pipeline", "headline_lines", "DEMO_RECOGNISERS"]

DEMO_RECOGNISERS = ("ledger-ctc", "ledger-seq")


@dataclass(frozen=True)
class DemoArchive:
    """The invented archive the demo plans for. Every figure here is an assumption, printed with the results.

    180,000 pages is the size of a mid-sized business-records collection (a few
    hundred cash books and ledgers); six weeks is a typical project slot.
    Prices are round invented figures: a cloud-style price per core-hour, and
    an hourly rate for the people who correct the text.
    """

    pages: int = 180_000
    deadline: str = "6w"
    budget: float = 60_000.0
    currency: str = "GBP"
    workers: int = 4
    price_core_hour: float = 0.05
    seconds_per_error: float = 10.0
    correction_price_hour: float = 18.0
    correctors: int = 50                  # invented: a large keying team, each 37.5 hours a week

    def layout(self, workers: int | None = None, *, cores: int | None = None) -> tuple[int, int]:
        """(workers per machine, machines) for ``workers`` on machines like this one: as many per machine as
        it has cores (a divisor of ``workers``, so every machine runs the same number), the rest on more machines."""
        w = workers or self.workers
        c = max(1, cores or os.cpu_count() or 1)
        per = max(d for d in range(1, min(w, c) + 1) if w % d == 0)
        return per, w // per

    def plan_request(self, *, workers: int | None = None, cores: int | None = None, draws: int = 2000,
                     seed: int = 0) -> PlanRequest:
        per, machines = self.layout(workers, cores=cores)
        return PlanRequest(pages=self.pages, deadline=self.deadline, budget=self.budget, workers=per,
                           machines=machines, threads=1, price_core_hour=self.price_core_hour,
                           seconds_per_error=self.seconds_per_error, correction_price_hour=self.correction_price_hour,
                           correctors=self.correctors, currency=self.currency, draws=draws, seed=seed)


@dataclass
class DemoResult:
    """What :func:`run_demo` made: the folder, the store, the report files, the wall time and the headline."""

    out_dir: Path
    store: Path
    report: ReportFiles
    wall_seconds: float
    pages: int
    pages_resumed: int
    assumptions: list[str]
    headline: list[str]
    summary: dict = field(default_factory=dict)


def repo_root() -> Path:
    """The source tree the package was installed from (editable install): the folder above ``ocrbench/``."""
    return Path(__file__).resolve().parent.parent


def find_demo_models(models_dir: Path | str | None = None) -> list[Path]:
    """The two demo recognisers' folders; InputError naming the folder when one is missing."""
    root = Path(models_dir) if models_dir is not None else repo_root() / "models"
    out = []
    for name in DEMO_RECOGNISERS:
        folder = root / name
        if not (folder / "card.toml").is_file():
            raise InputError(folder, "demo recogniser not found (no card.toml): build the demo models with "
                                     "'python models/build.py export', or give a folder holding ledger-ctc/ "
                                     "and ledger-seq/ with --models")
        out.append(folder)
    return out


def firm_words(*, samples: int = 20000, seed: int = 7) -> list[str]:
    """The invented firm's word list: payees, places, goods and ledger headings, as its clerks write them.

    Drawn from the same generator that wrote the demo pages (many seeded ledger
    lines), keeping words of three or more letters. An archive would bring its
    own list (a payee index, a gazetteer, a commodity list).
    """
    from ocrbench import synth

    rng = random.Random(seed)
    words: set[str] = set(re.findall(r"[A-Za-z]{3,}", synth.FIRM))
    words |= {"Cash", "Book", "Folio", "Date", "Payee", "Particulars", "Amount", "Brought", "Carried",
              "forward", "Total", "Balance"}
    for _ in range(samples):
        for f in synth.ledger_line_fields(rng):
            words.update(re.findall(r"[A-Za-z]{3,}", f))
    return sorted(words)


def demo_pipeline(words: list[str]):
    """The demo's post-processing pipeline (see the module docstring)."""
    from ocrbench.postprocess import Lexicon, build_pipeline

    return build_pipeline(["unicode", "whitespace", "lexicon", "ledger_repair"], lexicon=Lexicon.from_words(words))


def _page_files(scans: Path) -> list[Path]:
    from ocrbench.pages import IMAGE_SUFFIXES

    if not scans.is_dir():
        raise InputError(scans, "demo pages folder not found")
    pages = sorted(p for p in scans.iterdir() if p.suffix.lower() in IMAGE_SUFFIXES and p.is_file())
    if not pages:
        raise InputError(scans, "holds no page images (PNG, JPEG or TIFF)")
    return pages


def _subset(scans: Path, n: int, dest: Path) -> Path:
    """The first ``n`` pages of ``scans`` with their ground truth, copied to ``dest`` (kept between runs)."""
    pages = _page_files(scans)[:n]
    dest.mkdir(parents=True, exist_ok=True)
    for p in pages:
        for f in (p, p.with_suffix(".txt")):
            target = dest / f.name
            if f.is_file() and not target.exists():
                shutil.copy2(f, target)
    return dest


def assumption_lines(archive: DemoArchive, *, workers: int, pages_measured: int, cores: int | None = None) -> list[str]:
    c = archive.currency
    per, machines = archive.layout(workers, cores=cores)
    return [
        f"archive: {fmt(archive.pages, 'int')} pages like the demo pages ({pages_measured} measured here), "
        f"deadline {archive.deadline}, budget {c} {fmt(archive.budget, 'money')}",
        f"resources: {workers} workers of one thread each = {machines} machine(s) like this one "
        f"({cores or os.cpu_count()} cores) with {per} worker(s) each; the speed-up of {per} worker(s) on one "
        f"machine is measured here; {c} {fmt(archive.price_core_hour, 'money')} per core-hour",
        f"correction: {fmt(archive.seconds_per_error, 'f1')} s per character error, "
        f"{c} {fmt(archive.correction_price_hour, 'money')} per hour of correction",
        "post-processing: Unicode NFC, whitespace, the firm's word list for doubtful words, "
        "one-digit ledger repair where that alone balances a page",
    ]


def headline_lines(summary: dict) -> list[str]:
    """The headline figures, written from the report's summary with the report's formatting function."""
    out = []
    cur = (summary.get("plan") or {}).get("currency") or ""

    def iv(d: dict | None, k: str, lo: str, hi: str, kind: str) -> str:
        if not d or d.get(k) is None:
            return "n/a"
        return f"{fmt(d[k], kind)} [{fmt(d.get(lo), kind)} – {fmt(d.get(hi), kind)}]"

    for r in summary["recognisers"]:
        acc, post, plan = r.get("accuracy"), r.get("accuracy_post"), r.get("plan") or {}
        out.append(f"{r['name']} ({r['kind']}):")
        out.append(f"  CER raw {iv(acc, 'cer', 'cer_low', 'cer_high', 'pct')}; post-processed "
                   f"{iv(post, 'cer', 'cer_low', 'cer_high', 'pct')}; digit errors (raw) "
                   f"{iv(acc, 'digit_error_rate', 'digit_low', 'digit_high', 'pct')}")
        out.append(f"  pages/hour on this machine, one worker: "
                   f"{iv(r, 'pages_per_hour', 'pages_per_hour_low', 'pages_per_hour_high', 'int')}")
        bal = r.get("balance") or {}
        if bal.get("raw"):
            b, bp = bal["raw"], bal.get("post")
            out.append(f"  ledger arithmetic: {fmt(b['balanced'], 'int')} of {fmt(b['pages'], 'int')} pages balance "
                       "as read" + (f", {fmt(bp['balanced'], 'int')} after post-processing" if bp else ""))
        if plan:
            out.append(f"  archive wall-clock P50 {fmt(plan.get('wall_seconds_p50'), 'dur')} "
                       f"(P10 {fmt(plan.get('wall_seconds_p10'), 'dur')} – P90 {fmt(plan.get('wall_seconds_p90'), 'dur')}); "
                       f"cost {cur} {fmt(plan.get('cost'), 'money')} (up to {fmt(plan.get('cost_high'), 'money')}, "
                       f"correction included); meets deadline: {fmt(plan.get('meets_deadline'), 'bool')}, "
                       f"budget: {fmt(plan.get('meets_budget'), 'bool')}")
    for p in summary.get("paired") or []:
        if p.get("error") or p.get("text") != "raw":
            continue
        verdict = f"{p['winner']} reads more accurately" if p.get("winner") else "no difference shown"
        pv = f"p < {fmt(p.get('p_floor'), 'p')}" if p.get("p_at_floor") else f"p = {fmt(p.get('p_value'), 'p')}"
        out.append(f"paired comparison (raw text, {fmt(p.get('pages'), 'int')} pages): CER {p['a']} − {p['b']} = "
                   f"{fmt(p.get('diff'), 'pct')} [{fmt(p.get('low'), 'pct')} – {fmt(p.get('high'), 'pct')}], "
                   f"{pv}: {verdict}")
    plan = summary.get("plan") or {}
    if (plan.get("recommendation") or {}).get("text"):
        out.append(f"plan: {plan['recommendation']['text']}")
    for c in plan.get("crossover") or []:
        if c.get("text"):
            out.append(f"crossover: {c['text']}")
    return out


def measure_demo_scaling(store: Path, scans: Path, models: list[Path], per_machine: int, *, pages: int,
                         work_dir: Path) -> list[str]:
    """Measure pages per second at 1 and ``per_machine`` worker processes on ``pages`` of the demo pages,
    for each recogniser not yet measured in ``store`` (card hash), into the store's scaling table.

    Returns the names measured now. Uses :func:`ocrbench.run.measure.measure_scaling` (the serial runner, then a Dask run of the
    workers sharing the pages, as ``run --workers K`` runs them) and :func:`ocrbench.planning.inputs.save_scaling`.
    """
    import pandas as pd

    from ocrbench.planning import inputs as planio
    from ocrbench.recognisers.card import load_card
    from ocrbench.run.measure import measure_scaling

    wanted = sorted({1, per_machine})
    have = planio.load_scaling(store)
    subset = work_dir / "pages"
    subset.mkdir(parents=True, exist_ok=True)
    for p in _page_files(scans)[:pages]:
        if not (subset / p.name).exists():
            shutil.copy2(p, subset / p.name)
    rows, measured = [], []
    for folder in models:
        card = load_card(folder)
        mine = have[(have["recogniser"] == card.name) & (have["card_hash"] == card.card_hash)] if len(have) else have
        if set(wanted) <= {int(w) for w in mine["workers"]}:
            continue
        df = measure_scaling(subset, folder, workers=wanted, threads=1, work_dir=work_dir)
        rows.append(df.drop(columns=["speedup"]))
        measured.append(card.name)
    if rows:
        planio.save_scaling(store, pd.concat(rows, ignore_index=True))
    return measured


def run_demo(*, out_dir: Path | str, models_dir: Path | str | None = None, scans_dir: Path | str | None = None,
             workers: int | None = None, max_pages: int | None = None, archive: DemoArchive = DemoArchive(),
             fresh: bool = False, n_boot: int = 2000, draws: int = 2000, scaling_pages: int = 4,
             cores: int | None = None, progress: Callable | None = None,
             echo: Callable[[str], None] | None = None, clock: Callable[[], float] = time.perf_counter) -> DemoResult:
    """Run the demo into ``out_dir`` (store ``demo.sqlite``, report ``report/``); see the module docstring.

    ``max_pages`` takes only the first pages (for a quick look or a test).
    ``scaling_pages``: pages of the throughput measurement at several workers
    (when more than one worker per machine is planned). ``cores``: the
    machine's cores (default: this machine's).
    ``echo`` receives progress lines (the assumptions first); ``progress``
    receives the runner's events. Raises InputError / CardError / StoreError
    for what stops the demo.
    """
    from ocrbench.run.engine import run_pages
    from ocrbench.store import RunStore

    t0 = clock()
    say = echo or (lambda _line: None)
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise InputError(out, f"cannot create the output folder ({e.strerror or e})") from e
    models = find_demo_models(models_dir)
    scans = Path(scans_dir) if scans_dir is not None else repo_root() / "scans_demo"
    if max_pages is not None:
        if max_pages < 2:
            raise OcrbenchError("the demo needs at least 2 pages (the planner fits on 2 or more)")
        scans = _subset(scans, max_pages, out / "pages")
    n_pages = len(_page_files(scans))
    workers = workers or archive.workers
    cores = cores or os.cpu_count() or 1
    per_machine, _machines = archive.layout(workers, cores=cores)
    assumptions = assumption_lines(archive, workers=workers, pages_measured=n_pages, cores=cores)
    say("ocrbench demo: the invented archive of an invented firm's cash books (assumptions)")
    for line in assumptions:
        say(f"  {line}")

    words = firm_words()
    atomic_write_lines(out / "firm_words.txt", words)
    pipeline = demo_pipeline(words)
    store = out / "demo.sqlite"
    with RunStore(store) as st:
        summary_run = run_pages(scans, models, store=st, postprocess=pipeline, fresh=fresh, progress=progress)
    resumed = summary_run.pages_skipped
    failed = summary_run.failed_pages
    say(f"recognised {summary_run.pages_total} pages with {len(models)} recognisers in "
        f"{fmt(summary_run.wall_seconds, 'dur')}" + (f" ({resumed} already in the store)" if resumed else "")
        + (f"; {len(failed)} failed: {', '.join(failed)}" if failed else "") + f"; store: {store}")

    if per_machine > 1:
        t1 = clock()
        measured = measure_demo_scaling(store, scans, models, per_machine, pages=min(scaling_pages, n_pages),
                                        work_dir=out / "scaling")
        if measured:
            say(f"measured throughput at 1 and {per_machine} workers on {min(scaling_pages, n_pages)} pages for "
                f"{', '.join(measured)} in {fmt(clock() - t1, 'dur')}")

    files = write_report(store, out / "report", truth=scans,
                         plan=archive.plan_request(workers=workers, cores=cores, draws=draws), profile="nfc",
                         n_boot=n_boot, currency=archive.currency,
                         title="ocrbench demo: two recognisers on an invented firm's cash books")
    wall = clock() - t0
    head = headline_lines(files.data.summary)
    return DemoResult(out_dir=out, store=store, report=files, wall_seconds=wall, pages=n_pages,
                      pages_resumed=resumed, assumptions=assumptions, headline=head, summary=files.data.summary)


def describe(archive: DemoArchive) -> dict:
    """The archive's assumptions as a JSON-ready dict."""
    return asdict(archive)
