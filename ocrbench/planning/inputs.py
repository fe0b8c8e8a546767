"""The planner's inputs from files: calibration stores, sample folders, ground truth, plan files.

``ocrbench.planning.model`` is pure (tables in, tables out); this module reads what
it needs from disk and hands it over:

* a calibration store -> one :class:`~ocrbench.planning.model.CostModel` per
  recogniser (the machine profile is the store's host), plus the throughput
  table ``scaling`` that :mod:`ocrbench.run.measure` adds to the same file;
* a sample folder -> an :class:`~ocrbench.planning.model.Archive` (pages segmented
  only, nothing recognised);
* a ground-truth folder -> each recogniser's CER with its interval and the
  per-page scores the sample-size calculation needs;
* a plan file (TOML) -> a :class:`PlanRequest` (format in :data:`PLAN_FILE_FORMAT`).
"""

from __future__ import annotations

import json
import math
import sqlite3
import tomllib
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Callable, Mapping, Sequence

import numpy as np
import pandas as pd

from ocrbench.planning import model as P
from ocrbench.errors import InputError, OcrbenchError, PlanError, StoreError

PLAN_FILE_FORMAT = """\
# An ocrbench plan file (TOML). Paths are relative to this file. Every key is optional
# except calibration and one way of describing the archive; command-line options win.
calibration = ["calibration.sqlite"]       # run stores; "NAME=path" names the machine profile
recognisers = ["ledger-ctc", "ledger-seq"] # only these (default: every recogniser in the stores)

[archive]                                  # one of: numbers, sample, store
pages = 180000
lines_per_page = "16-30"                   # uniform range, or one number
chars_per_line = "38-60"
page_size = [1100, 1430]                   # pixels (default: the calibration pages' middle size)
# sample = "sample_pages/"                  # segment up to sample_pages of these (no recognition)
# sample_pages = 20
# store = "earlier_run.sqlite"              # pages and lines as an earlier run recorded them

[resources]
workers = 2                                # processes per machine
threads = 1                                # intra-op threads per worker (default: as calibrated)
machines = 1
price_core_hour = 0.05                     # or price_machine_hour
# price_machine_hour = 0.40

[goals]
deadline = "6w"                            # s, m, h, d or w
budget = 5000

[correction]
seconds_per_error = 10                     # default 10 (see ocrbench.planning.model.Correction)
price_hour = 25                            # cost of an hour of correction (default: not priced)
truth = "truth/"                           # ground truth of the calibration pages -> CER and sample size
cer_margin = 0.005                         # wanted half-width of the CER interval

[accuracy.ledger-ctc]                      # CER by hand (e.g. from `ocrbench score --json`), instead of truth
cer = 0.021
cer_low = 0.018
cer_high = 0.025

[profiles.gpu-box]                         # overrides for one machine profile
price_machine_hour = 2.5
workers = 1

[simulation]
draws = 2000
seed = 0
speed_drift = 0.08                         # machine speed spread between calibration and run (0: dedicated machine)
"""


# --------------------------------------------------------------------------- stores


def read_store_frames(path: Path | str) -> dict[str, pd.DataFrame]:
    """The four tables of a run store, read-only."""
    from ocrbench.store import RunStore

    p = Path(path)
    if not p.is_file():
        raise InputError(p, "run store not found")
    with RunStore(p, read_only=True) as st:
        return st.read_frames()


# The scaling table's DDL and columns live with every other table of the store (ocrbench/store/schema.py).
from ocrbench.store.schema import SCALING_COLUMNS, create_scaling  # noqa: E402


def save_scaling(path: Path | str, table: pd.DataFrame) -> None:
    """Append throughput rows to the ``scaling`` table of a run store (an extension of the store's schema)."""
    from ocrbench.store import RunStore

    with RunStore(path):      # creates the store (and checks it is one) if needed
        pass
    missing = [c for c in SCALING_COLUMNS if c not in table.columns]
    if missing:
        raise PlanError(f"scaling rows lack columns {missing}")
    try:
        con = sqlite3.connect(str(path), timeout=30)
        try:
            with con:
                create_scaling(con)
                con.executemany(f"INSERT INTO scaling({', '.join(SCALING_COLUMNS)}) VALUES "
                                f"({', '.join('?' * len(SCALING_COLUMNS))})",
                                [tuple(None if (isinstance(v, float) and math.isnan(v)) else
                                       (v.item() if hasattr(v, "item") else v) for v in row)
                                 for row in table[list(SCALING_COLUMNS)].itertuples(index=False)])
        finally:
            con.close()
    except sqlite3.Error as e:
        raise StoreError(f"{path}: writing the scaling table: {e}") from e


def load_scaling(path: Path | str) -> pd.DataFrame:
    """The ``scaling`` rows of a store (empty frame when none were measured)."""
    try:
        con = sqlite3.connect(f"{Path(path).resolve().as_uri()}?mode=ro", uri=True)
        try:
            have = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")}
            if "scaling" not in have:
                return pd.DataFrame(columns=list(SCALING_COLUMNS))
            return pd.read_sql_query("SELECT * FROM scaling ORDER BY measured_at", con)
        finally:
            con.close()
    except sqlite3.Error as e:
        raise StoreError(f"{path}: reading the scaling table: {e}") from e


def _card_geometry(card_path: str | None) -> tuple[int | None, int | None, float]:
    """(line height, width multiple, split gap) from the run's card when it is still readable."""
    if not card_path:
        return None, None, 0.0
    try:
        from ocrbench.recognisers.card import load_card

        spec = load_card(card_path).input
        return int(spec.height), int(spec.width_multiple), float(getattr(spec, "split_gap", 0.0) or 0.0)
    except (OcrbenchError, OSError, ValueError, AttributeError):
        return None, None, 0.0


@dataclass
class Calibration:
    """Everything one calibration store gives the planner."""

    path: Path
    profile: str
    models: list[P.CostModel]
    scaling: dict[str, P.ScalingFit]


def read_calibration(spec: str | Path, *, recognisers: Sequence[str] | None = None, n_boot: int = 200,
                     seed: int = 0) -> Calibration:
    """Fit every recogniser of a calibration store. ``spec`` is ``path`` or ``NAME=path`` (profile name)."""
    text = str(spec)
    name = None
    if "=" in text and not Path(text).exists():
        name, text = text.split("=", 1)
    path = Path(text)
    frames = read_store_frames(path)
    runs = frames["runs"]
    if runs.empty:
        raise PlanError(f"{path}: the calibration store holds no runs")
    scaling_rows = load_scaling(path)
    names = list(recognisers) if recognisers else sorted(runs["recogniser"].unique())
    missing = [n for n in names if n not in set(runs["recogniser"])]
    if missing:
        raise PlanError(f"{path}: no run of {', '.join(missing)} in this calibration store "
                        f"(it holds {', '.join(sorted(runs['recogniser'].unique()))})")
    models, scaling = [], {}
    for n in names:
        last = runs[runs["recogniser"] == n].iloc[-1]
        height, multiple, split_gap = _card_geometry(last.get("card_path"))
        mine = scaling_rows[scaling_rows["recogniser"] == n] if len(scaling_rows) else scaling_rows
        session = None
        if len(mine):
            one = mine[(mine["workers"] == 1) & (mine["card_hash"] == last.get("card_hash"))]
            if len(one):
                # every timed session of this card: their mean start-up and time between pages
                rid = one["run_id"].iloc[-1] if len(one) == 1 and "run_id" in one else None
                busy = one["busy_seconds"] / one["pages"]
                session = {"speed_cv": float(busy.std(ddof=1) / busy.mean()) if len(one) >= 2 else 0.0,
                           "sessions": int(len(one)),
                           "startup_seconds": float(one["startup_seconds"].mean()),
                           "gap_seconds_per_page": float((one["gap_seconds_per_page"] * one["pages"]).sum()
                                                         / one["pages"].sum()),
                           "run_id": None if rid is None or pd.isna(rid) else int(rid)}
            scaling[n] = P.ScalingFit(mine[["workers", "threads", "pages_per_second"]].copy(), recogniser=n)
        try:
            m = P.fit_cost_model(frames, n, profile=name, line_height=height, width_multiple=multiple,
                                 split_gap=split_gap, session=session, n_boot=n_boot, seed=seed)
        except PlanError as e:
            raise PlanError(f"{path}: {e}") from e
        models.append(m)
    profile = name or models[0].profile
    for m in models:
        m.profile = profile
    return Calibration(path=path, profile=profile, models=models,
                       scaling={f"{profile}/{k}": v for k, v in scaling.items()})


# --------------------------------------------------------------------------- sample folder


def describe_sample(folder: Path | str, *, n_pages: int | None = None, sample_pages: int = 20, seed: int = 0,
                    split_gaps: Sequence[float] = (),
                    progress: Callable[[int, int], None] | None = None) -> tuple[P.Archive, list[tuple[str, str]]]:
    """Segment (no recognition) up to ``sample_pages`` pages of ``folder`` into an archive description.

    Pages are picked evenly at random (by ``seed``); a page that cannot be
    loaded or segmented is skipped and listed in the returned failures.
    ``n_pages`` is the archive's size (default: the pages of the folder).
    ``split_gaps``: for each card that cuts lines at wide blank gaps, the
    pieces' widths are measured too (column ``pieces_<gap>``), as the card would cut them.
    """
    from ocrbench.pages import analyse_page, list_pages, load_page
    from ocrbench.pages.segment import split_at_gaps

    gaps = sorted({float(g) for g in split_gaps if g and g > 0})

    refs = list_pages(folder)
    if not refs:
        raise InputError(folder, "no page images found")
    rng = np.random.default_rng(seed)
    pick = sorted(rng.choice(len(refs), size=min(sample_pages, len(refs)), replace=False))
    prow, lrows, failed = [], [], []
    for k, i in enumerate(pick):
        ref = refs[int(i)]
        try:
            page = load_page(ref)
            layout = analyse_page(page.gray)
        except Exception as e:  # noqa: BLE001 - one bad page is listed, the others are used
            failed.append((ref.display(), getattr(e, "reason", None) or f"{type(e).__name__}: {e}"))
            continue
        h, w = page.gray.shape[:2]
        prow.append({"page_id": ref.id, "width": w, "height": h})
        for lb in layout.lines:
            r = {"page_id": ref.id, "crop_w": int(lb.crop.shape[1]), "crop_h": int(lb.crop.shape[0])}
            for g in gaps:
                r[f"pieces_{g:g}"] = [int(b - a) for a, b in split_at_gaps(np.asarray(lb.crop), g)]
            lrows.append(r)
        if progress:
            progress(k + 1, len(pick))
    if not prow:
        raise InputError(folder, f"none of the {len(pick)} sampled pages could be segmented")
    cols = ["page_id", "crop_w", "crop_h"] + [f"pieces_{g:g}" for g in gaps]
    archive = P.Archive.from_layouts(pd.DataFrame(prow), pd.DataFrame(lrows, columns=cols),
                                     n_pages=n_pages or len(refs), source=f"sample of {folder}")
    return archive, failed


# --------------------------------------------------------------------------- ground truth


def truth_path_for(truth_dir: Path, page_id: str) -> Path | None:
    """Ground truth pairs by stem: ``page_001.png`` <-> ``page_001.txt``; ``book.tif#3`` <-> ``book_3.txt``
    (or ``book.txt`` for a single frame)."""
    name, _, frame = page_id.partition("#")
    stem = Path(name).stem
    parent = truth_dir / Path(name).parent
    cands = [parent / f"{stem}_{frame}.txt"] if frame else []
    if not frame or frame == "1":
        cands.append(parent / f"{stem}.txt")
    return next((c for c in cands if c.is_file()), None)


def score_calibration(store_path: Path | str, truth_dir: Path | str, *, recognisers: Sequence[str] | None = None,
                      profile: str = "nfc") -> dict[str, tuple[P.AccuracyInput, pd.DataFrame]]:
    """Each recogniser's CER (with its interval) and per-page scores on the calibration pages that have truth."""
    from ocrbench.accuracy.score import score_pages
    from ocrbench.io.text import read_text_lines
    from ocrbench.store import RunStore

    truth_dir = Path(truth_dir)
    if not truth_dir.is_dir():
        raise InputError(truth_dir, "ground-truth folder not found")
    out = {}
    with RunStore(store_path, read_only=True) as st:
        frames = st.read_frames()
        runs = frames["runs"]
        for name in (recognisers or sorted(runs["recogniser"].unique())):
            mine = runs[runs["recogniser"] == name]
            if mine.empty:
                continue
            rid = int(mine["run_id"].iloc[-1])
            triples = []
            for pid, hyp in st.page_texts(rid).items():
                tp = truth_path_for(truth_dir, pid)
                if tp is not None:
                    triples.append((pid, read_text_lines(tp), hyp))
            if not triples:
                raise PlanError(f"{truth_dir}: no ground truth matches the pages of run {rid} ({name})")
            sc = score_pages(triples, profile=profile, classes=False, recogniser_hash=str(mine["card_hash"].iloc[-1]))
            s = sc.summary
            if s.get("cer") is None:
                raise PlanError(f"{truth_dir}: the ground truth of run {rid} holds no characters")
            out[name] = (P.AccuracyInput(float(s["cer"]), float(s["cer_low"]), float(s["cer_high"])), sc.pages)
    return out


# --------------------------------------------------------------------------- requests


@dataclass
class PlanRequest:
    """Everything ``ocrbench plan`` can be told, from the command line or a plan file."""

    calibration: list[str] = field(default_factory=list)
    recognisers: list[str] | None = None
    sample: Path | None = None
    sample_pages: int = 20
    archive_store: Path | None = None
    pages: int | None = None
    lines_per_page: str | None = None
    chars_per_line: str | None = None
    page_size: tuple[int, int] | None = None
    workers: int = 1
    threads: int | None = None
    machines: int = 1
    price_core_hour: float | None = None
    price_machine_hour: float | None = None
    deadline: str | None = None
    budget: float | None = None
    seconds_per_error: float = P.DEFAULT_SECONDS_PER_ERROR
    correction_price_hour: float | None = None
    truth: Path | None = None
    cer_margin: float = P.DEFAULT_CER_MARGIN
    accuracy: dict[str, dict] = field(default_factory=dict)
    profiles: dict[str, dict] = field(default_factory=dict)
    draws: int = 2000
    seed: int = 0
    speed_drift: float = P.SPEED_DRIFT


def page_size_or_calibrated(size: tuple[int, int] | None, ref: P.CostModel) -> tuple[int, int]:
    """``size``, else a page of the calibration's middle pixel count at the 1 : 1.3 shape of a ledger leaf."""
    if size is not None:
        return size
    lo, hi = ref.ranges["page pixels"]
    side = math.sqrt((lo + hi) / 2 / 1.3)
    return int(side), int(1.3 * side)


def _page_size(v) -> tuple[int, int] | None:
    if v is None:
        return None
    if isinstance(v, str):
        parts = v.lower().replace("×", "x").split("x")
        if len(parts) != 2:
            raise PlanError(f"page size {v!r}: write WIDTHxHEIGHT in pixels, e.g. 2480x3508")
        v = parts
    try:
        w, h = int(v[0]), int(v[1])
    except (TypeError, ValueError, IndexError) as e:
        raise PlanError(f"page size {v!r}: two whole numbers of pixels are needed") from e
    if w < 1 or h < 1:
        raise PlanError(f"page size {v!r} must be positive")
    return w, h


def load_plan_file(path: Path | str) -> PlanRequest:
    """Read a plan file (format: :data:`PLAN_FILE_FORMAT`); paths become relative to its folder."""
    p = Path(path)
    try:
        doc = tomllib.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError as e:
        raise InputError(p, "plan file not found") from e
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as e:
        raise InputError(p, f"not a valid TOML plan file: {e}") from e
    base = p.parent
    rel = lambda v: None if v is None else (base / v if not Path(v).is_absolute() else Path(v))  # noqa: E731

    def cal(v: str) -> str:
        if "=" in v and not (base / v).exists():
            n, q = v.split("=", 1)
            return f"{n}={rel(q)}"
        return str(rel(v))

    known = {"calibration", "recognisers", "archive", "resources", "goals", "correction", "accuracy", "profiles",
             "simulation"}
    unknown = sorted(set(doc) - known)
    if unknown:
        raise InputError(p, f"unknown key(s) {', '.join(unknown)}; known: {', '.join(sorted(known))}")
    a, r, g, c, s = (doc.get(k, {}) for k in ("archive", "resources", "goals", "correction", "simulation"))
    cals = doc.get("calibration", [])
    req = PlanRequest(
        calibration=[cal(v) for v in ([cals] if isinstance(cals, str) else cals)],
        recognisers=doc.get("recognisers"),
        sample=rel(a.get("sample")), sample_pages=int(a.get("sample_pages", 20)),
        archive_store=rel(a.get("store")), pages=a.get("pages"),
        lines_per_page=None if a.get("lines_per_page") is None else str(a.get("lines_per_page")),
        chars_per_line=None if a.get("chars_per_line") is None else str(a.get("chars_per_line")),
        page_size=_page_size(a.get("page_size")),
        workers=int(r.get("workers", 1)), threads=r.get("threads"), machines=int(r.get("machines", 1)),
        price_core_hour=r.get("price_core_hour"), price_machine_hour=r.get("price_machine_hour"),
        deadline=None if g.get("deadline") is None else str(g.get("deadline")), budget=g.get("budget"),
        seconds_per_error=float(c.get("seconds_per_error", P.DEFAULT_SECONDS_PER_ERROR)),
        correction_price_hour=c.get("price_hour"), truth=rel(c.get("truth")),
        cer_margin=float(c.get("cer_margin", P.DEFAULT_CER_MARGIN)),
        accuracy=dict(doc.get("accuracy", {})), profiles=dict(doc.get("profiles", {})),
        draws=int(s.get("draws", 2000)), seed=int(s.get("seed", 0)),
        speed_drift=float(s.get("speed_drift", P.SPEED_DRIFT)))
    return req


def merge_request(base: PlanRequest, overrides: Mapping) -> PlanRequest:
    """``base`` with every non-None value of ``overrides`` (command-line options) put over it."""
    names = {f.name for f in fields(PlanRequest)}
    vals = {f.name: getattr(base, f.name) for f in fields(PlanRequest)}
    for k, v in overrides.items():
        if k in names and v is not None and v != [] and v != ():
            vals[k] = v
    return PlanRequest(**vals)


@dataclass
class PlanResult:
    table: pd.DataFrame
    sample_failures: list[tuple[str, str]]


def run_request(req: PlanRequest, *, progress: Callable[[str], None] | None = None) -> PlanResult:
    """Read, fit and plan: the whole of ``ocrbench plan`` below the command line."""
    if not req.calibration:
        raise PlanError("give at least one calibration store (--calibration STORE)")
    say = progress or (lambda _m: None)
    say("fitting cost models")
    cals = [read_calibration(c, recognisers=req.recognisers, seed=req.seed) for c in req.calibration]
    models = [m for c in cals for m in c.models]
    ref = models[0]
    failures: list[tuple[str, str]] = []
    n_desc = sum(x is not None for x in (req.sample, req.archive_store)) + (req.lines_per_page is not None)
    if n_desc != 1:
        raise PlanError("describe the archive one way: --sample DIR, --archive-store STORE, or "
                        "--pages N --lines-per-page A-B --chars-per-line A-B")
    if req.sample is not None:
        say(f"segmenting a sample of {req.sample}")
        archive, failures = describe_sample(req.sample, n_pages=req.pages, sample_pages=req.sample_pages,
                                            seed=req.seed, split_gaps=[m.split_gap for m in models])
    elif req.archive_store is not None:
        archive = P.Archive.from_store_frames(read_store_frames(req.archive_store), n_pages=req.pages)
    else:
        if req.pages is None or req.chars_per_line is None:
            raise PlanError("--pages and --chars-per-line are needed with --lines-per-page")
        archive = P.Archive.from_numbers(int(req.pages), req.lines_per_page, req.chars_per_line,
                                         page_size=page_size_or_calibrated(req.page_size, ref))

    accuracy: dict[str, P.AccuracyInput] = {}
    sample_sizes: dict[str, dict] = {}
    for n, d in (req.accuracy or {}).items():
        try:
            accuracy[n] = P.AccuracyInput.from_summary(d)
        except (KeyError, TypeError, ValueError) as e:
            raise PlanError(f"accuracy of {n}: give cer, cer_low and cer_high ({e})") from e
    if req.truth is not None:
        say("scoring the calibration pages against the ground truth")
        from ocrbench.accuracy.stats import sample_size_for_cer

        for c in cals:
            for n, (acc, pages_df) in score_calibration(c.path, req.truth, recognisers=[m.recogniser for m in c.models]).items():
                accuracy.setdefault(n, acc)
                try:
                    sample_sizes[n] = sample_size_for_cer(pages_df, half_width=req.cer_margin,
                                                          population=archive.n_pages)
                except (PlanError, ValueError) as e:
                    sample_sizes[n] = {"pages": None, "notes": [str(e)]}

    deadline = P.parse_duration(req.deadline) if req.deadline else None
    res = P.Resources(workers=req.workers, threads=req.threads, machines=req.machines,
                      price_core_hour=req.price_core_hour, price_machine_hour=req.price_machine_hour)
    by_profile = {}
    for name, over in (req.profiles or {}).items():
        allowed = {"workers", "threads", "machines", "price_core_hour", "price_machine_hour"}
        bad = set(over) - allowed
        if bad:
            raise PlanError(f"profile {name}: unknown key(s) {', '.join(sorted(bad))}")
        vals = {k: getattr(res, k) for k in allowed} | dict(over)
        by_profile[name] = P.Resources(**vals)
    scaling = {k: v for c in cals for k, v in c.scaling.items()}
    inputs = P.PlanInputs(archive=archive, resources=res, goals=P.Goals(deadline_s=deadline, budget=req.budget),
                          correction=P.Correction(seconds_per_error=req.seconds_per_error,
                                                  price_hour=req.correction_price_hour),
                          accuracy=accuracy, sample_sizes=sample_sizes, scaling=scaling,
                          resources_by_profile=by_profile, draws=req.draws, seed=req.seed,
                          speed_drift=req.speed_drift)
    say("simulating the archive")
    table = P.make_plan(models, inputs)
    table.attrs["sample_sizes"] = sample_sizes
    table.attrs["cer_margin"] = req.cer_margin
    return PlanResult(table=table, sample_failures=failures)


def plan(**options) -> pd.DataFrame:
    """Python API: the plan as a DataFrame (one row per recogniser and machine profile).

    Keyword options are the fields of :class:`PlanRequest`, e.g.
    ``plan(calibration=["cal.sqlite"], pages=180_000, lines_per_page="16-30",
    chars_per_line="38-60", deadline="6w", price_core_hour=0.05)``. The
    statements (choice, crossover, warnings, assumptions, fits) are in
    ``DataFrame.attrs``.
    """
    return run_request(PlanRequest(**options)).table


def plan_json(table: pd.DataFrame) -> dict:
    """The plan as a JSON-ready dict: ``recognisers`` (one object each) plus the plan's statements."""
    def clean(v):
        if isinstance(v, (np.floating, float)):
            return None if not np.isfinite(v) else float(v)
        if isinstance(v, (np.integer,)):
            return int(v)
        if isinstance(v, (np.bool_,)):
            return bool(v)
        if isinstance(v, dict):
            return {k: clean(x) for k, x in v.items()}
        if isinstance(v, (list, tuple)):
            return [clean(x) for x in v]
        return v

    rows = [clean(r) for r in table.to_dict(orient="records")]
    fits = table.attrs.get("fits")
    return clean({
        "recognisers": rows,
        "recommendation": table.attrs.get("recommendation"),
        "crossover": table.attrs.get("crossover", []),
        "warnings": table.attrs.get("warnings", []),
        "assumptions": table.attrs.get("assumptions", []),
        "archive": table.attrs.get("archive"),
        "ground_truth_sample": table.attrs.get("sample_sizes", {}),
        "fits": [] if fits is None else fits.to_dict(orient="records"),
    })


def json_dumps(obj) -> str:
    return json.dumps(obj, indent=1, ensure_ascii=False, allow_nan=False)
