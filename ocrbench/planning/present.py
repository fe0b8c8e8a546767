"""The plan for people: the side-by-side table's labels and cells, and the plan's statements.

Kept here (not in the command) so every label carries the plan's currency the
same way wherever the plan is printed, and no printed time can be negative.
"""

from __future__ import annotations

from typing import Callable

import pandas as pd

from ocrbench.planning.decide import money_text
from ocrbench.planning.numerics import format_duration
from ocrbench.planning.options import option_statements


def _amount(v) -> str:
    """A quantity with sensible precision: 12,345 / 123.4 / 1.23 / 0.00123."""
    if v is None or v != v:
        return "-"
    a = abs(v)
    return f"{v:,.0f}" if a >= 1000 else f"{v:.1f}" if a >= 10 else f"{v:.3g}"


def _num(v, spec=",.0f") -> str:
    return "-" if v is None or v != v else format(v, spec)


def _yes(v) -> str:
    return "unknown" if v is None or v != v else ("yes" if v else "NO")


def _dur(v) -> str:
    return "-" if v is None or v != v else format_duration(max(0.0, float(v)))


def _pct(v) -> str:
    return "-" if v is None or v != v else f"{100 * v:.0f}%"


def table_lines(table: pd.DataFrame) -> tuple[list[str], list[tuple[str, list[str]]]]:
    """(column heads, [(label, cells)]) of the side-by-side plan; money labels name the currency."""
    rows = table.to_dict(orient="records")
    cur = table.attrs.get("currency")
    unit = cur or "no currency given"

    def money(v) -> str:
        return "-" if v is None or v != v else (f"{v:,.2f}" if abs(v) >= 0.01 or v == 0 else f"{v:.2g}")

    def priced(r, key, key_hi) -> str:
        return f"{money(r[key])} / {money(r[key_hi])}" if r[key] is not None else "unpriced"

    spec: list[tuple[str, Callable]] = [
        ("pages", lambda r: _num(r["pages"])),
        ("characters (P50)", lambda r: _num(r["characters"])),
        ("resources", lambda r: f"{r['machines']} x {r['workers']} workers x {r['threads']} threads"),
        ("jobs x start-up each", lambda r: f"{r['jobs']} x {_dur(r['startup_seconds_per_job'])}"
         + (f" + Dask cluster {_dur(r['cluster_start_seconds'])}" if r.get("cluster_start_seconds") else "")),
        ("recognition wall-clock P10", lambda r: _dur(r["wall_seconds_p10"])),
        ("recognition wall-clock P50", lambda r: _dur(r["wall_seconds_p50"])),
        ("recognition wall-clock P90", lambda r: _dur(r["wall_seconds_p90"])),
        ("  of the P10-P90 band, machine drift", lambda r: _pct(r["band_drift_share"])),
        ("core-hours (P50 / P90)", lambda r: f"{_amount(r['core_hours'])} / {_amount(r['core_hours_p90'])}"),
        (f"compute cost, {unit} (P50 / P90)", lambda r: priced(r, "compute_cost", "compute_cost_p90")),
        ("CER (95% interval)", lambda r: "-" if r["cer"] is None else
         f"{100 * r['cer']:.2f}% ({100 * r['cer_low']:.2f}-{100 * r['cer_high']:.2f})"),
        ("character errors", lambda r: "-" if r["char_errors"] is None else
         f"{r['char_errors']:,.0f} ({r['char_errors_low']:,.0f}-{r['char_errors_high']:,.0f})"),
        ("review mode", lambda r: r["review_mode"]),
        ("reading hours", lambda r: _amount(r["review_hours"])),
        ("correction hours", lambda r: "unknown (no CER)" if r["correction_hours"] is None else
         f"{_amount(r['correction_hours'])} ({_amount(r['correction_hours_low'])}-"
         f"{_amount(r['correction_hours_high'])})"),
        ("errors left in the text", lambda r: "-" if r["errors_left"] is None else _num(r["errors_left"])),
        ("correctors (given / needed)", lambda r: f"{r['correctors'] or '-'} / {_num(r['correctors_needed'])}"),
        ("correction time, upper", lambda r: _dur(r["people_seconds_high"])),
        (f"people cost, {unit} (P50 / high)", lambda r: priced(r, "people_cost", "people_cost_high")),
        (f"total cost, {unit} (P50 / high)", lambda r: "not a total: " + "; ".join(r["unpriced"] + r["unknown"])
         if r["cost"] is None else f"{money(r['cost'])} / {money(r['cost_high'])}"),
        ("share compute / people", lambda r: f"{_pct(r['compute_share'])} / {_pct(r['people_share'])}"),
        ("meets deadline (recognition P90 and correction)", lambda r: _yes(r["meets_deadline"]) + (
            "" if r["p_meets_deadline"] is None else f" ({100 * r['p_meets_deadline']:.0f}%)")),
        ("  recognition alone", lambda r: _yes(r["recognition_meets_deadline"])),
        ("  correction alone", lambda r: _yes(r["correction_meets_deadline"])),
        ("meets budget", lambda r: _yes(r["meets_budget"])),
        ("ground truth to transcribe", lambda r: "-" if r.get("gt_sample_pages") is None else
         f"{r['gt_sample_pages']:,} pages"),
        ("fit R² batch / page", lambda r: f"{r['fit_r2_batch']:.3f} / {r['fit_r2_page']:.3f}"),
        ("extrapolated", lambda r: "yes" if r["extrapolated"] else "no"),
    ]
    heads = [f"{r['recogniser']} ({r['kind']})\n{r['profile']}" for r in rows]
    return heads, [(label, [fn(r) for r in rows]) for label, fn in spec]


def statements(table: pd.DataFrame) -> list[tuple[str, str]]:
    """(kind, text) lines under the table: choice, configurations, crossover, ground truth, warnings, assumptions."""
    out: list[tuple[str, str]] = []
    rec = table.attrs.get("recommendation") or {}
    if rec.get("text"):
        out.append(("Choice", rec["text"]))
    out += option_statements(table)
    cur = table.attrs.get("currency")
    for c in table.attrs.get("configurations") or []:
        cost = "" if c["cost"] is None else f", cost {money_text(c['cost'], cur)}"
        head = f"#{c['rank']}" if c["rank"] else "excluded"
        out.append(("Configuration", f"{head} {c['recogniser']} on {c['profile']}: {c['machines']} x {c['workers']} "
                                     f"workers x {c['threads']} threads"
                                     + (f", batch {c['batch_size']}" if c.get("batch_size") else "")
                                     + f", P50 {_dur(c['wall_seconds_p50'])} "
                                     f"({_dur(c['wall_seconds_p10'])}-{_dur(c['wall_seconds_p90'])}){cost}"
                                     + (f" — {c['excluded']}" if c["excluded"] else "")))
    for c in table.attrs.get("crossover", []):
        out.append(("Crossover", c["text"]))
    for name, s in (table.attrs.get("sample_sizes") or {}).items():
        if s.get("pages"):
            width = (f"±{100 * s['relative_margin']:.0f}% of the CER ({100 * s['pilot_rate']:.2f}%), i.e. "
                     f"±{100 * s['half_width']:.3g} points" if s.get("margin") == "relative"
                     else f"±{100 * s['half_width']:.3g} points")
            by = s.get("by_collection")
            out.append(("Ground truth", f"{name}: transcribe {s['pages']:,} pages"
                        + (f" (~{s['lines']:,} lines)" if s.get("lines") else "") + f" for a CER interval of {width}"
                        + (" — by collection: " + ", ".join(f"{c or '(top folder)'} {k}" for c, k in by.items())
                           if by else "")))
        for n in s.get("notes") or []:
            out.append(("Ground truth", f"{name}: {n}"))
    out += [("warning", w) for w in table.attrs.get("warnings", [])]
    out += [("assumption", a) for a in table.attrs.get("assumptions", [])]
    return out
