"""The numbers of a report, gathered once into a JSON-ready summary and a few tables.

Why first the numbers, then the page: the HTML, the CSV/Parquet tables, the
JSON summary and the demo's console lines are all written from the one
summary built here, so a figure cannot differ between them.

What is gathered, per run (by default the latest run of each recogniser in
the store):

* counts and throughput: pages done and failed, lines, characters, pages per
  hour on the measuring machine (one stream: 3600 x pages / sum of page
  times) with a 95 % bootstrap interval over pages;
* the decode-time slope: least-squares time per line against characters per
  line, with a bootstrap interval over pages (the autoregressive recogniser's
  slope is what makes it slower on long lines);
* with ground truth: CER, WER, per-class error rates (the digit error rate
  among them) with bootstrap intervals, for the raw text and, where the
  store holds it, the post-processed text; a paired comparison of every two
  recognisers on their common pages; the worst pages with their lines;
* without ground truth too: the ledger arithmetic check of every page, raw
  and post-processed, and the misread rate of amounts it implies;
* with a plan: each recogniser's archive wall-clock, cost and deadline/budget
  fit, and the wall-clock against the number of workers.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from ocrbench import __version__
from ocrbench.accuracy.normalise import get_profile
from ocrbench.accuracy.evaluate import (PostText, System, TruthReader, compare, read_truth_pages, score_systems,
                                        store_systems)
from ocrbench.accuracy.stats import bootstrap_ratio_ci, bootstrap_sums, percentile_interval
from ocrbench.errors import PlanError, StoreError
from ocrbench.io.tables import json_ready
from ocrbench.planning.service import PlanRequest, PlanResults, compute_plan, plan_from_results
from ocrbench.quality.summary import quality
from ocrbench.store import RunStore

__all__ = ["ReportData", "build_report_data", "CAUTIONS", "resolve", "FORMAT_VERSION"]

FORMAT_VERSION = "ocrbench-report/1"

CAUTIONS = (
    "Every figure here is an estimate from a sample of pages: read the interval (95 %, bootstrap over pages, "
    "unless stated), not only the middle value. Archive plans are P10-P90 ranges from a cost model fitted "
    "on this store's timings; they hold for machines like the one measured.",
    "This report contains excerpts of the pages' text and of the ground truth. Archives hold personal data: "
    "handle this report, its tables and its JSON summary under the holder's data-protection rules, "
    "like the scans themselves.",
    "Throughput was measured on the machine named under 'Runs', with the settings shown; another machine, "
    "other threads or a busy machine give other figures.",
)

#: Worst pages shown per recogniser, and lines shown per page.
WORST_PAGES = 2
WORST_LINES = 6

#: Bootstrap rounds of the quality section at most (each refits the doubt-to-error map; ``ocrbench quality``'s
#: own default), and the permutations of its drift test.
QUALITY_BOOT = 400
QUALITY_PERMUTATIONS = 999

_MAX_POINTS = 3000     # line points per recogniser drawn in the decode-time figure


@dataclass
class ReportData:
    """The summary (JSON-ready), the tables written as CSV/Parquet, and what the figures are drawn from."""

    summary: dict
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    page_scores: dict[str, pd.DataFrame] = field(default_factory=dict)   # run key -> Scores.pages (raw)
    line_times: pd.DataFrame | None = None                              # run, kind, n_chars, t_line

    def to_json(self) -> str:
        return json.dumps(self.summary, ensure_ascii=False, indent=1, allow_nan=False)


def resolve(summary: Mapping, path: str) -> Any:
    """The value at a dotted JSON path (``recognisers.0.accuracy.cer``); KeyError when absent."""
    cur: Any = summary
    for part in path.split("."):
        if isinstance(cur, list):
            cur = cur[int(part)]
        else:
            cur = cur[part]
    return cur


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


# --------------------------------------------------------------------------- runs


def _select_runs(runs: pd.DataFrame, run_ids: Sequence[int] | None,
                 measuring: set[int] = frozenset()) -> pd.DataFrame:
    """The runs to show: those asked for, else the latest ordinary run of each recogniser.

    ``measuring``: runs that ``measure-scaling`` wrote. They are passed over while the recogniser has
    an ordinary run, so every recogniser's pages per hour comes from the same kind of run.
    """
    if runs.empty:
        raise StoreError("the store holds no runs: run 'ocrbench run' first")
    if run_ids is not None:
        sel = runs[runs["run_id"].isin([int(r) for r in run_ids])]
        missing = sorted(set(int(r) for r in run_ids) - set(sel["run_id"].astype(int)))
        if missing:
            raise StoreError(f"the store holds no run {missing[0]}")
        return sel.sort_values("run_id")
    # a routed run's re-reading holds only the routed lines (ocrbench/run/routed.py): listed only when asked for
    runs = runs[[_json(x).get("route_role") != "slow" for x in runs["settings_json"]]]
    ordered = runs.assign(_measuring=runs["run_id"].astype(int).isin(measuring)).sort_values(
        ["_measuring", "run_id"], ascending=[False, True])
    latest = ordered.groupby("recogniser", sort=False).tail(1)    # an ordinary run sorts last, so it wins
    return latest.drop(columns="_measuring").sort_values("run_id")


def _measuring_runs(store: Path) -> set[int]:
    """Run ids that ``measure-scaling`` timed (its ``scaling`` table); none in a store without one."""
    from ocrbench.planning.inputs import load_scaling

    ids = load_scaling(store)["run_id"].dropna()
    return {int(r) for r in ids}


def _json(text: Any) -> dict:
    try:
        return json.loads(text) if isinstance(text, str) and text else {}
    except json.JSONDecodeError:
        return {}


def _throughput(t_total: np.ndarray, n_boot: int, seed: int) -> dict:
    t = t_total[np.isfinite(t_total)]
    busy = float(t.sum())
    if len(t) == 0 or busy <= 0:
        return {"pages_per_hour": None, "pages_per_hour_low": None, "pages_per_hour_high": None,
                "page_seconds_p50": None, "page_seconds_p90": None}
    lo, hi = bootstrap_ratio_ci(np.full(len(t), 3600.0), t, n_boot=n_boot, seed=seed)
    return {"pages_per_hour": 3600.0 * len(t) / busy, "pages_per_hour_low": lo, "pages_per_hour_high": hi,
            "page_seconds_p50": float(np.percentile(t, 50)), "page_seconds_p90": float(np.percentile(t, 90))}


def _slope(lines: pd.DataFrame, n_boot: int, seed: int) -> dict:
    """Least-squares seconds per extra character of a line (t_line on n_chars), bootstrap over pages."""
    d = lines.dropna(subset=["n_chars", "t_line"])
    out = {"line_seconds_mean": None, "seconds_per_char": None, "seconds_per_char_low": None,
           "seconds_per_char_high": None, "line_seconds_at_0": None, "seconds_per_char_clipped": False}
    if len(d) < 3 or d["n_chars"].nunique() < 2:
        return out
    y = d["t_line"].to_numpy(float)
    g = d.groupby("page_id", sort=False)
    sums = pd.DataFrame({"n": g.size(), "x": g["n_chars"].sum(), "y": g["t_line"].sum(),
                         "xx": (d["n_chars"] ** 2).groupby(d["page_id"], sort=False).sum(),
                         "xy": (d["n_chars"] * d["t_line"]).groupby(d["page_id"], sort=False).sum()}).to_numpy(float)

    def fit(s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        n, sx, sy, sxx, sxy = (s[..., k] for k in range(5))
        den = n * sxx - sx * sx
        with np.errstate(invalid="ignore", divide="ignore"):
            b = np.where(den > 0, (n * sxy - sx * sy) / den, np.nan)
            a = np.where(n > 0, (sy - b * sx) / n, np.nan)
        return b, a

    b, a = fit(sums.sum(axis=0))
    out.update(line_seconds_mean=float(y.mean()), seconds_per_char=float(b), line_seconds_at_0=float(a))
    if len(sums) >= 2:
        boot = bootstrap_sums(sums, n_boot=n_boot, seed=seed)
        bb, _ = fit(boot)
        ci = percentile_interval(bb, 0.95)
        if ci is not None:
            out.update(seconds_per_char_low=ci[0], seconds_per_char_high=ci[1])
    # A longer line cannot take less model time: a bound (or estimate) below zero is sampling noise of a
    # flat slope, so it is clipped at 0 and the clipping recorded (the report says so).
    below = [k for k in ("seconds_per_char", "seconds_per_char_low", "seconds_per_char_high")
             if out[k] is not None and out[k] < 0]
    for k in below:
        out[k] = 0.0
    out["seconds_per_char_clipped"] = bool(below)
    return out


def _balance(lines: pd.DataFrame, column: str) -> dict | None:
    from ocrbench.postprocess import balance_lines_frame, estimate_misreads

    if lines.empty or column not in lines or lines[column].isna().all():
        return None
    frame = balance_lines_frame(lines[["page_id", "line_no", column]].rename(columns={column: "text"}))
    counts = frame["status"].value_counts()
    est = estimate_misreads(list(frame["balance"]))
    balanced, unbalanced = int(counts.get("balanced", 0)), int(counts.get("unbalanced", 0))
    # The misread rate is shown only where the check could judge a page: pages counted as failed only
    # because an amount was unreadable would otherwise give "100 %" for text nobody could check.
    checkable = balanced + unbalanced > 0
    return {"pages": int(len(frame)), "balanced": balanced, "unbalanced": unbalanced,
            "not_checkable": int(counts.get("not checkable", 0)), "checkable": checkable,
            "misread_rate": est.per_amount_rate if checkable else None,
            "misread_low": est.per_amount_low if checkable else None,
            "misread_high": est.per_amount_high if checkable else None, "amounts": est.amounts, "model": est.model}


# --------------------------------------------------------------------------- accuracy


def _accuracy(scores) -> dict:
    s = scores.summary
    cls = s.get("classes") or {}
    digit = cls.get("digit") or {}
    return {
        "pages_scored": s["pages"], "ref_chars": s["ref_chars"], "char_edits": s["char_edits"],
        "cer": s["cer"], "cer_low": s["cer_low"], "cer_high": s["cer_high"],
        "wer": s["wer"], "wer_low": s["wer_low"], "wer_high": s["wer_high"],
        "cer_page_mean": s.get("cer_page_mean"),
        "digit_error_rate": digit.get("rate"), "digit_low": digit.get("low"), "digit_high": digit.get("high"),
        "subs": s.get("subs"), "dels": s.get("dels"), "ins": s.get("ins"),
        "classes": {name: {k: c.get(k) for k in ("ref_chars", "errors", "rate", "low", "high", "inserted",
                                                 "ins_rate", "recipe")}
                    for name, c in cls.items()},
        "confusions": (s.get("confusions") or [])[:10],
        "amounts": s.get("amounts"),
        "line_count_mismatch": s.get("line_count_mismatch", []),
        "empty_reference": s.get("empty_reference", []),
        "recipe": s["recipe"], "recipes": s.get("recipes", {}),
    }


def _worst(run: dict, scores, n_pages: int, n_lines: int) -> list[dict]:
    pages = scores.pages.dropna(subset=["cer"])
    pages = pages[pages["char_edits"] > 0].sort_values(["cer", "page_id"], ascending=[False, True]).head(n_pages)
    out = []
    lines = scores.lines
    flagged = {f["page_id"]: f["flags"] for f in run.get("flagged", [])}
    for p in pages.itertuples(index=False):
        ln = lines[(lines["page_id"] == p.page_id) & (lines["char_edits"] > 0)]
        shown = ln.sort_values("char_edits", ascending=False, kind="stable").head(n_lines)
        shown = shown.sort_values("line_no", kind="stable", na_position="first")
        out.append({
            "recogniser": run["name"], "run_id": run["run_id"], "page_id": p.page_id, "cer": float(p.cer),
            "char_edits": int(p.char_edits), "ref_chars": int(p.ref_chars), "pairing": p.pairing,
            "flags": flagged.get(p.page_id, []),
            "lines_with_edits": int(len(ln)), "lines_shown": int(len(shown)),
            "lines": [{"line_no": None if pd.isna(r.line_no) else int(r.line_no), "ref": r.ref, "hyp": r.hyp,
                       "char_edits": int(r.char_edits), "ref_chars": int(r.ref_chars)}
                      for r in shown.itertuples(index=False)],
        })
    return out


# --------------------------------------------------------------------------- the report's numbers


def build_report_data(store: Path | str, *, truth: Path | str | None = None,
                      plan: PlanRequest | PlanResults | None = None, profile: str = "nfc",
                      run_ids: Sequence[int] | None = None, n_boot: int = 2000, seed: int = 0,
                      worst_pages: int = WORST_PAGES, worst_lines: int = WORST_LINES, currency: str = "",
                      curve_max_workers: int = 16, title: str | None = None) -> ReportData:
    """Gather every figure of a report from a run store (plus ground truth and a plan when given).

    ``profile``: normalisation profile for scoring (see :mod:`ocrbench.accuracy.normalise`).
    ``run_ids``: the runs to show (default: the latest run of each recogniser).
    ``plan``: a plan request (computed with the planner, calibrated on this store unless it names
    other stores) or plan results (shown as given); ``currency`` labels its money.
    Raises StoreError, TextFileError (the truth folder) or PlanError for what stops the whole report;
    a single unreadable ground-truth file is listed in the summary and its page left out.
    """
    store = Path(store)
    prof = get_profile(profile)
    with RunStore(store, read_only=True) as st:
        frames = st.read_frames()
        measuring = _measuring_runs(store)
        sel = _select_runs(frames["runs"], run_ids, measuring)
        recipes = {int(r): st.post_recipe(int(r)) for r in sel["run_id"]}
    runs, line_times, page_rows = _gather_runs(sel, frames, recipes, n_boot, seed, measuring)
    summary: dict[str, Any] = {
        "format": FORMAT_VERSION, "title": title or f"Recogniser comparison: {store.name}",
        "generated_at": _now(), "ocrbench_version": __version__, "store": str(store),
        "truth": str(truth) if truth is not None else None, "profile": prof.name if truth is not None else None,
        "profile_summary": prof.summary if truth is not None else None,
        "recognisers": runs, "paired": [], "truth_pairing": None, "worst_pages": [], "plan": None,
        "cautions": list(CAUTIONS),
    }
    data = ReportData(summary=summary)
    if truth is not None:
        _add_accuracy(data, store, Path(truth), frames, prof, n_boot, seed, worst_pages, worst_lines)
    else:
        for run in runs:
            run["accuracy"] = run["accuracy_post"] = None
    _add_quality(data, store, Path(truth) if truth is not None else None, prof.name, sel["run_id"].tolist(),
                 min(n_boot, QUALITY_BOOT), seed)
    if plan is not None:
        _add_plan(data, store, frames, plan, currency, curve_max_workers, truth)
    else:
        for run in runs:
            run["plan"] = None
    data.tables["recognisers"] = pd.DataFrame([_flat_row(r) for r in runs])
    if page_rows:
        data.tables["pages"] = pd.concat(page_rows, ignore_index=True)
    if line_times:
        data.line_times = pd.concat(line_times, ignore_index=True)
        data.tables["line_times"] = data.line_times
    if summary["paired"]:
        data.tables["paired"] = pd.DataFrame(summary["paired"])
    summary["figures"] = figure_index(summary)
    data.summary = json_ready(summary)
    return data


def _gather_runs(sel: pd.DataFrame, frames: Mapping[str, pd.DataFrame], recipes: Mapping[int, str | None],
                 n_boot: int, seed: int, measuring: set[int] = frozenset()
                 ) -> tuple[list[dict], list[pd.DataFrame], list[pd.DataFrame]]:
    """Per selected run: its summary entry (counts, throughput, slope, balance), line times and page rows."""
    pages_f, lines_f = frames["pages"], frames["lines"]
    runs, line_times, page_rows = [], [], []
    for r in sel.itertuples(index=False):
        rid = int(r.run_id)
        pg = pages_f[pages_f["run_id"] == rid]
        done = pg[pg["status"] == "done"]
        ln = lines_f[(lines_f["run_id"] == rid) & lines_f["page_id"].isin(done["page_id"])]
        run = {
            "name": r.recogniser, "kind": r.kind, "run_id": rid, "card_hash": r.card_hash,
            "purpose": "measure-scaling" if rid in measuring else "run",
            "card_path": r.card_path, "input_dir": r.input_dir, "engine": r.engine,
            "ocrbench_version": r.ocrbench_version, "started_at": r.started_at, "finished_at": r.finished_at,
            "host": _json(r.host_json), "settings": _json(r.settings_json),
            "pages_done": int(len(done)), "pages_failed": int((pg["status"] == "failed").sum()),
            "lines": int(len(ln)), "chars": int(ln["n_chars"].fillna(0).sum()),
            "has_post": bool(ln["text_post"].notna().any()) if len(ln) else False,
            "post_recipe": recipes.get(rid),
            "failures": [{"page_id": p, "error": e} for p, e in
                         pg.loc[pg["status"] == "failed", ["page_id", "error"]].itertuples(index=False)],
            # pages the sanity check flagged (blank, not text-like, turned; pages/sanity.py), none in old stores
            "flagged": [{"page_id": p, "flags": str(f).split(",")} for p, f in
                        done[["page_id", "flags"]].itertuples(index=False) if isinstance(f, str) and f],
        }
        run.update(_throughput(done["t_total"].to_numpy(float), n_boot, seed))
        run.update(_slope(ln, n_boot, seed))
        run["throughput_recipe"] = (f"pages-per-hour=3600*pages/sum(page t_total);stream=one worker;"
                                    f"threads={run['settings'].get('intra_threads', '?')};"
                                    f"batch={run['settings'].get('batch_size', '?')};"
                                    f"ci=boot-pages/{n_boot}/95%/seed{seed};host={run['host'].get('hostname', '?')}")
        run["balance"] = {"raw": _balance(ln, "text"), "post": _balance(ln, "text_post") if run["has_post"] else None}
        runs.append(run)
        lt = ln[["page_id", "n_chars", "t_line", "steps"]].copy()
        lt.insert(0, "kind", r.kind)
        lt.insert(0, "recogniser", r.recogniser)
        lt.insert(0, "run_id", rid)
        line_times.append(lt)
        pr = done[["page_id", "collection", "flags", "n_lines", "t_total", "width", "height", "skew_degrees"]].copy()
        pr.insert(0, "recogniser", r.recogniser)
        pr.insert(0, "run_id", rid)
        page_rows.append(pr)
    return runs, line_times, page_rows


def _add_accuracy(data: ReportData, store: Path, truth_dir: Path, frames: Mapping[str, pd.DataFrame], prof,
                  n_boot: int, seed: int, worst_pages: int, worst_lines: int) -> None:
    """Score every shown run (raw, and post-processed where stored) against the truth folder."""
    summary = data.summary
    runs = {run["run_id"]: run for run in summary["recognisers"]}
    pages_f = frames["pages"]
    done_ids = pages_f.loc[pages_f["run_id"].isin(list(runs)) & (pages_f["status"] == "done"), "page_id"]
    reader = TruthReader()
    gt, pairing, unreadable = read_truth_pages(truth_dir, sorted(set(done_ids)), reader)
    summary["truth_pairing"] = {"pages_paired": len(gt), "pages_without_truth": list(pairing.hyp_only),
                                "truth_without_page": list(pairing.truth_only), "unreadable_truth": unreadable}
    systems, _ = store_systems(store, truth_dir, list(runs), PostText.WHERE_STORED)
    score_systems(systems, profile=prof, classes=True, n_boot=n_boot, seed=seed, reader=reader)
    class_rows, worst, score_pages_rows = [], [], []
    for run in runs.values():
        run["accuracy"] = run["accuracy_post"] = None
    for s in systems:
        run = runs[s.run_id]
        if not s.scored:
            continue
        acc = _accuracy(s.scores)
        run["accuracy" if s.text == "raw" else "accuracy_post"] = acc
        for cname, c in acc["classes"].items():
            class_rows.append({"run_id": s.run_id, "recogniser": run["name"], "text": s.text, "class": cname,
                               **{k: c[k] for k in ("ref_chars", "errors", "rate", "low", "high", "inserted",
                                                    "ins_rate")}})
        sp = s.scores.pages.copy()
        sp.insert(0, "text", s.text)
        sp.insert(0, "recogniser", run["name"])
        sp.insert(0, "run_id", s.run_id)
        score_pages_rows.append(sp)
        if s.text == "raw":
            data.page_scores[str(s.run_id)] = s.scores.pages
            worst += _worst(run, s.scores, worst_pages, worst_lines)
        else:
            data.page_scores[f"{s.run_id}/post"] = s.scores.pages
    summary["worst_pages"] = worst
    summary["paired"] = _paired(systems, runs, n_boot, seed)
    if class_rows:
        data.tables["classes"] = pd.DataFrame(class_rows)
    if score_pages_rows:
        sp = pd.concat(score_pages_rows, ignore_index=True)
        keep = [c for c in ("run_id", "recogniser", "text", "page_id", "pairing", "ref_lines", "hyp_lines",
                            "ref_chars", "char_edits", "cer", "ref_words", "word_edits", "wer", "subs",
                            "dels", "ins") if c in sp]
        data.tables["page_scores"] = sp[keep]
    if worst:
        data.tables["worst_lines"] = pd.DataFrame([
            {"recogniser": w["recogniser"], "page_id": w["page_id"], "page_cer": w["cer"], **ln}
            for w in worst for ln in w["lines"]])


_PAIRED_KEYS = ("a", "b", "metric", "pages", "value_a", "value_b", "diff", "low", "high", "p_value", "p_floor",
                "p_at_floor",
                "winner", "method", "level", "n_boot", "seed")


def _paired(systems: Sequence[System], runs: Mapping[int, dict], n_boot: int, seed: int) -> list[dict]:
    """Every two runs with raw accuracy, compared on raw text, then on post-processed text where both have it."""
    scored = [rid for rid, r in runs.items() if r.get("accuracy")]
    by_key = {(s.run_id, s.text): s for s in systems if s.scored}
    out = []
    for i, ra in enumerate(scored):
        for rb in scored[i + 1:]:
            for which in ("raw", "post"):
                sa, sb = by_key.get((ra, which)), by_key.get((rb, which))
                if sa is None or sb is None:
                    continue
                # names are the recognisers' (the report's rows), not the systems' labels
                cmp = compare(System(runs[ra]["name"], ra, None, sa.pairing, sa.load, scores=sa.scores),
                              System(runs[rb]["name"], rb, None, sb.pairing, sb.load, scores=sb.scores),
                              n_boot=n_boot, seed=seed)
                if "error" in cmp:
                    out.append({"a": cmp["a"], "b": cmp["b"], "text": which, "error": cmp["error"]})
                else:
                    out.append({"text": which, **{k: cmp.get(k) for k in _PAIRED_KEYS}})
    return out


_QUALITY_KEYS = ("group", "pages", "pages_done", "pages_failed", "lines", "keyed_pages", "est_cer", "est_low",
                 "est_high", "extrapolated", "beyond_range", "measured_cer", "measured_low", "measured_high",
                 "balance_rate", "balance_low", "balance_high", "checkable_pages", "flagged_share", "queued_lines")


def _add_quality(data: ReportData, store: Path, truth: Path | None, profile: str, run_ids: Sequence[int],
                 n_boot: int, seed: int) -> None:
    """The quality section: per recogniser and collection, estimated and measured CER, balance, flags, drift.

    Figures from :func:`ocrbench.quality.summary.quality` on the shown runs; ``missing`` says in words what
    could not be computed (no ground truth, or none of the shown pages keyed), so the page says so instead
    of showing a column of blanks.
    """
    res = quality(store, truth=truth, by="collection", profile=profile, runs=run_ids, n_boot=n_boot,
                  permutations=QUALITY_PERMUTATIONS, seed=seed)
    systems, rows = [], []
    for sysq in res["systems"]:
        cal = sysq["calibration"]
        groups = []
        for g in sysq["groups"]:
            row = {k: g.get(k) for k in _QUALITY_KEYS}
            d = g.get("drift")
            row["drift"] = None if d is None else {k: d.get(k) for k in (
                "flagged", "reasons", "ks_d", "ks_p_holm", "median_confidence_shift", "cer_shift", "balance_shift",
                "reference_pages")}
            groups.append(row)
            flat = {k: v for k, v in row.items() if k != "drift"}
            flat.update({"drifted": None if d is None else d["flagged"],
                         "drift_reasons": None if d is None else "; ".join(d["reasons"]),
                         "ks_d": None if d is None else d["ks_d"], "ks_p_holm": None if d is None else d["ks_p_holm"]})
            rows.append({"recogniser": sysq["recogniser"], "runs": ",".join(map(str, sysq["runs"])), **flat})
        if truth is None:
            missing = ("no ground truth was given, so no page is keyed: no estimated or measured CER and no drift "
                       "test (give --truth with hand-keyed pages; 'ocrbench sample' picks which to key)")
        elif cal is None:
            missing = ("none of this recogniser's pages has usable ground truth (a keyed page with as many lines as "
                       "were read): no estimated CER and no drift test")
        else:
            missing = None
        systems.append({"recogniser": sysq["recogniser"], "runs": sysq["runs"], "groups": groups, "missing": missing,
                        "calibration": None if cal is None else {k: cal.get(k) for k in (
                            "pages", "lines", "edits", "cer", "cer_low", "cer_high", "doubt_range", "method")},
                        "problems": sysq["problems"], "notes": sysq["notes"][:5],
                        "notes_left_out": max(0, len(sysq["notes"]) - 5)})
    data.summary["quality"] = {"by": "collection", "level": res["level"], "queue_doubt": res["queue_doubt"],
                               "alpha": res["alpha"], "range_tolerance": res["range_tolerance"], "n_boot": n_boot,
                               "permutations": QUALITY_PERMUTATIONS, "seed": seed, "systems": systems}
    if rows:
        data.tables["quality"] = pd.DataFrame(rows)


#: The plan's fields that hold money, and what each amount is per (its unit is the currency and this).
MONEY_FIELDS = {"compute_cost": "", "compute_cost_p90": "", "correction_cost": "", "correction_cost_high": "",
                "people_cost": "", "people_cost_high": "", "cost": "", "cost_high": "", "budget": "",
                "spec.budget": "", "spec.price_core_hour": " per core-hour",
                "spec.price_machine_hour": " per machine-hour", "spec.correction_price_hour": " per hour of correction",
                "configurations.cost": "", "configurations.cost_high": ""}


def _add_plan(data: ReportData, store: Path, frames: Mapping[str, pd.DataFrame],
              plan: PlanRequest | PlanResults, currency: str, curve_max_workers: int,
              truth: Path | str | None = None) -> None:
    """The plan section: given results as they are, or a request computed on this store."""
    summary = data.summary
    runs = summary["recognisers"]
    if isinstance(plan, PlanRequest) and currency:
        if plan.currency and plan.currency != currency:
            raise PlanError(f"the plan's amounts are in {plan.currency} and the report was asked for {currency}: "
                            "give one currency")
        plan = dataclasses.replace(plan, currency=currency)
    if isinstance(plan, PlanResults):
        summary["plan"] = plan_from_results(plan)
    else:
        accuracy, gt_pages = {}, {}
        for run in runs:
            post = run.get("accuracy_post")
            acc = post or run.get("accuracy")
            if acc and acc.get("cer") is not None and acc.get("cer_low") is not None:
                accuracy[run["name"]] = (acc["cer"], acc["cer_low"], acc["cer_high"])
                key = f"{run['run_id']}/post" if post else str(run["run_id"])
                if key in data.page_scores:
                    gt_pages[run["name"]] = data.page_scores[key]
        summary["plan"] = compute_plan(store, frames, plan, runs, accuracy=accuracy, page_scores=gt_pages,
                                       curve_max_workers=curve_max_workers, truth=truth)
        summary["plan"]["accuracy_source"] = ("the post-processed text where stored, else the raw text"
                                              if accuracy else None)
    summary["plan"]["currency"] = cur = currency or summary["plan"].get("currency")
    # every amount of money in the plan section and its rows, with its unit (ISO 4217 code)
    summary["plan"]["units"] = {k: (cur or "no currency given") + per for k, per in MONEY_FIELDS.items()}
    for row in summary["plan"]["rows"].values():
        row["currency"] = cur
    for run in runs:
        run["plan"] = summary["plan"]["rows"].get(run["name"])
    if summary["plan"]["curve"]:
        data.tables["plan_curve"] = pd.DataFrame(summary["plan"]["curve"])
    data.tables["plan"] = pd.DataFrame([{"recogniser": k, **v} for k, v in summary["plan"]["rows"].items()])


def _flat_row(run: dict) -> dict:
    row = {k: run.get(k) for k in ("name", "kind", "run_id", "card_hash", "pages_done", "pages_failed", "lines",
                                   "chars", "pages_per_hour", "pages_per_hour_low", "pages_per_hour_high",
                                   "page_seconds_p50", "page_seconds_p90", "seconds_per_char",
                                   "seconds_per_char_low", "seconds_per_char_high")}
    for key in ("accuracy", "accuracy_post"):
        acc = run.get(key) or {}
        pre = "" if key == "accuracy" else "post_"
        for k in ("cer", "cer_low", "cer_high", "wer", "wer_low", "wer_high", "digit_error_rate", "digit_low",
                  "digit_high"):
            row[pre + k] = acc.get(k)
        row[pre + "recipe"] = acc.get("recipe")
    plan = run.get("plan") or {}
    for k in ("wall_seconds_p10", "wall_seconds_p50", "wall_seconds_p90", "cost", "cost_high", "meets_deadline",
              "meets_budget", "currency"):
        row["plan_" + k] = plan.get(k)
    return row


# --------------------------------------------------------------------------- figures


def figure_index(summary: Mapping) -> list[dict]:
    """The report's figures: id, title, whether it can be drawn (and why not), and its recipe string."""
    runs = summary["recognisers"]
    has_acc = any(r.get("accuracy") for r in runs)
    profile = summary.get("profile") or "-"
    plan = summary.get("plan")
    ci = "boot-pages/95%"
    figs = [
        {"id": "accuracy-throughput", "title": "Accuracy against throughput",
         "shown": has_acc and any(r.get("pages_per_hour") for r in runs),
         "why_not": None if has_acc else "no ground truth was given, so accuracy was not measured",
         "recipe": f"x=pages-per-hour(one worker, this machine, {ci});y=cer(codepoint,profile={profile},corpus,{ci});"
                   "marker=raw filled, post-processed open"},
        {"id": "class-errors", "title": "Error rate by character class",
         "shown": has_acc, "why_not": None if has_acc else "no ground truth was given",
         "recipe": f"y=class-error(subs+dels charged to the truth character's class)/truth chars of the class;"
                   f"profile={profile};corpus;{ci};insertions not included;raw text"},
        {"id": "page-cer", "title": "Distribution of CER per page",
         "shown": has_acc, "why_not": None if has_acc else "no ground truth was given",
         "recipe": f"y=share of pages with page CER <= x;page CER=(S+D+I)/N per page;profile={profile};"
                   "pages with empty truth left out;raw text"},
        {"id": "decode-time", "title": "Decode time per line against characters per line",
         "shown": any(r.get("lines") for r in runs), "why_not": "no recognised lines in the store",
         "recipe": "y=t_line (line's share of its batch's model+decode time);x=recognised characters in the line;"
                   f"line=least squares;at most {_MAX_POINTS} points drawn per recogniser (seeded sample), fit on all"},
        {"id": "plan-workers", "title": "Planned wall-clock against workers",
         "shown": bool(plan and plan.get("curve")),
         "why_not": ("no plan was given" if not plan else "the plan came as results; no curve to draw"),
         "recipe": ("y=archive wall-clock P50 with P10-P90 band (Monte Carlo over cost-model refits, page "
                    f"distribution and residuals);x={(plan or {}).get('curve_axis') or 'workers'};"
                    f"pages={((plan or {}).get('spec') or {}).get('pages', '-')}")},
        {"id": "cost-accuracy", "title": "Archive cost against accuracy",
         "shown": bool(plan and any(r.get("cost") is not None and r.get("cer") is not None
                                    for r in (plan.get("rows") or {}).values())),
         "why_not": ("no plan was given" if not plan else "the plan has no cost or no accuracy for its options"),
         "recipe": ("x=cer(corpus, 95% interval, post-processed text where stored);y=archive cost P50 "
                    "(compute + correction) with a bar up to its high end;line=budget")},
    ]
    opts = (plan or {}).get("options") or []
    if plan and (plan.get("target") or any(o.get("kind") == "route" for o in opts)):    # else no such figure
        figs.insert(5, {"id": "plan-frontier", "title": "Options: cost against CER, with the frontier",
                        "shown": sum(o.get("cer") is not None for o in opts) > 1,
                        "why_not": "fewer than two options have a CER (give ground truth)",
                        "recipe": ("x=cer(calibration pages' ground truth, 95% interval; routes: each line's kept "
                                   "reading, scored as score does);y=archive cost P50 (compute + people, or "
                                   "core-hours where money is not known) with a bar up to its high end;"
                                   "route=fast all lines + share x slow;line=frontier;filled=chosen;"
                                   "dashed=target CER (upper bound)")})
    q = summary.get("quality") or {}
    est = any(g.get("est_cer") is not None for sq in q.get("systems") or [] for g in sq["groups"])
    figs.append(
        {"id": "quality-cer", "title": "Estimated CER per collection", "section": "quality", "shown": est,
         "why_not": ("no ground truth was given, so nothing calibrates an estimate" if not summary.get("truth")
                     else "no shown page has usable ground truth to calibrate an estimate"),
         "recipe": (f"x=estimated CER per collection (doubt-to-error map by isotonic regression on keyed lines x "
                    f"gamma-Poisson collection factor; keyed pages count as measured);bar={round(100 * q.get('level', 0.95))}% "
                    f"interval (boot-pages/{q.get('n_boot')}, map and factor redrawn);marker=recogniser;"
                    f"drifted=black triangle and the word 'drifted' beside the bar (KS on confidence with page "
                    f"permutation, Holm; or CER or balance rate outside the calibration's);open mark=extrapolated "
                    f"beyond the calibrated doubt range;x log-scaled above 0.1 % when the CERs span over 30x")})
    for f in figs:
        if f["shown"]:
            f["why_not"] = None
    return figs
