"""What to key next: a stratified sample of pages, and a keying template for each.

Strata are collection × doubt band (``bands`` bands of page mean doubt, cut at
the quantiles of all candidate pages). Pages are allocated to strata by the
optimum allocation for a fixed budget (W. G. Cochran, *Sampling Techniques*,
3rd ed. 1977, §5.5, from memory): n_h ∝ N_h·S_h/√c_h, where N_h is the
stratum's candidate pages, S_h the standard deviation of its pages' expected
edits, and c_h the cost of keying one of its pages. With ``--pages`` every page
costs the same and this is Neyman allocation (§5.6); with ``--lines`` a page
costs its lines, and the budget is met as Σ n_h·c_h ≤ lines with c_h the
stratum's mean lines a page (the chosen pages meet it on average, not exactly). A stratum
allotted more than it holds is taken whole and the rest re-allocated among the
others (§5.8). Whole pages come from rounding by largest remainder. When no
stratum shows any spread, the allocation falls back to proportional (n_h ∝ N_h).

Expected edits of a page: Σ rate(doubt)·characters with the calibrated map
(:mod:`.estimate`) when keyed pages exist, else Σ doubt·characters (a proxy that
only needs to rank the strata's spreads). Within a stratum pages are drawn by
simple random sampling (seeded), so the sample stays a probability sample.

With a relative ``margin`` instead of a budget, each collection gets the pages
its CER needs to be known within ±margin × CER at the given level: errors are
taken as binomial over characters, n₀ = z²(1 − p)/(m²p) characters for a
collection CER p (the normal-approximation sample size for a proportion with a
relative margin; Cochran §4.4 and §4.6, from memory), pages n = n₀/c̄ for c̄
characters a page, with the finite population correction n/(1 + n/N) over the
collection's N pages (§4.4), rounded up. Characters on one page share a font
and a scan, so errors cluster and the binomial count is a floor: where the
collection already holds at least :data:`MIN_KEYED_FOR_SPREAD` keyed pages, the
ratio estimate's own sample size is used when larger, n₀ = z² S_d²/(m² R² x̄²)
with S_d² the variance of the keyed pages' e_i − R c_i (R their CER, x̄ their
mean characters; §6.4, from memory). p is the collection's estimated CER
(:func:`ocrbench.quality.estimate.estimate_groups`), else the keyed sample's.
Pages already keyed count towards n; the rest are allocated over the
collection's doubt bands by Neyman allocation as above.

The template of a page holds its recognised text, one line per recognised
line, at the path ``score --truth`` and ``quality --truth`` look for
(``<folder>/<stem>.txt`` mirroring the page id): correct it in place and
it is ground truth.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd

from ocrbench.errors import InputError, TextFileError
from ocrbench.io.text import truth_candidates
from ocrbench.quality.data import Snapshot, System, collections
from ocrbench.quality.estimate import Calibration

__all__ = ["neyman_allocation", "pages_for_lines", "SamplePlan", "plan_sample", "write_sample", "template_path",
           "binomial_chars", "ratio_chars", "pages_for_margin", "margin_targets", "MIN_KEYED_FOR_SPREAD"]

#: Keyed pages a collection needs before their page-to-page spread sets its sample size (see the notes).
MIN_KEYED_FOR_SPREAD = 3


def _z(level: float) -> float:
    from statistics import NormalDist

    return NormalDist().inv_cdf(0.5 + level / 2)


def binomial_chars(cer: float, margin: float, level: float = 0.95) -> float:
    """Characters to key for a CER ``cer`` known within ±``margin``×cer at ``level``: z²(1 − p)/(m²p)."""
    if not 0 < cer < 1 or margin <= 0:
        raise ValueError("the CER must lie strictly between 0 and 1 and the margin be positive")
    return _z(level) ** 2 * (1 - cer) / (margin * margin * cer)


def ratio_chars(edits: Sequence[float], chars: Sequence[float], margin: float, level: float = 0.95) -> float | None:
    """Characters to key by the ratio estimate's variance over keyed pages: z² S_d²/(m² R² x̄²) pages × x̄.

    S_d² = Σ(e_i − R c_i)²/(n − 1), R = Σe/Σc, x̄ = mean c (Cochran §6.4, from memory). None with fewer than two
    pages or no error on them (the variance then says nothing)."""
    e, c = np.asarray(edits, dtype=np.float64), np.asarray(chars, dtype=np.float64)
    if e.size < 2 or e.sum() <= 0 or c.sum() <= 0:
        return None
    r = e.sum() / c.sum()
    sd2 = float(((e - r * c) ** 2).sum()) / (e.size - 1)
    xbar = float(c.mean())
    return _z(level) ** 2 * sd2 / (margin * margin * r * r * xbar * xbar) * xbar


def pages_for_margin(chars_needed: float, chars_per_page: float, population: int) -> int:
    """Whole pages for ``chars_needed`` characters at ``chars_per_page``, finite population corrected
    (n/(1 + n/N), Cochran §4.4), rounded up and never more than the ``population`` of N pages."""
    if population <= 0 or chars_per_page <= 0:
        return 0
    n0 = chars_needed / chars_per_page
    return int(min(population, math.ceil(n0 / (1 + n0 / population) - 1e-9)))


def _round_largest_remainder(quotas: np.ndarray, total: int) -> np.ndarray:
    base = np.floor(quotas + 1e-9).astype(np.int64)
    rest = total - int(base.sum())
    if rest > 0:
        order = np.argsort(-(quotas - base), kind="stable")
        base[order[:rest]] += 1
    return base


def neyman_allocation(sizes: Sequence[int], sds: Sequence[float], n: int, *,
                      costs: Sequence[float] | None = None) -> list[int]:
    """Whole units per stratum for a total of ``n`` units: n_h ∝ N_h·S_h/√c_h, capped at N_h.

    Cochran, Sampling Techniques, §5.5–5.6 (optimum and Neyman allocation) and §5.8 (strata
    where the formula asks for more than N_h are taken whole; the rest is re-allocated).
    """
    N = np.asarray(sizes, dtype=np.int64)
    S = np.asarray(sds, dtype=np.float64)
    c = np.ones(len(N)) if costs is None else np.asarray(costs, dtype=np.float64)
    if not (len(N) == len(S) == len(c)):
        raise ValueError("sizes, sds and costs differ in length")
    n = int(min(max(n, 0), N.sum()))
    if not np.any(N * S > 0):
        S = np.ones(len(N))          # no spread anywhere: proportional allocation
    out = np.zeros(len(N), dtype=np.int64)
    free = N > 0
    left = n
    while left > 0 and free.any():
        key = np.where(free, N * S / np.sqrt(c), 0.0)
        if key.sum() <= 0:
            key = np.where(free, N.astype(np.float64), 0.0)
        quota = left * key / key.sum()
        over = free & (quota >= N - out)
        if over.any():               # §5.8: take these strata whole, re-allocate the rest
            left -= int((N - out)[over].sum())
            out[over] = N[over]
            free &= ~over
            continue
        out += _round_largest_remainder(quota, left)
        left = 0
    return out.tolist()


def pages_for_lines(sizes: np.ndarray, sds: np.ndarray, costs: np.ndarray, lines: int) -> list[int]:
    """Cochran §5.5 with the budget in lines: n = lines · Σ(N_h S_h/√c_h) / Σ(N_h S_h √c_h)."""
    s = sds if np.any(sizes * sds > 0) else np.ones(len(sizes))
    den = float((sizes * s * np.sqrt(costs)).sum())
    n = int(math.floor(lines * float((sizes * s / np.sqrt(costs)).sum()) / den + 1e-9)) if den > 0 else 0
    alloc = np.asarray(neyman_allocation(sizes, s, n, costs=costs))
    while n > 0 and float((alloc * costs).sum()) > lines:     # capping can raise the cost: shrink to the budget
        n -= 1
        alloc = np.asarray(neyman_allocation(sizes, s, n, costs=costs))
    return alloc.tolist()


@dataclass
class SamplePlan:
    """The chosen pages (``pages``), the allocation per stratum (``strata``) and the text of each chosen page."""

    pages: pd.DataFrame
    strata: pd.DataFrame
    texts: dict[tuple[int, str], list[str]]
    method: str
    targets: pd.DataFrame | None = None     # with a margin: per collection, the CER used and the pages it needs


def _expected_edits(system: System, cal: Calibration | None) -> np.ndarray:
    ln = system.lines
    d = ln["doubt"].to_numpy(np.float64)
    rate = cal.fit(d) if cal is not None else d
    return np.bincount(ln["page"].to_numpy(np.int64), weights=rate * ln["chars"].to_numpy(np.float64),
                       minlength=len(system.pages))


def margin_targets(system: System, cal: Calibration | None, cand: pd.DataFrame, margin: float,
                   level: float = 0.95) -> pd.DataFrame:
    """Per collection of the candidates: the CER used, the characters and pages its margin needs, the pages
    keyed already and the pages still to key (see the module notes)."""
    from ocrbench.quality.estimate import estimate_groups

    if cal is None or cal.cer is None:
        raise InputError(system.name, "a relative margin needs an estimate of each collection's CER, and no page "
                         "of this recogniser is keyed: key a first sample (--pages or --lines) and pass it as --truth")
    est = estimate_groups(system, cal, n_boot=50, seed=0)
    pg = system.pages
    rows = []
    for coll, g in cand.groupby("collection", sort=True):
        keyed = pg[pg["keyed"] & (collections(pg) == coll)]
        e = est.get(coll) or {}
        cer, source = e.get("est_cer"), "estimated CER of the collection"
        if not cer:
            cer, source = (e.get("est_high"), "upper bound of the collection's estimate (estimate 0)") if e.get(
                "est_high") else (cal.cer_high, "upper bound of the keyed sample's CER")
        need = binomial_chars(float(cer), margin, level)
        how = "binomial"
        if len(keyed) >= MIN_KEYED_FOR_SPREAD:
            rc = ratio_chars(keyed["edits"], keyed["ref_chars"], margin, level)
            if rc is not None and rc > need:
                need, how = rc, "ratio estimate over its keyed pages"
        total = pages_for_margin(need, float(g["chars"].mean()), len(g) + len(keyed))
        rows.append({"collection": coll, "cer": float(cer), "cer_source": source, "chars_needed": need,
                     "size_from": how, "chars_per_page": float(g["chars"].mean()), "pages_needed": total,
                     "keyed": int(len(keyed)), "to_key": int(min(len(g), max(0, total - len(keyed))))})
    return pd.DataFrame(rows, columns=["collection", "cer", "cer_source", "chars_needed", "size_from",
                                       "chars_per_page", "pages_needed", "keyed", "to_key"])


def _allocate(st: pd.DataFrame, pages: int | None, lines: int | None, targets: pd.DataFrame | None) -> list[int]:
    """Pages per stratum: one budget over all strata, or each collection's own pages (margin) over its bands."""
    N, S, c = st["N"].to_numpy(), st["S"].to_numpy(np.float64), st["cost"].to_numpy(np.float64)
    if targets is None:
        return neyman_allocation(N, S, pages) if pages is not None else pages_for_lines(N, S, c, int(lines))
    n = np.zeros(len(st), dtype=np.int64)
    want = dict(zip(targets["collection"], targets["to_key"]))
    for coll in st["collection"].unique():
        k = np.flatnonzero((st["collection"] == coll).to_numpy())
        n[k] = neyman_allocation(N[k], S[k], int(want.get(coll, 0)))
    return n.tolist()


def plan_sample(snap: Snapshot, system: System, cal: Calibration | None, *, pages: int | None = None,
                lines: int | None = None, margin: float | None = None, level: float = 0.95,
                run_id: int | None = None, bands: int = 3, seed: int = 0) -> SamplePlan:
    """Choose pages of ``run_id`` (default: the system's run with most pages) to key next: ``pages`` or
    ``lines`` in all, or what each collection needs for a relative ``margin`` on its CER at ``level``."""
    if sum(x is not None for x in (pages, lines, margin)) != 1:
        raise ValueError("give exactly one of pages, lines or margin")
    p = system.pages.copy()
    p["expected_edits"] = _expected_edits(system, cal)
    if run_id is None:
        run_id = int(p.loc[p["status"] == "done", "run_id"].value_counts().idxmax()) if len(p) else -1
    cand = p[(p["run_id"] == run_id) & (p["status"] == "done") & ~p["keyed"] & (p["lines"] > 0)].copy()
    cand["collection"] = collections(cand)
    if len(cand):
        cuts = np.unique(np.quantile(cand["mean_doubt"], np.linspace(0, 1, bands + 1)[1:-1]))
        cand["band"] = np.searchsorted(cuts, cand["mean_doubt"].to_numpy(), side="right") + 1
    else:
        cand["band"] = pd.Series(dtype=np.int64)
    st = (cand.groupby(["collection", "band"], sort=True)
          .agg(N=("page_id", "size"), S=("expected_edits", lambda x: float(np.std(x, ddof=1)) if len(x) > 1 else 0.0),
               cost=("lines", "mean")).reset_index())
    targets = margin_targets(system, cal, cand, margin, level) if margin is not None else None
    st["n"] = _allocate(st, pages, lines, targets)
    rng = np.random.default_rng(seed)
    chosen = []
    for (coll, band), n in zip(zip(st["collection"], st["band"]), st["n"]):
        g = cand[(cand["collection"] == coll) & (cand["band"] == band)].sort_values("page_id")
        if n > 0:
            chosen.append(g.iloc[np.sort(rng.choice(len(g), int(n), replace=False))])
    out = (pd.concat(chosen) if chosen else cand.iloc[:0]).sort_values("page_id").reset_index(drop=True)
    want = set(zip(out["run_id"], out["page_id"]))
    texts: dict[tuple[int, str], list[str]] = {}
    for (rid, pid), g in snap.lines.groupby(["run_id", "page_id"], sort=False):
        if (rid, pid) in want:
            texts[(int(rid), str(pid))] = [t.replace("\r", " ").replace("\n", " ")
                                           for t in g.sort_values("line_no")["text"]]
    how = ("Neyman allocation (Cochran, Sampling Techniques, 5.6) of pages" if pages is not None
           else "optimum allocation for a budget of lines (Cochran, Sampling Techniques, 5.5)" if lines is not None
           else (f"pages for a CER margin of +-{100 * margin:g} % relative at {100 * level:g} % per collection "
                 "(binomial over characters, finite population corrected; Cochran 4.4), Neyman allocation"))
    return SamplePlan(out[["run_id", "page_id", "collection", "band", "lines", "mean_doubt", "expected_edits"]],
                      st, texts, how + " over collection x doubt-band strata; simple random sampling within strata",
                      targets)


def template_path(out_dir: Path, page_id: str) -> Path:
    """Where the keying template (and so the ground truth) of a page goes under ``out_dir``."""
    return Path(out_dir) / truth_candidates(page_id)[0]


def write_sample(plan: SamplePlan, out_dir: Path | str) -> tuple[Path, list[Path]]:
    """Write ``sample.csv`` (the chosen pages, with their template) and one template per page.

    A template file that already exists (perhaps keyed already) is left as it is and listed.
    Returns the CSV's path and the templates left alone.
    """
    out = Path(out_dir)
    table = plan.pages.copy()
    table["template"] = [str(template_path(out, pid).relative_to(out)) for pid in table["page_id"]]
    kept: list[Path] = []
    try:
        out.mkdir(parents=True, exist_ok=True)
        for rid, pid, rel in zip(table["run_id"], table["page_id"], table["template"]):
            path = out / rel
            path.parent.mkdir(parents=True, exist_ok=True)
            if path.exists():
                kept.append(path)
                continue
            path.write_text("".join(f"{t}\n" for t in plan.texts.get((int(rid), str(pid)), [])), encoding="utf-8")
        csv = out / "sample.csv"
        table.to_csv(csv, index=False)
    except OSError as e:
        raise TextFileError(out, f"cannot write the sample ({e.strerror or e})") from e
    return csv, kept
