"""Colour tables for showing images: a diverging map for signed values and plain gray.

The diverging map is Modescope's own. It is built from five sRGB anchors:

=========  ===============  =====================
position   colour           sRGB (0-255)
=========  ===============  =====================
-1         deep teal        (12, 78, 86)
-1/2       mid teal         (92, 164, 164)
0          warm off-white   (247, 242, 232)
+1/2       burnt orange     (218, 132, 76)
+1         brick            (128, 40, 24)
=========  ===============  =====================

Between anchors the colour is interpolated **linearly in sRGB** (gamma-encoded values), then
rounded to the nearest integer. Every channel rises from each end towards the centre, so the
CIELAB lightness L* rises strictly from each end to the off-white middle; the anchors were chosen
so that mirror positions (-t and +t) have nearly the same L* (within 1), so neither sign
looks heavier than the other.

Table layout: ``DIVERGING_LUT`` has 256 rows. Row 128 is zero. Row ``128 + j`` shows the value
``+j/127`` of the limit and row ``128 - j`` shows ``-j/127``, for j = 0..127; row 0 repeats row 1
(the negative end) so that the table has the 256 rows image viewers expect.

This module is pure numpy; the GUI uses the same table.
"""

from __future__ import annotations

import numbers

import numpy as np

__all__ = ["DIVERGING_LUT", "CENTRE_INDEX", "DIVERGING_ANCHORS", "signed_to_index",
           "signed_to_rgb", "gray_to_rgb", "describe_mapping"]

#: Row of :data:`DIVERGING_LUT` that shows the value zero.
CENTRE_INDEX = 128

#: Number of table steps on each side of the centre (row 128 +- 127).
_HALF_STEPS = 127

#: (position in [-1, 1], name, sRGB) anchors of the diverging map.
DIVERGING_ANCHORS = (
    (-1.0, "deep teal", (12, 78, 86)),
    (-0.5, "mid teal", (92, 164, 164)),
    (0.0, "warm off-white", (247, 242, 232)),
    (0.5, "burnt orange", (218, 132, 76)),
    (1.0, "brick", (128, 40, 24)),
)


def _build_lut() -> np.ndarray:
    positions = np.array([a[0] for a in DIVERGING_ANCHORS])
    colours = np.array([a[2] for a in DIVERGING_ANCHORS], dtype=np.float64)
    t = (np.arange(256) - CENTRE_INDEX) / _HALF_STEPS
    t = np.clip(t, -1.0, 1.0)          # row 0 -> -128/127, clipped: repeats row 1
    lut = np.empty((256, 3), dtype=np.float64)
    for c in range(3):
        lut[:, c] = np.interp(t, positions, colours[:, c])
    lut = np.rint(lut).astype(np.uint8)
    lut.setflags(write=False)
    return lut


#: The diverging table, shape (256, 3), uint8 sRGB; read-only.
DIVERGING_LUT = _build_lut()


def _check_values(values) -> np.ndarray:
    if isinstance(values, (str, bytes)):
        raise TypeError(f"values must be a numeric array, got {type(values).__name__}")
    arr = np.asarray(values)
    if arr.dtype == object or not (np.issubdtype(arr.dtype, np.number)
                                   or arr.dtype == np.bool_):
        raise TypeError(f"values must be a numeric array, got dtype {arr.dtype}")
    if np.iscomplexobj(arr):
        raise TypeError("values must be real, got a complex array")
    arr = arr.astype(np.float64, copy=False)
    if arr.size and not np.all(np.isfinite(arr)):
        bad = int(np.count_nonzero(~np.isfinite(arr)))
        raise ValueError(f"values must be finite, found {bad} NaN or infinite entries")
    return arr


def _resolve_limit(arr: np.ndarray, limit) -> float:
    if limit is None:
        return float(np.max(np.abs(arr))) if arr.size else 0.0
    if isinstance(limit, bool) or not isinstance(limit, numbers.Real):
        raise TypeError(f"limit must be a number or None, got {type(limit).__name__} {limit!r}")
    limit = float(limit)
    if not np.isfinite(limit) or limit < 0:
        raise ValueError(f"limit must be a finite number >= 0, got {limit}")
    return limit


def signed_to_index(values, limit=None) -> np.ndarray:
    """Return the row of :data:`DIVERGING_LUT` that shows each signed value.

    Parameters
    ----------
    values : array_like, any shape
        Finite real values.
    limit : float, optional
        Value shown at the ends of the table: ``-limit`` maps to row 1 (deep teal), 0 to row
        128, ``+limit`` to row 255 (brick), linearly in between (``128 + rint(127 * v / limit)``);
        values beyond ``+-limit`` are clipped to the ends. Default: the largest absolute value
        in ``values``. A limit of 0 maps everything to row 128.

    Returns
    -------
    ndarray, same shape as ``values``, uint8

    Raises
    ------
    TypeError
        If ``values`` is not numeric or ``limit`` is not a number.
    ValueError
        If ``values`` holds NaN/inf or ``limit`` is negative or not finite.
    """
    arr = _check_values(values)
    lim = _resolve_limit(arr, limit)
    if lim == 0.0:
        return np.full(arr.shape, CENTRE_INDEX, dtype=np.uint8)
    t = np.clip(arr / lim, -1.0, 1.0)
    # np.rint is an odd function (ties to even), so -v lands on the mirror row of +v.
    return (CENTRE_INDEX + np.rint(t * _HALF_STEPS)).astype(np.uint8)


def signed_to_rgb(values, limit=None) -> np.ndarray:
    """Map signed values to colours of the diverging table, centred on zero.

    Parameters
    ----------
    values : array_like, any shape
        Finite real values, e.g. a basis image of shape (rows, cols).
    limit : float, optional
        ``-limit`` maps to deep teal, 0 to the warm off-white middle row, ``+limit`` to brick,
        linearly in between; values beyond are clipped. Default: the largest absolute value in
        ``values`` (so the strongest pixel reaches an end). 0 maps everything to the middle.

    Returns
    -------
    ndarray, shape ``values.shape + (3,)``, uint8
        sRGB colours.

    Raises
    ------
    TypeError, ValueError
        As :func:`signed_to_index`.

    Examples
    --------
    >>> signed_to_rgb([0.0])[0].tolist() == DIVERGING_LUT[128].tolist()
    True
    """
    return DIVERGING_LUT[signed_to_index(values, limit)]


def gray_to_rgb(values, low: float = 0.0, high: float = 1.0) -> np.ndarray:
    """Map values to gray sRGB colours: ``low`` to black, ``high`` to white.

    Parameters
    ----------
    values : array_like, any shape
        Finite real values.
    low, high : float
        Values shown as black (0) and white (255), ``low < high``; linear in between, clipped
        outside, rounded to the nearest level (``rint(255 * (v - low) / (high - low))``).

    Returns
    -------
    ndarray, shape ``values.shape + (3,)``, uint8
        The gray level repeated in the three channels.

    Raises
    ------
    TypeError
        If ``values`` is not numeric or ``low``/``high`` are not numbers.
    ValueError
        If ``values`` holds NaN/inf or ``low >= high``.
    """
    arr = _check_values(values)
    for name, v in (("low", low), ("high", high)):
        if isinstance(v, bool) or not isinstance(v, numbers.Real):
            raise TypeError(f"{name} must be a number, got {type(v).__name__} {v!r}")
        if not np.isfinite(float(v)):
            raise ValueError(f"{name} must be finite, got {v}")
    low, high = float(low), float(high)
    if not low < high:
        raise ValueError(f"low must be smaller than high, got low={low}, high={high}")
    level = np.rint(np.clip((arr - low) / (high - low), 0.0, 1.0) * 255.0).astype(np.uint8)
    return np.repeat(level[..., None], 3, axis=-1)


def describe_mapping(limit: float) -> str:
    """Return one sentence describing the diverging mapping for a given limit, for reports.

    Parameters
    ----------
    limit : float
        The value shown at the ends (>= 0).

    Returns
    -------
    str
        E.g. ``"value -0.02 maps to deep teal (12, 78, 86), 0 to warm off-white (247, 242,
        232), +0.02 to brick (128, 40, 24), linearly in between (colours interpolated linearly
        in sRGB); values beyond +-0.02 are clipped to the ends."``

    Raises
    ------
    TypeError, ValueError
        If ``limit`` is not a finite number >= 0.
    """
    lim = _resolve_limit(np.zeros(0), limit)
    neg = tuple(int(c) for c in DIVERGING_LUT[CENTRE_INDEX - _HALF_STEPS])
    mid = tuple(int(c) for c in DIVERGING_LUT[CENTRE_INDEX])
    pos = tuple(int(c) for c in DIVERGING_LUT[CENTRE_INDEX + _HALF_STEPS])
    if lim == 0.0:
        return (f"all values are 0 and map to {DIVERGING_ANCHORS[2][1]} {mid} "
                f"(limit 0: every value is shown as the middle of the table).")
    text = f"{lim:.4g}"
    return (f"value -{text} maps to {DIVERGING_ANCHORS[0][1]} {neg}, 0 to "
            f"{DIVERGING_ANCHORS[2][1]} {mid}, +{text} to {DIVERGING_ANCHORS[4][1]} {pos}, "
            f"linearly in between (colours interpolated linearly in sRGB); values beyond "
            f"+-{text} are clipped to the ends.")
