"""Drawing helpers of the demo scene: box blur, smooth noise, signed distances of simple shapes
and their anti-aliased coverage."""

from __future__ import annotations

import numpy as np

__all__ = ["box_blur", "smooth_noise", "rounded_box_sdf", "capsule_sdf", "coverage", "lerp",
           "readonly"]


def box_blur(img: np.ndarray, radius: int) -> np.ndarray:
    """Mean filter of width ``2 * radius + 1`` along the first two axes, edges repeated."""
    if radius < 1:
        return img
    out = img.astype(np.float32, copy=False)
    for axis in (0, 1):
        pad = [(0, 0)] * out.ndim
        pad[axis] = (radius + 1, radius)
        padded = np.pad(out, pad, mode="edge")
        c = np.cumsum(padded, axis=axis, dtype=np.float32)
        n = out.shape[axis]
        hi = np.take(c, np.arange(2 * radius + 1, 2 * radius + 1 + n), axis=axis)
        lo = np.take(c, np.arange(0, n), axis=axis)
        out = (hi - lo) / np.float32(2 * radius + 1)
    return out


def smooth_noise(rng: np.random.Generator, shape, radius: int) -> np.ndarray:
    """Zero-mean, unit-std noise smoothed by two box filters of the given radius."""
    noise = rng.standard_normal(shape).astype(np.float32)
    noise = box_blur(box_blur(noise, radius), radius)
    std = float(noise.std())
    return noise / std if std > 0 else noise


def rounded_box_sdf(ly: np.ndarray, lx: np.ndarray, half_h: float, half_w: float,
                    radius: float) -> np.ndarray:
    """Signed distance (pixels) to a rounded rectangle centred at the origin."""
    qy = np.abs(ly) - half_h + radius
    qx = np.abs(lx) - half_w + radius
    outside = np.hypot(np.maximum(qy, 0), np.maximum(qx, 0))
    inside = np.minimum(np.maximum(qy, qx), 0)
    return outside + inside - radius


def capsule_sdf(yy, xx, p0, p1, radius: float) -> np.ndarray:
    """Signed distance (pixels) to a capsule: segment p0-p1 (row, col) thickened by radius."""
    (y0, x0), (y1, x1) = p0, p1
    dy, dx = y1 - y0, x1 - x0
    length2 = dy * dy + dx * dx
    t = np.clip(((yy - y0) * dy + (xx - x0) * dx) / max(length2, 1e-9), 0.0, 1.0)
    return np.hypot(yy - (y0 + t * dy), xx - (x0 + t * dx)) - radius


def coverage(sdf: np.ndarray) -> np.ndarray:
    """Anti-aliased coverage in [0, 1] of the shape ``sdf <= 0``."""
    return np.clip(0.5 - sdf, 0.0, 1.0).astype(np.float32)


def lerp(a: np.ndarray, b, alpha: np.ndarray) -> np.ndarray:
    return a + (np.asarray(b, np.float32) - a) * alpha[..., None]


def readonly(*arrays):
    for a in arrays:
        a.setflags(write=False)
