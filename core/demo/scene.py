"""The static scene of the demo run (tray, pots, soil, seedling layout, light), computed once
per ``(size, seed)`` and cached, and the gloved hand of the planted "glove" frames."""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from modescope.core.demo.drawing import (box_blur, capsule_sdf, coverage, lerp, readonly,
                                         rounded_box_sdf, smooth_noise)
from modescope.core.validation import check_int

__all__ = ["Scene", "static_scene", "glove", "check_size", "check_seed"]

_MIN_SIDE = 24
_MAX_SIDE = 4096
# Share of the soil's reflectance lost when it is fully wet.
_WET_DARKENING = 0.45
_POT_ROWS, _POT_COLS = 4, 6


def check_size(size) -> tuple[int, int]:
    """Return ``size`` as a (rows, cols) pair of ints in 24..4096, or raise naming it."""
    if isinstance(size, np.ndarray) and size.ndim == 1:
        size = size.tolist()
    if isinstance(size, (str, bytes)) or not isinstance(size, Sequence):
        raise TypeError(f"size must be a (rows, cols) pair of integers, got "
                        f"{type(size).__name__} {size!r}")
    if len(size) != 2:
        raise ValueError(f"size must be a (rows, cols) pair, got {len(size)} values {size!r}")
    rows = check_int("size[0] (rows)", size[0], minimum=_MIN_SIDE, maximum=_MAX_SIDE)
    cols = check_int("size[1] (cols)", size[1], minimum=_MIN_SIDE, maximum=_MAX_SIDE)
    return rows, cols


def check_seed(seed) -> int:
    """Return ``seed`` as a non-negative int below 2**63, or raise naming it."""
    return check_int("seed", seed, minimum=0, maximum=2**63 - 1)


@dataclass(frozen=True, eq=False)
class Scene:
    """The parts of the demo scene that do not change over the run (arrays are read-only)."""

    rows: int
    cols: int
    pitch: float                 # pot pitch in pixels
    albedo: np.ndarray           # (rows, cols, 3) reflectance of the tray scene, dry soil
    wet_loss: np.ndarray         # (rows, cols, 3) albedo lost when the soil is fully wet
    bench: np.ndarray            # (rows, cols, 3) reflectance of the empty bench
    tray_mask: np.ndarray        # (rows, cols) coverage of the tray
    cell: np.ndarray             # (rows, cols) int pot number, n_pots outside the pots
    leaf1: np.ndarray            # (rows, cols) cotyledon shape field (units of half pitch)
    leaf2: np.ndarray            # (rows, cols) true-leaf shape field
    green1: np.ndarray           # (rows, cols, 3) cotyledon colour
    green2: np.ndarray           # (rows, cols, 3) true-leaf colour
    light_day: np.ndarray        # (rows, cols, 3) lamp light, tinted warm
    light_night: np.ndarray      # (rows, cols, 3) ambient light, tinted cool
    edge_gain: float             # shape-field units to coverage, (pitch / 2) pixels per unit
    germ: np.ndarray             # (n_pots + 1,) germination time, inf if never
    s1max: np.ndarray            # (n_pots + 1,) final cotyledon size
    tau1: np.ndarray
    leaf_start: np.ndarray       # (n_pots + 1,) time true leaves appear
    s2max: np.ndarray
    tau2: np.ndarray


@dataclass(frozen=True, eq=False)
class _Layout:
    """Pixel coordinates of the frame and of the (slightly rotated) tray and its pot grid."""

    rows: int
    cols: int
    yy: np.ndarray               # (rows, cols) pixel centre rows
    xx: np.ndarray               # (rows, cols) pixel centre columns
    cy: float                    # lamp spot centre (row, col)
    cx: float
    ty: np.ndarray               # (rows, cols) coordinates in the tray's frame
    tx: np.ndarray
    pitch: float
    grid_h: float
    grid_w: float
    margin: float


def _layout(rng: np.random.Generator, rows: int, cols: int) -> _Layout:
    yy, xx = np.mgrid[0:rows, 0:cols].astype(np.float32)
    yy += 0.5
    xx += 0.5
    cy, cx = rows / 2 + rng.uniform(-0.01, 0.01) * rows, cols / 2 + rng.uniform(-0.01, 0.01) * cols
    # Tray frame: slightly rotated, grid of pots fills ~86 % of the limiting side.
    angle = math.radians(rng.uniform(-2.0, 2.0))
    ca, sa = math.cos(angle), math.sin(angle)
    ty = (yy - cy) * ca - (xx - cx) * sa
    tx = (yy - cy) * sa + (xx - cx) * ca
    pitch = min(0.80 * rows / _POT_ROWS, 0.80 * cols / _POT_COLS)
    return _Layout(rows, cols, yy, xx, cy, cx, ty, tx, pitch, _POT_ROWS * pitch,
                   _POT_COLS * pitch, 0.28 * pitch)


def _tray_sdf(g: _Layout, dy: float = 0.0, dx: float = 0.0) -> np.ndarray:
    return rounded_box_sdf(g.ty - dy, g.tx - dx, g.grid_h / 2 + g.margin,
                           g.grid_w / 2 + g.margin, 0.3 * g.pitch)


def _bench(rng: np.random.Generator, g: _Layout) -> tuple[np.ndarray, np.ndarray]:
    """Bench reflectance, without and with the tray's shadow."""
    rows, cols, pitch = g.rows, g.cols, g.pitch
    # Bench: light grey laminate, gentle gradient, faint low-frequency texture.
    bench = np.empty((rows, cols, 3), np.float32)
    bench[:] = (0.60, 0.60, 0.57)
    grad = 1.0 + 0.06 * (g.yy / rows - 0.5) - 0.04 * (g.xx / cols - 0.5)
    tex = 1.0 + 0.025 * smooth_noise(rng, (rows, cols), max(1, round(min(rows, cols) / 24)))
    bench *= (grad * tex)[..., None]
    # Tray shadow on the bench (lamp above and slightly left: shadow falls down-right).
    shadow = coverage(_tray_sdf(g, 0.10 * pitch, 0.12 * pitch))
    shadow = box_blur(box_blur(shadow, max(1, round(0.08 * pitch))), max(1, round(0.08 * pitch)))
    return bench, bench * (1.0 - 0.35 * shadow)[..., None]


def _tray_colour(g: _Layout, tray_sdf: np.ndarray) -> np.ndarray:
    """Tray plastic with a lighter moulded rim and a white label."""
    pitch = g.pitch
    tray_col = np.empty((g.rows, g.cols, 3), np.float32)
    tray_col[:] = (0.085, 0.085, 0.095)
    rim = np.clip(1.0 - np.abs(tray_sdf + 0.08 * pitch) / (0.07 * pitch), 0.0, 1.0)
    tray_col = lerp(tray_col, (0.20, 0.20, 0.21), rim.astype(np.float32))
    # A white label on the front margin, near the left.
    label_y = g.grid_h / 2 + g.margin * 0.5
    label_x = -g.grid_w / 2 + 0.9 * pitch
    label = coverage(rounded_box_sdf(g.ty - label_y, g.tx - label_x, max(0.9, 0.10 * pitch),
                                     0.55 * pitch, 0.3))
    return lerp(tray_col, (0.86, 0.86, 0.82), label)


def _pot_grid(g: _Layout) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(inside, cell, ly, lx): in a pot's cell, pot number, coordinates within the cell."""
    gy = (g.ty + g.grid_h / 2) / g.pitch
    gx = (g.tx + g.grid_w / 2) / g.pitch
    prow, pcol = np.floor(gy), np.floor(gx)
    inside = (prow >= 0) & (prow < _POT_ROWS) & (pcol >= 0) & (pcol < _POT_COLS)
    cell = np.where(inside, prow * _POT_COLS + pcol, _POT_ROWS * _POT_COLS).astype(np.intp)
    return inside, cell, ((gy - prow) - 0.5) * g.pitch, ((gx - pcol) - 0.5) * g.pitch


def _pots_and_soil(rng: np.random.Generator, g: _Layout, inside, cell, ly, lx):
    """Coverage and colour of the pots and of their soil, and the perlite specks."""
    pitch, rows, cols = g.pitch, g.rows, g.cols
    n_pots = _POT_ROWS * _POT_COLS
    pot_sdf = np.where(inside, rounded_box_sdf(ly, lx, 0.46 * pitch, 0.46 * pitch, 0.16 * pitch),
                       pitch)
    soil_sdf = np.where(inside, rounded_box_sdf(ly, lx, 0.37 * pitch, 0.37 * pitch,
                                                0.12 * pitch), pitch)
    pot = coverage(pot_sdf)
    soil = coverage(soil_sdf)
    pot_col = np.empty((rows, cols, 3), np.float32)
    pot_col[:] = (0.24, 0.24, 0.25)
    # Inner wall of the pot is darker than the top of the rim.
    wall = np.clip(1.0 + soil_sdf / (0.06 * pitch), 0.0, 1.0)
    pot_col *= (1.0 - 0.35 * wall * (soil_sdf > 0))[..., None]

    # Soil: brown, per-pot tone, smoothed texture, shadow near the rim, perlite specks.
    pot_tone = rng.uniform(0.90, 1.10, n_pots + 1).astype(np.float32)
    soil_col = np.empty((rows, cols, 3), np.float32)
    soil_col[:] = (0.27, 0.19, 0.13)
    soil_tex = 1.0 + 0.10 * smooth_noise(rng, (rows, cols), 1)
    rim_shade = 0.72 + 0.28 * np.clip(-soil_sdf / (0.10 * pitch), 0.0, 1.0)
    soil_col *= (soil_tex * rim_shade * pot_tone[cell])[..., None]
    specks = (rng.random((rows, cols)) < 0.012).astype(np.float32) * soil
    soil_col = lerp(soil_col, (0.78, 0.78, 0.74), specks * 0.8)
    return pot, pot_col, soil, soil_col, specks


def _seedlings(rng: np.random.Generator, g: _Layout, inside, cell, ly, lx) -> dict:
    """Each pot's seedling: position, orientation, germination time, growth, shape, colour."""
    n_pots = _POT_ROWS * _POT_COLS
    dud = np.zeros(n_pots + 1, bool)
    dud[rng.choice(n_pots, size=3, replace=False)] = True   # three pots never germinate
    dud[n_pots] = True
    out = {}
    out["germ"] = germ = np.where(dud, np.inf, rng.uniform(28.0, 110.0, n_pots + 1))
    out["s1max"] = rng.uniform(0.34, 0.56, n_pots + 1)
    out["tau1"] = rng.uniform(14.0, 40.0, n_pots + 1)
    out["leaf_start"] = germ + rng.uniform(36.0, 70.0, n_pots + 1)
    out["s2max"] = rng.uniform(0.45, 0.92, n_pots + 1)
    out["tau2"] = rng.uniform(35.0, 90.0, n_pots + 1)
    phi = rng.uniform(0.0, math.pi, n_pots + 1)
    off_y = rng.uniform(-0.08, 0.08, n_pots + 1) * g.pitch
    off_x = rng.uniform(-0.08, 0.08, n_pots + 1) * g.pitch
    half = g.pitch / 2
    sy = (ly - off_y[cell]) / half
    sx = (lx - off_x[cell]) / half
    r = np.hypot(sy, sx)
    theta = np.arctan2(sy, sx) - phi[cell]
    lobes1 = 0.30 + 0.70 * np.abs(np.cos(theta)) ** 1.6
    lobes2 = 0.22 + 0.78 * np.abs(np.sin(theta)) ** 1.3
    out["leaf1"] = np.where(inside, r / lobes1, 99.0).astype(np.float32)
    out["leaf2"] = np.where(inside, r / lobes2, 99.0).astype(np.float32)
    shade1 = (1.12 - 0.30 * np.clip(r / 0.5, 0.0, 1.0)).astype(np.float32)
    shade2 = (1.05 - 0.25 * np.clip(r / 0.8, 0.0, 1.0)).astype(np.float32)
    hue = rng.uniform(0.92, 1.08, n_pots + 1).astype(np.float32)[cell]
    green1 = np.empty((g.rows, g.cols, 3), np.float32)
    green1[:] = (0.42, 0.60, 0.22)
    green1 *= (shade1 * hue)[..., None]
    green2 = np.empty((g.rows, g.cols, 3), np.float32)
    green2[:] = (0.24, 0.46, 0.16)
    green2 *= (shade2 * hue)[..., None]
    out["green1"], out["green2"] = green1, green2
    return out


def _light(g: _Layout) -> tuple[np.ndarray, np.ndarray]:
    """Lamp spot with lens vignetting, warm tint; cool dim ambient light from the left."""
    d2 = ((g.yy - g.cy) / g.rows) ** 2 + ((g.xx - g.cx) / g.cols) ** 2
    vignette = 1.0 - 0.45 * d2
    spot = 1.22 * (0.80 + 0.20 * np.exp(-d2 / 0.08)) * vignette
    light_day = (spot[..., None] * np.array((1.00, 0.965, 0.87), np.float32)).astype(np.float32)
    ambient = 0.26 * (1.15 - 0.30 * g.xx / g.cols) * vignette
    light_night = (ambient[..., None] * np.array((0.78, 0.88, 1.06), np.float32)).astype(
        np.float32)
    return light_day, light_night


@functools.lru_cache(maxsize=8)
def static_scene(rows: int, cols: int, seed: int) -> Scene:
    """Return the static scene of a frame size and seed (cached; arguments already checked)."""
    rng = np.random.default_rng((seed, 0x7A7))       # one stream, drawn in a fixed order
    g = _layout(rng, rows, cols)
    tray_sdf = _tray_sdf(g)
    tray = coverage(tray_sdf)
    bench, bench_shadowed = _bench(rng, g)
    tray_col = _tray_colour(g, tray_sdf)
    inside, cell, ly, lx = _pot_grid(g)
    pot, pot_col, soil, soil_col, specks = _pots_and_soil(rng, g, inside, cell, ly, lx)

    scene = lerp(bench_shadowed, 0.0, tray)  # start from bench, cut the tray out
    scene = scene + tray_col * tray[..., None]
    scene = lerp(scene, 0.0, pot) + pot_col * pot[..., None]
    scene = lerp(scene, 0.0, soil) + soil_col * soil[..., None]
    albedo = scene.astype(np.float32)
    wet_loss = (_WET_DARKENING * soil[..., None] * (1.0 - 0.6 * specks[..., None])
                * soil_col).astype(np.float32)

    plants = _seedlings(rng, g, inside, cell, ly, lx)
    light_day, light_night = _light(g)
    bench = bench.astype(np.float32)
    readonly(albedo, wet_loss, bench, tray, cell, plants["leaf1"], plants["leaf2"],
             plants["green1"], plants["green2"], light_day, light_night)
    return Scene(rows=rows, cols=cols, pitch=g.pitch, albedo=albedo, wet_loss=wet_loss,
                 bench=bench, tray_mask=tray, cell=cell, light_day=light_day,
                 light_night=light_night, edge_gain=float(g.pitch / 2), **plants)


@functools.lru_cache(maxsize=16)
def glove(rows: int, cols: int, seed: int, copy: int):
    """Alpha (rows, cols), albedo (rows, cols, 3) and shadow (rows, cols) of a gloved hand."""
    rng = np.random.default_rng((seed, 0x61, copy))
    yy, xx = np.mgrid[0:rows, 0:cols].astype(np.float32)
    yy += 0.5
    xx += 0.5
    unit = min(rows, cols)
    # Hand enters from the lower right; palm centre and direction vary a little per copy.
    py = rows * (0.50 + rng.uniform(-0.06, 0.06))
    px = cols * (0.58 + rng.uniform(-0.06, 0.06))
    ang = math.radians(-135.0 + rng.uniform(-12.0, 12.0))  # direction fingers point (row, col)
    dy, dx = math.sin(ang), math.cos(ang)   # unit vector along the hand
    ny, nx = dx, -dy                        # across the hand

    def at(along, across):
        return (py + unit * (along * dy + across * ny), px + unit * (along * dx + across * nx))

    parts = [capsule_sdf(yy, xx, at(-0.10, 0.0), at(0.06, 0.0), 0.15 * unit)]   # palm
    for across, length in ((-0.11, 0.20), (-0.04, 0.25), (0.035, 0.24), (0.10, 0.19)):
        parts.append(capsule_sdf(yy, xx, at(0.10, across), at(0.10 + length, across * 1.25),
                                 0.035 * unit))
    parts.append(capsule_sdf(yy, xx, at(-0.02, -0.15), at(0.14, -0.27), 0.04 * unit))  # thumb
    wrist = capsule_sdf(yy, xx, at(-0.20, 0.0), at(-0.30, 0.0), 0.11 * unit)
    sleeve = capsule_sdf(yy, xx, at(-0.32, 0.0), at(-1.2, 0.0), 0.15 * unit)
    hand_sdf = np.minimum.reduce(parts + [wrist])
    hand = coverage(hand_sdf)
    cuff = coverage(sleeve)
    alpha = np.maximum(hand, cuff)
    # Rounded shading: brighter in the middle of each part, darker at its edges.
    shade = (0.70 + 0.40 * np.clip(-hand_sdf / (0.05 * unit), 0.0, 1.0)).astype(np.float32)
    colour = np.empty((rows, cols, 3), np.float32)
    colour[:] = (0.22, 0.40, 0.86)
    colour *= shade[..., None]
    sleeve_shade = (0.80 + 0.20 * np.clip(-sleeve / (0.06 * unit), 0.0, 1.0)).astype(np.float32)
    sleeve_col = np.array((0.90, 0.90, 0.92), np.float32) * sleeve_shade[..., None]
    colour = colour + (sleeve_col - colour) * cuff[..., None]   # the cuff lies over the wrist
    # Close to the camera: out of focus.
    blur = max(1, round(unit / 90))
    alpha = box_blur(alpha, blur)
    colour = box_blur(colour, blur)
    shift_y, shift_x = round(0.07 * unit), round(0.05 * unit)
    shadow = np.zeros_like(alpha)
    shadow[shift_y:, shift_x:] = alpha[:rows - shift_y, :cols - shift_x]
    r = max(1, round(unit / 30))
    shadow = box_blur(box_blur(shadow, r), r)
    out = (alpha.astype(np.float32), colour.astype(np.float32), shadow.astype(np.float32))
    readonly(*out)
    return out
