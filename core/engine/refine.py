"""Refinement passes over the data, each ending in a Rayleigh-Ritz step with a certificate.

The streaming pass leaves an orthonormal basis ``U`` (pixels x q, q = rank + oversample) close
to the leading left singular subspace of the centred data ``A = X - mean``. Each refinement pass
reads every image once (from the block cache when it holds them, otherwise from the files) and
accumulates, for ``M = A A^T``:

* ``W = U^T A`` (q x images): the exact coordinates of every image in ``span(U)``;
* ``Y = M U = A W^T`` (pixels x q): one step of subspace (block power) iteration;
* the squared norm of every centred image and of its part outside ``span(U)``.

The Rayleigh-Ritz step takes the eigendecomposition ``W W^T = V diag(theta) V^T``: the Ritz
vectors ``U V`` with singular values ``sqrt(theta)`` and weights ``V^T W`` are the best rank-q
description of the data within ``span(U)`` (exact for that subspace). Their residuals
``r_i = M u_i - theta_i u_i`` come from ``Y`` at no extra pass; :func:`certify` turns them into a
bound for every singular value. When a reported mode is not yet within the tolerance, the next
basis is ``orth(Y V diag(theta)^-1)`` (subspace iteration, Golub and Van Loan, "Matrix
Computations", 4th ed., Sec. 8.2.4) and another pass follows, up to a pass limit.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Callable

import numpy as np

from modescope.core.decomposition import fix_signs

__all__ = ["PassAccumulator", "RitzStep", "Workspace", "angle_bounds", "certify", "columns_into",
           "rayleigh_ritz_step", "project_block", "rounding_error", "row_energy"]

# unit roundoff of float32 (2**-24): the pixel-sized products run in float32
_U32 = float(np.finfo(np.float32).eps) / 2


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

    Examples
    --------
    >>> import numpy as np
    >>> basis = np.eye(3, 1)                      # the first pixel only
    >>> w, res, energy = project_block(basis, np.zeros(3), np.array([[1.0], [2.0], [2.0]]))
    >>> w.tolist(), res.tolist(), energy.tolist()
    ([[1.0]], [8.0], [9.0])
    """
    w, res, energy, _ = _project_rows(np.asarray(basis, dtype=np.float32),
                                      np.asarray(mean, dtype=np.float32), block, want_y=False)
    return w.astype(np.float64), res, energy


def _project_rows(basis: np.ndarray, mean: np.ndarray, block: np.ndarray, want_y: bool):
    # one row per image (C order), so that the products and the subtraction share a layout
    rows = np.ascontiguousarray(np.asarray(block).T, dtype=np.float32)     # m x pixels
    return _project_centred(basis, rows - mean, want_y, None)


def _project_centred(basis: np.ndarray, centred: np.ndarray, want_y: bool,
                     work: "Workspace | None"):
    """The products of :func:`_project_rows` on centred rows (overwritten by the remainder),
    in ``work``'s arrays when given."""
    m, pixels = centred.shape
    q = basis.shape[1]

    def into(name: str, shape: tuple):
        return None if work is None else work.array(name, shape)

    wt = centred @ basis                                                   # m x q
    energy = row_energy(centred)
    yt = np.matmul(wt.T, centred, out=into("yt", (q, pixels))) if want_y else None
    centred -= np.matmul(wt, basis.T, out=into("product", (m, pixels)))   # now the remainder
    residual = row_energy(centred)
    return wt.T, residual, energy, yt


def columns_into(data: np.ndarray, out: np.ndarray) -> None:
    """Write a column block (pixels x m) into ``out`` as rows (m x pixels, float32)."""
    out[...] = data.T


class Workspace:
    """Float32 arrays one thread of a pass reuses from block to block.

    A fresh array per block and product costs page faults every time (the memory of a thread
    other than the main one goes back to the system when freed): 65,000 of them in one pass over
    5,000 cached 128x128 images, measured here; with the arrays kept, a few hundred.
    """

    def __init__(self):
        self._arrays: dict[str, np.ndarray] = {}

    def array(self, name: str, shape: tuple) -> np.ndarray:
        """Return the array ``name`` of ``shape`` (contents undefined)."""
        found = self._arrays.get(name)
        if found is None or found.shape != shape:
            found = self._arrays[name] = np.empty(shape, dtype=np.float32)
        return found


_ENERGY_CHUNK = 1024   # pixels summed in float32 before the float64 sum


def row_energy(rows: np.ndarray) -> np.ndarray:
    """Return the squared norm of each row of a float32 matrix, shape (m,), float64.

    Runs of ``_ENERGY_CHUNK`` pixels are summed in float32 and the partial sums in float64:
    the relative error stays near ``sqrt(1024) * 2**-24`` (about 2e-6 at worst, 1e-7 measured),
    at a quarter of the time of converting every product to float64 first.

    Examples
    --------
    >>> row_energy(np.array([[3.0, 4.0], [1.0, 0.0]], dtype=np.float32)).tolist()
    [25.0, 1.0]
    """
    rows = np.asarray(rows, dtype=np.float32)
    m, p = rows.shape
    full = p - p % _ENERGY_CHUNK
    out = np.zeros(m)
    if full and rows.flags.c_contiguous:
        runs = np.lib.stride_tricks.as_strided(
            rows, shape=(m, full // _ENERGY_CHUNK, _ENERGY_CHUNK),
            strides=(rows.strides[0], _ENERGY_CHUNK * rows.itemsize, rows.itemsize),
            writeable=False)
        out += np.einsum("ijk,ijk->ij", runs, runs).sum(axis=1, dtype=np.float64)
    else:
        full = 0
    if full < p:
        rest = rows[:, full:]
        out += np.einsum("ij,ij->i", rest, rest, dtype=np.float64)
    return out


class PassAccumulator:
    """Collect one pass over the data block by block: weights, ``M U``, residuals, energies.

    Parameters
    ----------
    basis : ndarray, shape (pixels, q)
        Orthonormal columns.
    mean : ndarray, shape (pixels,)
    n_images : int
        Number of columns that will be added in total.
    want_y : bool, optional
        Also accumulate ``Y = A A^T basis`` (needed for the certificate and the next
        iteration; default True).
    """

    def __init__(self, basis: np.ndarray, mean: np.ndarray, n_images: int,
                 want_y: bool = True):
        self.basis = np.asfortranarray(basis, dtype=np.float32)
        self.mean = np.asarray(mean, dtype=np.float32)
        q, pixels = basis.shape[1], basis.shape[0]
        # float32: the products that make them are float32 already (half the memory per image)
        self.weights = np.zeros((q, n_images), dtype=np.float32)
        self.residual = np.zeros(n_images)
        self.energy = np.zeros(n_images)
        # per block in float32 (m terms), summed over blocks in float64
        self.yt = np.zeros((q, pixels)) if want_y else None
        self.done = 0

    def add(self, block: np.ndarray) -> None:
        """Project the next block of columns (in order), shape (pixels, m)."""
        self.fill(functools.partial(columns_into, block), self.reserve(block.shape[1]),
                  self.yt, Workspace())

    def reserve(self, m: int) -> slice:
        """Return the columns of the next ``m`` images (in order) for :meth:`fill`."""
        if self.done + m > self.weights.shape[1]:
            raise ValueError(f"more columns than announced: {self.done + m} > "
                             f"{self.weights.shape[1]}")
        self.done += m
        return slice(self.done - m, self.done)

    def fill(self, put: Callable[[np.ndarray], None], columns: slice, yt: np.ndarray | None,
             work: Workspace) -> None:
        """Project a block into the ``columns`` reserved for it and add its share of ``M U``
        to ``yt`` (``self.yt`` or another array of its shape; None without ``want_y``).

        ``put`` writes the block's images as rows into the float32 array (m x pixels) it is
        given (one of ``work``'s). Blocks given to different ``yt`` arrays and workspaces may
        be filled at the same time from several threads (the products release the interpreter
        lock); the caller adds those arrays into ``self.yt`` when every block is in.
        """
        rows = work.array("centred", (columns.stop - columns.start, self.basis.shape[0]))
        put(rows)
        rows -= self.mean
        w, res, en, part = _project_centred(self.basis, rows, yt is not None, work)
        self.weights[:, columns] = w
        self.residual[columns] = res
        self.energy[columns] = en
        if part is not None:
            yt += part


def certify(singular_values: np.ndarray, residual_norms: np.ndarray,
            rounding: float = 0.0) -> np.ndarray:
    """Return an upper bound of ``|computed - true|`` for each singular value.

    For the symmetric matrix ``M = A A^T``, a unit Ritz vector ``u_i`` and its Ritz value
    ``theta_i = u_i^T M u_i`` with residual ``r_i = ||M u_i - theta_i u_i||``:

    * some eigenvalue ``lambda`` lies within ``r_i`` of ``theta_i`` (the residual bound for
      symmetric matrices; Parlett, "The Symmetric Eigenvalue Problem", Thm 4.5.1; Golub and
      Van Loan, "Matrix Computations", 4th ed., Thm 8.1.13);
    * when no other eigenvalue lies within ``delta_i`` of ``theta_i``, that eigenvalue is
      within ``r_i**2 / delta_i`` (the Kato-Temple inequality; Parlett Thm 11.7.1). Here
      ``delta_i`` is estimated from the other Ritz values: the distance to the nearest other
      ``theta_j`` less its ``r_j`` (each such interval holds an eigenvalue), and to
      ``theta_q + r_q`` for the eigenvalues beyond the subspace (an estimate: the subspace
      iteration finds the largest ones first). The sharper bound is used only when
      ``delta_i > r_i``.

    With ``sigma = sqrt(lambda)`` and ``s = sqrt(theta) > 0``,
    ``|sigma - s| = |lambda - theta| / (sigma + s) <= e_i / s``. Ritz values never exceed the
    matching eigenvalues (Cauchy interlacing, Parlett Thm 10.1.1), so ``s_i`` is a lower bound
    of ``sigma_i`` and the bound is matched to mode ``i`` while no mode above it is missing from
    the subspace.

    Parameters
    ----------
    singular_values : ndarray, shape (q,)
        Ritz singular values ``s_i = sqrt(theta_i)``, non-negative, descending.
    residual_norms : ndarray, shape (q,)
        ``||M u_i - theta_i u_i||`` of each Ritz vector.
    rounding : float, optional
        Absolute error of the float32 products (added to every bound).

    Returns
    -------
    ndarray, shape (q,), float64
        ``e_i / s_i + rounding``; ``sqrt(e_i) + rounding`` where ``s_i`` is 0 (then
        ``sigma = sqrt(lambda) <= sqrt(e_i)``).

    Examples
    --------
    Two well separated values: the gap makes the bound quadratic in the residual.

    >>> certify(np.array([2.0, 1.0]), np.array([1e-4, 1e-3])).tolist()
    [1.66...e-09, 0.001]
    """
    s = np.asarray(singular_values, dtype=np.float64)
    r = np.asarray(residual_norms, dtype=np.float64)
    e = np.minimum(r, _gap_bound(s ** 2, r))
    with np.errstate(divide="ignore", invalid="ignore"):
        bound = np.where(s > 0, e / np.where(s > 0, s, 1.0), np.sqrt(e))
    return bound + float(rounding)


def _gaps(theta: np.ndarray, r: np.ndarray) -> np.ndarray:
    """Estimated distance ``delta_i`` from each ``theta_i`` to every other eigenvalue.

    The nearest other Ritz value less its residual, and the estimated top of the spectrum
    beyond the subspace (``theta_q + r_q``); ``-inf`` for the last one (nothing known past it).
    """
    q = theta.size
    out = np.full(q, -np.inf)
    if q < 2:
        return out
    beyond = theta[-1] + r[-1]
    for i in range(q - 1):
        others = np.delete(np.arange(q), i)
        out[i] = min(float(np.min(np.abs(theta[i] - theta[others]) - r[others])),
                     float(theta[i] - beyond))
    return out


def _gap_bound(theta: np.ndarray, r: np.ndarray) -> np.ndarray:
    """Kato-Temple bound ``r_i**2 / delta_i`` where ``delta_i > r_i``, else infinity."""
    delta = _gaps(theta, r)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(delta > r, r ** 2 / np.where(delta > 0, delta, 1.0), np.inf)


def angle_bounds(singular_values: np.ndarray, residual_norms: np.ndarray) -> np.ndarray:
    """Return a bound of the sine of the angle between each Ritz vector and its true vector.

    Davis-Kahan sin(theta) theorem (Davis and Kahan, SIAM J. Numer. Anal. 7, 1970; Parlett,
    "The Symmetric Eigenvalue Problem", Thm 11.7.1's corollary): ``sin angle <= r_i /
    delta_i`` with the gap ``delta_i`` estimated as in :func:`certify`. NaN where the vector is
    not determined on its own: its Ritz value lies within a relative 1e-3 of another one (a
    near-degenerate pair, where only the pair's plane is meaningful); infinity where the gap is
    not yet known to exceed the residual.
    """
    s = np.asarray(singular_values, dtype=np.float64)
    r = np.asarray(residual_norms, dtype=np.float64)
    theta = s ** 2
    delta = _gaps(theta, r)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(delta > r, r / np.where(delta > 0, delta, 1.0), np.inf)
    for i in range(theta.size - 1):
        near = np.abs(np.delete(theta, i) - theta[i]) < 1e-3 * theta[i]
        if near.any():
            out[i] = np.nan
    return out


def rounding_error(n_pixels: int, n_images: int, centred_norm: float, mean_norm: float) -> float:
    """Return the error budget of the float32 products, absolute, added to every bound.

    A first-order estimate, not a proof. Probabilistic rounding-error analysis (Higham and Mary,
    "A new approach to probabilistic rounding error analysis", SIAM J. Sci. Comput. 41, 2019)
    gives a float32 inner product of length p an error of about ``sqrt(p) u`` relative to the
    product of the norms (u = 2**-24); a perturbation of the weights moves a singular value by
    about the size of one entry's error projected on the singular pair, i.e. the error of an
    image of typical norm ``||A||_F / sqrt(n)``. Rounding the mean to float32 adds the same
    error ``u |mean|`` to every image: a rank-one perturbation of norm ``u sqrt(n) ||mean||``
    (Weyl's inequality). A factor 4 is kept as a margin (our own choice, no published source).

    Parameters
    ----------
    n_pixels, n_images : int
    centred_norm : float
        ``||X - mean||_F`` (square root of the total energy).
    mean_norm : float
        ``||mean||``.
    """
    n = max(int(n_images), 1)
    return 4.0 * _U32 * (np.sqrt(float(n_pixels)) * float(centred_norm) / np.sqrt(n)
                         + np.sqrt(n) * float(mean_norm))


@dataclass(frozen=True)
class RitzStep:
    """One Rayleigh-Ritz step on the sums of a pass.

    Attributes
    ----------
    basis : ndarray, shape (pixels, q), float32
        Ritz vectors, descending singular value, signs fixed.
    singular_values : ndarray, shape (q,)
    rotation : ndarray, shape (q, q)
        Rows turn the pass's coordinates into Ritz coordinates (signs fixed): the weights are
        ``rotation @ pass_weights``, formed only for the modes kept (:meth:`truncate`).
    pass_weights : ndarray, shape (q, n), float32
        Exact coordinates of every image in the pass's basis.
    error : ndarray, shape (q,)
        :func:`certify` bound of each singular value.
    angle : ndarray, shape (q,)
        :func:`angle_bounds` of each Ritz vector (NaN: not determined on its own).
    outside : ndarray, shape (n,)
        Squared norm of each centred image outside ``span(basis)``.
    step_rows : ndarray, shape (q, pixels), float64
        ``M`` applied to the Ritz vectors (as rows), scaled by their Ritz values: the rows
        whose span is the next basis (:meth:`next_basis`).
    """

    basis: np.ndarray
    singular_values: np.ndarray
    rotation: np.ndarray
    pass_weights: np.ndarray
    error: np.ndarray
    angle: np.ndarray
    outside: np.ndarray
    step_rows: np.ndarray

    def next_basis(self) -> np.ndarray:
        """Return the orthonormal basis for the next pass (one subspace-iteration step).

        Made only when another pass follows (the orthonormalisation is a small SVD of a
        q x pixels matrix).
        """
        return np.asfortranarray(_orthonormal_rows(self.step_rows).T)

    def truncate(self, rank: int):
        """Return (basis, singular values, weights, residual, error) of the first ``rank``.

        The residual of an image outside the first ``rank`` modes is its part outside the
        subspace plus its squared Ritz coordinates beyond ``rank`` (formed chunk by chunk, never
        for all images at once).
        """
        k = min(rank, self.singular_values.size)
        weights = _rotated64(self.rotation[:k], self.pass_weights)
        beyond = np.zeros(weights.shape[1])
        if k < self.rotation.shape[0]:
            for start in range(0, weights.shape[1], _CHUNK):
                sl = slice(start, start + _CHUNK)
                rest = self.rotation[k:] @ self.pass_weights[:, sl].astype(np.float64)
                beyond[sl] = np.sum(rest ** 2, axis=0)
        residual = self.outside + beyond
        return (np.asfortranarray(self.basis[:, :k]), self.singular_values[:k].copy(),
                weights, residual, self.error[:k].copy())


def rayleigh_ritz_step(acc: PassAccumulator, rounding: float = 0.0) -> RitzStep:
    """Rotate the pass's basis to Ritz vectors, certify them and prepare the next basis.

    Parameters
    ----------
    acc : PassAccumulator
        A complete pass (every image added) with ``want_y``.
    rounding : float, optional
        See :func:`certify`.

    Returns
    -------
    RitzStep
    """
    u = acc.basis                                            # pixels x q, float32
    lam, vec = np.linalg.eigh(_gram64(acc.weights))          # W W^T = V diag(theta) V^T
    order = np.argsort(lam)[::-1]
    theta, vec = np.maximum(lam[order], 0.0), vec[:, order]
    sv = np.sqrt(theta)
    ritz_rows = vec.T.astype(np.float32) @ u.T               # q x pixels: Ritz vectors as rows
    vt_yt = vec.T @ acc.yt                                    # rows of M U V, float64
    res_rows = vt_yt - theta[:, None] * ritz_rows
    res_norms = np.linalg.norm(res_rows, axis=1)
    error = certify(sv, res_norms, rounding)
    angle = angle_bounds(sv, res_norms)
    del res_rows
    positive = theta > 0
    vt_yt[positive] /= theta[positive, None]          # in place: M u_i / theta_i
    vt_yt[~positive] = ritz_rows[~positive]
    basis, signed = fix_signs(np.ascontiguousarray(ritz_rows.T), vec.T)
    return RitzStep(basis=np.asfortranarray(basis), singular_values=sv, rotation=signed,
                    pass_weights=acc.weights, error=error, angle=angle,
                    outside=acc.residual.copy(), step_rows=vt_yt)


_CHUNK = 8192   # images per float64 chunk when float32 weights are combined


def _gram64(w32: np.ndarray) -> np.ndarray:
    """Return ``W W^T`` accumulated in float64, converting ``_CHUNK`` columns at a time."""
    gram = np.zeros((w32.shape[0], w32.shape[0]))
    for start in range(0, w32.shape[1], _CHUNK):
        part = w32[:, start:start + _CHUNK].astype(np.float64)
        gram += part @ part.T
    return gram


def _rotated64(rot: np.ndarray, w32: np.ndarray) -> np.ndarray:
    """Return ``rot @ W`` in float64 without a float64 copy of the whole of ``W``."""
    out = np.empty((rot.shape[0], w32.shape[1]))
    for start in range(0, w32.shape[1], _CHUNK):
        sl = slice(start, start + _CHUNK)
        out[:, sl] = rot @ w32[:, sl].astype(np.float64)
    return out


def _orthonormal_rows(rows: np.ndarray) -> np.ndarray:
    """Return float32 orthonormal rows spanning the numerical row space of ``rows``."""
    rows = np.asarray(rows, dtype=np.float64)
    _, s, vt = np.linalg.svd(rows, full_matrices=False)
    keep = s > (s[0] * 1e-10 if s.size else 0.0)
    return vt[keep].astype(np.float32)
