"""Turn numpy image arrays into QImages for display.

Gray images (one channel) become ``QImage.Format_Grayscale8``, colour images ``Format_RGB888``.
Signed arrays (residuals, basis images) go through the project's diverging colour map from
:mod:`modescope.core.output.colormap`: negative values teal, zero off-white, positive brick, with a
symmetric limit so that zero is always the middle colour.

Every QImage returned owns a copy of its pixels, so the numpy array can be dropped afterwards.
"""

from __future__ import annotations

import numpy as np
from PySide6.QtGui import QImage

from modescope.core.output.colormap import DIVERGING_LUT, signed_to_rgb
from modescope.core.output.metrics import quantize

__all__ = [
    "NO_VARIATION",
    "DIVERGING_LUT",
    "signed_to_rgb",
    "symmetric_limit",
    "to_uint8",
    "array_to_qimage",
    "signed_to_qimage",
    "colorbar_qimage",
]


#: Shown by the views when an analysis has no basis image (every image equals the mean image).
NO_VARIATION = "No basis images: these images do not vary (each equals the mean)."


def symmetric_limit(values: np.ndarray) -> float:
    """Return the largest finite absolute value of ``values`` (1.0 when there is none or it is 0).

    Parameters
    ----------
    values : array_like
        Signed values of any shape.

    Returns
    -------
    float
        A positive limit so that ``[-limit, limit]`` covers every value.
    """
    values = np.asarray(values)
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return 1.0
    limit = float(np.max(np.abs(finite)))
    return limit if limit > 0 else 1.0


def to_uint8(image: np.ndarray) -> np.ndarray:
    """Scale an image in [0, 1] (float) or uint8 to uint8, clipping values outside the range.

    The levels are core's (:func:`~modescope.core.output.metrics.quantize`: ``rint(255 x)``
    after clipping), so the screen shows the levels of the exported files. NaN shows as 0,
    +inf as 255 and -inf as 0.

    Parameters
    ----------
    image : ndarray, shape (rows, cols) or (rows, cols, channels)
        Float values in [0, 1] or uint8 values.

    Returns
    -------
    ndarray, uint8, same shape, C-contiguous

    Raises
    ------
    TypeError
        If ``image`` is not a numpy array of numbers.
    """
    if not isinstance(image, np.ndarray):
        raise TypeError(f"image must be a numpy array, got {type(image).__name__}")
    if image.dtype == np.uint8:
        return np.ascontiguousarray(image)
    if not np.issubdtype(image.dtype, np.number) and image.dtype != np.bool_:
        raise TypeError(f"image must hold numbers, got dtype {image.dtype}")
    if not np.isfinite(image).all():
        # rare: only then the extra pass
        image = np.nan_to_num(image.astype(np.float64), nan=0.0, posinf=1.0, neginf=0.0)
    return np.ascontiguousarray(quantize(image, 8))      # a new array


def _check_image_shape(image: np.ndarray) -> np.ndarray:
    if image.ndim == 3 and image.shape[2] == 1:
        image = image[:, :, 0]
    if image.ndim == 2:
        return image
    if image.ndim == 3 and image.shape[2] in (3, 4):
        return image[:, :, :3]
    raise ValueError(f"image must have shape (rows, cols), (rows, cols, 1) or "
                     f"(rows, cols, 3); got {image.shape}")


def _qimage_from_uint8(data: np.ndarray) -> QImage:
    data = np.ascontiguousarray(data)
    rows, cols = data.shape[:2]
    if rows == 0 or cols == 0:
        return QImage()
    if data.ndim == 2:
        img = QImage(data.data, cols, rows, cols, QImage.Format.Format_Grayscale8)
    else:
        img = QImage(data.data, cols, rows, cols * 3, QImage.Format.Format_RGB888)
    return img.copy()  # own the pixels


def array_to_qimage(image: np.ndarray) -> QImage:
    """Return a QImage showing ``image`` (gray for one channel, colour for three).

    Parameters
    ----------
    image : ndarray, shape (rows, cols), (rows, cols, 1) or (rows, cols, 3)
        Float values in [0, 1] (clipped) or uint8.

    Returns
    -------
    QImage
        Grayscale8 or RGB888, with its own copy of the pixels.

    Raises
    ------
    TypeError
        If ``image`` is not a numpy array.
    ValueError
        If the shape is not one of those above.
    """
    if not isinstance(image, np.ndarray):
        raise TypeError(f"image must be a numpy array, got {type(image).__name__}")
    return _qimage_from_uint8(to_uint8(_check_image_shape(image)))


def signed_to_qimage(values: np.ndarray, limit: float | None = None) -> QImage:
    """Return a QImage of signed values through the diverging colour map.

    Parameters
    ----------
    values : ndarray, shape (rows, cols), (rows, cols, 1) or (rows, cols, 3)
        Signed values; colour arrays are averaged over their channels first.
    limit : float, optional
        Values at ``-limit`` and ``+limit`` get the two ends of the map. Default: the largest
        absolute value (see :func:`symmetric_limit`).

    Returns
    -------
    QImage
        RGB888.

    Raises
    ------
    TypeError
        If ``values`` is not a numpy array.
    ValueError
        If the shape is not one of those above, or ``limit`` is not positive.
    """
    if not isinstance(values, np.ndarray):
        raise TypeError(f"values must be a numpy array, got {type(values).__name__}")
    plane = _check_image_shape(values)
    if plane.ndim == 3:
        plane = plane.mean(axis=2)
    if limit is None:
        limit = symmetric_limit(plane)
    elif not limit > 0:
        raise ValueError(f"limit must be positive, got {limit!r}")
    rgb = np.asarray(signed_to_rgb(plane, limit=float(limit)), dtype=np.uint8)
    return _qimage_from_uint8(rgb)


def colorbar_qimage(width: int = 256, height: int = 12) -> QImage:
    """Return a horizontal strip of the diverging map, ``-limit`` on the left.

    Parameters
    ----------
    width, height : int
        Size in pixels, both at least 1.

    Returns
    -------
    QImage
        RGB888 of size ``width x height``.
    """
    if width < 1 or height < 1:
        raise ValueError(f"width and height must be at least 1, got {width}x{height}")
    ramp = np.linspace(-1.0, 1.0, int(width))[None, :].repeat(int(height), axis=0)
    return _qimage_from_uint8(np.asarray(signed_to_rgb(ramp, limit=1.0), dtype=np.uint8))
