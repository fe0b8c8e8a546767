"""How well and how fast the demo recognisers read print they were not trained on.

Measures, for the shipped models (``--models``) and optionally an earlier build
side by side (``--before DIR`` holding ledger-ctc/ and ledger-seq/):

* held-out design families (models/linegen.py), clean and degraded: CER, greedy,
  whitespace collapsed, with a Wilson interval on the character error rate
  (characters treated as trials: an approximation) and per family;
* the browser-rendered set (tests/fixtures/browser_set, if present; measured by its test helper,
  tests/_browser_set.py, with its 95 % bootstrap over lines);
* scikit-image's photographed ``page`` (reference data), its five body lines;
* the demo archive's first pages: the seq model on whole table lines against the
  same lines cut at wide gaps (the card's ``split_gap``); with ``--before``, every demo page read by
  both builds, edits paired over pages (a 95 % bootstrap);
* lines per second at batch 16 (the held-out lines), new against before, timed
  alternately in one run (a ratio; absolute figures depend on the machine's load).

Run:  .venv/bin/python tests/benchmarks/bench_models.py [--before DIR] [--lines 200] [--pages 4] [--kinds seq]
"""

from __future__ import annotations

import argparse
import dataclasses
import sys
import time
from pathlib import Path

import numpy as np
from rapidfuzz.distance import Levenshtein       # reference library for the edit distance

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _bench_support import ROOT, SCANS, find_models, say  # noqa: E402

sys.path.insert(0, str(ROOT / "models"))
import linegen  # noqa: E402

from ocrbench.intervals import wilson_interval  # noqa: E402
from ocrbench.pages import IMAGE_SUFFIXES  # noqa: E402
from ocrbench.recognisers.card import load_card  # noqa: E402
from ocrbench.recognisers.engine import EngineOptions  # noqa: E402
from ocrbench.recognisers.registry import open_recogniser  # noqa: E402

PAGE_BODY = ["Let us first determine markers of the coins and the",
             "background. These markers are pixels that we can label",
             "unambiguously as either object or background. Here,",
             "the markers are found at the two extreme parts of the",
             "histogram of grey values:"]        # skimage.data.page(), transcribed by hand


def ws(s: str) -> str:
    return " ".join(s.split())


def errors(refs, hyps) -> tuple[int, int]:
    return (sum(Levenshtein.distance(ws(r), ws(h)) for r, h in zip(refs, hyps)),
            sum(len(ws(r)) for r in refs))


def fmt(e: int, n: int) -> str:
    lo, hi = wilson_interval(min(e, n), n)
    return f"{100 * e / n:.2f} % [{100 * lo:.2f}-{100 * hi:.2f}] ({n} chars)"


def open_rec(folder: Path, batch: int = 16, **input_fields):
    card = load_card(folder)
    if input_fields:
        card = dataclasses.replace(card, input=dataclasses.replace(card.input, **input_fields))
    return open_recogniser(card, options=EngineOptions(batch_size=batch))


def read(rec, images) -> list[str]:
    results, _ = rec.recognise([np.asarray(im) for im in images])
    return [r.text for r in results]


def families(rec, name: str, lines, label: str) -> float:
    hyps = read(rec, [im for im, _, _ in lines])
    e, n = errors([t for _, t, _ in lines], hyps)
    say(f"{name} held-out families {label}: {fmt(e, n)}")
    per = {}
    for (_, t, fam), h in zip(lines, hyps):
        a, b = per.get(fam, (0, 0))
        de, dn = errors([t], [h])
        per[fam] = (a + de, b + dn)
    for fam, (a, b) in sorted(per.items()):
        say(f"    {fam:28s} {100 * a / max(b, 1):6.2f} %  ({b} chars)")
    return e / n


def browser_set(folder: Path, name: str) -> float | None:
    """The committed browser-rendered set, measured by its own test helper (tests/_browser_set.py)."""
    if not (ROOT / "tests" / "fixtures" / "browser_set" / "truth.tsv").exists():
        say(f"{name} browser set: not present")
        return None
    sys.path.insert(0, str(ROOT / "tests"))
    from _browser_set import measure
    score = measure(folder)
    say(f"{name} browser-rendered set: {score.summary()}")
    return score.cer


def photographed_page(rec, name: str) -> float:
    from skimage import data as skdata            # reference data: a photographed book page
    from ocrbench.pages import analyse_page
    crops = [ln.crop for ln in analyse_page(skdata.page()).lines[1:6]]
    e, n = errors(PAGE_BODY, read(rec, crops))
    say(f"{name} scikit-image page, body lines: {fmt(e, n)}")
    return e / n


def demo_pages(folder: Path, name: str, n_pages: int) -> tuple[float, float]:
    """CER over whole pages (lines joined) reading whole lines, and lines cut at wide gaps."""
    from ocrbench.pages import PageRef, analyse_page, load_page
    pages = sorted(SCANS.glob("page_*.jpg"))[:n_pages] or sorted(SCANS.glob("page_*.png"))[:n_pages]
    whole, cut = open_rec(folder, split_gap=0.0), open_rec(folder, split_gap=1.0)
    ew = ec = nn = 0
    for p in pages:
        truth = p.with_suffix(".txt").read_text(encoding="utf-8").splitlines()
        crops = [ln.crop for ln in analyse_page(load_page(PageRef(p)).gray).lines]
        ref = "\n".join(truth)
        ew += Levenshtein.distance(ref, "\n".join(ws(t) for t in read(whole, crops)))
        ec += Levenshtein.distance(ref, "\n".join(ws(t) for t in read(cut, crops)))
        nn += len(ref)
    say(f"{name} demo pages ({len(pages)}): whole lines {fmt(ew, nn)}; cut at gaps {fmt(ec, nn)}")
    return ew / nn, ec / nn


def demo_archive_paired(now: Path, before: Path, name: str, n_pages: int) -> None:
    """Page text (lines joined, whitespace collapsed per line) of the demo archive read by two builds,
    edits summed over pages, and the paired difference with a 95 % bootstrap over pages."""
    from ocrbench.pages import PageRef, analyse_page, load_page
    pages = sorted(p for p in SCANS.glob("page_*") if p.suffix.lower() in IMAGE_SUFFIXES)[:n_pages]
    recs = {"now": open_rec(now), "before": open_rec(before)}
    edits = {k: [] for k in recs}
    chars = 0
    for p in pages:
        ref = "\n".join(ws(t) for t in p.with_suffix(".txt").read_text(encoding="utf-8").splitlines())
        crops = [ln.crop for ln in analyse_page(load_page(PageRef(p)).gray).lines]
        chars += len(ref)
        for k, rec in recs.items():
            edits[k].append(Levenshtein.distance(ref, "\n".join(ws(t) for t in read(rec, crops))))
    d = np.array(edits["now"]) - np.array(edits["before"])
    boot = d[np.random.default_rng(0).integers(0, len(d), (10_000, len(d)))].sum(1) / chars
    say(f"{name} demo archive ({len(pages)} pages, {chars} chars): now {sum(edits['now'])} edits, "
        f"before {sum(edits['before'])}; paired difference {100 * d.sum() / chars:+.3f} points, "
        f"95 % bootstrap over pages [{100 * np.percentile(boot, 2.5):+.3f}, {100 * np.percentile(boot, 97.5):+.3f}]")


def speed(folders: list[tuple[str, Path]], lines, rounds: int = 3) -> dict[str, float]:
    recs = {name: open_rec(f) for name, f in folders}
    imgs = [np.asarray(im) for im, _, _ in lines]
    best = {name: float("inf") for name in recs}
    for _ in range(rounds):                       # alternate: both see the same load
        for name, rec in recs.items():
            t0 = time.perf_counter()
            rec.recognise(imgs)
            best[name] = min(best[name], time.perf_counter() - t0)
    return {name: len(imgs) / t for name, t in best.items()}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--models", type=Path, default=None)
    ap.add_argument("--before", type=Path, default=None, help="an earlier build (ledger-ctc/, ledger-seq/) to compare")
    ap.add_argument("--lines", type=int, default=200)
    ap.add_argument("--pages", type=int, default=4)
    ap.add_argument("--archive-pages", type=int, default=24, help="demo pages read by both builds (with --before)")
    ap.add_argument("--kinds", nargs="+", choices=["ctc", "seq"], default=["ctc", "seq"],
                    help="which demo recognisers to measure (both by default)")
    a = ap.parse_args(argv)
    models = find_models(a.models, "bench_models")
    clean = linegen.heldout_family_lines(a.lines, degraded=False)
    degraded = linegen.heldout_family_lines(a.lines, degraded=True)
    builds = [("now", models)] + ([("before", a.before)] if a.before else [])
    for build, root in builds:
        for kind in a.kinds:
            folder = root / f"ledger-{kind}"
            name = f"{build}/{kind}"
            rec = open_rec(folder)
            c = families(rec, name, clean, "clean")
            d = families(rec, name, degraded, "degraded")
            b = browser_set(folder, name)
            p = photographed_page(rec, name)
            print(f"RATIO {build}_{kind}_heldout_clean_cer {c:.4f} <={0.02 if kind == 'ctc' else 0.03}")
            print(f"RATIO {build}_{kind}_heldout_degraded_cer {d:.4f} <={0.02 if kind == 'ctc' else 0.03}")
            if b is not None:
                print(f"RATIO {build}_{kind}_browser_cer {b:.4f} <=0.03")
            print(f"RATIO {build}_{kind}_photographed_page_cer {p:.4f} {'<=0.10' if kind == 'ctc' else 'info'}")
        if "seq" in a.kinds:
            w, c = demo_pages(root / "ledger-seq", f"{build}/seq", a.pages)
            print(f"RATIO {build}_seq_whole_over_cut_cer {w / max(c, 1e-9):.3f} <=1.5")
    if a.before:
        for kind in a.kinds:
            demo_archive_paired(models / f"ledger-{kind}", a.before / f"ledger-{kind}", kind, a.archive_pages)
            lps = speed([("now", models / f"ledger-{kind}"), ("before", a.before / f"ledger-{kind}")], clean[:128])
            say(f"{kind} lines/s at batch 16: now {lps['now']:.1f}, before {lps['before']:.1f}")
            print(f"RATIO {kind}_lines_per_s_now_over_before {lps['now'] / lps['before']:.3f} >=0.8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
