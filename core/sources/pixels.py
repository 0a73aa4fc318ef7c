"""The pixel steps of :mod:`modescope.core.sources.decode`: stored values to float32, sizes.

Internal module (no public API): the decoding rules are written down once, in the docstring of
:mod:`modescope.core.sources.decode`; this module holds the steps they are built from, so that
the decoder and the preview maker share one copy:

* :func:`_native` and :func:`_to_float`: stored values, their scale and the colour rule;
* :func:`_resize` (LANCZOS, for mismatched sizes) and :func:`_downscale` (area average);
* :func:`_jpeg_draft`: ask libjpeg (through Pillow's ``Image.draft``) to decode a JPEG file
  at 1/2, 1/4 or 1/8 of its size when the analysis downscales it anyway;
* :func:`_fit` and :func:`_open_reduced`: the preview's size and reduced decode.

Reduced-size JPEG decoding
--------------------------
libjpeg scales in the DCT domain: at 1/8 each 8 x 8 block becomes its DC coefficient, the
block's mean; at 1/2 and 1/4 a smaller inverse DCT of the block's low frequencies is used.
The result is close to, not equal to, the area average of the full decode (the measured
difference is stated in the tests). Each reduced pixel covers one whole ``s x s`` block of the
stored image counted from its top-left corner; a partial block is left at the bottom and right
edges. The analysis crops the partial blocks at the bottom and right of the *oriented* image,
so a scale ``s`` is only used when the two agree: along every stored axis that the EXIF
orientation reverses, the stored length must be a multiple of ``s``.
"""

from __future__ import annotations

import numpy as np
from PIL import Image

from modescope.core.sources.headers import orientation, pillow_notes, transpose
_LUMA = np.array([0.299, 0.587, 0.114], dtype=np.float32)
_INT32_MAX = float(np.iinfo(np.int32).max)
_EIGHT_BIT_RGB = ("RGB", "RGBA", "RGBX")
_SIXTEEN_BIT = ("I;16", "I;16B", "I;16L", "I;16N")

# EXIF orientation -> (stored rows reversed, stored columns reversed) when shown: the oriented
# image's first row or column is the stored last one along that axis (EXIF 2.3, CIPA DC-008;
# Pillow's exif_transpose: 2 mirror left-right, 3 half turn, 4 mirror top-bottom, 5 transpose,
# 6 quarter turn clockwise, 7 transverse, 8 quarter turn counter-clockwise).
_REVERSED = {1: (False, False), 2: (False, True), 3: (True, True), 4: (True, False),
             5: (False, False), 6: (True, False), 7: (True, True), 8: (False, True)}
_DCT_SCALES = (8, 4, 2)


class _DecodeFailure(Exception):
    """Internal: an image could not be decoded; ``reason`` is a user sentence."""

    def __init__(self, reason: str):
        super().__init__(reason)
        self.reason = reason


def _native(img: Image.Image) -> tuple[np.ndarray, float]:
    """Return the stored values of a loaded image and the divisor that maps them to [0, 1].

    The array is 2-D for gray data or 3-D with 3 colour channels (alpha dropped).
    """
    mode = img.mode
    if mode == "L":
        return np.asarray(img), 255.0
    if mode in _EIGHT_BIT_RGB:
        return np.asarray(img)[:, :, :3], 255.0
    if mode in _SIXTEEN_BIT:
        return np.asarray(img), 65535.0
    if mode == "1":
        return np.asarray(img), 1.0
    if mode == "LA":
        return np.asarray(img)[:, :, 0], 255.0
    if mode == "P":
        target = "RGBA" if "transparency" in img.info else "RGB"
        return np.asarray(img.convert(target))[:, :, :3], 255.0
    if mode == "PA":
        return np.asarray(img.convert("RGBA"))[:, :, :3], 255.0
    if mode in ("CMYK", "YCbCr"):
        return np.asarray(img.convert("RGB")), 255.0
    if mode == "I":
        values = np.asarray(img)
        if values.size and values.min() < 0:
            values = np.maximum(values, 0)
        top = int(values.max()) if values.size else 0
        return values, (65535.0 if top <= 65535 else _INT32_MAX)
    if mode == "F":
        values = np.asarray(img, dtype=np.float32)
        if np.isnan(values).any():
            raise _DecodeFailure("float image holds NaN values")
        return np.clip(values, 0.0, 1.0), 1.0
    raise _DecodeFailure(f"image mode {mode!r} is not supported")


def _to_float(values: np.ndarray, scale: float, color: str,
              out: np.ndarray | None = None) -> np.ndarray:
    """Scale stored values to float32 in [0, 1] with the channels asked for.

    ``out`` (shape (rows, cols, channels), float32), when given, receives the result.
    """
    rows, cols = values.shape[:2]
    channels = 3 if color == "rgb" else 1
    if out is None:
        out = np.empty((rows, cols, channels), dtype=np.float32)
    divisor = np.float32(scale)
    if values.ndim == 2:
        np.divide(values, divisor, out=out[:, :, 0], casting="unsafe")
        if channels == 3:
            out[:, :, 1] = out[:, :, 0]
            out[:, :, 2] = out[:, :, 0]
    elif channels == 3:
        np.divide(values, divisor, out=out, casting="unsafe")
    else:
        np.matmul(values.astype(np.float32), _LUMA / divisor, out=out[:, :, 0])
        np.clip(out, 0.0, 1.0, out=out)
    return out


def _resize(image: np.ndarray, size: tuple[int, int]) -> np.ndarray:
    rows, cols = size
    out = np.empty((rows, cols, image.shape[2]), dtype=np.float32)
    for c in range(image.shape[2]):
        plane = Image.fromarray(np.ascontiguousarray(image[:, :, c]))
        out[:, :, c] = np.asarray(plane.resize((cols, rows), Image.Resampling.LANCZOS))
    return np.clip(out, 0.0, 1.0, out=out)


def _downscale(image: np.ndarray, f: int) -> np.ndarray:
    rows, cols, channels = image.shape
    r, c = rows // f, cols // f
    cropped = image[: r * f, : c * f]
    return cropped.reshape(r, f, c, f, channels).mean(axis=(1, 3), dtype=np.float32)


def _jpeg_draft(img: Image.Image, orientation: int, oriented_size: tuple[int, int],
                f: int) -> int:
    """Set up a JPEG file to be decoded at 1/s of its size; return s (1: full size).

    ``img`` is opened and not yet loaded; ``orientation`` is its EXIF orientation (1-8) and
    ``oriented_size`` (rows, cols) the size the analysis expects after orientation. ``s`` is
    the largest of 8, 4, 2 that divides the downscale factor ``f`` and keeps the reduced
    blocks aligned with the analysis's crop (module docstring). Other formats, a size other
    than ``oriented_size`` (resized or refused later at full size) and ``f`` = 1 give 1.
    """
    if img.format != "JPEG" or f < 2:
        return 1
    cols, rows = img.size                                   # as stored
    shown = (cols, rows) if orientation >= 5 else (rows, cols)
    if shown != tuple(oriented_size):
        return 1
    rows_reversed, cols_reversed = _REVERSED.get(orientation, (False, False))
    for s in _DCT_SCALES:
        if f % s or (rows_reversed and rows % s) or (cols_reversed and cols % s):
            continue
        # Pillow picks the largest scale in (8, 4, 2, 1) not above min(cols // w, rows // h),
        # which for w = cols // s and h = rows // s (both >= 1 here) is s itself
        drafted = img.draft(img.mode, (cols // s, rows // s))
        if drafted is None:                                 # not a single-tile baseline load
            return 1
        return max(1, round(cols / drafted[1][2]))
    return 1


def _fit(rows: int, cols: int, max_side: int) -> tuple[int, int]:
    """Return (rows, cols) scaled so that the longer side is ``max_side`` (never enlarged)."""
    if max(rows, cols) <= max_side:
        return rows, cols
    scale = max_side / max(rows, cols)
    return (max(1, min(max_side, round(rows * scale))), max(1, min(max_side, round(cols * scale))))


def _open_reduced(img: Image.Image, page: int, max_side: int) -> tuple[Image.Image, tuple]:
    """Select the page, decode it (JPEG at 1/2, 1/4 or 1/8 when that is enough), orient it.

    Returns the oriented image, reduced by whole blocks (8-bit L and RGB only, cropped like
    :func:`_downscale`), and the preview size (rows, cols) of the full oriented image.
    """
    with pillow_notes([], getattr(img, "filename", "")):
        if page:
            img.seek(page)
        turn = orientation(img)           # 1 for TIFF: Pillow's reader rotates it itself
    cols, rows = img.size
    swapped = turn >= 5
    if swapped:
        rows, cols = cols, rows
    target = _fit(rows, cols, max_side)
    if img.format == "JPEG" and target != (rows, cols):
        img.draft(img.mode, target if swapped else target[::-1])  # (width, height) as stored
    img.load()
    img = transpose(img, turn)
    f = max(1, min(img.height // target[0], img.width // target[1]))
    if f > 1 and img.mode in ("L", "RGB"):
        box = (0, 0, img.width // f * f, img.height // f * f)
        img = img.reduce(f, box)
    return img, target
