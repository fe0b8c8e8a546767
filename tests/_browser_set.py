"""The browser-rendered test set (tests/fixtures/browser_set/): its ground truth and its CER.

The set is HTML ledger and register tables rendered by headless Chromium, one crop per table row
(``tests/fixtures/browser_set/build.py`` makes it; its README says how). Two things live here:

* :func:`html_rows` reads the ground truth straight from the HTML sources with the standard library's
  ``html.parser`` (no browser): a row's text is its cells' texts joined with one space, whitespace
  collapsed (common keying practice for table lines). The build script writes ``truth.tsv`` with this
  same function, and ``tests/test_browser_set.py`` checks that the committed file still agrees.
* :func:`measure` runs a recogniser card over the committed crops with the engine's public API, the
  same call the runner makes (``open_recogniser(card).recognise(crops)``: the card's own height,
  shading flattening and ``split_gap``), greedy decoding, and returns the CER with a bootstrap interval.
"""

from __future__ import annotations

from dataclasses import dataclass
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
from PIL import Image

SET_DIR = Path(__file__).resolve().parent / "fixtures" / "browser_set"


def collapse(s: str) -> str:
    """Whitespace runs to one space, ends stripped."""
    return " ".join(s.split())


class _Rows(HTMLParser):
    """Collects ``<tr data-line="NNNN">`` rows: per row the list of its cells' texts."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.rows: list[tuple[str, list[str]]] = []
        self._cell: list[str] | None = None
        self._line: str | None = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "tr":
            self._line = a.get("data-line")
            if self._line is not None:
                self.rows.append((self._line, []))
        elif tag in ("td", "th") and self._line is not None:
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self.rows[-1][1].append("".join(self._cell))
            self._cell = None
        elif tag == "tr":
            self._line = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def html_rows(path: Path) -> list[tuple[str, str]]:
    """``(line id, ground truth)`` for each numbered table row of one HTML file, in document order."""
    p = _Rows()
    p.feed(Path(path).read_text(encoding="utf-8"))
    p.close()
    return [(line, collapse(" ".join(c for c in cells if c.strip()))) for line, cells in p.rows]


def read_truth(set_dir: Path = SET_DIR) -> list[tuple[str, str]]:
    """``truth.tsv``: ``(crop file relative to the set, text)`` per line, in file order."""
    out = []
    for raw in (set_dir / "truth.tsv").read_text(encoding="utf-8").splitlines():
        if raw.strip():
            name, text = raw.split("\t", 1)
            out.append((name, text))
    return out


@dataclass
class SetScore:
    """CER of one recogniser on the set: edits / reference characters, with a 95 % line-bootstrap interval."""

    model: str
    lines: int
    chars: int
    edits: int
    interval: tuple[float | None, float | None]
    pairs: list[tuple[str, str, str, int]]     # (crop file, reference, hypothesis, edits) per line

    @property
    def cer(self) -> float:
        return self.edits / max(1, self.chars)

    def summary(self) -> str:
        lo, hi = self.interval
        ci = f"[{lo:.4f}, {hi:.4f}]" if lo is not None and hi is not None else "[n/a]"
        return (f"{self.model}: browser-set CER {self.cer:.4f} (95% line-bootstrap {ci}), "
                f"{self.lines} lines, {self.chars} characters, {self.edits} edits")


def measure(card_dir: Path, set_dir: Path = SET_DIR, *, batch_size: int = 16,
            input_changes: dict | None = None) -> SetScore:
    """Greedy CER of the recogniser card in ``card_dir`` on the set's crops, whitespace collapsed.

    ``input_changes`` (diagnosis only, never in the target test): ``[input]`` fields to change from the
    card's own, e.g. ``{"remove_rules": True}`` or ``{"split_gap": 0.0}``.
    """
    import dataclasses

    # rapidfuzz's Levenshtein distance (unit-cost insert/delete/substitute): the reference edit distance.
    from rapidfuzz.distance import Levenshtein

    from ocrbench.accuracy.stats import bootstrap_ratio_ci
    from ocrbench.recognisers.base import EngineOptions
    from ocrbench.recognisers.card import load_card
    from ocrbench.recognisers.registry import open_recogniser

    truth = read_truth(set_dir)
    crops = [np.asarray(Image.open(set_dir / name).convert("L")) for name, _ in truth]
    card = load_card(card_dir)
    if input_changes:
        card = dataclasses.replace(card, input=dataclasses.replace(card.input, **input_changes))
    rec = open_recogniser(card, options=EngineOptions(batch_size=batch_size, decoding="greedy"))
    results, _ = rec.recognise(crops)
    pairs = []
    for (name, ref), r in zip(truth, results):
        ref_c, hyp_c = collapse(ref), collapse(r.text)
        pairs.append((name, ref_c, hyp_c, Levenshtein.distance(ref_c, hyp_c)))
    edits = np.array([p[3] for p in pairs], dtype=float)
    chars = np.array([len(p[1]) for p in pairs], dtype=float)
    # lines are the resampled unit: the project's expanded percentile bootstrap of a ratio of sums
    interval = bootstrap_ratio_ci(edits, chars, n_boot=2000, seed=0)
    return SetScore(model=Path(card_dir).name, lines=len(pairs), chars=int(chars.sum()),
                    edits=int(edits.sum()), interval=interval, pairs=pairs)
