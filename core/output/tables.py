"""CSV tables of an export: the spectrum, the weights and the reconstruction quality.

Every table has a header row and is written with the :mod:`csv` module (comma separated,
UTF-8, ``\\r\\n`` line ends); floats are written in Python's shortest round-trip form and
infinities as ``inf`` / ``-inf``.
"""

from __future__ import annotations

import csv
import io
import math
from typing import Callable, Iterable, Sequence

import numpy as np

from modescope.core.decomposition import Decomposition
from modescope.core.errors import ModescopeError
from modescope.core.output.images import preview_image
from modescope.core.output.metrics import psnr, relative_error

__all__ = ["csv_bytes", "format_float", "spectrum_bytes", "weights_bytes", "quality_bytes"]

_SPECTRUM_HEADER = ("index", "singular_value", "energy_share", "cumulative_share")
_QUALITY_HEADER = ("path", "page", "relative_error", "psnr_db", "note")


def csv_bytes(header: Sequence[str], rows: Iterable[Sequence]) -> bytes:
    """Return a CSV table (header row first) as UTF-8 bytes with ``\\r\\n`` line ends.

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
        writer.writerow(row)
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
