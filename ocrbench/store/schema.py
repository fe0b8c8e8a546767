"""Every table of the run store, its schema version and the migrations from older stores.

This module is the only place that creates or alters a table of a run store:
the run writer, post-processing and the planner's ``scaling`` rows all go
through it. The meaning of each table and column is in ``CONTRACT.md`` beside
this file.

Versions:

* 1 — ``meta``, ``runs``, ``pages``, ``lines``, ``batches``; later stores of
  version 1 also hold ``postprocessing`` (added additively). Timestamps to
  the second.
* 2 — adds ``scaling`` (throughput measured at 1..k workers, formerly created
  by the planner), ``lines.truncated`` (a line cut by the recogniser's length
  guard) and ``lines.error`` (why a line has no text, e.g. the model gave NaN).
  ``pages.file_size`` and ``pages.file_mtime_ns`` (the page file as it was
  read: resuming compares them first and hashes the file only when they
  differ). Timestamps carry microseconds (older, whole-second ones still read).
* 3 — ``pages.collection`` (the page's folder relative to the input root, ``""``
  at the top) and ``pages.flags`` (the page's sanity flags, comma-separated
  names such as ``blank`` or ``rotated_90``; ``""`` for a page checked and
  clean, NULL where nothing was checked: failed pages and older stores).
  ``lines.truncated`` also says which guard cut a line (:data:`TRUNCATED_CODES`:
  1 the token limit, 2 the repetition guard); stores written before the
  repetition guard hold only 0 and 1, which read the same, so the version did
  not change. Read it as "non-zero = truncated".

A store of an older version is migrated in place when it is opened for
writing (in one transaction; the migration only adds); opened read-only it is
read as it is, and readers fill the columns it lacks with their defaults (see
:data:`COLUMN_DEFAULTS`). A store of a newer version than this ocrbench knows
is refused, never misread.
"""

from __future__ import annotations

import datetime as _dt
import sqlite3
from typing import Callable

SCHEMA_VERSION = 3

#: The oldest version this ocrbench reads (and migrates when it writes).
OLDEST_READABLE = 1

#: The tables of a run: what export writes and read_frames returns.
TABLES = ("runs", "pages", "lines", "batches")

META = """CREATE TABLE IF NOT EXISTS meta(
    key TEXT PRIMARY KEY,
    value TEXT
)"""

RUNS = """CREATE TABLE IF NOT EXISTS runs(
    run_id INTEGER PRIMARY KEY,
    recogniser TEXT NOT NULL,
    kind TEXT NOT NULL,
    card_path TEXT,
    card_hash TEXT NOT NULL,
    settings_json TEXT NOT NULL,
    input_dir TEXT NOT NULL,
    host_json TEXT,
    engine TEXT,
    ocrbench_version TEXT,
    started_at TEXT,
    finished_at TEXT
)"""

RUNS_INDEX = "CREATE INDEX IF NOT EXISTS runs_identity ON runs(card_hash, input_dir)"

PAGES = """CREATE TABLE IF NOT EXISTS pages(
    run_id INTEGER NOT NULL REFERENCES runs(run_id),
    page_id TEXT NOT NULL,
    path TEXT,
    content_hash TEXT,
    status TEXT NOT NULL CHECK (status IN ('done', 'failed')),
    error TEXT,
    width INTEGER,
    height INTEGER,
    n_lines INTEGER,
    skew_degrees REAL,
    t_load REAL,
    t_segment REAL,
    t_preprocess REAL,
    t_encode REAL,
    t_steps REAL,
    t_collapse REAL,
    t_postprocess REAL,
    t_total REAL,
    finished_at TEXT,
    file_size INTEGER,
    file_mtime_ns INTEGER,
    collection TEXT,
    flags TEXT,
    PRIMARY KEY (run_id, page_id)
)"""

LINES = """CREATE TABLE IF NOT EXISTS lines(
    run_id INTEGER NOT NULL,
    page_id TEXT NOT NULL,
    line_no INTEGER NOT NULL,
    x0 INTEGER, y0 INTEGER, x1 INTEGER, y1 INTEGER,
    width_px INTEGER,
    text TEXT,
    text_post TEXT,
    confidence REAL,
    char_conf_json TEXT,
    n_chars INTEGER,
    steps INTEGER,
    batch_no INTEGER,
    t_line REAL,
    truncated INTEGER NOT NULL DEFAULT 0,
    error TEXT,
    PRIMARY KEY (run_id, page_id, line_no)
)"""

BATCHES = """CREATE TABLE IF NOT EXISTS batches(
    run_id INTEGER NOT NULL,
    page_id TEXT NOT NULL,
    batch_no INTEGER NOT NULL,
    n_lines INTEGER,
    padded_width INTEGER,
    sum_width INTEGER,
    frames INTEGER,
    steps_max INTEGER,
    tokens_sum INTEGER,
    tokens_sq_sum INTEGER,
    t_preprocess REAL,
    t_encode REAL,
    t_steps REAL,
    t_collapse REAL,
    PRIMARY KEY (run_id, page_id, batch_no)
)"""

POSTPROCESSING = """CREATE TABLE IF NOT EXISTS postprocessing(
    run_id INTEGER PRIMARY KEY,
    recipe TEXT NOT NULL,
    applied_at TEXT
)"""

#: Columns of ``scaling``, in order (the planner writes and reads these).
SCALING_COLUMNS = ("measured_at", "recogniser", "kind", "card_hash", "host_json", "workers", "threads", "pages",
                   "wall_seconds", "pages_per_second", "startup_seconds", "busy_seconds", "gap_seconds_per_page",
                   "run_id")

SCALING = """CREATE TABLE IF NOT EXISTS scaling(
    measured_at TEXT, recogniser TEXT, kind TEXT, card_hash TEXT, host_json TEXT,
    workers INTEGER, threads INTEGER, pages INTEGER, wall_seconds REAL, pages_per_second REAL,
    startup_seconds REAL, busy_seconds REAL, gap_seconds_per_page REAL,
    run_id INTEGER)  -- the calibration run a one-worker session wrote (NULL for scaling workers)"""

#: Every statement that creates a store of the current version, in order.
CREATE = (META, RUNS, RUNS_INDEX, PAGES, LINES, BATCHES, POSTPROCESSING, SCALING)

#: ``lines.truncated``: which guard cut a line (0: not cut). Non-zero means truncated.
TRUNCATED_CODES: dict[str, int] = {"token limit": 1, "repeated n-gram": 2}

#: Columns added after version 1, with the value a reader assumes in a store that lacks them.
COLUMN_DEFAULTS: dict[str, dict[str, object]] = {"pages": {"file_size": None, "file_mtime_ns": None,
                                                            "collection": None, "flags": None},
                                                  "lines": {"truncated": 0, "error": None}}


def now_iso() -> str:
    """The current UTC time, ISO 8601 with microseconds (``2026-12-02T13:31:04.123456+00:00``)."""
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="microseconds")


def parse_time(text: str | None) -> _dt.datetime | None:
    """A store timestamp (with or without fractions of a second, as older stores wrote them), or None."""
    if not text:
        return None
    try:
        return _dt.datetime.fromisoformat(str(text))
    except ValueError:
        return None


def table_names(con: sqlite3.Connection) -> set[str]:
    return {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")}


def column_names(con: sqlite3.Connection, table: str) -> list[str]:
    return [r[1] for r in con.execute(f"PRAGMA table_info({table})")]


def stored_version(con: sqlite3.Connection) -> str | None:
    """The ``schema_version`` in ``meta`` (None when there is no such row)."""
    row = con.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()
    return None if row is None else str(row[0])


def create(con: sqlite3.Connection, created_by: str) -> None:
    """Create every table of a new store (the caller holds the transaction)."""
    for stmt in CREATE:
        con.execute(stmt)
    con.executemany("INSERT OR REPLACE INTO meta(key, value) VALUES (?, ?)",
                    [("schema_version", str(SCHEMA_VERSION)), ("created_by", created_by),
                     ("created_at", now_iso())])


def _add_column(con: sqlite3.Connection, table: str, column: str, decl: str) -> None:
    if column not in column_names(con, table):
        con.execute(f"ALTER TABLE {table} ADD COLUMN {column} {decl}")


def _migrate_1_to_2(con: sqlite3.Connection) -> None:
    con.execute(POSTPROCESSING)
    con.execute(SCALING)
    _add_column(con, "lines", "truncated", "INTEGER NOT NULL DEFAULT 0")
    _add_column(con, "lines", "error", "TEXT")
    _add_column(con, "pages", "file_size", "INTEGER")
    _add_column(con, "pages", "file_mtime_ns", "INTEGER")


def _migrate_2_to_3(con: sqlite3.Connection) -> None:
    _add_column(con, "pages", "collection", "TEXT")
    _add_column(con, "pages", "flags", "TEXT")


#: version -> the step that brings a store of that version to the next one.
MIGRATIONS: dict[int, Callable[[sqlite3.Connection], None]] = {1: _migrate_1_to_2, 2: _migrate_2_to_3}


def migrate(con: sqlite3.Connection, from_version: int) -> None:
    """Bring a store from ``from_version`` to :data:`SCHEMA_VERSION` (the caller holds the transaction)."""
    for v in range(from_version, SCHEMA_VERSION):
        MIGRATIONS[v](con)
    con.execute("INSERT OR REPLACE INTO meta(key, value) VALUES ('schema_version', ?)", (str(SCHEMA_VERSION),))
    con.execute("INSERT OR REPLACE INTO meta(key, value) VALUES (?, ?)",
                (f"migrated_from_{from_version}_at", now_iso()))


def create_scaling(con: sqlite3.Connection) -> None:
    """Make sure the ``scaling`` table exists (a store migrated or created by this version always has it)."""
    con.execute(SCALING)
