"""What the seq repetition guard costs: the demo seq recogniser on demo-archive line crops, guard on vs off.

Reads the same crops with the shipped card and with a copy whose ``[seq]`` says ``repeat_guard = false``,
rounds interleaved (on, off, off, on, ...) so load drifts hit both, and prints the median per-round ratio of
wall time (on / off) for greedy and beam decoding (``RATIO`` lines for run_all.py; target <= 1.05), plus how many lines the guard cut and whether the texts
are identical. A ratio, never an absolute time (the machine may be busy: say so beside any figure quoted).

    python tests/benchmarks/bench_repeat_guard.py [--pages 4] [--rounds 5] [--models models/]
"""

from __future__ import annotations

import argparse
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(ROOT))

from _bench_support import find_models, say  # noqa: E402
from ocrbench.pages import analyse_page, list_pages, load_page  # noqa: E402
from ocrbench.recognisers.base import EngineOptions  # noqa: E402
from ocrbench.recognisers.card import load_card  # noqa: E402
from ocrbench.recognisers.registry import open_recogniser  # noqa: E402
from ocrbench.recognisers import seq as seq_module  # noqa: E402


def guard_off_copy(folder: Path, dest: Path) -> Path:
    out = shutil.copytree(folder, dest)
    card = out / "card.toml"
    text = card.read_text(encoding="utf-8")
    card.write_text(text.replace("\n[seq]\n", "\n[seq]\nrepeat_guard = false\n", 1), encoding="utf-8")
    return out


def guard_share(rec, crops) -> float:
    """The share of one reading's wall time spent inside the guard's own calls (RepeatState.step for greedy,
    advance for beam), timed by wrapping them for this one pass: robust to load, unlike the on/off ratio."""
    spent = [0.0]
    step, adv = seq_module.RepeatState.step, seq_module.advance

    def timed(f):
        def run(*a, **kw):
            t0 = time.perf_counter()
            try:
                return f(*a, **kw)
            finally:
                spent[0] += time.perf_counter() - t0
        return run

    seq_module.RepeatState.step, seq_module.advance = timed(step), timed(adv)
    try:
        t0 = time.perf_counter()
        rec.recognise(crops)
        total = time.perf_counter() - t0
    finally:
        seq_module.RepeatState.step, seq_module.advance = step, adv
    return spent[0] / total


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pages", type=int, default=4)
    ap.add_argument("--rounds", type=int, default=5)
    ap.add_argument("--models", type=Path, default=None)
    ap.add_argument("--beam-width", type=int, default=3)
    a = ap.parse_args(argv)
    seq = find_models(a.models, "bench_repeat_guard") / "ledger-seq"
    refs = list_pages(ROOT / "scans_demo")[: a.pages]
    crops = [lb.crop for ref in refs for lb in analyse_page(load_page(ref).gray).lines]
    with tempfile.TemporaryDirectory() as tmp:
        off_dir = guard_off_copy(seq, Path(tmp) / "ledger-seq-off")
        for decoding in ("greedy", "beam"):
            opts = EngineOptions(decoding=decoding, beam_width=a.beam_width, batch_size=16)
            on = open_recogniser(load_card(seq), options=opts)
            off = open_recogniser(load_card(off_dir), options=opts)
            assert on.guard is not None and off.guard is None
            ratios, texts = [], {}
            for k in range(a.rounds):
                t = {}
                for name, rec in (("on", on), ("off", off)) if k % 2 == 0 else (("off", off), ("on", on)):
                    t0 = time.perf_counter()
                    res, _ = rec.recognise(crops)
                    t[name] = time.perf_counter() - t0
                    texts[name] = res
                ratios.append(t["on"] / t["off"])
            same = [r.text for r in texts["on"]] == [r.text for r in texts["off"]]
            cut = sum(r.cut_by == "repeated n-gram" for r in texts["on"])
            say(f"{decoding}: {len(crops)} lines of {len(refs)} demo pages, {a.rounds} rounds: time with the guard / "
                f"without = {statistics.median(ratios):.3f} (per round {', '.join(f'{x:.3f}' for x in ratios)}); "
                f"lines cut by the guard: {cut}; texts identical: {same}")
            # target: the guard's bookkeeping costs at most 5 % of decoding (numpy on a (rows, 8) array per step)
            say(f"RATIO repeat_guard_{decoding}_time_on_over_off {statistics.median(ratios):.3f} <=1.05")
            share = guard_share(on, crops)
            say(f"{decoding}: share of the reading's time inside the guard's calls: {100 * share:.2f} %")
            say(f"RATIO repeat_guard_{decoding}_time_share {share:.4f} <=0.05")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
