"""Near-duplicate images: groups in which every pair is within the tolerance in pixel space.

Distance and bounds
-------------------
The distance of two images ``i`` and ``j`` splits into the part inside the span of the K basis
images and the part outside it (the mean cancels in the difference)::

    ||x_i - x_j||**2 = ||w_i - w_j||**2 + ||e_i - e_j||**2

where ``w`` are the weights over all K modes and ``e`` the residual vectors. The decomposition
keeps only the residual *norms* ``a = ||e_i||`` and ``b = ||e_j||``; the triangle inequality
``|a - b| <= ||e_i - e_j|| <= a + b`` bounds the true distance on both sides::

    lower(i, j) = sqrt(||w_i - w_j||**2 + (a - b)**2)  <=  ||x_i - x_j||
    upper(i, j) = sqrt(||w_i - w_j||**2 + (a + b)**2)  >=  ||x_i - x_j||

A pair is *confirmed* when its upper bound is within the distance limit, so a confirmed pair is
truly within the tolerance. A pair whose lower bound is above the limit is surely not. A pair
whose bounds straddle the limit is measured on its pixels when a ``read_image`` callable is
given (the images as the analysis decoded them) and **left out** otherwise; the report counts
such pairs (``n_unsure``). With a truncated model the residual norms are rarely small, so
without the pixels only pairs of images lying (nearly) inside the span of the basis can be
confirmed; exact copies with a residual are found only when their pixels are read.

The tolerance is a fraction of the root-mean-square centred image norm ``sqrt(total_energy /
n)``: the distance limit is ``(tolerance + 1e-6) * sqrt(total_energy / n)``, the ``1e-6``
absorbing the rounding of float32 images. Tolerance 0 therefore finds exact copies only.

Default tolerance
-----------------
``DEFAULT_TOLERANCE = 0.01`` (1 %). Measured with numpy on the pixels: the closest two
ordinary frames of the bundled sample set (240 frames of a germination tray, neighbouring
hours) are 3.5 % of the RMS image norm apart (median nearest neighbour 7.4 %), and the closest
two of scikit-learn's digits (1,797 images) are 15 % apart. At 1 % no ordinary neighbouring
frame is grouped, while a re-saved or lightly re-encoded copy (well under 1 %) still is.

Search and groups
-----------------
Candidate pairs come from :meth:`scipy.spatial.cKDTree.query_pairs` on the vectors
``(w_i[:r], sqrt(residual_at_rank(r)[i]))`` built from the first r modes; their distance is at
most the lower bound, so no pair within the tolerance is missed and r only trades search speed
against the number of candidates. Groups are cliques of the confirmed pairs, built greedily
without chaining: the closest confirmed pair of two images not yet in a group starts a group,
and an image joins only when it is confirmed within the tolerance of *every* member (the one
closest to all members first). Every pair in a group is therefore within the tolerance.
"""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
from scipy.spatial import cKDTree

from modescope.core.decomposition import Decomposition
from modescope.core.errors import ModescopeError
from modescope.core.output.atomic import atomic_writer
from modescope.core.output.tables import escape_undecodable
from modescope.core.validation import check_callable, check_float, check_int

__all__ = ["DEFAULT_TOLERANCE", "CSV_COLUMNS", "DuplicateGroup", "DuplicateReport",
           "find_duplicates", "pair_bounds", "pair_distance", "write_groups_csv"]

#: Default tolerance (fraction of the RMS centred image norm); see the module docstring.
DEFAULT_TOLERANCE = 0.01
#: Columns of :func:`write_groups_csv`.
CSV_COLUMNS = ("group", "number", "path", "distance")
#: Largest number of candidate pairs bounded at once (memory bound of the check).
_PAIR_CHUNK = 200_000


@dataclass(frozen=True)
class DuplicateGroup:
    """One group of near-duplicate images; every pair in it is within the tolerance.

    Attributes
    ----------
    indices : tuple of int
        Image columns in the group (0-based), ascending; the first is the group's first image.
    paths : tuple of str
        Source file of each image (empty strings when the decomposition has no paths).
    pages : tuple of int
        Page of each image within its file.
    distances : tuple of float
        Distance of each image to the group's first image (0 for the first): measured on the
        pixels when they were read, else the upper bound (module docstring), so the true
        distance is at most this.
    max_distance : float
        Largest such distance between any two members.
    max_distance_fraction : float
        ``max_distance`` as a fraction of the RMS centred image norm (0 when that norm is 0).
    """

    indices: tuple
    paths: tuple
    pages: tuple
    distances: tuple
    max_distance: float
    max_distance_fraction: float

    @property
    def size(self) -> int:
        """Number of images in the group."""
        return len(self.indices)


@dataclass(frozen=True)
class DuplicateReport:
    """All near-duplicate groups of a decomposition at one tolerance.

    Attributes
    ----------
    groups : tuple of DuplicateGroup
        Largest group first; groups of equal size by their first index.
    tolerance : float
        Tolerance as a fraction of the RMS centred image norm.
    threshold : float
        Absolute distance limit, ``tolerance * rms_norm``.
    rms_norm : float
        ``sqrt(total_energy / n)``.
    rank : int
        Modes used to find candidate pairs (every mode is used to bound them).
    n_candidates : int
        Candidate pairs found by the tree search.
    n_pairs : int
        Pairs confirmed within the limit (by the upper bound or on the pixels).
    n_measured : int
        Pairs whose bounds straddled the limit and were measured on the pixels.
    n_unsure : int
        Pairs whose bounds straddled the limit and were left out (pixels not read or
        unreadable).
    unreadable : tuple of int
        Images whose pixels could not be read.
    """

    groups: tuple
    tolerance: float
    threshold: float
    rms_norm: float
    rank: int
    n_candidates: int
    n_pairs: int
    n_measured: int = 0
    n_unsure: int = 0
    unreadable: tuple = ()

    @property
    def n_duplicates(self) -> int:
        """Number of images that belong to some group."""
        return sum(g.size for g in self.groups)


def _check(decomposition) -> Decomposition:
    if not isinstance(decomposition, Decomposition):
        raise TypeError("decomposition must be a Decomposition, got "
                        f"{type(decomposition).__name__}")
    if decomposition.residual is None:
        raise ValueError("this decomposition has no residuals yet (a streaming snapshot): run "
                         "the scoring pass before looking for near-duplicates")
    return decomposition


def _features(decomposition: Decomposition, rank: int) -> np.ndarray:
    """Rows ``(w_i[:rank], sqrt(residual_at_rank(rank)[i]))``, shape (n, rank + 1)."""
    w = np.asarray(decomposition.weights[:rank], dtype=np.float64).T
    res = np.sqrt(np.maximum(decomposition.residual_at_rank(rank), 0.0))
    return np.ascontiguousarray(np.column_stack([w, res]))


def _parts(decomposition: Decomposition) -> tuple[np.ndarray, np.ndarray]:
    """Weights as rows (n, K) and residual norms (n,), float64."""
    w = np.ascontiguousarray(np.asarray(decomposition.weights, dtype=np.float64).T)
    e = np.sqrt(np.maximum(np.asarray(decomposition.residual, dtype=np.float64), 0.0))
    return w, e


def pair_bounds(decomposition: Decomposition, i: int, j: int) -> tuple[float, float]:
    """Return the lower and upper bound of the pixel distance of two images.

    Parameters
    ----------
    decomposition : Decomposition
        With residuals.
    i, j : int
        Image columns (0-based).

    Returns
    -------
    (float, float)
        ``sqrt(||w_i - w_j||**2 + (a - b)**2)`` and ``sqrt(||w_i - w_j||**2 + (a + b)**2)``
        over all K modes, ``a`` and ``b`` the residual norms (module docstring).

    Raises
    ------
    TypeError, ValueError
        If the decomposition has no residuals or an index is out of range.
    """
    d = _check(decomposition)
    i = check_int("i", i, minimum=0, maximum=d.n_images - 1)
    j = check_int("j", j, minimum=0, maximum=d.n_images - 1)
    w, e = _parts(d)
    dw2 = float(np.sum((w[i] - w[j]) ** 2))
    return float(np.sqrt(dw2 + (e[i] - e[j]) ** 2)), float(np.sqrt(dw2 + (e[i] + e[j]) ** 2))


def pair_distance(decomposition: Decomposition, i: int, j: int) -> float:
    """Return the lower bound of the pixel distance of two images (see :func:`pair_bounds`).

    Parameters
    ----------
    decomposition : Decomposition
        With residuals.
    i, j : int
        Image columns (0-based).

    Returns
    -------
    float
        ``sqrt(||w_i - w_j||**2 + (||e_i|| - ||e_j||)**2)`` over all K modes.

    Raises
    ------
    TypeError, ValueError
        If the decomposition has no residuals or an index is out of range.
    """
    return pair_bounds(decomposition, i, j)[0]


class _Pixels:
    """Images read through ``read_image``, kept once read; unreadable ones remembered."""

    def __init__(self, read_image: Callable, n_pixels: int):
        self.read_image = read_image
        self.n_pixels = n_pixels
        self.cache: dict[int, np.ndarray | None] = {}

    def get(self, i: int) -> np.ndarray | None:
        if i not in self.cache:
            try:
                value = np.asarray(self.read_image(i), dtype=np.float64).ravel()
            except (ModescopeError, OSError):
                value = None
            if value is not None and value.size != self.n_pixels:
                value = None
            self.cache[i] = value
        return self.cache[i]

    def unreadable(self) -> tuple:
        return tuple(sorted(i for i, v in self.cache.items() if v is None))


def _confirm(full_w, norms, pairs, limit, pixels):
    """Bound the candidate pairs; return confirmed (pairs, distances), measured and unsure."""
    kept, dist, measured, unsure = [], [], 0, 0
    for start in range(0, pairs.shape[0], _PAIR_CHUNK):
        chunk = pairs[start:start + _PAIR_CHUNK]
        a, b = norms[chunk[:, 0]], norms[chunk[:, 1]]
        dw2 = np.sum((full_w[chunk[:, 0]] - full_w[chunk[:, 1]]) ** 2, axis=1)
        lower = np.sqrt(dw2 + (a - b) ** 2)
        upper = np.sqrt(dw2 + (a + b) ** 2)
        sure = upper <= limit
        kept.append(chunk[sure])
        dist.append(upper[sure])
        straddle = chunk[(lower <= limit) & ~sure]
        if pixels is None:
            unsure += int(straddle.shape[0])
            continue
        for i, j in straddle.tolist():
            xi, xj = pixels.get(i), pixels.get(j)
            if xi is None or xj is None:
                unsure += 1
                continue
            measured += 1
            true = float(np.sqrt(np.sum((xi - xj) ** 2)))
            if true <= limit:
                kept.append(np.array([[i, j]], dtype=np.intp))
                dist.append(np.array([true]))
    pairs = np.concatenate(kept) if kept else np.zeros((0, 2), dtype=np.intp)
    dist = np.concatenate(dist) if dist else np.zeros(0)
    return pairs.astype(np.intp), dist, measured, unsure


def _cliques(pairs: np.ndarray, dist: np.ndarray) -> list[tuple[list[int], dict]]:
    """Greedy cliques of the confirmed pairs, closest pair first; no image in two groups."""
    near: dict[int, dict[int, float]] = {}
    for (i, j), dij in zip(pairs.tolist(), dist.tolist()):
        near.setdefault(i, {})[j] = dij
        near.setdefault(j, {})[i] = dij
    taken: set[int] = set()
    groups = []
    order = np.lexsort((pairs[:, 1], pairs[:, 0], dist)) if dist.size else []
    for k in order:
        i, j = int(pairs[k, 0]), int(pairs[k, 1])
        if i in taken or j in taken:
            continue
        members = [i, j]
        common = (set(near[i]) & set(near[j])) - taken
        while common:
            best = min(common, key=lambda c: (max(near[c][m] for m in members), c))
            members.append(best)
            common &= set(near[best])
            common.discard(best)
        taken.update(members)
        groups.append((sorted(members), near))
    return groups


def _group(members, near, paths, pages, rms) -> DuplicateGroup:
    first = members[0]
    distances = tuple(0.0 if m == first else float(near[first][m]) for m in members)
    largest = max(float(near[a][b]) for x, a in enumerate(members) for b in members[x + 1:])
    return DuplicateGroup(indices=tuple(members), paths=tuple(paths[i] for i in members),
                          pages=tuple(int(pages[i]) for i in members), distances=distances,
                          max_distance=largest,
                          max_distance_fraction=largest / rms if rms > 0 else 0.0)


def find_duplicates(decomposition: Decomposition, tolerance: float = DEFAULT_TOLERANCE,
                    rank: int | None = None, *,
                    read_image: Callable[[int], np.ndarray] | None = None) -> DuplicateReport:
    """Find groups of near-duplicate images in which every pair is within the tolerance.

    A pair belongs to a group only when its pixel distance is known to be within
    ``tolerance * sqrt(total_energy / n)``: by the upper bound of the module docstring, or
    measured on the pixels when ``read_image`` is given and the bounds straddle the limit.
    Pairs whose bounds straddle the limit are left out when the pixels are not read (counted in
    ``n_unsure``). Groups are cliques built greedily (no chaining).

    Parameters
    ----------
    decomposition : Decomposition
        With residuals (after the scoring pass).
    tolerance : float
        Fraction of the RMS centred image norm, >= 0 (default :data:`DEFAULT_TOLERANCE`).
    rank : int, optional
        Leading modes r used in the tree search for candidate pairs, 0..K (default K). The
        result does not depend on r; a small r is faster for large K but gives more candidates.
    read_image : callable(index) -> ndarray, optional
        Returns image ``index`` (0-based) at analysis resolution, ``n_pixels`` values in any
        shape (e.g. ``lambda i: load_analysis_image(decomposition, i)``). Called only for
        images of pairs whose bounds straddle the limit; an image that raises
        :class:`ModescopeError` or :class:`OSError` is listed in ``unreadable``.

    Returns
    -------
    DuplicateReport
        Groups of two or more images, largest first.

    Raises
    ------
    TypeError
        If an input has the wrong type.
    ValueError
        If the decomposition has no residuals, ``tolerance`` is negative or not finite, or
        ``rank`` is outside 0..K.

    Examples
    --------
    >>> report = find_duplicates(decomposition, tolerance=0.01)      # doctest: +SKIP
    >>> [g.indices for g in report.groups]                           # doctest: +SKIP
    [(3, 17, 42), (8, 9)]
    """
    d = _check(decomposition)
    tolerance = check_float("tolerance", tolerance, low=0.0)
    if tolerance == float("inf"):
        raise ValueError("tolerance must be finite, got inf")
    r = d.rank if rank is None else check_int("rank", rank, minimum=0, maximum=d.rank)
    check_callable("read_image", read_image)
    n = d.n_images
    rms = float(np.sqrt(max(float(d.total_energy), 0.0) / n)) if n else 0.0
    threshold = tolerance * rms
    limit = threshold + 1e-6 * rms     # float32 rounding must not split exact copies
    if n < 2:
        return DuplicateReport(groups=(), tolerance=tolerance, threshold=threshold,
                               rms_norm=rms, rank=r, n_candidates=0, n_pairs=0)
    pairs = cKDTree(_features(d, r)).query_pairs(limit, output_type="ndarray")
    full_w, norms = _parts(d)
    pixels = None if read_image is None else _Pixels(read_image, d.n_pixels)
    good, dist, measured, unsure = _confirm(full_w, norms, pairs, limit, pixels)
    paths = tuple(d.paths) if d.paths else ("",) * n
    pages = np.zeros(n, dtype=int) if d.pages is None else d.pages
    groups = [_group(members, near, paths, pages, rms) for members, near in _cliques(good, dist)]
    groups.sort(key=lambda g: (-g.size, g.indices[0]))
    return DuplicateReport(groups=tuple(groups), tolerance=tolerance, threshold=threshold,
                           rms_norm=rms, rank=r, n_candidates=int(pairs.shape[0]),
                           n_pairs=int(good.shape[0]), n_measured=measured, n_unsure=unsure,
                           unreadable=pixels.unreadable() if pixels else ())


def write_groups_csv(path, report: DuplicateReport, *, overwrite: bool = False,
                     protect=()) -> Path:
    """Write the groups as CSV, one row per image, through the atomic writer.

    Columns ``group, number, path, distance``: the group's number (1-based, largest group
    first), the image number (1-based, as shown everywhere), its source file (bytes that are
    not valid UTF-8 written as ``\\xNN``) and its distance to the group's first image (0 for
    the first; written so it reads back exactly).

    Parameters
    ----------
    path : str or path-like
        File to write.
    report : DuplicateReport
    overwrite : bool
        Replace an existing file (default False).
    protect : iterable of str or path-like
        The analysis' source files: never replaced, whatever ``overwrite`` says.

    Returns
    -------
    pathlib.Path
        The file written.

    Raises
    ------
    TypeError
        If ``report`` is not a DuplicateReport or ``overwrite`` not a bool.
    DestinationError
        If ``path`` exists and ``overwrite`` is False, is a source, or cannot be written.
    """
    if not isinstance(report, DuplicateReport):
        raise TypeError(f"report must be a DuplicateReport, got {type(report).__name__}")
    if not isinstance(overwrite, bool):
        raise TypeError(f"overwrite must be True or False, got {type(overwrite).__name__}")
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    for g, group in enumerate(report.groups, start=1):
        for i, p, dist in zip(group.indices, group.paths, group.distances):
            writer.writerow([g, i + 1, escape_undecodable(p), repr(float(dist))])
    with atomic_writer(path, "w", overwrite, encoding="utf-8", newline="", fsync=True,
                       protect=protect) as fh:
        fh.write(buf.getvalue())
    return Path(path)
