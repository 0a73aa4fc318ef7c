"""The result type shared by every part of Modescope: a mean-centred truncated SVD of a
collection of images.

Conventions
-----------
* The data matrix ``X`` has one column per image and one row per pixel value. A pixel vector is
  the C-order ravel of the image array of shape ``(rows, cols, channels)``: for RGB the three
  channel values of a pixel are adjacent. Values are float32 scaled to [0, 1].
* ``mean`` is the column mean of ``X``; the centred matrix is ``C = X - mean[:, None]``.
* ``C ~= basis @ diag(singular_values) @ Vt`` and ``weights = basis.T @ C`` (= ``diag(s) @ Vt``),
  so ``weights[j, i]`` is the coordinate of image ``i`` along basis image ``j``.
* Sign convention: every basis image is flipped so that its entry of largest magnitude is
  positive (ties broken by the lowest pixel index); weights flip with it.
* ``total_energy`` is ``||C||_F**2`` over every image seen, exact even when the SVD is truncated,
  so energy shares ``s**2 / total_energy`` are exact fractions of the whole.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from modescope.core.validation import check_int

__all__ = ["Decomposition", "fix_signs"]


def fix_signs(basis: np.ndarray, weights: np.ndarray | None = None):
    """Flip each basis column so that its entry of largest magnitude is positive.

    Parameters
    ----------
    basis : ndarray, shape (pixels, k)
        Orthonormal columns.
    weights : ndarray, shape (k, images), optional
        Rows are flipped together with the basis columns.

    Returns
    -------
    basis, weights : ndarray
        New arrays (the inputs are not modified); ``weights`` is None when not given.
    """
    if basis.shape[1] == 0:
        return basis.copy(), None if weights is None else weights.copy()
    idx = np.argmax(np.abs(basis), axis=0)
    signs = np.sign(basis[idx, np.arange(basis.shape[1])])
    signs[signs == 0] = 1
    signs = signs.astype(basis.dtype)
    new_basis = basis * signs[None, :]
    new_weights = None if weights is None else weights * signs[:, None].astype(weights.dtype)
    return new_basis, new_weights


@dataclass(frozen=True, eq=False)
class Decomposition:
    """A mean-centred truncated SVD of an image collection.

    Attributes
    ----------
    mean : ndarray, shape (pixels,), float32
        Mean image, raveled.
    basis : ndarray, shape (pixels, k), float32
        Orthonormal basis images as columns, ranked by singular value.
    singular_values : ndarray, shape (k,), float64
        Non-negative, descending.
    weights : ndarray, shape (k, images), float64
        ``basis.T @ (X - mean)``: the coordinates of every image.
    total_energy : float
        Squared Frobenius norm of the centred data matrix (all images, all directions).
    image_shape : tuple of int
        ``(rows, cols, channels)`` of the analysed images (after any downscale).
    paths : tuple of str
        Source file of each image, in column order.
    pages : ndarray, shape (images,), int
        Page within a multi-page file (0 for single-image files).
    residual : ndarray, shape (images,), float64, or None
        Squared norm of the part of each centred image outside the span of ``basis``. Exact after
        the scoring pass; None for a streaming snapshot.
    exact : bool
        True when weights, residuals and singular values come from the exact scoring pass.
    singular_value_error : ndarray, shape (k,), float64, or None
        Certificate of each singular value: an upper bound of ``|computed - true|`` from the
        residual norms of the Ritz triplets of the last refinement pass (see
        :func:`modescope.core.engine.refine.certify`); None for a streaming snapshot.
    marks : ndarray, shape (images,), int8
        Review marks: 0 not reviewed, 1 reviewed and kept, 2 reviewed and excluded. All zeros
        when not given.
    metadata : dict
        JSON-serialisable extras: options, versions, date, problems, marks.
    """

    mean: np.ndarray
    basis: np.ndarray
    singular_values: np.ndarray
    weights: np.ndarray
    total_energy: float
    image_shape: tuple
    paths: tuple = ()
    pages: np.ndarray | None = None
    residual: np.ndarray | None = None
    exact: bool = False
    marks: np.ndarray | None = None
    metadata: dict = field(default_factory=dict)
    singular_value_error: np.ndarray | None = None

    def __post_init__(self):
        pixels = int(np.prod(self.image_shape))
        k = self.singular_values.shape[0]
        if self.mean.shape != (pixels,):
            raise ValueError(f"mean must have shape ({pixels},) for image_shape "
                             f"{tuple(self.image_shape)}, got {self.mean.shape}")
        if self.basis.shape != (pixels, k):
            raise ValueError(f"basis must have shape ({pixels}, {k}), got {self.basis.shape}")
        if self.weights.ndim != 2 or self.weights.shape[0] != k:
            raise ValueError(f"weights must have shape ({k}, images), got {self.weights.shape}")
        n = self.weights.shape[1]
        if self.paths and len(self.paths) != n:
            raise ValueError(f"paths has {len(self.paths)} entries for {n} images")
        if self.pages is None:
            object.__setattr__(self, "pages", np.zeros(n, dtype=np.int32))
        if self.marks is None:
            object.__setattr__(self, "marks", np.zeros(n, dtype=np.int8))
        elif self.marks.shape != (n,):
            raise ValueError(f"marks must have shape ({n},), got {self.marks.shape}")
        if self.residual is not None and self.residual.shape != (n,):
            raise ValueError(f"residual must have shape ({n},), got {self.residual.shape}")
        if self.singular_value_error is not None and self.singular_value_error.shape != (k,):
            raise ValueError(f"singular_value_error must have shape ({k},), got "
                             f"{self.singular_value_error.shape}")

    # ----- sizes ---------------------------------------------------------------------------
    @property
    def n_images(self) -> int:
        """Number of images (columns of the data matrix)."""
        return int(self.weights.shape[1])

    @property
    def n_pixels(self) -> int:
        """Number of values per image (rows of the data matrix)."""
        return int(self.mean.shape[0])

    @property
    def rank(self) -> int:
        """Number of basis images kept, k."""
        return int(self.singular_values.shape[0])

    # ----- certificate ---------------------------------------------------------------------
    def unconverged_modes(self, tolerance: float) -> np.ndarray:
        """Return the 0-based modes whose certified error exceeds ``tolerance`` (relative).

        A mode ``i`` is converged when ``singular_value_error[i] <= tolerance *
        singular_values[i]``. Without a certificate (a streaming snapshot) every mode counts
        as not converged.

        Parameters
        ----------
        tolerance : float
            Relative tolerance, e.g. 1e-4.

        Returns
        -------
        ndarray of int
        """
        if self.singular_value_error is None:
            return np.arange(self.rank)
        bound = float(tolerance) * self.singular_values
        return np.flatnonzero(~(self.singular_value_error <= bound))

    # ----- energy --------------------------------------------------------------------------
    def energy_shares(self) -> np.ndarray:
        """Return each mode's share of the total centred energy, ``s**2 / total_energy``.

        Returns
        -------
        ndarray, shape (k,)
            Values in [0, 1]; all zeros when the collection has no variation.
        """
        if self.total_energy <= 0:
            return np.zeros(self.rank)
        return np.clip(self.singular_values.astype(np.float64) ** 2 / self.total_energy, 0, 1)

    def cumulative_energy(self) -> np.ndarray:
        """Return the share of total energy captured by the first r modes, for r = 1..k."""
        return np.clip(np.cumsum(self.energy_shares()), 0.0, 1.0)

    # ----- reconstruction ------------------------------------------------------------------
    def _check_rank(self, rank: int | None) -> int:
        if rank is None:
            return self.rank
        return check_int("rank", rank, minimum=0, maximum=self.rank)

    def reconstruct(self, index: int, rank: int | None = None) -> np.ndarray:
        """Return the rank-r reconstruction of image ``index`` as a raveled pixel vector.

        Parameters
        ----------
        index : int
            Column of the image, 0 <= index < n_images.
        rank : int, optional
            Number of modes to use, 0..k (default k). Rank 0 gives the mean.

        Returns
        -------
        ndarray, shape (pixels,), float32
            ``mean + basis[:, :rank] @ weights[:rank, index]``; not clipped to [0, 1].
        """
        index = check_int("index", index, minimum=0, maximum=self.n_images - 1)
        r = self._check_rank(rank)
        w = self.weights[:r, index].astype(np.float32)
        return self.mean + self.basis[:, :r] @ w

    def residual_at_rank(self, rank: int | None = None,
                         index: int | None = None) -> np.ndarray | float:
        """Return each image's squared residual norm at rank r (needs ``residual``).

        Because the basis is orthonormal, the residual at rank r is the residual at k plus the
        squared weights of the modes r+1..k. At rank 0 it is the image's whole centred energy
        ``||x_i - mean||**2``.

        Parameters
        ----------
        rank : int, optional
            Number of modes kept, 0..k (default k).
        index : int, optional
            One image, 0 <= index < n_images: return its residual only (costs O(k), not
            O(k n)). Default: every image.

        Returns
        -------
        ndarray, shape (images,), float64; or float when ``index`` is given

        Raises
        ------
        TypeError
            If ``rank`` or ``index`` is not an integer.
        ValueError
            If ``rank`` or ``index`` is out of range, or the decomposition has no residuals
            (a streaming snapshot).

        Examples
        --------
        >>> import numpy as np
        >>> d = Decomposition(mean=np.zeros(2, np.float32), basis=np.eye(2, dtype=np.float32),
        ...                   singular_values=np.array([3.0, 1.0]),
        ...                   weights=np.array([[3.0, 0.0], [0.0, 1.0]]), total_energy=10.0,
        ...                   image_shape=(1, 2, 1), residual=np.array([0.5, 0.0]))
        >>> d.residual_at_rank(1).tolist()
        [0.5, 1.0]
        >>> d.residual_at_rank(0, index=0)
        9.5
        """
        if self.residual is None:
            raise ValueError("this decomposition has no residuals yet: run the scoring pass")
        r = self._check_rank(rank)
        if index is not None:
            i = check_int("index", index, minimum=0, maximum=self.n_images - 1)
            tail = self.weights[r:, i].astype(np.float64)
            return float(self.residual[i] + np.sum(tail ** 2))
        return self.residual + np.sum(self.weights[r:].astype(np.float64) ** 2, axis=0)

    def to_image(self, vector: np.ndarray) -> np.ndarray:
        """Reshape a raveled pixel vector to ``(rows, cols, channels)``."""
        return np.asarray(vector).reshape(self.image_shape)

    def truncated(self, rank: int) -> "Decomposition":
        """Return a copy keeping only the first ``rank`` modes (residuals adjusted)."""
        r = check_int("rank", rank, minimum=1, maximum=self.rank)
        residual = None if self.residual is None else self.residual_at_rank(r)
        return dataclasses.replace(
            self, basis=np.ascontiguousarray(self.basis[:, :r].T).T,
            singular_values=self.singular_values[:r].copy(),
            weights=self.weights[:r].copy(), residual=residual,
            singular_value_error=(None if self.singular_value_error is None
                                  else self.singular_value_error[:r].copy()))

    def replace(self, **changes: Any) -> "Decomposition":
        """Return a copy with some fields replaced (like :func:`dataclasses.replace`)."""
        return dataclasses.replace(self, **changes)
