"""The report: escaping, no network references, every HTML figure equal to its JSON value, tables, edge cases.

The store is made by really running the runner (tiny ONNX models, invented pages).
"""

from __future__ import annotations

import json
import math
import sqlite3
import xml.etree.ElementTree as ET
from pathlib import Path

import editdistance
import pandas as pd
import pytest
from typer.testing import CliRunner

from _report_support import SCRIPT_LINE, collect, make_models, make_pages, make_store, parse_shown
from ocrbench.cli.app import app
from ocrbench.errors import InputError, PlanError, StoreError
from ocrbench.report import PlanRequest, PlanResults, load_plan_file, write_report
from ocrbench.report.alignview import align_columns, columns_text
from ocrbench.report.data import resolve

pytestmark = pytest.mark.slow      # the module's store and report take a few seconds to build

PLAN = PlanRequest(pages=5000, deadline="2d", budget=500.0, workers=1, machines=2, price_core_hour=0.1,
                   correction_price_hour=15.0, draws=200)


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    root = tmp_path_factory.mktemp("report")
    pages = make_pages(root / "pages")
    ctc, seq = make_models(root / "models")
    db = make_store(pages, [ctc, seq], root / "run.sqlite")
    files = write_report(db, root / "out", truth=pages, plan=PLAN, n_boot=300, currency="GBP", curve_max_workers=4)
    return {"root": root, "pages": pages, "db": db, "files": files, "models": (ctc, seq),
            "html": files.html.read_text(encoding="utf-8"),
            "summary": json.loads(files.summary.read_text(encoding="utf-8"))}


# --------------------------------------------------------------------------- escaping and self-containment


def test_script_in_ground_truth_is_escaped(built):
    # A ground-truth line may hold markup; it must be shown as text, never run (HTML escaping: the HTML standard's
    # rules for text content; common practice, e.g. the OWASP XSS prevention rules, from memory).
    text = built["html"]
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text
    assert "<script" not in text.lower()
    assert "alert(1)</script>" not in text
    c = collect(text)
    assert not [t for t, _ in c.tags if t == "script"]
    # the page text as the parser reads it back holds the line's characters (as text)
    assert "<script>alert(1)</script>" in "".join(c.text)
    # the JSON summary keeps the excerpt as it is (JSON is not HTML)
    assert any(SCRIPT_LINE in ln["ref"] for w in built["summary"]["worst_pages"] for ln in w["lines"])


def test_no_network_reference_in_src_or_href(built):
    c = collect(built["html"])
    refs = [(t, k, v) for t, a in c.tags for k, v in a.items()
            if k in ("src", "href", "xlink:href", "action", "poster", "data") and v is not None]
    assert refs, "expected at least the contents links"
    for tag, k, v in refs:
        low = v.strip().lower()
        assert not low.startswith(("http://", "https://", "//")), (tag, k, v)
    assert not [t for t, _ in c.tags if t in ("link", "script", "iframe", "img", "object", "embed")]
    text = built["html"].lower()
    assert "@import" not in text and "url(http" not in text


def test_figures_are_inline_svg_that_parse_as_xml(built):
    c = collect(built["html"])
    assert sum(1 for t, _ in c.tags if t == "svg") == 7     # all seven figures: truth and plan were given
    html_text = built["html"]
    start = 0
    while (i := html_text.find("<svg", start)) >= 0:
        j = html_text.index("</svg>", i) + len("</svg>")
        ET.fromstring(html_text[i:j])       # well-formed XML (the reference XML parser of Python)
        start = j
    ids = [a["id"] for t, a in c.tags if "id" in a]
    assert len(ids) == len(set(ids)), "ids repeat across the inline SVGs"


# --------------------------------------------------------------------------- figures equal the JSON


def test_every_figure_in_the_html_equals_the_json(built):
    c = collect(built["html"])
    s = built["summary"]
    assert len(c.figures) > 60
    kinds = set()
    for key, kind, shown in c.figures:
        value = resolve(s, key)
        got, tol = parse_shown(shown, kind)
        kinds.add(kind)
        if value is None or (isinstance(value, float) and not math.isfinite(value)):
            assert got is None, (key, shown)
        elif kind in ("text", "bool"):
            assert got == (bool(value) if kind == "bool" else str(value)), (key, shown, value)
        else:
            assert got is not None and abs(got - float(value)) <= tol * (1 + 1e-9) + 1e-12, (key, shown, value)
    assert {"pct", "int", "dur", "bool", "text", "money", "p"} <= kinds


def test_side_by_side_has_every_required_figure(built):
    s = built["summary"]
    keys = {k for k, _, _ in collect(built["html"]).figures}
    for i, r in enumerate(s["recognisers"]):
        for k in ("accuracy.cer", "accuracy.cer_low", "accuracy.cer_high", "accuracy.wer", "accuracy.wer_low",
                  "accuracy.digit_error_rate", "pages_per_hour", "pages_per_hour_low", "plan.wall_seconds_p50",
                  "plan.wall_seconds_p10", "plan.wall_seconds_p90", "plan.cost", "plan.meets_deadline",
                  "plan.meets_budget"):
            assert f"recognisers.{i}.{k}" in keys
        assert r["accuracy"]["cer_low"] <= r["accuracy"]["cer"] <= r["accuracy"]["cer_high"]
    assert [f["id"] for f in s["figures"] if f["shown"]] == [
        "accuracy-throughput", "class-errors", "page-cer", "decode-time", "plan-workers", "cost-accuracy",
        "quality-cer"]
    assert all(f["recipe"] for f in s["figures"])
    assert s["paired"] and s["paired"][0]["a"] == "tiny-ctc"


def test_pages_per_hour_equals_a_direct_sqlite_count(built):
    # pages per hour of one stream = 3600 x pages / summed page time, read straight from SQLite.
    con = sqlite3.connect(built["db"])
    for r in built["summary"]["recognisers"]:
        n, t = con.execute("SELECT COUNT(*), SUM(t_total) FROM pages WHERE run_id=? AND status='done'",
                           (r["run_id"],)).fetchone()
        assert r["pages_per_hour"] == pytest.approx(3600 * n / t, rel=1e-12)
        assert r["pages_per_hour_low"] <= r["pages_per_hour"] <= r["pages_per_hour_high"]
    con.close()


def test_tables_are_written_and_read_back(built):
    folder = built["files"].folder / "tables"
    for name in ("recognisers", "pages", "classes", "page_scores", "plan", "plan_curve", "line_times"):
        csv = pd.read_csv(folder / f"{name}.csv")
        pq = pd.read_parquet(folder / f"{name}.parquet")
        assert len(csv) == len(pq) > 0
    rec = pd.read_parquet(folder / "recognisers.parquet")
    s = built["summary"]
    assert list(rec["name"]) == [r["name"] for r in s["recognisers"]]
    assert rec["cer"].tolist() == pytest.approx([r["accuracy"]["cer"] for r in s["recognisers"]])


def test_plan_curve_matches_the_plan_at_the_planned_workers(built):
    plan = built["summary"]["plan"]
    total = PLAN.workers * PLAN.machines
    for name, row in plan["rows"].items():
        at = [c for c in plan["curve"] if c["recogniser"] == name and c["workers"] == total]
        assert at and at[0]["wall_seconds_p50"] == pytest.approx(row["wall_seconds_p50"])
        walls = [c["wall_seconds_p50"] for c in plan["curve"] if c["recogniser"] == name]
        assert walls == sorted(walls, reverse=True)      # more workers, never slower
    # no throughput was measured at several workers: one worker per machine, machines independent
    assert plan["scaling_measured"] == [] and "machines assumed independent" in plan["curve_axis"]
    assert all(c["workers_per_machine"] == 1 for c in plan["curve"])


def test_workers_on_one_machine_need_measured_scaling(built, tmp_path):
    # The planner assumes no speed-up from more workers on one machine unless it was measured.
    with pytest.raises(PlanError, match="workers"):
        write_report(built["db"], tmp_path / "out", plan=PlanRequest(pages=100, workers=2), n_boot=50)


# --------------------------------------------------------------------------- smaller cases


def test_one_recogniser_and_no_truth(built, tmp_path):
    db = make_store(built["pages"], [built["models"][0]], tmp_path / "one.sqlite")
    files = write_report(db, tmp_path / "out", n_boot=200)
    s = json.loads(files.summary.read_text(encoding="utf-8"))
    assert [r["name"] for r in s["recognisers"]] == ["tiny-ctc"]
    assert s["recognisers"][0]["accuracy"] is None and s["truth"] is None and s["plan"] is None
    text = files.html.read_text(encoding="utf-8")
    c = collect(text)
    assert sum(1 for t, _ in c.tags if t == "svg") == 1      # only the decode-time figure can be drawn
    assert "no ground truth was given" in text
    for key, kind, shown in c.figures:
        got, tol = parse_shown(shown, kind)
        value = resolve(s, key)
        if isinstance(got, float):
            assert abs(got - value) <= tol * (1 + 1e-9) + 1e-12


def test_plan_files(tmp_path):
    # the project's plan-file format (ocrbench.planning.inputs.PLAN_FILE_FORMAT)
    toml = tmp_path / "plan.toml"
    toml.write_text('[archive]\npages = 1000\n[goals]\ndeadline = "3d"\n[resources]\nmachines = 2\n'
                    'price_core_hour = 0.1\n', encoding="utf-8")
    req = load_plan_file(toml)
    assert isinstance(req, PlanRequest) and req.pages == 1000 and req.machines == 2 and req.deadline == "3d"
    bad = tmp_path / "bad.toml"
    bad.write_text("worker = 3\n", encoding="utf-8")
    with pytest.raises(InputError, match="bad.toml.*unknown key.*worker"):
        load_plan_file(bad)
    res = tmp_path / "res.json"
    res.write_text(json.dumps({"recognisers": [{"recogniser": "x", "wall_seconds_p50": 10.0}],
                               "recommendation": {"text": "x it is"}}), encoding="utf-8")
    got = load_plan_file(res)
    assert isinstance(got, PlanResults) and got.rows[0]["recogniser"] == "x"
    assert got.statements["recommendation"]["text"] == "x it is"
    res.write_text(json.dumps({"pages": 3}), encoding="utf-8")
    with pytest.raises(InputError, match="res.json.*recogniser"):
        load_plan_file(res)


def test_plan_results_are_shown_as_given(built, tmp_path):
    rows = [{"recogniser": "tiny-ctc", "wall_seconds_p10": 3600.0, "wall_seconds_p50": 7200.0,
             "wall_seconds_p90": 10800.0, "cost": 12.5, "meets_deadline": True}]
    files = write_report(built["db"], tmp_path / "out", plan=PlanResults(rows, "given.json"), n_boot=100)
    s = json.loads(files.summary.read_text(encoding="utf-8"))
    ctc = next(r for r in s["recognisers"] if r["name"] == "tiny-ctc")
    assert ctc["plan"]["wall_seconds_p50"] == 7200.0
    text = files.html.read_text(encoding="utf-8")
    assert 'data-key="recognisers.0.plan.wall_seconds_p50" data-fmt="dur">2.0 h<' in text


def test_a_store_that_is_not_a_store(tmp_path):
    junk = tmp_path / "x.sqlite"
    junk.write_bytes(b"not sqlite at all" * 10)
    with pytest.raises(StoreError, match="x.sqlite"):
        write_report(junk, tmp_path / "out")


# --------------------------------------------------------------------------- the alignment view


def test_alignment_columns_rebuild_both_texts_and_count_the_distance():
    # Reference distance: the editdistance package (an independent Levenshtein implementation).
    pairs = [("kitten", "sitting"), ("", "abc"), ("abc", ""), ("Cash 12.50", "Cash 12.5O"), ("a\nb", "ab\n"),
             ("£2 7s 6d", "£2 7s 6d."), ("<script>", "<scr1pt>x")]
    for ref, hyp in pairs:
        cols = align_columns(ref, hyp)
        assert "".join(c.ref for c in cols if c.ref is not None) == ref
        assert "".join(c.hyp for c in cols if c.hyp is not None) == hyp
        assert sum(c.op != "=" for c in cols) == editdistance.eval(ref, hyp)
    # kitten -> sitting: k->s, e->i, insert g (the common textbook example; from memory)
    ops = [c.op for c in align_columns("kitten", "sitting") if c.op != "="]
    assert sorted(ops) == ["I", "S", "S"]
    assert columns_text(align_columns("kitten", "sitting")).splitlines()[2].split() == ["edit", "S", "S", "I"]


def test_names_in_figures_are_escaped_in_the_svg():
    # Figure text comes from cards and stores too; in SVG it must be escaped XML (and never read as mathtext).
    import pandas as pd

    from ocrbench.report.plots import decode_time, svg_inline

    name = "a<b>&c $x$"
    summary = {"recognisers": [{"name": name, "kind": "seq", "run_id": 1, "seconds_per_char": 0.001,
                                "line_seconds_at_0": 0.01}]}
    lt = pd.DataFrame({"run_id": [1, 1, 1], "page_id": ["p", "p", "q"], "n_chars": [5, 10, 20],
                       "t_line": [0.015, 0.02, 0.03]})
    svg = svg_inline(decode_time(summary, lt), "t", title=name)
    root = ET.fromstring(svg)                  # well-formed: Python's XML parser
    texts = "".join(root.itertext())
    assert name in texts and "<b>" not in svg and "a&lt;b&gt;&amp;c $x$" in svg
    assert root.get("aria-label") == name


# --------------------------------------------------------------------------- the command


def test_report_command(built, tmp_path):
    plan = tmp_path / "plan.toml"
    plan.write_text('[archive]\npages = 2000\n[goals]\ndeadline = "1d"\n[simulation]\ndraws = 100\n', encoding="utf-8")
    r = CliRunner().invoke(app, ["report", str(built["db"]), "--out", str(tmp_path / "out"), "--truth",
                                 str(built["pages"]), "--plan", str(plan), "--profile", "loose", "--json"])
    assert r.exit_code == 0, r.output
    out = json.loads(r.stdout)
    assert Path(out["html"]).is_file() and Path(out["summary"]).is_file() and out["tables"]
    s = json.loads(Path(out["summary"]).read_text(encoding="utf-8"))
    assert s["profile"] == "loose" and s["recognisers"][0]["accuracy"]["recipe"].count("profile=loose")


def test_report_command_usage_errors(tmp_path):
    r = CliRunner().invoke(app, ["report", str(tmp_path / "missing.sqlite"), "--out", str(tmp_path / "o")])
    assert r.exit_code == 2 and "missing.sqlite" in r.output
    r = CliRunner().invoke(app, ["report", str(tmp_path / "missing.sqlite"), "--out", str(tmp_path / "o"),
                                 "--profile", "bogus"])
    assert r.exit_code == 2 and "--profile" in r.output


def test_flagged_pages_are_listed_with_their_flags(built, tmp_path):
    import shutil

    import numpy as np
    from PIL import Image

    pages = tmp_path / "pages"
    shutil.copytree(built["pages"], pages)
    Image.fromarray(np.full((900, 700), 250, np.uint8)).save(pages / "zz_blank.png")
    db = make_store(pages, [built["models"][0]], tmp_path / "flags.sqlite")
    files = write_report(db, tmp_path / "out", n_boot=100)
    s = json.loads(files.summary.read_text(encoding="utf-8"))
    assert s["recognisers"][0]["flagged"] == [{"page_id": "zz_blank.png", "flags": ["blank"]}]
    text = files.html.read_text(encoding="utf-8")
    assert "flagged pages" in text and "<code>zz_blank.png</code>: blank" in text
    table = files.data.tables["pages"].set_index("page_id")
    assert table.loc["zz_blank.png", "flags"] == "blank" and table.loc["zz_blank.png", "collection"] == ""
