"""The report in a real browser: Debian's chromium, headless, with background networking switched off.

Checks that the rendered DOM holds the tables, the inline SVG figures and
the section headings, that no script element exists after parsing, and that a
screenshot is not blank (pixel variance, with Pillow). Skipped with a message
only where chromium is not installed.
"""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from _report_support import collect, make_models, make_pages, make_store
from ocrbench.report import PlanRequest, write_report

pytestmark = [pytest.mark.browser, pytest.mark.slow]

CHROMIUM = shutil.which("chromium") or ("/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)

HEADINGS = ("Recognisers side by side", "Paired comparison", "Plan for the archive", "Figures",
            "Accuracy against throughput", "Error rate by character class", "Distribution of CER per page",
            "Decode time per line against characters per line", "Planned wall-clock against workers",
            "Worst pages, line by line", "Runs: host and settings", "Cautions")


def _chromium(args: list[str], profile: Path, timeout: float = 120) -> subprocess.CompletedProcess:
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
           "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={profile}", *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)


@pytest.fixture(scope="module")
def report(tmp_path_factory) -> Path:
    if CHROMIUM is None:
        pytest.skip("chromium is not installed (Debian: apt-get install chromium); the browser check of the "
                    "HTML report is skipped")
    root = tmp_path_factory.mktemp("browser")
    pages = make_pages(root / "pages")
    ctc, seq = make_models(root / "models")
    db = make_store(pages, [ctc, seq], root / "run.sqlite")
    plan = PlanRequest(pages=5000, deadline="2d", budget=500.0, machines=2, price_core_hour=0.1, draws=200)
    return write_report(db, root / "out", truth=pages, plan=plan, n_boot=200, curve_max_workers=4).html


def test_dom_holds_tables_figures_and_headings(report, tmp_path):
    r = _chromium(["--dump-dom", report.as_uri()], tmp_path / "profile")
    assert r.returncode == 0, r.stderr[-2000:]
    dom = collect(r.stdout)
    tags = [t for t, _ in dom.tags]
    assert tags.count("svg") == 5
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
