"""The report in a real browser: Debian's chromium, headless, with background networking switched off.

Checks that the rendered DOM holds the tables, the inline SVG figures and
the section headings, that no script element exists after parsing, and that a
screenshot is not blank (pixel variance, with Pillow). At 1366x768 a copy of
the report with a measuring script added checks the laid-out page: no
horizontal scroll, no table wider than its container, every figure drawn with
a size, the decision block in the first screen, no console error. Skipped with
a message only where chromium is not installed.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from _report_support import (CHROMIUM, chromium as _chromium, collect, make_models, make_pages, make_store,
                             measure_layout)
from ocrbench.report import PlanRequest, write_report

pytestmark = [pytest.mark.browser, pytest.mark.slow]

HEADINGS = ("Recognisers side by side", "Paired comparison", "Plan for the archive", "Figures",
            "Accuracy against throughput", "Error rate by character class", "Distribution of CER per page",
            "Decode time per line against characters per line", "Planned wall-clock against workers",
            "Archive cost against accuracy", "Quality per collection", "Estimated CER per collection",
            "Worst pages, line by line", "Runs: host and settings", "Cautions")


def _postprocess(db: Path) -> None:
    """Post-process every run with a several-step recipe, so the report shows a long recipe string."""
    from ocrbench.postprocess.steps import pipeline_from_config
    from ocrbench.run.engine import apply_postprocess
    from ocrbench.store import RunStore

    pipeline = pipeline_from_config({"steps": ["unicode", "whitespace", "variants", "ledger_repair"]})
    with RunStore(db) as st:
        for rid in st.run_ids():
            apply_postprocess(st, rid, pipeline)


@pytest.fixture(scope="module")
def report(tmp_path_factory) -> Path:
    if CHROMIUM is None:
        pytest.skip("chromium is not installed (Debian: apt-get install chromium); the browser check of the "
                    "HTML report is skipped")
    root = tmp_path_factory.mktemp("browser")
    pages = make_pages(root / "pages")
    ctc, seq = make_models(root / "models")
    db = make_store(pages, [ctc, seq], root / "run.sqlite")
    _postprocess(db)
    plan = PlanRequest(pages=5000, deadline="2d", budget=500.0, machines=2, price_core_hour=0.1,
                       correction_price_hour=15.0, draws=200)   # priced, so the cost-accuracy figure is drawn
    return write_report(db, root / "out", truth=pages, plan=plan, n_boot=200, curve_max_workers=4).html


def test_dom_holds_tables_figures_and_headings(report, tmp_path):
    r = _chromium(["--dump-dom", report.as_uri()], tmp_path / "profile")
    assert r.returncode == 0, r.stderr[-2000:]
    dom = collect(r.stdout)
    tags = [t for t, _ in dom.tags]
    assert tags.count("svg") == 7
    assert tags.count("table") >= 6
    assert "script" not in tags
    text = " ".join(dom.text)
    for h in HEADINGS:
        assert h in text, h
    # the hostile ground-truth line arrived as text, not as markup
    assert "<script>alert(1)</script>" in text


def test_screenshot_is_not_blank(report, tmp_path):
    shot = tmp_path / "shot.png"
    r = _chromium([f"--screenshot={shot}", "--window-size=1200,2000", report.as_uri()], tmp_path / "profile")
    assert r.returncode == 0 and shot.is_file(), r.stderr[-2000:]
    grey = np.asarray(Image.open(shot).convert("L"), dtype=float)
    assert grey.shape == (2000, 1200)
    assert grey.var() > 100            # a blank page has variance 0; text, rules and figures raise it
    ink = (grey < 128).mean()
    assert 0.005 < ink < 0.5           # some dark ink on a mostly light page (print-friendly, not inverted)


def test_every_table_fits_a_1366_px_window(report, tmp_path):
    m, log = measure_layout(report, tmp_path, 1366, 768)
    assert m["window"] == 1366
    assert m["document"] <= m["window"], m                      # no horizontal scroll
    assert m["overflowing"] == [], m["overflowing"]              # no table wider than its container
    assert len(m["figures"]) == 7 and all(w > 0 and h > 0 for w, h in m["figures"]), m["figures"]
    assert m["decision_top"] is not None and 0 <= m["decision_top"] < m["height"] / 2   # the decision comes first
    errors = [ln for ln in log.splitlines() if "CONSOLE" in ln and ("Error" in ln or "Uncaught" in ln)]
    assert not errors, errors
    # the first screen, kept as a test artefact (OCRBENCH_TEST_ARTEFACTS names a folder to keep it in)
    keep = Path(os.environ.get("OCRBENCH_TEST_ARTEFACTS") or tmp_path)
    keep.mkdir(parents=True, exist_ok=True)
    shot = keep / "report-top-1366.png"
    r = _chromium([f"--screenshot={shot}", "--window-size=1366,768", report.as_uri()], tmp_path / "profile2")
    assert r.returncode == 0 and shot.is_file(), r.stderr[-2000:]
    assert np.asarray(Image.open(shot).convert("L"), dtype=float).var() > 100
