"""Numbers of an export: quantisation, reconstruction quality and compression counts.

``quantize`` clips to [0, 1] and rounds to the nearest 8- or 16-bit level (ties to even);
``psnr`` and ``relative_error`` compare a source image with its reconstruction; and
``compression_numbers`` / ``source_file_bytes`` give the two compression ratios of the export
report (numbers stored by a rank-k model against the data matrix, model file bytes against
source file bytes).
"""

from __future__ import annotations

import math
import os
from typing import Iterable

import numpy as np

from modescope.core.validation import check_int

__all__ = ["quantize", "psnr", "relative_error", "compression_numbers", "source_file_bytes"]


def quantize(values, bits: int = 8) -> np.ndarray:
    """Clip values to [0, 1] and quantise them to 8 or 16 bits.

    Parameters
    ----------
    values : array_like, any shape
        Finite intensities, nominally in [0, 1].
    bits : {8, 16}

    Returns
    -------
    ndarray, same shape, uint8 (``rint(x * 255)``) or uint16 (``rint(x * 65535)``)

    Raises
    ------
    ValueError
        If ``bits`` is not 8 or 16 or ``values`` holds NaN.
    """
    if bits not in (8, 16):
        raise ValueError(f"bits must be 8 or 16, got {bits!r}")
    arr = np.asarray(values)
    # float64 work array (one copy; float32 input is widened exactly), then in place: the
    # rank slider calls this on every step
    work = np.array(arr, dtype=np.float64, copy=True)
    if np.isnan(work).any():
        raise ValueError("values must not hold NaN")
    top = 255.0 if bits == 8 else 65535.0
    np.clip(work, 0.0, 1.0, out=work)
    np.multiply(work, top, out=work)
    np.rint(work, out=work)
    return work.astype(np.uint8 if bits == 8 else np.uint16)


def _same_shape(reference, estimate) -> tuple[np.ndarray, np.ndarray]:
    ref = np.asarray(reference, dtype=np.float64)
    est = np.asarray(estimate, dtype=np.float64)
    if ref.shape != est.shape:
        raise ValueError(f"reference and estimate must have the same shape, got {ref.shape} "
                         f"and {est.shape}")
    return ref, est


def psnr(reference, estimate) -> float:
    """Return the peak signal-to-noise ratio in dB with peak 1.0: ``10 log10(1 / MSE)``.

    Parameters
    ----------
    reference, estimate : array_like, same shape
        Intensities in [0, 1]. The MSE is the mean over every value, computed in float64.

    Returns
    -------
    float
        ``inf`` when the MSE is 0.

    Raises
    ------
    ValueError
        If the shapes differ or the arrays are empty.
    """
    ref, est = _same_shape(reference, estimate)
    if ref.size == 0:
        raise ValueError("reference and estimate must not be empty")
    mse = float(np.mean((ref - est) ** 2))
    return math.inf if mse == 0.0 else 10.0 * math.log10(1.0 / mse)


def relative_error(reference, estimate) -> float:
    """Return ``||reference - estimate|| / ||reference||`` (Frobenius norms, float64).

    Parameters
    ----------
    reference, estimate : array_like, same shape

    Returns
    -------
    float
        0.0 when both norms are 0 and ``inf`` when only the reference is all zero.

    Raises
    ------
    ValueError
        If the shapes differ.
    """
    ref, est = _same_shape(reference, estimate)
    num = float(np.linalg.norm((ref - est).ravel()))
    den = float(np.linalg.norm(ref.ravel()))
    if den == 0.0:
        return 0.0 if num == 0.0 else math.inf
    return num / den


def compression_numbers(n_values: int, n_images: int, rank: int) -> tuple[int, int]:
    """Return (numbers stored by a rank-k model, numbers in the data matrix).

    Parameters
    ----------
    n_values : int
        ``n``, values per image (pixels x channels), at least 1.
    n_images : int
        ``m``, number of images, at least 1.
    rank : int
        ``k``, at least 0.

    Returns
    -------
    stored, full : int
        ``k (n + m + 1) + n`` and ``n m``.

    Raises
    ------
    TypeError, ValueError
        If an argument is not an integer or is below its minimum.
    """
    n = check_int("n_values", n_values, minimum=1)
    m = check_int("n_images", n_images, minimum=1)
    k = check_int("rank", rank, minimum=0)
    return k * (n + m + 1) + n, n * m


def source_file_bytes(paths: Iterable[str]) -> tuple[int, tuple[str, ...], int]:
    """Return the total size of the distinct source files, the missing ones, and the count.

    Parameters
    ----------
    paths : iterable of str
        Source files (a multi-page file appears once per page; it is counted once).

    Returns
    -------
    total : int
        Sum of :func:`os.path.getsize` over the distinct files that exist.
    missing : tuple of str
        Files that could not be measured.
    distinct : int
        Number of distinct files.
    """
    seen: dict[str, None] = {}
    for p in paths:
        seen.setdefault(os.path.normcase(os.path.abspath(str(p))), None)
    total, missing = 0, []
    for p in seen:
        try:
            total += os.path.getsize(p)
        except OSError:
            missing.append(p)
    return total, tuple(missing), len(seen)
