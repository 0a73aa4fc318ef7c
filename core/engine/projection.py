"""Exact scoring pass: project every image onto a learned basis, with an optional Rayleigh-Ritz
refinement.

Given an orthonormal basis ``U`` (pixels x q) learned by the streaming pass, one more pass over the
data computes the exact coordinates ``W = U.T (X - mean)`` of every image and the squared norm of
what ``U`` leaves out. The Rayleigh-Ritz step then takes the SVD of the small matrix ``W``
(q x n): ``W = P diag(s) Q.T``. The rotated basis ``U P`` with singular values ``s`` and weights
``P.T W`` is the best rank-q approximation of the data within the span of ``U``: exact for that
subspace, which removes the several-percent error that truncated streaming leaves in the trailing
singular values.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from modescope.core.decomposition import fix_signs

__all__ = ["ProjectionAccumulator", "RitzResult", "project_block", "rayleigh_ritz"]


def project_block(basis: np.ndarray, mean: np.ndarray, block: np.ndarray):
    """Return the weights and squared residual norms of a block of image columns.

    Parameters
    ----------
    basis : ndarray, shape (pixels, q)
        Orthonormal columns.
    mean : ndarray, shape (pixels,)
    block : ndarray, shape (pixels, m)

    Returns
    -------
    weights : ndarray, shape (q, m), float64
    residual : ndarray, shape (m,), float64
        ``||x - mean - basis @ w||**2`` for each column, computed from the difference itself (not
        as a difference of squares, which loses everything when the residual is small).
    centred_energy : ndarray, shape (m,), float64
        ``||x - mean||**2`` of each column.
    """
    # one row per image (C order), so that the product and the subtraction below share a layout
    rows = np.ascontiguousarray(np.asarray(block).T, dtype=np.float32)     # m x pixels
    centred = rows - np.asarray(mean, dtype=np.float32)
    basis = np.asarray(basis, dtype=np.float32)
    wt = centred @ basis                                                   # m x q
    energy = np.einsum("ij,ij->i", centred, centred, dtype=np.float64)
    centred -= wt @ basis.T                                                # now the remainder
    residual = np.einsum("ij,ij->i", centred, centred, dtype=np.float64)
    w = wt.T
    return w.astype(np.float64), residual, energy


class ProjectionAccumulator:
    """Collect exact weights and residuals block by block (the scoring pass).

    Parameters
    ----------
    basis : ndarray, shape (pixels, q)
    mean : ndarray, shape (pixels,)
    n_images : int
        Number of columns that will be added in total.
    """

    def __init__(self, basis: np.ndarray, mean: np.ndarray, n_images: int):
        self.basis = np.asfortranarray(basis, dtype=np.float32)
        self.mean = np.asarray(mean, dtype=np.float32)
        self.weights = np.zeros((basis.shape[1], n_images))
        self.residual = np.zeros(n_images)
        self.energy = np.zeros(n_images)
        self.done = 0

    def add(self, block: np.ndarray) -> None:
        """Project the next block of columns (in order)."""
        m = block.shape[1]
        if self.done + m > self.weights.shape[1]:
            raise ValueError(f"more columns than announced: {self.done + m} > "
                             f"{self.weights.shape[1]}")
        w, res, en = project_block(self.basis, self.mean, block)
        sl = slice(self.done, self.done + m)
        self.weights[:, sl] = w
        self.residual[sl] = res
        self.energy[sl] = en
        self.done += m


@dataclass(frozen=True)
class RitzResult:
    """Result of :func:`rayleigh_ritz`.

    Attributes
    ----------
    basis : ndarray, shape (pixels, k), float32
    singular_values : ndarray, shape (k,)
    weights : ndarray, shape (k, n)
    residual : ndarray, shape (n,)
        Squared residual norm outside the k reported modes.
    """

    basis: np.ndarray
    singular_values: np.ndarray
    weights: np.ndarray
    residual: np.ndarray


def rayleigh_ritz(basis: np.ndarray, weights: np.ndarray, residual: np.ndarray, rank: int,
                  refine: bool = True) -> RitzResult:
    """Rotate a basis by the SVD of the exact projected data and keep ``rank`` modes.

    Parameters
    ----------
    basis : ndarray, shape (pixels, q)
        Orthonormal columns spanning the learned subspace.
    weights : ndarray, shape (q, n)
        Exact coordinates ``basis.T @ (X - mean)``.
    residual : ndarray, shape (n,)
        Squared residual norms outside the span of ``basis``.
    rank : int
        Number of modes to keep, 1 <= rank <= q.
    refine : bool, optional
        When False, keep the basis as it is (no rotation); singular values are then the norms of
        the weight rows, sorted.

    Returns
    -------
    RitzResult
    """
    q = basis.shape[1]
    k = min(rank, q)
    if refine:
        gram = weights @ weights.T                      # q x q, float64
        lam, vec = np.linalg.eigh(gram)
        order = np.argsort(lam)[::-1]
        lam, vec = np.maximum(lam[order], 0.0), vec[:, order]
        rot_basis = np.asarray(basis, dtype=np.float32) @ vec.astype(np.float32)
        new_w = vec.T @ weights
        sv = np.sqrt(lam)
    else:
        norms = np.sqrt(np.sum(weights ** 2, axis=1))
        order = np.argsort(norms)[::-1]
        rot_basis = np.asarray(basis, dtype=np.float32)[:, order]
        new_w = weights[order]
        sv = norms[order]
    extra = np.sum(new_w[k:] ** 2, axis=0)
    b, w = fix_signs(rot_basis[:, :k], new_w[:k])
    return RitzResult(basis=np.asfortranarray(b), singular_values=sv[:k].copy(), weights=w,
                      residual=residual + extra)
