"""Where the held-out-family errors are: CER of the test's lines split by type size and ink contrast.

The held-out-family lines of ``tests/test_retrained_models.py`` and ``bench_models.py``
(``models/linegen.heldout_family_lines``, 150 clean and 150 degraded by default) are drawn again with
the same seeds, and each line's x-height (the font's ``x`` above the baseline, in pixels, at the size
``render_line`` chose) and ink contrast (the crop's median grey minus its 1st percentile) are recorded
as it is drawn; the recogniser's CER (greedy as its card decodes, whitespace collapsed; Levenshtein
distance by rapidfuzz, a reference library) is then reported per stratum. The issue's training spec
goes down to an x-height of 6 px, and so does the generator (``linegen.X_HEIGHT_FLOOR``); it also draws
faint ink, whose contrast is recorded here. Type of 6-7 px x-height is reported apart from larger type:
the degradations (blur, a resample to half size and back, noise, JPEG) take the most from the smallest type.

Run:  .venv/bin/python tests/benchmarks/bench_heldout_strata.py [--models DIR] [--kinds ctc seq] [--lines 150]
"""

from __future__ import annotations

import argparse
import collections
import random
import sys
from pathlib import Path

import numpy as np
from rapidfuzz.distance import Levenshtein       # reference library for the edit distance

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _bench_support import ROOT, find_models, say  # noqa: E402

sys.path.insert(0, str(ROOT / "models"))
import linegen  # noqa: E402

from ocrbench.recognisers.card import load_card  # noqa: E402
from ocrbench.recognisers.registry import open_recogniser  # noqa: E402


def lines_with_strata(n: int, degraded: bool, seed: int = 20261202):
    """The same lines as ``linegen.heldout_family_lines(n, degraded=...)``, each with (x-height px, contrast)."""
    rng = random.Random(seed + (1 if degraded else 0))
    faces = linegen.faces(linegen.HELDOUT_FAMILIES)
    used = []
    load = linegen.load_font

    def recording(path, size):
        used.append((path, size))
        return load(path, size)

    linegen.load_font = recording
    try:
        out = []
        while len(out) < n:
            used.clear()
            img, text, kind, _ = linegen.render_line(rng, faces, degrade=degraded)
            if kind in linegen.TEST_KINDS and text:
                path, size = used[-1]                  # (the size drawn; smallest_size probes first)
                xh = linegen.x_height(path, size)
                a = np.asarray(img, dtype=np.float64)
                out.append((img, text, xh, float(np.median(a) - np.percentile(a, 1))))
    finally:
        linegen.load_font = load
    return out


def strata(rec, rows, batch: int = 32) -> dict[str, tuple[int, int, int]]:
    hyps = []
    for i in range(0, len(rows), batch):
        res, _ = rec.recognise([np.asarray(r[0]) for r in rows[i: i + batch]])
        hyps += [r.text for r in res]
    agg = collections.defaultdict(lambda: [0, 0, 0])
    for (_, text, xh, con), hyp in zip(rows, hyps):
        ref = " ".join(text.split())
        e = Levenshtein.distance(ref, " ".join(hyp.split()))
        keys = ["all", "x-height >= 6 px" if xh >= 6 else "x-height < 6 px",
                "contrast >= 80" if con >= 80 else "contrast < 80",
                "x-height 6-7 px" if 6 <= xh <= 7 else "x-height >= 8 px" if xh >= 8 else "x-height < 6 px"]
        if xh >= 6 and con >= 80:
            keys.append("x-height >= 6 px and contrast >= 80")
        for k in keys:
            agg[k][0] += e
            agg[k][1] += len(ref)
            agg[k][2] += 1
    return {k: tuple(v) for k, v in agg.items()}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--models", type=Path, default=None)
    ap.add_argument("--kinds", nargs="+", choices=["ctc", "seq"], default=["ctc", "seq"])
    ap.add_argument("--lines", type=int, default=150)
    a = ap.parse_args(argv)
    models = find_models(a.models, "bench_heldout_strata")
    for degraded in (False, True):
        rows = lines_with_strata(a.lines, degraded)
        for kind in a.kinds:
            rec = open_recogniser(load_card(models / f"ledger-{kind}"))
            say(f"ledger-{kind}, {'degraded' if degraded else 'clean'}:")
            found = strata(rec, rows)
            for k, (e, n, c) in sorted(found.items()):
                say(f"  {k:36s} {c:4d} lines {n:6d} chars  CER {100 * e / max(n, 1):6.2f} %")
            cond = "degraded" if degraded else "clean"
            for k, name in (("x-height >= 6 px and contrast >= 80", "xheight6_contrast80"),
                            ("x-height >= 8 px", "xheight8")):
                if k in found:
                    e, n, _ = found[k]
                    print(f"RATIO {kind}_heldout_{cond}_cer_{name} {e / max(n, 1):.4f} info")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
