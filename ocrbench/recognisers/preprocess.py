"""Line-image preprocessing shared by the runner and the demo-model build script.

A line crop (8-bit grey, paper light, ink dark) becomes a float tensor of the
card's height: resized (keeping the aspect ratio, or to a fixed size), converted
by the card's normalisation (per channel when the model takes several channels;
grey lines are replicated), and padded on the right (and, for a fixed size, at
the bottom) with paper to a multiple of the card's width step. Lines of similar
width are batched together so little is padded.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
from PIL import Image

LAYOUTS = ("NCHW", "NHWC")
RESIZE_MODES = ("keep_aspect_pad", "stretch")
#: Resampling filters by card name (Pillow's filters, as Pillow names them).
FILTERS = {"nearest": Image.NEAREST, "bilinear": Image.BILINEAR, "bicubic": Image.BICUBIC,
           "lanczos": Image.LANCZOS, "box": Image.BOX, "hamming": Image.HAMMING}


@dataclass(frozen=True)
class InputSpec:
    """How a recogniser wants its line images (the card's ``[input]`` table).

    ``mean``/``std``: one value, or one per channel. ``width``: a fixed input width (every line is
    resized to fit it: ``resize = "stretch"`` ignores the aspect ratio, ``"keep_aspect_pad"`` keeps it and
    pads with paper). ``filter``: the resampling filter. ``flatten`` / ``remove_rules`` / ``trim``: clean each
    crop before it is resized (:func:`ocrbench.pages.crops.clean_crop`: paper above and below the text cut to a
    fixed margin, long rules painted out, the paper's shading divided out).
    """

    height: int = 32
    width_multiple: int = 4
    min_width: int = 16
    max_width: int = 4096
    invert: bool = True      # ink -> high values
    scale: float = 1.0 / 255.0
    mean: float | tuple[float, ...] = 0.0
    std: float | tuple[float, ...] = 1.0
    split_gap: float = 0.0   # > 0: split lines at blank gaps wider than this many line heights
    channels: int = 1
    layout: str = "NCHW"
    width: int | None = None
    resize: str = "keep_aspect_pad"
    filter: str = "bilinear"
    flatten: bool = False
    remove_rules: bool = False
    trim: bool = False

    def per_channel(self, v: float | tuple[float, ...]) -> np.ndarray:
        a = np.asarray(v, np.float32).reshape(-1)
        return np.repeat(a, self.channels) if a.size == 1 else a

    @property
    def width_axis(self) -> int:
        """Axis of the width in the model's image tensor."""
        return 3 if self.layout == "NCHW" else 2


def resize_line(gray: np.ndarray, spec: InputSpec) -> np.ndarray:
    """Resize one uint8 line crop to the card height (keeping the aspect ratio) or to its fixed size.

    With a fixed ``width`` and ``keep_aspect_pad``, a line too wide for it is scaled to the width and comes
    back lower than ``height`` (the batch pads it at the bottom).
    """
    if gray.ndim != 2:
        raise ValueError(f"line image must be 2-D grey, got shape {gray.shape}")
    h, w = gray.shape
    if h == 0 or w == 0:
        raise ValueError("line image is empty")
    new_h = spec.height
    if spec.width is not None and spec.resize == "stretch":
        new_w = spec.width
    else:
        new_w = int(round(w * spec.height / h))
        if spec.width is not None and new_w > spec.width:
            new_w, new_h = spec.width, max(1, min(spec.height, int(round(h * spec.width / w))))
        else:
            new_w = max(spec.min_width, min(spec.max_width if spec.width is None else spec.width, new_w))
    if (h, w) == (new_h, new_w):
        return np.ascontiguousarray(gray)
    return np.asarray(Image.fromarray(gray).resize((new_w, new_h), FILTERS[spec.filter]))


def normalise(resized: np.ndarray, spec: InputSpec) -> np.ndarray:
    """A resized grey line as (channels, h, w) float32 in the card's normalisation (grey replicated)."""
    a = resized.astype(np.float32)
    if spec.invert:
        a = 255.0 - a
    a *= spec.scale
    mean, std = spec.per_channel(spec.mean), spec.per_channel(spec.std)
    if not (np.all(mean == 0.0) and np.all(std == 1.0)):
        return (a[None, :, :] - mean[:, None, None]) / std[:, None, None]
    return np.repeat(a[None, :, :], spec.channels, axis=0)


def pad_value(spec: InputSpec) -> np.ndarray:
    """The normalised value of blank paper (pixel 255), one per channel."""
    return normalise(np.full((1, 1), 255, np.uint8), spec)[:, 0, 0]


def make_batch(resized: Sequence[np.ndarray], spec: InputSpec) -> tuple[np.ndarray, np.ndarray]:
    """Stack resized lines into (B, C, H, W) float32 (or (B, H, W, C) for ``NHWC``), padded with paper
    to a multiple of the width step (or to the fixed width).

    Returns the batch and each line's width before padding.
    """
    widths = np.array([r.shape[1] for r in resized], dtype=np.int64)
    m = spec.width_multiple
    W = spec.width if spec.width is not None else int(-(-int(widths.max()) // m) * m)
    batch = np.empty((len(resized), spec.channels, spec.height, W), dtype=np.float32)
    batch[:] = pad_value(spec)[None, :, None, None]
    for i, r in enumerate(resized):
        batch[i, :, : r.shape[0], : r.shape[1]] = normalise(r, spec)
    if spec.layout == "NHWC":
        batch = np.ascontiguousarray(batch.transpose(0, 2, 3, 1))
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
