"""Near-duplicate images: groups of images whose weights and residuals are nearly equal.

Distance and tolerance
----------------------
The distance of two images ``i`` and ``j`` in the centred space splits into the part inside the
span of the K basis images and the part outside it::

    ||c_i - c_j||**2 = ||w_i - w_j||**2 + ||e_i - e_j||**2

where ``w`` are the weights over all K modes and ``e`` the residual vectors. The decomposition
keeps only the residual *norms* ``||e_i|| = sqrt(residual[i])``, so the residual parts are
compared by norm only, through the reverse triangle inequality ``||e_i - e_j|| >=
| ||e_i|| - ||e_j|| |``. The distance used here is therefore a lower bound of the true one::

    d(i, j) = sqrt(||w_i - w_j||**2 + (||e_i|| - ||e_j||)**2)   <=   ||c_i - c_j||

Two images with equal weights and equal residual norms but residuals pointing in different
directions have ``d = 0`` and are grouped although they differ. The grouping is a list of
candidates: verify a group by looking at its images (or comparing their pixels) before acting
on it.

The tolerance is a fraction of the root-mean-square centred image norm
``sqrt(total_energy / n)``: a pair is near-duplicate when ``d(i, j) <= (tolerance + 1e-6) *
sqrt(total_energy / n)``, the ``1e-6`` absorbing the rounding of float32 images. Tolerance 0
therefore finds exact copies only.

Search
------
Candidate pairs come from :meth:`scipy.spatial.cKDTree.query_pairs` on the vectors
``(w_i[:r], sqrt(residual_at_rank(r)[i]))`` built from the first r modes; their distance is a
lower bound of ``d`` (the remaining modes are folded into the residual norm), so no pair within
the tolerance is missed and r only trades search speed against the number of candidates. Every
candidate is then checked with ``d`` over all K modes. Confirmed pairs are joined into groups
by union-find (the connected components of the graph of confirmed pairs, computed by
:func:`scipy.sparse.csgraph.connected_components`), so a group can chain images whose own distance is above the tolerance:
each group reports its largest pairwise ``d``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

from modescope.core.validation import check_float, check_int
from modescope.core.decomposition import Decomposition

__all__ = ["DuplicateGroup", "DuplicateReport", "find_duplicates", "pair_distance"]

#: Largest number of candidate pairs checked at once (memory bound of the check).
_PAIR_CHUNK = 200_000
#: Rows per chunk when computing the largest pairwise distance of a big group.
_ROW_CHUNK = 512


@dataclass(frozen=True)
class DuplicateGroup:
    """One group of near-duplicate images.

    Attributes
    ----------
    indices : tuple of int
        Image columns in the group, ascending.
    paths : tuple of str
        Source file of each image (empty strings when the decomposition has no paths).
    pages : tuple of int
        Page of each image within its file.
    max_distance : float
        Largest pairwise distance ``d`` (module docstring) within the group, in units of the
        centred image norm.
    max_distance_fraction : float
        ``max_distance`` as a fraction of the RMS centred image norm (0 when that norm is 0).
    """

    indices: tuple
    paths: tuple
    pages: tuple
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
        Modes used to find candidate pairs (every mode is used to confirm them).
    n_candidates : int
        Candidate pairs found by the tree search.
    n_pairs : int
        Pairs confirmed within the threshold.
    """

    groups: tuple
    tolerance: float
    threshold: float
    rms_norm: float
    rank: int
    n_candidates: int
    n_pairs: int

    @property
    def n_duplicates(self) -> int:
        """Number of images that belong to some group."""
        return sum(g.size for g in self.groups)


def _features(decomposition: Decomposition, rank: int) -> np.ndarray:
    """Rows ``(w_i[:rank], sqrt(residual_at_rank(rank)[i]))``, shape (n, rank + 1)."""
    w = np.asarray(decomposition.weights[:rank], dtype=np.float64).T
    res = np.sqrt(np.maximum(decomposition.residual_at_rank(rank), 0.0))
    return np.ascontiguousarray(np.column_stack([w, res]))


def pair_distance(decomposition: Decomposition, i: int, j: int) -> float:
    """Return the lower-bound distance ``d(i, j)`` of two images (see the module docstring).

    Parameters
    ----------
    decomposition : Decomposition
        With residuals.
    i, j : int
        Image columns.

    Returns
    -------
    float
        ``sqrt(||w_i - w_j||**2 + (||e_i|| - ||e_j||)**2)`` over all K modes.

    Raises
    ------
    TypeError, ValueError
        If the decomposition has no residuals or an index is out of range.
    """
    d = _check(decomposition)
    i = check_int("i", i, minimum=0, maximum=d.n_images - 1)
    j = check_int("j", j, minimum=0, maximum=d.n_images - 1)
    w = np.asarray(d.weights, dtype=np.float64)
    e = np.sqrt(np.maximum(np.asarray(d.residual, dtype=np.float64), 0.0))
    return float(np.sqrt(np.sum((w[:, i] - w[:, j]) ** 2) + (e[i] - e[j]) ** 2))


def _check(decomposition) -> Decomposition:
    if not isinstance(decomposition, Decomposition):
        raise TypeError("decomposition must be a Decomposition, got "
                        f"{type(decomposition).__name__}")
    if decomposition.residual is None:
        raise ValueError("this decomposition has no residuals yet (a streaming snapshot): run "
                         "the scoring pass before looking for near-duplicates")
    return decomposition


def _max_pairwise(points: np.ndarray) -> float:
    """Largest Euclidean distance between rows, in chunks so big groups fit in memory."""
    best = 0.0
    points = points - points.mean(axis=0)   # centring keeps the expansion below accurate
    sq = np.sum(points ** 2, axis=1)
    for start in range(0, points.shape[0], _ROW_CHUNK):
        block = points[start:start + _ROW_CHUNK]
        d2 = sq[start:start + _ROW_CHUNK, None] + sq[None, :] - 2.0 * block @ points.T
        # Recompute the winner directly rather than trusting the expansion's rounding.
        a, b = np.unravel_index(int(np.argmax(d2)), d2.shape)
        exact = float(np.sqrt(np.sum((block[a] - points[b]) ** 2)))
        best = max(best, exact)
    return best


def find_duplicates(decomposition: Decomposition, tolerance: float = 0.02,
                    rank: int | None = None) -> DuplicateReport:
    """Find groups of near-duplicate images.

    A pair is near-duplicate when ``d(i, j) <= tolerance * sqrt(total_energy / n)``, with ``d``
    the lower-bound distance of the module docstring (weights over all K modes plus residual
    *norms*). Because residuals are compared by norm only, images with equal weights and equal
    residual norms but different residual directions are grouped too: treat the groups as
    candidates and verify them by eye or by comparing pixels.

    Parameters
    ----------
    decomposition : Decomposition
        With residuals (after the scoring pass).
    tolerance : float
        Fraction of the RMS centred image norm, >= 0 (default 0.02, i.e. 2 %).
    rank : int, optional
        Leading modes r used in the tree search for candidate pairs, 0..K (default K). The
        result does not depend on r (candidates are checked over all modes); a small r is faster
        for large K but may produce more candidates to check.

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
    n = d.n_images
    rms = float(np.sqrt(max(float(d.total_energy), 0.0) / n)) if n else 0.0
    threshold = tolerance * rms
    # Rounding in the model (float32 images) must not split exact copies at tolerance 0.
    slack = 1e-6 * rms
    limit = threshold + slack

    full = _features(d, d.rank)
    search = full if r == d.rank else _features(d, r)
    if n < 2:
        return DuplicateReport(groups=(), tolerance=tolerance, threshold=threshold,
                               rms_norm=rms, rank=r, n_candidates=0, n_pairs=0)
    pairs = cKDTree(search).query_pairs(limit, output_type="ndarray")
    n_candidates = int(pairs.shape[0])
    good = []
    for start in range(0, n_candidates, _PAIR_CHUNK):
        chunk = pairs[start:start + _PAIR_CHUNK]
        dist = np.sqrt(np.sum((full[chunk[:, 0]] - full[chunk[:, 1]]) ** 2, axis=1))
        good.append(chunk[dist <= limit])
    good = np.concatenate(good) if good else np.zeros((0, 2), dtype=np.intp)
    n_pairs = int(good.shape[0])
    # Union-find over the confirmed pairs, done by scipy's connected components (same groups,
    # without a Python loop over possibly millions of pairs).
    graph = coo_matrix((np.ones(n_pairs, dtype=np.int8), (good[:, 0], good[:, 1])),
                       shape=(n, n))
    _, labels = connected_components(graph, directed=False)
    members: dict[int, list[int]] = {}
    for i, label in enumerate(labels.tolist()):
        members.setdefault(label, []).append(i)
    groups = []
    paths = tuple(d.paths) if d.paths else ("",) * n
    for idx in members.values():
        if len(idx) < 2:
            continue
        dmax = _max_pairwise(full[idx])
        groups.append(DuplicateGroup(
            indices=tuple(idx), paths=tuple(paths[i] for i in idx),
            pages=tuple(int(d.pages[i]) for i in idx), max_distance=dmax,
            max_distance_fraction=dmax / rms if rms > 0 else 0.0))
    groups.sort(key=lambda g: (-g.size, g.indices[0]))
    return DuplicateReport(groups=tuple(groups), tolerance=tolerance, threshold=threshold,
                           rms_norm=rms, rank=r, n_candidates=n_candidates, n_pairs=n_pairs)
