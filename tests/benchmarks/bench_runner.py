"""Runner benchmarks: ratios measured side by side in one run and printed. Nothing is asserted.

What it measures (issue 4):

1. the runner's model time vs bare ``session.run`` on the same batches (overhead);
2. ocrbench pages/hour vs the script a user would otherwise write (each page, each
   line, one ``session.run`` at batch 1, greedy decoding, no cache for the seq
   model), on the same pages and threads, and whether the text is identical;
3. CTC lines/s at batch 16 vs batch 1;
4. seq cached vs uncached decoding at about 40 characters per line;
5. batched seq greedy vs one line at a time, and finished lines dropped vs masked;
6. decode time per line against characters per line for both kinds (the
   autoregressive slope).

Each comparison alternates its two sides ``--repeats`` times and keeps the best
time of each (the least disturbed by other work on the machine).

Run::

    .venv/bin/python tests/benchmarks/bench_runner.py [--pages 8] [--threads 1] [--repeats 3]
    .venv/bin/pytest tests/benchmarks/bench_runner.py -s          # the same, quick sizes

Needs the demo models in models/ (``python models/build.py export``); pass
``--models DIR`` for others.
"""

from __future__ import annotations

import argparse
import itertools
import json
import math
import random
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from _bench_support import images_only  # noqa: E402
from ocrbench import synth  # noqa: E402
from ocrbench.pages import analyse_page, list_pages, load_page  # noqa: E402
from ocrbench.recognisers.base import EngineOptions  # noqa: E402
from ocrbench.recognisers.registry import open_recogniser
from ocrbench.recognisers.card import load_card  # noqa: E402
from ocrbench.run.engine import run_pages  # noqa: E402
from ocrbench.store import RunStore  # noqa: E402

clock = time.perf_counter
RESULTS: dict = {}


def say(msg: str = "") -> None:
    print(msg, flush=True)


def best_of(repeats: int, *fns):
    """Run the functions alternately ``repeats`` times; return each one's best time and its last result."""
    times = [math.inf] * len(fns)
    outs = [None] * len(fns)
    for _ in range(repeats):
        for i, fn in enumerate(fns):
            t0 = clock()
            outs[i] = fn()
            times[i] = min(times[i], clock() - t0)
    return times, outs


# --------------------------------------------------------------------------- inputs


def demo_pages(folder: Path, n: int) -> Path:
    scans = ROOT / "scans_demo"
    from ocrbench.pages import IMAGE_SUFFIXES

    have = sorted(p for p in scans.glob("*") if p.suffix.lower() in IMAGE_SUFFIXES) if scans.is_dir() else []
    folder.mkdir(parents=True, exist_ok=True)
    if len(have) >= n:
        for p in have[:n]:
            (folder / p.name).symlink_to(p)
    else:
        synth.write_archive(folder, synth.ArchiveSpec(n_pages=n, seed=3))
        images_only(folder)
    return folder


def page_crops(pages: Path) -> list[np.ndarray]:
    crops = []
    for ref in list_pages(pages):
        crops += [lb.crop for lb in analyse_page(load_page(ref).gray).lines]
    return crops


def lines_of_length(n_chars: int, count: int, seed: int = 0) -> tuple[list[np.ndarray], list[str]]:
    """Lines of about ``n_chars`` characters, rendered as the demo pages are (one serif face, size 22)."""
    rng = random.Random(seed * 1000 + n_chars)
    fnt = synth.font("DejaVuSerif.ttf", 22)
    crops, texts = [], []
    for _ in range(count):
        text = synth.prose_line(rng, n_chars)[:n_chars].strip()
        img = synth.render_line([text], fnt, rng, ink=20, gap_range=(1.0, 1.0))
        img = synth.pad_like_segmenter(synth.crop_ink(img), rng)
        crops.append(np.asarray(img))
        texts.append(text)
    return crops, texts


# --------------------------------------------------------------------------- the plain script


def plain_tensor(crop: np.ndarray, spec) -> tuple[np.ndarray, int]:
    h, w = crop.shape
    new_w = max(spec.min_width, int(round(w * spec.height / h)))
    img = np.asarray(Image.fromarray(crop).resize((new_w, spec.height), Image.BILINEAR), dtype=np.float32)
    x = (255.0 - img) * spec.scale if spec.invert else img * spec.scale
    W = int(math.ceil(new_w / spec.width_multiple) * spec.width_multiple)
    t = np.full((1, 1, spec.height, W), (0.0 if spec.invert else 255.0 * spec.scale), np.float32)
    t[0, 0, :, :new_w] = x
    return t, new_w


class PlainScript:
    """What a user would write without ocrbench: each page, each line, batch 1, greedy, no cache."""

    def __init__(self, card, threads: int):
        import onnxruntime as ort

        so = ort.SessionOptions()
        so.intra_op_num_threads = threads
        so.inter_op_num_threads = 1
        self.card = card
        mk = lambda p: ort.InferenceSession(str(p), so, providers=["CPUExecutionProvider"])  # noqa: E731
        if card.kind == "ctc":
            self.sess = mk(card.ctc.model)
        else:
            self.enc = mk(card.seq.encoder.model)
            self.dec = mk(card.seq.decoder_full.model)

    def line(self, crop: np.ndarray) -> str:
        """One line; with the card's split_gap, each piece between wide gaps alone, joined with a space."""
        if self.card.input.split_gap > 0:
            from ocrbench.pages.segment import split_at_gaps

            spans = split_at_gaps(crop, self.card.input.split_gap)
            if len(spans) > 1:
                texts = [self.piece(crop[:, a:b]) for a, b in spans]
                return " ".join(t.strip() for t in texts if t.strip()) or texts[0].strip()
        return self.piece(crop)

    def piece(self, crop: np.ndarray) -> str:
        spec = self.card.input
        x, w = plain_tensor(crop, spec)
        if self.card.kind == "ctc":
            c = self.card.ctc
            logits = self.sess.run(None, {c.input: x})[0][0]
            best = np.argmax(logits[: math.ceil(w * c.frames_per_pixel)], axis=1)
            return "".join(c.symbols[k] for k, _ in itertools.groupby(best.tolist()) if k != c.blank_index)
        s = self.card.seq
        mem = self.enc.run(None, {s.encoder.input: x})
        frames = mem[0].shape[s.encoder.frames_axis]
        mask = np.where(np.arange(frames) < math.ceil(w * s.frames_per_pixel), 0.0, -1e9).astype(np.float32)[None]
        toks = [s.bos_index]
        feeds = dict(zip(s.decoder_full.memory, mem))
        feeds[s.decoder_full.memory_mask] = mask
        for _ in range(s.max_tokens):
            feeds[s.decoder_full.tokens] = np.array([toks], np.int64)
            y = self.dec.run(None, feeds)[0]
            k = int(np.argmax(y[0, -1] if y.ndim == 3 else y[0]))     # (a graph may score every position)
            if k == s.eos_index:
                break
            toks.append(k)
        return "".join(s.symbols[t] for t in toks[1:])

    def pages(self, folder: Path) -> tuple[dict[str, list[str]], float]:
        out, t_rec = {}, 0.0
        for ref in list_pages(folder):
            lines = analyse_page(load_page(ref).gray).lines
            t0 = clock()
            out[ref.id] = [self.line(lb.crop) for lb in lines]
            t_rec += clock() - t0
        return out, t_rec


# --------------------------------------------------------------------------- 1. overhead


def bare_greedy_seq(rec, pb) -> tuple[float, float]:
    """A bare cached greedy loop with drop-out, straight on the sessions; returns (session time, total time).

    Encodes each line alone and stacks the memories, as the runner does by default."""
    s = rec.s
    e = s.encoder
    fa, ba = e.frames_axis, e.batch_axis
    t_total0 = clock()
    t_sess = 0.0
    parts, valid = [], []
    for i, w in enumerate(pb.widths):
        W_i = int(math.ceil(w / 4) * 4)
        x = np.ascontiguousarray(pb.tensor[i:i + 1, :, :, :W_i])
        t0 = clock()
        parts.append(rec.encoder.run(list(e.outputs), {e.input: x}))
        t_sess += clock() - t0
        valid.append(math.ceil(w * s.frames_per_pixel))
    S = max(p[0].shape[fa] for p in parts)
    mem = []
    for j in range(len(e.outputs)):
        pieces = []
        for p in parts:
            pad = [(0, 0)] * p[j].ndim
            pad[fa] = (0, S - p[j].shape[fa])
            pieces.append(np.pad(p[j], pad))
        mem.append(np.concatenate(pieces, axis=ba))
    mask = np.where(np.arange(S)[None, :] < np.asarray(valid)[:, None], 0.0, -1e9).astype(np.float32)
    B = pb.tensor.shape[0]
    cache = rec._init_cache(B)
    tok = np.full((B, 1), s.bos_index, np.int64)
    ds = s.decoder_step
    ba, ca = s.encoder.batch_axis, ds.batch_axis
    for step in range(rec.max_tokens):
        feeds = {ds.tokens: tok, ds.step: np.array(step, np.int64), ds.memory_mask: mask,
                 **dict(zip(ds.past, cache)), **dict(zip(ds.memory, mem))}
        t0 = clock()
        out = rec.step_session.run(None, feeds)
        t_sess += clock() - t0
        nxt = np.argmax(out[0], axis=1)
        keep = np.flatnonzero(nxt != s.eos_index)
        if keep.size == 0:
            break
        cache = [np.take(c, keep, axis=ca) for c in out[1:]]
        mem = [np.take(m, keep, axis=ba) for m in mem]
        mask = mask[keep]
        tok = nxt[keep][:, None]
    return t_sess, clock() - t_total0


def overhead(card, crops, threads: int, repeats: int) -> None:
    # like for like with the bare loop: the seq decoder alone, token by token (no CTC scores, no draft)
    extra = dict(ctc_weight=0.0, draft=False) if card.kind == "seq" and card.seq.ctc is not None else {}
    rec = open_recogniser(card, options=EngineOptions(batch_size=16, intra_threads=threads, **extra))
    batches = rec.prepare(crops)
    best = {"bare_model": math.inf, "bare_total": math.inf, "runner_model": math.inf, "runner_total": math.inf}
    for _ in range(repeats):
        if card.kind == "ctc":
            c = card.ctc
            t_sess = 0.0
            t_all = clock()
            for pb in batches:
                t0 = clock()
                y = rec.session.run([c.output], {c.input: pb.tensor})[0]
                t_sess += clock() - t0
                np.argmax(y, axis=2)
            bare = (t_sess, clock() - t_all)
        else:
            parts = [bare_greedy_seq(rec, pb) for pb in batches]
            bare = (sum(p[0] for p in parts), sum(p[1] for p in parts))
        model = total = 0.0
        for pb in batches:
            _, tm = rec.run_batch(pb)
            model += tm.t_encode + tm.t_steps
            total += tm.t_encode + tm.t_steps + tm.t_collapse
        best["bare_model"] = min(best["bare_model"], bare[0])
        best["bare_total"] = min(best["bare_total"], bare[1])
        best["runner_model"] = min(best["runner_model"], model)
        best["runner_total"] = min(best["runner_total"], total)
    r = best["runner_model"] / best["bare_model"]
    say(f"  {card.kind:4s} model time, runner / bare session.run: {r:.3f}  "
        f"(runner {best['runner_model']:.3f} s, bare {best['bare_model']:.3f} s; {len(batches)} batches, "
        f"{len(crops)} lines)")
    say(f"  {card.kind:4s} model + decode, runner / bare loop:    {best['runner_total'] / best['bare_total']:.3f}  "
        f"(runner {best['runner_total']:.3f} s incl. confidences, bare {best['bare_total']:.3f} s argmax only)")
    RESULTS[f"overhead_{card.kind}"] = {**best, "ratio_model": r, "batches": len(batches), "lines": len(crops)}


# --------------------------------------------------------------------------- 2. vs the plain script


def vs_plain_script(card, pages: Path, threads: int, repeats: int, tmp: Path) -> None:
    """End to end on the same pages; ocrbench with and without prefetch (a second thread that loads and
    segments the next page: the plain script has none, so 'no prefetch' is the strictly same-threads figure)."""
    from ocrbench.run.engine import RunOptions

    plain = PlainScript(card, threads)
    # the same job as the plain script: a seq card's decoder alone (no CTC scores, so no draft either)
    extra = dict(ctc_weight=0.0) if card.kind == "seq" and card.seq.ctc is not None else {}
    engine = EngineOptions(batch_size=16, intra_threads=threads, **extra)
    n_pages = len(list_pages(pages))
    best = {"plain": math.inf, "serial": math.inf, "prefetch": math.inf}
    rec = {"plain": math.inf, "serial": math.inf}
    ours = {}
    for i in range(repeats):
        t0 = clock()
        plain_texts, t_rec = plain.pages(pages)
        best["plain"] = min(best["plain"], clock() - t0)
        rec["plain"] = min(rec["plain"], t_rec)
        for mode, prefetch in (("serial", False), ("prefetch", True)):
            with RunStore(tmp / f"vs_{card.kind}_{mode}_{i}.sqlite") as st:
                s = run_pages(pages, [card], store=st, options=RunOptions(engine=engine, prefetch=prefetch),
                              fresh=True)
                best[mode] = min(best[mode], s.wall_seconds)
                run_id = s.recognisers[0].run_id
                ours[mode] = st.page_texts(run_id)
                if mode == "serial":
                    p = st.read_frames([run_id])["pages"]
                    rec["serial"] = min(rec["serial"], float((p.t_total - p.t_load - p.t_segment).sum()))
    lines = [(a, b) for k in plain_texts for a, b in zip(plain_texts[k], ours["serial"].get(k, []))]
    same = sum(a == b for a, b in lines)
    ph = {k: 3600 * n_pages / v for k, v in best.items()}
    say(f"  {card.kind:4s} pages/hour ocrbench / plain script, same threads: {best['plain'] / best['serial']:.2f}  "
        f"(ocrbench {ph['serial']:,.0f} p/h, plain {ph['plain']:,.0f} p/h; {n_pages} pages, load + segment included)")
    say(f"  {card.kind:4s}   with prefetch (one more thread loads/segments): {best['plain'] / best['prefetch']:.2f}  "
        f"({ph['prefetch']:,.0f} p/h)")
    say(f"  {card.kind:4s}   recognition only (load + segment left out): {rec['plain'] / rec['serial']:.2f}  "
        f"(ocrbench {rec['serial']:.2f} s, plain {rec['plain']:.2f} s)")
    say(f"  {card.kind:4s}   ceiling: plain script / ocrbench recognition alone = {best['plain'] / rec['serial']:.2f}  "
        "(what hiding all loading and segmentation behind recognition could give at most)")
    say(f"  {card.kind:4s}   identical text: {same}/{len(lines)} lines"
        f"{'' if ours['serial'] == ours['prefetch'] else ' (prefetch text differs!)'}")
    RESULTS[f"vs_plain_{card.kind}"] = {"ratio_same_threads": best["plain"] / best["serial"],
                                        "ratio_prefetch": best["plain"] / best["prefetch"],
                                        "ratio_recognition": rec["plain"] / rec["serial"],
                                        "ceiling_full_overlap": best["plain"] / rec["serial"], "pages": n_pages,
                                        "seconds": best, "identical_lines": same, "lines": len(lines)}


# --------------------------------------------------------------------------- 3-5. batch, cache, drop


def compare(label: str, key: str, card, crops, a: dict, b: dict, threads: int, repeats: int) -> None:
    ra = open_recogniser(card, options=EngineOptions(intra_threads=threads, **a))
    rb = open_recogniser(card, options=EngineOptions(intra_threads=threads, **b))
    (ta, tb), (oa, ob) = best_of(repeats, lambda: ra.recognise(crops)[0], lambda: rb.recognise(crops)[0])
    same = sum(x.text == y.text for x, y in zip(oa, ob))
    n = len(crops)
    say(f"  {label}: {tb / ta:.2f}x  ({n / ta:.1f} vs {n / tb:.1f} lines/s; identical text {same}/{n})")
    RESULTS[key] = {"ratio": tb / ta, "lines_per_s_a": n / ta, "lines_per_s_b": n / tb, "identical": same, "lines": n}


# --------------------------------------------------------------------------- 6. slope


def slope(cards: dict, threads: int, repeats: int, counts=(10, 20, 40, 60, 80), n_lines: int = 16) -> None:
    """ms per line against characters per line: CTC, seq token by token (the autoregressive cost), and seq
    as its card decodes (drafted when it has a CTC output: recognisers/verify.py)."""
    recs = {k: open_recogniser(c, options=EngineOptions(intra_threads=threads, batch_size=16))
            for k, c in cards.items()}
    recs["seq_tok"] = open_recogniser(cards["seq"], options=EngineOptions(intra_threads=threads, batch_size=16,
                                                                          draft=False))
    drafted = getattr(recs["seq"], "drafting", False)
    rows = []
    for n in counts:
        crops, texts = lines_of_length(n, n_lines)
        chars = float(np.mean([len(t) for t in texts]))
        (tc, ts, td), _ = best_of(repeats, lambda: recs["ctc"].recognise(crops),
                                  lambda: recs["seq_tok"].recognise(crops), lambda: recs["seq"].recognise(crops))
        rows.append((chars, 1000 * tc / n_lines, 1000 * ts / n_lines, 1000 * td / n_lines))
    say(f"  {'chars/line':>10s} {'CTC ms/line':>12s} {'seq ms/line':>12s} {'seq/CTC':>8s} "
        f"{'seq drafted' if drafted else 'seq (card)':>12s}")
    for chars, c, s_, d in rows:
        say(f"  {chars:10.1f} {c:12.2f} {s_:12.2f} {s_ / c:8.2f} {d:12.2f}")
    x = np.array([r[0] for r in rows])
    fit = {}
    for j, kind in ((1, "ctc"), (2, "seq"), (3, "seq_drafted")):
        k, b = np.polyfit(x, np.array([r[j] for r in rows]), 1)
        fit[kind] = (k, b)
        say(f"  {kind:11s} fit: {k:.3f} ms per character + {b:.2f} ms per line")
    say(f"  the autoregressive slope is {fit['seq'][0] / fit['ctc'][0]:.1f}x the CTC slope per character "
        f"(token by token); {fit['seq_drafted'][0] / fit['ctc'][0]:.1f}x {'drafted' if drafted else 'as the card decodes'}")
    c2, c1, c0 = np.polyfit(x, np.array([r[2] for r in rows]), 2)
    say(f"  seq quadratic fit: {c2 * 1000:.2f} us/char^2 + {c1:.3f} ms/char + {c0:.2f} ms (each step attends to "
        f"every memory frame and every earlier position, and both grow with the line)")
    RESULTS["slope"] = {"rows": rows, "fit_ms_per_char": {k: v[0] for k, v in fit.items()},
                        "fit_ms_per_line": {k: v[1] for k, v in fit.items()}}


# --------------------------------------------------------------------------- main


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--models", type=Path, default=ROOT / "models")
    ap.add_argument("--pages", type=int, default=8)
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--json-out", type=Path, default=None)
    a = ap.parse_args(argv)
    cards = {k: load_card(a.models / f"ledger-{k}") for k in ("ctc", "seq")}
    import onnxruntime as ort

    say(f"ocrbench runner benchmarks: onnxruntime {ort.__version__}, {a.threads} thread(s), "
        f"best of {a.repeats}, {a.pages} pages")
    with tempfile.TemporaryDirectory() as td:
        tmp = Path(td)
        pages = demo_pages(tmp / "pages", a.pages)
        crops = page_crops(pages)
        say(f"{len(crops)} lines on {a.pages} pages")
        say("\n1. runner overhead on the same batches")
        for k in ("ctc", "seq"):
            overhead(cards[k], crops, a.threads, a.repeats + 2)
        say("\n2. ocrbench vs the plain script (each page, each line, batch 1, greedy, seq uncached)")
        for k in ("ctc", "seq"):
            vs_plain_script(cards[k], pages, a.threads, max(1, a.repeats - 1), tmp)
        say("\n3. CTC batching")
        compare("CTC lines/s batch 16 vs batch 1", "ctc_batch", cards["ctc"], crops,
                dict(batch_size=16), dict(batch_size=1), a.threads, a.repeats)
        say("\n4. seq key/value cache at ~40 characters per line (token by token, no draft)")
        c40, _ = lines_of_length(40, 32)
        tok = dict(draft=False)
        compare("seq cached vs uncached", "seq_cache", cards["seq"], c40, dict(use_cache=True, **tok),
                dict(use_cache=False, **tok), a.threads, a.repeats)
        if cards["seq"].seq.ctc is not None:
            say("   drafted greedy (the CTC best path checked in one decoder pass) vs token by token")
            compare("seq drafted vs token by token, ~40 characters", "seq_draft_40", cards["seq"], c40,
                    dict(draft=True), tok, a.threads, a.repeats)
            compare("seq drafted vs token by token (page lines)", "seq_draft_pages", cards["seq"], crops,
                    dict(draft=True), tok, a.threads, a.repeats)
        say("\n5. seq batching (token by token)")
        compare("seq batched greedy (16) vs one line at a time", "seq_batch", cards["seq"], c40,
                dict(batch_size=16, **tok), dict(batch_size=1, **tok), a.threads, a.repeats)
        compare("seq finished lines dropped vs masked (page lines)", "seq_drop_mask", cards["seq"], crops,
                dict(batch_mode="drop", **tok), dict(batch_mode="mask", **tok), a.threads, a.repeats)
        compare("seq encoder on each line alone vs on the padded batch (page lines)", "seq_encoder_per_line",
                cards["seq"], crops, dict(encoder_per_line=True, **tok), dict(encoder_per_line=False, **tok),
                a.threads, a.repeats)
        one = open_recogniser(cards["seq"], options=EngineOptions(intra_threads=a.threads, batch_size=1))
        base = [r.text for r in one.recognise(crops)[0]]
        for per_line in (True, False):
            rec = open_recogniser(cards["seq"], options=EngineOptions(intra_threads=a.threads,
                                                                     encoder_per_line=per_line))
            got = [r.text for r in rec.recognise(crops)[0]]
            same = sum(x == y for x, y in zip(base, got))
            say(f"    encoder {'per line' if per_line else 'per batch'}: batch 16 text equals batch 1 text on "
                f"{same}/{len(base)} lines")
            RESULTS[f"seq_identical_to_batch1_{'per_line' if per_line else 'per_batch'}"] = same / len(base)
        say("\n6. decode time per line against characters per line (batch 16)")
        slope(cards, a.threads, a.repeats)
    if a.json_out:
        a.json_out.write_text(json.dumps(RESULTS, indent=1))
    ratio_lines(RESULTS)
    return RESULTS


def ratio_lines(res: dict) -> None:
    """The figures as ``RATIO <name> <value> <target>`` lines, for tests/benchmarks/run_all.py."""
    for k, target in (("ctc", ">=2"), ("seq", ">=1.5")):
        if f"overhead_{k}" in res:
            say(f"RATIO runner_vs_bare_session_run_model_time_{k} {res[f'overhead_{k}']['ratio_model']:.3f} <=1.05")
        if f"vs_plain_{k}" in res:
            v = res[f"vs_plain_{k}"]
            say(f"RATIO pages_per_hour_vs_plain_script_{k} {v['ratio_same_threads']:.3f} {target}")
            say(f"RATIO pages_per_hour_vs_plain_script_with_prefetch_{k} {v['ratio_prefetch']:.3f} info")
            say(f"RATIO pages_per_hour_vs_plain_script_ceiling_{k} {v['ceiling_full_overlap']:.3f} info")
    for key, name in (("ctc_batch", "ctc_lines_per_s_batch16_vs_batch1"), ("seq_cache", "seq_cached_vs_uncached"),
                      ("seq_draft_40", "seq_drafted_vs_token_by_token_40_chars"),
                      ("seq_draft_pages", "seq_drafted_vs_token_by_token_page_lines"),
                      ("seq_batch", "seq_batched_greedy_vs_per_line"), ("seq_drop_mask", "seq_drop_vs_mask")):
        if key in res:
            say(f"RATIO {name} {res[key]['ratio']:.3f} info")
    if "slope" in res and res["slope"]["fit_ms_per_char"]["ctc"] > 0:
        f = res["slope"]["fit_ms_per_char"]
        say(f"RATIO seq_vs_ctc_ms_per_character_slope {f['seq'] / f['ctc']:.3f} info")
        say(f"RATIO seq_drafted_vs_ctc_ms_per_character_slope {f['seq_drafted'] / f['ctc']:.3f} info")


def test_runner_benchmarks():
    """pytest entry (tests/benchmarks is not collected by default): quick sizes, prints the ratios."""
    import pytest

    if not (ROOT / "models" / "ledger-seq" / "card.toml").exists():
        pytest.skip("demo models not built yet")
    main(["--pages", "2", "--repeats", "2"])


if __name__ == "__main__":
    main()
