"""Structured test images (numpy only): shapes with edges and texture on a gradient.

Uniform noise makes every detector output near-identical scores, so parity checks and
calibration use images with real structure instead. Deterministic for a given seed.
"""
from __future__ import annotations

import numpy as np


def pattern_image(height: int, width: int, seed: int = 0) -> np.ndarray:
    """uint8 [H, W, 3] RGB: a two-colour gradient with filled rectangles, discs and stripes."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:height, 0:width].astype(np.float32)
    c0, c1 = rng.uniform(30, 225, size=(2, 3))
    t = (xx / max(width - 1, 1) * 0.6 + yy / max(height - 1, 1) * 0.4)[..., None]
    img = c0 * (1 - t) + c1 * t
    for _ in range(int(rng.integers(4, 9))):
        h = rng.uniform(0.08, 0.4) * height
        w = rng.uniform(0.08, 0.4) * width
        cy, cx = rng.uniform(0, height), rng.uniform(0, width)
        colour = rng.uniform(0, 255, size=3)
        kind = rng.integers(3)
        if kind == 0:
            mask = (np.abs(yy - cy) < h / 2) & (np.abs(xx - cx) < w / 2)
        elif kind == 1:
            mask = ((yy - cy) / (h / 2)) ** 2 + ((xx - cx) / (w / 2)) ** 2 < 1
        else:
            mask = ((np.abs(yy - cy) < h / 2) & (np.abs(xx - cx) < w / 2)
                    & ((xx.astype(int) // max(int(w / 8), 2)) % 2 == 0))
        img[mask] = colour
    img += rng.normal(0, 6, size=img.shape)   # a little texture, as in camera images
    return np.clip(img, 0, 255).astype(np.uint8)
