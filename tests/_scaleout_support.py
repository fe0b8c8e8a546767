"""Shared helpers of the scale-out, fault and bad-input tests: small pages, tiny cards, store checks."""

from __future__ import annotations

import sqlite3
from pathlib import Path

import _tiny_models as tm
from ocrbench import synth
from ocrbench.recognisers.card import Card, load_card


def small_pages(folder: Path, n: int, *, seed: int = 11, width: int = 600, lines: int = 2) -> Path:
    """``n`` small invented ledger pages (PNG, a few lines each) in ``folder``, images only."""
    folder.mkdir(parents=True, exist_ok=True)
    for i in range(n):
        spec = synth.PageSpec(seed=seed * 1000 + i, lines_per_page=lines, width=width, chars_per_line=30,
                              folio=i + 1)
        synth.write_page(folder, f"page_{i + 1:03d}", spec, "png")
    for p in folder.glob("*"):
        if p.suffix in (".txt", ".json"):
            p.unlink()
    return folder


def tiny_cards(root: Path) -> list[Card]:
    """The tiny CTC and seq recognisers of tests/_tiny_models.py, written under ``root`` and loaded."""
    return [load_card(tm.write_ctc(root / "ctc")), load_card(tm.write_seq(root / "seq"))]


def store_rows(db: Path) -> dict[str, list[tuple]]:
    """Raw rows that the page-level checks need, read with plain sqlite3 (not through RunStore)."""
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        return {
            "integrity": con.execute("PRAGMA integrity_check").fetchall(),
            "pages": con.execute("SELECT run_id, page_id, status, n_lines FROM pages ORDER BY run_id, page_id").fetchall(),
            "lines": con.execute("SELECT run_id, page_id, COUNT(*), MIN(line_no), MAX(line_no) FROM lines "
                                 "GROUP BY run_id, page_id").fetchall(),
            "batch_lines": con.execute("SELECT run_id, page_id, SUM(n_lines) FROM batches "
                                       "GROUP BY run_id, page_id").fetchall(),
            "runs": con.execute("SELECT run_id, engine, finished_at FROM runs ORDER BY run_id").fetchall(),
        }
    finally:
        con.close()


def assert_whole_pages(db: Path) -> dict[int, set[str]]:
    """Every written page is whole: SQLite finds no damage, a done page has exactly its n_lines lines,
    numbered 1..n, and its batches hold those lines; a failed page has none. Returns run -> done page ids.

    (One page row per run and page is the table's primary key; line and batch counts are what a
    half-written page would get wrong.)
    """
    rows = store_rows(db)
    assert rows["integrity"] == [("ok",)]          # SQLite's own consistency check (PRAGMA integrity_check)
    lines = {(r[0], r[1]): r[2:] for r in rows["lines"]}
    batch_lines = {(r[0], r[1]): r[2] for r in rows["batch_lines"]}
    done: dict[int, set[str]] = {}
    for run_id, page_id, status, n_lines in rows["pages"]:
        key = (run_id, page_id)
        if status == "done":
            done.setdefault(run_id, set()).add(page_id)
            if n_lines:
                assert lines[key] == (n_lines, 1, n_lines), key
                assert batch_lines[key] == n_lines, key
            else:
                assert key not in lines
        else:
            assert key not in lines and key not in batch_lines
    assert set(lines) <= {(r[0], r[1]) for r in rows["pages"]}       # no orphan lines
    return done


def done_pages(db: Path, run_id: int | None = None) -> int:
    """Done pages of a store (of one run when given), read while a run writes (WAL lets readers in)."""
    import sqlite3

    where = "status='done'" + ("" if run_id is None else f" AND run_id={int(run_id)}")
    try:
        con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=1)
        try:
            return con.execute(f"SELECT COUNT(*) FROM pages WHERE {where}").fetchone()[0]
        finally:
            con.close()
    except sqlite3.Error:
        return 0


def group_alive(pgid: int) -> bool:
    """Whether any process of the process group ``pgid`` is still alive."""
    import os

    try:
        os.killpg(pgid, 0)
        return True
    except ProcessLookupError:
        return False
