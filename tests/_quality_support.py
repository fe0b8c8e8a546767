"""Shared helpers of the quality tests: a run store of invented ledger pages in collections, whose
recognised text carries errors at a rate that falls with the line's confidence (a known ground truth)."""

from __future__ import annotations

import random
from pathlib import Path

from ocrbench.store import LineRecord, PageRecord, RunStore

GOODS = ["twine", "hemp", "rope", "tar", "pitch", "coal", "jute", "flax", "cordage", "sacking"]
NAMES = ["Ashcombe", "Brindle", "Coldharbour", "Dunmere", "Fenholt", "Quarley", "Tarnby", "Oxlow"]


def ledger_page(rng: random.Random, n_entries: int) -> list[str]:
    """An invented cash-book page that balances: header, entries, total."""
    cents = [rng.randint(50, 50000) for _ in range(n_entries)]
    lines = ["Cash Book 1890"]
    for c in cents:
        lines.append(f"Jan {rng.randint(1, 28)} {rng.choice(NAMES)} {rng.choice(GOODS)} {c // 100}.{c % 100:02d}")
    total = sum(cents)
    lines.append(f"Total {total // 100}.{total % 100:02d}")
    return lines


def misread(rng: random.Random, text: str, n: int) -> str:
    """``text`` with ``n`` characters replaced (never by themselves)."""
    chars = list(text)
    for _ in range(n):
        i = rng.randrange(len(chars))
        chars[i] = "x" if chars[i] != "x" else "y"
    return "".join(chars)


def write_page(st: RunStore, run_id: int, page_id: str, truth: list[str], rng: random.Random,
               conf_range: tuple[float, float]) -> list[str]:
    """Write one recognised page; a line of confidence c gets on average 8 * (1 - c) misread characters."""
    recs, hyp = [], []
    for i, t in enumerate(truth):
        c = rng.uniform(*conf_range)
        n = sum(rng.random() < (1 - c) * 8 / max(len(t), 1) for _ in range(len(t)))
        h = misread(rng, t, n) if n else t
        hyp.append(h)
        recs.append(LineRecord(line_no=i, x0=0, y0=10 * i, x1=100, y1=10 * i + 8, width_px=100, text=h,
                               text_post=None, confidence=c, n_chars=len(h)))
    st.write_page(run_id, PageRecord(page_id=page_id, path=f"/scans/{page_id}", content_hash=page_id,
                                     status="done", n_lines=len(recs)), recs)
    return hyp


def start_run(st: RunStore, name: str = "demo-ctc") -> int:
    return st.start_run(recogniser=name, kind="ctc", card_path="/m/card.toml", card_hash=name[0] * 64,
                        settings={}, input_dir="/scans", host={}, engine="test")


def build_store(tmp_path: Path, collections: dict[str, tuple[int, tuple[float, float]]], *, seed: int = 0,
                keyed: dict[str, int] | None = None) -> tuple[Path, Path, dict[str, list[str]]]:
    """A store with one run over ``collections`` (name -> (pages, confidence range)); the truth folder
    ``truth_all`` holds every page's ground truth, ``truth`` only the first ``keyed[name]`` of each."""
    rng = random.Random(seed)
    db = tmp_path / "store.sqlite"
    truth_all, truth = tmp_path / "truth_all", tmp_path / "truth"
    pages: dict[str, list[str]] = {}
    with RunStore(db) as st:
        rid = start_run(st)
        for coll, (n, conf) in collections.items():
            for k in range(n):
                pid = f"{coll}/page_{k:03d}.png" if coll != "." else f"page_{k:03d}.png"
                lines = ledger_page(rng, rng.randint(8, 16))
                write_page(st, rid, pid, lines, rng, conf)
                pages[pid] = lines
                for root, take in ((truth_all, True), (truth, k < (keyed or {}).get(coll, 0))):
                    if take:
                        p = root / pid.replace(".png", ".txt")
                        p.parent.mkdir(parents=True, exist_ok=True)
                        p.write_text("".join(t + "\n" for t in lines), encoding="utf-8")
        st.finish_run(rid)
    truth.mkdir(exist_ok=True)
    return db, truth, pages
