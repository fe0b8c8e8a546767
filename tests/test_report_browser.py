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

import json
import os
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
            "Archive cost against accuracy",
            "Worst pages, line by line", "Runs: host and settings", "Cautions")


def _chromium(args: list[str], profile: Path, timeout: float = 120) -> subprocess.CompletedProcess:
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
           "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={profile}", *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)


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
    plan = PlanRequest(pages=5000, deadline="2d", budget=500.0, machines=2, price_core_hour=0.1, draws=200,
                       correction_price_hour=20.0)   # people priced too, so the plan has a total cost
    return write_report(db, root / "out", truth=pages, plan=plan, n_boot=200, curve_max_workers=4).html


def test_dom_holds_tables_figures_and_headings(report, tmp_path):
    r = _chromium(["--dump-dom", report.as_uri()], tmp_path / "profile")
    assert r.returncode == 0, r.stderr[-2000:]
    dom = collect(r.stdout)
    tags = [t for t, _ in dom.tags]
    assert tags.count("svg") == 6
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


# Measures the laid-out page in the browser and writes the result into the DOM that --dump-dom prints.
# It goes into a copy of the report only: the report itself holds no script.
_MEASURE = """<script>
addEventListener('load', () => {
  const doc = document.documentElement;
  const over = [];
  for (const t of document.querySelectorAll('table')) {
    const box = t.parentElement.clientWidth;
    if (t.getBoundingClientRect().width > box + 1 || t.scrollWidth > box + 1) {
      const cap = t.querySelector('caption, th');
      over.push({table: cap ? cap.textContent.slice(0, 60) : '?', width: Math.round(t.scrollWidth), box: box});
    }
  }
  const figs = [...document.querySelectorAll('figure svg')].map(e => {
    const r = e.getBoundingClientRect(); return [Math.round(r.width), Math.round(r.height)]; });
  const dec = document.getElementById('decision');
  const out = {window: innerWidth, height: innerHeight, document: doc.scrollWidth, overflowing: over,
               figures: figs, decision_top: dec ? dec.getBoundingClientRect().top : null};
  const pre = document.createElement('pre');
  pre.id = 'layout-result';
  pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
});
</script>"""


def _measure(report: Path, tmp_path: Path, width: int, height: int) -> tuple[dict, str]:
    probe = tmp_path / "probe.html"
    probe.write_text(report.read_text(encoding="utf-8").replace("</body>", _MEASURE + "</body>"), encoding="utf-8")
    r = _chromium(["--dump-dom", f"--window-size={width},{height}", "--virtual-time-budget=5000",
                   "--enable-logging=stderr", "--v=0", probe.as_uri()], tmp_path / "profile")
    assert r.returncode == 0, r.stderr[-2000:]
    text = r.stdout.split('<pre id="layout-result">', 1)[1].split("</pre>", 1)[0]
    return json.loads(text.replace("&quot;", '"').replace("&amp;", "&")), r.stderr


def test_every_table_fits_a_1366_px_window(report, tmp_path):
    m, log = _measure(report, tmp_path, 1366, 768)
    assert m["window"] == 1366
    assert m["document"] <= m["window"], m                      # no horizontal scroll
    assert m["overflowing"] == [], m["overflowing"]              # no table wider than its container
    assert len(m["figures"]) == 6 and all(w > 0 and h > 0 for w, h in m["figures"]), m["figures"]
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
