"""Post-processing's measured effect on the demo archive, per recogniser and per character class, and how
often the ledger arithmetic catches a misread amount. Nothing is asserted; figures are printed.

1. Both demo recognisers read the demo archive (scans_demo/, 24 pages with ground truth) through the
   runner with the demo's post-processing pipeline (unicode, whitespace, lexicon with the invented
   firm's word list, ledger_repair), so raw and post-processed text come from one run.
2. CER before and after, overall and per character class, with the paired bootstrap interval of the
   difference over pages (ocrbench.postprocess.effect.cer_before_after). A class is "raised" when the
   whole interval lies above zero: post-processing must raise none.
3. The arithmetic check's detection rate for lines with a misread amount: on the recognisers' own
   pages (real misreads, few on clean demo pages), and on the ground-truth pages with one amount digit
   altered per page (simulated misreads, many), with Wilson intervals.

Prints ``RATIO <name> <value> <target>`` lines for tests/benchmarks/run_all.py.

Run: .venv/bin/python tests/benchmarks/bench_postprocess.py [--store FILE] [--pages N]
(``--store``: reuse a store already holding both recognisers' runs of scans_demo with post-processed
text, e.g. the demo's demo.sqlite.)
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _bench_support import SCANS, pages_subset, say  # noqa: E402



def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--store", type=Path, default=None)
    ap.add_argument("--pages", type=int, default=None, help="only the first N demo pages (default: all 24)")
    ap.add_argument("--models", type=Path, default=ROOT / "models")
    ap.add_argument("--boot", type=int, default=2000)
    a = ap.parse_args(argv)

    from ocrbench.io.text import pair_store_pages, read_text_lines
    from ocrbench.demo import demo_pipeline, firm_words
    from ocrbench.postprocess.effect import amount_misread_detection, cer_before_after, simulate_misreads
    from ocrbench.run.engine import run_pages
    from ocrbench.store import RunStore

    results: dict = {}
    with tempfile.TemporaryDirectory() as td:
        tmp = Path(td)
        store = a.store
        pipeline = demo_pipeline(firm_words())
        if store is None:
            store = tmp / "post.sqlite"
            pages = pages_subset(a.pages, tmp)
            say(f"reading {pages} with both demo recognisers and the demo pipeline ...")
            run_pages(pages, [a.models / "ledger-ctc", a.models / "ledger-seq"], store=store, postprocess=pipeline)
        say(f"pipeline: {pipeline.recipe}")
        with RunStore(store, read_only=True) as st:
            runs = [(rid, st.run_info(rid)) for rid in st.run_ids() if st.post_recipe(rid) is not None]
            texts = {rid: (st.page_texts(rid), st.page_texts(rid, post=True)) for rid, _ in runs}
        truth_pages_all = []
        for rid, info in runs:
            raw, post = texts[rid]
            pairing = pair_store_pages(SCANS, raw.keys())
            triples = [(str(pid), read_text_lines(tp), raw[str(pid)], post[str(pid)]) for _, tp, pid in pairing.pairs]
            if not truth_pages_all:
                truth_pages_all = [t for _, t, _, _ in triples]
            df = cer_before_after(triples, n_boot=a.boot)
            say(f"\n{info.recogniser} (run {rid}, {len(triples)} pages): CER before -> after post-processing, "
                f"paired 95% interval of the difference over pages")
            say(f"  {'class':8s} {'chars':>6s} {'before':>8s} {'after':>8s} {'diff':>9s} {'interval':>22s} raised")
            for r in df.to_dict(orient="records"):
                if not r["ref_chars"] or r["cer_before"] != r["cer_before"]:
                    continue
                ci = ("[{:+8.3%}, {:+8.3%}]".format(r["low"], r["high"]) if r["low"] is not None and r["high"] is not None
                      else "(no interval)")
                say(f"  {r['class']:8s} {r['ref_chars']:6d} {r['cer_before']:8.3%} {r['cer_after']:8.3%} "
                    f"{r['diff']:+9.3%} {ci:>22s} {'YES' if r['raised'] else 'no'}")
            overall = df.iloc[0]
            det = amount_misread_detection([t for _, t, _, _ in triples], [p for _, _, p, _ in triples])
            say(f"  arithmetic check on this recogniser's raw pages: {det.misread_lines} lines with a misread "
                f"amount, {det.detected} on pages it flagged"
                + (f" ({det.detection_rate:.0%} [{det.detection_low:.0%}-{det.detection_high:.0%}])"
                   if det.detection_rate is not None else "")
                + f", {det.located} pointed at; {det.false_alarms} of {det.clean_pages} clean pages flagged")
            results[info.kind] = {"cer_before": float(overall.cer_before), "cer_after": float(overall.cer_after),
                                  "low": float(overall.low), "high": float(overall.high),
                                  "classes_raised": int(df["raised"].sum()), "detection_real": det.to_dict()}
        sims = simulate_misreads(truth_pages_all, per_page=1, seed=1)
        det = amount_misread_detection(truth_pages_all, [p for p, _ in sims])
        say(f"\nsimulated: one amount digit altered on each of {len(sims)} ground-truth pages: {det.detected} of "
            f"{det.misread_lines} detected ({det.detection_rate:.0%} [{det.detection_low:.0%}-"
            f"{det.detection_high:.0%}]), {det.located} pointed at the altered line ({det.location_rate:.0%})")
        results["detection_simulated"] = det.to_dict()
    say("")
    for kind, r in results.items():
        if kind == "detection_simulated":
            say(f"RATIO arithmetic_check_detection_rate_simulated {r['detection_rate']:.3f} info")
            continue
        say(f"RATIO postprocess_cer_after_vs_before_{kind} {r['cer_after'] / r['cer_before']:.3f} info")
        say(f"RATIO postprocess_classes_raised_{kind} {r['classes_raised']} <=0")
    return results


if __name__ == "__main__":
    main()
