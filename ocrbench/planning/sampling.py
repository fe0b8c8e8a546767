"""How much ground truth to transcribe: pages for a CER interval of a wanted width.

By default the width is *relative* to the CER (±20 % of it): an absolute margin
such as ±0.5 points is wider than the CER itself when the CER is 0.24 %, and
would advise a handful of pages. The size comes from the ratio-estimator
variance of :func:`ocrbench.accuracy.stats.sample_size_for_cer` (Cochran,
*Sampling Techniques*, ratio estimation) with half-width = relative margin x the
pilot's CER. An absolute margin can still be asked for.
"""

from __future__ import annotations

from typing import Any

import pandas as pd

from ocrbench.accuracy.stats import sample_size_for_cer
from ocrbench.errors import PlanError


def sample_size(pilot: pd.DataFrame, *, relative: float | None = 0.2, absolute: float | None = None,
                population: int | None = None) -> dict[str, Any]:
    """Pages of ground truth for a CER interval of ±``relative`` x CER (or ±``absolute`` when given).

    ``pilot``: per-page scores with ``char_edits`` and ``ref_chars``. Returns the
    dict of ``sample_size_for_cer`` plus ``margin`` ("relative" or "absolute")
    and ``relative_margin``; ``pages`` is None (with a note) when a relative
    margin is asked for and the pilot shows no errors at all.
    """
    edits, chars = float(pilot["char_edits"].sum()), float(pilot["ref_chars"].sum())
    if absolute is not None:
        out = sample_size_for_cer(pilot, half_width=absolute, population=population)
        return out | {"margin": "absolute", "relative_margin": None}
    if relative is None or relative <= 0:
        raise PlanError("give a relative margin above 0 (e.g. 0.2 for ±20 % of the CER) or an absolute one")
    if chars <= 0 or edits <= 0:
        return {"pages": None, "lines": None, "margin": "relative", "relative_margin": relative,
                "half_width": None, "pilot_rate": 0.0 if chars > 0 else None,
                "notes": ["the pilot shows no character errors: a margin relative to a CER of 0 cannot be met; "
                          "give an absolute margin (--cer-margin) or a larger pilot"]}
    rate = edits / chars
    out = sample_size_for_cer(pilot, half_width=relative * rate, population=population)
    return out | {"margin": "relative", "relative_margin": relative}
