"""Batching: line crops -> resized lines -> width-grouped, padded model tensors; warm-up batches.

Lines of similar width are batched together so little is padded
(:func:`~ocrbench.recognisers.preprocess.width_batches`); each batch keeps the
indices of its lines and their widths before padding, so results come back in
the crops' order and each line's valid frames can be told from the padding.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ocrbench.pages.crops import clean_crop
from ocrbench.recognisers.engine import Clock
from ocrbench.recognisers.preprocess import InputSpec, make_batch, resize_line, width_batches


@dataclass
class PreparedBatch:
    """A batch ready for the model: the tensor, the lines it holds and their widths."""

    batch_no: int
    indices: list[int]
    tensor: np.ndarray               # (B, 1, H, W) float32 (or the card's layout)
    widths: np.ndarray               # resized width of each line before padding
    t_preprocess: float
    width_axis: int = 3              # axis of the width in ``tensor`` (3: NCHW, 2: NHWC)

    @property
    def padded_width(self) -> int:
        return int(self.tensor.shape[self.width_axis])


def prepare_line(crop: np.ndarray, spec: InputSpec, *, cleaned: bool = False) -> np.ndarray:
    """One crop cleaned as the card says (``flatten``, ``remove_rules``, ``trim``:
    :func:`ocrbench.pages.crops.clean_crop`) and resized to the card's height. ``cleaned``: the crop was
    cleaned already (a trimmed line is cleaned whole before it is cut into pieces)."""
    g = np.asarray(crop)
    if not cleaned and (spec.flatten or spec.remove_rules or spec.trim) and g.ndim == 2 and g.size:
        g = clean_crop(g, flatten=spec.flatten, remove_rules=spec.remove_rules, trim=spec.trim)
    return resize_line(g, spec)


def prepare_batches(crops: Sequence[np.ndarray], spec: InputSpec, batch_size: int, max_pad_ratio: float, *,
                    clock: Clock = time.perf_counter, spent: Sequence[float] | None = None) -> list[PreparedBatch]:
    """Clean every crop as the card says (``flatten``, ``remove_rules``, ``trim``), resize it, group by width, and
    stack each group into a padded tensor. ``spent``: the crops were cleaned already, in these seconds each
    (counted in the batches' preprocessing time)."""
    resized, t_resize = [], []
    for i, c in enumerate(crops):
        t0 = clock()
        try:
            resized.append(prepare_line(c, spec, cleaned=spent is not None))
        except ValueError as e:
            raise ValueError(f"line {i + 1}: {e}") from e
        t_resize.append(clock() - t0 + (spent[i] if spent is not None else 0.0))
    groups = width_batches([r.shape[1] for r in resized], batch_size, max_pad_ratio)
    out = []
    for b, idx in enumerate(groups):
        t0 = clock()
        tensor, widths = make_batch([resized[i] for i in idx], spec)
        t = clock() - t0 + sum(t_resize[i] for i in idx)
        out.append(PreparedBatch(b, idx, tensor, widths, t, spec.width_axis))
    return out


def valid_frames(widths: np.ndarray, padded_width: int, frames: int, frames_per_pixel: float | None) -> np.ndarray:
    """Frames of each line that hold the line (the rest stem from padding)."""
    w = np.asarray(widths, dtype=np.float64)
    if frames_per_pixel is None:
        v = np.ceil(w * frames / max(1, padded_width))
    else:
        v = np.ceil(w * frames_per_pixel - 1e-9)
    return np.clip(v.astype(np.int64), 1, frames)


#: Warm-up lines are this many line heights wide (about the widest ledger line seen on the demo pages).
WARM_UP_WIDTH_HEIGHTS = 48


def warm_up_lines(spec: InputSpec, batch_size: int) -> list[np.ndarray]:
    """Blank lines for a warm-up batch as large as real ones (``batch_size`` lines, capped at 32, wide).

    onnxruntime plans and allocates memory for a shape when it first sees it; a
    warm-up on one small line left that cost to the first real batches (measured:
    the first demo page's model time per pixel 25-30 % above the others'), and so
    to every short calibration. Warming up on a full-size batch moves it out of
    the timings.
    """
    w = max(spec.min_width, min(spec.max_width, WARM_UP_WIDTH_HEIGHTS * spec.height))
    return [np.full((spec.height, w), 255, np.uint8)] * max(1, min(32, batch_size))
