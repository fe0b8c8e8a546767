"""Binarisation: illumination flattening, then Otsu's global threshold (N. Otsu, 1979)."""

from __future__ import annotations

import math

import numpy as np
from PIL import Image

#: Below this difference between the mean grey of paper and of ink (after
#: illumination flattening) a page is treated as blank: Otsu would otherwise
#: split plain noise into "ink" and "paper".
MIN_CONTRAST = 40.0


def otsu_threshold(gray: np.ndarray) -> int:
    """Otsu's threshold (N. Otsu, 1979) on the 256-bin histogram of ``gray``.

    Returns ``t`` such that pixels ``<= t`` form the dark class: ``t``
    maximises the between-class variance ``w0 * w1 * (mu0 - mu1) ** 2``.
    A constant image returns its value.
    """
    g = np.asarray(gray)
    if g.size == 0:
        return 0
    hist = np.bincount(g.ravel().astype(np.uint8, copy=False), minlength=256).astype(np.float64)
    levels = np.arange(256, dtype=np.float64)
    w0 = np.cumsum(hist)
    s0 = np.cumsum(hist * levels)
    total, total_s = w0[-1], s0[-1]
    w1 = total - w0
    with np.errstate(divide="ignore", invalid="ignore"):
        mu0 = s0 / w0
        mu1 = (total_s - s0) / w1
        between = w0 * w1 * (mu0 - mu1) ** 2
    between = np.where((w0 > 0) & (w1 > 0), between, -1.0)
    if between.max() < 0:
        return int(g.min())
    return int(np.argmax(between))


def _block_size(h: int, w: int) -> int:
    return int(min(64, max(8, round(math.sqrt(h * w) / 80))))


def flatten_illumination(gray: np.ndarray) -> np.ndarray:
    """Divide out the paper level, estimated on a coarse grid of blocks.

    Each block's paper level is a high percentile of its pixels (text strokes
    are thinner than a block), widened by a 3x3 maximum over neighbouring blocks
    (for blocks filled by ink) and interpolated back to full size.
    """
    g = np.asarray(gray, dtype=np.uint8)
    h, w = g.shape
    b = _block_size(h, w)
    if h < 2 * b or w < 2 * b:
        return g.copy()
    gh, gw = h // b, w // b
    blocks = g[: gh * b, : gw * b].reshape(gh, b, gw, b).transpose(0, 2, 1, 3).reshape(gh, gw, b * b)
    k = int(0.9 * (b * b - 1))
    level = np.partition(blocks, k, axis=2)[:, :, k].astype(np.float32)
    padded = np.pad(level, 1, mode="edge")
    level = np.max(np.stack([padded[dy:dy + gh, dx:dx + gw] for dy in range(3) for dx in range(3)]), axis=0)
    level = np.maximum(level, 48.0)   # near-black areas are not paper: never divide by ~0
    bg = np.asarray(Image.fromarray(level, mode="F").resize((gw * b, gh * b), Image.BILINEAR))
    bg = np.pad(bg, ((0, h - gh * b), (0, w - gw * b)), mode="edge")
    out = g.astype(np.float32) * (255.0 / bg)
    return np.clip(out, 0, 255).astype(np.uint8)


def binarise(gray: np.ndarray) -> np.ndarray:
    """Ink mask (True = ink): illumination flattening, then Otsu's threshold.

    A page whose paper and ink classes differ by less than :data:`MIN_CONTRAST`
    grey levels (blank or nearly blank paper) has no ink.
    """
    g = np.asarray(gray)
    if g.ndim != 2:
        raise ValueError(f"expected a 2-D grey image, got shape {g.shape}")
    if g.size == 0:
        return np.zeros(g.shape, dtype=bool)
    flat = flatten_illumination(g)
    t = otsu_threshold(flat)
    ink = flat <= t
    n_ink = int(ink.sum())
    if n_ink == 0 or n_ink == ink.size:
        return np.zeros(g.shape, dtype=bool)
    hist = np.bincount(flat.ravel(), minlength=256).astype(np.float64)
    levels = np.arange(256)
    mu_ink = float((hist[: t + 1] * levels[: t + 1]).sum() / hist[: t + 1].sum())
    mu_paper = float((hist[t + 1:] * levels[t + 1:]).sum() / hist[t + 1:].sum())
    if mu_paper - mu_ink < MIN_CONTRAST:
        return np.zeros(g.shape, dtype=bool)
    return ink
