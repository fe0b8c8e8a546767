"""Post-processing a folder of text pages into another folder (``ocrbench postprocess SRC OUT``).

The source files are never overwritten: each result goes to ``OUT/<same name>``
through a temporary file. Plain text files carry no confidences, so every line
gets ``line_confidence`` (None: unknown, below every gate).
"""

from __future__ import annotations

from pathlib import Path

from ocrbench.errors import InputError
from ocrbench.io.files import atomic_write_lines, ensure_folder
from ocrbench.io.text import read_text_lines
from ocrbench.postprocess.steps import LineText, Pipeline

__all__ = ["check_output_folder", "postprocess_file"]


def check_output_folder(source: Path, out_dir: Path) -> Path:
    """Create ``out_dir``; InputError when it is the source's own folder (originals are never overwritten)."""
    src_dir = source if source.is_dir() else source.parent
    if out_dir.resolve() == src_dir.resolve():
        raise InputError(out_dir, "the output folder must differ from the source (originals are never overwritten)")
    return ensure_folder(out_dir)


def postprocess_file(path: Path, out_dir: Path, pipeline: Pipeline, line_confidence: float | None = None) -> dict:
    """Post-process one text page into ``out_dir``; a JSON-ready record of what changed.

    Raises TextFileError (unreadable or unwritable file) or PostprocessError (a step refused the page).
    """
    lines = read_text_lines(path)
    res = pipeline.apply_page([LineText(t, None, line_confidence) for t in lines])
    target = atomic_write_lines(out_dir / path.name, res.texts)
    return {"path": str(path), "out": str(target), "lines": len(lines),
            "changed_lines": len({c.line_no for c in res.changes}),
            "changes": [{"step": c.step, "line": c.line_no + 1, "before": c.before, "after": c.after,
                         "detail": c.detail} for c in res.changes]}
