"""Two readers of the same lines: where they disagree, a person should look.

Why: two recognisers of different kinds (a CTC model and an encoder-decoder)
make different mistakes, so a line both read alike is rarely wrong, and a line
they read differently very often holds an error in one of them. That is a doubt
signal that needs no ground truth and no trust in either model's confidence.

The runner lets every recogniser read the same line crops of a page (see
``ocrbench.run.engine``), so the runs of one store over the same input folder
pair up by (page, line number). For each line:

    disagreement = Levenshtein distance(a, b) / max(len(a), len(b))   (0 when both are empty)

(rapidfuzz's normalised Levenshtein distance), 0 = same text, 1 = nothing in
common. The review queue adds ``weight * agree_part`` to a line's doubt, where
``agree_part = min(1, disagreement / AGREE_SCALE)``: one character in ten read
differently already counts fully (a ledger line differing in one digit of 40
characters gives 0.25), so a disagreement weighs as much as a low confidence.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
import pandas as pd
from rapidfuzz.distance import Levenshtein

from ocrbench.postprocess.review import auroc, auroc_interval

#: disagreement (normalised edit distance) at which the doubt part reaches 1
AGREE_SCALE = 0.1


def line_disagreement(a: str, b: str) -> float:
    """Normalised edit distance of two readings of one line (rapidfuzz; 0 when both are empty)."""
    return float(Levenshtein.normalized_distance(a or "", b or ""))


def agree_part(disagreement: Sequence[float] | np.ndarray | pd.Series, scale: float = AGREE_SCALE) -> np.ndarray:
    """The doubt part of a disagreement, within 0..1 (NaN stays NaN: no second reading)."""
    d = np.asarray(disagreement, dtype=float)
    return np.minimum(1.0, d / scale)


@dataclass(frozen=True)
class RunRef:
    """What pairing needs to know of a run."""

    run_id: int
    recogniser: str
    input_dir: str
    route_role: str | None = None    # settings["route_role"] of a routed run's parts (ocrbench/run/routed.py)


def partner_run(runs: Sequence[RunRef], run_id: int, done: dict[int, set[str]] | None = None) -> int | None:
    """The other reader for ``run_id``: a run of another recogniser over the same input folder.

    Among several, the one sharing the most done pages (``done``: run -> page
    ids), then the latest. The re-reading and the kept text of a routed run are
    never partners (the first holds only some lines, the second partly the
    very reading it would be compared with). None when there is no such run.
    """
    me = next((r for r in runs if r.run_id == run_id), None)
    if me is None:
        return None
    cands = [r for r in runs if r.recogniser != me.recogniser and r.input_dir == me.input_dir
             and r.route_role in (None, "fast")]
    if not cands:
        return None
    mine = (done or {}).get(run_id, set())

    def key(r: RunRef):
        return (len(mine & (done or {}).get(r.run_id, set())), r.run_id)
    return max(cands, key=key).run_id


def disagreement_column(lines: pd.DataFrame, other: pd.DataFrame, *, text: str = "text") -> pd.Series:
    """Per line of ``lines`` (page_id, line_no, ``text``), its disagreement with the line of the same page
    and number in ``other``; NaN where ``other`` has no such line (page not read there)."""
    o = other[["page_id", "line_no", text]].rename(columns={text: "_other"})
    m = lines[["page_id", "line_no", text]].reset_index().merge(o, on=["page_id", "line_no"], how="left")
    d = [line_disagreement(a, b) if isinstance(b, str) else np.nan
         for a, b in zip(m[text].fillna("").astype(str), m["_other"])]
    return pd.Series(d, index=m["index"].to_numpy(), name="disagreement", dtype=float).reindex(lines.index)


def with_partner(lines: pd.DataFrame, other: pd.DataFrame, *, text: str = "text") -> pd.DataFrame:
    """``lines`` with two columns added: ``disagreement`` with ``other`` (NaN where it has no such line) and
    ``agree_part`` (what the review queue weighs, 0 where there is no second reading)."""
    out = lines.copy()
    out["disagreement"] = disagreement_column(lines, other, text=text)
    out["agree_part"] = np.nan_to_num(agree_part(out["disagreement"]), nan=0.0)
    return out


def paired_auroc_difference(y: Sequence[bool] | np.ndarray, score_a: Sequence[float] | np.ndarray,
                            score_b: Sequence[float] | np.ndarray, *, groups: Sequence[Any] | None = None,
                            n_boot: int = 1000, level: float = 0.95, seed: int = 0) -> tuple[float, float] | None:
    """Percentile bootstrap interval of auroc(a) - auroc(b) on the same resampled lines (whole pages with
    ``groups``), so the two AUROCs move together; None when undefined."""
    y = np.asarray(y, dtype=bool)
    a, b = np.asarray(score_a, float), np.asarray(score_b, float)
    if auroc(y, a) is None:
        return None
    rng = np.random.default_rng(seed)
    if groups is None:
        members = [np.array([i]) for i in range(y.size)]
    else:
        codes, _ = pd.factorize(pd.Series(list(groups)))
        members = [np.flatnonzero(codes == g) for g in range(codes.max() + 1)]
    vals = []
    for _ in range(n_boot):
        idx = np.concatenate([members[g] for g in rng.integers(0, len(members), len(members))])
        ra, rb = auroc(y[idx], a[idx]), auroc(y[idx], b[idx])
        if ra is not None and rb is not None:
            vals.append(ra - rb)
    if not vals:
        return None
    lo, hi = np.quantile(vals, [(1 - level) / 2, 1 - (1 - level) / 2])
    return float(lo), float(hi)


def agreement_calibration(holds_error: Sequence[bool], confidence: Sequence[float], disagreement: Sequence[float],
                          *, groups: Sequence[Any] | None = None, weight: float = 1.0, n_boot: int = 1000,
                          level: float = 0.95, seed: int = 0) -> dict[str, Any]:
    """How well each doubt signal predicts "this line holds an error", on lines with ground truth.

    Three scores, each with its AUROC and page-resampled interval: confidence
    alone (1 - confidence), disagreement alone, and the agreement-weighted doubt
    (1 - confidence) + weight * agree_part. Also the interval of the paired
    difference weighted - confidence alone. Lines lacking a confidence or a
    second reading are left out (all three on the same lines).
    """
    y = np.asarray(holds_error, dtype=bool)
    c = np.asarray(confidence, dtype=float)
    d = np.asarray(disagreement, dtype=float)
    keep = ~np.isnan(c) & ~np.isnan(d)
    y, c, d = y[keep], c[keep], d[keep]
    g = None if groups is None else [x for x, k in zip(groups, keep) if k]
    scores = {"confidence": 1.0 - c, "disagreement": d, "weighted": (1.0 - c) + weight * agree_part(d)}
    out: dict[str, Any] = {"lines": int(keep.sum()), "error_lines": int(y.sum()), "weight": weight,
                           "scale": AGREE_SCALE, "level": level,
                           "disagreeing_lines": int((d > 0).sum()),
                           "error_share_disagreeing": float(y[d > 0].mean()) if (d > 0).any() else None,
                           "error_share_agreeing": float(y[d == 0].mean()) if (d == 0).any() else None}
    for name, s in scores.items():
        a = auroc(y, s)
        ci = auroc_interval(y, s, groups=g, n_boot=n_boot, level=level, seed=seed) if a is not None else None
        out[name] = {"auroc": a, "low": ci[0] if ci else None, "high": ci[1] if ci else None}
    a, b = out["weighted"]["auroc"], out["confidence"]["auroc"]
    diff = paired_auroc_difference(y, scores["weighted"], scores["confidence"], groups=g, n_boot=n_boot,
                                   level=level, seed=seed) if a is not None else None
    out["weighted_minus_confidence"] = {"diff": None if a is None else a - b,
                                        "low": diff[0] if diff else None, "high": diff[1] if diff else None}
    return out


def describe(cal: dict[str, Any], partner: str) -> list[str]:
    """Lines of text for a person: the three AUROCs with intervals and the paired difference."""
    def fmt(x: dict) -> str:
        if x["auroc"] is None:
            return "undefined"
        ci = f" [{x['low']:.2f}-{x['high']:.2f}]" if x["low"] is not None else ""
        return f"{x['auroc']:.3f}{ci}"
    d = cal["weighted_minus_confidence"]
    dd = "" if d["diff"] is None else (f"; weighted minus confidence alone {d['diff']:+.3f}"
                                       + (f" [{d['low']:+.3f}, {d['high']:+.3f}]" if d["low"] is not None else ""))
    share = ""
    if cal["error_share_disagreeing"] is not None and cal["error_share_agreeing"] is not None:
        share = (f"; lines holding errors: {cal['error_share_disagreeing']:.0%} of the {cal['disagreeing_lines']} "
                 f"read differently, {cal['error_share_agreeing']:.0%} of those read alike")
    return [f"  agreement with {partner} on {cal['lines']} lines: AUROC confidence alone {fmt(cal['confidence'])}, "
            f"disagreement alone {fmt(cal['disagreement'])}, agreement-weighted doubt {fmt(cal['weighted'])}"
            f"{dd}{share}"]
