"""Post-processing of recognised text: normalisation, lexicon correction, ledger arithmetic, review.

Pure library: strings, lists and DataFrames in, strings, numbers and DataFrames
out. No recogniser runtime, no CLI, no store access; the runner, ``score`` and
the report wire it in through the two frame helpers below.

Modules: :mod:`.steps` (the pipeline), :mod:`.lexicon` (word-list correction),
:mod:`.ledger` (dates, amounts, page balance, misread-rate estimate),
:mod:`.review` (review queue, calibration), :mod:`.effect` (measured effect).
"""

from __future__ import annotations

import json
from typing import Any

import pandas as pd

from ocrbench.ledger.balance import (BALANCED, NOT_CHECKABLE, UNBALANCED, MisreadEstimate, PageBalance,
                                         check_page, estimate_misreads)
from ocrbench.postprocess.lexicon import Lexicon, read_word_list
from ocrbench.postprocess.review import ReviewQueue, calibration, review_queue
from ocrbench.postprocess.steps import (LineText, PageResult, Pipeline, build_pipeline, default_pipeline,
                                        pipeline_from_config)

__all__ = [
    "BALANCED", "UNBALANCED", "NOT_CHECKABLE", "PageBalance", "MisreadEstimate", "check_page",
    "estimate_misreads", "Lexicon", "read_word_list", "ReviewQueue", "review_queue", "calibration",
    "LineText", "PageResult", "Pipeline", "build_pipeline", "default_pipeline", "pipeline_from_config",
    "postprocess_lines_frame", "balance_lines_frame",
]

_PAGE_KEYS = ("run_id", "page_id")


def _char_confs(value: Any) -> tuple[float, ...] | None:
    if value is None or (isinstance(value, float) and pd.isna(value)):
        return None
    if isinstance(value, str):
        value = json.loads(value) if value else None
    return tuple(float(c) for c in value) if value is not None else None


def postprocess_lines_frame(lines: pd.DataFrame, pipeline: Pipeline, *, text_column: str = "text") -> pd.Series:
    """Post-process every page of a lines table; returns the new texts, aligned with ``lines.index``.

    ``lines`` has the store's columns: page_id, line_no, text and optionally
    run_id, confidence, char_conf_json (a JSON list, or a list). Pages are
    grouped by (run_id, page_id) and read in line_no order. Meant for filling
    the store's ``text_post`` column; the raw text is not touched.
    """
    keys = [k for k in _PAGE_KEYS if k in lines.columns]
    out = pd.Series(index=lines.index, dtype=object)
    if lines.empty:
        return out
    for _, grp in lines.sort_values([*keys, "line_no"], kind="stable").groupby(keys, sort=False):
        page = [LineText(str(r[text_column]) if pd.notna(r[text_column]) else "",
                         _char_confs(r["char_conf_json"]) if "char_conf_json" in grp.columns else None,
                         float(r["confidence"]) if "confidence" in grp.columns and pd.notna(r["confidence"]) else None)
                for _, r in grp.iterrows()]
        res = pipeline.apply_page(page)
        out.loc[grp.index] = res.texts
    return out


def balance_lines_frame(lines: pd.DataFrame, *, text_column: str = "text", decimal_mark: str = ".") -> pd.DataFrame:
    """Check the arithmetic of every page of a lines table.

    Returns one row per page: the page keys, status, difference (string in the
    page's currency, None when not checkable), difference_minor (cents or
    farthings), form, reason, amounts, and a ``balance`` column holding the
    :class:`PageBalance` (for :func:`review_queue` and :func:`estimate_misreads`).
    """
    keys = [k for k in _PAGE_KEYS if k in lines.columns]
    rows = []
    for key, grp in lines.sort_values([*keys, "line_no"], kind="stable").groupby(keys, sort=False):
        key = key if isinstance(key, tuple) else (key,)
        texts = [str(t) if pd.notna(t) else "" for t in grp[text_column]]
        b = check_page(texts, decimal_mark=decimal_mark)
        rows.append({**dict(zip(keys, key)), "status": b.status, "difference": b.difference_text,
                     "difference_minor": b.difference, "form": b.form, "reason": b.reason,
                     "amounts": len(b.amount_lines), "balance": b})
    return pd.DataFrame(rows, columns=[*keys, "status", "difference", "difference_minor", "form", "reason",
                                       "amounts", "balance"])
