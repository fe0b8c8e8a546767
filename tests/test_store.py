"""The SQLite run store: schema, WAL, transactions per page, errors, export round trip."""

from __future__ import annotations

import json
import os
import re
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

from ocrbench.errors import StoreError
from ocrbench.store import SCHEMA_VERSION, BatchRecord, LineRecord, PageRecord, RunStore, export

# Column names as written in the store's contract (ocrbench/store/CONTRACT.md).
CONTRACT = {
    "meta": ["key", "value"],
    "runs": ["run_id", "recogniser", "kind", "card_path", "card_hash", "settings_json", "input_dir", "host_json",
             "engine", "ocrbench_version", "started_at", "finished_at"],
    "pages": ["run_id", "page_id", "path", "content_hash", "status", "error", "width", "height", "n_lines",
              "skew_degrees", "t_load", "t_segment", "t_preprocess", "t_encode", "t_steps", "t_collapse",
              "t_postprocess", "t_total", "finished_at", "file_size", "file_mtime_ns", "collection", "flags"],
    "lines": ["run_id", "page_id", "line_no", "x0", "y0", "x1", "y1", "width_px", "text", "text_post", "confidence",
              "char_conf_json", "n_chars", "steps", "batch_no", "t_line", "truncated", "error"],
    "batches": ["run_id", "page_id", "batch_no", "n_lines", "padded_width", "sum_width", "frames", "steps_max",
                "tokens_sum", "tokens_sq_sum", "t_preprocess", "t_encode", "t_steps", "t_collapse"],
    "postprocessing": ["run_id", "recipe", "applied_at"],
    "scaling": ["measured_at", "recogniser", "kind", "card_hash", "host_json", "workers", "threads", "pages",
                "wall_seconds", "pages_per_second", "startup_seconds", "busy_seconds", "gap_seconds_per_page",
                "run_id"],
}


def new_run(st: RunStore, **kw) -> int:
    args = dict(recogniser="r", kind="ctc", card_path="/c/card.toml", card_hash="h" * 64,
                settings={"batch_size": 16, "decoding": "greedy"}, input_dir="/pages", host={"cores": 2},
                engine="onnxruntime x")
    args.update(kw)
    return st.start_run(**args)


def page(st: RunStore, run_id: int, page_id: str, texts: list[str], *, post: list[str] | None = None) -> None:
    lines = [LineRecord(line_no=i + 1, x0=0, y0=10 * i, x1=100, y1=10 * i + 8, width_px=400, text=t,
                        text_post=None if post is None else post[i], confidence=0.9, char_conf=[0.9] * len(t),
                        n_chars=len(t), steps=len(t) + 1, batch_no=0, t_line=0.01) for i, t in enumerate(texts)]
    batches = [BatchRecord(batch_no=0, n_lines=len(texts), padded_width=400, sum_width=400 * len(texts), frames=100,
                           steps_max=10, tokens_sum=sum(len(t) for t in texts),
                           tokens_sq_sum=sum(len(t) ** 2 for t in texts), t_preprocess=0.001, t_encode=0.01,
                           t_steps=0.0, t_collapse=0.001)]
    st.write_page(run_id, PageRecord(page_id=page_id, path=f"/pages/{page_id}", content_hash="c", status="done",
                                     n_lines=len(texts), t_total=0.5), lines, batches)


def test_schema_has_exactly_the_contract_columns(tmp_path):
    with RunStore(tmp_path / "s.sqlite"):
        pass
    con = sqlite3.connect(tmp_path / "s.sqlite")
    for table, cols in CONTRACT.items():
        assert [r[1] for r in con.execute(f"PRAGMA table_info({table})")] == cols, table
    assert con.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()[0] == str(SCHEMA_VERSION)
    # WAL mode is a property of the database file, so an independent connection sees it (SQLite docs, "WAL mode
    # is persistent").
    assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    pk = [r[1] for r in con.execute("PRAGMA table_info(lines)") if r[5] > 0]
    assert pk == ["run_id", "page_id", "line_no"]


def test_round_trip_texts_and_frames(tmp_path):
    with RunStore(tmp_path / "s.sqlite") as st:
        run = new_run(st)
        page(st, run, "b.png", ["two", "lines"], post=["two", "LINES"])
        page(st, run, "a.png", ["one £½ line"])
        st.write_page(run, PageRecord(page_id="c.png", path="/pages/c.png", content_hash=None, status="failed",
                                      error="not an image"))
        assert st.page_texts(run) == {"a.png": ["one £½ line"], "b.png": ["two", "lines"]}
        assert st.page_texts(run, post=True) == {"a.png": ["one £½ line"], "b.png": ["two", "LINES"]}
        assert st.failed_pages(run) == [("c.png", "not an image")]
        f = st.read_frames()
        assert list(f) == ["runs", "pages", "lines", "batches"]
        assert len(f["pages"]) == 3 and len(f["lines"]) == 3 and len(f["batches"]) == 2
        assert json.loads(f["runs"].settings_json[0]) == {"batch_size": 16, "decoding": "greedy"}
        assert json.loads(f["lines"].char_conf_json[0]) == [0.9] * len("one £½ line")
        assert st.read_frames([run + 1])["pages"].empty


def test_rewriting_a_page_replaces_it(tmp_path):
    with RunStore(tmp_path / "s.sqlite") as st:
        run = new_run(st)
        page(st, run, "a.png", ["x", "y", "z"])
        page(st, run, "a.png", ["only"])
        f = st.read_frames()
        assert len(f["pages"]) == 1 and f["lines"].text.tolist() == ["only"]


def test_find_run_matches_hash_settings_and_folder(tmp_path):
    with RunStore(tmp_path / "s.sqlite") as st:
        run = new_run(st)
        assert st.find_run(card_hash="h" * 64, settings={"decoding": "greedy", "batch_size": 16},
                           input_dir="/pages") == run          # key order does not matter
        assert st.find_run(card_hash="h" * 64, settings={"decoding": "beam", "batch_size": 16},
                           input_dir="/pages") is None
        assert st.find_run(card_hash="g" * 64, settings={"decoding": "greedy", "batch_size": 16},
                           input_dir="/pages") is None
        assert st.find_run(card_hash="h" * 64, settings={"decoding": "greedy", "batch_size": 16},
                           input_dir="/other") is None
        again = new_run(st)
        assert st.find_run(card_hash="h" * 64, settings={"decoding": "greedy", "batch_size": 16},
                           input_dir="/pages") == again        # the latest matching run


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
def test_export_round_trip(tmp_path, fmt):
    with RunStore(tmp_path / "s.sqlite") as st:
        run = new_run(st)
        page(st, run, "a.png", ["Cash £12 4s 6½d", "Folio 3"], post=["Cash £12 4s 6½d", "Folio 3"])
        st.set_post_recipe(run, "pp1|whitespace")
        frames = st.read_frames()
        frames["postprocessing"] = st.post_recipes()
    assert frames["postprocessing"]["recipe"].tolist() == ["pp1|whitespace"]
    files = export(tmp_path / "s.sqlite", tmp_path / "out", fmt)
    assert [p.name for p in files] == [f"{t}.{fmt}" for t in ("runs", "pages", "lines", "batches",
                                                              "postprocessing")]
    for p in files:
        back = pd.read_csv(p, encoding="utf-8") if fmt == "csv" else pd.read_parquet(p)
        want = frames[p.stem]
        assert list(back.columns) == list(want.columns)
        # CSV has no null: an empty field reads back as NaN, so compare with nulls made alike
        pd.testing.assert_frame_equal(nulls_alike(back), nulls_alike(want), check_dtype=False)


def nulls_alike(df: pd.DataFrame) -> pd.DataFrame:
    return df.astype(object).where(df.notna(), None)


def test_wrong_schema_version_is_refused(tmp_path):
    with RunStore(tmp_path / "s.sqlite"):
        pass
    con = sqlite3.connect(tmp_path / "s.sqlite")
    con.execute("UPDATE meta SET value='99' WHERE key='schema_version'")
    con.commit()
    con.close()
    with pytest.raises(StoreError, match="schema version 99"):
        RunStore(tmp_path / "s.sqlite")


def test_other_sqlite_file_and_garbage_are_refused(tmp_path):
    con = sqlite3.connect(tmp_path / "other.sqlite")
    con.execute("CREATE TABLE people(name TEXT)")
    con.commit()
    con.close()
    with pytest.raises(StoreError, match="not an ocrbench run store"):
        RunStore(tmp_path / "other.sqlite")
    (tmp_path / "junk.sqlite").write_bytes(b"this is not a database at all" * 100)
    with pytest.raises(StoreError, match="not an ocrbench run store"):
        RunStore(tmp_path / "junk.sqlite")


def test_unwritable_location(tmp_path):
    with pytest.raises(StoreError, match="does not exist"):
        RunStore(tmp_path / "no" / "such" / "s.sqlite")
    # /proc is a read-only file system on Linux (proc(5)): SQLite cannot create a file there.
    if Path("/proc").is_dir():
        with pytest.raises(StoreError, match="cannot open or create|read-only"):
            RunStore("/proc/ocrbench-test.sqlite")


def test_read_only_store_cannot_be_written(tmp_path):
    with RunStore(tmp_path / "s.sqlite") as st:
        run = new_run(st)
    with RunStore(tmp_path / "s.sqlite", read_only=True) as ro:
        assert ro.run_ids() == [run]
        with pytest.raises(StoreError, match="read-only"):
            page(ro, run, "a.png", ["x"])
    with pytest.raises(StoreError, match="not found"):
        RunStore(tmp_path / "missing.sqlite", read_only=True)


def test_full_disk_is_a_clear_error_and_keeps_earlier_pages(tmp_path):
    # SQLite's max_page_count makes the database report SQLITE_FULL ("database or disk is full") once it would grow
    # past the limit: the same error path as a full disk (SQLite docs, PRAGMA max_page_count).
    with RunStore(tmp_path / "s.sqlite") as st:
        run = new_run(st)
        page(st, run, "a.png", ["first page"])
        used = st.con.execute("PRAGMA page_count").fetchone()[0]
        st.con.execute(f"PRAGMA max_page_count = {used + 1}")
        with pytest.raises(StoreError, match="disk is full"):
            page(st, run, "b.png", ["x" * 2000] * 200)
        assert st.page_texts(run) == {"a.png": ["first page"]}


WRITER = r"""
import sys, time
from ocrbench.store import RunStore, PageRecord, LineRecord
st = RunStore(sys.argv[1])
run = st.start_run(recogniser="r", kind="ctc", card_path="c", card_hash="h", settings={}, input_dir="/p",
                   host={}, engine="e")
i = 0
while True:
    lines = [LineRecord(line_no=j + 1, x0=0, y0=0, x1=1, y1=1, width_px=1, text="t" * 50, text_post=None,
                        confidence=1.0, n_chars=50) for j in range(200)]
    st.write_page(run, PageRecord(page_id=f"p{i:06d}", path="p", content_hash=None, status="done",
                                  n_lines=200), lines)
    i += 1
    if i == 3:
        print("ready", flush=True)
"""


def test_killed_writer_leaves_only_whole_pages(tmp_path):
    # SIGKILL cannot be caught: whatever the process was doing stops at once (signal(7)).
    db = tmp_path / "s.sqlite"
    proc = subprocess.Popen([sys.executable, "-c", WRITER, str(db)], stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().strip() == "ready"
        time.sleep(0.3)
    finally:
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
    con = sqlite3.connect(db)
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    rows = con.execute("SELECT p.page_id, p.n_lines, COUNT(l.line_no) FROM pages p LEFT JOIN lines l "
                       "ON l.run_id=p.run_id AND l.page_id=p.page_id GROUP BY p.page_id").fetchall()
    assert len(rows) >= 3
    assert all(n == count == 200 for _, n, count in rows)      # no page without all its lines
    orphans = con.execute("SELECT COUNT(*) FROM lines l WHERE NOT EXISTS (SELECT 1 FROM pages p "
                          "WHERE p.run_id=l.run_id AND p.page_id=l.page_id)").fetchone()[0]
    assert orphans == 0


# The DDL of a version-1 store as ocrbench wrote it before schema version 2 (copied from the version-1 source),
# with its whole-second timestamps: it must still be read, and be migrated when written to.
V1_DDL = """
CREATE TABLE meta(key TEXT PRIMARY KEY, value TEXT);
CREATE TABLE runs(run_id INTEGER PRIMARY KEY, recogniser TEXT NOT NULL, kind TEXT NOT NULL, card_path TEXT,
    card_hash TEXT NOT NULL, settings_json TEXT NOT NULL, input_dir TEXT NOT NULL, host_json TEXT, engine TEXT,
    ocrbench_version TEXT, started_at TEXT, finished_at TEXT);
CREATE TABLE pages(run_id INTEGER NOT NULL REFERENCES runs(run_id), page_id TEXT NOT NULL, path TEXT,
    content_hash TEXT, status TEXT NOT NULL CHECK (status IN ('done', 'failed')), error TEXT, width INTEGER,
    height INTEGER, n_lines INTEGER, skew_degrees REAL, t_load REAL, t_segment REAL, t_preprocess REAL,
    t_encode REAL, t_steps REAL, t_collapse REAL, t_postprocess REAL, t_total REAL, finished_at TEXT,
    PRIMARY KEY (run_id, page_id));
CREATE TABLE lines(run_id INTEGER NOT NULL, page_id TEXT NOT NULL, line_no INTEGER NOT NULL,
    x0 INTEGER, y0 INTEGER, x1 INTEGER, y1 INTEGER, width_px INTEGER, text TEXT, text_post TEXT, confidence REAL,
    char_conf_json TEXT, n_chars INTEGER, steps INTEGER, batch_no INTEGER, t_line REAL,
    PRIMARY KEY (run_id, page_id, line_no));
CREATE TABLE batches(run_id INTEGER NOT NULL, page_id TEXT NOT NULL, batch_no INTEGER NOT NULL, n_lines INTEGER,
    padded_width INTEGER, sum_width INTEGER, frames INTEGER, steps_max INTEGER, tokens_sum INTEGER,
    tokens_sq_sum INTEGER, t_preprocess REAL, t_encode REAL, t_steps REAL, t_collapse REAL,
    PRIMARY KEY (run_id, page_id, batch_no));
INSERT INTO meta VALUES ('schema_version', '1');
INSERT INTO runs VALUES (1, 'r', 'ctc', '/c/card.toml', 'hhhh', '{"batch_size":16}', '/pages', '{}', 'onnxruntime x',
    '0.1.0', '2026-01-05T10:00:00+00:00', '2026-01-05T10:00:09+00:00');
INSERT INTO pages VALUES (1, 'a.png', '/pages/a.png', 'c', 'done', NULL, 10, 10, 1, 0.0, 0.1, 0.1, 0.1, 0.1, 0, 0,
    0, 0.5, '2026-01-05T10:00:04+00:00');
INSERT INTO lines VALUES (1, 'a.png', 1, 0, 0, 9, 9, 40, 'old text', NULL, 0.9, '[0.9]', 8, 9, 0, 0.01);
"""


def old_store(path: Path) -> Path:
    con = sqlite3.connect(path)
    con.executescript(V1_DDL)
    con.close()
    return path


def test_timestamps_carry_microseconds(tmp_path):
    import datetime as dt

    from ocrbench.store import now_iso, parse_time

    with RunStore(tmp_path / "s.sqlite") as st:
        run = new_run(st)
        page(st, run, "a.png", ["x"])
        st.finish_run(run)
        info = st.run_info(run)
        fin = st.read_frames()["pages"]["finished_at"][0]
    for stamp in (info.started_at, info.finished_at, fin, now_iso()):
        assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{6}\+00:00", stamp), stamp
        assert parse_time(stamp).tzinfo == dt.timezone.utc
    assert parse_time("2026-01-05T10:00:04+00:00") == dt.datetime(2026, 1, 5, 10, 0, 4, tzinfo=dt.timezone.utc)


def test_old_whole_second_store_is_read_as_it_is_and_migrated_when_written(tmp_path):
    db = old_store(tmp_path / "v1.sqlite")
    with RunStore(db, read_only=True) as ro:          # read-only: read as it is, new columns filled in
        assert ro.schema_version == 1
        f = ro.read_frames()
        assert f["lines"]["truncated"].tolist() == [0] and f["lines"]["error"].tolist() == [None]
        assert f["pages"]["file_size"].isna().all()
        assert ro.page_texts(1) == {"a.png": ["old text"]}
        assert ro.post_recipe(1) is None and ro.run_totals(1)["lines_truncated"] == 0
        assert ro.run_info(1).started_at == "2026-01-05T10:00:00+00:00"
    con = sqlite3.connect(db)
    assert "truncated" not in [r[1] for r in con.execute("PRAGMA table_info(lines)")]   # untouched by reading
    con.close()
    with RunStore(db) as st:                           # written to: migrated in place, earlier rows kept
        assert st.schema_version == SCHEMA_VERSION
        assert st.find_run(card_hash="hhhh", settings={"batch_size": 16}, input_dir="/pages") == 1
        page(st, 1, "b.png", ["new text"])
        assert st.page_texts(1) == {"a.png": ["old text"], "b.png": ["new text"]}
    con = sqlite3.connect(db)
    for table, cols in CONTRACT.items():
        if table != "meta":
            assert set(cols) <= {r[1] for r in con.execute(f"PRAGMA table_info({table})")}, table
    stamps = [r[0] for r in con.execute("SELECT finished_at FROM pages ORDER BY page_id")]
    con.close()
    assert stamps[0] == "2026-01-05T10:00:04+00:00" and "." in stamps[1]


# What version 2 added to version 1 (copied from the version-2 source); a version-2 store is V1_DDL plus these.
V2_ADDITIONS = """
CREATE TABLE postprocessing(run_id INTEGER PRIMARY KEY, recipe TEXT NOT NULL, applied_at TEXT);
CREATE TABLE scaling(measured_at TEXT, recogniser TEXT, kind TEXT, card_hash TEXT, host_json TEXT, workers INTEGER,
    threads INTEGER, pages INTEGER, wall_seconds REAL, pages_per_second REAL, startup_seconds REAL,
    busy_seconds REAL, gap_seconds_per_page REAL, run_id INTEGER);
ALTER TABLE lines ADD COLUMN truncated INTEGER NOT NULL DEFAULT 0;
ALTER TABLE lines ADD COLUMN error TEXT;
ALTER TABLE pages ADD COLUMN file_size INTEGER;
ALTER TABLE pages ADD COLUMN file_mtime_ns INTEGER;
UPDATE meta SET value='2' WHERE key='schema_version';
"""


def test_version_2_store_is_read_without_collections_and_flags_and_migrated_when_written(tmp_path):
    db = old_store(tmp_path / "v2.sqlite")
    con = sqlite3.connect(db)
    con.executescript(V2_ADDITIONS)
    con.close()
    with RunStore(db, read_only=True) as ro:          # read as it is: the version-3 columns filled with NULL
        assert ro.schema_version == 2
        pages = ro.read_frames()["pages"]
        assert pages["collection"].isna().all() and pages["flags"].isna().all()
    with RunStore(db) as st:                           # written to: migrated, earlier rows kept
        assert st.schema_version == SCHEMA_VERSION == 3
        st.write_page(1, PageRecord(page_id="box1/b.png", path="/pages/box1/b.png", content_hash="d",
                                    status="done", n_lines=0, collection="box1", flags="blank"))
        pages = st.read_frames()["pages"].set_index("page_id")
    assert pages.loc["box1/b.png", "collection"] == "box1" and pages.loc["box1/b.png", "flags"] == "blank"
    assert pd.isna(pages.loc["a.png", "collection"]) and pd.isna(pages.loc["a.png", "flags"])
    con = sqlite3.connect(db)
    assert [r[1] for r in con.execute("PRAGMA table_info(pages)")] == CONTRACT["pages"]
    assert con.execute("SELECT value FROM meta WHERE key='migrated_from_2_at'").fetchone() is not None
    con.close()


def test_older_and_newer_versions_than_known_are_refused(tmp_path):
    db = old_store(tmp_path / "v0.sqlite")
    con = sqlite3.connect(db)
    con.execute("UPDATE meta SET value='0' WHERE key='schema_version'")
    con.commit()
    con.close()
    with pytest.raises(StoreError, match="schema version 0 is not one this ocrbench reads"):
        RunStore(db, read_only=True)


def test_names_that_are_not_utf8_are_stored_exactly_and_shown_safely(tmp_path):
    name = os.fsdecode(b"caf\xe9.png")          # how Python holds a non-UTF-8 file name (PEP 383)
    with RunStore(tmp_path / "s.sqlite") as st:
        run = new_run(st, input_dir=os.fsdecode(b"/scans/\xff"))
        page(st, run, name, ["x"])
        bad_path = os.fsdecode(b"/scans/b\xe9.png")
        st.write_page(run, PageRecord(page_id=os.fsdecode(b"b\xe9.png"), path=bad_path, content_hash=None,
                                      status="failed", error=bad_path + ": not an image"))
        assert st.find_run(card_hash="h" * 64, settings={"batch_size": 16, "decoding": "greedy"},
                           input_dir=os.fsdecode(b"/scans/\xff")) == run
        assert name in st.page_texts(run) and name in st.page_status(run)     # the same string comes back
        assert st.done_page_ids(run) == [name]
        assert st.page_lines(run, name)[0][1] == "x"
        f = st.read_frames()
        assert sorted(f["pages"]["page_id"]) == ["b\\xe9.png", "caf\\xe9.png"]     # shown with \xNN
    files = export(tmp_path / "s.sqlite", tmp_path / "out", "csv")
    assert "caf\\xe9.png" in (tmp_path / "out" / "pages.csv").read_text(encoding="utf-8") and files


def test_scaling_rows_go_through_the_store(tmp_path):
    from ocrbench.store import SCALING_COLUMNS

    row = ["2026-01-05T10:00:00.000001+00:00", "r", "ctc", "h", "{}", 2, 1, 10, 5.0, 2.0, 1.0, 4.0, 0.1, None]
    with RunStore(tmp_path / "s.sqlite") as st:
        st.append_scaling([row])
    con = sqlite3.connect(tmp_path / "s.sqlite")
    assert [r[1] for r in con.execute("PRAGMA table_info(scaling)")] == list(SCALING_COLUMNS)
    assert list(con.execute("SELECT * FROM scaling").fetchone()) == row
