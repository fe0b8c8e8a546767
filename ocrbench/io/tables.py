"""Tables and JSON out: CSV + Parquet writers and the JSON cleaner every command shares.

:func:`json_ready` turns numpy scalars, paths, pandas' NA and non-finite floats
(to ``None``) into plain JSON values, recursively; :func:`json_text` dumps
with the project's conventions (UTF-8 kept, no NaN). :func:`write_table`
writes one DataFrame as ``<name>.csv`` and/or ``<name>.parquet``.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any, Iterable, Mapping

import numpy as np
import pandas as pd

from ocrbench.errors import TextFileError
from ocrbench.io.files import atomic_write_text, ensure_folder

__all__ = ["TABLE_FORMATS", "json_ready", "json_text", "write_json", "write_table", "write_tables"]

TABLE_FORMATS = ("csv", "parquet")


def json_ready(v: Any) -> Any:
    """JSON-ready: numpy scalars to Python, paths to strings, NaN/inf/NA to None, containers recursively."""
    if isinstance(v, Mapping):
        return {str(k): json_ready(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [json_ready(x) for x in v]
    if isinstance(v, np.ndarray):
        return [json_ready(x) for x in v.tolist()]
    if isinstance(v, np.generic):
        v = v.item()
    if isinstance(v, Path):
        return str(v)
    if isinstance(v, float) and not math.isfinite(v):
        return None
    if v is pd.NA or v is pd.NaT:
        return None
    return v


def json_text(obj: Any, *, indent: int | None = None) -> str:
    """``obj`` cleaned by :func:`json_ready` and dumped (UTF-8 kept, never NaN)."""
    return json.dumps(json_ready(obj), indent=indent, ensure_ascii=False, allow_nan=False)


def write_json(path: str | Path, obj: Any, *, indent: int = 1) -> Path:
    """Write ``obj`` as JSON (cleaned, one trailing newline), atomically."""
    return atomic_write_text(path, json_text(obj, indent=indent) + "\n")


def write_table(df: pd.DataFrame, folder: str | Path, name: str,
                formats: Iterable[str] = TABLE_FORMATS) -> list[Path]:
    """Write ``df`` as ``folder/name.<format>`` for each format (csv, parquet); the paths written.

    Unknown formats raise ValueError (a programming or usage error the caller names);
    OSError becomes TextFileError naming the file.
    """
    out = ensure_folder(folder)
    written = []
    for f in formats:
        if f not in TABLE_FORMATS:
            raise ValueError(f"unknown table format {f!r} ({' or '.join(TABLE_FORMATS)})")
        p = out / f"{name}.{f}"
        try:
            if f == "csv":
                df.to_csv(p, index=False, encoding="utf-8")
            else:
                df.to_parquet(p, index=False)
        except OSError as e:
            raise TextFileError(p, f"cannot write ({e.strerror or e})") from e
        written.append(p)
    return written


def write_tables(tables: Mapping[str, pd.DataFrame], folder: str | Path,
                 formats: Iterable[str] = TABLE_FORMATS) -> list[Path]:
    """:func:`write_table` for each named table, in order; every path written."""
    formats = tuple(formats)
    written: list[Path] = []
    for name, df in tables.items():
        written += write_table(df, folder, name, formats)
    return written
