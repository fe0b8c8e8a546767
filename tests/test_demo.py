"""The demo's orchestration on a reduced set: 3 invented pages, the tiny ONNX recognisers, everything real."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from typer.testing import CliRunner

from _report_support import collect, make_models, make_pages
from ocrbench.cli.app import app
from ocrbench.demo import DemoArchive, firm_words, run_demo
from ocrbench.errors import InputError
from ocrbench.report import fmt, resolve

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    root = tmp_path_factory.mktemp("demo")
    pages = make_pages(root / "scans", n=3, script_line=False)
    make_models(root / "models")
    return root, pages


@pytest.fixture(scope="module")
def demo(inputs, tmp_path_factory):
    root, pages = inputs
    said: list[str] = []
    res = run_demo(out_dir=tmp_path_factory.mktemp("out"), models_dir=root / "models", scans_dir=pages,
                   n_boot=200, draws=200, cores=2, scaling_pages=2, echo=said.append)
    return res, said


def test_demo_writes_store_report_and_json(demo):
    res, _ = demo
    assert res.store.is_file() and res.report.html.is_file() and res.report.summary.is_file()
    s = json.loads(res.report.summary.read_text(encoding="utf-8"))
    assert [r["name"] for r in s["recognisers"]] == ["tiny-ctc", "tiny-seq"]
    assert all(r["pages_done"] == 3 for r in s["recognisers"])
    # post-processed text is stored beside the raw text, and scored
    assert all(r["has_post"] and r["accuracy_post"] for r in s["recognisers"])
    # the invented archive's plan, with its stated assumptions
    a = DemoArchive()
    assert s["plan"]["spec"]["pages"] == a.pages and s["plan"]["spec"]["deadline"] == a.deadline
    assert all(r["plan"]["wall_seconds_p10"] <= r["plan"]["wall_seconds_p50"] <= r["plan"]["wall_seconds_p90"]
               for r in s["recognisers"])
    # 4 workers on 2-core machines: 2 machines with 2 workers each, the speed-up of 2 workers measured here
    assert (s["plan"]["spec"]["workers"], s["plan"]["spec"]["machines"]) == (2, 2)
    assert s["plan"]["scaling_measured"] == ["tiny-ctc", "tiny-seq"]
    assert {c["workers"] for c in s["plan"]["curve"]} >= {1, 2, 4}
    assert (res.out_dir / "firm_words.txt").is_file()
    assert res.wall_seconds > 0


def test_demo_prints_assumptions_first_then_headline_from_the_json(demo):
    res, said = demo
    assert said[0].startswith("ocrbench demo")
    assert any("180,000 pages" in line and "deadline 6w" in line for line in said[:5])
    assert any(line.startswith("recognised 3 pages") for line in said)
    s = res.summary
    text = "\n".join(res.headline)
    for i, r in enumerate(s["recognisers"]):
        assert f"{r['name']} ({r['kind']}):" in text
        # each printed figure is the JSON value in the report's own format
        for path, kind in ((f"recognisers.{i}.accuracy.cer", "pct"), (f"recognisers.{i}.pages_per_hour", "int"),
                           (f"recognisers.{i}.plan.wall_seconds_p50", "dur"), (f"recognisers.{i}.plan.cost", "money")):
            assert fmt(resolve(s, path), kind) in text
    assert re.search(r"paired comparison \(raw text, 3 pages\)", text)
    assert "plan: " in text


def test_demo_report_figures_match_its_summary(demo):
    res, _ = demo
    s = res.summary
    dom = collect(res.report.html.read_text(encoding="utf-8"))
    assert len(dom.figures) > 40
    for key, kind, shown in dom.figures:
        assert shown == fmt(resolve(s, key), kind)


def test_demo_reruns_resume_the_store(inputs, demo):
    root, pages = inputs
    res, _ = demo
    said: list[str] = []
    again = run_demo(out_dir=res.out_dir, models_dir=root / "models", scans_dir=pages, n_boot=100, draws=100,
                     cores=2, echo=said.append)
    assert again.pages_resumed == 3
    assert not any(line.startswith("measured throughput") for line in said)   # kept in the store


def test_demo_without_models_names_the_folder(tmp_path, inputs):
    _, pages = inputs
    with pytest.raises(InputError, match="ledger-ctc"):
        run_demo(out_dir=tmp_path / "o", models_dir=tmp_path / "nothing", scans_dir=pages)


def test_firm_words_hold_the_ledgers_vocabulary():
    words = set(firm_words(samples=2000))
    assert {"Marrowby", "Kettle", "Cash", "Folio", "forward"} <= words
    assert all(len(w) >= 3 and w.isalpha() for w in words)


def test_demo_command_json(inputs, tmp_path):
    root, pages = inputs
    r = CliRunner().invoke(app, ["demo", "--out", str(tmp_path / "o"), "--models", str(root / "models"),
                                 "--scans", str(pages), "--pages", "2", "--workers", "3", "--json"])
    assert r.exit_code == 0, r.output
    out = json.loads(r.stdout)
    assert Path(out["report"]).is_file() and out["headline"] and len(out["recognisers"]) == 2
    s = json.loads(Path(out["summary"]).read_text(encoding="utf-8"))
    assert s["plan"]["spec"]["workers"] * s["plan"]["spec"]["machines"] == 3
    assert all(r["pages_done"] == 2 for r in s["recognisers"])
