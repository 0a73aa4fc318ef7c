"""Read the arrays of a model file safely: check before allocating, never unpickle.

A model file is a zip of ``.npy`` members (see :mod:`modescope.core.output.model_file`). A
damaged or hostile file must end in one :class:`~modescope.core.errors.ModelFileError` naming
the file, never in a hang, a huge allocation or a traceback, so the reading goes in steps:

1. :func:`stat_regular`: the path is a regular file (a FIFO is never opened: opening one
   waits for a writer);
2. :func:`open_zip`: open it without blocking, check again on the open descriptor, read the
   zip directory;
3. :func:`read_headers`: read only the ``.npy`` header of every member wanted (no data): the
   declared shape and type give the bytes the data must take, which must be exactly what the
   zip directory says the member holds; Python objects (pickled data) are refused;
4. :func:`check_totals`: the declared sizes together must fit in the memory available and
   must not inflate far beyond the file (a decompression bomb);
5. :func:`read_arrays`: only then read the data, with ``allow_pickle=False``.
"""

from __future__ import annotations

import contextlib
import math
import os
import stat
import zipfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from numpy.lib import format as npy_format

from modescope.core.errors import ModelFileError

__all__ = ["Entry", "unusable", "stat_regular", "open_zip", "read_headers", "check_totals",
           "read_arrays", "available_memory", "INFLATION_LIMIT", "INFLATION_FLOOR"]

#: Largest ratio of the members' inflated sizes to the file's size. Our own files are stored
#: without compression (ratio 1); float data deflates by less than 2x, the text of the paths
#: by about 10x to 30x, so 100 only stops members made of one repeated byte (our choice).
INFLATION_LIMIT = 100
#: Inflated size always allowed whatever the ratio (small files of zeros are harmless).
INFLATION_FLOOR = 64 * 2 ** 20
#: Largest ``.npy`` header read (numpy's own default).
_MAX_HEADER = 10_000
_PICKLE_WORDS = "holds Python objects (pickled data), which Modescope never loads"


def unusable(path, what: str) -> ModelFileError:
    """Return the error for a model file that cannot be used (the message names the file)."""
    return ModelFileError(f"{path}: not a usable Modescope model file: {what}")


def describe(exc: BaseException) -> str:
    """Return ``exc`` in words for a message, never numpy's advice to allow pickles."""
    text = str(exc) or type(exc).__name__
    if "pickle" in text.lower():
        return _PICKLE_WORDS
    return text


@dataclass(frozen=True)
class Entry:
    """The header of one ``.npy`` member, read without its data.

    Attributes
    ----------
    name : str
        Entry name (member name without ``.npy``).
    info : zipfile.ZipInfo
    shape : tuple of int
    fortran : bool
    dtype : numpy.dtype
    nbytes : int
        Bytes the declared shape and type take.
    """

    name: str
    info: zipfile.ZipInfo
    shape: tuple
    fortran: bool
    dtype: np.dtype
    nbytes: int


def _kind(mode: int) -> str:
    if stat.S_ISDIR(mode):
        return "a folder"
    if stat.S_ISFIFO(mode):
        return "a named pipe (FIFO)"
    if stat.S_ISSOCK(mode):
        return "a socket"
    if stat.S_ISCHR(mode) or stat.S_ISBLK(mode):
        return "a device"
    return "not a regular file"


def stat_regular(path: Path) -> int:
    """Return the size of ``path`` after checking that it is a regular file (never opened).

    Raises
    ------
    ModelFileError
        If the path is missing, cannot be examined, or is a folder, pipe, socket or device.
    """
    try:
        st = os.stat(path)
    except FileNotFoundError:
        if os.path.islink(path):
            raise ModelFileError(f"{path}: a link to a missing file") from None
        raise ModelFileError(f"{path}: no such file") from None
    except (OSError, ValueError) as exc:
        raise ModelFileError(f"{path}: cannot be examined ({describe(exc)})") from None
    if stat.S_ISDIR(st.st_mode):
        raise ModelFileError(f"{path}: is a folder, not a model file")
    if not stat.S_ISREG(st.st_mode):
        raise ModelFileError(f"{path}: is {_kind(st.st_mode)}, not a model file")
    return int(st.st_size)


@contextlib.contextmanager
def open_zip(path: Path):
    """Open ``path`` as a zip without blocking; yield the ``zipfile.ZipFile``.

    The file is opened with ``O_NONBLOCK`` (where the system has it) and checked again on the
    open descriptor, so a file replaced by a pipe after :func:`stat_regular` cannot hang.

    Raises
    ------
    ModelFileError
        If the file cannot be opened, is not regular, or is not a zip.
    """
    flags = os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_BINARY", 0)
    try:
        fd = os.open(path, flags)
    except OSError as exc:
        raise ModelFileError(f"{path}: cannot be opened ({describe(exc)})") from None
    with os.fdopen(fd, "rb") as fh:
        mode = os.fstat(fh.fileno()).st_mode
        if not stat.S_ISREG(mode):
            raise ModelFileError(f"{path}: is {_kind(mode)}, not a model file")
        try:
            zf = zipfile.ZipFile(fh)
        except Exception as exc:  # noqa: BLE001 - any failure of a foreign file is its damage
            raise unusable(path, f"damaged or not an .npz file ({describe(exc)})") from None
        with zf:
            yield zf


def _header(path, name: str, fp) -> tuple:
    version = npy_format.read_magic(fp)
    if version == (1, 0):
        shape, fortran, dtype = npy_format.read_array_header_1_0(fp, max_header_size=_MAX_HEADER)
    elif version == (2, 0):
        shape, fortran, dtype = npy_format.read_array_header_2_0(fp, max_header_size=_MAX_HEADER)
    else:
        raise unusable(path, f"entry {name!r} is in .npy format version "
                             f"{version[0]}.{version[1]}; Modescope reads versions 1.0 and 2.0")
    return shape, fortran, dtype, fp.tell()


def read_headers(path, zf: zipfile.ZipFile, names) -> dict:
    """Return the :class:`Entry` of every member ``NAME.npy`` present, reading headers only.

    Parameters
    ----------
    path : path
        The file (for messages).
    zf : zipfile.ZipFile
    names : iterable of str
        Entry names wanted; members not named are never read.

    Returns
    -------
    dict of str to Entry

    Raises
    ------
    ModelFileError
        If a header is damaged, declares Python objects, or declares more or fewer bytes than
        the member holds.
    """
    present = set(zf.namelist())
    entries = {}
    for name in names:
        member = f"{name}.npy"
        if member not in present:
            continue
        info = zf.getinfo(member)
        try:
            with zf.open(info) as fp:
                shape, fortran, dtype, offset = _header(path, name, fp)
        except ModelFileError:
            raise
        except zipfile.BadZipFile as exc:  # a small member is checked whole (CRC) at once
            raise unusable(path, f"entry {name!r} is damaged ({describe(exc)})") from None
        except Exception as exc:  # noqa: BLE001 - a damaged header, whatever numpy says
            raise unusable(path, f"entry {name!r} has a damaged array header "
                                 f"({describe(exc)})") from None
        if dtype.hasobject:
            raise unusable(path, f"entry {name!r} {_PICKLE_WORDS}")
        nbytes = math.prod(int(v) for v in shape) * dtype.itemsize
        if offset + nbytes != info.file_size:
            raise unusable(path, f"entry {name!r} declares shape {tuple(shape)} of {dtype} "
                                 f"({_size(nbytes)}) but holds {_size(info.file_size - offset)}")
        entries[name] = Entry(name, info, tuple(int(v) for v in shape), bool(fortran), dtype,
                              nbytes)
    return entries


def _size(n: int) -> str:
    """Return a byte count in words (B, KB, MB, GB, TB; powers of 1024)."""
    for unit in ("bytes", "KB", "MB", "GB"):
        if abs(n) < 1024:
            return f"{n} {unit}" if unit == "bytes" else f"{n:.1f} {unit}"
        n /= 1024
    return f"{n:.1f} TB"


def available_memory() -> int | None:
    """Return the memory available to a new allocation in bytes, or None when unknown.

    Linux: ``MemAvailable`` of ``/proc/meminfo``; other systems with ``sysconf``: the free
    physical pages; otherwise None (no memory limit is applied).
    """
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (AttributeError, ValueError, OSError):
        return None


def check_totals(path, entries: dict, file_size: int, memory: int | None = None) -> None:
    """Refuse members that together inflate far beyond the file or beyond the free memory.

    Parameters
    ----------
    path : path
        The file (for messages).
    entries : dict of str to Entry
    file_size : int
        Size of the file in bytes.
    memory : int, optional
        Memory available in bytes (default: :func:`available_memory`).

    Raises
    ------
    ModelFileError
        If the members' sizes add up to more than ``INFLATION_LIMIT`` times the file's size
        (and more than ``INFLATION_FLOOR``), or to more than the memory available.
    """
    total = sum(e.info.file_size for e in entries.values())
    if total > max(INFLATION_FLOOR, INFLATION_LIMIT * file_size):
        raise unusable(path, f"its entries would inflate to {_size(total)} from a file of "
                             f"{_size(file_size)} (more than {INFLATION_LIMIT} times: a damaged "
                             f"or hostile file)")
    memory = available_memory() if memory is None else memory
    if memory is not None and total > memory:
        raise unusable(path, f"reading it needs {_size(total)} of memory, but only "
                             f"{_size(memory)} is available")


def read_arrays(path, zf: zipfile.ZipFile, entries: dict) -> dict:
    """Read the data of every entry (after :func:`read_headers` and :func:`check_totals`).

    Returns
    -------
    dict of str to ndarray

    Raises
    ------
    ModelFileError
        If a member's data is damaged (CRC, truncated, undecodable).
    """
    arrays = {}
    for name, entry in entries.items():
        try:
            with zf.open(entry.info) as fp:
                arrays[name] = npy_format.read_array(fp, allow_pickle=False,
                                                     max_header_size=_MAX_HEADER)
        except MemoryError:
            raise unusable(path, f"not enough memory to read entry {name!r} "
                                 f"({_size(entry.nbytes)})") from None
        except Exception as exc:  # noqa: BLE001 - damaged data, whatever the layer says
            raise unusable(path, f"entry {name!r} is damaged ({describe(exc)})") from None
        if arrays[name].shape != entry.shape:  # pragma: no cover - numpy reads what it declared
            raise unusable(path, f"entry {name!r} could not be read whole")
    return arrays
