"""Rendering one frame of the demo run from the static scene, the time line and the planted
problems."""

from __future__ import annotations

import math

import numpy as np

from modescope.core.demo.drawing import box_blur, lerp
from modescope.core.demo.problems import planted_with_copies
from modescope.core.demo.scene import Scene, check_seed, check_size, glove, static_scene
from modescope.core.demo.schedule import (RUN_HOURS, check_index, check_n_frames, lamp_level,
                                          wetness)
from modescope.core.validation import check_bool

__all__ = ["render_frame"]


def _growth(t: float, start: np.ndarray, smax: np.ndarray, tau: np.ndarray) -> np.ndarray:
    dt = np.maximum(t - start, 0.0)
    return (smax * (1.0 - np.exp(-dt / tau))).astype(np.float32)


def _shift(img: np.ndarray, dy: int, dx: int) -> np.ndarray:
    """Shift an image by (dy, dx) pixels, filling with zeros (no wrap-around)."""
    out = np.zeros_like(img)
    rows, cols = img.shape[:2]
    ys, yd = (slice(0, rows - dy), slice(dy, rows)) if dy >= 0 else (slice(-dy, rows),
                                                                     slice(0, rows + dy))
    xs, xd = (slice(0, cols - dx), slice(dx, cols)) if dx >= 0 else (slice(-dx, cols),
                                                                     slice(0, cols + dx))
    out[yd, xd] = img[ys, xs]
    return out


def _albedo(sc: Scene, t: float) -> np.ndarray:
    """Reflectance at time ``t``: the (wet or dry) soil with the seedlings grown so far."""
    albedo = sc.albedo - np.float32(wetness(t)) * sc.wet_loss
    s1 = _growth(t, sc.germ, sc.s1max, sc.tau1)
    s2 = _growth(t, sc.leaf_start, sc.s2max, sc.tau2)
    a1 = np.clip((s1[sc.cell] - sc.leaf1) * sc.edge_gain + 0.5, 0.0, 1.0)
    a2 = np.clip((s2[sc.cell] - sc.leaf2) * sc.edge_gain + 0.5, 0.0, 1.0)
    albedo = lerp(albedo, 0.0, a1) + sc.green1 * a1[..., None]
    return lerp(albedo, 0.0, a2) + sc.green2 * a2[..., None]


def _problem_at(index: int, n_frames: int) -> tuple[str | None, int]:
    """Return (kind, copy) of the problem planted at ``index``, or (None, 0)."""
    for p, c in planted_with_copies(n_frames):
        if p.index == index:
            return p.kind, c
    return None, 0


def _in_front_of_the_lens(albedo, sc: Scene, kind, copy: int, seed: int, prng) -> np.ndarray:
    """Apply the problems that change the scene itself: the gloved hand, the tray pulled out."""
    if kind == "glove":
        alpha, colour, shadow = glove(sc.rows, sc.cols, seed, copy)
        albedo = albedo * (1.0 - 0.5 * shadow)[..., None]
        return lerp(albedo, 0.0, alpha) + colour * alpha[..., None]
    if kind == "tray_out":
        dx = round((3.4 + prng.uniform(0.0, 0.6)) * sc.pitch)
        dy = round(prng.uniform(-0.15, 0.25) * sc.pitch)
        moved = _shift(albedo, dy, dx)
        mask = _shift(sc.tray_mask, dy, dx)
        return lerp(sc.bench, 0.0, mask) + moved * mask[..., None]
    return albedo


def _light_and_gains(sc: Scene, t: float, rng) -> tuple[np.ndarray, np.ndarray]:
    """Light (lamp + ambient, with a tiny flicker) and the camera's drifting gains x 255."""
    lamp = lamp_level(t % 24.0) * (1.0 + 0.01 * float(rng.standard_normal()))
    light = sc.light_day * np.float32(lamp) + sc.light_night
    u = t / RUN_HOURS
    warm = (1.0 - math.exp(-3.0 * u)) / (1.0 - math.exp(-3.0))   # warms quickly, then slowly
    gains = np.array((1.0 + 0.07 * warm, 1.0 + 0.015 * warm, 1.0 - 0.06 * warm), np.float32)
    return light, gains * np.float32(255.0)


def _in_the_camera(img, kind, prng) -> np.ndarray:
    """Apply the problems of the camera itself: a fogged lens, a failed exposure."""
    if kind == "fog":
        rows, cols = img.shape[:2]
        radius = max(1, round(min(rows, cols) / 40))
        img = box_blur(box_blur(img, radius), radius)
        yy = (np.arange(rows, dtype=np.float32)[:, None] + 0.5) / rows - 0.5
        xx = (np.arange(cols, dtype=np.float32)[None, :] + 0.5) / cols - 0.5
        veil = (0.55 + prng.uniform(0.0, 0.08)) + 0.22 * np.exp(-(yy**2 + xx**2) / 0.08)
        return lerp(img, np.array((222.0, 226.0, 230.0), np.float32), veil.astype(np.float32))
    if kind == "overexposed":
        return img * np.float32(4.0 + prng.uniform(0.0, 0.6)) + np.float32(110.0)
    return img


def render(index: int, n_frames: int, rows: int, cols: int, seed: int,
           planted: bool) -> np.ndarray:
    """Render a frame from arguments already checked (:func:`render_frame` without the checks).

    Returns
    -------
    ndarray of uint8, shape (rows, cols, 3)
    """
    sc = static_scene(rows, cols, seed)
    t = index * RUN_HOURS / n_frames
    rng = np.random.default_rng((seed, index))            # flicker, then sensor noise
    prng = np.random.default_rng((seed, index, 0x9E))     # the planted problem's variations
    kind, copy = _problem_at(index, n_frames) if planted else (None, 0)
    albedo = _in_front_of_the_lens(_albedo(sc, t), sc, kind, copy, seed, prng)
    light, gains = _light_and_gains(sc, t, rng)
    img = _in_the_camera(albedo * light * gains, kind, prng)
    noise = rng.standard_normal((rows, cols, 3), dtype=np.float32)
    img = img + noise * (np.float32(1.3) + np.float32(0.010) * img)
    np.clip(img, 0.0, 255.0, out=img)
    return np.rint(img).astype(np.uint8)


def render_frame(index: int, *, n_frames: int = 240, size=(96, 128), seed: int = 7,
                 planted: bool = True) -> np.ndarray:
    """Render one frame of the demo collection.

    The frame depends only on ``(index, n_frames, size, seed, planted)``; frames can be rendered
    in any order or in parallel. Per-frame noise comes from
    ``np.random.default_rng((seed, index))``; the static scene (tray, pots, soil, light) is
    computed once per ``(size, seed)`` and cached.

    Parameters
    ----------
    index : int
        Zero-based frame index, ``0 <= index < n_frames``.
    n_frames : int, default 240
        Number of frames in the collection; the frames are spread evenly over ten days, so this
        sets the frame's time (``index * 240 / n_frames`` hours) and where problems are planted.
    size : (int, int), default (96, 128)
        ``(rows, cols)`` of the frame, each between 24 and 4096.
    seed : int, default 7
        Seed of the scene layout (germination times, growth rates, textures) and of the noise;
        a non-negative integer.
    planted : bool, default True
        When False, a planted problem frame is rendered as the normal frame it replaces.

    Returns
    -------
    ndarray of uint8, shape (rows, cols, 3)
        The RGB frame.

    Raises
    ------
    TypeError
        If an argument has the wrong type.
    ValueError
        If an argument is out of range.

    Examples
    --------
    >>> frame = render_frame(12, size=(48, 64))
    >>> frame.shape, frame.dtype
    ((48, 64, 3), dtype('uint8'))
    """
    n_frames = check_n_frames(n_frames)
    index = check_index(index, n_frames)
    rows, cols = check_size(size)
    seed = check_seed(seed)
    planted = check_bool("planted", planted)
    return render(index, n_frames, rows, cols, seed, planted)
