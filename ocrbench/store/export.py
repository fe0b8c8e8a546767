"""Export a run store's tables as CSV or Parquet files, one file per table."""

from __future__ import annotations

from pathlib import Path

from ocrbench.errors import StoreError, TextFileError
from ocrbench.io.tables import write_table
from ocrbench.store.runstore import RunStore, printable

FORMATS = ("parquet", "csv")


def export(store_path: Path | str, out_dir: Path | str, fmt: str = "parquet") -> list[Path]:
    """Write runs, pages, lines, batches and postprocessing (each run's recipe behind ``lines.text_post``)
    of a store to ``out_dir`` as Parquet or CSV files."""
    if fmt not in FORMATS:
        raise StoreError(f"export format must be 'parquet' or 'csv', not {fmt!r}")
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise StoreError(f"{printable(out)}: cannot create the export folder ({e.strerror})") from e
    with RunStore(store_path, read_only=True) as st:
        frames = st.read_frames()
        frames["postprocessing"] = st.post_recipes()
    written = []
    for name, df in frames.items():
        try:
            written += write_table(df, out, name, (fmt,))
        except TextFileError as e:
            raise StoreError(f"{e.path}: cannot write the export ({e.reason})") from e
    return written
