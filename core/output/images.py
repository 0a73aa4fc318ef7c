"""Image arrays of an export: rank-k previews (optionally upsampled to the source size), the mean
image and basis images shown in colour. The desktop gallery draws its tiles with
:func:`basis_image_rgb` too, so the screen and the exported files agree pixel for pixel."""

from __future__ import annotations

import math
import numbers

import numpy as np
from PIL import Image

from modescope.core.decomposition import Decomposition
from modescope.core.output.colormap import signed_to_rgb
from modescope.core.output.metrics import quantize
from modescope.core.validation import check_float, check_instance, check_int

__all__ = ["source_size", "upsample_image", "preview_image", "signed_image_rgb", "basis_image_rgb",
           "contrast_limits", "stretch",
           "mean_image"]


def source_size(decomposition: Decomposition) -> tuple[int, int]:
    """Return the source size ``metadata["source_size"]`` recorded by the analysis.

    Parameters
    ----------
    decomposition : Decomposition

    Returns
    -------
    (rows, cols) : tuple of int

    Raises
    ------
    ValueError
        If no size is recorded or it is not two positive integers.
    """
    size = decomposition.metadata.get("source_size")
    if (not isinstance(size, (list, tuple)) or len(size) != 2
            or not all(isinstance(v, numbers.Integral) and not isinstance(v, bool) and v > 0
                       for v in size)):
        raise ValueError(f"upsample needs decomposition.metadata['source_size'] = [rows, cols] "
                         f"(two positive integers), found {size!r}")
    return int(size[0]), int(size[1])


def upsample_image(image, size: tuple[int, int]) -> np.ndarray:
    """Resize an image to ``size`` with Pillow's bicubic filter, channel by channel, in float.

    Parameters
    ----------
    image : ndarray, shape (rows, cols, channels)
        Float values (not clipped).
    size : (rows, cols)
        Target size.

    Returns
    -------
    ndarray, shape (size[0], size[1], channels), float32
        Not clipped (bicubic can overshoot slightly).

    Raises
    ------
    ValueError
        If ``image`` does not have three dimensions.
    """
    arr = np.asarray(image, dtype=np.float32)
    if arr.ndim != 3:
        raise ValueError(f"image must have shape (rows, cols, channels), got {arr.shape}")
    rows, cols = int(size[0]), int(size[1])
    if (rows, cols) == arr.shape[:2]:
        return arr.copy()
    out = np.empty((rows, cols, arr.shape[2]), dtype=np.float32)
    for c in range(arr.shape[2]):
        im = Image.fromarray(np.ascontiguousarray(arr[:, :, c]), mode="F")
        out[:, :, c] = np.asarray(im.resize((cols, rows), Image.Resampling.BICUBIC))
    return out


def preview_image(decomposition: Decomposition, index: int, rank: int, *,
                  upsample: bool = False, clip: bool = True) -> np.ndarray:
    """Return the rank-k reconstruction of one image as an image array.

    Parameters
    ----------
    decomposition : Decomposition
    index : int
        Image column, 0 <= index < n_images.
    rank : int
        Modes used, 0..k.
    upsample : bool
        Resize to ``metadata["source_size"]`` (bicubic, before clipping).
    clip : bool
        Clip to [0, 1] (default True).

    Returns
    -------
    ndarray, shape (rows, cols, channels), float32

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition.
    ValueError
        If ``index`` or ``rank`` is out of range, or ``upsample`` is asked without a recorded
        source size.
    """
    d = check_instance("decomposition", decomposition, Decomposition)
    img = d.to_image(d.reconstruct(index, rank)).astype(np.float32, copy=False)
    if upsample:
        img = upsample_image(img, source_size(d))
    if clip:
        img = np.clip(img, 0.0, 1.0)
    return img


def signed_image_rgb(image, limit: float) -> np.ndarray:
    """Return a signed image (a basis image) as sRGB colours, ``limit`` shown at both ends.

    This is the one colour rule of basis images, used by the exported files and the desktop
    gallery alike. Gray: the diverging map of :mod:`modescope.core.output.colormap`, ``-limit``
    .. 0 .. ``+limit``. RGB: each channel shown as ``0.5 + value / (2 * limit)``, clipped to
    [0, 1] and quantised ``rint(x * 255)`` (mid-gray 128 is zero). A limit of 0 gives the
    middle colour everywhere. The rule works pixel by pixel, so a subsampled image gives the
    subsampled colours.

    Parameters
    ----------
    image : ndarray, shape (rows, cols, 1) or (rows, cols, 3)
        Finite signed values.
    limit : float
        Value shown at both ends, finite and >= 0.

    Returns
    -------
    ndarray, shape (rows, cols, 3), uint8

    Raises
    ------
    TypeError
        If ``limit`` is not a number.
    ValueError
        If ``image`` has another shape or ``limit`` is negative, infinite or NaN.
    """
    img = np.asarray(image, dtype=np.float64)
    if img.ndim != 3 or img.shape[2] not in (1, 3):
        raise ValueError(f"image must have shape (rows, cols, 1 or 3), got {img.shape}")
    limit = check_float("limit", limit, low=0.0)
    if math.isinf(limit):
        raise ValueError(f"limit must be finite, got {limit}")
    if img.shape[2] == 1:
        return signed_to_rgb(img[:, :, 0], limit)
    if limit == 0.0:
        return np.full(img.shape, 128, dtype=np.uint8)
    return quantize(0.5 + img / (2.0 * limit), 8)


def basis_image_rgb(decomposition: Decomposition, index: int,
                    limit: float | None = None) -> tuple[np.ndarray, float]:
    """Return basis image ``index`` (0-based) as sRGB colours, and the limit used.

    The colours follow :func:`signed_image_rgb`: the diverging map for gray, ``0.5 + value /
    (2 * limit)`` per channel for RGB.

    Parameters
    ----------
    decomposition : Decomposition
    index : int
        Basis image, ``0 <= index < decomposition.rank``.
    limit : float, optional
        Value shown at both ends, >= 0. Default: the largest absolute value of this basis
        image (over its three channels for RGB); 0 for a basis image of zeros.

    Returns
    -------
    rgb : ndarray, shape (rows, cols, 3), uint8
    limit : float

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition or an argument is not a number.
    ValueError
        If ``index`` is out of range or ``limit`` is negative, infinite or NaN.
    """
    d = check_instance("decomposition", decomposition, Decomposition)
    j = check_int("index", index, minimum=0, maximum=d.rank - 1)
    img = d.to_image(d.basis[:, j]).astype(np.float64)
    if limit is None:
        limit = float(np.max(np.abs(img))) if img.size else 0.0
    rgb = signed_image_rgb(img, limit)
    return rgb, float(limit)


def mean_image(decomposition: Decomposition) -> np.ndarray:
    """Return the mean image, clipped and quantised to 8 bits.

    Parameters
    ----------
    decomposition : Decomposition

    Returns
    -------
    ndarray, shape (rows, cols, channels), uint8

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition.
    """
    d = check_instance("decomposition", decomposition, Decomposition)
    return quantize(d.to_image(d.mean), 8)


def contrast_limits(image, low: float = 0.01, high: float = 0.99) -> tuple[float, float]:
    """Return the display range that stretches ``image``'s contrast: its low and high quantiles.

    A dark night frame or a bright over-exposed one shows its detail when ``[lo, hi]`` is
    mapped to black..white (:func:`stretch`). The 1% and 99% quantiles by default ignore a few
    extreme pixels (common practice in image viewers, no published source).

    Parameters
    ----------
    image : array_like, any shape
        Intensities, nominally in [0, 1]; non-finite values are ignored.
    low, high : float
        Quantiles, 0 <= low < high <= 1.

    Returns
    -------
    (lo, hi) : tuple of float
        ``hi > lo`` always (a flat image gets a range of one 8-bit level around its value).

    Raises
    ------
    ValueError
        If the quantiles are out of order or out of range.

    Examples
    --------
    >>> contrast_limits(np.linspace(0.1, 0.3, 101), 0.0, 1.0)
    (0.1, 0.3)
    """
    low = check_float("low", low, low=0.0, high=1.0)
    high = check_float("high", high, low=0.0, high=1.0)
    if not low < high:
        raise ValueError(f"low must be below high, got low={low}, high={high}")
    values = np.asarray(image, dtype=np.float64)
    values = values[np.isfinite(values)]
    if values.size == 0:
        return (0.0, 1.0)
    lo, hi = (float(v) for v in np.quantile(values, [low, high]))
    if hi - lo < 1.0 / 255:
        middle = 0.5 * (lo + hi)
        lo, hi = middle - 0.5 / 255, middle + 0.5 / 255
    return (lo, hi)


def stretch(image, limits: tuple[float, float]) -> np.ndarray:
    """Return ``image`` with ``limits`` mapped to [0, 1] (clipped), float32, same shape.

    Examples
    --------
    >>> stretch(np.array([0.1, 0.2, 0.3, 0.5]), (0.1, 0.3)).tolist()
    [0.0, 0.5, 1.0, 1.0]
    """
    lo, hi = (float(v) for v in limits)
    if not hi > lo:
        raise ValueError(f"limits must be (low, high) with high > low, got {limits!r}")
    out = (np.asarray(image, dtype=np.float32) - np.float32(lo)) / np.float32(hi - lo)
    return np.clip(out, 0.0, 1.0, out=out)
