"""HDF5 files holding one stack of frames, read through h5py (the ``hdf5`` extra).

A file (suffix ``.h5`` or ``.hdf5``) is used when it holds exactly one dataset of 3 or 4 axes,
anywhere in its groups: that dataset is the stack, with the shapes, types and value rules of
:mod:`modescope.core.sources.arrays` (frame ``i`` along the first axis is the image with
``page == i``). A file with none or several such datasets is a problem that names them (save
the one wanted on its own, or as ``.npy``). Frames are read one at a time with h5py's slicing
(only that frame's chunks are read from the file), never the whole dataset.
"""

from __future__ import annotations

import os
import threading

import numpy as np

from modescope.core.sources.arrays import ArrayInfo, _check
from modescope.core.sources.frames import FrameFileError

__all__ = ["HDF5_SUFFIXES", "probe_hdf5", "read_hdf5_frame"]

HDF5_SUFFIXES = (".h5", ".hdf5")
_LOCAL = threading.local()           # one open file per thread and path (see _dataset)
_MAX_LISTED = 4


def _h5py():
    try:
        import h5py
    except ImportError:
        raise FrameFileError("is an HDF5 file, and reading it needs h5py: install it with "
                             "pip install 'modescope[hdf5]'") from None
    return h5py


def _plain(exc: BaseException) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= 120 else text[:117] + "..."


def _stacks(handle) -> list:
    """Every dataset of 3 or 4 axes in the file, in h5py's visiting order."""
    h5py = _h5py()
    found = []

    def visit(name, item):
        if isinstance(item, h5py.Dataset) and item.ndim in (3, 4):
            found.append(item)
    handle.visititems(visit)
    return found


def _open(path: str):
    """Return ``(file, dataset)`` of the one stack in ``path``, or raise FrameFileError."""
    h5py = _h5py()
    try:
        handle = h5py.File(path, "r")
    except (OSError, ValueError, RuntimeError) as exc:
        raise FrameFileError(f"is not an HDF5 file Modescope can read (h5py says: "
                             f"{_plain(exc)}; the file may be damaged or truncated)") from None
    try:
        stacks = _stacks(handle)
    except (OSError, ValueError, KeyError, RuntimeError) as exc:
        handle.close()
        raise FrameFileError(f"cannot be read (h5py says: {_plain(exc)})") from None
    if len(stacks) != 1:
        names = ", ".join(f"{d.name} {d.shape}" for d in stacks[:_MAX_LISTED])
        handle.close()
        if not stacks:
            raise FrameFileError("holds no dataset of 3 or 4 axes (frames, rows, cols"
                                 "[, channels])")
        more = f" and {len(stacks) - _MAX_LISTED} more" if len(stacks) > _MAX_LISTED else ""
        raise FrameFileError(f"holds {len(stacks)} datasets that could be frame stacks "
                             f"({names}{more}); Modescope reads a file with exactly one "
                             "(save the one wanted on its own)")
    return handle, stacks[0]


def probe_hdf5(path: str) -> ArrayInfo:
    """Find and check the stack of an HDF5 file (no pixels are read).

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
        If h5py is missing, the file cannot be opened, it holds none or several stacks, or the
        stack's shape or type is not one of a frame stack.
    """
    handle, dataset = _open(path)
    try:
        return _check(dataset, path)
    finally:
        handle.close()


def _dataset(path: str):
    cache = getattr(_LOCAL, "files", None)
    if cache is None:
        cache = _LOCAL.files = {}
    try:
        info = os.stat(path)
    except OSError as exc:
        raise FrameFileError(f"cannot be read ({exc.strerror or exc})") from None
    stamp = (info.st_size, info.st_mtime_ns, info.st_ino)
    held = cache.get(path)
    if held is not None and held[0] == stamp:
        return held[2]
    if held is not None:
        cache.pop(path)[1].close()
    handle, dataset = _open(path)
    try:
        _check(dataset, path)
    except FrameFileError:
        handle.close()
        raise
    if len(cache) >= 4:
        cache.pop(next(iter(cache)))[1].close()
    cache[path] = (stamp, handle, dataset)
    return dataset


def read_hdf5_frame(path: str, frame: int) -> np.ndarray:
    """Read frame ``frame`` of the file's stack as stored.

    Parameters
    ----------
    path : str
        The file.
    frame : int
        Frame number, from 0.

    Returns
    -------
    ndarray, shape (rows, cols, channels), the dataset's dtype

    Raises
    ------
    FrameFileError
        If the file cannot be read any more, the frame is past the end, or its data is damaged.
    """
    dataset = _dataset(path)
    if not 0 <= frame < dataset.shape[0]:
        raise FrameFileError(f"frame {frame} is past the end of the stack ({dataset.shape[0]} "
                             "frames; the file may have changed since the scan)")
    try:
        stored = np.asarray(dataset[frame])
    except (OSError, ValueError, RuntimeError) as exc:
        raise FrameFileError(f"frame {frame} cannot be read (h5py says: {_plain(exc)})") from None
    return stored if stored.ndim == 3 else stored[:, :, None]
