"""Quality estimates without ground truth, validated on invented pages split into collections.

Nothing is asserted; figures are printed, with ``RATIO <name> <value> <target>`` lines for run_all.py.

1. Invented cash-book pages (ocrbench.synth, never seen in training: new seeds) are rendered into
   collections that differ in fonts and degradation:
   ``serif_clean`` (serif faces, clean), ``sans_clean`` (sans and mono faces, clean),
   ``mixed_degraded`` (every training face, scan degradation), ``condensed_skewed`` (condensed faces,
   skew up to 3°, half degraded); later, two new boxes arrive: ``like_sample`` (pages drawn from the
   four generators above at random, like the keyed sample) and ``worse`` (faces never used in
   training, degradation applied twice plus extra blur).
2. The CTC demo recogniser reads every page into one run store (page ids ``<collection>/<page>``).
3. ``ocrbench sample`` logic picks ≤ 5 % of the first four collections' pages (stratified by collection
   and doubt, Neyman allocation); their ground truth is the keyed sample. This is repeated with
   ``--repeats`` different seeds (default 5) and the figures averaged over the repeats.
4. ``quality`` estimates every collection's CER from the keyed sample alone; the measured CER uses the
   ground truth of every page. Reported: the share of collections whose measured CER lies inside the
   estimate's interval (target ≥ 0.8), whether ``worse`` is flagged as drifted (target 1) and whether
   ``like_sample`` is not (target 0), and the median interval width relative to its estimate.

5. With ``--agreement`` the seq demo recogniser reads the same pages too (run 2), and each keyed sample is
   estimated again with the seq reading's disagreement in the CTC run's doubt: coverage and the median
   interval width with it are printed beside the figures without it.

Run: .venv/bin/python tests/benchmarks/bench_quality.py [--pages N] [--quick] [--keep DIR] [--agreement]
"""

from __future__ import annotations

import argparse
import random
import shutil
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _bench_support import find_models  # noqa: E402

SERIF = ("DejaVuSerif.ttf", "DejaVuSerif-Bold.ttf", "DejaVuSerif-Italic.ttf")
SANS = ("DejaVuSans.ttf", "DejaVuSans-Bold.ttf", "DejaVuSansMono.ttf", "DejaVuSansMono-Bold.ttf")
CONDENSED = ("DejaVuSansCondensed.ttf", "DejaVuSansCondensed-Bold.ttf", "DejaVuSerifCondensed.ttf",
             "DejaVuSerifCondensed-Bold.ttf")
KNOWN = ("serif_clean", "sans_clean", "mixed_degraded", "condensed_skewed")
LATER = ("like_sample", "worse")


def say(msg: str = "") -> None:
    print(msg, flush=True)


def page_image(coll: str, k: int, seed: int):
    """Render page ``k`` of collection ``coll``: (image, truth lines)."""
    from PIL import ImageFilter

    from ocrbench import synth

    rng = random.Random(f"{seed}-{coll}-{k}")
    if coll == "like_sample":
        coll = rng.choice(KNOWN)
    fonts = {"serif_clean": SERIF, "sans_clean": SANS, "mixed_degraded": synth.TRAIN_FONTS,
             "condensed_skewed": CONDENSED, "worse": synth.HELDOUT_FONTS}[coll]
    spec = synth.PageSpec(seed=rng.randrange(10**9), lines_per_page=rng.randint(16, 28),
                          chars_per_line=rng.randint(38, 58), currency=rng.choice(["decimal", "lsd", "lsd_marked"]),
                          font=rng.choice(fonts), font_size=rng.randint(19, 26),
                          degrade=coll in ("mixed_degraded", "worse") or (coll == "condensed_skewed" and k % 2 == 0),
                          rotation_degrees=round(rng.uniform(-3, 3), 2) if coll == "condensed_skewed" else 0.0,
                          folio=1, year=1885)
    img, truth = synth.render_page(spec)
    if coll == "worse":
        img = synth.degrade_page(img.filter(ImageFilter.GaussianBlur(1.1)), rng)
    return img, truth.lines


def build(root: Path, store: Path, models: Path, n_pages: int, seed: int, *, second: bool = False) -> dict[str, list[str]]:
    """Render every collection, read it with the CTC demo recogniser into ``store`` (run 1; with ``second`` the
    seq demo recogniser reads the same pages into run 2); returns truth per page id."""
    from ocrbench.pages import PageRef
    from ocrbench.recognisers.card import load_card
    from ocrbench.recognisers.registry import open_recogniser
    from ocrbench.run.engine import RunOptions, recognise_page
    from ocrbench.store import RunStore

    cards = [load_card(models / m / "card.toml") for m in (("ledger-ctc", "ledger-seq") if second else ("ledger-ctc",))]
    recs = [open_recogniser(c) for c in cards]
    options = RunOptions(prefetch=False)
    truth: dict[str, list[str]] = {}
    with RunStore(store) as st:
        rids = [st.start_run(recogniser=card.name, kind=card.kind, card_path=str(card.path), card_hash=card.card_hash,
                             settings={"bench": "quality"}, input_dir=str(root), host={}, engine="bench")
                for card in cards]
        for coll in KNOWN + LATER:
            (root / coll).mkdir(parents=True, exist_ok=True)
            t0 = time.perf_counter()
            for k in range(n_pages):
                img, lines = page_image(coll, k, seed)
                path = root / coll / f"page_{k:03d}.png"
                img.save(path)
                pid = f"{coll}/{path.name}"
                truth[pid] = lines
                for rid, out in zip(rids, recognise_page(PageRef(path), recs, options=options)):
                    st.write_page(rid, replace(out.page, page_id=pid), out.lines, out.batches)
            say(f"  {coll}: {n_pages} pages in {time.perf_counter() - t0:.0f} s")
        for rid in rids:
            st.finish_run(rid)
    return truth


def write_truth(folder: Path, truth: dict[str, list[str]], page_ids) -> None:
    for pid in page_ids:
        p = folder / pid.replace(".png", ".txt")
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text("".join(t + "\n" for t in truth[pid]), encoding="utf-8")


def summarise(res: dict, measured: dict, *, verbose: bool, seconds: float, keyed_note: str) -> dict:
    """Coverage and drift flags of one keyed sample (printed in full when ``verbose``)."""
    [s] = res["systems"]
    cal = s["calibration"]
    inside, widths = {}, []
    if verbose:
        say(f"keyed sample: {keyed_note}")
        say(f"calibration: {cal['pages']} pages, {cal['lines']} lines, CER {100 * cal['cer']:.2f} % "
            f"[{100 * cal['cer_low']:.2f}-{100 * cal['cer_high']:.2f}]; quality took {seconds:.1f} s")
        say(f"{'collection':18} {'keyed':>5} {'estimated CER [interval]':>28} {'measured':>9} in  "
            f"{'beyond':>6} {'KS D':>5} {'p(Holm)':>7} drift")
    for g in s["groups"]:
        m = measured[g["group"]]["measured_cer"]
        inside[g["group"]] = g["est_low"] is not None and g["est_low"] <= m <= g["est_high"]
        if g["est_cer"]:
            widths.append((g["est_high"] - g["est_low"]) / g["est_cer"])
        d = g["drift"]
        if verbose:
            say(f"{g['group']:18} {g['keyed_pages']:5d} {100 * g['est_cer']:8.2f} % [{100 * g['est_low']:6.2f}-"
                f"{100 * g['est_high']:6.2f}] {100 * m:8.2f} % {'yes' if inside[g['group']] else 'NO ':3} "
                f"{100 * g['beyond_range']:5.1f}% {d['ks_d']:5.2f} {d['ks_p_holm']:7.3f} "
                f"{'; '.join(d['reasons']) or 'no'}")
    flags = {g["group"]: g["drift"]["flagged"] for g in s["groups"]}
    not_worse = [c for c in inside if c != "worse"]
    out = {"inside": sum(inside.values()) / len(inside),
           "inside_not_worse": sum(inside[c] for c in not_worse) / len(not_worse),
           "worse_flagged": float(flags["worse"]), "like_flagged": float(flags["like_sample"]),
           "width_ratio": float(sorted(widths)[len(widths) // 2])}
    say("  sample: " + ", ".join(f"{k} {v:.2f}" for k, v in out.items())
        + "; drifted: " + (", ".join(g for g, f in flags.items() if f) or "none")
        + "; measured outside: " + (", ".join(g for g, i in inside.items() if not i) or "none"))
    like = next(g for g in s["groups"] if g["group"] == "like_sample")
    if like["drift"]["flagged"]:
        say("    like_sample flagged: " + "; ".join(like["drift"]["reasons"]))
    return out


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pages", type=int, default=40, help="pages per collection (default 40)")
    ap.add_argument("--quick", action="store_true", help="12 pages per collection")
    ap.add_argument("--share", type=float, default=0.05, help="keyed share of the first four collections")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--repeats", type=int, default=5, help="keyed samples drawn (seeds seed, seed+1, ...)")
    ap.add_argument("--models", type=Path, default=None)
    ap.add_argument("--keep", type=Path, default=None, help="keep (or reuse) pages and store in this folder")
    ap.add_argument("--agreement", action="store_true", help="the seq demo recogniser reads the pages too; each "
                    "keyed sample is estimated with and without its disagreement in the CTC recogniser's doubt")
    a = ap.parse_args(argv)
    n = 12 if a.quick else a.pages
    models = find_models(a.models, "bench_quality")

    from ocrbench.quality.data import read_snapshot, systems_of
    from ocrbench.quality.estimate import calibrate
    from ocrbench.quality.sample import plan_sample
    from ocrbench.quality.summary import quality

    tmp = Path(tempfile.mkdtemp(prefix="bench_quality_"))
    work = a.keep or tmp
    store = work / "quality.sqlite"
    try:
        truth_file = work / "truth.json"
        import json

        if store.exists() and truth_file.exists():
            truth = json.loads(truth_file.read_text())
            say(f"reusing {store}")
        else:
            work.mkdir(parents=True, exist_ok=True)
            say(f"rendering and reading {n} pages in each of {len(KNOWN + LATER)} collections")
            truth = build(work / "scans", store, models, n, a.seed, second=a.agreement)
            truth_file.write_text(json.dumps(truth))
        every = work / "truth_all"
        shutil.rmtree(every, ignore_errors=True)
        write_truth(every, truth, truth.keys())
        measured = {g["group"]: g for g in quality(store, truth=every, n_boot=200, permutations=9,
                                                   runs=[1])["systems"][0]["groups"]}
        snap = read_snapshot(store)
        known = snap.pages[snap.pages["page_id"].str.split("/").str[0].isin(KNOWN) & (snap.pages["run_id"] == 1)]
        snap_known = replace(snap, pages=known, lines=snap.lines[snap.lines["page_id"].isin(set(known["page_id"]))
                                                                 & (snap.lines["run_id"] == 1)])
        [system] = systems_of(snap_known, runs=[1])
        n_key = max(2, int(a.share * len(known)))
        runs, runs_agree = [], []
        for rep in range(a.repeats):
            # The keyed sample: <= share of the first four collections' pages, drawn before the later boxes arrived.
            plan = plan_sample(snap_known, system, calibrate(system), pages=n_key, seed=a.seed + rep)
            keyed = work / "keyed"
            shutil.rmtree(keyed, ignore_errors=True)
            write_truth(keyed, truth, plan.pages["page_id"])
            t0 = time.perf_counter()
            res = quality(store, truth=keyed, n_boot=1000, permutations=999, seed=a.seed + rep, runs=[1])
            note = (f"{len(plan.pages)} of {len(known)} pages of the first four collections "
                    f"({100 * len(plan.pages) / len(known):.1f} %), {len(plan.pages) / len(truth):.1%} of all pages")
            runs.append(summarise(res, measured, verbose=rep == 0, seconds=time.perf_counter() - t0, keyed_note=note))
            if a.agreement:
                t0 = time.perf_counter()
                res = quality(store, truth=keyed, n_boot=1000, permutations=999, seed=a.seed + rep, runs=[1],
                              agreement=True)
                say("  with the seq recogniser's disagreement in the doubt:")
                runs_agree.append(summarise(res, measured, verbose=rep == 0, seconds=time.perf_counter() - t0,
                                            keyed_note=note))
        mean = {k: sum(r[k] for r in runs) / len(runs) for k in runs[0]}
        if runs_agree:
            agree = {k: sum(r[k] for r in runs_agree) / len(runs_agree) for k in runs_agree[0]}
            say("with disagreement in the doubt: " + ", ".join(f"{k} {v:.2f}" for k, v in agree.items()))
            say(f"RATIO quality_agreement_inside_interval_share {agree['inside']:.3f} info")
            say(f"RATIO quality_agreement_width_ratio_vs_without {agree['width_ratio'] / mean['width_ratio']:.3f} info")
        say(f"over {len(runs)} keyed samples (seeds {a.seed}..{a.seed + len(runs) - 1}): " + ", ".join(
            f"{k} {v:.2f}" for k, v in mean.items()))
        ratios = {"quality_measured_inside_interval_share": (mean["inside"], ">=0.8"),
                  "quality_measured_inside_interval_share_without_worse": (mean["inside_not_worse"], "info"),
                  "quality_worse_collection_flagged": (mean["worse_flagged"], ">=1"),
                  "quality_like_collection_flagged": (mean["like_flagged"], "<=0"),
                  "quality_median_interval_width_ratio": (mean["width_ratio"], "info"),
                  "quality_keyed_share_of_pages": (n_key / len(truth), "<=0.05")}
        for name, (v, target) in ratios.items():
            say(f"RATIO {name} {v:.3f} {target}")
        return ratios
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
