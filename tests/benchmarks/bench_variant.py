"""Quantised variants of the demo CTC recogniser: model time and CER against the float model, on the demo archive.

Issue 20, target: a quantised CTC variant >= 1.2x faster in model time (model time quantised / float
<= 0.833) with its CER inside the paired interval of the float model (the interval of the CER
difference over pages holds zero).

1. ``quantise_card`` writes three variants of models/ledger-ctc: dynamic int8 of LSTM + MatMul (the
   default), dynamic int8 of every operator, and static int8 of Conv + LSTM + MatMul calibrated on the
   lines of freshly invented pages (synth seed 7: not the demo archive's pages, so no test page is
   seen in calibration).
2. The runner reads the demo archive (scans_demo/, 24 pages with ground truth) with the float model
   and the variants in one run: each page is read by all of them one after another, so machine
   noise falls on all alike. Model time = the model runs (``t_encode``) summed over pages.
3. CER of each against the ground truth and the paired bootstrap comparison with the float model
   (ocrbench.accuracy.stats.paired_comparison, pages resampled).

Prints ``RATIO <name> <value> <target>`` lines for tests/benchmarks/run_all.py.

Run: .venv/bin/python tests/benchmarks/bench_variant.py [--pages N] [--models DIR]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _bench_support import SCANS, find_models, images_only, pages_subset, say  # noqa: E402

TARGET = 1 / 1.2



def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pages", type=int, default=None, help="only the first N demo pages (default: all 24)")
    ap.add_argument("--models", type=Path, default=None)
    ap.add_argument("--boot", type=int, default=2000)
    ap.add_argument("--calibration-pages", type=int, default=3)
    a = ap.parse_args(argv)

    from ocrbench import synth
    from ocrbench.accuracy.score import score_pages
    from ocrbench.accuracy.stats import paired_comparison
    from ocrbench.io.text import pair_store_pages, read_text_lines
    from ocrbench.recognisers.variant import parse_ops, quantise_card
    from ocrbench.run.engine import RunOptions, run_pages
    from ocrbench.run.lines import page_line_crops
    from ocrbench.store import RunStore

    models = find_models(a.models, "bench_variant")
    src = models / "ledger-ctc"
    results: dict = {}
    with tempfile.TemporaryDirectory() as td:
        tmp = Path(td)
        cal = tmp / "calibration"
        synth.write_archive(cal, synth.ArchiveSpec(n_pages=a.calibration_pages, seed=7))
        crops, _ = page_line_crops(images_only(cal), limit=256)
        variants = {
            "dynamic_lstm_matmul": quantise_card(src, tmp / "dyn", ops=parse_ops("lstm,matmul")),
            "dynamic_all": quantise_card(src, tmp / "dyn_all", ops=parse_ops("all")),
            "static_conv_lstm_matmul": quantise_card(src, tmp / "static", ops=parse_ops("conv,lstm,matmul"),
                                                     calibration=crops),
        }
        say(f"calibration for the static variant: {len(crops)} lines of {a.calibration_pages} invented pages")
        pages = pages_subset(a.pages, tmp)
        store = tmp / "variants.sqlite"
        cards = [src] + [v.card.folder for v in variants.values()]
        say(f"reading {pages} with the float model and {len(variants)} variants ...")
        run_pages(pages, cards, store=store, options=RunOptions(prefetch=False))
        with RunStore(store, read_only=True) as st:
            frames = st.read_frames()
            runs = {st.run_info(r).recogniser: r for r in st.run_ids()}
            texts = {name: st.page_texts(rid) for name, rid in runs.items()}
        p = frames["pages"]
        model_time = {name: float(p[(p.run_id == rid) & (p.status == "done")].t_encode.sum())
                      for name, rid in runs.items()}
        pairing = pair_store_pages(SCANS, texts["ledger-ctc"].keys())
        truth = {str(pid): read_text_lines(tp) for _, tp, pid in pairing.pairs}
        scores = {name: score_pages([(pid, truth[pid], t[pid]) for pid in sorted(truth)], classes=False,
                                    n_boot=a.boot) for name, t in texts.items()}
        base = scores["ledger-ctc"]
        say(f"\nfloat ledger-ctc: model time {model_time['ledger-ctc']:.2f} s, CER "
            f"{base.summary['cer']:.3%} on {len(truth)} pages")
        for key, v in variants.items():
            name = v.card.name
            cmp = paired_comparison(scores[name], base, n_boot=a.boot, names=(name, "ledger-ctc"))
            ratio = model_time[name] / model_time["ledger-ctc"]
            inside = cmp["low"] is not None and cmp["low"] <= 0 <= cmp["high"]
            ci = (f"[{cmp['low']:+.3%}, {cmp['high']:+.3%}], p={cmp['p_value']:.2f}" if cmp["low"] is not None
                  else "(no interval: fewer than 2 pages)")
            say(f"{name:34s} ({key}): model time {model_time[name]:.2f} s = {ratio:.3f} x float "
                f"({1 / ratio:.2f}x faster); CER {cmp['value_a']:.3%} vs {cmp['value_b']:.3%}, diff "
                f"{cmp['diff']:+.3%} {ci}; {'inside' if inside else 'OUTSIDE'} the paired interval; size "
                f"{v.bytes_after['model'] / 1e6:.1f} MB of {v.bytes_before['model'] / 1e6:.1f}")
            results[key] = {"name": name, "model_time_ratio": ratio, "cer": cmp["value_a"],
                            "cer_float": cmp["value_b"], "diff": cmp["diff"], "low": cmp["low"],
                            "high": cmp["high"], "p_value": cmp["p_value"], "inside": inside}
    say("")
    for key, r in results.items():
        target = f"<={TARGET:.3f}" if key == "dynamic_lstm_matmul" else "info"
        say(f"RATIO variant_model_time_{key}_vs_float_ctc {r['model_time_ratio']:.3f} {target}")
        say(f"RATIO variant_cer_diff_inside_paired_interval_{key}_ctc {int(r['inside'])} "
            f"{'>=1' if key == 'dynamic_lstm_matmul' else 'info'}")
    return results


if __name__ == "__main__":
    main()
