"""Shared set-up of the report, browser and demo tests: real pages, real tiny ONNX models, a real run store.

Nothing is mocked: pages are rendered by ``synth``, the recognisers are the
tiny ONNX models of ``_tiny_models`` run by onnxruntime through the runner,
and the store is a real SQLite file.
"""

from __future__ import annotations

import html.parser
import json
import re
import shutil
import subprocess
from pathlib import Path

import _tiny_models as tm
from ocrbench import synth

#: Debian's chromium, where installed (the browser checks skip without it).
CHROMIUM = shutil.which("chromium") or ("/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)

#: A ground-truth line that a careless report would execute.
SCRIPT_LINE = "Paid <script>alert(1)</script> & Co 12.50"


def make_pages(folder: Path, *, n: int = 3, seed: int = 23, script_line: bool = True) -> Path:
    """``n`` invented ledger pages with ground truth beside them; page 1's second line holds a script tag."""
    synth.write_archive(folder, synth.ArchiveSpec(n_pages=n, lines_per_page=(3, 4), chars_per_line=(20, 30),
                                                  seed=seed, degraded_share=0.0, skewed_share=0.0))
    for p in folder.glob("*.json"):
        p.unlink()
    if script_line:
        first = sorted(folder.glob("*.txt"))[0]
        lines = first.read_text(encoding="utf-8").splitlines()
        lines[1] = SCRIPT_LINE
        first.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return folder


def make_models(root: Path) -> tuple[Path, Path]:
    """The tiny CTC and seq recognisers, in folders named like the demo's (their cards say tiny-ctc, tiny-seq)."""
    return tm.write_ctc(root / "ledger-ctc"), tm.write_seq(root / "ledger-seq")


def make_store(pages: Path, models: list[Path], db: Path) -> Path:
    """Run the runner for real: every page with every model into ``db``."""
    from ocrbench.run.engine import run_pages
    from ocrbench.store import RunStore

    with RunStore(db) as st:
        run_pages(pages, models, store=st)
    return db


class Collector(html.parser.HTMLParser):
    """Every start tag with its attributes, and every element that carries a ``data-key`` with its text."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.figures: list[tuple[str, str, str]] = []      # (data-key, data-fmt, text)
        self._open: list[list] = []                         # stack of [key, fmt, text parts, depth]
        self._depth = 0
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag in ("br", "meta", "img", "input", "link", "hr", "col", "area", "base", "wbr", "source"):
            return
        self._depth += 1
        if "data-key" in a:
            self._open.append([a["data-key"], a.get("data-fmt"), [], self._depth])

    def handle_startendtag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_endtag(self, tag):
        if self._open and self._open[-1][3] == self._depth:
            key, kind, parts, _ = self._open.pop()
            self.figures.append((key, kind, "".join(parts)))
        self._depth -= 1

    def handle_data(self, data):
        self.text.append(data)
        for item in self._open:
            item[2].append(data)


def collect(text: str) -> Collector:
    c = Collector()
    c.feed(text)
    c.close()
    return c


_NUM = re.compile(r"^-?[\d,]*\.?\d+$")


def parse_shown(text: str, kind: str) -> tuple[float | str | bool | None, float]:
    """A figure as shown on the page, read back: (value, tolerance) — written independently of the report code.

    The tolerance is half a unit of the last digit shown (a correctly rounded
    figure lies within it of the exact value; common practice).
    """
    t = text.strip()
    if t == "n/a":
        return None, 0.0
    if kind == "text":
        return t, 0.0
    if kind == "bool":
        if t.startswith("unknown ("):                  # a goal the plan could not judge: no value
            return None, 0.0
        assert t in ("yes", "no"), t
        return t == "yes", 0.0

    def number(s: str) -> tuple[float, float]:
        s = s.strip()
        assert _NUM.match(s), f"not a plain number: {s!r}"
        decimals = len(s.split(".")[1]) if "." in s else 0
        return float(s.replace(",", "")), 0.5 * 10 ** -decimals

    if kind in ("pct", "pct1"):
        assert t.endswith(" %"), t
        v, tol = number(t[:-2])
        return v / 100, tol / 100
    if kind == "ms":
        assert t.endswith(" ms"), t
        v, tol = number(t[:-3])
        return v / 1000, tol / 1000
    if kind == "dur":
        # units of time: 1 min = 60 s, 1 h = 3600 s, 1 d = 86400 s, 1 w = 7 d (common practice)
        units = {"s": 1, "min": 60, "h": 3600, "d": 86400, "w": 604800}
        num, unit = t.rsplit(" ", 1)
        v, tol = number(num)
        return v * units[unit], tol * units[unit]
    v, tol = number(t)
    return v, tol


def chromium(args: list[str], profile: Path, timeout: float = 120) -> subprocess.CompletedProcess:
    """Run headless chromium with background networking off and its own profile folder."""
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
           "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={profile}", *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)


# Measures the laid-out page in the browser and writes the result into the DOM that --dump-dom prints.
# It goes into a copy of the report only: the report itself holds no script.
MEASURE = """<script>
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


def measure_layout(report: Path, tmp_path: Path, width: int, height: int) -> tuple[dict, str]:
    """The laid-out page measured in chromium at ``width`` x ``height`` (see MEASURE), and chromium's log."""
    probe = tmp_path / "probe.html"
    probe.write_text(report.read_text(encoding="utf-8").replace("</body>", MEASURE + "</body>"), encoding="utf-8")
    r = chromium(["--dump-dom", f"--window-size={width},{height}", "--virtual-time-budget=5000",
                  "--enable-logging=stderr", "--v=0", probe.as_uri()], tmp_path / "profile")
    assert r.returncode == 0, r.stderr[-2000:]
    text = r.stdout.split('<pre id="layout-result">', 1)[1].split("</pre>", 1)[0]
    return json.loads(text.replace("&quot;", '"').replace("&amp;", "&")), r.stderr
