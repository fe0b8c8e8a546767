"""Routing by doubt on the demo archive: CER and compute of routed runs against each recogniser alone.

Issue 20, target: a routed run's CER at most the better single recogniser's upper interval bound, at
<= 0.5x the slower recogniser's compute. On the demo models the CTC recogniser is both the faster and
the more accurate one, so the issue's case (a slow, more accurate reader behind a fast one) cannot be
shown with them; both directions are measured and printed, with that note:

* ``ledger-ctc -> ledger-seq``: the fast reader first, the slow (less accurate) one on doubted lines;
* ``ledger-seq -> ledger-ctc`` (roles reversed): the encoder-decoder reads every line and the CTC model
  re-reads the lines it doubts, i.e. the CTC model plays the "more accurate reader".

For each, one routed run per threshold X (doubt > X), X set so that a given share of the fast reader's
lines in the plain run would be routed; on scans_demo/ (24 pages); compute =
model seconds (model runs + decoder steps + collapse) of both readers, from the store; CER with its
page-bootstrap interval. The two recognisers alone come from a plain run in the same process.

Prints ``RATIO <name> <value> <target>`` lines for tests/benchmarks/run_all.py.

Run: .venv/bin/python tests/benchmarks/bench_route.py [--pages N] [--shares 0.1,0.25,0.5] [--models DIR]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _bench_support import SCANS, find_models, pages_subset, say  # noqa: E402




def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pages", type=int, default=None, help="only the first N demo pages (default: all 24)")
    ap.add_argument("--models", type=Path, default=None)
    ap.add_argument("--shares", default="0.1,0.25,0.5",
                    help="route these shares of the lines: each threshold is set from the fast reader's doubts "
                         "in the plain run (run.route.threshold_for_share)")
    ap.add_argument("--boot", type=int, default=1000)
    a = ap.parse_args(argv)

    from ocrbench.accuracy.score import score_pages
    from ocrbench.io.text import pair_store_pages, read_text_lines
    from ocrbench.run.engine import RunOptions, run_pages
    from ocrbench.run.route import Route, RouteCost, expected_cost, line_doubts, threshold_for_share
    from ocrbench.run.routed import run_routed
    from ocrbench.store import RunStore

    models = find_models(a.models, "bench_route")
    ctc, seq = models / "ledger-ctc", models / "ledger-seq"
    shares = [float(x) for x in a.shares.split(",")]
    opts = RunOptions(prefetch=False)
    rows = []
    with tempfile.TemporaryDirectory() as td:
        tmp = Path(td)
        pages = pages_subset(a.pages, tmp)
        truth: dict[str, list[str]] = {}

        def cer(texts: dict[str, list[str]]):
            if not truth:
                for _, tp, pid in pair_store_pages(SCANS, texts.keys()).pairs:
                    truth[str(pid)] = read_text_lines(tp)
            s = score_pages([(p, truth[p], texts[p]) for p in sorted(truth)], classes=False, n_boot=a.boot).summary
            return s["cer"], s["cer_low"], s["cer_high"]

        db = tmp / "single.sqlite"
        say(f"reading {pages} with each recogniser alone ...")
        single, doubts = {}, {}
        with RunStore(db) as st:
            for r in run_pages(pages, [ctc, seq], store=st, options=opts).recognisers:
                single[r.name] = (r.model_seconds, *cer(st.page_texts(r.run_id)), r.lines)
                rows_of = [st.page_lines(r.run_id, p) for p in st.done_page_ids(r.run_id)]
                doubts[r.name] = [d for rr in rows_of for d in line_doubts([x[1] for x in rr], [x[2] for x in rr])]
        for name, (sec, c, lo, hi, n) in single.items():
            say(f"  {name:12s} alone: model {sec:7.2f} s, CER {c:.3%} [{lo:.3%}-{hi:.3%}] on {n} lines")
        for fast, slow in (("ledger-ctc", "ledger-seq"), ("ledger-seq", "ledger-ctc")):
            for share in shares:
                x = round(threshold_for_share(doubts[fast], share), 4)
                route = Route(fast, slow, x)
                with RunStore(tmp / f"{fast}_{x}.sqlite") as st:
                    s = run_routed(pages, [models / fast, models / slow], route, store=st, options=opts)
                    f, sl, r = s.recognisers
                    routed = len(st.read_frames([sl.run_id])["lines"])
                    c, lo, hi = cer(st.page_texts(r.run_id))
                sec = f.model_seconds + sl.model_seconds
                slower_name = max(single, key=lambda k: single[k][0])
                slower = single[slower_name][0]
                # the machine's speed drifts between runs (other work on it): the route's FAST part, read in
                # the routed run itself, rescaled by the SLOW/FAST ratio measured side by side in the plain
                # run, gives each recogniser alone at the routed run's speed
                scale = f.model_seconds / single[fast][0]
                slower_now = slower * scale
                got = RouteCost(lines=f.lines, routed=routed, fast_seconds=f.model_seconds,
                                slow_seconds=sl.model_seconds)
                predicted = expected_cost(single[fast][0], single[slow][0], got.share) / slower
                better_hi = min(single[fast][3], single[slow][3])
                rows.append({"route": str(route), "share": got.share, "seconds": sec, "vs_slower_raw": sec / slower,
                             "vs_slower": got.vs_slow_alone(slower_now), "predicted": predicted, "cer": c,
                             "low": lo, "high": hi, "fast": fast, "x": x, "want": share,
                             "meets": c <= better_hi and got.vs_slow_alone(slower_now) <= 0.5})
                say(f"  {str(route):42s}: {got.share:6.1%} of lines routed, model {sec:7.2f} s = "
                    f"{got.vs_slow_alone(slower_now):.2f} x {slower_name} alone at this run's speed "
                    f"({sec / slower:.2f} x uncorrected; fast all + share x slow all predicts {predicted:.2f}), "
                    f"CER {c:.3%} [{lo:.3%}-{hi:.3%}] (better alone: upper bound {better_hi:.3%})")
    say("")
    for r in rows:
        tag = f"{r['fast'].split('-')[1]}_first_share{r['want']:g}"
        say(f"RATIO route_compute_vs_slower_{tag} {r['vs_slower']:.3f} info")
        say(f"RATIO route_cer_{tag} {r['cer']:.5f} info")
    return {"single": single, "routes": rows}


if __name__ == "__main__":
    main()
