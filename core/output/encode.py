"""Encoders of exported images: PNG, JPEG and WebP through Pillow (8-bit) and an uncompressed
16-bit baseline TIFF written here (Pillow cannot write 16-bit RGB TIFF)."""

from __future__ import annotations

import io
import struct

import numpy as np
from PIL import Image

from modescope.core.output.metrics import quantize
from modescope.core.validation import check_choice, check_int

__all__ = ["FORMATS", "encode_tiff16", "encode_image", "png_bytes"]

#: Preview formats and their file suffix.
FORMATS = {"png": ".png", "jpg": ".jpg", "webp": ".webp", "tiff": ".tif"}
_PIL_FORMAT = {"png": "PNG", "jpg": "JPEG", "webp": "WEBP"}


def encode_tiff16(array) -> bytes:
    """Encode a 16-bit gray or RGB image as an uncompressed baseline TIFF (little-endian).

    Parameters
    ----------
    array : ndarray, shape (rows, cols), (rows, cols, 1) or (rows, cols, 3), uint16

    Returns
    -------
    bytes
        One image, one strip, contiguous samples, SampleFormat unsigned integer.

    Raises
    ------
    TypeError
        If the array is not uint16.
    ValueError
        If the shape is not one of the above or the image exceeds 4 GiB.
    """
    arr = np.asarray(array)
    if arr.dtype != np.uint16:
        raise TypeError(f"array must be uint16, got {arr.dtype}")
    if arr.ndim == 2:
        arr = arr[:, :, None]
    if arr.ndim != 3 or arr.shape[2] not in (1, 3) or arr.shape[0] < 1 or arr.shape[1] < 1:
        raise ValueError(f"array must have shape (rows, cols[, 1 or 3]), got {np.shape(array)}")
    rows, cols, ch = arr.shape
    data = np.ascontiguousarray(arr, dtype="<u2").tobytes()
    if len(data) > 0xFFFFFFFF - 4096:
        raise ValueError(f"image of {len(data)} bytes is too large for a baseline TIFF")
    SHORT, LONG, RATIONAL = 3, 4, 5
    n_entries = 14
    ifd_offset = 8
    extra_offset = ifd_offset + 2 + 12 * n_entries + 4
    extra = bytearray()

    def put_extra(payload: bytes) -> int:
        nonlocal extra
        off = extra_offset + len(extra)
        extra += payload
        if len(extra) % 2:
            extra += b"\0"
        return off

    bits_off = put_extra(struct.pack("<3H", 16, 16, 16)) if ch == 3 else None
    fmt_off = put_extra(struct.pack("<3H", 1, 1, 1)) if ch == 3 else None
    xres_off = put_extra(struct.pack("<2I", 1, 1))
    yres_off = put_extra(struct.pack("<2I", 1, 1))
    data_offset = extra_offset + len(extra)

    def short_entry(tag, value):
        return struct.pack("<HHIH2x", tag, SHORT, 1, value)

    def long_entry(tag, value):
        return struct.pack("<HHII", tag, LONG, 1, value)

    def offset_entry(tag, typ, count, offset):
        return struct.pack("<HHII", tag, typ, count, offset)

    entries = [
        long_entry(256, cols),                                     # ImageWidth
        long_entry(257, rows),                                     # ImageLength
        offset_entry(258, SHORT, 3, bits_off) if ch == 3 else short_entry(258, 16),
        short_entry(259, 1),                                       # Compression: none
        short_entry(262, 2 if ch == 3 else 1),                     # RGB / BlackIsZero
        long_entry(273, data_offset),                              # StripOffsets
        short_entry(277, ch),                                      # SamplesPerPixel
        long_entry(278, rows),                                     # RowsPerStrip
        long_entry(279, len(data)),                                # StripByteCounts
        offset_entry(282, RATIONAL, 1, xres_off),                  # XResolution
        offset_entry(283, RATIONAL, 1, yres_off),                  # YResolution
        short_entry(284, 1),                                       # PlanarConfiguration
        short_entry(296, 1),                                       # ResolutionUnit: none
        offset_entry(339, SHORT, 3, fmt_off) if ch == 3 else short_entry(339, 1),
    ]
    assert len(entries) == n_entries
    header = b"II" + struct.pack("<HI", 42, ifd_offset)
    ifd = struct.pack("<H", n_entries) + b"".join(entries) + struct.pack("<I", 0)
    return header + ifd + bytes(extra) + data



def encode_image(image, image_format: str, quality: int = 90) -> bytes:
    """Encode a float image in [0, 1] (clipped) in one of :data:`FORMATS`.

    Parameters
    ----------
    image : ndarray, shape (rows, cols, 1) or (rows, cols, 3), float
    image_format : {"png", "jpg", "webp", "tiff"}
        png/jpg/webp are 8-bit; tiff is 16-bit uncompressed.
    quality : int
        1..100, for jpg and webp.

    Returns
    -------
    bytes

    Raises
    ------
    TypeError, ValueError
        If ``image_format`` or ``quality`` is not one of the choices, or ``image`` has another
        shape or holds NaN.
    """
    fmt = check_choice("image_format", image_format, FORMATS)
    quality = check_int("quality", quality, minimum=1, maximum=100)
    arr = np.asarray(image)
    if arr.ndim != 3 or arr.shape[2] not in (1, 3):
        raise ValueError(f"image must have shape (rows, cols, 1 or 3), got {arr.shape}")
    if fmt == "tiff":
        return encode_tiff16(quantize(arr, 16))
    q = quantize(arr, 8)
    pil = Image.fromarray(q[:, :, 0] if q.shape[2] == 1 else q)
    if fmt == "webp" and pil.mode == "L":
        pil = pil.convert("RGB")
    buf = io.BytesIO()
    options = {"quality": quality} if fmt in ("jpg", "webp") else {}
    pil.save(buf, format=_PIL_FORMAT[fmt], **options)
    return buf.getvalue()


def png_bytes(array) -> bytes:
    """Encode an 8-bit gray or RGB image as PNG.

    Parameters
    ----------
    array : ndarray, shape (rows, cols), (rows, cols, 1) or (rows, cols, 3), uint8

    Returns
    -------
    bytes

    Raises
    ------
    TypeError
        If the array is not uint8.
    """
    arr = np.asarray(array)
    if arr.dtype != np.uint8:
        raise TypeError(f"array must be uint8, got {arr.dtype}")
    if arr.ndim == 3 and arr.shape[2] == 1:
        arr = arr[:, :, 0]
    buf = io.BytesIO()
    Image.fromarray(np.ascontiguousarray(arr)).save(buf, format="PNG")
    return buf.getvalue()
