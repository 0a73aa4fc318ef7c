"""Plain 8-bit PNG files read from their chunks, without Pillow's container layer.

Internal module (no public API). The scan of 5,000 small PNGs spent most of its time in
``Image.open`` and decoding spent a tenth of each image there, while the pixels themselves are
one zlib stream that Pillow's own PNG row decoder (its ``zip`` decoder, the one
``PIL.PngImagePlugin`` uses) turns into an image. :func:`plain_png` reads the chunk layout of a
file (PNG specification, 3rd edition, section 5) and answers only for files whose header Pillow
reads to the same mode and size without a warning:

* the signature, then an ``IHDR`` chunk with a valid CRC;
* 8-bit samples of colour type 0, 2, 3, 4 or 6, standard compression and filter method;
* before the image data only the chunks of ``_PLAIN`` (neither the mode nor the size depends on
  them and Pillow reads them silently), each with a valid CRC (Pillow checks those at open), and
  a palette where the colour type needs one;
* no ``eXIf`` chunk anywhere (the orientation is read by ``headers.orientation``), an ``IEND``
  chunk, and a size under Pillow's decompression-bomb limit.

Everything else -- text chunks, ICC profiles, 16-bit samples, a damaged or truncated file, any
error -- gives None, and the caller asks Pillow as before (with its usual messages).
"""

from __future__ import annotations

import os
import struct
import zlib

import numpy as np
from PIL import Image

_SIGNATURE = b"\x89PNG\r\n\x1a\n"
# colour type -> Pillow's mode for 8-bit samples (PNG specification 3rd edition, table 11.1;
# the modes are the ones PIL.PngImagePlugin gives, checked against it in the tests)
_MODES = {0: "L", 2: "RGB", 3: "P", 4: "LA", 6: "RGBA"}
# modes whose pixels are read here (a palette image goes through Pillow's conversion)
_PIXEL_MODES = ("L", "RGB", "LA", "RGBA")
_PLAIN = frozenset((b"PLTE", b"tRNS", b"gAMA", b"cHRM", b"sRGB", b"pHYs", b"bKGD", b"sBIT",
                    b"tIME"))
_HEAD_BYTES = 4096
# largest file whose pixels are read here: the whole file is held in memory while it decodes
# (Pillow's own reader streams it in blocks), so large photos go the usual way
_PIXEL_FILE_BYTES = 16 * 2 ** 20


def plain_png(path: str, pixels: bool = False):
    """Return ``(rows, cols, mode)`` of a plain 8-bit PNG file, or None (ask Pillow).

    With ``pixels``, return ``(rows, cols, mode, values)`` instead, ``values`` the decoded
    uint8 array (rows x cols, or rows x cols x channels), for files of the modes in
    ``_PIXEL_MODES`` without interlacing and of at most ``_PIXEL_FILE_BYTES``; None for every
    other file.
    """
    try:
        with open(path, "rb") as fh:
            if pixels and os.fstat(fh.fileno()).st_size > _PIXEL_FILE_BYTES:
                return None
            head = fh.read() if pixels else fh.read(_HEAD_BYTES)
            found = _walk(fh, head, pixels)
    except (OSError, struct.error):
        return None
    if found is None or not pixels:
        return found
    rows, cols, mode, interlace, parts = found
    if mode not in _PIXEL_MODES or interlace:
        return None
    try:
        data = parts[0] if len(parts) == 1 else b"".join(parts)
        image = Image.frombytes(mode, (cols, rows), data, "zip", mode)
        values = np.asarray(image)
    except Exception:  # noqa: BLE001 - damaged data: Pillow's own path gives the message
        return None
    return rows, cols, mode, values


def _walk(fh, head: bytes, pixels: bool):
    """The chunk walk of :func:`plain_png` (``head``: the file's first bytes, or all of it)."""
    if len(head) < 33 or head[:8] != _SIGNATURE or head[8:16] != b"\0\0\0\rIHDR":
        return None
    cols, rows, depth, color, compression, filtering, interlace = struct.unpack_from(
        ">IIBBBBB", head, 16)
    mode = _MODES.get(color) if depth == 8 else None
    if (mode is None or compression or filtering or interlace > 1 or not rows or not cols
            or zlib.crc32(head[12:29]) != struct.unpack_from(">I", head, 29)[0]
            or (Image.MAX_IMAGE_PIXELS and rows * cols > Image.MAX_IMAGE_PIXELS)):
        return None
    view = memoryview(head)
    parts: list = []
    pos, data_seen, data_done, palette = 33, False, False, False
    while True:
        if pos + 8 <= len(head):
            length, kind = struct.unpack_from(">I4s", head, pos)
        else:
            if pixels:
                return None                       # the whole file is in head: truncated
            fh.seek(pos)
            chunk = fh.read(8)
            if len(chunk) < 8:
                return None                       # no IEND: let Pillow judge
            length, kind = struct.unpack(">I4s", chunk)
        if kind == b"IEND":
            if not data_seen:
                return None
            return (rows, cols, mode, interlace, parts) if pixels else (rows, cols, mode)
        if kind == b"eXIf":
            return None
        if kind == b"IDAT":
            if (color == 3 and not palette) or data_done:
                return None                       # IDAT chunks must follow each other
            data_seen = True
            if pixels:
                if pos + 8 + length > len(head):
                    return None
                parts.append(view[pos + 8:pos + 8 + length])
        elif not data_seen:
            end = pos + 12 + length
            if kind not in _PLAIN or end > len(head) or zlib.crc32(
                    view[pos + 4:end - 4]) != struct.unpack_from(">I", head, end - 4)[0]:
                return None
            palette = palette or kind == b"PLTE"
        else:
            data_done = True
        pos += 12 + length
