"""Synthetic microscope frames for the lab tests: Gaussian spots at known positions plus noise (invented data)."""

import numpy as np


def render(shape, spots_px, *, sigma=1.5, amplitude=200.0, noise=5.0, background=20.0, rng=None):
    """One frame (H, W): a Gaussian spot of s.d. ``sigma`` px at each (x, y) px of ``spots_px``, plus
    Gaussian read noise of s.d. ``noise``; rendered in a local window around each spot."""
    rng = np.random.default_rng(rng)
    h, w = shape
    img = np.full((h, w), background, dtype=float)
    half = int(np.ceil(4 * sigma))
    for x, y in np.asarray(spots_px, dtype=float).reshape(-1, 2):
        if not (np.isfinite(x) and np.isfinite(y)):
            continue
        x0, x1 = max(int(x) - half, 0), min(int(x) + half + 2, w)
        y0, y1 = max(int(y) - half, 0), min(int(y) + half + 2, h)
        if x0 >= x1 or y0 >= y1:
            continue
        yy, xx = np.mgrid[y0:y1, x0:x1]
        img[y0:y1, x0:x1] += amplitude * np.exp(-((xx - x) ** 2 + (yy - y) ** 2) / (2 * sigma**2))
    return img + noise * rng.standard_normal((h, w))


def render_stack(shape, tracks_px, **kw):
    """Frames (T, H, W) from positions (T, n, 2) px; one seed per frame from ``rng``."""
    rng = np.random.default_rng(kw.pop("rng", 0))
    return np.stack([render(shape, p, rng=rng, **kw) for p in tracks_px])
