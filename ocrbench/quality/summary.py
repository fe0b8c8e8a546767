"""``quality``: per group of pages, how good the text is — estimated and, where keyed, measured — and
whether the group has drifted from the calibrated collections. Returns one JSON-ready dict."""

from __future__ import annotations

from pathlib import Path
from typing import Any, Sequence

import numpy as np

from ocrbench.accuracy.stats import bootstrap_ratio_ci
from ocrbench.postprocess.lexicon import Lexicon
from ocrbench.quality.data import DEFAULT_QUEUE_DOUBT, System, read_snapshot, systems_of
from ocrbench.quality.drift import DEFAULT_ALPHA, holm, ks_page_permutation
from ocrbench.quality.estimate import (RANGE_TOLERANCE, Calibration, balance_rate, calibrate, estimate_groups,
                                       estimate_pages)

__all__ = ["quality", "group_rows", "drift_flags"]


def group_rows(system: System, cal: Calibration | None, *, level: float = 0.95, n_boot: int = 400,
               seed: int = 0) -> list[dict[str, Any]]:
    """One row per group: counts, estimated and measured CER, balance rate, flagged share, queued lines."""
    pages = system.pages
    est = estimate_groups(system, cal, n_boot=n_boot, seed=seed) if cal is not None else {}
    rows = []
    for g, grp in pages.groupby("group", sort=True):
        done = grp[grp["status"] == "done"]
        keyed = done[done["keyed"]]
        ref = float(keyed["ref_chars"].sum())
        m_lo, m_hi = (bootstrap_ratio_ci(keyed["edits"].to_numpy(), keyed["ref_chars"].to_numpy(), n_boot=n_boot,
                                         level=level, seed=seed) if len(keyed) >= 2 else (None, None))
        br, b_lo, b_hi, n_chk = balance_rate(done["balance"], level)
        row: dict[str, Any] = {
            "group": str(g), "pages": int(len(grp)), "pages_done": int(len(done)),
            "pages_failed": int(len(grp) - len(done)), "lines": int(done["lines"].sum()),
            "keyed_pages": int(len(keyed)),
            "measured_cer": float(keyed["edits"].sum()) / ref if ref > 0 else None,
            "measured_low": m_lo, "measured_high": m_hi,
            "balance_rate": br, "balance_low": b_lo, "balance_high": b_hi, "checkable_pages": n_chk,
            "flagged_share": float(grp["flagged"].mean()) if len(grp) else None,
            "queued_lines": int(done["queued"].sum()),
        }
        row.update(est.get(g, {"est_cer": None, "est_low": None, "est_high": None, "factor": None,
                                "beyond_range": None, "extrapolated": False}))
        rows.append(row)
    return rows


def _lines_of(system: System, pages: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Confidences (NaN left out) and page rows of the lines on the given page rows."""
    ln = system.lines
    pg = ln["page"].to_numpy()
    c = ln["confidence"].to_numpy(np.float64)
    keep = np.isin(pg, pages) & ~np.isnan(c)
    return c[keep], pg[keep]


def _reference(system: System, group: str) -> np.ndarray:
    """Page rows of the calibrated population without ``group`` (see :mod:`ocrbench.quality.drift`)."""
    p = system.pages
    calibrated = set(p.loc[p["keyed"], "group"])
    ok = (p["status"] == "done") & p["group"].isin(calibrated - {group})
    return np.flatnonzero(ok.to_numpy())


def drift_flags(system: System, cal: Calibration, rows: list[dict[str, Any]], *, alpha: float = DEFAULT_ALPHA,
                permutations: int = 999, seed: int = 0) -> None:
    """Add a ``drift`` entry to each row (in place): KS on confidence with Holm, CER and balance shifts."""
    tests, refs = [], []
    groups = system.pages["group"].to_numpy()
    for k, row in enumerate(rows):
        ref = _reference(system, row["group"])
        refs.append(ref)
        own = np.flatnonzero((groups == row["group"]) & (system.pages["status"] == "done").to_numpy())
        a, pa = _lines_of(system, ref)
        b, pb = _lines_of(system, own)
        if a.size == 0 or b.size == 0:
            tests.append((None, None, None))
            continue
        d, p = ks_page_permutation(a, pa, b, pb, permutations=permutations, seed=seed + k)
        tests.append((d, p, float(np.median(b)) - float(np.median(a))))
    adjusted = holm([t[1] for t in tests])
    for row, (d, p, shift), p_adj, ref in zip(rows, tests, adjusted, refs):
        reasons = []
        if p_adj is not None and p_adj < alpha:
            reasons.append(f"confidence distribution differs from the calibrated collections' (KS D = {d:.3f}, "
                           f"Holm-adjusted p = {p_adj:.3g}; median confidence {shift:+.4f})")
        est = row.get("est_cer")
        cer_shift = None
        if est is not None and cal.cer is not None and cal.cer_low is not None and cal.cer_high is not None:
            cer_shift = est - cal.cer
            if not cal.cer_low <= est <= cal.cer_high:
                ratio = f", {est / cal.cer:.2f}x" if cal.cer > 0 else ""
                reasons.append(f"estimated CER {100 * est:.2f}% outside the keyed sample's "
                               f"{100 * cal.cer_low:.2f}-{100 * cal.cer_high:.2f}% ({100 * cer_shift:+.2f} points{ratio})")
        bal, lo, hi = row.get("balance_rate"), row.get("balance_low"), row.get("balance_high")
        r, r_lo, r_hi, _ = balance_rate(system.pages["balance"].iloc[ref]) if ref.size else (None, None, None, 0)
        bal_shift = None
        if bal is not None and r is not None:
            bal_shift = bal - r
            if hi < r_lo or lo > r_hi:      # the two Wilson intervals do not overlap
                reasons.append(f"balance rate {100 * bal:.0f}% [{100 * lo:.0f}-{100 * hi:.0f}] against "
                               f"{100 * r:.0f}% [{100 * r_lo:.0f}-{100 * r_hi:.0f}] in the calibrated collections "
                               f"({100 * bal_shift:+.0f} points)")
        row["drift"] = {"flagged": bool(reasons), "reasons": reasons, "ks_d": d, "ks_p": p, "ks_p_holm": p_adj,
                        "median_confidence_shift": shift, "cer_shift": cer_shift, "balance_shift": bal_shift,
                        "reference_pages": int(ref.size)}


def quality(store: Path | str, *, truth: Path | None = None, by: str = "collection", profile: str = "nfc",
            lexicon: Lexicon | None = None, post: bool = False, runs: Sequence[int] | None = None,
            queue_doubt: float = DEFAULT_QUEUE_DOUBT, level: float = 0.95, n_boot: int = 400,
            permutations: int = 999, alpha: float = DEFAULT_ALPHA, seed: int = 0,
            with_pages: bool = False, agreement: bool = False) -> dict[str, Any]:
    """Quality figures of a run store, per recogniser and group (see the package notes).

    ``agreement``: line doubt also weighs two recognisers' disagreement where both read the same pages
    (:func:`ocrbench.quality.data.systems_of`).

    ``with_pages``: each system also carries ``pages``, a DataFrame of per-page estimates
    (:func:`ocrbench.quality.estimate.estimate_pages`; None without keyed pages) — not JSON.
    """
    snap = read_snapshot(store, post=post)
    out: dict[str, Any] = {"store": str(store), "by": by, "level": level, "truth": None if truth is None else str(truth),
                           "queue_doubt": queue_doubt, "range_tolerance": RANGE_TOLERANCE, "alpha": alpha,
                           "agreement": agreement, "systems": []}
    for system in systems_of(snap, by=by, truth=truth, profile=profile, lexicon=lexicon, queue_doubt=queue_doubt,
                             runs=runs, agreement=agreement):
        cal = calibrate(system, level=level, n_boot=n_boot, seed=seed)
        rows = group_rows(system, cal, level=level, n_boot=n_boot, seed=seed)
        if cal is not None:
            drift_flags(system, cal, rows, alpha=alpha, permutations=permutations, seed=seed)
        out["systems"].append({"recogniser": system.name, "card_hash": system.card_hash, "runs": system.run_ids,
                               "calibration": None if cal is None else cal.to_dict(), "groups": rows,
                               "problems": system.problems, "notes": system.notes})
        if with_pages:
            out["systems"][-1]["pages"] = (estimate_pages(system, cal, n_boot=n_boot, seed=seed)
                                           if cal is not None else None)
    return out
