"""The report's figures, drawn with matplotlib (Agg) and kept as inline SVG text.

Design: black and greys only, so a figure prints and photocopies as it
looks on screen; recognisers are told apart by marker shape, line style and
bar hatching, never by colour alone. Text stays text in the SVG
(``svg.fonttype = 'none'``): it can be searched and read by a screen reader,
and the SVG needs no font file. matplotlib escapes the XML special characters
of every label it writes; dollar signs are escaped here so a name is never
read as mathematical notation.

Each function takes the report's summary (and the line timings for the
decode-time figure) and returns an SVG string, or None when there is nothing
to draw. :func:`svg_inline` strips what an inline SVG must not carry (the XML
prologue, the metadata block) and gives every ``id`` a prefix so several SVGs
can share one HTML page.
"""

from __future__ import annotations

import io
import re
from typing import Any, Mapping

import numpy as np
import pandas as pd

__all__ = ["render_figures", "svg_inline", "STYLE"]

INK = "0.0"
GREYS = ("0.0", "0.35", "0.6", "0.2", "0.5")
MARKERS = ("o", "s", "^", "D", "v", "P")
LINESTYLES = ("-", "--", ":", "-.", (0, (5, 1, 1, 1, 1, 1)), (0, (1, 3)))
HATCHES = ("", "///", "...", "xx", "\\\\\\", "++")

STYLE: dict[str, Any] = {
    "svg.fonttype": "none",
    "svg.hashsalt": "ocrbench-report",       # stable ids: the same data gives the same SVG
    "font.family": "DejaVu Sans",
    "font.size": 9,
    "axes.edgecolor": INK,
    "axes.labelcolor": INK,
    "axes.linewidth": 0.8,
    "axes.grid": True,
    "grid.color": "0.85",
    "grid.linewidth": 0.5,
    "grid.linestyle": "-",
    "axes.spines.top": False,
    "axes.spines.right": False,
    "xtick.color": INK,
    "ytick.color": INK,
    "legend.frameon": False,
    "figure.dpi": 96,
    "lines.linewidth": 1.4,
    "hatch.linewidth": 0.6,
}


def _label(text: Any) -> str:
    """A label safe from mathtext: a ``$`` would start mathematical notation."""
    return str(text).replace("\\", "\\\\").replace("$", r"\$")


def _plt():
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    return plt


def _to_svg(fig) -> str:
    plt = _plt()
    buf = io.StringIO()
    fig.savefig(buf, format="svg", bbox_inches="tight", metadata={"Date": None, "Creator": None})
    plt.close(fig)
    return buf.getvalue()


_PROLOGUE = re.compile(r"<\?xml[^>]*\?>\s*|<!DOCTYPE[^>]*>\s*", re.S)
_METADATA = re.compile(r"<metadata>.*?</metadata>\s*", re.S)


def svg_inline(svg: str, prefix: str, *, title: str | None = None) -> str:
    """An SVG document made fit to sit inside HTML: no prologue, no metadata, ids prefixed with ``prefix``.

    ``title`` becomes the SVG's accessible name (``role="img"`` and ``aria-label``).
    """
    import html as _html

    s = _PROLOGUE.sub("", svg)
    s = _METADATA.sub("", s)
    s = re.sub(r'\bid="([^"]+)"', lambda m: f'id="{prefix}-{m.group(1)}"', s)
    s = re.sub(r'(xlink:href|href)="#([^"]+)"', lambda m: f'{m.group(1)}="#{prefix}-{m.group(2)}"', s)
    s = re.sub(r"url\(#([^)]+)\)", lambda m: f"url(#{prefix}-{m.group(1)})", s)
    if title:
        s = s.replace("<svg ", f'<svg role="img" aria-label="{_html.escape(title, quote=True)}" ', 1)
    return s.strip()


def _style(i: int) -> dict:
    return {"color": GREYS[i % len(GREYS)], "marker": MARKERS[i % len(MARKERS)],
            "linestyle": LINESTYLES[i % len(LINESTYLES)], "hatch": HATCHES[i % len(HATCHES)]}


def _legend(ax) -> None:
    """The legend under the plot (outside the axes), so it never covers a point or a line."""
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        ax.figure.legend(handles, labels, loc="outside lower center", ncol=2, fontsize=8, handlelength=3.2)


def _err(value, low, high) -> list[list[float]]:
    lo = value - low if low is not None else 0.0
    hi = high - value if high is not None else 0.0
    return [[max(0.0, lo)], [max(0.0, hi)]]


# --------------------------------------------------------------------------- figures


def accuracy_throughput(summary: Mapping) -> str | None:
    runs = [r for r in summary["recognisers"] if r.get("accuracy") and r.get("pages_per_hour")]
    if not runs:
        return None
    plt = _plt()
    from matplotlib.transforms import ScaledTranslation
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(6.4, 4.2), layout="constrained")
        xs = []
        for i, r in enumerate(summary["recognisers"]):
            if r not in runs:
                continue
            st = _style(i)
            x = r["pages_per_hour"]
            xs.append(x)
            xerr = _err(x, r.get("pages_per_hour_low"), r.get("pages_per_hour_high"))
            both = bool(r.get("accuracy_post"))
            for key, filled, tag, dodge in (("accuracy", True, "raw", -5.0), ("accuracy_post", False,
                                                                            "post-processed", 5.0)):
                acc = r.get(key)
                if not acc or acc.get("cer") is None:
                    continue
                y = 100 * acc["cer"]
                yerr = _err(y, None if acc["cer_low"] is None else 100 * acc["cer_low"],
                            None if acc["cer_high"] is None else 100 * acc["cer_high"])
                eb = ax.errorbar([x], [y], xerr=xerr, yerr=yerr, fmt=st["marker"], color=st["color"],
                                 mfc=st["color"] if filled else "white", mec=st["color"], ms=7, capsize=3,
                                 elinewidth=1.0, label=_label(f"{r['name']} ({r['kind']}, {tag})"))
                if both:   # raw and post-processed share one throughput: drawn 5 points apart, bars never overlap
                    shift = ScaledTranslation(dodge / 72, 0, fig.dpi_scale_trans)
                    for artist in eb.get_children():
                        artist.set_transform(artist.get_transform() + shift)
            ax.annotate(_label(r["name"]), (x, 100 * r["accuracy"]["cer"]), textcoords="offset points",
                        xytext=(8, 6), fontsize=8)
        if xs and max(xs) / max(min(xs), 1e-9) > 20:
            ax.set_xscale("log")
        ax.set_xlabel("pages per hour, one worker on the measuring machine (95 % interval)")
        ax.set_ylabel("CER, % (95 % interval)")
        ax.set_ylim(bottom=0)
        ax.set_xlim(left=0 if ax.get_xscale() == "linear" else None)
        _legend(ax)
        ax.set_title("Lower is more accurate; further right is faster", fontsize=9, loc="left")
        return _to_svg(fig)


def class_errors(summary: Mapping) -> str | None:
    from ocrbench.accuracy.align import CLASSES

    runs = [r for r in summary["recognisers"] if r.get("accuracy") and r["accuracy"].get("classes")]
    if not runs:
        return None
    classes = [c for c in CLASSES if any((r["accuracy"]["classes"].get(c) or {}).get("ref_chars") for r in runs)]
    if not classes:
        return None
    plt = _plt()
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(6.4, 4.0), layout="constrained")
        width = 0.8 / len(runs)
        x = np.arange(len(classes))
        for k, r in enumerate(runs):
            i = summary["recognisers"].index(r)
            st = _style(i)
            vals, lo, hi = [], [], []
            for c in classes:
                cc = r["accuracy"]["classes"].get(c) or {}
                v = cc.get("rate")
                vals.append(100 * v if v is not None else 0.0)
                lo.append(max(0.0, vals[-1] - 100 * cc["low"]) if cc.get("low") is not None else 0.0)
                hi.append(max(0.0, 100 * cc["high"] - vals[-1]) if cc.get("high") is not None else 0.0)
            ax.bar(x + (k - (len(runs) - 1) / 2) * width, vals, width * 0.92, yerr=[lo, hi], capsize=2,
                   facecolor="white" if st["hatch"] else "0.75", edgecolor=INK, hatch=st["hatch"],
                   linewidth=0.8, error_kw={"elinewidth": 0.9, "ecolor": INK},
                   label=_label(f"{r['name']} ({r['kind']})"))
        ax.set_xticks(x, [f"{c}\n({(runs[0]['accuracy']['classes'].get(c) or {}).get('ref_chars', 0):,} chars)"
                          for c in classes])
        ax.set_ylabel("errors per truth character of the class, %")
        ax.set_ylim(bottom=0)
        ax.grid(axis="x", visible=False)
        _legend(ax)
        return _to_svg(fig)


def page_cer(summary: Mapping, page_scores: Mapping[str, pd.DataFrame]) -> str | None:
    runs = [r for r in summary["recognisers"] if str(r["run_id"]) in page_scores]
    if not runs:
        return None
    plt = _plt()
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(6.4, 3.8), layout="constrained")
        drawn = False
        for r in runs:
            i = summary["recognisers"].index(r)
            st = _style(i)
            v = np.sort(100 * page_scores[str(r["run_id"])]["cer"].dropna().to_numpy(float))
            if not len(v):
                continue
            y = np.arange(1, len(v) + 1) / len(v)
            ax.step(np.concatenate([[0.0], v]), np.concatenate([[0.0], y]), where="post", color=st["color"],
                    linestyle=st["linestyle"], label=_label(f"{r['name']} ({len(v)} pages)"))
            ax.plot(v, y, linestyle="none", marker=st["marker"], ms=3.5, color=st["color"], mfc="white")
            drawn = True
        if not drawn:
            plt.close(fig)
            return None
        ax.set_xlabel("CER of the page, %")
        ax.set_ylabel("share of pages at or below")
        ax.set_ylim(0, 1.02)
        ax.set_xlim(left=0)
        _legend(ax)
        return _to_svg(fig)


def decode_time(summary: Mapping, line_times: pd.DataFrame | None, *, seed: int = 0) -> str | None:
    if line_times is None or line_times.empty:
        return None
    plt = _plt()
    rng = np.random.default_rng(seed)
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(6.4, 4.2), layout="constrained")
        drawn = False
        for i, r in enumerate(summary["recognisers"]):
            d = line_times[line_times["run_id"] == r["run_id"]].dropna(subset=["n_chars", "t_line"])
            if d.empty:
                continue
            st = _style(i)
            if len(d) > 3000:
                d = d.iloc[np.sort(rng.choice(len(d), 3000, replace=False))]
            ax.plot(d["n_chars"], 1000 * d["t_line"], linestyle="none", marker=st["marker"], ms=3, mfc="none",
                    mew=0.6, color=st["color"], alpha=0.7)
            b, a = r.get("seconds_per_char"), r.get("line_seconds_at_0")
            label = f"{r['name']} ({r['kind']})"
            if b is not None and a is not None:
                xs = np.array([0.0, float(d["n_chars"].max())])
                ax.plot(xs, 1000 * (a + b * xs), color=INK, linestyle=st["linestyle"], linewidth=1.6,
                        label=_label(f"{label}: {1000 * b:.2f} ms per character"))
            else:
                ax.plot([], [], color=INK, linestyle=st["linestyle"], marker=st["marker"], label=_label(label))
            drawn = True
        if not drawn:
            plt.close(fig)
            return None
        ax.set_xlabel("characters in the line (as read)")
        ax.set_ylabel("model + decode time per line, ms")
        ax.set_xlim(left=0)
        ax.set_ylim(bottom=0)
        _legend(ax)
        return _to_svg(fig)


def plan_workers(summary: Mapping) -> str | None:
    plan = summary.get("plan") or {}
    curve = pd.DataFrame(plan.get("curve") or [])
    if curve.empty:
        return None
    plt = _plt()
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(6.4, 4.2), layout="constrained")
        names = [r["name"] for r in summary["recognisers"]]
        for name, d in curve.groupby("recogniser", sort=False):
            i = names.index(name) if name in names else 0
            st = _style(i)
            d = d.sort_values("workers")
            h = 1 / 3600
            # a light solid band (hatching only tells a second recogniser's band apart), edged at P10 and P90
            ax.fill_between(d["workers"], d["wall_seconds_p10"] * h, d["wall_seconds_p90"] * h,
                            facecolor="0.88", edgecolor="none", alpha=0.7, hatch=st["hatch"] or None)
            for q in ("wall_seconds_p10", "wall_seconds_p90"):
                ax.plot(d["workers"], d[q] * h, color=st["color"], linestyle=":", linewidth=0.7)
            ax.plot(d["workers"], d["wall_seconds_p50"] * h, color=st["color"], linestyle=st["linestyle"],
                    marker=st["marker"], ms=4, mfc="white", label=_label(f"{name}: P50, band P10-P90"))
        spec = plan.get("spec") or {}
        deadline = next((r.get("deadline_seconds") for r in (plan.get("rows") or {}).values()
                         if r.get("deadline_seconds")), None)
        top = float(curve["wall_seconds_p90"].max()) / 3600
        if deadline and deadline / 3600 <= 3 * top:
            ax.axhline(deadline / 3600, color=INK, linestyle=(0, (6, 3)), linewidth=1.0)
            ax.annotate(f"deadline ({spec.get('deadline') or ''})", (curve["workers"].max(), deadline / 3600),
                        textcoords="offset points", xytext=(-4, 4), ha="right", fontsize=8)
        elif deadline:
            # far above every bar: a line there would squash the curves into the bottom of the plot
            ax.annotate(f"deadline ({spec.get('deadline') or ''}, {deadline / 3600:,.0f} h) is above this plot: "
                        "every P90 here is under a third of it", xy=(0.99, 0.98), xycoords="axes fraction", ha="right", va="top",
                        fontsize=8)
        ax.set_yscale("log")
        ax.set_xlabel(_label(f"workers ({plan.get('curve_axis') or 'as planned'})"))
        ax.set_ylabel(_label(f"wall-clock for {spec.get('pages', 0):,} pages, hours"))
        _legend(ax)
        return _to_svg(fig)


def cost_accuracy(summary: Mapping) -> str | None:
    """The plan's options: archive cost (point, and the bar up to its high end) against their CER interval."""
    plan = summary.get("plan") or {}
    rows = {k: v for k, v in (plan.get("rows") or {}).items() if v.get("cost") is not None and v.get("cer") is not None}
    if not rows:
        return None
    names = [r["name"] for r in summary["recognisers"]]
    chosen = (plan.get("recommendation") or {}).get("recogniser")
    cur = plan.get("currency") or "no currency given"
    plt = _plt()
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(6.4, 4.0), layout="constrained")
        for name, r in rows.items():
            st = _style(names.index(name) if name in names else 0)
            x, y = 100 * r["cer"], float(r["cost"])
            xerr = _err(x, None if r.get("cer_low") is None else 100 * r["cer_low"],
                        None if r.get("cer_high") is None else 100 * r["cer_high"])
            yerr = _err(y, None, r.get("cost_high"))
            ax.errorbar([x], [y], xerr=xerr, yerr=yerr, fmt=st["marker"], color=st["color"], ms=7, capsize=3,
                        mfc=st["color"] if name == chosen else "white", mec=st["color"], elinewidth=1.0,
                        label=_label(f"{name}" + (" (recommended)" if name == chosen else "")))
            ax.annotate(_label(name), (x, y), textcoords="offset points", xytext=(8, -10), fontsize=8)
        budget = (plan.get("spec") or {}).get("budget")
        if budget is not None:
            ax.axhline(float(budget), color=INK, linestyle=(0, (6, 3)), linewidth=1.0)
            ax.annotate(f"budget, {cur}", (ax.get_xlim()[1], float(budget)), textcoords="offset points", xytext=(-4, 4),
                        ha="right", fontsize=8)
        ax.set_xlabel("CER, % (95 % interval; the text the plan's correction effort uses)")
        ax.set_ylabel(_label(f"archive cost, {cur} (point; bar up to the high end)"))
        ax.set_xlim(left=0)
        ax.set_ylim(bottom=0)
        _legend(ax)
        ax.set_title("Lower left is cheaper and more accurate", fontsize=9, loc="left")
        return _to_svg(fig)


def quality_cer(summary: Mapping) -> str | None:
    """Estimated CER per collection with its interval, one mark shape per recogniser; drifted ones marked."""
    systems = [(k, sq) for k, sq in enumerate((summary.get("quality") or {}).get("systems") or [])
               if any(g.get("est_cer") is not None for g in sq["groups"])]
    if not systems:
        return None
    names = [r["name"] for r in summary["recognisers"]]
    colls = sorted({g["group"] for _, sq in systems for g in sq["groups"] if g.get("est_cer") is not None})
    row = {c: i for i, c in enumerate(colls)}
    plt = _plt()
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(6.4, 1.2 + 0.42 * len(colls) * max(1, len(systems)) ** 0.5),
                               layout="constrained")
        step = 0.7 / len(systems)
        values = []
        for j, (k, sq) in enumerate(systems):
            st = _style(names.index(sq["recogniser"]) if sq["recogniser"] in names else k)
            first = True
            for g in sq["groups"]:
                if g.get("est_cer") is None:
                    continue
                y = row[g["group"]] + (j - (len(systems) - 1) / 2) * step
                x = 100 * g["est_cer"]
                lo = None if g.get("est_low") is None else 100 * g["est_low"]
                hi = None if g.get("est_high") is None else 100 * g["est_high"]
                values += [v for v in (x, lo, hi) if v is not None]
                open_mark = bool(g.get("extrapolated"))
                ax.errorbar([x], [y], xerr=_err(x, lo, hi), fmt=st["marker"], color=st["color"], ms=6, capsize=3,
                            mfc="white" if open_mark else st["color"], mec=st["color"], elinewidth=1.0,
                            label=_label(f"{sq['recogniser']}") if first else None)
                first = False
                if (g.get("drift") or {}).get("flagged"):
                    ax.plot([hi if hi is not None else x], [y], marker=">", color=INK, ms=6, linestyle="none")
                    ax.annotate("drifted", (hi if hi is not None else x, y), textcoords="offset points",
                                xytext=(7, -3), fontsize=8, fontweight="bold")
        ax.set_yticks(range(len(colls)), [_label(c) for c in colls])
        ax.set_ylim(len(colls) - 0.5, -0.5)          # first collection at the top, as in the table
        positive = [v for v in values if v > 0]
        if positive and max(positive) / min(positive) > 30:
            from matplotlib.ticker import FuncFormatter

            ax.set_xscale("symlog", linthresh=0.1, linscale=0.5)
            ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
        ax.set_xlim(left=0, right=max(values + [0.1]) * 1.35)
        ax.set_xlabel(f"estimated CER, % ({round(100 * summary['quality'].get('level', 0.95))} % interval)")
        ax.grid(axis="y", visible=False)
        if len(systems) > 1:
            _legend(ax)
        else:
            ax.set_title(_label(systems[0][1]["recogniser"]), fontsize=9, loc="left")
        return _to_svg(fig)


def plan_frontier(summary: Mapping) -> str | None:
    """Every option of the plan (routes at each threshold included): cost against CER with intervals, the
    frontier joined, the chosen option filled, the target CER dashed."""
    plan = summary.get("plan") or {}
    by_cost = plan.get("options_compared_by") == "cost"
    key = "cost" if by_cost else "core_hours"
    opts = [o for o in plan.get("options") or [] if o.get(key) is not None and o.get("cer") is not None]
    if len(opts) < 2 or not (plan.get("target") or any(o.get("kind") == "route" for o in opts)):
        return None
    cur = plan.get("currency") or ""
    plt = _plt()
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(6.4, 4.2), layout="constrained")
        singles = [o for o in opts if o.get("kind") != "route"]
        for i, o in enumerate(singles):
            st = _style(i)
            x, y = 100 * o["cer"], float(o[key])
            ax.errorbar([x], [y], xerr=_err(x, _pct_or_none(o.get("cer_low")), _pct_or_none(o.get("cer_high"))),
                        yerr=_err(y, None, o.get("cost_high") if by_cost else o.get("core_hours")), fmt=st["marker"],
                        color=st["color"], ms=7, capsize=3, mfc=st["color"] if o.get("chosen") else "white",
                        mec=st["color"], elinewidth=1.0, label=_label(f"{o['option']} ({o.get('kind')})"))
        for j, (pair, group) in enumerate(_by_route(opts).items()):
            st = _style(len(singles) + j)
            ax.plot([], [], st["marker"], color=st["color"], ms=4, mfc="white", linestyle="none",
                    label=_label(f"route {pair}, each threshold"))
            for o in group:
                x, y = 100 * o["cer"], float(o[key])
                shown = o.get("frontier") or o.get("chosen")     # bars on the frontier only, or the plot is a thicket
                ax.errorbar([x], [y], xerr=_err(x, _pct_or_none(o.get("cer_low")), _pct_or_none(o.get("cer_high")))
                            if shown else None, fmt=st["marker"], color=st["color"], ms=7 if o.get("chosen") else 4,
                            capsize=2, mfc=st["color"] if o.get("chosen") else "white", mec=st["color"],
                            elinewidth=0.6, alpha=1.0 if shown else 0.6)
        front = sorted((100 * o["cer"], float(o[key])) for o in opts if o.get("frontier"))
        if len(front) > 1:
            ax.plot(*zip(*front), color=INK, linestyle="-", linewidth=0.9, label="frontier")
        chosen = next((o for o in opts if o.get("chosen")), None)
        if chosen is not None:
            ax.annotate(_label(f"chosen: {chosen['option']}"), (100 * chosen["cer"], float(chosen[key])),
                        textcoords="offset points", xytext=(8, 6), fontsize=8, fontweight="bold")
        target = (plan.get("target") or {}).get("target_cer")
        if target is not None:
            ax.axvline(100 * target, color=INK, linestyle=(0, (6, 3)), linewidth=1.0)
            ax.annotate("target CER", (100 * target, ax.get_ylim()[1]), textcoords="offset points", xytext=(4, -10),
                        fontsize=8)
        ax.set_xlabel("CER, % (95 % interval; calibration pages with ground truth)")
        ax.set_ylabel(_label(f"archive cost, P50{', ' + cur if cur and by_cost else ''}" if by_cost else
                             "archive compute, core-hours (P50)"))
        ax.set_xlim(left=0)         # cost axis not from 0: the options often differ by a few per cent of it
        _legend(ax)
        ax.set_title("Lower left is cheaper and more accurate", fontsize=9, loc="left")
        return _to_svg(fig)


def _pct_or_none(v) -> float | None:
    return None if v is None else 100 * float(v)


def _by_route(opts) -> dict[str, list]:
    out: dict[str, list] = {}
    for o in opts:
        if o.get("kind") == "route":
            out.setdefault(f"{o.get('route_fast')} -> {o.get('route_slow')}", []).append(o)
    return out


def render_figures(summary: Mapping, *, page_scores: Mapping[str, pd.DataFrame],
                   line_times: pd.DataFrame | None) -> dict[str, str | None]:
    """Figure id -> SVG text (None where there is nothing to draw)."""
    return {
        "accuracy-throughput": accuracy_throughput(summary),
        "class-errors": class_errors(summary),
        "page-cer": page_cer(summary, page_scores),
        "decode-time": decode_time(summary, line_times),
        "plan-workers": plan_workers(summary),
        "cost-accuracy": cost_accuracy(summary),
        "plan-frontier": plan_frontier(summary),
        "quality-cer": quality_cer(summary),
    }
