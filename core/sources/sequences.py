"""Files that hold many frames in time order (videos, ``.npy`` and HDF5 stacks), for the scan
and the reader.

Internal module (no public API): :mod:`.scan` and :mod:`.decode` ask it whether a path is such
a file (by its suffix: :data:`SEQUENCE_SUFFIXES`), what its frames are (:func:`probe_sequence`)
and for one frame's pixels (:func:`decode_frame`, :func:`frame_preview`). Each frame is one image
of the collection, like a page of a multi-page TIFF: ``ImageRef(path=<the file>, page=<frame
number from 0>)``. The readers themselves are :mod:`.video`, :mod:`.arrays` and :mod:`.hdf5`; the decoding
rules after the frame is read (resize, downscale) are those of image files.
"""

from __future__ import annotations

import os
import threading

import numpy as np

from modescope.core.sources.arrays import (ARRAY_SUFFIXES, array_to_float,
                                           probe_array, read_array_frame)
from modescope.core.sources.frames import FrameFileError, FrameRange
from modescope.core.sources.hdf5 import HDF5_SUFFIXES, probe_hdf5, read_hdf5_frame
from modescope.core.sources.pixels import _DecodeFailure, _downscale, _fit, _resize
from modescope.core.sources.video import (VIDEO_SUFFIXES, hold, probe_video,
                                          read_video_frame)

SEQUENCE_SUFFIXES = VIDEO_SUFFIXES + ARRAY_SUFFIXES + HDF5_SUFFIXES
_LUMA = np.array([0.299, 0.587, 0.114], dtype=np.float32)
_PROBED: dict = {}                      # path -> (size, mtime, inode), probe result
_PROBED_LOCK = threading.Lock()


class SequenceError(ValueError):
    """A sequence file cannot be used; ``reason`` is a user sentence."""

    def __init__(self, reason: str):
        super().__init__(reason)
        self.reason = reason


def is_sequence(path: str) -> bool:
    """Return True when ``path``'s suffix is a video's or an array stack's."""
    return os.path.splitext(path)[1].lower() in SEQUENCE_SUFFIXES


def is_video(path: str) -> bool:
    """Return True when ``path``'s suffix is a video's."""
    return os.path.splitext(path)[1].lower() in VIDEO_SUFFIXES


def hold_videos(paths):
    """Context that keeps other threads off the video readers of ``paths`` for a run of
    frames (see :func:`modescope.core.sources.video.hold`)."""
    return hold(paths)


def _is_array(path: str) -> bool:
    """True for a stack of numbers (.npy or HDF5), False for a video."""
    return os.path.splitext(path)[1].lower() in ARRAY_SUFFIXES + HDF5_SUFFIXES


def _is_hdf5(path: str) -> bool:
    return os.path.splitext(path)[1].lower() in HDF5_SUFFIXES


def _probe_stack(path: str):
    return probe_hdf5(path) if _is_hdf5(path) else probe_array(path)


def probe_sequence(path: str, frames: FrameRange | None):
    """Return ``(frame numbers, mode, rows, cols, rate)`` of a sequence file.

    ``frame numbers`` is the range selected by ``frames`` (every frame when None); ``rate`` is
    the video's frames per second (None for an array stack or when unknown).

    Raises
    ------
    SequenceError
        If the file cannot be used, or ``frames`` selects none of its frames.
    """
    n, mode, rows, cols, rate = _probe_cached(path)
    numbers = range(n) if frames is None else frames.numbers(n)
    if len(numbers) == 0:
        raise SequenceError(f"the frame range {frames} selects none of its {n} frames "
                            "(frames are numbered from 0)")
    return numbers, mode, rows, cols, rate


def _probe_cached(path: str) -> tuple:
    """``(frames, mode, rows, cols, rate)`` of ``path``, remembered while the file is unchanged
    (reading one frame again, as the workbench does, need not count a long video's frames)."""
    try:
        info = os.stat(path)
        stamp = (info.st_size, info.st_mtime_ns, info.st_ino)
    except OSError:
        stamp = None
    with _PROBED_LOCK:
        held = _PROBED.get(path)
    if held is not None and stamp is not None and held[0] == stamp:
        return held[1]
    try:
        if _is_array(path):
            a = _probe_stack(path)
            found = (a.n_frames, a.mode, a.rows, a.cols, None)
        else:
            v = probe_video(path)
            found = (v.n_frames, "RGB", v.rows, v.cols, v.rate)
    except FrameFileError as exc:
        raise SequenceError(exc.reason) from None
    if stamp is not None:
        with _PROBED_LOCK:
            if len(_PROBED) >= 64:
                _PROBED.pop(next(iter(_PROBED)))
            _PROBED[path] = (stamp, found)
    return found


def _read(path: str, frame: int, color: str) -> tuple[np.ndarray, np.ndarray | None]:
    """Return frame ``frame`` as float32 (rows, cols, channels) and its 8-bit values when the
    float values are exactly ``v / 255`` of them (else None)."""
    if _is_array(path):
        stored = (read_hdf5_frame if _is_hdf5(path) else read_array_frame)(path, frame)
        values = array_to_float(stored, frame, color)
        luma = color == "gray" and stored.shape[2] >= 3
        if stored.dtype == np.uint8 and not luma:
            raw = stored[:, :, :3] if color == "rgb" and stored.shape[2] >= 3 else None
            if raw is None and color == "gray":
                raw = stored
            return values, raw
        return values, None
    rgb = read_video_frame(path, frame)
    if color == "rgb":
        return np.divide(rgb, np.float32(255.0), dtype=np.float32), rgb
    gray = np.matmul(rgb.astype(np.float32), _LUMA / np.float32(255.0))[:, :, None]
    return np.clip(gray, 0.0, 1.0, out=gray), None


def decode_frame(ref, source_set, f: int, out: np.ndarray,
                 raw_out: np.ndarray | None = None) -> bool:
    """Decode the frame ``ref`` into ``out`` as :func:`decode._decode` does for image files.

    Returns True when ``out`` holds exactly ``v / 255`` of 8-bit values ``v`` (then copied into
    ``raw_out`` when given). Raises ``_DecodeFailure`` with a user sentence.
    """
    try:
        values, raw = _read(ref.path, ref.page, source_set.color)
    except FrameFileError as exc:
        raise _DecodeFailure(exc.reason) from None
    reference = source_set.reference_size
    size = (int(values.shape[0]), int(values.shape[1]))
    if size != reference:
        if not source_set.resize_mismatched:
            raise _DecodeFailure(
                f"decoded size {size[0]}x{size[1]} differs from the reference "
                f"{reference[0]}x{reference[1]} (the file may have changed since the scan)")
        values, raw = _resize(values, reference), None
    if f > 1:
        out[...] = _downscale(values, f)
        return False
    out[...] = values
    if raw is not None and raw_out is not None:
        raw_out[...] = raw
    return raw is not None


def frame_preview(path: str, page: int, max_side: int, color: str | None) -> np.ndarray:
    """Return frame ``page`` of a sequence file with its longer side ``max_side`` (at most).

    Raises ``SequenceError`` with a user sentence.
    """
    try:
        if color is None:               # a file's own kind: videos are decoded as RGB
            color = "gray" if _is_array(path) and _probe_stack(path).mode == "L" else "rgb"
        values, _ = _read(path, page, color)
    except FrameFileError as exc:
        raise SequenceError(exc.reason) from None
    target = _fit(values.shape[0], values.shape[1], max_side)
    step = max(1, min(values.shape[0] // target[0], values.shape[1] // target[1]))
    if step > 1:
        values = _downscale(values, step)
    if values.shape[:2] != target:
        values = _resize(np.clip(values, 0.0, 1.0), target)
    return values
