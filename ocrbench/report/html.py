"""The report as one self-contained HTML file: inline CSS, inline SVG figures, no scripts, no network.

Every number on the page is written by :func:`figure`, which looks the value
up in the JSON summary by its path and formats it with
:func:`ocrbench.report.display.fmt`; the element carries that path as
``data-key`` and the format as ``data-fmt``, so the page can be checked
against ``summary.json`` mechanically. Every string that comes from pages,
ground truth, cards, file names or the store is escaped with ``html.escape``.

The design is our own and deliberately plain: black on white, one serif
text face and one fixed-width face from the reader's own system, thin rules,
no colour carrying meaning (figures use shapes, line styles and hatching; the
worst lines are shown as read, with edits marked inline by shape: struck
through, double underline, dotted box), and print rules that keep a figure or
a table row on one page.
"""

from __future__ import annotations

import html
import json
from typing import Any, Mapping

from ocrbench.report.alignview import INLINE_LEGEND, align_columns, inline_html
from ocrbench.report.data import resolve
from ocrbench.report.display import fmt

__all__ = ["render_html", "figure", "CSS"]

CSS = """
:root { color-scheme: light; }
html { background: #fff; color: #111; }
body { font-family: Georgia, "Times New Roman", "DejaVu Serif", serif; font-size: 15px; line-height: 1.45;
       max-width: 60rem; margin: 1.5rem auto 3rem; padding: 0 1.2rem; }
h1 { font-size: 1.55rem; font-weight: normal; border-bottom: 3px double #111; padding-bottom: .3rem; margin-bottom: .2rem; }
h2 { font-size: 1.2rem; font-weight: bold; margin: 2.2rem 0 .5rem; border-bottom: 1px solid #111; }
h3 { font-size: 1rem; margin: 1.4rem 0 .3rem; }
p.meta { margin: 0 0 1rem; font-size: .88rem; }
.caution { border: 1px solid #111; border-left-width: 6px; padding: .4rem .8rem; margin: 1rem 0; }
.caution p { margin: .3rem 0; }
table { border-collapse: collapse; margin: .6rem 0 1rem; font-size: .86rem; max-width: 100%; }
td { overflow-wrap: anywhere; }
caption { text-align: left; font-style: italic; padding-bottom: .25rem; }
th, td { padding: .22rem .55rem; vertical-align: top; text-align: left; }
thead th { border-top: 1.5px solid #111; border-bottom: 1px solid #111; font-weight: bold; }
tbody tr:last-child td, tbody tr:last-child th { border-bottom: 1.5px solid #111; }
tbody th { font-weight: normal; font-style: italic; white-space: nowrap; }
td.n, th.n { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
.iv { font-size: .8rem; white-space: nowrap; }
figure { margin: 1.2rem 0 1.6rem; break-inside: avoid; page-break-inside: avoid; }
figure svg { max-width: 100%; height: auto; display: block; }
figcaption { font-size: .85rem; margin-top: .3rem; }
code, pre, .recipe { font-family: "DejaVu Sans Mono", Menlo, Consolas, monospace; font-size: .78rem; }
.recipe { display: block; overflow-wrap: anywhere; white-space: normal; border-top: 1px dotted #111; margin-top: .25rem;
          padding-top: .2rem; }
code.hash { overflow-wrap: anywhere; word-break: break-all; }
details.long { margin: .15rem 0 0; text-align: left; white-space: normal; max-width: 24rem; }
.steps { white-space: normal; }
p.al { font-family: "DejaVu Sans Mono", Menlo, Consolas, monospace; font-size: .85rem; line-height: 1.7;
       white-space: pre-wrap; overflow-wrap: anywhere; margin: .2rem 0 .8rem; padding: .1rem .7rem;
       border-left: 3px solid #111; }
p.al mark, p.al del { color: inherit; border-radius: 2px; }
p.al mark.sub, .sub-key { background: none; font-weight: bold; text-decoration: underline double; }
p.al del, .del-key { text-decoration: line-through; text-decoration-thickness: 2px; background: none; }
p.al mark.ins, .ins-key { background: #e2e2e2; outline: 1.5px dotted #111; font-weight: bold; }
.e-sub { text-decoration: underline double; font-weight: bold; }
.e-del { text-decoration: line-through; text-decoration-thickness: 2px; }
.e-ins { outline: 1.5px dotted #111; outline-offset: 0; font-weight: bold; background: #e6e6e6; }
.gap { color: #555; }
dl.legend { display: grid; grid-template-columns: max-content 1fr; gap: .1rem .8rem; font-size: .85rem; }
dl.legend dt { font-family: "DejaVu Sans Mono", monospace; font-weight: bold; }
dl.legend dd { margin: 0; }
.note { font-size: .85rem; font-style: italic; }
ul.warn li { font-size: .85rem; }
.verdict { font-weight: bold; }
section.decision { border: 2px solid #111; padding: .2rem .9rem .4rem; margin: .8rem 0 1rem; }
section.decision h2 { margin-top: .4rem; border: none; }
section.decision table { margin: .3rem 0 .4rem; font-size: .82rem; }
section.decision th, section.decision td.n { white-space: normal; }
section.decision .iv { white-space: nowrap; }
details { font-size: .8rem; margin: -.5rem 0 .8rem; }
table.quality td.n, table.quality th.n, table.quality tbody th { white-space: normal; }
table.quality td.n { overflow-wrap: normal; }
table.quality tbody th { overflow-wrap: anywhere; }
table.quality td.n span[data-key] { white-space: nowrap; }
table.quality td.drift { min-width: 14rem; }
.qnote { display: block; font-size: .78rem; }
p.plain code { white-space: pre-wrap; }
@media print {
  body { max-width: none; margin: 0; font-size: 10.5pt; }
  h2 { break-after: avoid; page-break-after: avoid; }
  tr, p.al { break-inside: avoid; page-break-inside: avoid; }
}
"""


def figure(summary: Mapping, path: str, kind: str, *, cls: str | None = None) -> str:
    """A number from the summary, formatted, in a span that names its JSON path and format."""
    try:
        value = resolve(summary, path)
    except (KeyError, IndexError, TypeError):
        value = None
    c = f' class="{cls}"' if cls else ""
    return (f'<span{c} data-key="{html.escape(path, quote=True)}" data-fmt="{kind}">'
            f"{html.escape(fmt(value, kind))}</span>")


def _interval(summary: Mapping, base: str, low: str, high: str, kind: str) -> str:
    """``value`` followed by ``[low – high]`` (each a figure); n/a where the value is absent."""
    try:
        value = resolve(summary, base)
    except (KeyError, IndexError, TypeError):
        value = None
    if value is None:
        return figure(summary, base, kind)
    return (f"{figure(summary, base, kind)} <span class=\"iv\">[{figure(summary, low, kind)} – "
            f"{figure(summary, high, kind)}]</span>")


def _e(text: Any) -> str:
    return html.escape("" if text is None else str(text))


def _plural(n: Any, word: str) -> str:
    """``word`` as it reads after the number ``n`` (1 edit, 2 edits, 0 edits)."""
    return word if n == 1 else word + "s"


def _has(summary: Mapping, path: str) -> bool:
    try:
        return resolve(summary, path) is not None
    except (KeyError, IndexError, TypeError):
        return False


# --------------------------------------------------------------------------- sections


def _best_accuracy(r: Mapping) -> tuple[str, str] | None:
    """(summary key, label) of the accuracy a decision rests on: post-processed where stored, else raw."""
    if r.get("accuracy_post"):
        return "accuracy_post", "post-processed"
    if r.get("accuracy"):
        return "accuracy", "raw"
    return None


def _decision(s: Mapping) -> str:
    """The decision in a few lines: the verdict, each option's time, cost (compute, and people's review and
    correction, which add up to the total) and accuracy with intervals, whether the goals hold, and the
    warnings that matter most."""
    runs = s["recognisers"]
    plan = s.get("plan") or {}
    rec = plan.get("recommendation") or {}
    cur = _unit(plan)
    parts = ['<section id="decision" class="decision"><h2>Decision</h2>']
    if rec.get("text"):
        parts.append(f'<p class="verdict">{_e(rec["text"][:1].upper() + rec["text"][1:])}.</p>')
    else:
        winners = [p for p in s.get("paired") or [] if p.get("winner")]
        if winners:
            w = winners[0]
            parts.append(f'<p class="verdict">{_e(w["winner"])} reads more accurately ({_e(w["text"])} text, '
                         f"paired comparison on the same pages).</p>")
        elif not plan:
            parts.append('<p class="verdict">No plan was given, so no option is recommended; the figures below '
                         "compare the recognisers.</p>")
    head = ["option", "CER [95 %]", "pages / hour, one worker"]
    has_plan = any(r.get("plan") for r in runs)
    money = has_plan and any((r.get("plan") or {}).get("cost") is not None for r in runs)
    if has_plan:
        head += ["archive time P50 (P90)"]
    if money:
        head += [f"compute, {cur}", f"review and correction, {cur}", f"total, {cur} (up to)"]
    if has_plan:
        head += ["deadline", "budget"]
    rows = []
    for i, r in enumerate(runs):
        acc = _best_accuracy(r)
        a = f"recognisers.{i}.{acc[0]}" if acc else None
        cells = [f"{_e(r['name'])}" + (" <b>(recommended)</b>" if rec.get("recogniser") == r["name"] else ""),
                 (_interval(s, f"{a}.cer", f"{a}.cer_low", f"{a}.cer_high", "pct") + f" <span class=\"iv\">{acc[1]}"
                  "</span>") if a else "not measured",
                 figure(s, f"recognisers.{i}.pages_per_hour", "int")]
        p = f"recognisers.{i}.plan"
        if has_plan:
            cells.append(f'{figure(s, p + ".wall_seconds_p50", "dur")} ({figure(s, p + ".wall_seconds_p90", "dur")})')
        if money:
            cells += [figure(s, p + ".compute_cost", "money"), figure(s, p + ".people_cost", "money"),
                      f'{figure(s, p + ".cost", "money")} ({figure(s, p + ".cost_high", "money")})']
        if has_plan:
            cells += [_holds(s, p + ".meets_deadline"), _holds(s, p + ".meets_budget")]
        rows.append("<tr>" + "".join(f"<td{' class=n' if k else ''}>{c}</td>" for k, c in enumerate(cells))
                    + "</tr>")
    parts.append("<table><thead><tr>" + "".join(f'<th{" class=n" if k else ""}>{_e(h)}</th>'
                                                for k, h in enumerate(head))
                 + "</tr></thead><tbody>" + "".join(rows) + "</tbody></table>")
    if money:
        parts.append('<p class="note">Cost = compute (machine time) + review and correction (people reading the '
                     "lines the review mode reads and fixing the errors the CER implies); the plan counts both.</p>")
    warnings = list(plan.get("warnings") or [])[:2]
    failed = sum(int(r.get("pages_failed") or 0) for r in runs)
    if failed:
        warnings.append(f"{failed} page{'s' if failed != 1 else ''} failed to read (listed under Runs).")
    if warnings:
        parts.append('<ul class="warn">' + "".join(f"<li>{_e(w)}</li>" for w in warnings) + "</ul>")
    parts.append("</section>")
    return "".join(parts)


def _unit(plan: Mapping) -> str:
    """The plan's currency (ISO 4217 code) for every money label, or a plain statement that none was given."""
    return _e(plan.get("currency") or "no currency given")


def _holds(s: Mapping, path: str) -> str:
    """yes/no for a goal the plan judged; "unknown" for one it could not (a part unpriced, correctors not
    given), never "yes"; "no goal" only where no such goal was set."""
    def get(p: str):
        try:
            return resolve(s, p)
        except (KeyError, IndexError, TypeError):
            return None

    if get(path) is not None:
        return figure(s, path, "bool")
    base, _, what = path.rpartition(".")
    goal = get(base + (".budget" if what == "meets_budget" else ".deadline_seconds"))
    if goal is None:
        return "no goal"
    if what == "meets_budget":
        why = [f"not priced: {u}" for u in get(base + ".unpriced") or []] + \
              [f"not known: {u}" for u in get(base + ".unknown") or []]
        text = "unknown (" + "; ".join(why or ["not judged"]) + ")"
    else:
        text = "unknown (correctors not given)"
    # still the figure's cell (its JSON path named), showing why the plan could not judge it
    return f'<span data-key="{html.escape(path, quote=True)}" data-fmt="bool">{_e(text)}</span>'


def _side_by_side(s: Mapping) -> str:
    runs = s["recognisers"]
    has_acc = any(r.get("accuracy") for r in runs)
    has_post = any(r.get("accuracy_post") for r in runs)
    has_plan = any(r.get("plan") for r in runs)
    money = bool(s.get("plan") and any((r.get("plan") or {}).get("cost") is not None for r in runs))
    rows: list[tuple[str, list[str]]] = []

    def row(label: str, cells: list[str]) -> None:
        rows.append((label, cells))

    row("kind", [_e(r["kind"]) for r in runs])
    row("pages read (failed)", [f'{figure(s, f"recognisers.{i}.pages_done", "int")} '
                                f'({figure(s, f"recognisers.{i}.pages_failed", "int")})' for i in range(len(runs))])
    row("lines read", [figure(s, f"recognisers.{i}.lines", "int") for i in range(len(runs))])
    if has_acc:
        row("CER, raw text", [_interval(s, f"recognisers.{i}.accuracy.cer", f"recognisers.{i}.accuracy.cer_low",
                                        f"recognisers.{i}.accuracy.cer_high", "pct") for i in range(len(runs))])
        row("WER, raw text", [_interval(s, f"recognisers.{i}.accuracy.wer", f"recognisers.{i}.accuracy.wer_low",
                                        f"recognisers.{i}.accuracy.wer_high", "pct") for i in range(len(runs))])
        row("digit error rate, raw text",
            [_interval(s, f"recognisers.{i}.accuracy.digit_error_rate", f"recognisers.{i}.accuracy.digit_low",
                       f"recognisers.{i}.accuracy.digit_high", "pct") for i in range(len(runs))])
    if has_post:
        row("post-processing steps", [_recipe_cell(r.get("post_recipe")) for r in runs])
        p = "accuracy_post"
        row("CER, post-processed", [_interval(s, f"recognisers.{i}.{p}.cer", f"recognisers.{i}.{p}.cer_low",
                                              f"recognisers.{i}.{p}.cer_high", "pct") for i in range(len(runs))])
        row("WER, post-processed", [_interval(s, f"recognisers.{i}.{p}.wer", f"recognisers.{i}.{p}.wer_low",
                                              f"recognisers.{i}.{p}.wer_high", "pct") for i in range(len(runs))])
        row("digit error rate, post-processed",
            [_interval(s, f"recognisers.{i}.{p}.digit_error_rate", f"recognisers.{i}.{p}.digit_low",
                       f"recognisers.{i}.{p}.digit_high", "pct") for i in range(len(runs))])
    row("pages per hour, this machine, one worker",
        [_interval(s, f"recognisers.{i}.pages_per_hour", f"recognisers.{i}.pages_per_hour_low",
                   f"recognisers.{i}.pages_per_hour_high", "int") for i in range(len(runs))])
    row("time per page, median (P90)", [f'{figure(s, f"recognisers.{i}.page_seconds_p50", "dur")} '
                                        f'({figure(s, f"recognisers.{i}.page_seconds_p90", "dur")})'
                                        for i in range(len(runs))])
    row("time per extra character in a line",
        [_interval(s, f"recognisers.{i}.seconds_per_char", f"recognisers.{i}.seconds_per_char_low",
                   f"recognisers.{i}.seconds_per_char_high", "ms") for i in range(len(runs))])
    if has_plan:
        row("archive wall-clock P50 [P10 – P90]",
            [_interval(s, f"recognisers.{i}.plan.wall_seconds_p50", f"recognisers.{i}.plan.wall_seconds_p10",
                       f"recognisers.{i}.plan.wall_seconds_p90", "dur") for i in range(len(runs))])
        if money:
            row(f"archive cost, {_unit(s['plan'])}, recognition and correction (up to)",
                [f'{figure(s, f"recognisers.{i}.plan.cost", "money")} '
                 f'<span class="iv">(up to {figure(s, f"recognisers.{i}.plan.cost_high", "money")})</span>'
                 for i in range(len(runs))])
        row("ground-truth pages for the wanted CER margin",
            [figure(s, f"recognisers.{i}.plan.gt_sample_pages", "int") for i in range(len(runs))])
        row("correction hours [interval]",
            [_interval(s, f"recognisers.{i}.plan.correction_hours", f"recognisers.{i}.plan.correction_hours_low",
                       f"recognisers.{i}.plan.correction_hours_high", "f1") for i in range(len(runs))])
        row("meets the deadline", [_holds(s, f"recognisers.{i}.plan.meets_deadline") for i in range(len(runs))])
        row("meets the budget", [_holds(s, f"recognisers.{i}.plan.meets_budget") for i in range(len(runs))])
    head = "".join(f'<th scope="col" class="n">{_e(r["name"])}</th>' for r in runs)
    body = "".join(f'<tr><th scope="row">{_e(label)}</th>{"".join(f"<td class=n>{c}</td>" for c in cells)}</tr>'
                   for label, cells in rows)
    note = ""
    measured = [r["name"] for r in runs if r.get("purpose") == "measure-scaling"]
    if measured:
        note += (f'<p class="note">Pages per hour of {_e(", ".join(measured))} come from a measure-scaling run '
                 "(the store holds no ordinary run of it); the others' from ordinary runs.</p>")
    if any(r.get("seconds_per_char_clipped") for r in runs):
        note += ('<p class="note">Time per extra character: a bound below zero was clipped at 0 (a longer line '
                 "cannot take less time; a negative bound is the noise of a nearly flat slope).</p>")
    if has_acc:
        note += (f'<p class="note">Accuracy: profile <code>{_e(s.get("profile"))}</code> '
                f'({_e(s.get("profile_summary"))}); intervals are 95 % bootstrap intervals over pages. '
                "The digit error rate counts substitutions and deletions of truth digits per truth digit.</p>")
    return (f'<h2 id="side-by-side">Recognisers side by side</h2>'
            f'<table class="sbs"><caption>Figures with their 95 % intervals in brackets.</caption>'
            f'<thead><tr><th scope="col">measure</th>{head}</tr></thead><tbody>{body}</tbody></table>{note}')


def recipe_steps(recipe: str | None) -> str:
    """The step names of a post-processing recipe (``pp1|unicode(form=NFC)|whitespace`` -> ``unicode, whitespace``)."""
    if not recipe:
        return "none"
    parts = [p.split("(", 1)[0] for p in recipe.split("|")[1:]]
    return ", ".join(p for p in parts if p) or recipe


def _recipe_cell(recipe: str | None) -> str:
    """Short step names in the table; the whole recipe (long, unbroken) folded away below them."""
    if not recipe:
        return "none"
    return (f'<span class="steps">{_e(recipe_steps(recipe))}</span><details class="long"><summary>full recipe'
            f'</summary><code class="recipe">{_e(recipe)}</code></details>')


def _p_value(s: Mapping, k: int) -> str:
    """The p-value, or "< floor" where no resample fell on the far side of zero (the value is a bound)."""
    if s["paired"][k].get("p_at_floor"):
        return f'&lt; {figure(s, f"paired.{k}.p_floor", "p")}'
    return figure(s, f"paired.{k}.p_value", "p")


def _paired(s: Mapping) -> str:
    if not s.get("paired"):
        return ""
    rows = []
    for k, p in enumerate(s["paired"]):
        if p.get("error"):
            rows.append(f"<tr><td>{_e(p['a'])} vs {_e(p['b'])}</td><td>{_e(p['text'])}</td>"
                        f"<td colspan=5>{_e(p['error'])}</td></tr>")
            continue
        winner = p.get("winner")
        verdict = (f'<span class="verdict">{figure(s, f"paired.{k}.winner", "text")}</span> reads more accurately'
                   if winner else "no difference shown at this sample size")
        rows.append(f"<tr><td>{_e(p['a'])} − {_e(p['b'])}</td><td>{_e(p['text'])}</td>"
                    f"<td class=n>{figure(s, f'paired.{k}.pages', 'int')}</td>"
                    f"<td class=n>{_interval(s, f'paired.{k}.diff', f'paired.{k}.low', f'paired.{k}.high', 'pct')}</td>"
                    f"<td class=n>{_p_value(s, k)}</td><td>{verdict}</td></tr>")
    return ('<h2 id="paired">Paired comparison</h2>'
            "<p>The same pages, both recognisers: the difference of their CERs (first minus second; negative "
            "means the first makes fewer errors), with a paired bootstrap interval over pages and a two-sided "
            "p-value. A winner is named only when the interval excludes zero. A p-value written "
            "\u201c&lt; x\u201d is at the smallest value the resamples can show: it is at most x.</p>"
            '<table><thead><tr><th>pair</th><th>text</th><th class="n">pages</th><th class="n">CER difference '
            '[95 % interval]</th><th class="n">p</th><th>reading</th></tr></thead><tbody>'
            + "".join(rows) + "</tbody></table>")


def _plan(s: Mapping) -> str:
    plan = s.get("plan")
    if not plan:
        return ""
    spec = plan.get("spec") or {}
    cur = _unit(plan)
    parts = ['<h2 id="plan">Plan for the archive</h2>']

    def money(key: str, none: str = "not priced") -> str:
        return f'{figure(s, f"plan.spec.{key}", "money")} {cur}' if spec.get(key) is not None else none

    if spec:
        if spec.get("lines_per_page"):
            pages_by = (f'{_e(spec.get("lines_per_page"))} lines per page, {_e(spec.get("chars_per_line"))} '
                        "characters per line")
        elif spec.get("sample"):
            pages_by = f'a sample of <code>{_e(spec.get("sample"))}</code>'
        elif spec.get("archive_store"):
            pages_by = f'the pages of <code>{_e(spec.get("archive_store"))}</code>'
        else:
            pages_by = "this store's pages"
        items = [("pages in the archive", figure(s, "plan.spec.pages", "int")),
                 ("pages described by", pages_by),
                 ("deadline", _e(spec.get("deadline") or "none")),
                 (f"budget, {cur}", money("budget", "none")),
                 ("workers per machine × machines", f'{figure(s, "plan.spec.workers", "int")} × '
                                                    f'{figure(s, "plan.spec.machines", "int")}'),
                 ("threads per worker", _e(spec.get("threads") or "as calibrated")),
                 (f"price per core-hour, {cur}", money("price_core_hour")),
                 (f"price per machine-hour, {cur}", money("price_machine_hour")),
                 ("correction effort per character error", f'{figure(s, "plan.spec.seconds_per_error", "f1")} s'),
                 (f"price per hour of correction, {cur}", money("correction_price_hour")),
                 ("wanted CER margin of a ground-truth sample", f'± {figure(s, "plan.spec.cer_margin", "pct")}'),
                 ("calibration", ", ".join(f"<code>{_e(c)}</code>" for c in spec.get("calibration") or [])),
                 ("throughput measured at several workers for",
                  _e(", ".join(plan.get("scaling_measured") or []) or "none (one worker per machine is planned)"))]
        parts.append('<table><caption>What was asked (the plan\'s assumptions)</caption><tbody>'
                     + "".join(f'<tr><th scope="row">{_e(k)}</th><td>{v}</td></tr>' for k, v in items)
                     + "</tbody></table>")
    else:
        parts.append(f'<p>Plan results read from <code>{_e(plan.get("source"))}</code>, shown as given.</p>')
    rec = plan.get("recommendation") or {}
    if rec.get("text"):
        parts.append(f'<p class="verdict">{_e(rec["text"])}</p>')
    for c in plan.get("crossover") or []:
        if c.get("text"):
            parts.append(f"<p>Crossover: {_e(c['text'])}.</p>")
    parts.append(_plan_options(s))
    if plan.get("assumptions"):
        parts.append("<h3>Assumptions</h3><ul>" + "".join(f"<li>{_e(a)}</li>" for a in plan["assumptions"])
                     + "</ul>")
    if plan.get("accuracy_source"):
        source = str(plan["accuracy_source"])
        source = source[4:] if source.startswith("the ") else source    # the sentence says "the" already
        parts.append(f'<p class="note">Correction effort uses the CER of the {_e(source)}.</p>')
    if plan.get("warnings"):
        parts.append('<h3>Warnings from the planner</h3><ul class="warn">'
                     + "".join(f"<li>{_e(w)}</li>" for w in plan["warnings"]) + "</ul>")
    return "".join(parts)


def _plan_options(s: Mapping) -> str:
    """The plan's options (recognisers, variants, routes at thresholds): cost against CER, the frontier and the
    choice for a target CER; route thresholds off the frontier folded away."""
    plan = s.get("plan") or {}
    opts = plan.get("options") or []
    if not plan.get("target") and not any(o.get("kind") == "route" for o in opts):
        return ""           # the recognisers alone: the side-by-side table and the cost-accuracy figure show them
    by_cost = plan.get("options_compared_by") == "cost"
    cur = _e(plan.get("currency") or "")

    def row(i: int, o: Mapping) -> str:
        base = f"plan.options.{i}"
        mark = "chosen" if o.get("chosen") else ("on the frontier" if o.get("frontier") else "dominated")
        share = figure(s, f"{base}.routed_share", "pct1") if o.get("kind") == "route" else "–"
        cost = (figure(s, f"{base}.cost", "money") if by_cost else f'{figure(s, f"{base}.core_hours", "f1")} '
                "core-hours")
        return (f'<tr{" class=chosen" if o.get("chosen") else ""}><td>{figure(s, f"{base}.option", "text")}</td>'
                f"<td>{_e(o.get('kind'))}</td><td class=n>{share}</td>"
                f"<td class=n>{_interval(s, f'{base}.cer', f'{base}.cer_low', f'{base}.cer_high', 'pct')}</td>"
                f"<td class=n>{figure(s, f'{base}.compute_cost', 'money')}</td>"
                f"<td class=n>{figure(s, f'{base}.people_cost', 'money')}</td><td class=n>{cost}</td>"
                f"<td>{_e(mark)}</td><td>{_e(o.get('lost') or '')}</td></tr>")

    shown = [(i, o) for i, o in enumerate(opts) if o.get("kind") != "route" or o.get("frontier") or o.get("chosen")]
    rest = [(i, o) for i, o in enumerate(opts) if (i, o) not in shown]
    key = (lambda t: (t[1].get("cost") is None, t[1].get("cost") or 0.0)) if by_cost else \
        (lambda t: t[1].get("core_hours") or 0.0)
    head = ('<thead><tr><th>option</th><th>kind</th><th class="n">lines routed</th><th class="n">CER [95 % '
            f'interval]</th><th class="n">compute, {cur}</th><th class="n">people, {cur}</th>'
            f'<th class="n">{"total, " + cur if by_cost else "compute"}</th><th>frontier</th>'
            "<th>why not chosen</th></tr></thead>")
    target = plan.get("target") or {}
    out = ['<h3 id="plan-options">Options: cost against accuracy</h3>'
           "<p>Every way of reading the archive the plan priced: each recogniser (a quantised variant is one, "
           "with its own measured times and CER), and each route (the first recogniser on every line, the second "
           "on the lines the first doubts) at the thresholds tried. A route's cost is the first recogniser's on "
           "every line plus the second's on the routed share; its CER is measured on the calibration pages' "
           "ground truth, each line taking the reading the route would keep. Costs are P50 "
           + ("(compute and people)." if by_cost else "core-hours (money not known for every option).") + "</p>"]
    if target:
        out.append(f'<p class="verdict">{figure(s, "plan.target.text", "text")}</p>')
    out.append(f"<table><caption>Options, cheapest first (the frontier: no other option is both cheaper and more "
               f"accurate)</caption>{head}<tbody>" + "".join(row(i, o) for i, o in sorted(shown, key=key))
               + "</tbody></table>")
    if rest:
        out.append(f"<details><summary>{len(rest)} route thresholds off the frontier</summary><table>{head}<tbody>"
                   + "".join(row(i, o) for i, o in sorted(rest, key=key)) + "</tbody></table></details>")
    out += [f'<p class="note">{_e(n)}</p>' for n in plan.get("options_notes") or []]
    return "".join(out)


def _figures(s: Mapping, svgs: Mapping[str, str | None]) -> str:
    from ocrbench.report.plots import svg_inline

    out = ['<h2 id="figures">Figures</h2>']
    captions = {
        "accuracy-throughput": "Each recogniser's CER against its pages per hour on this machine; bars are 95 % "
                               "intervals. Filled marks: raw text; open marks: post-processed text, drawn a "
                               "little to the right of the raw mark (they share one throughput) so their bars "
                               "never overlap.",
        "class-errors": "Errors per truth character in each character class (digits matter most in ledgers); "
                        "hatching tells the recognisers apart; bars are 95 % intervals.",
        "page-cer": "How CER spreads over pages: the share of pages whose CER is at or below each value.",
        "decode-time": "Each line's share of its batch's model and decode time against its length. An "
                       "autoregressive recogniser takes one decoder step per character, so its line rises with "
                       "length; a CTC recogniser reads a line in one pass.",
        "plan-workers": "The archive's planned wall-clock as workers are added: P50 line, P10-P90 band, and the "
                        "deadline (named at the top instead when it lies far above every curve).",
        "plan-frontier": "Every option the plan priced, routes at each threshold tried included: archive cost (P50, "
                         "compute and people; the bar reaches the high end) against CER with its 95 % interval. The "
                         "line joins the frontier (no option both cheaper and more accurate); the filled mark is the "
                         "option chosen; the dashed line is the target CER, met when an interval ends left of it.",
        "cost-accuracy": "Each option of the plan: its archive cost (compute and correction; the bar reaches the "
                         "cost's high end) against its CER with the 95 % interval. The filled mark is the "
                         "recommended option; the dashed line is the budget. Money in "
                         + _unit(s.get("plan") or {}) + ".",
    }
    for k, f in enumerate(s["figures"]):
        if f.get("section"):
            continue            # drawn in its own section (the quality plot)
        svg = svgs.get(f["id"])
        body = (svg_inline(svg, f"f{k}", title=f["title"]) if svg else
                f'<p class="note">Not drawn: {_e(f.get("why_not") or "nothing to draw")}.</p>')
        out.append(f'<figure id="fig-{_e(f["id"])}"><h3>{_e(f["title"])}</h3>{body}'
                   f'<figcaption>{_e(captions.get(f["id"], ""))}{_e(_curve_note(s) if f["id"] == "plan-workers" else "")}'
                   f'<code class="recipe" data-key="figures.{k}.recipe" data-fmt="text">{_e(f["recipe"])}</code>'
                   f"</figcaption></figure>")
    return "".join(out)


def curve_rises(curve: list[Mapping]) -> list[tuple[str, int, int, float]]:
    """(recogniser, fewer workers, more workers, ratio) wherever the planned P50 wall-clock rises with workers."""
    out = []
    by_name: dict[str, list[Mapping]] = {}
    for row in curve:
        by_name.setdefault(str(row.get("recogniser")), []).append(row)
    for name, rows in by_name.items():
        rows = sorted(rows, key=lambda r: r["workers"])
        for a, b in zip(rows, rows[1:]):
            if a.get("wall_seconds_p50") and b.get("wall_seconds_p50") and b["wall_seconds_p50"] > a["wall_seconds_p50"]:
                out.append((name, int(a["workers"]), int(b["workers"]), b["wall_seconds_p50"] / a["wall_seconds_p50"]))
    return out


def _curve_note(s: Mapping) -> str:
    rises = curve_rises((s.get("plan") or {}).get("curve") or [])
    if not rises:
        return ""
    parts = [f"{name} from {a} to {b} workers (×{r:.2f})" for name, a, b, r in rises]
    measured = set((s.get("plan") or {}).get("scaling_measured") or [])
    if measured and all(name in measured for name, *_ in rises):
        return (" Where the line rises as workers are added (" + "; ".join(parts) + "), the plan follows the "
                "throughput measured at those workers on this machine (measure-scaling): more workers sharing "
                "its cores and memory finished pages more slowly than fewer did, so adding them there would "
                "not help.")
    return " The planned wall-clock rises as workers are added: " + "; ".join(parts) + "."


def _worst(s: Mapping) -> str:
    worst = s.get("worst_pages") or []
    if not worst:
        if s.get("truth"):
            return '<h2 id="worst">Worst pages</h2><p>No page has an error.</p>'
        return ""
    legend = "".join(f'<dt><span class="{cls}-key">{_e(name)}</span></dt><dd>{_e(what)}</dd>'
                     for cls, name, what in INLINE_LEGEND)
    out = ['<h2 id="worst">Worst pages, line by line</h2>',
           "<p>The pages with the highest CER for each recogniser, with the lines that hold errors (at most "
           "the worst few per page). Each line is shown as it was read, with the edits against the truth marked "
           "in it; text is shown after the scoring profile's normalisation, as it was scored.</p>",
           f'<dl class="legend">{legend}</dl>']
    for k, w in enumerate(worst):
        out.append(f"<h3>{_e(w['recogniser'])}: page <code>{_e(w['page_id'])}</code>, CER "
                   f"{figure(s, f'worst_pages.{k}.cer', 'pct')} ({figure(s, f'worst_pages.{k}.char_edits', 'int')} "
                   f"{_plural(w['char_edits'], 'edit')} in {figure(s, f'worst_pages.{k}.ref_chars', 'int')} "
                   f"{_plural(w['ref_chars'], 'character')}; {figure(s, f'worst_pages.{k}.lines_shown', 'int')} of "
                   f"{figure(s, f'worst_pages.{k}.lines_with_edits', 'int')} "
                   f"{_plural(w['lines_with_edits'], 'line')} with errors shown)</h3>")
        if w.get("flags"):
            out.append(f'<p class="note">Page flagged before recognition: {_e(", ".join(w["flags"]))}.</p>')
        if w.get("pairing") == "page":
            out.append('<p class="note">The reading has a different number of lines than the truth, so the '
                       "page was aligned as one text.</p>")
        for ln in w["lines"]:
            label = f"line {ln['line_no']}" if ln.get("line_no") is not None else "whole page"
            out.append(f'<p class="note">{_e(label)}: {_e(ln["char_edits"])} {_plural(ln["char_edits"], "edit")} in '
                       f'{_e(ln["ref_chars"])} {_plural(ln["ref_chars"], "character")}</p>')
            out.append(inline_html(align_columns(ln["ref"], ln["hyp"])))
            # The same two texts unbroken (for copying and for screen readers), folded away by default.
            out.append(f'<details><summary>plain text of {_e(label)}</summary><p class="plain">truth: '
                       f'<code>{_e(ln["ref"])}</code><br>read: <code>{_e(ln["hyp"])}</code></p></details>')
    return "".join(out)


_QUALITY_CAPTION = ("Each collection's estimated CER with its interval (keyed pages count as measured); one mark "
                    "shape per recogniser. A collection flagged as drifted has a black triangle and the word "
                    "\u201cdrifted\u201d at the end of its bar; an open mark means much of its text lies beyond "
                    "the doubt the calibration saw, so its estimate is an extrapolation.")


def _quality_row(s: Mapping, p: str, g: Mapping, estimated: bool) -> str:
    """One collection's cells: pages, keyed, estimated and measured CER, balance, flagged, queue, drift."""
    pages = figure(s, p + ".pages_done", "int") + (f' <span class="iv">(+{figure(s, p + ".pages_failed", "int")} '
                                                  "failed)</span>" if g.get("pages_failed") else "")
    cells = [f"<th scope=\"row\">{figure(s, p + '.group', 'text')}</th>", pages, figure(s, p + ".keyed_pages", "int")]
    if estimated:
        est = _interval(s, p + ".est_cer", p + ".est_low", p + ".est_high", "pct")
        if g.get("extrapolated"):
            est += (f' <span class="qnote">extrapolated: {figure(s, p + ".beyond_range", "pct1")} of its '
                    "characters lie beyond the calibrated doubt</span>")
        meas = (_interval(s, p + ".measured_cer", p + ".measured_low", p + ".measured_high", "pct")
                if g.get("measured_cer") is not None else "no keyed page")
        cells += [est, meas]
    bal = ("not checkable" if g.get("balance_rate") is None else
           f'{_interval(s, p + ".balance_rate", p + ".balance_low", p + ".balance_high", "pct1")} '
           f'<span class="iv">of {figure(s, p + ".checkable_pages", "int")}</span>')
    cells += [bal, figure(s, p + ".flagged_share", "pct1"), figure(s, p + ".queued_lines", "int")]
    if estimated:
        d = g.get("drift")
        if d is None:
            cells.append("not tested")
        elif not d.get("flagged"):
            ks = (f' <span class="iv">(KS D {figure(s, p + ".drift.ks_d", "f3")}, Holm p '
                  f'{figure(s, p + ".drift.ks_p_holm", "p")})</span>' if d.get("ks_d") is not None else "")
            cells.append("no" + ks)
        else:
            cells.append("<b>drifted</b>: " + "; ".join(figure(s, f"{p}.drift.reasons.{j}", "text")
                                                        for j in range(len(d["reasons"]))))
    last = len(cells) - 1
    return ("<tr>" + cells[0] + "".join(f"<td class={'n' if k < last or not estimated else 'drift'}>{c}</td>"
                                        for k, c in enumerate(cells[1:], 1)) + "</tr>")


def _quality(s: Mapping, svgs: Mapping[str, str | None]) -> str:
    """Per recogniser, a table per collection; then the plot of estimated CER per collection."""
    from ocrbench.report.plots import svg_inline

    q = s.get("quality")
    if not q or not q.get("systems"):
        return ""
    out = ['<h2 id="quality">Quality per collection</h2>',
           "<p>How good the text is in each collection (the folder a page came from), without keying every page: "
           "line doubt (weakest-character confidence, ledger arithmetic) is mapped to an error rate on the "
           "hand-keyed pages, and each collection gets its own factor on that map. Balance: the share of "
           "checkable pages whose amounts add up to their total. Flagged: pages that failed, do not balance or "
           "hold a line in the review queue. Drift: a collection whose confidences, estimated CER or balance rate "
           "lie outside what the calibrated collections showed, with the size of the shift.</p>"]
    for i, sq in enumerate(q["systems"]):
        cal = sq.get("calibration")
        estimated = cal is not None
        base = f"quality.systems.{i}"
        head = ["collection", "pages read", "keyed pages"]
        if estimated:
            head += ["estimated CER [95 %]", "measured CER [95 %]"]
        head += ["balance rate [95 %]", "flagged pages", "lines in the review queue"]
        if estimated:
            head += ["drift from the calibrated collections"]
        who = f"{_e(sq['recogniser'])} (run{'s' if len(sq['runs']) > 1 else ''} {_e(', '.join(map(str, sq['runs'])))})"
        if estimated:
            caption = (f"{who}: calibrated on {figure(s, base + '.calibration.pages', 'int')} keyed "
                       f"pages, {figure(s, base + '.calibration.lines', 'int')} lines, measured CER "
                       f"{_interval(s, base + '.calibration.cer', base + '.calibration.cer_low', base + '.calibration.cer_high', 'pct')}")
        else:
            caption = f"{who}: not calibrated"
        rows = [_quality_row(s, f"{base}.groups.{k}", g, estimated) for k, g in enumerate(sq["groups"])]
        out.append(f'<table class="quality"><caption>{caption}</caption><thead><tr>'
                   + "".join(f'<th{" class=n" if 0 < k < len(head) - (1 if estimated else 0) else ""}>{_e(h)}</th>'
                             for k, h in enumerate(head))
                   + "</tr></thead><tbody>" + "".join(rows) + "</tbody></table>")
        if sq.get("missing"):
            out.append(f'<p class="note">{_e(sq["recogniser"])}: {_e(sq["missing"])}.</p>')
        notes = list(sq.get("problems") or []) + list(sq.get("notes") or [])
        if notes:
            more = sq.get("notes_left_out") or 0
            out.append('<ul class="warn">' + "".join(f"<li>{_e(n)}</li>" for n in notes)
                       + (f"<li>and {more} more like these</li>" if more else "") + "</ul>")
    for k, f in enumerate(s.get("figures") or []):
        if f.get("section") != "quality":
            continue
        svg = svgs.get(f["id"])
        body = (svg_inline(svg, f"f{k}", title=f["title"]) if svg else
                f'<p class="note">Not drawn: {_e(f.get("why_not") or "nothing to draw")}.</p>')
        out.append(f'<figure id="fig-{_e(f["id"])}"><h3>{_e(f["title"])}</h3>{body}'
                   f"<figcaption>{_e(_QUALITY_CAPTION) if svg else ''}"
                   f'<code class="recipe" data-key="figures.{k}.recipe" data-fmt="text">{_e(f["recipe"])}</code>'
                   f"</figcaption></figure>")
    return "".join(out)


def _misread(s: Mapping, p: str, b: Mapping) -> str:
    if not b.get("checkable", True) or b.get("misread_rate") is None:
        return "not checkable"
    return _interval(s, p + ".misread_rate", p + ".misread_low", p + ".misread_high", "pct")


def _balance(s: Mapping) -> str:
    runs = s["recognisers"]
    if not any((r.get("balance") or {}).get("raw") for r in runs):
        return ""
    rows = []
    for i, r in enumerate(runs):
        for which in ("raw", "post"):
            b = (r.get("balance") or {}).get(which)
            if not b:
                continue
            p = f"recognisers.{i}.balance.{which}"
            rows.append(f"<tr><td>{_e(r['name'])}</td><td>{_e(which)}</td>"
                        f"<td class=n>{figure(s, p + '.pages', 'int')}</td>"
                        f"<td class=n>{figure(s, p + '.balanced', 'int')}</td>"
                        f"<td class=n>{figure(s, p + '.unbalanced', 'int')}</td>"
                        f"<td class=n>{figure(s, p + '.not_checkable', 'int')}</td>"
                        f"<td class=n>{_misread(s, p, b)}</td></tr>")
    model = next((r["balance"]["raw"]["model"] for r in runs if (r.get("balance") or {}).get("raw")), "")
    return ('<h2 id="arithmetic">Ledger arithmetic (needs no ground truth)</h2>'
            "<p>Each page's amounts are checked against its total. Pages that do not balance point at misread "
            "amounts, on pages nobody has transcribed as well.</p>"
            '<table><thead><tr><th>recogniser</th><th>text</th><th class="n">pages</th><th class="n">balanced</th>'
            '<th class="n">unbalanced</th><th class="n">not checkable</th><th class="n">misread rate per amount '
            "[95 % interval]</th></tr></thead><tbody>" + "".join(rows) + "</tbody></table>"
            f'<p class="note">Model: {_e(model)}</p>')


def _runs(s: Mapping) -> str:
    out = ['<h2 id="runs">Runs: host and settings</h2>']
    for i, r in enumerate(s["recognisers"]):
        host = r.get("host") or {}
        settings = r.get("settings") or {}
        rows = [("run", _e(r["run_id"])), ("card", f'<code>{_e(r.get("card_path"))}</code>'),
                ("card hash", f'<code class="hash">{_e(r.get("card_hash"))}</code>'),
                ("input folder", f'<code>{_e(r.get("input_dir"))}</code>'),
                ("engine", _e(r.get("engine"))), ("ocrbench", _e(r.get("ocrbench_version"))),
                ("started / finished", f'{_e(r.get("started_at"))} / {_e(r.get("finished_at"))}')]
        rows += [(f"host: {k}", _e(v)) for k, v in sorted(host.items())]
        rows.append(("settings", f'<details class="long"><summary>{len(settings)} settings</summary><code '
                                 f'class="recipe">{_e(json.dumps(settings, sort_keys=True, ensure_ascii=False))}'
                                 "</code></details>"))
        rows.append(("throughput recipe", f'<code class="recipe" data-key="recognisers.{i}.throughput_recipe" '
                                          f'data-fmt="text">{_e(r.get("throughput_recipe"))}</code>'))
        if r.get("failures"):
            rows.append(("failed pages", "<br>".join(f'<code>{_e(f["page_id"])}</code>: {_e(f["error"])}'
                                                     for f in r["failures"])))
        if r.get("flagged"):
            rows.append(("flagged pages", "<br>".join(f'<code>{_e(f["page_id"])}</code>: {_e(", ".join(f["flags"]))}'
                                                      for f in r["flagged"])))
        out.append(f"<table><caption>{_e(r['name'])} ({_e(r['kind'])})</caption><tbody>"
                   + "".join(f'<tr><th scope="row">{_e(k)}</th><td>{v}</td></tr>' for k, v in rows)
                   + "</tbody></table>")
    return "".join(out)


def _recipes(s: Mapping) -> str:
    items = []
    for i, r in enumerate(s["recognisers"]):
        for key in ("accuracy", "accuracy_post"):
            acc = r.get(key)
            if not acc:
                continue
            for name, recipe in sorted((acc.get("recipes") or {}).items()):
                items.append(f"<tr><td>{_e(r['name'])}</td><td>{_e('raw' if key == 'accuracy' else 'post')}</td>"
                             f"<td>{_e(name)}</td><td><code class=\"recipe\">{_e(recipe)}</code></td></tr>")
    tp = s.get("truth_pairing") or {}
    extra = ""
    if tp:
        extra = (f"<p>Ground truth: {figure(s, 'truth_pairing.pages_paired', 'int')} pages paired with a "
                 f"ground-truth file; {len(tp.get('pages_without_truth') or [])} pages had none; "
                 f"{len(tp.get('truth_without_page') or [])} ground-truth files had no page; "
                 f"{len(tp.get('unreadable_truth') or [])} could not be read.</p>")
        for u in tp.get("unreadable_truth") or []:
            extra += f'<p class="note"><code>{_e(u["path"])}</code>: {_e(u["error"])}</p>'
    if not items:
        return ('<h2 id="recipes">Recipes</h2><p>No accuracy figures: no ground truth was given.</p>' + extra)
    return ('<h2 id="recipes">Recipes of the accuracy figures</h2>'
            "<p>What produced each accuracy figure; two figures compare only when their recipes agree "
            "(apart from the recogniser).</p>" + extra +
            "<table><thead><tr><th>recogniser</th><th>text</th><th>figure</th><th>recipe</th></tr></thead><tbody>"
            + "".join(items) + "</tbody></table>")


def _cautions(s: Mapping, *, short: bool) -> str:
    if short:
        return ('<div class="caution" role="note"><p><b>Read with care.</b> ' + _e(s["cautions"][0]) + "</p><p>"
                + _e(s["cautions"][1]) + "</p></div>")
    return ('<h2 id="cautions">Cautions</h2><ul>' + "".join(f"<li>{_e(c)}</li>" for c in s["cautions"]) + "</ul>")


def render_html(summary: Mapping, svgs: Mapping[str, str | None]) -> str:
    """The whole report page, from the summary and the figures' SVG text."""
    s = summary
    names = ", ".join(r["name"] for r in s["recognisers"])
    sections = [("side-by-side", "side by side", _side_by_side(s)), ("paired", "paired comparison", _paired(s)),
                ("plan", "plan", _plan(s)), ("figures", "figures", _figures(s, svgs)),
                ("worst", "worst pages", _worst(s)), ("quality", "quality per collection", _quality(s, svgs)),
                ("arithmetic", "ledger arithmetic", _balance(s)),
                ("runs", "runs", _runs(s)), ("recipes", "recipes", _recipes(s)),
                ("cautions", "cautions", _cautions(s, short=False))]
    nav = " · ".join(f'<a href="#{a}">{_e(t)}</a>' for a, t, html_ in sections if html_)
    body = [
        f"<h1>{_e(s['title'])}</h1>",
        f'<p class="meta">Recognisers: {_e(names)}. Store <code>{_e(s["store"])}</code>'
        + (f'; ground truth <code>{_e(s["truth"])}</code>' if s.get("truth") else "; no ground truth")
        + f'. Written {_e(s["generated_at"])} by ocrbench {_e(s["ocrbench_version"])}.</p>',
        _decision(s),
        _cautions(s, short=True),
        f'<nav><p class="meta">Contents: {nav}</p></nav>',
        *(html_ for _, _, html_ in sections),
    ]
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"<title>{_e(s['title'])}</title><style>{CSS}</style></head><body>"
            + "\n".join(part for part in body if part) + "</body></html>\n")
