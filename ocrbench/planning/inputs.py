"""The planner's inputs from files: calibration stores, sample folders, ground truth, plan files.

The planner's core (numerics, costmodel, archive, estimate, decide) is pure (tables in, tables out); this module reads what
it needs from disk and hands it over:

* a calibration store -> one :class:`~ocrbench.planning.costmodel.CostModel` per
  recogniser (the machine profile is the store's host), plus the throughput
  table ``scaling`` that :mod:`ocrbench.run.measure` adds to the same file;
* a sample folder -> an :class:`~ocrbench.planning.archive.Archive` (pages segmented
  only, nothing recognised);
* a ground-truth folder -> each recogniser's CER with its interval and the
  per-page scores the sample-size calculation needs;
* a plan file (TOML) -> a :class:`PlanRequest` (format in :data:`PLAN_FILE_FORMAT`).
"""

from __future__ import annotations

import json
import math
import re
import sqlite3
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Callable, Mapping, Sequence

import numpy as np
import pandas as pd

from ocrbench.io.config import Key, check_table, read_toml
from ocrbench.planning.archive import Archive
from ocrbench.planning.configs import measured_slower, settings_groups
from ocrbench.planning.costmodel import CostModel, fit_cost_model
from ocrbench.planning.people import (DEFAULT_CHARS_PER_SECOND, DEFAULT_HOURS_PER_WEEK, DEFAULT_REVIEW_SHARE,
                                      DEFAULT_SECONDS_PER_ERROR, DEFAULT_SECONDS_PER_LINE, REVIEW_MODES)
from ocrbench.planning.estimate import SPEED_DRIFT, AccuracyInput
from ocrbench.planning.numerics import ScalingFit
from ocrbench.planning.routes import calibration_runs, reading_runs, route_from_table
from ocrbench.errors import ConfigError, InputError, OcrbenchError, PlanError, StoreError

#: Default half-width of the CER interval wanted from a ground-truth sample, relative to the CER (±20 %).
DEFAULT_CER_RELATIVE_MARGIN = 0.2

PLAN_FILE_FORMAT = """\
# An ocrbench plan file (TOML). Paths are relative to this file. Every key is optional
# except calibration and one way of describing the archive; command-line options win.
calibration = ["calibration.sqlite"]       # run stores; "NAME=path" names the machine profile
recognisers = ["ledger-ctc", "ledger-seq"] # only these (default: every recogniser in the stores)
currency = "GBP"                           # ISO 4217 code of every amount below and in the plan

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
# pages_per_job = 5000                      # split the archive into jobs; each pays start-up and loading

[goals]
deadline = "6w"                            # s, m, h, d or w
budget = 5000
# target_cer = 0.004                        # cheapest option whose CER upper bound is at most this (0.4 %)

[route]                                    # a route as a plan option (see `ocrbench run --route`)
fast = "ledger-ctc"                        # reads every line
slow = "ledger-seq"                        # re-reads the lines the fast one doubts
# threshold = 0.3                           # doubt > threshold is routed (default: the plan tries several)

[correction]
review = "full"                            # full (every line read), targeted (queue head) or none
seconds_per_error = 10                     # default 10 (see ocrbench.planning.people.Correction)
seconds_per_line = 4                       # reading: seconds per line (default 4, as `ocrbench review`)
chars_per_second = 10                      # reading: characters compared per second (default 10)
# review_share = 0.1                        # targeted: share of lines read (the most doubtful)
# catch_rate = 0.6                          # targeted: share of errors in them (`ocrbench review --truth`)
price_hour = 25                            # cost of an hour of review or correction (default: not priced)
truth = "truth/"                           # ground truth of the calibration pages -> CER and sample size
cer_relative_margin = 0.2                  # wanted half-width of the CER interval, relative to the CER
# cer_margin = 0.005                        # or an absolute half-width (wins when given)

[people]
correctors = 4                             # people correcting (default: not given; the plan says how many)
hours_per_week = 37.5                      # hours each corrects a week

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


def _process_start(host_json: pd.Series, key: str = "process_start_seconds") -> float | None:
    """The median process start-up (or another figure ``key``) measured with the sessions (``ocrbench
    measure-scaling`` notes it in host_json)."""
    got = [v for v in (_host_figure(h, key) for h in host_json) if v is not None]
    return float(np.median(got)) if got else None


def _host_figure(host_json: str | None, key: str) -> float | None:
    """One non-negative figure a measurement noted in a row's host description, or None."""
    try:
        v = json.loads(host_json or "{}").get(key)
    except (TypeError, ValueError, AttributeError):
        return None
    return float(v) if isinstance(v, (int, float)) and v >= 0 else None


def _dask_start_close(rows: pd.DataFrame) -> dict[int, float]:
    """Per worker count K > 1: a measured Dask run's start (card check, cluster, sessions) and close, median seconds.

    Only rows that noted their close (``measure-scaling`` since the K-worker rows are real Dask runs) count."""
    out: dict[int, float] = {}
    for k, g in rows[rows["workers"] > 1].groupby("workers"):
        closes = [_host_figure(h, "close_seconds") for h in g["host_json"]]
        got = [float(a) + c for a, c in zip(g["startup_seconds"], closes) if c is not None and not pd.isna(a)]
        if got:
            out[int(k)] = float(np.median(got))
    return out


@dataclass
class Calibration:
    """Everything one calibration store gives the planner."""

    path: Path
    profile: str
    models: list[CostModel]
    scaling: dict[str, ScalingFit]
    alternatives: list[CostModel] = field(default_factory=list)   # other measured settings (planning.configs)


def read_calibration(spec: str | Path, *, recognisers: Sequence[str] | None = None, n_boot: int = 200,
                     seed: int = 0) -> Calibration:
    """Fit every recogniser of a calibration store. ``spec`` is ``path`` or ``NAME=path`` (profile name)."""
    text = str(spec)
    name = None
    if "=" in text and not Path(text).exists():
        name, text = text.split("=", 1)
    path = Path(text)
    frames = read_store_frames(path)
    frames = {**frames, "runs": calibration_runs(frames["runs"])}   # not a route's kept text (see calibration_runs)
    runs = frames["runs"]
    if runs.empty:
        raise PlanError(f"{path}: the calibration store holds no runs")
    scaling_rows = load_scaling(path)
    names = list(recognisers) if recognisers else sorted(runs["recogniser"].unique())
    missing = [n for n in names if n not in set(runs["recogniser"])]
    if missing:
        raise PlanError(f"{path}: no run of {', '.join(missing)} in this calibration store "
                        f"(it holds {', '.join(sorted(runs['recogniser'].unique()))})")
    models, scaling, alternatives = [], {}, []
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
                           "run_id": None if rid is None or pd.isna(rid) else int(rid),
                           "process_start_seconds": _process_start(one["host_json"]),
                           "cluster_start_seconds": _process_start(one["host_json"], "cluster_start_seconds"),
                           "close_seconds": _process_start(one["host_json"], "close_seconds"),
                           "dask_start_close": _dask_start_close(mine[mine["card_hash"] == last.get("card_hash")])}
            scaling[n] = ScalingFit(mine[["workers", "threads", "pages_per_second"]].copy(), recogniser=n)
        try:
            m = fit_cost_model(frames, n, profile=name, line_height=height, width_multiple=multiple,
                                 split_gap=split_gap, session=session, n_boot=n_boot, seed=seed)
        except PlanError as e:
            raise PlanError(f"{path}: {e}") from e
        models.append(m)
        alternatives += _alternatives(frames, m, dict(profile=name, line_height=height, width_multiple=multiple,
                                                      split_gap=split_gap, session=session, n_boot=n_boot,
                                                      seed=seed))
    profile = name or models[0].profile
    for m in models + alternatives:
        m.profile = profile
    return Calibration(path=path, profile=profile, models=models,
                       scaling={f"{profile}/{k}": v for k, v in scaling.items()}, alternatives=alternatives)


def _alternatives(frames: Mapping[str, pd.DataFrame], main: CostModel, fit_args: dict) -> list[CostModel]:
    """The recogniser's other measured settings (batch size, threads) as cost models of their own; every one
    (``main`` included) measured slower than another on the same pages is marked (``slower_than``)."""
    groups = settings_groups(frames, main.recogniser)
    slower = measured_slower(groups)
    out = []
    for i, g in enumerate(groups):
        if max(main.run_ids) in g.run_ids:          # the latest settings: the recogniser's own row
            main.slower_than = slower.get(i)
            continue
        try:
            alt = fit_cost_model(frames, main.recogniser, run_ids=g.run_ids, **fit_args)
        except PlanError as e:
            main.notes.append(f"{g.label()} (runs {', '.join(map(str, g.run_ids))}) not planned: {e}")
            continue
        alt.slower_than = slower.get(i)
        out.append(alt)
    return out


# --------------------------------------------------------------------------- sample folder


def describe_sample(folder: Path | str, *, n_pages: int | None = None, sample_pages: int = 20, seed: int = 0,
                    split_gaps: Sequence[float] = (),
                    progress: Callable[[int, int], None] | None = None) -> tuple[Archive, list[tuple[str, str]]]:
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
    archive = Archive.from_layouts(pd.DataFrame(prow), pd.DataFrame(lrows, columns=cols),
                                     n_pages=n_pages or len(refs), source=f"sample of {folder}")
    return archive, failed


# --------------------------------------------------------------------------- ground truth




def score_calibration(store_path: Path | str, truth_dir: Path | str, *, recognisers: Sequence[str] | None = None,
                      profile: str = "nfc") -> dict[str, tuple[AccuracyInput, pd.DataFrame]]:
    """Each recogniser's CER (with its interval) and per-page scores on the calibration pages that have truth
    (the latest run of each; scored by :mod:`ocrbench.accuracy.evaluate`, paired as ``score`` pairs)."""
    from ocrbench.accuracy.evaluate import PostText, score_systems, store_systems
    from ocrbench.store import RunStore

    truth_dir = Path(truth_dir)
    if not truth_dir.is_dir():
        raise InputError(truth_dir, "ground-truth folder not found")
    with RunStore(store_path, read_only=True) as st:
        runs = reading_runs(st.read_frames()["runs"])
    latest = {}
    for name in (recognisers or sorted(runs["recogniser"].unique())):
        mine = runs[runs["recogniser"] == name]
        if not mine.empty:
            latest[name] = int(mine["run_id"].iloc[-1])
    if not latest:
        return {}
    systems, _ = store_systems(store_path, truth_dir, list(latest.values()), PostText.RAW)
    score_systems(systems, profile=profile, classes=False)
    out = {}
    for name, rid in latest.items():
        system = next(x for x in systems if x.run_id == rid)
        if not system.scored:
            raise PlanError(f"{truth_dir}: no ground truth matches the pages of run {rid} ({name})")
        summary = system.scores.summary
        if summary.get("cer") is None:
            raise PlanError(f"{truth_dir}: the ground truth of run {rid} holds no characters")
        out[name] = (AccuracyInput(float(summary["cer"]), float(summary["cer_low"]), float(summary["cer_high"])),
                     system.scores.pages)
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
    seconds_per_error: float = DEFAULT_SECONDS_PER_ERROR
    correction_price_hour: float | None = None
    truth: Path | None = None
    cer_margin: float | None = None            # absolute half-width of the CER interval (wins when given)
    cer_relative_margin: float = DEFAULT_CER_RELATIVE_MARGIN
    review: str = "full"
    seconds_per_line: float = DEFAULT_SECONDS_PER_LINE
    chars_per_second: float = DEFAULT_CHARS_PER_SECOND
    review_share: float = DEFAULT_REVIEW_SHARE
    catch_rate: float | None = None
    correctors: int | None = None
    corrector_hours_per_week: float = DEFAULT_HOURS_PER_WEEK
    pages_per_job: int | None = None
    currency: str | None = None
    accuracy: dict[str, dict] = field(default_factory=dict)
    profiles: dict[str, dict] = field(default_factory=dict)
    draws: int = 2000
    seed: int = 0
    speed_drift: float = SPEED_DRIFT
    target_cer: float | None = None            # choose the cheapest option whose CER upper bound meets it
    route: str | None = None                   # "FAST -> SLOW [if doubt > X]" (planning.routes.parse_plan_route)


def page_size_or_calibrated(size: tuple[int, int] | None, ref: CostModel) -> tuple[int, int]:
    """``size``, else a page of the calibration's middle pixel count at the 1 : 1.3 shape of a ledger leaf."""
    if size is not None:
        return size
    lo, hi = ref.ranges["page pixels"]
    side = math.sqrt((lo + hi) / 2 / 1.3)
    return int(side), int(1.3 * side)


def parse_page_size(v) -> tuple[int, int] | None:
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


_NUM = (int, float)
_RANGE = (int, str, list)

#: Keys a ``[profiles.NAME]`` table may set: the resources of one machine profile.
PROFILE_SCHEMA = {
    "workers": Key((int,), low=1), "threads": Key((int,), low=1), "machines": Key((int,), low=1),
    "price_core_hour": Key(_NUM, low=0), "price_machine_hour": Key(_NUM, low=0),
}

#: The plan file's schema (format and comments: :data:`PLAN_FILE_FORMAT`), checked by ``io.config.check_table``.
PLAN_FILE_SCHEMA = {
    "calibration": Key((str, list), default=[], items=(str,)),
    "recognisers": Key((list,), items=(str,)),
    "archive": {
        "pages": Key((int,), low=1), "lines_per_page": Key(_RANGE), "chars_per_line": Key(_RANGE),
        "page_size": Key((list, str)), "sample": Key((str,)), "sample_pages": Key((int,), default=20, low=1),
        "store": Key((str,)),
    },
    "currency": Key((str,), check=lambda v: None if re.fullmatch(r"[A-Z]{3}", v) else
                    f"currency must be an ISO 4217 code of three capital letters (GBP, EUR, USD), not {v!r}"),
    "resources": {k: (Key((int,), default=1, low=1) if k in ("workers", "machines") else v)
                  for k, v in PROFILE_SCHEMA.items()} | {"pages_per_job": Key((int,), low=1)},
    "people": {"correctors": Key((int,), low=1), "hours_per_week": Key(_NUM, default=DEFAULT_HOURS_PER_WEEK,
                                                                         low=0, low_open=True, high=168)},
    "goals": {"deadline": Key((str,)), "budget": Key(_NUM, low=0), "target_cer": Key(_NUM, low=0, high=1)},
    "route": {"fast": Key((str,)), "slow": Key((str,)), "threshold": Key(_NUM)},
    "correction": {
        "seconds_per_error": Key(_NUM, default=DEFAULT_SECONDS_PER_ERROR, low=0),
        "price_hour": Key(_NUM, low=0), "truth": Key((str,)),
        "cer_margin": Key(_NUM, low=0, low_open=True),
        "cer_relative_margin": Key(_NUM, default=DEFAULT_CER_RELATIVE_MARGIN, low=0, low_open=True),
        "review": Key((str,), default="full", choices=REVIEW_MODES),
        "seconds_per_line": Key(_NUM, default=DEFAULT_SECONDS_PER_LINE, low=0),
        "chars_per_second": Key(_NUM, default=DEFAULT_CHARS_PER_SECOND, low=0, low_open=True),
        "review_share": Key(_NUM, default=DEFAULT_REVIEW_SHARE, low=0, high=1),
        "catch_rate": Key(_NUM, low=0, high=1),
    },
    "accuracy": Key((dict,), default={}, free=True),
    "profiles": Key((dict,), default={}, free=True),
    "simulation": {"draws": Key((int,), default=2000, low=1), "seed": Key((int,), default=0),
                   "speed_drift": Key(_NUM, default=SPEED_DRIFT, low=0, high=0.99)},
}

#: Keys of an ``[accuracy.NAME]`` table.
ACCURACY_SCHEMA = {"cer": Key(_NUM, required=True, low=0), "cer_low": Key(_NUM, required=True, low=0),
                   "cer_high": Key(_NUM, required=True, low=0)}


def _named_tables(doc: Mapping, key: str, schema: Mapping, source: Path) -> dict[str, dict]:
    """``[key.NAME]`` tables, each checked against ``schema`` (the names are the user's)."""
    out = {}
    for name, sub in doc.items():
        if not isinstance(sub, Mapping):
            raise ConfigError(source, f"{key}.{name} must be a table, not {type(sub).__name__}")
        out[str(name)] = check_table(sub, schema, source=source, prefix=f"{key}.{name}.")
    return out


def _plan_file_paths(p: Path):
    base = p.parent

    def rel(v):
        return None if v is None else (base / v if not Path(v).is_absolute() else Path(v))

    def cal(v: str) -> str:
        if "=" in v and not (base / v).exists():
            n, q = v.split("=", 1)
            return f"{n}={rel(q)}"
        return str(rel(v))
    return rel, cal


def load_plan_file(path: Path | str) -> PlanRequest:
    """Read a plan file (format: :data:`PLAN_FILE_FORMAT`); paths become relative to its folder.

    Every key is checked (:data:`PLAN_FILE_SCHEMA`): a misspelt key, a value of the
    wrong type or out of range raises :class:`ConfigError` naming the file, the
    key's dotted path and, for a misspelt key, the nearest valid one.
    """
    p = Path(path)
    doc = check_table(read_toml(p), PLAN_FILE_SCHEMA, source=p)
    accuracy = _named_tables(doc["accuracy"], "accuracy", ACCURACY_SCHEMA, p)
    profiles = {n: {k: v for k, v in t.items() if v is not None}
                for n, t in _named_tables(doc["profiles"], "profiles", PROFILE_SCHEMA, p).items()}
    rel, cal = _plan_file_paths(p)
    a, r, g, c, s = (doc[k] for k in ("archive", "resources", "goals", "correction", "simulation"))
    cals = doc["calibration"]
    text = lambda v: None if v is None else str(v)  # noqa: E731
    try:
        page_size = parse_page_size(a["page_size"])
    except PlanError as e:
        raise ConfigError(p, f"archive.page_size: {e}") from e
    return PlanRequest(
        calibration=[cal(v) for v in ([cals] if isinstance(cals, str) else cals)],
        recognisers=doc["recognisers"], sample=rel(a["sample"]), sample_pages=a["sample_pages"],
        archive_store=rel(a["store"]), pages=a["pages"], lines_per_page=text(a["lines_per_page"]),
        chars_per_line=text(a["chars_per_line"]), page_size=page_size,
        workers=r["workers"], threads=r["threads"], machines=r["machines"],
        price_core_hour=r["price_core_hour"], price_machine_hour=r["price_machine_hour"],
        deadline=g["deadline"], budget=g["budget"], seconds_per_error=float(c["seconds_per_error"]),
        correction_price_hour=c["price_hour"], truth=rel(c["truth"]), cer_margin=c["cer_margin"],
        cer_relative_margin=float(c["cer_relative_margin"]), review=c["review"],
        seconds_per_line=float(c["seconds_per_line"]), chars_per_second=float(c["chars_per_second"]),
        review_share=float(c["review_share"]), catch_rate=c["catch_rate"], correctors=doc["people"]["correctors"],
        corrector_hours_per_week=float(doc["people"]["hours_per_week"]), pages_per_job=r["pages_per_job"],
        currency=doc["currency"], accuracy=accuracy, profiles=profiles, draws=s["draws"], seed=s["seed"],
        speed_drift=float(s["speed_drift"]), target_cer=g["target_cer"],
        route=None if (rt := route_from_table(doc["route"], p)) is None else str(rt))


def merge_request(base: PlanRequest, overrides: Mapping) -> PlanRequest:
    """``base`` with every non-None value of ``overrides`` (command-line options) put over it."""
    names = {f.name for f in fields(PlanRequest)}
    vals = {f.name: getattr(base, f.name) for f in fields(PlanRequest)}
    for k, v in overrides.items():
        if k in names and v is not None and v != [] and v != ():
            vals[k] = v
    return PlanRequest(**vals)


def measure_catch_rate(store_path: Path | str, truth_dir: Path | str, recogniser: str, *,
                       share: float) -> tuple[float, str]:
    """Share of a recogniser's character errors that lie in the most doubtful ``share`` of its lines.

    The lines of its latest calibration run are ranked as ``ocrbench review`` ranks them
    (:func:`ocrbench.postprocess.review.review_queue`); each line's errors are its
    character edits against the ground truth (pages whose truth has as many lines as
    were recognised). Returns (rate, where it was measured).
    """
    from ocrbench.io.text import pair_store_pages, read_text_lines
    from ocrbench.postprocess.review import line_edits, review_queue
    from ocrbench.store import RunStore

    with RunStore(store_path, read_only=True) as st:
        frames = st.read_frames()
        runs = reading_runs(frames["runs"])
        runs = runs[runs["recogniser"] == recogniser]
        if runs.empty:
            raise PlanError(f"{store_path}: no run of {recogniser} to measure its review catch rate on")
        rid = int(runs["run_id"].iloc[-1])
    ln = frames["lines"][frames["lines"]["run_id"] == rid].copy()
    ln["edits"] = np.nan
    truth_of = {str(pid): tp for _, tp, pid in pair_store_pages(truth_dir, ln["page_id"].astype(str).unique()).pairs}
    for pid, g in ln.groupby("page_id"):
        tp = truth_of.get(str(pid))
        ref = read_text_lines(tp) if tp is not None else None
        if ref is not None and len(ref) == len(g):
            g = g.sort_values("line_no")
            ln.loc[g.index, "edits"] = line_edits(ref, g["text"].fillna("").tolist())
    ln = ln.dropna(subset=["edits"])
    total = float(ln["edits"].sum())
    if ln.empty or total <= 0:
        raise PlanError(f"{truth_dir}: no character errors of {recogniser} could be paired line by line with the "
                        "ground truth; give --catch-rate")
    q = review_queue(ln[["page_id", "line_no", "text", "confidence"]])
    head = q.take(max_lines=max(1, int(round(share * len(q.table)))))
    keys = set(zip(head["page_id"], head["line_no"]))
    caught = float(sum(e for p, n, e in zip(ln["page_id"], ln["line_no"], ln["edits"]) if (p, n) in keys))
    where = (f"measured for {recogniser}: the {len(head)} most doubtful of {len(q.table)} calibration lines hold "
             f"{caught:.0f} of its {total:.0f} character errors")
    return caught / total, where
