"""Helpers shared by the benchmarks (not a benchmark itself: run_all.py runs only bench_*.py)."""

from __future__ import annotations

import os
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def find_models(given: Path | None, who: str) -> Path:
    """The demo models: ``given``, else $OCRBENCH_TEST_MODELS, else models/; exits naming ``who`` if none."""
    for cand in (given, os.environ.get("OCRBENCH_TEST_MODELS"), ROOT / "models"):
        if cand and (Path(cand) / "ledger-ctc" / "card.toml").exists():
            return Path(cand)
    raise SystemExit(f"{who}: no demo models (models/ledger-ctc/card.toml); build them with "
                     "'python models/build.py export' or pass --models DIR")


def images_only(folder: Path) -> Path:
    """Drop the ground truth and layout files the page generator writes beside its images."""
    for p in folder.glob("*"):
        if p.suffix in (".txt", ".json"):
            p.unlink()
    return folder


SCANS = Path(__file__).resolve().parents[2] / "scans_demo"


def say(msg: str = "") -> None:
    print(msg, flush=True)


def pages_subset(n: int | None, tmp: Path) -> Path:
    """The demo archive, or a folder of links to its first ``n`` page images."""
    if n is None:
        return SCANS
    from ocrbench.pages import IMAGE_SUFFIXES

    out = tmp / "pages"
    out.mkdir()
    for p in sorted(q for q in SCANS.iterdir() if q.suffix.lower() in IMAGE_SUFFIXES)[:n]:
        (out / p.name).symlink_to(p)
    return out
