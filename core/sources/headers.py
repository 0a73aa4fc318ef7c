"""What the scan and the decoder read from a file before its pixels: orientation and warnings.

Internal module (no public API), shared by :mod:`.scan`, :mod:`.decode` and :mod:`.pixels` so
that the scan and the decoder agree on every image:

* :func:`orientation` is the one reading of the EXIF orientation (1-8). It never decodes
  pixels: the EXIF block found in the header, or for a PNG file whose ``eXIf`` chunk follows
  the image data (allowed by the PNG specification, 3rd edition, section 11.3.6) that chunk,
  found by walking the chunk headers. TIFF files give 1: Pillow's TIFF reader reports the
  oriented size and rotates while decoding.
* :func:`transpose` applies an orientation the way ``PIL.ImageOps.exif_transpose`` does.
* :func:`pillow_notes` records the warnings Pillow gives (decompression-bomb size, damaged
  EXIF, ...) as plain sentences instead of letting Python print them on the terminal.
* :func:`short_message` turns a Pillow exception into a short sentence without the path.
* :func:`read_headers` reads the pages, modes and oriented sizes of a file for the scan (a
  plain 8-bit PNG file from its chunks alone, see :mod:`.plainpng`);
  :func:`not_regular_reason` says why a path is not a regular file (never opened then).

Warnings are process-wide in Python (``warnings.catch_warnings`` swaps global state), so every
recording here holds one lock: two of ours never interleave. Only header work is recorded
(opening a file, selecting a page, reading the orientation), which is fast, so the decode
threads hardly wait for each other.
"""

from __future__ import annotations

import contextlib
import errno
import os
import stat
import struct
import threading
import warnings
from typing import Iterator

from PIL import Image, UnidentifiedImageError

from modescope.core.sources.plainpng import plain_png

ORIENTATION_TAG = 0x0112
_EXIF_PREFIX = b"Exif\x00\x00"
_MAX_EXIF_BYTES = 1 << 20          # an eXIf chunk larger than this is not read (damaged file)
_LOCK = threading.RLock()  # re-entered when a scan callback reads a header itself

# EXIF orientation -> Pillow's transpose (as in PIL.ImageOps.exif_transpose; EXIF 2.3)
_TRANSPOSE = {2: Image.Transpose.FLIP_LEFT_RIGHT, 3: Image.Transpose.ROTATE_180,
              4: Image.Transpose.FLIP_TOP_BOTTOM, 5: Image.Transpose.TRANSPOSE,
              6: Image.Transpose.ROTATE_270, 7: Image.Transpose.TRANSVERSE,
              8: Image.Transpose.ROTATE_90}


def short_message(exc: BaseException, path: str) -> str:
    """Return the first line of a Pillow exception with ``path`` replaced by "the file"."""
    if isinstance(exc, UnidentifiedImageError):
        return "Pillow does not recognise the file format"
    if isinstance(exc, Image.DecompressionBombError):
        return (f"image too large to decode safely: {_pixels_of(exc)}; Pillow refuses more "
                f"than {2 * (Image.MAX_IMAGE_PIXELS or 0):,} pixels as a possible "
                "decompression bomb")
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return _shorten(text, path)


def _shorten(text: str, path: str) -> str:
    for variant in (f"'{path}'", f'"{path}"', path):
        text = text.replace(variant, "the file")
    text = " ".join(text.split())
    return text if len(text) <= 120 else text[:117] + "..."


def _pixels_of(warning: BaseException | Warning) -> str:
    """The pixel count of Pillow's decompression-bomb message, as "N pixels"."""
    words = str(warning).replace("(", " ").split()
    for i, word in enumerate(words[:-1]):
        if word.isdigit() and words[i + 1].startswith("pixels"):
            return f"{int(word):,} pixels"
    return "too many pixels"


def _note(message: warnings.WarningMessage, path: str) -> str:
    """Turn one recorded warning into a sentence a user can act on."""
    if issubclass(message.category, Image.DecompressionBombWarning):
        return (f"very large image ({_pixels_of(message.message)}, above Pillow's "
                f"{Image.MAX_IMAGE_PIXELS:,}-pixel limit for possible decompression bombs); "
                "used anyway")
    text = _shorten(str(message.message), path)
    if "exif" in text.lower() or "tag" in text.lower():
        return f"damaged EXIF metadata, the damaged part was ignored (Pillow: {text})"
    return f"Pillow warned: {text}"


@contextlib.contextmanager
def warning_capture() -> Iterator[list]:
    """Record every warning raised inside the block into the list yielded (nothing printed).

    One capture for a whole scan: starting a capture costs a copy of the warning filters
    (about 8 us), a fifth of the time of reading a small PNG's header. :func:`read_headers`
    takes the list and turns what one file raised into that file's notes.
    """
    with _LOCK, warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        yield caught


def _take_notes(caught: list, start: int, notes: list[str], path: str) -> None:
    for message in caught[start:]:
        sentence = _note(message, path)
        if sentence not in notes:
            notes.append(sentence)
    del caught[start:]


@contextlib.contextmanager
def pillow_notes(notes: list[str], path: str) -> Iterator[None]:
    """Record the warnings raised inside the block as sentences appended to ``notes``.

    Nothing is printed. Equal sentences are kept once. Exceptions pass through (the notes
    recorded until then are kept).
    """
    with _LOCK, warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            yield
        finally:
            _take_notes(caught, 0, notes, path)


def _exif_orientation(exif: Image.Exif) -> int:
    value = exif.get(ORIENTATION_TAG, 1)
    try:
        value = int(value)
    except (TypeError, ValueError):
        return 1
    return value if 1 <= value <= 8 else 1


def _png_trailing_exif(img: Image.Image) -> bytes | None:
    """Return the data of an ``eXIf`` chunk that follows the image data of a PNG file, or None.

    Walks the chunk headers from the first ``IDAT`` chunk on Pillow's own open file (the data
    of the other chunks is skipped with seeks) and puts the file position back.
    """
    fh = getattr(img, "fp", None)
    if fh is None or not img.tile:
        return None
    start = img.tile[0][2] - 8                              # the first IDAT chunk's header
    here = fh.tell()
    try:
        fh.seek(start)
        while True:
            head = fh.read(8)
            if len(head) < 8:
                return None
            length, kind = struct.unpack(">I4s", head)
            if kind == b"eXIf":
                if length > _MAX_EXIF_BYTES:
                    return None
                data = fh.read(length)
                return data if len(data) == length else None
            if kind == b"IEND":
                return None
            fh.seek(length + 4, 1)                          # data and CRC
    finally:
        fh.seek(here)


def orientation(img: Image.Image, notes: list[str] | None = None) -> int:
    """Return the EXIF orientation (1-8) of an opened image without decoding its pixels.

    Parameters
    ----------
    img : PIL.Image.Image
        An image opened with ``Image.open`` from a path, current page selected, not loaded.
    notes : list of str, optional
        Receives a sentence when the EXIF data is present but cannot be read.

    Returns
    -------
    int
        The orientation tag; 1 when absent, unreadable, not in 1-8, or for TIFF files (their
        reader applies it while decoding).
    """
    if img.format == "TIFF":
        return 1
    try:
        # PngImageFile.getexif decodes the whole image when the EXIF block is not in the
        # header; the base implementation only looks at what the header held.
        exif = Image.Image.getexif(img)
        value = _exif_orientation(exif)
        if ORIENTATION_TAG not in exif and img.format == "PNG" and "exif" not in img.info:
            data = _png_trailing_exif(img)
            if data:
                late = Image.Exif()
                late.load(data if data.startswith(_EXIF_PREFIX) else _EXIF_PREFIX + data)
                value = _exif_orientation(late)
    except Exception as exc:  # noqa: BLE001 - damaged EXIF must not hide a readable image
        if notes is not None:
            sentence = ("damaged EXIF metadata, the orientation was not applied "
                        f"({short_message(exc, getattr(img, 'filename', ''))})")
            if sentence not in notes:
                notes.append(sentence)
        return 1
    return value


def transpose(img: Image.Image, value: int) -> Image.Image:
    """Return ``img`` shown with EXIF orientation ``value`` (``img`` itself for 1)."""
    method = _TRANSPOSE.get(value)
    return img if method is None else img.transpose(method)


def _oriented_size(img: Image.Image, notes: list[str]) -> tuple[int, int]:
    cols, rows = img.size
    # Pillow's TIFF reader already reports the oriented size (headers.orientation gives 1)
    if orientation(img, notes) >= 5:
        rows, cols = cols, rows
    return (rows, cols)


def read_headers(path: str, notes: list[str], supported: tuple[str, ...],
                 caught: list | None = None) -> list[tuple[int, str, int, int]]:
    """Return ``(page, mode, rows, cols)`` of every page of ``path`` from its header.

    Pages whose mode is not in ``supported`` get the size (0, 0). Only Pillow's work happens
    here; a damaged or foreign file raises whatever Pillow raises. Pillow's warnings become
    sentences in ``notes`` (never printed); ``caught``, the list of a running
    :func:`warning_capture`, saves starting a capture for each file.
    """
    if path[-4:].lower() == ".png":
        plain = plain_png(path)
        if plain is not None:
            rows, cols, mode = plain
            return [(0, mode, rows, cols) if mode in supported else (0, mode, 0, 0)]
    if caught is None:
        with warning_capture() as own:
            return read_headers(path, notes, supported, own)
    start = len(caught)
    pages = []
    try:
        with Image.open(path) as img:
            n_pages = int(getattr(img, "n_frames", 1)) if img.format == "TIFF" else 1
            for page in range(n_pages):
                if page:
                    img.seek(page)
                rows, cols = _oriented_size(img, notes) if img.mode in supported else (0, 0)
                pages.append((page, img.mode, rows, cols))
    finally:
        _take_notes(caught, start, notes, path)
    return pages


_KINDS = ((stat.S_ISFIFO, "a named pipe (FIFO)"), (stat.S_ISSOCK, "a socket"),
          (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"))


def not_regular_reason(path: str) -> str | None:
    """Say why ``path`` is not a regular file to read; None for a folder or a regular file.

    A named pipe is never opened (reading it would wait for a writer forever).
    """
    try:
        mode = os.stat(path).st_mode
    except OSError as err:
        if not os.path.islink(path):
            return None if err.errno == errno.ENOENT else f"cannot be read ({err.strerror})"
        if err.errno == errno.ELOOP:
            return "symbolic link that loops back on itself (skipped)"
        try:
            target = os.readlink(path)
        except OSError:
            target = "?"
        if err.errno == errno.ENOENT:
            return f"symbolic link to a missing file {target!r} (skipped)"
        return f"symbolic link to {target!r}, which cannot be read ({err.strerror}; skipped)"
    if stat.S_ISREG(mode) or stat.S_ISDIR(mode):
        return None
    kind = next((name for test, name in _KINDS if test(mode)), "a special file")
    return f"is {kind}, not a regular file (skipped)"
