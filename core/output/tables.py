"""CSV tables of an export: the spectrum, the weights and the reconstruction quality.

Every table has a header row and is written with the :mod:`csv` module (comma separated,
UTF-8, ``\\r\\n`` line ends); floats are written in Python's shortest round-trip form and
infinities as ``inf`` / ``-inf``.

File names that are not valid UTF-8
-----------------------------------
On Linux and macOS a file name is a string of bytes; Python reads the bytes that are not valid
UTF-8 as lone surrogate characters (U+DC80-U+DCFF, PEP 383), which no UTF-8 file can hold. Every
text cell goes through :func:`escape_undecodable`: each such byte is written as ``\\xNN``
(backslash, "x", two lower-case hex digits of the byte), any other lone surrogate (a Windows
name holding half a UTF-16 pair) as ``\\uNNNN``; every other character is written as it is.
So the CSV stays valid UTF-8, and a name that is valid UTF-8 is written unchanged.
"""

from __future__ import annotations

import csv
import io
import math
import re
from typing import Callable, Iterable, Sequence

import numpy as np

from modescope.core.decomposition import Decomposition
from modescope.core.errors import ModescopeError
from modescope.core.output.images import preview_image
from modescope.core.output.metrics import psnr, relative_error

__all__ = ["csv_bytes", "escape_undecodable", "format_float", "spectrum_bytes", "weights_bytes",
           "quality_bytes"]

_SPECTRUM_HEADER = ("index", "singular_value", "energy_share", "cumulative_share")
_QUALITY_HEADER = ("path", "page", "relative_error", "psnr_db", "note")
_SURROGATE = re.compile("[\ud800-\udfff]")


def _escape_one(match: re.Match) -> str:
    code = ord(match.group())
    if 0xDC80 <= code <= 0xDCFF:                 # an undecodable byte (surrogateescape)
        return f"\\x{code - 0xDC00:02x}"
    return f"\\u{code:04x}"


def escape_undecodable(text: str) -> str:
    """Return ``text`` with the characters no UTF-8 file can hold written as escapes.

    A byte of a file name that is not valid UTF-8 reaches Python as a lone surrogate
    U+DC80-U+DCFF (``surrogateescape``, PEP 383); it is written as ``\\xNN`` with the byte's
    two lower-case hex digits. Any other lone surrogate is written as ``\\uNNNN``. Every other
    character is kept, so text that is valid Unicode comes back unchanged.

    Parameters
    ----------
    text : str
        A file name or any other text for a UTF-8 table.

    Returns
    -------
    str
        Text that encodes to UTF-8 without error.

    Raises
    ------
    TypeError
        If ``text`` is not a str.

    Examples
    --------
    >>> escape_undecodable("frame_\\udce9t\u00e9.png")
    'frame_\\\\xe9t\u00e9.png'
    """
    if not isinstance(text, str):
        raise TypeError(f"text must be a str, got {type(text).__name__}")
    return _SURROGATE.sub(_escape_one, text)


def _cell(value):
    return escape_undecodable(value) if isinstance(value, str) else value


def csv_bytes(header: Sequence[str], rows: Iterable[Sequence]) -> bytes:
    """Return a CSV table (header row first) as UTF-8 bytes with ``\\r\\n`` line ends.

    Text cells go through :func:`escape_undecodable` (file names that are not valid UTF-8).

    Parameters
    ----------
    header : sequence of str
    rows : iterable of sequences

    Returns
    -------
    bytes
    """
    buf = io.StringIO(newline="")
    writer = csv.writer(buf)
    writer.writerow(header)
    for row in rows:
        writer.writerow([_cell(value) for value in row])
    return buf.getvalue().encode("utf-8")


def format_float(value: float) -> str:
    """Return ``value`` in Python's shortest round-trip form (``inf`` / ``-inf`` for infinities)."""
    value = float(value)
    if math.isinf(value):
        return "inf" if value > 0 else "-inf"
    return repr(value)


def _path_of(d: Decomposition, i: int) -> str:
    return str(d.paths[i]) if d.paths else ""


def spectrum_bytes(decomposition: Decomposition) -> bytes:
    """Return ``spectrum.csv``: ``index, singular_value, energy_share, cumulative_share``.

    Parameters
    ----------
    decomposition : Decomposition
        One row per stored mode, index from 1.

    Returns
    -------
    bytes
    """
    d = decomposition
    shares, cum = d.energy_shares(), d.cumulative_energy()
    rows = ((j + 1, format_float(d.singular_values[j]), format_float(shares[j]),
             format_float(cum[j])) for j in range(d.rank))
    return csv_bytes(_SPECTRUM_HEADER, rows)


def weights_bytes(decomposition: Decomposition, rank: int, indices: Iterable[int]) -> bytes:
    """Return ``weights_r<k>.csv``: ``path, page, w1..wk`` for each chosen image.

    Parameters
    ----------
    decomposition : Decomposition
    rank : int
        k, the number of weight columns.
    indices : iterable of int
        Image columns, in the order of the rows.

    Returns
    -------
    bytes
    """
    d = decomposition
    header = ["path", "page"] + [f"w{j + 1}" for j in range(rank)]
    rows = ([_path_of(d, i), int(d.pages[i])] + [format_float(v) for v in d.weights[:rank, i]]
            for i in indices)
    return csv_bytes(header, rows)


def _quality_row(d: Decomposition, rank: int, i: int, loader: Callable) -> tuple[list, bool]:
    """Return one row of the quality table and whether its source could not be read."""
    path, page = _path_of(d, i), int(d.pages[i])
    try:
        src = np.asarray(loader(d, i))
    except (ModescopeError, OSError) as exc:
        return [path, page, "", "", f"source not read: {exc}"], True
    if src.shape != tuple(d.image_shape):
        return [path, page, "", "",
                f"source has shape {src.shape}, the model {tuple(d.image_shape)}"], False
    est = preview_image(d, i, rank)
    return [path, page, format_float(relative_error(src, est)),
            format_float(psnr(src, est)), ""], False


def quality_bytes(decomposition: Decomposition, rank: int, indices: Iterable[int],
                  loader: Callable, cancel: Callable[[], bool] | None = None
                  ) -> tuple[bytes | None, list[str]]:
    """Return ``quality_r<k>.csv``: ``path, page, relative_error, psnr_db, note`` per image.

    Each chosen image's clipped rank-k preview (floating point, analysis resolution) is
    compared with its source as returned by ``loader``; ``relative_error = ||x - x_k|| /
    ||x||`` and ``psnr_db = 10 log10(1 / MSE)`` with peak 1.0. A source that cannot be read
    (:class:`~modescope.core.errors.ModescopeError` or :class:`OSError`) or has another shape
    leaves the numbers empty and says why in ``note``.

    Parameters
    ----------
    decomposition : Decomposition
    rank : int
        k.
    indices : iterable of int
        Image columns, in the order of the rows.
    loader : callable
        ``loader(decomposition, index)`` returning the source image, shape ``image_shape``.
    cancel : callable, optional
        Checked before each image; returning True stops the table.

    Returns
    -------
    data : bytes or None
        The table, or None when cancelled.
    unread : list of str
        Sources that could not be read.
    """
    d = decomposition
    rows, unread = [], []
    for i in indices:
        if cancel is not None and cancel():
            return None, unread
        row, failed = _quality_row(d, rank, int(i), loader)
        rows.append(row)
        if failed:
            unread.append(row[0])
    return csv_bytes(_QUALITY_HEADER, rows), unread
