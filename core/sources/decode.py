"""Decode the images of a :class:`~modescope.core.sources.scan.SourceSet` into float32 columns.

:func:`load_image` decodes one image; :func:`iter_blocks` streams the whole collection as blocks
of columns of the data matrix, decoding on a small thread pool up to three blocks ahead of the
caller.

Decoding rules
--------------
Every image becomes a float32 array of shape ``(rows, cols, channels)`` with values in [0, 1]:

1. The page is selected (multi-page TIFF) and the pixels decoded by Pillow.
2. The EXIF orientation is applied as ``PIL.ImageOps.exif_transpose`` does, so the array
   looks the way an image viewer shows the file. It is read before decoding by
   :func:`modescope.core.sources.headers.orientation`, the very reading the scan uses (a PNG
   ``eXIf`` chunk after the image data included), so scan and decoder agree on the size
   (Pillow's TIFF reader applies the TIFF Orientation tag itself while decoding; it is not
   applied twice).
3. Values are scaled to [0, 1] by the storage type:

   * 8-bit modes (L, LA, P, PA, RGB, RGBA, RGBX, CMYK, YCbCr): divided by 255.
   * 16-bit modes (I;16, I;16B, I;16L, I;16N): divided by 65535.
   * mode I (32-bit signed integers): negative values are set to 0; the image is divided by
     65535 when its largest value is at most 65535 (16-bit data stored as 32-bit, the common
     case), otherwise by 2**31 - 1, the largest int32. The rule is applied per image.
   * mode F (32-bit float): float images are assumed to be already in [0, 1]; values are
     clipped to [0, 1] as they are (no rescaling). An image holding NaN is a decode failure.
   * mode 1 (bilevel): 0 or 1.

4. Colour: P and PA palettes are converted to RGB first, CMYK and YCbCr are converted to RGB by
   Pillow. Alpha is dropped: the colour channels are used as stored, alpha is ignored, nothing
   is composited onto a background.

   * ``color="gray"``: one channel. Gray files are used as they are; colour files become the
     luma ``0.299 R + 0.587 G + 0.114 B`` (ITU-R BT.601 weights), computed in float32 from the
     scaled RGB values (Pillow's integer "L" conversion is not used).
   * ``color="rgb"``: three channels R, G, B; a gray file is repeated in the three channels.

5. Size: an image whose oriented size differs from ``source_set.reference_size`` is resized to
   it (only when ``source_set.resize_mismatched`` is True, otherwise it is a decode failure),
   channel by channel in float32 with Pillow's LANCZOS filter, the result clipped to [0, 1].
   This happens before the downscale.
6. Downscale by an integer factor ``f``: the area average over ``f x f`` blocks of pixels
   (numpy reshape-mean). The last rows and columns that do not fill a whole block are cropped,
   so the analysed size is ``(rows // f, cols // f)``.
   JPEG files (``jpeg_draft=True``, the default) are first decoded by libjpeg at ``1/s`` of
   their size, with ``s`` the largest of 8, 4, 2 that divides ``f`` (Pillow's draft mode: the
   DCT blocks are scaled, at 1/8 each 8 x 8 block becomes its mean), and the remaining factor
   ``f / s`` is the area average above. The same blocks are cropped, and orientation (step 2)
   follows the reduced decode; ``s`` is lowered where an EXIF orientation reverses a stored
   axis whose length is not a multiple of ``s``, so that the blocks still line up. Several
   times faster for large photos. The values differ from the full decode's average by DCT
   rounding, at most 2.5 8-bit levels on smooth pictures (measured in the tests); colour
   detail at the scale of single pixels differs more, since the full decode interpolates the
   half-resolution colour planes of most JPEG files and the reduced decode does not. Files
   resized in step 5 are decoded at full size.

Frames of videos and ``.npy`` stacks are read by :mod:`.video` and :mod:`.arrays` (their value
and colour rules are written there) and then follow steps 5 and 6.

The pixel vector of an image (a column of the data matrix) is the C-order ravel of its
``(rows', cols', channels)`` array: for RGB the three values of a pixel are adjacent.
"""

from __future__ import annotations

import contextlib
import math
import time
from collections import deque
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from typing import Callable, Iterator

import numpy as np
from PIL import Image

from modescope.core.validation import check_bool, check_choice, check_int, check_path
from modescope.core.errors import SourceError
from modescope.core.sources.headers import orientation, pillow_notes, short_message, transpose
from modescope.core.sources.plainpng import plain_png
from modescope.core.sources.pixels import (_DecodeFailure, _downscale, _jpeg_draft, _native,
                                           _open_reduced, _resize, _to_float)
from modescope.core.sources.scan import ImageRef, Problem, SourceSet
from modescope.core.sources.sequences import (SequenceError, decode_frame, frame_preview,
                                              hold_videos, is_sequence, is_video)

__all__ = ["analysis_shape", "load_image", "load_preview", "Block", "iter_blocks"]

@dataclass(frozen=True, eq=False)
class Block:
    """A block of consecutive images of a collection, decoded as columns.

    Attributes
    ----------
    start : int
        Index in ``source_set.images`` of the first image attempted in this block.
    indices : ndarray, shape (m,), int64
        Indices (into ``source_set.images``) of the images decoded successfully, ascending.
    data : ndarray, shape (pixels, m), float32
        Column ``j`` is the pixel vector of image ``indices[j]``. Fortran-ordered: each column
        is contiguous in memory.
    problems : tuple of Problem
        The images of this block that failed to decode (absent from ``indices`` and ``data``).
    exact8 : bool
        True when every value of ``data`` is exactly ``v / 255`` (float32 division) for an 8-bit
        value ``v`` as decoded: 8-bit files used as stored, or JPEG files whose reduced-size
        decode alone made the whole downscale (no luma mix, resize or area average). Such a
        block can be kept as uint8 and restored bit for bit (see :mod:`.blockcache`). A reduced
        JPEG decode is not the file's full-size data, but decoding it again gives the same
        values, so the cache and the files agree.
    raw8 : ndarray or None
        When ``exact8``: those 8-bit values, shape (m, pixels), uint8, one row per image
        (``data == (raw8 / float32(255)).T`` exactly); otherwise None.
    """

    start: int
    indices: np.ndarray
    data: np.ndarray
    problems: tuple[Problem, ...]
    exact8: bool = False
    raw8: np.ndarray | None = None


def _check_source_set(source_set) -> None:
    if not isinstance(source_set, SourceSet):
        raise TypeError("source_set must be a SourceSet (from scan_sources), got "
                        f"{type(source_set).__name__}")


def analysis_shape(source_set: SourceSet, downscale: int = 1) -> tuple[int, int, int]:
    """Return the shape every image has after decoding and downscaling.

    Parameters
    ----------
    source_set : SourceSet
        The collection, from :func:`~modescope.core.sources.scan.scan_sources`.
    downscale : int, default 1
        Integer downscale factor, at least 1.

    Returns
    -------
    tuple of int
        ``(rows // downscale, cols // downscale, channels)`` where ``(rows, cols)`` is the
        reference size and ``channels`` is 1 (gray) or 3 (rgb).

    Raises
    ------
    TypeError
        If ``source_set`` is not a SourceSet or ``downscale`` is not an integer.
    ValueError
        If ``downscale`` is below 1 or so large that the analysed image would be empty.
    """
    _check_source_set(source_set)
    f = check_int("downscale", downscale, minimum=1)
    rows, cols = source_set.reference_size
    out_rows, out_cols = rows // f, cols // f
    if out_rows < 1 or out_cols < 1:
        raise ValueError(f"downscale {f} is too large for the reference size {rows}x{cols}: "
                         f"the analysed image would be {out_rows}x{out_cols}; use at most "
                         f"{max(1, min(rows, cols))}")
    return (out_rows, out_cols, source_set.channels)


def _pillow_failure(exc: Exception, ref: ImageRef) -> _DecodeFailure:
    return _DecodeFailure(f"cannot be decoded ({short_message(exc, ref.path)})")


def _read(img: Image.Image, ref: ImageRef, source_set: SourceSet, f: int,
          draft: bool) -> tuple[np.ndarray, float, int]:
    """Decode the opened ``img`` (JPEG at 1/s of its size when allowed) and orient it.

    Returns the stored values, their divisor (see ``_native``) and ``s`` (1: full size).
    """
    # Only Pillow's own work is guarded: it raises many exception types on damaged files
    # (OSError, ValueError, SyntaxError, struct.error, EOFError, ...); a bug in our conversion
    # (_native) must surface as itself, not as "cannot be decoded".
    try:
        # the header work as in the scan (same orientation reading); the scan has noted
        # Pillow's warnings already, these are only kept off the terminal
        with _quiet(ref):
            if ref.page:
                img.seek(ref.page)
            turn = orientation(img)
        s = _jpeg_draft(img, turn, source_set.reference_size, f) if draft else 1
        img.load()
        oriented = transpose(img, turn)
    except MemoryError:
        raise
    except Exception as exc:  # noqa: BLE001 - see above
        raise _pillow_failure(exc, ref) from exc
    values, scale = _native(oriented)
    return values, scale, s


def _quiet(ref: ImageRef):
    """Keep Pillow's warnings on ``ref`` off the terminal (the scan noted them already).

    Only for files that warned at the scan (``ref.noted``): the capture holds a process-wide
    lock, and taking it for every file made the two decoding threads take turns (5,000 small
    PNGs: 0.82 s -> 1.29 s).
    """
    return pillow_notes([], ref.path) if ref.noted else contextlib.nullcontext()


def _plain_values(ref: ImageRef) -> np.ndarray | None:
    """Stored values of a plain 8-bit PNG file read without ``Image.open`` (see
    :mod:`.plainpng`), as ``_native`` gives them; None for any other file (and for a file that
    warned at the scan, so that its notes stay its own)."""
    if ref.noted or ref.path[-4:].lower() != ".png":
        return None
    found = plain_png(ref.path, pixels=True)
    if found is None:
        return None
    mode, values = found[2], found[3]
    if mode == "LA":
        return values[:, :, 0]
    return values[:, :, :3] if values.ndim == 3 else values


def _decode(ref: ImageRef, source_set: SourceSet, f: int, out: np.ndarray,
            raw_out: np.ndarray | None = None, draft: bool = True) -> bool:
    """Decode ``ref`` into ``out`` (shape analysis_shape, float32) or raise _DecodeFailure.

    ``draft`` lets JPEG files be decoded at 1/2, 1/4 or 1/8 of their size when ``f`` allows
    it. Returns True when ``out`` holds exactly ``v / 255`` of 8-bit values ``v`` as decoded
    (the stored values, or libjpeg's reduced-size decode when that alone made the whole
    downscale); those values are then also copied into ``raw_out`` (same shape, uint8) when it
    is given.
    """
    if is_sequence(ref.path):                    # a frame of a video or array stack
        return decode_frame(ref, source_set, f, out, raw_out)
    reference = source_set.reference_size
    values = _plain_values(ref)
    if values is not None:
        scale, s = 255.0, 1
    else:
        try:
            with _quiet(ref):
                img = Image.open(ref.path)
        except MemoryError:
            raise
        except Exception as exc:  # noqa: BLE001 - Pillow raises many types on damaged files
            raise _pillow_failure(exc, ref) from exc
        with img:
            values, scale, s = _read(img, ref, source_set, f, draft)

    size = (int(values.shape[0]), int(values.shape[1]))
    if s == 1 and size != reference:
        if not source_set.resize_mismatched:
            raise _DecodeFailure(
                f"decoded size {size[0]}x{size[1]} differs from the reference "
                f"{reference[0]}x{reference[1]} (the file may have changed since the scan)")
        image = _resize(_to_float(values, scale, source_set.color), reference)
        if f > 1:
            image = _downscale(image, f)
        out[...] = image
        return False
    k = f // s                                   # the factor left after the reduced decode
    if s > 1:
        # whole s x s blocks only; then k x k groups of them make the analysed pixels
        values = values[: out.shape[0] * k, : out.shape[1] * k]
    if k == 1:
        _to_float(values, scale, source_set.color, out=out)  # fast path: no extra copy
        luma = values.ndim == 3 and source_set.color == "gray"
        exact8 = scale == 255.0 and values.dtype == np.uint8 and not luma
        if exact8 and raw_out is not None:
            raw_out[...] = values if values.ndim == 3 else values[:, :, None]
        return exact8
    out[...] = _downscale(_to_float(values, scale, source_set.color), k)
    return False


def _page_label(ref: ImageRef, source_set: SourceSet) -> int | None:
    """Page to report for ``ref``: None for single-image files. Only used on failures."""
    if ref.page > 0:
        return ref.page
    if any(other.path == ref.path and other.page > 0 for other in source_set.images):
        return 0
    return None


def load_image(ref: ImageRef, source_set: SourceSet, downscale: int = 1, *,
               jpeg_draft: bool = True) -> np.ndarray:
    """Decode one image at analysis resolution.

    Parameters
    ----------
    ref : ImageRef
        The image (usually one of ``source_set.images``).
    source_set : SourceSet
        Gives the colour choice, the reference size and the resize policy.
    downscale : int, default 1
        Integer area-average downscale factor, at least 1.
    jpeg_draft : bool, default True
        Let JPEG files be decoded at 1/2, 1/4 or 1/8 of their size when ``downscale`` allows
        it (rule 6 of the module docstring); False decodes them at full size.

    Returns
    -------
    ndarray, shape (rows // downscale, cols // downscale, channels), float32
        Values in [0, 1], decoded by the rules in the module docstring.

    Raises
    ------
    TypeError
        If an argument has the wrong type.
    ValueError
        If ``downscale`` is out of range.
    SourceError
        If the file (or page) cannot be decoded: missing, truncated, damaged, changed size.
    """
    if not isinstance(ref, ImageRef):
        raise TypeError(f"ref must be an ImageRef, got {type(ref).__name__}")
    shape = analysis_shape(source_set, downscale)
    draft = check_bool("jpeg_draft", jpeg_draft)
    out = np.empty(shape, dtype=np.float32)
    try:
        _decode(ref, source_set, int(downscale), out, draft=draft)
    except _DecodeFailure as failure:
        problem = Problem(ref.path, failure.reason, _page_label(ref, source_set))
        raise SourceError(str(problem)) from failure.__cause__
    return out


def load_preview(path, page: int = 0, *, max_side: int = 64,
                 color: str | None = None) -> np.ndarray:
    """Decode one image at reduced size by the analysis's rules, for thumbnails.

    The EXIF orientation, the scaling of 8-bit, 16-bit, integer and float data and the colour
    rules are those of the module docstring (steps 1-4); the image is then made smaller by an
    area average over whole blocks (JPEG files are decoded at 1/2, 1/4 or 1/8 of their size by
    Pillow when that is enough, and 8-bit gray and RGB images are block-averaged by Pillow in
    8 bits) and resized with Pillow's LANCZOS filter to the exact preview size. No reference
    size, resizing policy or downscale factor is involved.

    Parameters
    ----------
    path : str or os.PathLike
        Image file (never modified).
    page : int, default 0
        Page of a multi-page file.
    max_side : int, default 64
        Longest side of the result in pixels, at least 1. Smaller images keep their size.
    color : {"gray", "rgb"} or None, default None
        Channels as in the analysis; None keeps the file's kind: gray files give one channel,
        colour files three.

    Returns
    -------
    ndarray, shape (rows, cols, channels), float32
        Values in [0, 1]. ``(rows, cols)`` is the oriented image's size scaled so that its
        longer side is ``max_side`` (rounded to whole pixels).

    Raises
    ------
    TypeError
        If ``path`` is not a path or another argument has the wrong type.
    ValueError
        If ``page`` or ``max_side`` is out of range or ``color`` is not a choice above.
    SourceError
        If the file or page cannot be decoded (missing, damaged, unsupported mode).

    Examples
    --------
    >>> load_preview("frames/frame_001.jpg", max_side=64).shape     # doctest: +SKIP
    (48, 64, 3)
    """
    name = str(check_path("path", path))
    page = check_int("page", page, minimum=0)
    max_side = check_int("max_side", max_side, minimum=1)
    if color is not None:
        check_choice("color", color, ("gray", "rgb"))
    where = f"{name} (page {page})" if page else name
    if is_sequence(name):
        try:
            return frame_preview(name, page, max_side, color)
        except SequenceError as exc:
            raise SourceError(f"{where}: {exc.reason}") from None
    try:
        with pillow_notes([], name):
            img = Image.open(name)
    except MemoryError:
        raise
    except Exception as exc:  # noqa: BLE001 - Pillow raises many types on damaged files
        raise SourceError(f"{where}: cannot be decoded ({short_message(exc, name)})") from exc
    with img:
        try:
            reduced, target = _open_reduced(img, page, max_side)
        except MemoryError:
            raise
        except Exception as exc:  # noqa: BLE001 - only Pillow's work is guarded here
            raise SourceError(f"{where}: cannot be decoded "
                              f"({short_message(exc, name)})") from exc
        try:
            values, scale = _native(reduced)
        except _DecodeFailure as failure:
            raise SourceError(f"{where}: {failure.reason}") from None
    image = _to_float(values, scale, color or ("gray" if values.ndim == 2 else "rgb"))
    f = max(1, min(image.shape[0] // target[0], image.shape[1] // target[1]))
    if f > 1:
        image = _downscale(image, f)
    if image.shape[:2] != target:
        image = _resize(image, target)
    return image


def _decode_chunk(jobs, source_set: SourceSet, f: int, buffer: np.ndarray,
                  shape: tuple[int, int, int], raw: np.ndarray | None = None,
                  draft: bool = True) -> tuple[list[tuple[int, str]], bool, float]:
    """Decode each (row, ref) of ``jobs`` into ``buffer[row]`` (and ``raw[row]``).

    Returns the failures, whether every decoded image was exact 8-bit data, and the CPU
    seconds this thread spent.
    """
    started = time.thread_time()
    failures = []
    exact8 = True
    with hold_videos(ref.path for _, ref in jobs):   # a video's frames in one run, in order
        for row, ref in jobs:
            try:
                exact8 &= _decode(ref, source_set, f, buffer[row].reshape(shape),
                                  None if raw is None else raw[row].reshape(shape), draft)
            except _DecodeFailure as failure:
                failures.append((row, failure.reason))
    return failures, exact8, time.thread_time() - started


class _Pace:
    """How many decoding threads a block is shared out between.

    Every thread until the caller's time per block is known; then one thread while decoding a
    block takes at most ``_ONE_THREAD_UP_TO`` times the caller's time per block (CPU seconds
    of decoding against the caller's seconds between two blocks, smoothed over the last few
    blocks), all of them otherwise. When the caller's own work is the slower part, a second
    decoding thread only takes a core from it: 5,000 gray 128x128 PNGs, learning pass, two
    threads throughout 1.30-1.35 s, one 1.17-1.24 s (decoding 29-32 ms of CPU and the block
    update 30-34 ms per block; six alternating runs, measured here on 2026-12-03).
    """

    _SMOOTH = 0.3

    def __init__(self, workers: int):
        self.workers = workers
        self.threads = workers
        self._decode: float | None = None
        self._caller: float | None = None

    def decoded(self, cpu_seconds: float) -> None:
        self._decode = self._mix(self._decode, cpu_seconds)

    def caller(self, seconds: float) -> None:
        self._caller = self._mix(self._caller, seconds)
        if self._decode is not None:
            one = self._decode <= _ONE_THREAD_UP_TO * self._caller
            self.threads = 1 if one else self.workers

    def _mix(self, old: float | None, new: float) -> float:
        return new if old is None else old + self._SMOOTH * (new - old)


def iter_blocks(source_set: SourceSet, *, block_size: int = 64, downscale: int = 1,
                workers: int = 2,
                cancel: Callable[[], bool] | None = None,
                keep_raw: bool = False, jpeg_draft: bool = True) -> Iterator[Block]:
    """Decode the collection in blocks of columns, up to three blocks ahead of the caller.

    Parameters
    ----------
    source_set : SourceSet
        The collection, from :func:`~modescope.core.sources.scan.scan_sources`.
    block_size : int, default 64
        Images attempted per block (the last block may be smaller), at least 1.
    downscale : int, default 1
        Integer area-average downscale factor, at least 1.
    workers : int, default 2
        Decode threads, at least 1. One pool is made per call and shut down when the
        iteration ends, is cancelled or the generator is closed.
    cancel : callable() -> bool, optional
        Checked before each block; when it returns True the iteration stops (no exception).
    keep_raw : bool, default False
        Also hand out the 8-bit stored values of exact 8-bit blocks (``Block.raw8``), copied
        by the decode threads; used to cache blocks compactly.
    jpeg_draft : bool, default True
        Let JPEG files be decoded at 1/2, 1/4 or 1/8 of their size when ``downscale`` allows
        it (rule 6 of the module docstring); False decodes them at full size (slower; kept
        for comparisons).

    Returns
    -------
    iterator of Block
        Blocks in collection order covering every image once. ``Block.data`` has shape
        ``(pixels, m)`` with ``pixels = rows' * cols' * channels``; images that fail to decode
        are listed in ``Block.problems`` and left out (a block may then hold 0 columns).

    Raises
    ------
    TypeError
        If an argument has the wrong type.
    ValueError
        If ``block_size``, ``downscale`` or ``workers`` is out of range.

    Examples
    --------
    >>> for block in iter_blocks(sset, block_size=64):      # doctest: +SKIP
    ...     update(block.data)
    """
    shape = analysis_shape(source_set, downscale)
    block_size = check_int("block_size", block_size, minimum=1)
    workers = check_int("workers", workers, minimum=1)
    if cancel is not None and not callable(cancel):
        raise TypeError(f"cancel must be callable or None, got {type(cancel).__name__}")
    draft = check_bool("jpeg_draft", jpeg_draft)
    return _generate_blocks(source_set, block_size, int(downscale), workers, cancel, shape,
                            bool(keep_raw), draft)


#: One decoding thread while decoding a block costs at most this many times the caller's time
#: per block (see _Pace; our own choice: above 1 one thread falls behind, but up to about this
#: the caller gains more from having a core to itself than it waits).
_ONE_THREAD_UP_TO = 1.1

#: Blocks decoded ahead of the one the caller works on, at most, and the memory they may take
#: together (5,000 gray 128x128 PNGs, 8 MB blocks, end to end: 1 ahead 3.0-3.4 s, 2 ahead
#: 2.32-2.44 s, 3 ahead 2.14-2.42 s, 4 ahead 2.13-2.31 s; measured here on 2026-12-03).
_AHEAD = 3
_AHEAD_BYTES = 256 * 2 ** 20


def _generate_blocks(source_set: SourceSet, block_size: int, f: int, workers: int,
                     cancel: Callable[[], bool] | None,
                     shape: tuple[int, int, int], keep_raw: bool = False,
                     draft: bool = True) -> Iterator[Block]:
    images = source_set.images
    n = len(images)
    pixels = math.prod(shape)
    executor = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="modescope-decode")
    pace = _Pace(workers)

    def submit(start: int):
        stop = min(start + block_size, n)
        buffer = np.empty((stop - start, pixels), dtype=np.float32)
        raw = np.empty((stop - start, pixels), dtype=np.uint8) if keep_raw else None
        jobs = [(row, images[start + row]) for row in range(stop - start)]
        # a video decodes forward in one run (FFmpeg threads inside); split, it would seek
        n_chunks = 1 if any(is_video(ref.path) for _, ref in jobs) else min(pace.threads,
                                                                             len(jobs))
        step = -(-len(jobs) // n_chunks)
        futures: list[Future] = [
            executor.submit(_decode_chunk, jobs[i:i + step], source_set, f, buffer, shape, raw,
                            draft)
            for i in range(0, len(jobs), step)]
        return start, stop, buffer, raw, futures

    def collect(pending) -> Block:
        start, stop, buffer, raw, futures = pending
        results = [fut.result() for fut in futures]
        pace.decoded(sum(seconds for _, _, seconds in results))
        failures = sorted(item for chunk, _, _ in results for item in chunk)
        exact8 = all(flag for _, flag, _ in results)
        if not exact8:
            raw = None
        if not failures:
            return Block(start=start, indices=np.arange(start, stop, dtype=np.int64),
                         data=buffer.T, problems=(), exact8=exact8, raw8=raw)
        failed = {row for row, _ in failures}
        ok = np.array([row for row in range(stop - start) if row not in failed], dtype=np.int64)
        problems = tuple(
            Problem(images[start + row].path, reason, _page_label(images[start + row],
                                                                  source_set))
            for row, reason in failures)
        kept = np.ascontiguousarray(buffer[ok]) if ok.size else np.empty((0, pixels),
                                                                        np.float32)
        if raw is not None:
            raw = np.ascontiguousarray(raw[ok])
        return Block(start=start, indices=ok + start, data=kept.T, problems=problems,
                     exact8=exact8, raw8=raw)

    pending: deque = deque()
    ahead = max(1, min(_AHEAD, _AHEAD_BYTES // max(1, block_size * pixels * 4)))
    try:
        next_start = 0
        while next_start < n or pending:
            if cancel is not None and cancel():
                return
            # _AHEAD blocks in flight: the decoding threads keep working while the caller's
            # update of one block takes longer than decoding the next
            while next_start < n and len(pending) < ahead:
                pending.append(submit(next_start))
                next_start += block_size
            block = collect(pending.popleft())
            handed = time.perf_counter()
            yield block
            pace.caller(time.perf_counter() - handed)
    finally:
        for waiting in pending:
            for fut in waiting[4]:
                fut.cancel()
        executor.shutdown(wait=True, cancel_futures=True)
