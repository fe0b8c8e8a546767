"""The run store's reader and writer: :class:`RunStore` and the records it writes.

Every write is one transaction (a page with its lines and batches, a run's
start or finish, a whole post-processing pass), so a killed process loses at
most the page it was writing. Every SQLite error becomes a StoreError that
names the file and what to do.

File names are stored as the file system gives them: a name that is not
UTF-8 (``caf\\xe9.png`` from an old share, which Python holds with surrogate
escapes) is written as a BLOB of its exact bytes in the same column and read
back to the same Python string, so resuming still recognises the page; frames
and exports show such a name with ``\\xNN`` escapes (:func:`printable`).
"""

from __future__ import annotations

import json
import sqlite3
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path
from typing import Iterable, Sequence

from ocrbench.errors import StoreError
from ocrbench.store import schema
from ocrbench.store.schema import TRUNCATED_CODES, now_iso

# --------------------------------------------------------------------------- names of any bytes


def to_db(value):
    """A value ready for SQLite: a string that is not valid UTF-8 (surrogate escapes) becomes its bytes."""
    if isinstance(value, str):
        try:
            value.encode("utf-8")
        except UnicodeEncodeError:
            try:
                return value.encode("utf-8", "surrogateescape")
            except UnicodeEncodeError:          # a lone surrogate that no file system gave: keep it readable
                return value.encode("utf-8", "backslashreplace").decode("ascii")
    return value


def from_db(value):
    """The inverse of :func:`to_db`: bytes read back become the string with surrogate escapes."""
    if isinstance(value, (bytes, bytearray, memoryview)):
        return bytes(value).decode("utf-8", "surrogateescape")
    return value


def printable(value) -> str:
    """A name safe to print or export: undecodable bytes written as ``\\xNN`` (``caf\\xe9.png``)."""
    if isinstance(value, (bytes, bytearray, memoryview)):
        return bytes(value).decode("utf-8", "backslashreplace")
    s = str(value)
    try:
        s.encode("utf-8")
        return s
    except UnicodeEncodeError:
        try:
            return s.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")
        except UnicodeEncodeError:
            return s.encode("utf-8", "backslashreplace").decode("ascii")


# --------------------------------------------------------------------------- records


@dataclass
class PageRecord:
    """One row of ``pages``."""

    page_id: str
    path: str
    content_hash: str | None
    status: str                      # "done" | "failed"
    error: str | None = None
    width: int | None = None
    height: int | None = None
    n_lines: int | None = None
    skew_degrees: float | None = None
    t_load: float | None = None
    t_segment: float | None = None
    t_preprocess: float | None = None
    t_encode: float | None = None
    t_steps: float | None = None
    t_collapse: float | None = None
    t_postprocess: float | None = None
    t_total: float | None = None
    finished_at: str | None = None
    file_size: int | None = None
    file_mtime_ns: int | None = None
    collection: str | None = None    # the page's folder relative to the input root ("" at the top)
    flags: str | None = None         # sanity flags, comma-separated ("" checked and clean, None not checked)


@dataclass
class LineRecord:
    """One row of ``lines`` (without run and page).

    A line the recogniser could not read (its output was NaN or infinite) has
    empty ``text``, no ``confidence`` and the reason in ``error``; a line cut
    by one of the recogniser's guards has ``truncated`` set: 1 the token limit, 2 the repetition guard
    (``schema.TRUNCATED_CODES``; ``True`` stores as 1).
    """

    line_no: int
    x0: int
    y0: int
    x1: int
    y1: int
    width_px: int
    text: str
    text_post: str | None
    confidence: float | None
    char_conf: list[float] = field(default_factory=list)
    n_chars: int = 0
    steps: int = 0
    batch_no: int = 0
    t_line: float = 0.0
    truncated: int = 0
    error: str | None = None


@dataclass
class BatchRecord:
    """One row of ``batches`` (without run and page)."""

    batch_no: int
    n_lines: int
    padded_width: int
    sum_width: int
    frames: int
    steps_max: int
    tokens_sum: int
    tokens_sq_sum: int
    t_preprocess: float
    t_encode: float
    t_steps: float
    t_collapse: float


@dataclass(frozen=True)
class RunInfo:
    """One row of ``runs``, settings and host decoded."""

    run_id: int
    recogniser: str
    kind: str
    card_path: str
    card_hash: str
    settings: dict
    input_dir: str
    host: dict
    engine: str
    ocrbench_version: str
    started_at: str
    finished_at: str | None


@dataclass(frozen=True)
class StoredPage:
    """What the store knows of one page of a run (for resuming)."""

    status: str
    content_hash: str | None
    file_size: int | None
    file_mtime_ns: int | None


def _explain(path: Path, e: sqlite3.Error, doing: str) -> StoreError:
    msg = str(e).lower()
    if "readonly" in msg or "read-only" in msg:
        why = "the store is read-only (check the file's and its folder's permissions)"
    elif "disk is full" in msg or "disk i/o" in msg and "full" in msg:
        why = "the disk is full (or the store reached its size limit); free space and rerun to resume"
    elif "disk i/o" in msg:
        # A write the operating system refused: no space left, a file-size limit, or a failing disk.
        why = (f"the disk refused a write ({getattr(e, 'sqlite_errorname', 'disk I/O error')}: full, over a "
               "file-size limit, or failing); free space and rerun to resume")
    elif "unable to open" in msg:
        why = "cannot open or create the store here (missing or read-only folder?)"
    elif "not a database" in msg or "malformed" in msg:
        why = "this file is not an ocrbench run store (or it is damaged)"
    elif "locked" in msg or "busy" in msg:
        why = "another process holds the store locked; try again when it has finished"
    else:
        why = f"SQLite error: {e}"
    return StoreError(f"{printable(path)}: {doing}: {why}")


def settings_key(settings: dict) -> str:
    """The canonical JSON of a run's settings (how runs are matched)."""
    return json.dumps(settings, sort_keys=True, separators=(",", ":"))


_ORDER = {"runs": "run_id", "pages": "run_id, page_id", "lines": "run_id, page_id, line_no",
          "batches": "run_id, page_id, batch_no"}
_LINE_COLS = ("line_no", "x0", "y0", "x1", "y1", "width_px", "text", "text_post", "confidence", "char_conf_json",
              "n_chars", "steps", "batch_no", "t_line", "truncated", "error")


def _line_row(run_id: int, page_id, ln: LineRecord) -> tuple:
    conf = None if ln.confidence is None else float(ln.confidence)
    return (run_id, page_id, ln.line_no, ln.x0, ln.y0, ln.x1, ln.y1, ln.width_px, ln.text, ln.text_post, conf,
            json.dumps([round(c, 5) for c in ln.char_conf]), ln.n_chars, ln.steps, ln.batch_no, ln.t_line,
            int(ln.truncated), to_db(ln.error))


class RunStore:
    """A run store at ``path`` (created if missing unless ``read_only``).

    Use as a context manager or call :meth:`close`. Every method raises
    StoreError (naming the file and what to do) rather than a raw sqlite3 error.
    """

    def __init__(self, path: Path | str, *, read_only: bool = False, timeout: float = 30.0):
        self.path = Path(path)
        self.read_only = read_only
        self.version = schema.SCHEMA_VERSION
        if read_only and not self.path.is_file():
            raise StoreError(f"{printable(self.path)}: run store not found")
        if not read_only and not self.path.parent.exists():
            raise StoreError(f"{printable(self.path)}: the folder {printable(self.path.parent)} does not exist")
        if self.path.is_dir():
            raise StoreError(f"{printable(self.path)}: is a folder, not a store file")
        try:
            self.con = self._connect(timeout)
            self._check_schema()
        except sqlite3.Error as e:
            raise _explain(self.path, e, "opening the run store") from e

    # ------------------------------------------------------------------ plumbing

    def _connect(self, timeout: float) -> sqlite3.Connection:
        if self.read_only:
            con = sqlite3.connect(f"{self.path.resolve().as_uri()}?mode=ro", uri=True, timeout=timeout,
                                  isolation_level=None)
        else:
            con = sqlite3.connect(str(self.path), timeout=timeout, isolation_level=None)
        con.execute("PRAGMA busy_timeout = %d" % int(timeout * 1000))
        if not self.read_only:
            mode = con.execute("PRAGMA journal_mode = WAL").fetchone()[0]
            if str(mode).lower() != "wal":
                con.close()
                raise StoreError(f"{printable(self.path)}: cannot switch the store to WAL mode (got {mode!r})")
            con.execute("PRAGMA synchronous = NORMAL")
        return con

    def _check_schema(self) -> None:
        """Accept a store of this version, migrate an older one (when writing), create an empty file's tables."""
        have = schema.table_names(self.con)
        if "meta" in have:
            version = schema.stored_version(self.con)
            known = version is not None and version.isdigit() and \
                schema.OLDEST_READABLE <= int(version) <= schema.SCHEMA_VERSION
            if not known:
                raise StoreError(f"{printable(self.path)}: store schema version {version} is not one this ocrbench "
                                 f"reads ({schema.OLDEST_READABLE} to {schema.SCHEMA_VERSION}); use a new store file")
            self.version = int(version)
            if self.version < schema.SCHEMA_VERSION and not self.read_only:
                self._in_transaction(lambda: schema.migrate(self.con, self.version))
                self.version = schema.SCHEMA_VERSION
            return
        if have:
            raise StoreError(f"{printable(self.path)}: this SQLite file is not an ocrbench run store "
                             f"(tables: {', '.join(sorted(have))})")
        if self.read_only:
            raise StoreError(f"{printable(self.path)}: empty file, not an ocrbench run store")
        from ocrbench import __version__

        self._in_transaction(lambda: schema.create(self.con, f"ocrbench {__version__}"))

    def _in_transaction(self, fn):
        self.con.execute("BEGIN IMMEDIATE")
        try:
            out = fn()
            self.con.execute("COMMIT")
            return out
        except BaseException:
            if self.con.in_transaction:
                self.con.execute("ROLLBACK")
            raise

    def close(self) -> None:
        try:
            self.con.close()
        except sqlite3.Error:
            pass

    def __enter__(self) -> "RunStore":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def _write(self, doing: str, fn) -> object:
        """Run ``fn(con)`` inside one transaction; map SQLite errors to StoreError."""
        if self.read_only:
            raise StoreError(f"{printable(self.path)}: {doing}: the store was opened read-only")
        try:
            return self._in_transaction(lambda: fn(self.con))
        except sqlite3.Error as e:
            raise _explain(self.path, e, doing) from e

    def _read(self, sql: str, params: Sequence = ()) -> list[tuple]:
        try:
            return self.con.execute(sql, [to_db(p) for p in params]).fetchall()
        except sqlite3.Error as e:
            raise _explain(self.path, e, "reading the run store") from e

    def _has_column(self, table: str, column: str) -> bool:
        return column in schema.column_names(self.con, table)

    @property
    def schema_version(self) -> int:
        return int(self._read("SELECT value FROM meta WHERE key='schema_version'")[0][0])

    @property
    def journal_mode(self) -> str:
        return str(self._read("PRAGMA journal_mode")[0][0])

    # ------------------------------------------------------------------ runs

    def find_run(self, *, card_hash: str, settings: dict, input_dir: str) -> int | None:
        """The latest run with the same card hash, settings and input folder (what resuming continues)."""
        key = settings_key(settings)
        rows = self._read("SELECT run_id, settings_json FROM runs WHERE card_hash=? AND input_dir=? "
                          "ORDER BY run_id DESC", (card_hash, input_dir))
        for run_id, sj in rows:
            try:
                if settings_key(json.loads(sj)) == key:
                    return int(run_id)
            except json.JSONDecodeError:
                continue
        return None

    def start_run(self, *, recogniser: str, kind: str, card_path: str, card_hash: str, settings: dict,
                  input_dir: str, host: dict, engine: str) -> int:
        """Insert a new run; returns its run_id."""
        from ocrbench import __version__

        row = (recogniser, kind, to_db(card_path), card_hash, settings_key(settings), to_db(input_dir),
               json.dumps(host, sort_keys=True), engine, __version__, now_iso())

        def do(con):
            cur = con.execute(
                "INSERT INTO runs(recogniser, kind, card_path, card_hash, settings_json, input_dir, host_json, "
                "engine, ocrbench_version, started_at, finished_at) VALUES (?,?,?,?,?,?,?,?,?,?,NULL)", row)
            return int(cur.lastrowid)
        return self._write("starting a run", do)  # type: ignore[return-value]

    def finish_run(self, run_id: int) -> None:
        """Stamp the run's finished_at (again, when a resumed run completes)."""
        self._write("finishing a run",
                    lambda con: con.execute("UPDATE runs SET finished_at=? WHERE run_id=?", (now_iso(), run_id)))

    def set_engine(self, run_id: int, engine: str) -> None:
        """Record ``engine`` as the one that ran the run last (a run may be resumed by another engine)."""
        self._write("recording the run's engine",
                    lambda con: con.execute("UPDATE runs SET engine=? WHERE run_id=?", (engine, run_id)))

    def run_info(self, run_id: int) -> RunInfo:
        rows = self._read("SELECT run_id, recogniser, kind, card_path, card_hash, settings_json, input_dir, host_json, "
                          "engine, ocrbench_version, started_at, finished_at FROM runs WHERE run_id=?", (run_id,))
        if not rows:
            raise StoreError(f"{printable(self.path)}: no run {run_id}")
        r = [from_db(v) for v in rows[0]]
        return RunInfo(int(r[0]), r[1], r[2], r[3], r[4], json.loads(r[5] or "{}"), r[6], json.loads(r[7] or "{}"),
                       r[8], r[9], r[10], r[11])

    def run_ids(self) -> list[int]:
        return [int(r[0]) for r in self._read("SELECT run_id FROM runs ORDER BY run_id")]

    # ------------------------------------------------------------------ pages

    def page_status(self, run_id: int) -> dict[str, tuple[str, str | None]]:
        """page_id -> (status, content_hash) for every page the run has written."""
        return {pid: (p.status, p.content_hash) for pid, p in self.stored_pages(run_id).items()}

    def stored_pages(self, run_id: int) -> dict[str, StoredPage]:
        """page_id -> what the store knows of that page (status, content hash, file size and mtime)."""
        extra = "file_size, file_mtime_ns" if self._has_column("pages", "file_size") else "NULL, NULL"
        return {from_db(r[0]): StoredPage(r[1], r[2], r[3], r[4]) for r in
                self._read(f"SELECT page_id, status, content_hash, {extra} FROM pages WHERE run_id=?", (run_id,))}

    def failed_pages(self, run_id: int) -> list[tuple[str, str]]:
        """(page_id, error) of the run's failed pages, by page_id."""
        return [(from_db(r[0]), from_db(r[1]) or "") for r in
                self._read("SELECT page_id, error FROM pages WHERE run_id=? AND status='failed' ORDER BY page_id",
                           (run_id,))]

    def page_flags(self, run_id: int) -> dict[str, list[str]]:
        """page_id -> sanity flags of the run's done pages that carry any (none in stores before version 3)."""
        if not self._has_column("pages", "flags"):
            return {}
        return {from_db(r[0]): str(r[1]).split(",") for r in
                self._read("SELECT page_id, flags FROM pages WHERE run_id=? AND status='done' AND flags <> '' "
                           "ORDER BY page_id", (run_id,))}

    def run_totals(self, run_id: int) -> dict:
        """Counts and page times of one run: pages_done, pages_failed, lines, chars, model_seconds, t_total (list),
        lines_truncated and lines_failed (lines of done pages cut by a guard / without text), lines_repeat_cut
        (those of lines_truncated the repetition guard cut)."""
        done = self._read("SELECT t_total, COALESCE(t_encode,0)+COALESCE(t_steps,0)+COALESCE(t_collapse,0) "
                          "FROM pages WHERE run_id=? AND status='done' ORDER BY page_id", (run_id,))
        failed = self._read("SELECT COUNT(*) FROM pages WHERE run_id=? AND status='failed'", (run_id,))[0][0]
        rep = TRUNCATED_CODES["repeated n-gram"]
        flags = (f"COALESCE(SUM(l.truncated <> 0),0), COALESCE(SUM(l.truncated = {rep}),0), COUNT(l.error)"
                 if self._has_column("lines", "truncated") else "0, 0, 0")
        lines, chars, truncated, repeat, bad = self._read(
            f"SELECT COUNT(*), COALESCE(SUM(l.n_chars),0), {flags} FROM lines l JOIN pages p "
            "ON p.run_id=l.run_id AND p.page_id=l.page_id WHERE l.run_id=? AND p.status='done'", (run_id,))[0]
        return {"pages_done": len(done), "pages_failed": int(failed), "lines": int(lines), "chars": int(chars),
                "model_seconds": float(sum(r[1] for r in done)), "t_total": [float(r[0] or 0.0) for r in done],
                "lines_truncated": int(truncated), "lines_repeat_cut": int(repeat), "lines_failed": int(bad)}

    def write_page(self, run_id: int, page: PageRecord, lines: Iterable[LineRecord] = (),
                   batches: Iterable[BatchRecord] = ()) -> None:
        """Write one page with its lines and batches in a single transaction (replacing an earlier attempt)."""
        if page.status not in ("done", "failed"):
            raise ValueError(f"page status must be 'done' or 'failed', not {page.status!r}")
        prow = {k: to_db(v) for k, v in asdict(page).items()}
        if prow["finished_at"] is None:
            prow["finished_at"] = now_iso()
        pid = prow["page_id"]
        pcols = [f.name for f in fields(PageRecord)]
        lrows = [_line_row(run_id, pid, ln) for ln in lines]
        bcols = [f.name for f in fields(BatchRecord)]
        brows = [(run_id, pid, *[getattr(b, c) for c in bcols]) for b in batches]

        def do(con):
            key = (run_id, pid)
            con.execute("DELETE FROM lines WHERE run_id=? AND page_id=?", key)
            con.execute("DELETE FROM batches WHERE run_id=? AND page_id=?", key)
            con.execute(f"INSERT OR REPLACE INTO pages(run_id, {', '.join(pcols)}) "
                        f"VALUES (?, {', '.join('?' * len(pcols))})", (run_id, *[prow[c] for c in pcols]))
            con.executemany(f"INSERT INTO lines(run_id, page_id, {', '.join(_LINE_COLS)}) "
                            f"VALUES ({', '.join('?' * (len(_LINE_COLS) + 2))})", lrows)
            con.executemany(f"INSERT INTO batches(run_id, page_id, {', '.join(bcols)}) "
                            f"VALUES (?, ?, {', '.join('?' * len(bcols))})", brows)
        self._write(f"writing page {printable(page.page_id)}", do)

    def page_texts(self, run_id: int, *, post: bool = False) -> dict[str, list[str]]:
        """page_id -> the text of each line (raw; post-processed where present when ``post``), done pages only."""
        col = "COALESCE(l.text_post, l.text)" if post else "l.text"
        out: dict[str, list[str]] = {}
        for pid, _ in self._read("SELECT page_id, n_lines FROM pages WHERE run_id=? AND status='done' "
                                 "ORDER BY page_id", (run_id,)):
            out[from_db(pid)] = []
        for pid, text in self._read(f"SELECT l.page_id, {col} FROM lines l JOIN pages p "
                                    "ON p.run_id=l.run_id AND p.page_id=l.page_id "
                                    "WHERE l.run_id=? AND p.status='done' ORDER BY l.page_id, l.line_no", (run_id,)):
            out[from_db(pid)].append(text or "")
        return out

    # ------------------------------------------------------------------ post-processed text

    def _read_recipes(self, where: str = "", params: Sequence = ()) -> list[tuple]:
        """Rows of ``postprocessing``; none in a version-1 store written before the table, opened read-only."""
        if "postprocessing" not in schema.table_names(self.con):
            return []
        return self._read(f"SELECT run_id, recipe, applied_at FROM postprocessing{where} ORDER BY run_id", params)

    def post_recipe(self, run_id: int) -> str | None:
        """The recipe of the post-processing whose output is in the run's ``lines.text_post`` (None: none)."""
        rows = self._read_recipes(" WHERE run_id=?", (run_id,))
        return str(rows[0][1]) if rows else None

    def post_recipes(self) -> "pd.DataFrame":  # noqa: F821
        """The ``postprocessing`` table (run_id, recipe, applied_at); empty in a store written before it."""
        import pandas as pd

        return pd.DataFrame(self._read_recipes(), columns=["run_id", "recipe", "applied_at"])

    @staticmethod
    def _put_recipe(con, run_id: int, recipe: str | None) -> None:
        if recipe is None:
            con.execute("DELETE FROM postprocessing WHERE run_id=?", (run_id,))
        else:
            con.execute("INSERT OR REPLACE INTO postprocessing(run_id, recipe, applied_at) VALUES (?, ?, ?)",
                        (run_id, recipe, now_iso()))

    def set_post_recipe(self, run_id: int, recipe: str | None) -> None:
        """Record (or, with None, forget) the recipe behind the run's ``text_post`` column."""
        self._write("recording the post-processing recipe", lambda con: self._put_recipe(con, run_id, recipe))

    def post_coverage(self, run_id: int) -> tuple[int, int]:
        """(lines with post-processed text, all lines) over the run's done pages."""
        row = self._read("SELECT COUNT(l.text_post), COUNT(*) FROM lines l JOIN pages p "
                         "ON p.run_id=l.run_id AND p.page_id=l.page_id WHERE l.run_id=? AND p.status='done'",
                         (run_id,))[0]
        return int(row[0]), int(row[1])

    def done_page_ids(self, run_id: int) -> list[str]:
        return [from_db(r[0]) for r in self._read("SELECT page_id FROM pages WHERE run_id=? AND status='done' "
                                                  "ORDER BY page_id", (run_id,))]

    def page_lines(self, run_id: int, page_id: str) -> list[tuple[int, str, float | None, list[float] | None]]:
        """(line_no, raw text, line confidence, per-character confidences) of one page, in line order."""
        out = []
        for no, text, conf, cj in self._read("SELECT line_no, text, confidence, char_conf_json FROM lines "
                                             "WHERE run_id=? AND page_id=? ORDER BY line_no", (run_id, page_id)):
            try:
                chars = json.loads(cj) if cj else None
            except json.JSONDecodeError:
                chars = None
            out.append((int(no), text or "", None if conf is None else float(conf), chars))
        return out

    def rewrite_post(self, run_id: int, pages: Iterable[tuple[str, Sequence[tuple[int, str | None]]]],
                     recipe: str | None) -> int:
        """Replace the run's post-processed text in one transaction; the raw ``text`` is never touched.

        ``pages`` yields (page_id, [(line_no, text_post), ...]) and is consumed
        inside the transaction (so the column never mixes two recipes); every
        other line's ``text_post`` is cleared. Returns the lines written.
        """
        def do(con):
            con.execute("UPDATE lines SET text_post=NULL WHERE run_id=?", (run_id,))
            n = 0
            for page_id, rows in pages:
                pid = to_db(page_id)
                con.executemany("UPDATE lines SET text_post=? WHERE run_id=? AND page_id=? AND line_no=?",
                                [(t, run_id, pid, no) for no, t in rows])
                n += len(rows)
            self._put_recipe(con, run_id, recipe)
            return n
        return int(self._write("writing post-processed text", do))

    # ------------------------------------------------------------------ frames

    def read_frames(self, run_ids: Sequence[int] | None = None) -> dict[str, "pd.DataFrame"]:  # noqa: F821
        """The four tables as pandas DataFrames (keys runs, pages, lines, batches), optionally for some runs.

        Columns a store of an older version lacks are filled with their
        defaults; names stored as bytes (not UTF-8) are shown with ``\\xNN``.
        """
        import pandas as pd

        where, params = "", ()
        if run_ids is not None:
            ids = [int(r) for r in run_ids]
            where = f" WHERE run_id IN ({', '.join('?' * len(ids))})" if ids else " WHERE 0"
            params = tuple(ids)
        out = {}
        try:
            for t in schema.TABLES:
                df = pd.read_sql_query(f"SELECT * FROM {t}{where} ORDER BY {_ORDER[t]}", self.con, params=params)
                for col, default in schema.COLUMN_DEFAULTS.get(t, {}).items():
                    if col not in df.columns:
                        df[col] = default
                out[t] = _printable_frame(df)
        except (sqlite3.Error, pd.errors.DatabaseError) as e:
            raise _explain(self.path, e if isinstance(e, sqlite3.Error) else sqlite3.Error(str(e)),
                           "reading the run store") from e
        return out

    # ------------------------------------------------------------------ scaling

    def append_scaling(self, rows: Sequence[Sequence]) -> None:
        """Append rows (columns :data:`schema.SCALING_COLUMNS`, in order) to the ``scaling`` table."""
        cols = schema.SCALING_COLUMNS

        def do(con):
            schema.create_scaling(con)
            con.executemany(f"INSERT INTO scaling({', '.join(cols)}) VALUES ({', '.join('?' * len(cols))})",
                            [tuple(r) for r in rows])
        self._write("writing the scaling table", do)


_NAME_COLUMNS = ("page_id", "path", "error", "card_path", "input_dir")


def _printable_frame(df):
    """Name columns holding bytes (names that are not UTF-8) shown as text with ``\\xNN`` escapes."""
    for col in _NAME_COLUMNS:
        if col in df.columns and df[col].dtype == object and \
                any(isinstance(v, (bytes, bytearray)) for v in df[col]):
            df[col] = df[col].map(lambda v: printable(v) if isinstance(v, (bytes, bytearray)) else v)
    return df
