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


def collection_of(page_id: str) -> str:
    """A page's collection: the folder its file lies in within the calibration folder ('' at the top)."""
    name = str(page_id).partition("#")[0].replace("\\", "/")
    return name.rsplit("/", 1)[0] if "/" in name else ""


def stratified_sample_size(pilot: pd.DataFrame, *, relative: float | None = 0.2, absolute: float | None = None,
                           population: int | None = None, level: float = 0.95) -> dict[str, Any]:
    """Pages of ground truth by collection (stratified random sampling, proportional allocation).

    Cochran, *Sampling Techniques* (stratified sampling, the combined ratio estimate, from memory): with
    n_h = W_h n, V(R) ~ (1 - n/N) sum_h W_h S_dh^2 / (n X^2), where d = y - R x and S_dh^2 is its
    variance within collection h. The spread between collections drops out, so collections with
    different error rates need fewer pages than one pooled sample. ``pilot`` needs ``page_id``,
    ``char_edits`` and ``ref_chars``; with fewer than two collections of at least two pages each,
    the unstratified :func:`sample_size` is returned.
    """
    import math
    from statistics import NormalDist

    if "page_id" not in pilot:
        return sample_size(pilot, relative=relative, absolute=absolute, population=population)
    df = pilot.assign(collection=[collection_of(p) for p in pilot["page_id"]])
    sizes = df.groupby("collection").size()
    if len(sizes) < 2 or (sizes < 2).any():
        return sample_size(pilot, relative=relative, absolute=absolute, population=population)
    y, x = df["char_edits"].astype(float), df["ref_chars"].astype(float)
    rate = float(y.sum() / x.sum())
    half = absolute if absolute is not None else (relative or 0.0) * rate
    if half <= 0:
        return sample_size(pilot, relative=relative, absolute=absolute, population=population)
    d = y - rate * x
    w = sizes / sizes.sum()
    within = d.groupby(df["collection"]).var(ddof=1)
    z = NormalDist().inv_cdf(0.5 + level / 2)
    n0 = z * z * float((w * within).sum()) / (half * half * float(x.mean()) ** 2)
    n = n0 / (1 + n0 / population) if population else n0
    by = {str(c): max(2, math.ceil(n * float(w[c]) - 1e-9)) for c in sizes.index}
    return {"pages": int(sum(by.values())), "by_collection": by, "n0_pages": float(n0), "half_width": half,
            "pilot_rate": rate, "margin": "absolute" if absolute is not None else "relative",
            "relative_margin": None if absolute is not None else relative, "lines": None,
            "method": "stratified by collection, proportional allocation, combined ratio estimate (Cochran, "
                      "Sampling Techniques)", "notes": [f"{len(by)} collections in the pilot"]}
