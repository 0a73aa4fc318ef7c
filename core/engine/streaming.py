"""Streaming, mean-centred truncated SVD updated one block of image columns at a time.

The update follows Brand's thin-SVD update (M. Brand, "Fast low-rank modifications of the thin
singular value decomposition", Linear Algebra Appl. 415, 2006) with the mean update of Ross, Lim,
Lin and Yang ("Incremental learning for robust visual tracking", IJCV 77, 2008): a block ``B``
with mean ``mu_B`` joins a model of ``n`` images with mean ``mu`` by appending the centred block
and one extra column ``sqrt(n m / (n + m)) (mu_B - mu)`` that carries the scatter added by the
shift of the mean.

Each update (all pixel-sized products in float32 on row-major arrays, one row per image or
direction; small matrices in float64):

1. projects the new columns onto the current basis, a second time ("twice is enough") when
   the first left a component float32 cannot ignore;
2. finds orthonormal directions of the remainder from one eigendecomposition of its small
   Gram matrix, without forming them: only the combination that survives the truncation is
   computed;
3. takes the left singular vectors of the small core matrix (eigendecomposition of
   ``core core^T``) and truncates to ``rank + oversample`` internal directions;
4. re-orthonormalises the new basis while keeping the decomposition consistent (one
   float32 Gram pass leaves the new directions orthogonal only to about eps * condition): with
   ``C = (B^T B)^(1/2)`` the data ``B W = (B C^-1)(C W)``, and a small SVD of ``C diag(s)``
   gives the rotated basis, singular values and coordinates (a Cholesky-QR2-like correction
   on k + oversample columns instead of on the whole remainder).

Weights of all images seen so far are kept without touching every old column on every block:
each block moves every old image by the same affine map (a rotation plus the shift of the mean),
so the maps are composed on small matrices and applied to the stored columns only when a snapshot
is asked for.

Sign convention: see :func:`modescope.core.decomposition.fix_signs` (largest-magnitude entry of
each basis image positive).
"""

from __future__ import annotations

import numpy as np

from modescope.core.validation import check_int
from modescope.core.decomposition import Decomposition, fix_signs

__all__ = ["StreamingSVD"]

# Directions of the new data outside the basis whose norm is below this fraction of the block's
# norm are dropped: float32 cannot resolve them and keeping them would spoil orthogonality.
_DROP_RELATIVE = 1e-5
# A column that keeps at least this fraction of its norm outside the basis after one projection
# needs no second one (see StreamingSVD._project_out); our own choice, measured: the learning
# pass then differs from the two-projection one by about 1e-6 in the signal modes.
_REPROJECT_BELOW = 1e-2
# Step 4 runs only when the new basis is further than this from orthonormal (largest entry of
# B^T B - I). Float32 leaves every update's new directions off by about 1e-6; letting that add
# up to 1e-5 before correcting it moves the streaming estimates by about as much (relative) and
# skips most corrections (measured: about 10 % of the update's time). Snapshots and the passes
# after learning start from a basis orthonormalised to _ORTHO_PASSES (our own choices).
_ORTHO_SLACK = 1e-5
_ORTHO_PASSES = 1e-6
# Blocks whose weights wait as (A, b, W) before they are made a group of pieces (see _flush).
_CHUNKS_PER_FLUSH = 64


def _orthonormalised(u: np.ndarray, slack: float) -> np.ndarray:
    """Return ``u`` (pixels x q, float32, Fortran order) itself when no entry of
    ``u^T u - I`` exceeds ``slack``, else its symmetric orthonormalisation ``u (u^T u)^-1/2``
    (the orthonormal basis of the same span closest to ``u``)."""
    if u.shape[1] == 0:
        return u
    gram = (u.T @ u).astype(np.float64)
    if np.max(np.abs(gram - np.eye(u.shape[1]))) <= slack:
        return u
    lam, vec = np.linalg.eigh(gram)
    inv_root = (vec / np.sqrt(np.maximum(lam, 1e-12))) @ vec.T
    return (inv_root.T.astype(np.float32) @ u.T).T                  # stays Fortran order


class _Group:
    """Float32 weight pieces in one older coordinate system, and the affine map
    ``x -> a @ x + b`` that takes them to the current one."""

    __slots__ = ("pieces", "a", "b", "size")

    def __init__(self, pieces: list, a: np.ndarray, b: np.ndarray):
        self.pieces, self.a, self.b = pieces, a, b
        self.size = sum(p.shape[1] for p in pieces)

    def applied(self) -> list:
        """Move the pieces to the current system in place (float32), one piece at a time
        (never a second copy of the group), and return them."""
        for i, piece in enumerate(self.pieces):
            self.pieces[i] = (self.a @ piece + self.b[:, None]).astype(np.float32)
        self.a, self.b = np.eye(self.a.shape[0]), np.zeros(self.a.shape[0])
        return self.pieces


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
        # weights (see _flush): groups of float32 pieces, each group in an older coordinate
        # system with its own affine map to the current one, plus one (A, b, W) per block
        # since the last flush
        self._groups: list[_Group] = []
        self._chunks: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
        self._released = False

    # ---------------------------------------------------------------------------------------
    def update(self, block: np.ndarray) -> None:
        """Add a block of image columns.

        Parameters
        ----------
        block : ndarray, shape (pixels, m)
            New images as columns (float32 preferred, Fortran order, as the reader makes them;
            other real types and layouts are converted).

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
        z, block_mean, added_energy, row_energy = self._centred_rows(block)
        proj = self._project_out(z, row_energy)                      # step 1
        root, vec = self._remainder_directions(z, added_energy)      # step 2
        p_keep, sig, core = self._truncated_core(proj, root, vec)    # step 3
        new_rows = self._new_basis_rows(p_keep, root, vec, z)
        a_blk, b_blk, new_w = self._coordinate_maps(p_keep, core, m)
        new_rows, sig, a_blk, b_blk, new_w = self._reorthonormalised(   # step 4
            new_rows, sig, a_blk, b_blk, new_w)
        self._chunks.append((a_blk, b_blk, new_w))
        if len(self._chunks) >= _CHUNKS_PER_FLUSH:
            self._flush()
        self.basis = new_rows.T                               # Fortran order (pixels x q)
        self.singular_values = sig.copy()
        n_new = self.n_seen + m
        self.mean = self.mean + (m / n_new) * (block_mean - self.mean)
        self.n_seen = n_new

    def _centred_rows(self, block: np.ndarray):
        """Return the centred block as rows (plus the mean-shift row), its mean, its energy and
        the squared norm of each row (float64).

        Works on the transpose: one row per image, C-contiguous. Every pixel-sized product is
        then a plain row-major GEMM whose output has the layout of its operands, so no
        elementwise step mixes C and Fortran order (that alone cost 5x here). Updates
        ``total_energy``.
        """
        rows = np.ascontiguousarray(block.T, dtype=np.float32)          # m x pixels
        m = rows.shape[0]
        block_mean = rows.mean(axis=0, dtype=np.float64)
        if not np.all(np.isfinite(block_mean)):
            raise ValueError("block holds non-finite values (NaN or infinity)")
        n = self.n_seen
        n_new = n + m
        z = np.empty((m + 1 if n > 0 else m, self.n_pixels), dtype=np.float32)
        np.subtract(rows, block_mean.astype(np.float32), out=z[:m])
        # row sums of squares in float32 (numpy sums each contiguous row pairwise, so the
        # relative error stays near 1e-7 * log2(pixels)), added up in float64
        row_energy = np.empty(z.shape[0])
        row_energy[:m] = np.einsum("ij,ij->i", z[:m], z[:m])
        energy = float(np.sum(row_energy[:m]))
        if n > 0:
            shift = block_mean - self.mean
            z[m] = np.sqrt(n * m / n_new) * shift
            row_energy[m] = (n * m / n_new) * float(shift @ shift)
            energy += row_energy[m]
            self.total_energy += energy
        else:
            self.total_energy = energy
        return z, block_mean, energy, row_energy

    def _project_out(self, z: np.ndarray, before: np.ndarray) -> np.ndarray:
        """Step 1: remove the basis' span from ``z`` in place; return the coordinates (r x ncol).

        ``before`` holds the squared norm of each row of ``z``. A second projection ("twice is
        enough") runs when the first left a component along the basis that float32 cannot
        ignore: for data of low rank the remainder is rounding noise that lies mostly in the
        span of the basis.
        """
        u = self.basis
        r = u.shape[1]
        if not r:
            return np.zeros((0, z.shape[0]))
        ut = u.T                                                           # r x pixels, C
        proj = (z @ u).T.astype(np.float64)
        z -= proj.T.astype(np.float32) @ ut
        # one projection leaves a component along the basis of about eps * ||z_i|| in column
        # i; relative to what remains that is eps * ||z_i|| / ||rem_i||. Where every column
        # keeps at least _REPROJECT_BELOW of its norm outside the basis, that is below
        # eps / _REPROJECT_BELOW and a second projection would change nothing that matters.
        # What remains is ||z_i||^2 - ||proj_i||^2 (the basis is orthonormal): cancellation
        # leaves it off by about 1e-6 ||z_i||^2, far below the 1e-4 ||z_i||^2 compared here,
        # and it saves a pass over the block
        after = before - np.einsum("ij,ij->j", proj, proj)
        if np.all(after >= (_REPROJECT_BELOW ** 2) * before):
            return proj
        proj2 = z @ u
        if np.max(np.abs(proj2)) > 1e-6 * max(float(np.max(np.abs(proj))), 1e-30):
            z -= proj2 @ ut
            proj += proj2.T
        return proj

    @staticmethod
    def _remainder_directions(rem: np.ndarray, added_energy: float):
        """Step 2: orthonormal directions of the remainder, from its small Gram matrix.

        ``rem rem^T = vec diag(root**2) vec^T``: the rows of ``J = (vec / root)^T rem`` are
        orthonormal and ``rem = (vec * root) J``. J itself is never formed, only the
        combination that survives the truncation. Directions whose norm is below
        ``_DROP_RELATIVE`` of the block's are dropped.
        """
        floor = (_DROP_RELATIVE * (np.sqrt(added_energy) or 1.0)) ** 2
        lam, vec = np.linalg.eigh((rem @ rem.T).astype(np.float64))
        keep = lam > floor
        return np.sqrt(lam[keep]), vec[:, keep]

    def _truncated_core(self, proj: np.ndarray, root: np.ndarray, vec: np.ndarray):
        """Step 3: left singular vectors of the small core, truncated to the internal size.

        From the eigendecomposition of ``core core^T`` (float64; the squared condition number
        stays far inside float64's range for data that is float32 to begin with, and eigh is
        ~3x cheaper than the SVD here).
        """
        r, c, ncol = proj.shape[0], root.size, proj.shape[1]
        core = np.zeros((r + c, r + ncol))
        core[:r, :r] = np.diag(self.singular_values)
        core[:r, r:] = proj
        core[r:, r:] = (vec * root).T                                      # rem^T = J^T F
        lam_core, p_mat = np.linalg.eigh(core @ core.T)
        order = np.argsort(lam_core)[::-1]
        sig = np.sqrt(np.maximum(lam_core[order], 0.0))
        q_new = min(self.internal, int(np.sum(sig > sig[0] * 1e-7)) if sig.size and sig[0] > 0
                    else 0)
        return p_mat[:, order][:, :q_new], sig[:q_new], core

    def _new_basis_rows(self, p_keep, root, vec, rem) -> np.ndarray:
        """New basis as rows: ``P_u^T U^T + P_j^T J^T`` with ``J^T = (vec / root)^T rem``."""
        r = self.basis.shape[1]
        new_rows = np.empty((p_keep.shape[1], self.n_pixels), dtype=np.float32)
        if r:
            np.matmul(p_keep[:r].T.astype(np.float32), self.basis.T, out=new_rows)
        else:
            new_rows[...] = 0.0
        if root.size:
            new_rows += ((vec / root) @ p_keep[r:]).T.astype(np.float32) @ rem
        return new_rows

    def _coordinate_maps(self, p_keep, core, m: int):
        """Affine map of old image coordinates (new = A old + b) and the new images' weights."""
        r, n = self.basis.shape[1], self.n_seen
        n_new = n + m
        if n > 0:
            coord_extra = core[:, r + m]                      # coordinates of the extra column
            old_shift = -np.sqrt(m / (n * n_new)) * coord_extra    # mean moves by -m/n' dS
            new_shift = np.sqrt(n / (m * n_new)) * coord_extra     # block mean -> new mean
        else:
            old_shift = new_shift = np.zeros(core.shape[0])
        return (p_keep[:r, :].T, p_keep.T @ old_shift,
                p_keep.T @ (core[:, r:r + m] + new_shift[:, None]))

    @staticmethod
    def _reorthonormalised(new_rows, sig, a_blk, b_blk, new_w):
        """Step 4: make the new basis exactly orthonormal, keeping the decomposition consistent.

        One float32 Gram pass leaves the new directions orthogonal only to about
        eps * cond(remainder). With ``C = (B^T B)^(1/2)``, data ~ ``B W = (B C^-1)(C W)``, and
        the SVD ``C diag(s) = P' diag(s') Q'^T`` gives the orthonormal basis ``B C^-1 P'``,
        singular values ``s'`` and coordinates ``P'^T C W``.
        """
        q = new_rows.shape[0]
        if not q:
            return new_rows, sig, a_blk, b_blk, new_w
        gram_b = (new_rows @ new_rows.T).astype(np.float64)
        if np.max(np.abs(gram_b - np.eye(q))) <= _ORTHO_SLACK:
            return new_rows, sig, a_blk, b_blk, new_w
        lam_b, vec_b = np.linalg.eigh(gram_b)
        # a direction of the new basis that float32 rounding left (nearly) null carries no
        # data: it is dropped rather than scaled up into a column that is not unit length
        # (rank-deficient data, found by the property tests)
        keep = lam_b > 1e-6 * max(float(lam_b.max()), 1e-300)
        vec_b, root_b = vec_b[:, keep], np.sqrt(lam_b[keep])
        half = (vec_b * root_b) @ vec_b.T
        p_fix, sig, _ = np.linalg.svd(half * sig, full_matrices=False)
        r = int(keep.sum())
        p_fix, sig = p_fix[:, :r], sig[:r]
        fix = p_fix.T @ half
        new_rows = (((vec_b / root_b) @ vec_b.T) @ p_fix).T.astype(np.float32) @ new_rows
        return new_rows, sig, fix @ a_blk, fix @ b_blk, fix @ new_w

    def _flush(self) -> None:
        """Turn the blocks since the last flush into a group of pieces in the current system.

        Block j moved every image seen before it by ``x -> A_j x + b_j`` and brought its own
        weights ``W_j``. One sweep from the newest block back to the oldest gives each block's
        weights in the current system and the map of all these blocks together, which is
        composed into every older group's own map (small matrices only). Groups are merged,
        their maps applied to their pieces, only when the newer one has grown as large as the
        older one: every image is rewritten O(log n) times in all, not once per flush (that
        made the learning pass quadratic in the number of images: 1.46x slower per image at a
        million images than at 100,000, measured here).

        Pieces are kept in float32: they are streaming estimates (the passes after learning
        compute the exact weights), and this halves the memory per image.
        """
        if not self._chunks:
            return
        q = self._chunks[-1][2].shape[0]
        s_a, s_b = np.eye(q), np.zeros(q)
        pieces: list[np.ndarray] = []
        for a, b, w in reversed(self._chunks):
            pieces.append((s_a @ w + s_b[:, None]).astype(np.float32))
            s_b = s_a @ b + s_b
            s_a = s_a @ a
        pieces.reverse()
        for group in self._groups:
            group.a, group.b = s_a @ group.a, s_a @ group.b + s_b
        self._chunks = []
        self._groups.append(_Group(pieces, np.eye(q), np.zeros(q)))
        while len(self._groups) > 1 and self._groups[-1].size >= self._groups[-2].size:
            newer = self._groups.pop()
            older = self._groups.pop()
            self._groups.append(_Group(older.applied() + newer.applied(), np.eye(q),
                                       np.zeros(q)))

    def _reorthonormalise_if_needed(self) -> None:
        self.basis = _orthonormalised(self.basis, _ORTHO_SLACK)

    @classmethod
    def from_decomposition(cls, decomposition: Decomposition, rank: int | None = None,
                           oversample: int = 10) -> "StreamingSVD":
        """Start an engine from an existing analysis so that more images can be added.

        The engine holds the analysis' k modes (its extra internal directions were not saved),
        its exact mean, image count, total energy and weights; new blocks update all of them.

        Parameters
        ----------
        decomposition : Decomposition
        rank : int, optional
            Modes to report from now on (default: the analysis' rank, at least 1).
        oversample : int, optional
            Extra directions to keep from now on.
        """
        d = decomposition
        engine = cls(d.n_pixels, rank=max(d.rank, 1) if rank is None else rank,
                     oversample=oversample)
        engine.n_seen = d.n_images
        engine.mean = d.mean.astype(np.float64)
        engine.total_energy = float(d.total_energy)
        engine.basis = np.asfortranarray(d.basis, dtype=np.float32)
        engine.singular_values = np.asarray(d.singular_values, dtype=np.float64).copy()
        if d.n_images:
            engine._groups = [_Group([np.asarray(d.weights, dtype=np.float32).copy()],
                                     np.eye(d.rank), np.zeros(d.rank))]
        return engine

    def orthonormal_basis(self) -> np.ndarray:
        """Return the basis orthonormalised for the passes after learning (the basis itself
        when it is within ``_ORTHO_PASSES`` of orthonormal; see ``_ORTHO_SLACK``).

        Returns
        -------
        ndarray, shape (pixels, q), float32, Fortran order
        """
        return np.asfortranarray(_orthonormalised(self.basis, _ORTHO_PASSES))

    def padded_basis(self, seed: int = 0) -> np.ndarray:
        """Return the basis completed to ``internal`` orthonormal columns for refinement passes.

        An engine started from a saved analysis holds only its k modes; subspace iteration needs
        the extra directions, so random ones (seeded, orthogonal to the basis) fill the gap.

        Returns
        -------
        ndarray, shape (pixels, min(internal, pixels)), float32, Fortran order
        """
        basis = self.orthonormal_basis()
        u = np.asarray(basis, dtype=np.float64)
        want = min(self.internal, self.n_pixels)
        if u.shape[1] >= want:
            return np.asfortranarray(basis)
        rng = np.random.default_rng(seed)
        extra = rng.standard_normal((self.n_pixels, want - u.shape[1]))
        for _ in range(2):
            extra -= u @ (u.T @ extra)
            extra, _r = np.linalg.qr(extra)
        return np.asfortranarray(np.hstack([u, extra]).astype(np.float32))

    # ---------------------------------------------------------------------------------------
    def internal_weights(self) -> np.ndarray:
        """Return the weights of every image seen, shape (internal directions, n_seen)."""
        return self.internal_weights_rows(self.basis.shape[1])

    def release_weights(self) -> None:
        """Forget the streaming weights of every image (when exact ones have replaced them).

        The engine's basis, singular values, mean and energy stay; :meth:`snapshot` can no
        longer be asked for afterwards.
        """
        self._groups, self._chunks = [], []
        self._released = True

    def internal_weights_rows(self, rows: int) -> np.ndarray:
        """Return the first ``rows`` internal weights of every image, float64 (a snapshot)."""
        self._flush()
        rows = min(rows, self.basis.shape[1])
        out = np.empty((rows, sum(group.size for group in self._groups)))
        done = 0
        for group in self._groups:
            a, b = group.a[:rows], group.b[:rows, None]
            for piece in group.pieces:
                out[:, done:done + piece.shape[1]] = a @ piece + b
                done += piece.shape[1]
        return out

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
        if self._released:
            raise ValueError("the streaming weights were released after an exact pass")
        self._reorthonormalise_if_needed()
        k = min(self.rank, self.basis.shape[1])
        weights = self.internal_weights_rows(k)
        basis, weights = fix_signs(self.basis[:, :k], weights)
        shape = tuple(image_shape) if image_shape is not None else (self.n_pixels, 1, 1)
        return Decomposition(mean=self.mean.astype(np.float32), basis=np.asfortranarray(basis),
                             singular_values=self.singular_values[:k].copy(), weights=weights,
                             total_energy=float(self.total_energy), image_shape=shape,
                             exact=False, **fields)
