"""The functions the Dask engine runs on the workers, one call per block of files.

Each task decodes its own block of files with the very decoder the local engine uses
(:func:`modescope.core.sources.decode.iter_blocks`, one thread: the cluster's workers are the
parallelism) and returns only small results or per-block sums, so no worker ever holds more
than one block of images. Nothing here imports dask at module level; :func:`_report` talks to
the worker it runs on when there is one.
"""

from __future__ import annotations

import numpy as np

from modescope.core.engine.refine import _project_rows
from modescope.core.sources.decode import iter_blocks
from modescope.core.sources.scan import SourceSet

__all__ = ["PROGRESS_TOPIC", "decode", "sum_block", "centred_block", "project_block_sums",
           "block_svd", "merge_states", "pick", "add_arrays"]

# the scheduler relays events on this topic from the workers to the client (progress)
PROGRESS_TOPIC = "modescope-progress"


def _report(tag: str, images: int) -> None:
    """Tell the client, through the scheduler, that ``images`` more images were read."""
    try:
        from distributed import get_worker
        worker = get_worker()
    except (ImportError, ValueError):        # not on a distributed worker (a plain dask run)
        return
    worker.log_event(PROGRESS_TOPIC, {"tag": tag, "images": int(images)})


def decode(part: SourceSet, downscale: int) -> tuple[np.ndarray, np.ndarray, tuple]:
    """Decode every image of ``part`` into one float32 block of columns.

    Returns
    -------
    data : ndarray, shape (pixels, n_images of part), float32
        Columns of images that failed are zero.
    ok : ndarray of bool, shape (n_images of part,)
        Which columns were decoded.
    problems : tuple of Problem
        Why the others failed.
    """
    n = part.n_images
    data, ok, problems = None, np.zeros(n, dtype=bool), []
    for block in iter_blocks(part, block_size=max(n, 1), downscale=downscale, workers=1):
        if data is None:
            data = np.zeros((block.data.shape[0], n), dtype=np.float32, order="F")
        data[:, block.indices] = block.data
        ok[block.indices] = True
        problems.extend(block.problems)
    return data, ok, tuple(problems)


def sum_block(part: SourceSet, downscale: int, tag: str) -> tuple[np.ndarray, np.ndarray, tuple]:
    """First pass: the float64 sum of the decoded columns of ``part``, which ones decoded, why not.

    Returns
    -------
    total : ndarray, shape (pixels,), float64
    ok : ndarray of bool, shape (n_images of part,)
    problems : tuple of Problem
    """
    data, ok, problems = decode(part, downscale)
    total = np.sum(data, axis=1, dtype=np.float64)
    _report(tag, part.n_images)
    return total, ok, problems


def centred_block(part: SourceSet, downscale: int, mean: np.ndarray, tag: str) -> np.ndarray:
    """Return the block of ``part`` minus ``mean`` (float32; a failed image is a zero column).

    One block at a time: the centred data matrix is never formed as a whole.
    """
    data, ok, _ = decode(part, downscale)
    data -= np.asarray(mean, dtype=np.float32)[:, None]
    data[:, ~ok] = 0.0
    _report(tag, part.n_images)
    return data


def project_block_sums(part: SourceSet, downscale: int, basis: np.ndarray, mean: np.ndarray,
                       want_y: bool, tag: str):
    """One block of a refinement pass: what :class:`~.refine.PassAccumulator` adds per block.

    The very kernel of the local engine (:func:`modescope.core.engine.refine._project_rows`),
    so both engines do the same float32 products on the same blocks.

    Returns
    -------
    small : tuple (weights (q, m) float32, residual (m,), energy (m,)) or None
        None when an image of the block failed to decode (then ``problems`` says why).
    yt : ndarray, shape (q, pixels), float64, or None
        This block's share of ``(A A^T basis)^T`` (summed over blocks on the cluster).
    problems : tuple of Problem
    ok : ndarray of bool
    """
    data, ok, problems = decode(part, downscale)
    _report(tag, part.n_images)
    if not ok.all():
        return None, None, problems, ok
    w, res, energy, yt = _project_rows(basis, mean, data, want_y)
    yt = None if yt is None else yt.astype(np.float64)
    return (w, res, energy), yt, problems, ok


def _thin_svd(matrix: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Left singular vectors and values of a float32 matrix (LAPACK gesdd in float32 through
    scipy, gesvd when gesdd does not converge): no float64 copy of a pixels-sized matrix."""
    from scipy.linalg import LinAlgError, svd

    try:
        u, s, _ = svd(matrix, full_matrices=False, overwrite_a=True, check_finite=False)
    except LinAlgError:
        u, s, _ = svd(matrix, full_matrices=False, check_finite=False, lapack_driver="gesvd")
    return u, s.astype(np.float64)


def block_svd(part: SourceSet, downscale: int, q: int, tag: str):
    """Start pass, one block: its count, mean and leading ``q`` singular pairs, centred on itself.

    Returns
    -------
    state : tuple (count, mean (pixels,) float64, U (pixels, r) float32, s (r,) float64)
        ``r <= q``; the thin SVD of the decoded columns of ``part`` minus their own mean,
        truncated (a start for the refinement passes, so float32 is enough).
    ok : ndarray of bool, shape (n_images of part,)
    problems : tuple of Problem
    """
    data, ok, problems = decode(part, downscale)
    _report(tag, part.n_images)
    good = np.asfortranarray(data[:, ok])
    count = good.shape[1]
    pixels = data.shape[0]
    del data
    if count == 0:
        return ((0, np.zeros(pixels), np.zeros((pixels, 0), dtype=np.float32), np.zeros(0)),
                ok, problems)
    mean = good.mean(axis=1, dtype=np.float64)
    good -= mean.astype(np.float32)[:, None]
    u, s = _thin_svd(good)
    r = min(q, s.size)
    return (count, mean, np.asfortranarray(u[:, :r]), s[:r].copy()), ok, problems


def merge_states(a, b, q: int):
    """Merge two blocks' ``(count, mean, U, s)`` into the same for both, truncated to ``q``.

    The centred data of both is ``[A - ma, B - mb]`` plus the shift of each block's mean to the
    common one; its column space is spanned by ``[Ua sa, Ub sb, sqrt(na nb / n) (ma - mb)]``
    (the mean update of Ross, Lim, Lin and Yang 2008, "Incremental learning for robust visual
    tracking", IJCV 77, Sec. 3.1), whose thin SVD gives the merged pairs exactly up to the
    truncation of each part.
    """
    na, ma, ua, sa = a
    nb, mb, ub, sb = b
    if na == 0:
        return b
    if nb == 0:
        return a
    n = na + nb
    shift = (np.sqrt(na * nb / n) * (ma - mb)).astype(np.float32)
    cols = np.concatenate([ua * sa.astype(np.float32), ub * sb.astype(np.float32),
                           shift[:, None]], axis=1)
    u, s = _thin_svd(np.asfortranarray(cols))
    r = min(q, s.size)
    return n, ma + (mb - ma) * (nb / n), np.asfortranarray(u[:, :r]), s[:r].copy()


def pick(value, index: int):
    """Return item ``index`` of a task's tuple (to split a task's result on the cluster)."""
    return value[index]


def add_arrays(*arrays) -> np.ndarray | None:
    """Return the sum of ``arrays`` (float64), skipping None (one node of a tree sum)."""
    total = None
    for a in arrays:
        if a is None:
            continue
        total = a.copy() if total is None else total.__iadd__(a)
    return total
