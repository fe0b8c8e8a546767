"""Shared helpers of the runner tests: demo models, demo pages, a direct (bare onnxruntime) decode path."""

from __future__ import annotations

import itertools
import json
import math
import os
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

ROOT = Path(__file__).resolve().parents[1]
MODELS = Path(os.environ.get("OCRBENCH_TEST_MODELS", ROOT / "models"))   # override to test other exports
DEMO_CTC = MODELS / "ledger-ctc"
DEMO_SEQ = MODELS / "ledger-seq"
SCANS = ROOT / "scans_demo"


def need_demo(folder: Path) -> Path:
    """The demo model folder, or skip the test with the reason."""
    if not (folder / "card.toml").exists():
        pytest.skip(f"demo model {folder.name} not built yet: run 'python models/build.py export'")
    return folder


def open_demo(folder: Path, **input_fields):
    """A demo recogniser opened as a run opens it; ``input_fields`` override its card's [input]
    (e.g. ``flatten=False, trim=False``: crops as cut)."""
    import dataclasses

    from ocrbench.recognisers.card import load_card
    from ocrbench.recognisers.registry import open_recogniser

    card = load_card(need_demo(folder))
    if input_fields:
        card = dataclasses.replace(card, input=dataclasses.replace(card.input, **input_fields))
    return open_recogniser(card)


def demo_pages(tmp_path: Path, n: int = 2) -> Path:
    """A folder with n demo pages: the first n of scans_demo/ when present, else freshly invented ones."""
    out = tmp_path / "pages"
    out.mkdir()
    from ocrbench.pages import IMAGE_SUFFIXES

    have = sorted(p for p in SCANS.glob("*") if p.suffix.lower() in IMAGE_SUFFIXES) if SCANS.is_dir() else []
    if have:
        for p in have[:n]:
            (out / p.name).symlink_to(p)
        return out
    from ocrbench import synth

    synth.write_archive(out, synth.ArchiveSpec(n_pages=n, lines_per_page=(8, 12), seed=5))
    for p in out.glob("*"):
        if p.suffix in (".txt", ".json"):
            p.unlink()
    return out


def read_symbols(path: Path) -> list[str]:
    return [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines()]


def direct_line_tensor(crop: np.ndarray, height: int = 32, step: int = 4) -> tuple[np.ndarray, int]:
    """The demo cards' preprocessing written out plainly: bilinear resize to the height keeping the
    aspect ratio (at least 16 px wide), ink = 1 - pixel/255, right-padded with paper (0) to a multiple of 4."""
    h, w = crop.shape
    new_w = max(16, int(round(w * height / h)))
    img = np.asarray(Image.fromarray(crop).resize((new_w, height), Image.BILINEAR), dtype=np.float32)
    x = (255.0 - img) / 255.0
    W = int(math.ceil(new_w / step) * step)
    t = np.zeros((1, 1, height, W), np.float32)
    t[0, 0, :, :new_w] = x
    return t, new_w


def greedy_collapse(best, blank: int, symbols: list[str]) -> str:
    """Best-path decoding: merge repeated labels, then remove blanks (Graves et al. 2006, section 3.2)."""
    return "".join(symbols[k] for k, _ in itertools.groupby(best) if k != blank)
