"""Line-image preprocessing shared by the runner and the demo-model build script.

A line crop (8-bit grey, paper light, ink dark) becomes a float tensor of the
card's height: resized keeping the aspect ratio, converted by the card's
normalisation, and padded on the right with paper to a multiple of the card's
width step. Lines of similar width are batched together so little is padded.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
from PIL import Image


@dataclass(frozen=True)
class InputSpec:
    """How a recogniser wants its line images (the card's ``[input]`` table)."""

    height: int = 32
    width_multiple: int = 4
    min_width: int = 16
    max_width: int = 4096
    invert: bool = True      # ink -> high values
    scale: float = 1.0 / 255.0
    mean: float = 0.0
    std: float = 1.0
    split_gap: float = 0.0   # > 0: split lines at blank gaps wider than this many line heights


def resize_line(gray: np.ndarray, spec: InputSpec) -> np.ndarray:
    """Resize one uint8 line crop to the card height, keeping the aspect ratio."""
    if gray.ndim != 2:
        raise ValueError(f"line image must be 2-D grey, got shape {gray.shape}")
    h, w = gray.shape
    if h == 0 or w == 0:
        raise ValueError("line image is empty")
    new_w = int(round(w * spec.height / h))
    new_w = max(spec.min_width, min(spec.max_width, new_w))
    if (h, w) == (spec.height, new_w):
        return np.ascontiguousarray(gray)
    return np.asarray(Image.fromarray(gray).resize((new_w, spec.height), Image.BILINEAR))


def normalise(resized: np.ndarray, spec: InputSpec) -> np.ndarray:
    a = resized.astype(np.float32)
    if spec.invert:
        a = 255.0 - a
    a *= spec.scale
    if spec.mean != 0.0 or spec.std != 1.0:
        a = (a - spec.mean) / spec.std
    return a


def pad_value(spec: InputSpec) -> float:
    """The normalised value of blank paper (pixel 255)."""
    return float(normalise(np.full((1, 1), 255, np.uint8), spec)[0, 0])


def make_batch(resized: Sequence[np.ndarray], spec: InputSpec) -> tuple[np.ndarray, np.ndarray]:
    """Stack resized lines into (B, 1, H, W) float32, padded to a multiple of the width step.

    Returns the batch and each line's width before padding.
    """
    widths = np.array([r.shape[1] for r in resized], dtype=np.int64)
    m = spec.width_multiple
    W = int(-(-int(widths.max()) // m) * m)
    batch = np.full((len(resized), 1, spec.height, W), pad_value(spec), dtype=np.float32)
    for i, r in enumerate(resized):
        batch[i, 0, :, : r.shape[1]] = normalise(r, spec)
    return batch, widths


def width_batches(widths: Sequence[int], max_batch: int, max_pad_ratio: float = 1.3) -> list[list[int]]:
    """Group line indices by similar width so padding is not wasted.

    Lines are sorted by width; a batch closes when it is full or when the
    widest line would exceed ``max_pad_ratio`` times the narrowest one.
    Returns lists of original indices.
    """
    order = sorted(range(len(widths)), key=lambda i: widths[i])
    batches: list[list[int]] = []
    cur: list[int] = []
    for i in order:
        if cur and (len(cur) >= max_batch or widths[i] > max_pad_ratio * max(1, widths[cur[0]])):
            batches.append(cur)
            cur = []
        cur.append(i)
    if cur:
        batches.append(cur)
    return batches
