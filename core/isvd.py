"""Streaming, mean-centred truncated SVD updated one block of image columns at a time.

The update follows Brand's thin-SVD update (M. Brand, "Fast low-rank modifications of the thin
singular value decomposition", Linear Algebra Appl. 415, 2006) with the mean update of Ross, Lim,
Lin and Yang ("Incremental learning for robust visual tracking", IJCV 77, 2008): a block ``B``
with mean ``mu_B`` joins a model of ``n`` images with mean ``mu`` by appending the centred block
and one extra column ``sqrt(n m / (n + m)) (mu_B - mu)`` that carries the scatter added by the
shift of the mean.

Each update:

1. projects the new columns onto the current basis twice (classical Gram-Schmidt, "twice is
   enough"), and orthonormalises the remainder through an eigendecomposition of its small Gram
   matrix, done twice as well (a Cholesky-QR2-like scheme that stays in float32 for the large
   products and never upcasts the pixel-sized arrays);
2. takes the SVD of the small core matrix in float64;
3. rotates and truncates to ``rank + oversample`` internal directions.

Weights of all images seen so far are kept without touching every old column on every block:
each block moves every old image by the same affine map (a rotation plus the shift of the mean),
so the maps are composed on small matrices and applied to the stored columns only when a snapshot
is asked for.

Sign convention: see :func:`modescope.core.decomposition.fix_signs` (largest-magnitude entry of
each basis image positive).
"""

from __future__ import annotations

import numpy as np

from ._checks import check_int
from .decomposition import Decomposition, fix_signs

__all__ = ["StreamingSVD"]

# Directions of the new data outside the basis whose norm is below this fraction of the block's
# norm are dropped: float32 cannot resolve them and keeping them would spoil orthogonality.
_DROP_RELATIVE = 1e-5


def _orthonormal_remainder(residual: np.ndarray, norm_ref: float):
    """Return ``J`` (pixels, c) with orthonormal columns and ``F`` (c, m) with residual ~= J @ F."""
    m = residual.shape[1]
    if m == 0 or norm_ref <= 0:
        return residual[:, :0], np.zeros((0, m))
    floor = (_DROP_RELATIVE * norm_ref) ** 2
    gram = (residual.T @ residual).astype(np.float64)
    lam, vec = np.linalg.eigh(gram)
    keep = lam > floor
    if not np.any(keep):
        return residual[:, :0], np.zeros((0, m))
    lam, vec = lam[keep], vec[:, keep]
    root = np.sqrt(lam)
    j1 = residual @ (vec / root).astype(np.float32)           # pixels x c1
    f1 = (vec * root).T                                        # c1 x m  (residual ~= j1 @ f1)
    # Orthogonality lost by one Gram pass is about eps * lam_max / lam_min; a second pass
    # (Cholesky-QR2 style) restores it when that is not small.
    if lam[-1] / lam[0] * np.finfo(np.float32).eps < 1e-6:
        return j1, f1
    gram2 = (j1.T @ j1).astype(np.float64)
    lam2, vec2 = np.linalg.eigh(gram2)
    keep2 = lam2 > 1e-6
    lam2, vec2 = lam2[keep2], vec2[:, keep2]
    root2 = np.sqrt(lam2)
    j = j1 @ (vec2 / root2).astype(np.float32)
    f = (vec2 * root2).T @ f1
    return j, f


class StreamingSVD:
    """Mean-centred truncated SVD of a matrix whose columns arrive in blocks.

    Parameters
    ----------
    n_pixels : int
        Rows of the data matrix (values per image).
    rank : int
        Number of modes reported by :meth:`snapshot`, k >= 1.
    oversample : int, optional
        Extra directions kept internally (default 10) to hold accuracy of the reported ones.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> data = rng.random((50, 40), dtype=np.float32)
    >>> engine = StreamingSVD(50, rank=5)
    >>> for start in range(0, 40, 16):
    ...     engine.update(data[:, start:start + 16])
    >>> engine.snapshot().singular_values.shape
    (5,)
    """

    def __init__(self, n_pixels: int, rank: int, oversample: int = 10):
        self.n_pixels = check_int("n_pixels", n_pixels, minimum=1)
        self.rank = check_int("rank", rank, minimum=1)
        self.oversample = check_int("oversample", oversample, minimum=0)
        self.internal = self.rank + self.oversample
        self.n_seen = 0
        self.mean = np.zeros(self.n_pixels, dtype=np.float64)
        self.total_energy = 0.0
        self.basis = np.zeros((self.n_pixels, 0), dtype=np.float32, order="F")
        self.singular_values = np.zeros(0, dtype=np.float64)
        # weights: flushed part (coordinates in an older basis) + pending affine map, and chunks
        self._flushed = np.zeros((0, 0), dtype=np.float64)
        self._map_a = np.zeros((0, 0))
        self._map_b = np.zeros(0)
        self._chunks: list[list[np.ndarray]] = []   # [A, b, W] per chunk since the last flush
        self._updates = 0

    # ---------------------------------------------------------------------------------------
    def update(self, block: np.ndarray) -> None:
        """Add a block of image columns.

        Parameters
        ----------
        block : ndarray, shape (pixels, m)
            New images as columns (float32 preferred; other real types are converted).

        Raises
        ------
        TypeError
            If ``block`` is not a numeric array.
        ValueError
            If its row count differs from ``n_pixels`` or it holds non-finite values.
        """
        block = np.asarray(block)
        if not np.issubdtype(block.dtype, np.number) or np.iscomplexobj(block):
            raise TypeError(f"block must be a real numeric array, got dtype {block.dtype}")
        if block.ndim != 2 or block.shape[0] != self.n_pixels:
            raise ValueError(f"block must have shape ({self.n_pixels}, m), got {block.shape}")
        m = block.shape[1]
        if m == 0:
            return
        block = np.asarray(block, dtype=np.float32)
        block_mean = block.mean(axis=1, dtype=np.float64)
        if not np.all(np.isfinite(block_mean)):
            raise ValueError("block holds non-finite values (NaN or infinity)")
        n = self.n_seen
        n_new = n + m
        centred = block - block_mean.astype(np.float32)[:, None]
        # column sums of squares in float32 (numpy sums each contiguous column pairwise, so
        # the relative error stays near 1e-7 * log2(pixels)), added up in float64
        block_energy = float(np.sum(np.add.reduce(centred * centred, axis=0),
                                    dtype=np.float64))
        if n > 0:
            shift = block_mean - self.mean
            scale = np.sqrt(n * m / n_new)
            extra = (scale * shift).astype(np.float32)[:, None]
            z = np.concatenate([centred, extra], axis=1)
            self.total_energy += block_energy + (n * m / n_new) * float(shift @ shift)
        else:
            z = centred
            self.total_energy = block_energy
        u, s = self.basis, self.singular_values
        r = u.shape[1]
        # project onto the current basis; a second projection ("twice is enough") only when
        # the first left a component along the basis that float32 cannot ignore
        proj = u.T @ z
        rem = z - u @ proj
        proj = proj.astype(np.float64)
        if r:
            proj2 = u.T @ rem
            if np.max(np.abs(proj2)) > 1e-6 * max(float(np.max(np.abs(proj))), 1e-30):
                rem -= u @ proj2
                proj += proj2
        extra_energy = float(np.sum(z[:, m:].astype(np.float64) ** 2)) if n > 0 else 0.0
        norm_ref = float(np.sqrt(block_energy + extra_energy)) or 1.0
        j, f = _orthonormal_remainder(rem, norm_ref)
        c = j.shape[1]
        ncol = z.shape[1]
        core = np.zeros((r + c, r + ncol))
        core[:r, :r] = np.diag(s)
        core[:r, r:] = proj
        core[r:, r:] = f
        p_mat, sig, _ = np.linalg.svd(core, full_matrices=False)
        q_new = min(self.internal, int(np.sum(sig > sig[0] * 1e-7)) if sig.size and sig[0] > 0
                    else 0)
        q_new = max(q_new, 0)
        p_keep = p_mat[:, :q_new]
        big = np.concatenate([u, j], axis=1) if c else u
        new_basis = np.asfortranarray(big @ p_keep.astype(np.float32))
        # affine map of old image coordinates: new = A old + b
        if n > 0:
            coord_extra = core[:, r + m]                      # coordinates of the extra column
            coord_old_shift = -np.sqrt(m / (n * n_new)) * coord_extra   # mean moves by -m/n' dS
            coord_new_shift = np.sqrt(n / (m * n_new)) * coord_extra     # block mean -> new mean
        else:
            coord_old_shift = np.zeros(r + c)
            coord_new_shift = np.zeros(r + c)
        a_blk = p_keep[:r, :].T                               # q_new x r
        b_blk = p_keep.T @ coord_old_shift
        new_w = p_keep.T @ (core[:, r:r + m] + coord_new_shift[:, None])
        self._compose(a_blk, b_blk)
        self._chunks.append([np.eye(q_new), np.zeros(q_new), new_w])
        if len(self._chunks) > 64:
            self._flush()
        self.basis = new_basis
        self.singular_values = sig[:q_new].copy()
        self.mean = self.mean + (m / n_new) * (block_mean - self.mean)
        self.n_seen = n_new
        self._updates += 1
        if self._updates % 8 == 0:
            self._reorthonormalise_if_needed()

    def _compose(self, a_blk: np.ndarray, b_blk: np.ndarray) -> None:
        if self._flushed.shape[1] > 0:
            self._map_a = a_blk @ self._map_a
            self._map_b = a_blk @ self._map_b + b_blk
        for chunk in self._chunks:
            chunk[0] = a_blk @ chunk[0]
            chunk[1] = a_blk @ chunk[1] + b_blk

    def _flush(self) -> None:
        parts = []
        if self._flushed.shape[1] > 0:
            parts.append(self._map_a @ self._flushed + self._map_b[:, None])
        for a, b, w in self._chunks:
            parts.append(a @ w + b[:, None])
        q = self.basis.shape[1] if not self._chunks else self._chunks[-1][0].shape[0]
        self._flushed = np.concatenate(parts, axis=1) if parts else np.zeros((q, 0))
        self._map_a = np.eye(self._flushed.shape[0])
        self._map_b = np.zeros(self._flushed.shape[0])
        self._chunks = []

    def _reorthonormalise_if_needed(self) -> None:
        u = self.basis
        if u.shape[1] == 0:
            return
        gram = (u.T @ u).astype(np.float64)
        err = np.max(np.abs(gram - np.eye(u.shape[1])))
        if err > 1e-5:
            lam, vec = np.linalg.eigh(gram)
            inv_root = (vec / np.sqrt(np.maximum(lam, 1e-12))) @ vec.T
            self.basis = np.asfortranarray(u @ inv_root.astype(np.float32))

    @classmethod
    def from_decomposition(cls, decomposition: Decomposition,
                           oversample: int = 10) -> "StreamingSVD":
        """Start an engine from an existing analysis so that more images can be added.

        The engine holds the analysis' k modes (its extra internal directions were not saved),
        its exact mean, image count, total energy and weights; new blocks update all of them.

        Parameters
        ----------
        decomposition : Decomposition
        oversample : int, optional
            Extra directions to keep from now on.
        """
        d = decomposition
        engine = cls(d.n_pixels, rank=max(d.rank, 1), oversample=oversample)
        engine.n_seen = d.n_images
        engine.mean = d.mean.astype(np.float64)
        engine.total_energy = float(d.total_energy)
        engine.basis = np.asfortranarray(d.basis, dtype=np.float32)
        engine.singular_values = np.asarray(d.singular_values, dtype=np.float64).copy()
        engine._flushed = np.asarray(d.weights, dtype=np.float64).copy()
        engine._map_a = np.eye(d.rank)
        engine._map_b = np.zeros(d.rank)
        return engine

    # ---------------------------------------------------------------------------------------
    def internal_weights(self) -> np.ndarray:
        """Return the weights of every image seen, shape (internal directions, n_seen)."""
        self._flush()
        return self._flushed.copy()

    def snapshot(self, image_shape: tuple | None = None, **fields) -> Decomposition:
        """Return a consistent Decomposition of everything seen so far (streaming, not exact).

        Parameters
        ----------
        image_shape : tuple of int, optional
            ``(rows, cols, channels)``; default ``(n_pixels, 1, 1)``.
        **fields
            Passed to :class:`Decomposition` (paths, pages, metadata).

        Raises
        ------
        ValueError
            If no image has been added yet.
        """
        if self.n_seen == 0:
            raise ValueError("no images have been added yet")
        self._reorthonormalise_if_needed()
        k = min(self.rank, self.basis.shape[1])
        weights = self.internal_weights()[:k]
        basis, weights = fix_signs(self.basis[:, :k], weights)
        shape = tuple(image_shape) if image_shape is not None else (self.n_pixels, 1, 1)
        return Decomposition(mean=self.mean.astype(np.float32), basis=np.asfortranarray(basis),
                             singular_values=self.singular_values[:k].copy(), weights=weights,
                             total_energy=float(self.total_energy), image_shape=shape,
                             exact=False, **fields)
