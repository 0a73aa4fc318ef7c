"""NumPy ``.npy`` stacks of frames as image collections: one frame, one image.

A stack is an array of shape ``(frames, rows, cols)`` (gray) or ``(frames, rows, cols,
channels)`` with 1, 3 or 4 channels (gray, RGB, RGB with alpha; the alpha channel is dropped as
for image files). The first axis is time: frame ``i`` becomes the image with ``page == i``.

Reading
-------
The file is opened with ``np.load(path, mmap_mode="r")``: the header is checked (never with
``allow_pickle``: object arrays are refused) and frames are read one at a time from the mapping,
never the whole stack. After a frame is copied out, its pages are given back to the operating
system (``madvise(MADV_DONTNEED)`` on the mapping, where the platform has it), so the memory of
a long analysis does not grow with the part of the file already read: a mapped page that was
read stays in a process's resident memory until it is released.

Values
------
* ``uint8``: divided by 255; ``uint16``: divided by 65535 (as 8- and 16-bit image files).
* other integer types: divided by the type's largest value (``int16``: 32767, ``int32``:
  2**31 - 1, ...); negative values keep their sign. ``bool``: 0 or 1.
* floating types (``float16``, ``float32``, ``float64``): used as stored, in float32, neither
  rescaled nor clipped, so a field with signed values (a velocity, a temperature difference)
  keeps them; the views and previews show [0, 1]. A frame holding NaN or infinity cannot be
  decoded (a problem naming the frame).
* complex, object, text and structured types are refused with the type found.

Colour: ``color="gray"`` turns 3- or 4-channel frames into the luma ``0.299 R + 0.587 G +
0.114 B`` (ITU-R BT.601 weights, as for image files); ``color="rgb"`` repeats a gray frame in
the three channels.
"""

from __future__ import annotations

import mmap
import os
import threading
from dataclasses import dataclass

import numpy as np

from modescope.core.sources.frames import FrameFileError

__all__ = ["ARRAY_SUFFIXES", "ArrayInfo", "probe_array", "read_array_frame",
           "array_to_float"]

ARRAY_SUFFIXES = (".npy",)

_MAGIC = b"\x93NUMPY"                # numpy's .npy format specification
_LUMA = np.array([0.299, 0.587, 0.114], dtype=np.float32)
_MODES = {1: "L", 3: "RGB", 4: "RGBA"}
_LOCAL = threading.local()          # one open mapping per thread and file (see _mapping)


@dataclass(frozen=True)
class ArrayInfo:
    """What the header of a ``.npy`` stack says.

    Attributes
    ----------
    n_frames : int
        Length of the first axis.
    rows, cols : int
        Size of every frame.
    mode : str
        "L" (one channel), "RGB" or "RGBA" (alpha dropped), as Pillow names them.
    dtype : str
        The stored type, e.g. "uint8", "float32".
    """

    n_frames: int
    rows: int
    cols: int
    mode: str
    dtype: str


def _open(path: str) -> np.memmap | np.ndarray:
    """Open ``path`` memory-mapped, or raise FrameFileError with a plain reason."""
    try:
        with open(path, "rb") as handle:
            magic = handle.read(len(_MAGIC))
    except OSError as exc:
        raise FrameFileError(f"cannot be read ({exc.strerror or exc})") from None
    if magic != _MAGIC:
        raise FrameFileError("is not a NumPy array file Modescope can read (it does not start "
                             "with the .npy signature; .npz archives are not frame stacks)")
    try:
        return np.load(path, mmap_mode="r", allow_pickle=False)
    except ValueError as exc:
        text = str(exc)
        if "pickle" in text.lower() or "object" in text.lower():
            raise FrameFileError("holds Python objects (dtype object), not numbers; such "
                                 "files are never read") from None
        if "mmap length" in text or "larger than" in text or "cannot be reshaped" in text:
            raise FrameFileError("is shorter than its header says (truncated file)") from None
        raise FrameFileError(f"is not a NumPy array file Modescope can read ({text})") from None
    except (OSError, EOFError) as exc:
        raise FrameFileError(f"is not a NumPy array file Modescope can read "
                             f"({getattr(exc, 'strerror', None) or exc})") from None


def _check(array, path: str) -> ArrayInfo:
    dtype = array.dtype
    if dtype.kind not in "biuf" or dtype.fields is not None:
        raise FrameFileError(f"holds values of type {dtype} ({_kind_words(dtype)}); expected "
                             "integers, booleans or real floating-point numbers")
    shape = array.shape
    if array.ndim not in (3, 4):
        raise FrameFileError(f"has shape {shape} ({array.ndim} axes); expected (frames, rows, "
                             "cols) or (frames, rows, cols, channels)")
    channels = 1 if array.ndim == 3 else shape[3]
    if channels not in _MODES:
        raise FrameFileError(f"has {channels} channels (shape {shape}); expected 1, 3 or 4")
    if shape[1] < 1 or shape[2] < 1:
        raise FrameFileError(f"has frames without pixels (shape {shape})")
    if shape[0] < 1:
        raise FrameFileError(f"holds no frame (shape {shape})")
    return ArrayInfo(n_frames=int(shape[0]), rows=int(shape[1]), cols=int(shape[2]),
                     mode=_MODES[channels], dtype=str(dtype))


def _kind_words(dtype: np.dtype) -> str:
    return {"c": "complex numbers", "O": "Python objects", "U": "text", "S": "bytes",
            "V": "structured records", "M": "dates", "m": "time differences"}.get(
        dtype.kind, "not numbers")


def probe_array(path: str) -> ArrayInfo:
    """Read and check the header of a ``.npy`` stack (no pixels are read).

    Parameters
    ----------
    path : str
        The file.

    Returns
    -------
    ArrayInfo

    Raises
    ------
    FrameFileError
        If the file is not a NumPy array file, is truncated, or holds an array that is not a
        stack of frames (wrong number of axes or channels, wrong type); ``reason`` says which.
    """
    array = _open(path)
    try:
        return _check(array, path)
    finally:
        _close(array)


def _close(array) -> None:
    handle = getattr(array, "_mmap", None)
    if handle is not None:
        try:
            handle.close()
        except (BufferError, ValueError):  # still viewed elsewhere: freed with the array
            pass


def _mapping(path: str):
    """Return this thread's open mapping of ``path`` (opened on first use, checked again)."""
    cache = getattr(_LOCAL, "arrays", None)
    if cache is None:
        cache = _LOCAL.arrays = {}
    try:
        stamp = os.stat(path)
    except OSError as exc:
        raise FrameFileError(f"cannot be read ({exc.strerror or exc})") from None
    key = (stamp.st_size, stamp.st_mtime_ns, stamp.st_ino)
    held = cache.get(path)
    if held is not None and held[0] == key:
        return held[1]
    if held is not None:
        _close(held[1])
    array = _open(path)
    _check(array, path)
    if len(cache) >= 4:                 # a thread rarely moves between many stacks
        _close(cache.pop(next(iter(cache)))[1])
    cache[path] = (key, array)
    return array


def _release(array, frame: int) -> None:
    """Give the pages of frames up to ``frame`` back to the system (resident memory)."""
    handle = getattr(array, "_mmap", None)
    advice = getattr(mmap, "MADV_DONTNEED", None)
    if handle is None or advice is None or not hasattr(handle, "madvise"):
        return
    start_in_map = array.offset % mmap.ALLOCATIONGRANULARITY
    end = start_in_map + (frame + 1) * array[0].nbytes
    end -= end % mmap.PAGESIZE
    if end > 0:
        try:
            handle.madvise(advice, 0, min(end, len(handle)))
        except (OSError, ValueError):    # the advice is only an optimisation
            pass


def read_array_frame(path: str, frame: int) -> np.ndarray:
    """Read frame ``frame`` of a stack as stored (a copy; the mapping's pages are released).

    Parameters
    ----------
    path : str
        The file.
    frame : int
        Frame number, from 0.

    Returns
    -------
    ndarray, shape (rows, cols, channels), the file's dtype
        The stored values; a gray stack gives one channel.

    Raises
    ------
    FrameFileError
        If the file changed into something unreadable or the frame is past its end.
    """
    array = _mapping(path)
    if not 0 <= frame < array.shape[0]:
        raise FrameFileError(f"frame {frame} is past the end of the stack ({array.shape[0]} "
                             "frames; the file may have changed since the scan)")
    try:
        stored = np.array(array[frame])          # one frame copied out of the mapping
    except (OSError, ValueError) as exc:         # pragma: no cover - a file cut while read
        raise FrameFileError(f"frame {frame} cannot be read ({exc})") from None
    _release(array, frame)
    return stored if stored.ndim == 3 else stored[:, :, None]


def array_to_float(stored: np.ndarray, frame: int, color: str) -> np.ndarray:
    """Scale one stored frame to float32 with the channels asked for (module docstring).

    Parameters
    ----------
    stored : ndarray, shape (rows, cols, channels)
        From :func:`read_array_frame`.
    frame : int
        Its frame number (for the message).
    color : {"gray", "rgb"}

    Returns
    -------
    ndarray, shape (rows, cols, 1 or 3), float32

    Raises
    ------
    FrameFileError
        If a float frame holds NaN or infinite values.
    """
    kind = stored.dtype.kind
    if kind == "f":
        values = stored.astype(np.float32, copy=False)
        if not np.isfinite(values).all():
            raise FrameFileError(f"frame {frame} holds NaN or infinite values")
    elif kind == "b":
        values = stored.astype(np.float32)
    else:
        values = stored.astype(np.float32) / np.float32(np.iinfo(stored.dtype).max)
    if values.shape[2] == 4:
        values = values[:, :, :3]
    if color == "gray" and values.shape[2] == 3:
        return np.matmul(values, _LUMA)[:, :, None]
    if color == "rgb" and values.shape[2] == 1:
        return np.repeat(values, 3, axis=2)
    return np.ascontiguousarray(values)
