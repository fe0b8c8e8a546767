"""The run store: one SQLite file that holds every run, page, line and batch.

Why SQLite: one file a person can copy, open with any SQLite tool, and append
to from a long run without a server. The journal is in WAL mode and every page
is written in one transaction, so a killed process loses at most the page it
was working on; readers (report, planner) can read while a run writes.

The package has three parts:

* :mod:`ocrbench.store.schema` — every table (DDL), the schema version and the
  migrations from older stores; the only module that creates or alters a table.
* :mod:`ocrbench.store.runstore` — :class:`RunStore`, the records it writes, and
  how names of any bytes are stored.
* :mod:`ocrbench.store.export` — the tables as CSV or Parquet files.

The tables, their columns, what each means and which columns identify a run
are the store's contract, written down in ``CONTRACT.md`` in this folder: the
planner, the report and the accuracy code read them. ``meta`` holds
``schema_version``; a store of a newer version than this ocrbench knows is
refused with a StoreError rather than misread, an older one is migrated when
opened for writing.
"""

from ocrbench.store.export import export
from ocrbench.store.runstore import (BatchRecord, LineRecord, PageRecord, RunInfo, RunStore, StoredPage, from_db,
                                     printable, settings_key, to_db)
from ocrbench.store.schema import SCALING_COLUMNS, SCHEMA_VERSION, TABLES, TRUNCATED_CODES, now_iso, parse_time

__all__ = ["BatchRecord", "LineRecord", "PageRecord", "RunInfo", "RunStore", "StoredPage", "SCALING_COLUMNS",
           "SCHEMA_VERSION", "TABLES", "TRUNCATED_CODES", "export", "from_db", "now_iso", "parse_time", "printable", "settings_key",
           "to_db"]
