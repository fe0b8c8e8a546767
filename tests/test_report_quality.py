"""The report's quality section: per collection, estimated and measured CER, balance, flags, review lines, drift,
and the plot of estimated CER per collection — on a real store, with and without ground truth.

The store holds three collections of invented ledger pages: two alike with a few pages keyed, and one read with
far lower confidence and nothing keyed (it must be flagged as drifted; the two alike must not).
"""

from __future__ import annotations

import json
import math
import xml.etree.ElementTree as ET
from pathlib import Path

import editdistance
import pandas as pd
import pytest

from _quality_support import build_store
from _report_support import CHROMIUM, collect, measure_layout, parse_shown
from ocrbench.quality.data import read_snapshot
from ocrbench.report import write_report
from ocrbench.report.data import resolve

pytestmark = pytest.mark.slow

COLLECTIONS = {"box_a": (12, (0.8, 1.0)), "box_b": (12, (0.8, 1.0)), "worse": (12, (0.2, 0.6))}


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    root = tmp_path_factory.mktemp("report_quality")
    db, truth, _ = build_store(root, COLLECTIONS, keyed={"box_a": 3, "box_b": 3})
    files = write_report(db, root / "out", truth=truth, n_boot=200)
    return {"root": root, "db": db, "truth": truth, "files": files, "html": files.html.read_text(encoding="utf-8"),
            "summary": json.loads(files.summary.read_text(encoding="utf-8"))}


def _check_figures(html: str, summary: dict, prefix: str) -> set[str]:
    """Every figure under ``prefix`` equals its JSON value (to half a unit of its last digit); the keys seen."""
    seen = set()
    for key, kind, shown in collect(html).figures:
        if not key.startswith(prefix):
            continue
        seen.add(key)
        value = resolve(summary, key)
        got, tol = parse_shown(shown, kind)
        if value is None or (isinstance(value, float) and not math.isfinite(value)):
            assert got is None, (key, shown)
        elif kind in ("text", "bool"):
            assert got == (bool(value) if kind == "bool" else str(value)), (key, shown, value)
        else:
            assert got is not None and abs(got - float(value)) <= tol * (1 + 1e-9) + 1e-12, (key, shown, value)
    return seen


def _section(html: str) -> str:
    start = html.index('<h2 id="quality">')
    return html[start:html.index("<h2", start + 5)]


def test_quality_figures_equal_the_json(built):
    s = built["summary"]
    [q] = s["quality"]["systems"]
    assert [g["group"] for g in q["groups"]] == ["box_a", "box_b", "worse"]
    keys = _check_figures(built["html"], s, "quality.")
    for k, g in enumerate(q["groups"]):
        p = f"quality.systems.0.groups.{k}"
        for name in ("group", "pages_done", "keyed_pages", "est_cer", "est_low", "est_high", "flagged_share",
                     "queued_lines"):
            assert f"{p}.{name}" in keys, (p, name)
        assert (f"{p}.measured_cer" in keys) == (g["keyed_pages"] > 0)
        assert g["est_low"] <= g["est_cer"] <= g["est_high"]
    assert "quality.systems.0.calibration.cer" in keys
    # the table written beside the report holds the same rows
    table = pd.read_csv(built["files"].folder / "tables" / "quality.csv")
    assert table["group"].tolist() == ["box_a", "box_b", "worse"]
    assert table["est_cer"].tolist() == pytest.approx([g["est_cer"] for g in q["groups"]])


def test_measured_cer_equals_a_direct_count(built):
    # Independent count: the misreads are substitutions within lines of equal number, so a collection's CER is
    # the summed Levenshtein distance (editdistance package) over the summed truth characters of its keyed pages.
    snap = read_snapshot(built["db"])
    [q] = built["summary"]["quality"]["systems"]
    for g in q["groups"]:
        edits = chars = 0
        for t in sorted((built["truth"] / g["group"]).glob("*.txt")) if (built["truth"] / g["group"]).is_dir() else []:
            ref = t.read_text(encoding="utf-8").splitlines()
            hyp = snap.lines[snap.lines["page_id"] == f"{g['group']}/{t.stem}.png"].sort_values("line_no")["text"]
            edits += sum(editdistance.eval(h, r) for h, r in zip(hyp, ref))
            chars += sum(len(r) for r in ref)
        if chars:
            assert g["measured_cer"] == pytest.approx(edits / chars, rel=1e-12)
        else:
            assert g["measured_cer"] is None and g["keyed_pages"] == 0


def test_the_worse_collection_is_flagged_with_the_size_of_its_shift(built):
    [q] = built["summary"]["quality"]["systems"]
    by = {g["group"]: g for g in q["groups"]}
    assert not by["box_a"]["drift"]["flagged"] and not by["box_b"]["drift"]["flagged"]
    worse = by["worse"]["drift"]
    assert worse["flagged"] and worse["ks_d"] > 0.5 and worse["median_confidence_shift"] < -0.2
    assert any("KS D = " in r for r in worse["reasons"])
    section = _section(built["html"])
    rows = section.split("</table>")[0].split("<tr>")
    worse_row = next(r for r in rows if ">worse<" in r)
    assert "<b>drifted</b>" in worse_row and "KS D = " in worse_row
    assert not any("<b>drifted</b>" in r for r in rows if ">box_a<" in r or ">box_b<" in r)


def test_plot_marks_the_drifted_collection(built):
    fig = next(f for f in built["summary"]["figures"] if f["id"] == "quality-cer")
    assert fig["shown"] and fig["recipe"]
    section = _section(built["html"])
    i = section.index("<svg")
    svg = section[i:section.index("</svg>", i) + len("</svg>")]
    root = ET.fromstring(svg)                     # well-formed XML (Python's reference XML parser)
    texts = [t.strip() for t in root.itertext() if t.strip()]
    assert texts.count("drifted") == 1            # one drifted collection, marked once
    assert {"box_a", "box_b", "worse"} <= set(texts)
    assert root.get("aria-label") == "Estimated CER per collection"
    # the figure sits in the quality section, not among the other figures
    figures = built["html"][built["html"].index('<h2 id="figures">'):built["html"].index('<h2 id="quality">')]
    assert 'id="fig-quality-cer"' not in figures


def test_without_truth_the_section_says_what_is_missing(built, tmp_path):
    files = write_report(built["db"], tmp_path / "out", n_boot=100)
    s = json.loads(files.summary.read_text(encoding="utf-8"))
    html = files.html.read_text(encoding="utf-8")
    [q] = s["quality"]["systems"]
    assert q["calibration"] is None and "no ground truth was given" in q["missing"]
    assert all(g["est_cer"] is None and g["drift"] is None for g in q["groups"])
    assert [g["pages_done"] for g in q["groups"]] == [12, 12, 12]
    section = _section(html)
    assert "estimated CER [95 %]" not in section and "drift from" not in section      # no column of blanks
    assert "no ground truth was given" in section and "Not drawn" in section
    keys = _check_figures(html, s, "quality.")
    assert {"quality.systems.0.groups.2.queued_lines", "quality.systems.0.groups.0.flagged_share"} <= keys
    assert sum(1 for t, _ in collect(html).tags if t == "svg") == 1        # only the decode-time figure


def test_truth_that_keys_no_shown_page(built, tmp_path):
    empty = tmp_path / "truth"
    empty.mkdir()
    files = write_report(built["db"], tmp_path / "out", truth=empty, n_boot=100)
    s = json.loads(files.summary.read_text(encoding="utf-8"))
    [q] = s["quality"]["systems"]
    assert q["calibration"] is None and "none of this recogniser's pages" in q["missing"]
    fig = next(f for f in s["figures"] if f["id"] == "quality-cer")
    assert not fig["shown"] and "usable ground truth" in fig["why_not"]


@pytest.mark.browser
def test_quality_tables_fit_a_1366_px_window(built, tmp_path):
    if CHROMIUM is None:
        pytest.skip("chromium is not installed (Debian: apt-get install chromium); the browser check is skipped")
    m, _ = measure_layout(built["files"].html, tmp_path, 1366, 768)
    assert m["document"] <= m["window"] == 1366, m
    assert m["overflowing"] == [], m["overflowing"]
    assert len(m["figures"]) == 4 and all(w > 0 and h > 0 for w, h in m["figures"]), m["figures"]
