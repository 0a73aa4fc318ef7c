"""Where an image differs from a model: its per-pixel residual map, the T^2 contribution of each
mode, and per-pixel standard deviation maps of the collection and of what rank k leaves
unexplained.

Definitions (model of n images, K modes, basis ``U``, singular values ``s``, mean ``m``)
-------------------------------------------------------------------------------------------
* **Residual map** of an image ``x`` at rank k: ``x - m - U_k U_k^T (x - m)``, in the image's
  own layout ``(rows, cols, channels)``. Its squared sum is the image's Q at rank k.
* **T^2 contribution** of mode j: ``w_j**2 / lambda_j`` with ``lambda_j = s_j**2 / (n - 1)``;
  the contributions of modes 1..k add up to T^2 at rank k (modes without variance count 0,
  as in :mod:`.outliers`).
* **Standard deviation maps**: the collection's per-pixel standard deviation
  ``sqrt(sum_i (x_i - m)**2 / (n - 1))`` and that of the residuals at rank k. With the per-pixel
  energy ``e = diag(C C^T)`` of the centred data ``C``, the residual energy per pixel at rank k
  is ``e - sum_{j<=k} s_j**2 U_j**2`` (from ``C C^T = U S^2 U^T``: exact when the basis images
  are the singular vectors, i.e. within the certified tolerance of a finished analysis).

What the model holds, and the limits of a map made from it alone
----------------------------------------------------------------
The model file does not store ``e``. :func:`pixel_spread` therefore works two ways:

* with ``energy`` from :func:`pixel_energy` (in-memory columns) or :func:`pixel_energy_pass`
  (one pass over the model's source files, at decoding speed): exact;
* from the model alone: the part of ``e`` in the K modes is exact, and the energy beyond the K
  modes (``total_energy - sum s**2``, known exactly as a total) is spread **evenly over the
  pixels**. That is an assumption: where the noise is not uniform (a bright region with more
  shot noise, a border) the maps are smoothed towards the average there; the result says so
  (``exact=False`` and ``note``). When the K modes hold all the energy, nothing is assumed.
"""

from __future__ import annotations

import dataclasses
import os
from dataclasses import dataclass
from typing import Callable

import numpy as np

from modescope.core.decomposition import Decomposition
from modescope.core.engine.options import Clock
from modescope.core.errors import NoUsableImagesError, SourceError
from modescope.core.review.check import model_reading
from modescope.core.review.qlimit import ZERO_MODE_SHARE, check_decomposition
from modescope.core.sources.decode import iter_blocks, load_image
from modescope.core.sources.scan import Problem, scan_sources
from modescope.core.validation import check_bool, check_callable, check_int

__all__ = ["PixelSpread", "residual_map", "t2_contributions", "pixel_energy",
           "pixel_energy_pass", "pixel_spread", "read_like_model"]


def _rank(d: Decomposition, rank) -> int:
    return d.rank if rank is None else check_int("rank", rank, minimum=0, maximum=d.rank)


def _as_vector(d: Decomposition, image) -> np.ndarray:
    if isinstance(image, (str, bytes)) or image is None:
        raise TypeError(f"image must be an array of numbers, got {type(image).__name__}")
    try:
        arr = np.asarray(image, dtype=np.float32)
    except (TypeError, ValueError) as exc:
        raise TypeError(f"image must be an array of numbers, got {type(image).__name__}") from exc
    if arr.shape not in (tuple(d.image_shape), (d.n_pixels,)):
        raise ValueError(f"image must have the model's shape {tuple(d.image_shape)} or "
                         f"({d.n_pixels},), got {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError("image must hold finite numbers, found NaN or infinity")
    return arr.reshape(-1)


def residual_map(decomposition: Decomposition, image, rank: int | None = None) -> np.ndarray:
    """Return what the model at rank k cannot explain of an image, pixel by pixel.

    Parameters
    ----------
    decomposition : Decomposition
    image : array_like, shape (rows, cols, channels) or (pixels,)
        The image at the model's resolution, on the model's scale (0..1), for instance from
        :func:`read_like_model` or :func:`modescope.core.engine.pipeline.load_analysis_image`.
    rank : int, optional
        Retained modes k, 0..K (default K).

    Returns
    -------
    ndarray, shape (rows, cols, channels), float32
        ``x - mean - U_k U_k^T (x - mean)``, signed; its squared sum is Q at rank k.

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition or ``image`` is not numeric.
    ValueError
        If ``image`` has another shape or non-finite values, or ``rank`` is out of range.

    Examples
    --------
    >>> import numpy as np
    >>> d = Decomposition(mean=np.zeros(2, np.float32), basis=np.eye(2, 1, dtype=np.float32),
    ...                   singular_values=np.array([1.0]), weights=np.zeros((1, 3)),
    ...                   total_energy=1.0, image_shape=(1, 2, 1))
    >>> residual_map(d, np.array([3.0, 4.0]))[..., 0].tolist()
    [[0.0, 4.0]]
    """
    if not isinstance(decomposition, Decomposition):
        raise TypeError("decomposition must be a Decomposition, got "
                        f"{type(decomposition).__name__}")
    d = decomposition
    k = _rank(d, rank)
    centred = _as_vector(d, image) - d.mean
    basis = d.basis[:, :k]
    centred -= basis @ (basis.T @ centred)
    return centred.reshape(d.image_shape)


def t2_contributions(decomposition: Decomposition, weights, rank: int | None = None
                     ) -> np.ndarray:
    """Return each retained mode's part of Hotelling's T^2: ``w_j**2 / lambda_j``.

    Parameters
    ----------
    decomposition : Decomposition
        At least 2 images.
    weights : array_like, shape (K,) or (K, m)
        Coordinates of one or m images along all K basis images (a column of
        ``decomposition.weights`` or of ``CheckResult.weights``).
    rank : int, optional
        Retained modes k, 0..K (default K).

    Returns
    -------
    ndarray, shape (k,) or (k, m), float64
        Summed over the modes it is T^2 at rank k; 0 for modes without variance.

    Raises
    ------
    TypeError, ValueError
        On a wrong type, shape, non-finite value or rank.
    """
    d = check_decomposition(decomposition)
    k = _rank(d, rank)
    try:
        w = np.asarray(weights, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise TypeError(f"weights must be an array of numbers, got "
                        f"{type(weights).__name__}") from exc
    if w.ndim not in (1, 2) or w.shape[0] != d.rank:
        raise ValueError(f"weights must have {d.rank} rows (one per basis image of the model), "
                         f"got shape {w.shape}")
    if not np.all(np.isfinite(w)):
        raise ValueError("weights must hold finite numbers, found NaN or infinity")
    s2 = np.asarray(d.singular_values[:k], dtype=np.float64) ** 2
    usable = s2 > ZERO_MODE_SHARE * float(d.total_energy)
    lam = np.where(usable, s2 / (d.n_images - 1), 1.0)
    scale = np.where(usable, 1.0 / lam, 0.0)
    return w[:k] ** 2 * (scale if w.ndim == 1 else scale[:, None])


# ----- per-pixel energy --------------------------------------------------------------------

def pixel_energy(decomposition: Decomposition, data) -> np.ndarray:
    """Return the per-pixel energy ``sum_i (x_i - mean)**2`` of image columns held in memory.

    Parameters
    ----------
    decomposition : Decomposition
    data : array_like, shape (pixels, n)
        The model's images as columns (or any images, centred on the model's mean).

    Returns
    -------
    ndarray, shape (pixels,), float64
    """
    if not isinstance(decomposition, Decomposition):
        raise TypeError("decomposition must be a Decomposition, got "
                        f"{type(decomposition).__name__}")
    arr = np.asarray(data, dtype=np.float32)
    if arr.ndim != 2 or arr.shape[0] != decomposition.n_pixels:
        raise ValueError(f"data must have shape ({decomposition.n_pixels}, n), got {arr.shape}")
    centred = arr.T.astype(np.float64) - decomposition.mean.astype(np.float64)
    return np.einsum("ij,ij->j", centred, centred)


def _model_source_set(d: Decomposition):
    """The model's own images as a SourceSet read with its options; the others as problems."""
    if not d.paths:
        raise SourceError("this analysis does not record its source files")
    reading = model_reading(d)
    files = list(dict.fromkeys(d.paths))
    found = scan_sources(files, color=reading["color"], resize_mismatched=True)
    by_key = {(os.path.normcase(r.path), r.page): r for r in found.images}
    refs, problems = [], list(found.problems)
    for path, page in zip(d.paths, d.pages.tolist()):
        ref = by_key.get((os.path.normcase(os.path.abspath(path)), int(page)))
        if ref is None:
            continue
        if tuple(ref.size) != reading["source_size"] and not reading["resize_mismatched"]:
            problems.append(Problem(path, f"size is now {ref.size[0]}x{ref.size[1]}, the model "
                                          f"used {reading['source_size'][0]}x"
                                          f"{reading['source_size'][1]}; left out", page or None))
            continue
        refs.append(ref)
    if not refs:
        raise NoUsableImagesError("none of the model's source images can be read again")
    return dataclasses.replace(found, images=tuple(refs), reference_size=reading["source_size"],
                               resize_mismatched=reading["resize_mismatched"],
                               problems=tuple(problems)), reading["downscale"]


def pixel_energy_pass(decomposition: Decomposition, *, workers: int = 2, block_size: int = 64,
                      progress: Callable | None = None,
                      cancel: Callable[[], bool] | None = None
                      ) -> tuple[np.ndarray | None, int, tuple]:
    """Read the model's source files once and return their per-pixel energy.

    Parameters
    ----------
    decomposition : Decomposition
        With ``paths`` and the reading options in its metadata.
    workers, block_size : int
        Decoding threads and images per block (at least 1).
    progress : callable(Progress), optional
        Called after each block with stage ``"maps"``.
    cancel : callable() -> bool, optional
        Checked between blocks; when it returns True the pass stops and None is returned.

    Returns
    -------
    energy : ndarray, shape (pixels,), float64, or None
        ``sum_i (x_i - mean)**2`` over the images read; None when cancelled.
    n_read : int
        Images read (fewer than the model's when some files are gone or changed).
    problems : tuple of Problem
        The model's images that could not be read again.

    Raises
    ------
    SourceError
        If the model records no source files, or none can be read again.
    """
    d = check_decomposition(decomposition)
    workers = check_int("workers", workers, minimum=1)
    block_size = check_int("block_size", block_size, minimum=1)
    check_callable("progress", progress)
    check_callable("cancel", cancel)
    source_set, downscale = _model_source_set(d)
    clock = Clock("maps", source_set.n_images, progress)
    energy = np.zeros(d.n_pixels)
    problems, done, n_read = list(source_set.problems), 0, 0
    mean = d.mean.astype(np.float32)
    for block in iter_blocks(source_set, block_size=block_size, downscale=downscale,
                             workers=workers):
        problems.extend(block.problems)
        rows = np.ascontiguousarray(block.data.T) - mean
        energy += np.einsum("ij,ij->j", rows, rows, dtype=np.float64)
        n_read += block.indices.size
        done += block.indices.size + len(block.problems)
        clock.report(done)
        if cancel is not None and cancel():
            return None, n_read, tuple(problems)
    return energy, n_read, tuple(problems)


@dataclass(frozen=True, eq=False)
class PixelSpread:
    """Per-pixel standard deviation maps of a collection and of its residuals at rank k.

    Attributes
    ----------
    collection : ndarray, shape (rows, cols, channels), float32
        ``sqrt(sum_i (x_i - mean)**2 / (n - 1))``.
    unexplained : ndarray, shape (rows, cols, channels), float32
        The same for the residuals at rank k.
    rank : int
    exact : bool
        True when computed from the per-pixel energy of the images (or when the model's modes
        hold all the energy); False when the energy beyond the model's modes was spread
        evenly over the pixels (see the module docstring).
    note : str
        How the maps were made, in words.
    """

    collection: np.ndarray
    unexplained: np.ndarray
    rank: int
    exact: bool
    note: str


def pixel_spread(decomposition: Decomposition, rank: int | None = None,
                 energy=None) -> PixelSpread:
    """Return the per-pixel standard deviation maps of the collection and at rank k.

    Parameters
    ----------
    decomposition : Decomposition
        At least 2 images.
    rank : int, optional
        Retained modes k, 0..K (default K).
    energy : array_like, shape (pixels,), optional
        ``sum_i (x_i - mean)**2`` per pixel (:func:`pixel_energy`, :func:`pixel_energy_pass`).
        Without it, the energy beyond the model's K modes is spread evenly over the pixels.

    Returns
    -------
    PixelSpread

    Raises
    ------
    TypeError, ValueError
        On a wrong type, shape or rank, or negative/non-finite energy.
    """
    d = check_decomposition(decomposition)
    k = _rank(d, rank)
    s2 = np.asarray(d.singular_values, dtype=np.float64) ** 2
    u2 = np.square(d.basis, dtype=np.float64)
    in_k = u2[:, :k] @ s2[:k]
    beyond_k_held = u2[:, k:] @ s2[k:]
    denom = d.n_images - 1
    if energy is not None:
        e = np.asarray(energy, dtype=np.float64)
        if e.shape != (d.n_pixels,) or not np.all(np.isfinite(e)) or np.any(e < 0):
            raise ValueError(f"energy must hold {d.n_pixels} finite non-negative values, got "
                             f"shape {e.shape}")
        collection, rest = e, np.maximum(e - in_k, 0.0)
        exact, note = True, ("from the per-pixel energy of the images; the residual energy is "
                             "that energy less the modes' part (exact for exact basis images)")
    else:
        tail = max(float(d.total_energy) - float(np.sum(s2)), 0.0)
        even = tail / d.n_pixels
        exact = tail <= 1e-6 * max(float(d.total_energy), 1e-300)
        collection = in_k + beyond_k_held + even
        rest = beyond_k_held + even
        note = ("from the model: its modes hold all the energy" if exact else
                f"from the model: the {100 * tail / d.total_energy:.3g} % of the energy beyond "
                f"its {d.rank} modes is spread evenly over the pixels (an assumption; a pass "
                "over the images makes the maps exact)")
    shape = d.image_shape
    return PixelSpread(collection=np.sqrt(collection / denom).astype(np.float32).reshape(shape),
                       unexplained=np.sqrt(rest / denom).astype(np.float32).reshape(shape),
                       rank=k, exact=bool(exact), note=note)


# ----- one file read as the model reads its images ----------------------------------------

def read_like_model(decomposition: Decomposition, path, page: int = 0, *,
                    resize_mismatched: bool | None = None) -> np.ndarray:
    """Read one image file with the model's colour, downscale and source size.

    Parameters
    ----------
    decomposition : Decomposition
    path : str or os.PathLike
    page : int
        Page of a multi-page file (0 otherwise).
    resize_mismatched : bool, optional
        Resize an image of another size to the model's source size (default: as the model).

    Returns
    -------
    ndarray, shape (rows, cols, channels), float32 in [0, 1]

    Raises
    ------
    SourceError
        If the file is missing or unreadable, the page is not in it, or its size differs
        from the model's and resizing is off.
    """
    if not isinstance(decomposition, Decomposition):
        raise TypeError("decomposition must be a Decomposition, got "
                        f"{type(decomposition).__name__}")
    page = check_int("page", page, minimum=0)
    reading = model_reading(decomposition)
    resize = (reading["resize_mismatched"] if resize_mismatched is None
              else check_bool("resize_mismatched", resize_mismatched))
    name = os.fspath(path)
    if not os.path.exists(name):
        raise SourceError(f"{name}: the file is missing")
    found = scan_sources([name], color=reading["color"], resize_mismatched=True)
    refs = [r for r in found.images if r.page == page]
    if not refs:
        raise SourceError(f"{name}: page {page} is not in the file")
    reference = reading["source_size"]
    if tuple(refs[0].size) != reference and not resize:
        raise SourceError(f"{name}: size {refs[0].size[0]}x{refs[0].size[1]} differs from the "
                          f"model's {reference[0]}x{reference[1]}")
    ss = dataclasses.replace(found, images=(refs[0],), reference_size=reference,
                             resize_mismatched=resize)
    return load_image(refs[0], ss, reading["downscale"])
