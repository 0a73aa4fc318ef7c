"""Outlier scores of every image at a chosen rank: the residual statistic Q, Hotelling's T^2,
their control limits, and a combined ranking.

Definitions
-----------
For a decomposition of ``n`` images with singular values ``s_1 >= ... >= s_K`` (``K`` =
``decomposition.rank``), the eigenvalues of the sample covariance are
``lambda_j = s_j**2 / (n - 1)``. At rank ``k`` (``0 <= k <= K``):

* **Q** (squared prediction error) of image ``i`` is the squared norm of the part of the centred
  image that the first ``k`` basis images do not explain,
  ``decomposition.residual_at_rank(k)[i]``.
* **T^2** (Hotelling) of image ``i`` is ``sum_{j<=k} w_ij**2 / lambda_j`` over the retained modes.

Control limits at confidence ``level`` (default 0.99, i.e. about 1 % of ordinary images exceed
each limit):

* Q: a named choice made by :func:`core.review.qlimit.q_limit` and reported with its reason
  (``ControlLimits.q_method`` and ``q_reason``): **Jackson and Mudholkar (1979)** from the
  eigenvalues left out when they are known (the model holds every mode, or all the energy);
  otherwise the known eigenvalues of modes k+1..K plus the modes beyond K estimated from the
  images' exact residuals (their sum exactly, their spread by **Box's (1954)** chi-square from
  the mean and variance of the residuals), so that the limit at rank k does not depend on the
  rank the model was built with; **Box** alone when no mode beyond k is held, or when the
  moments give ``h0 <= 0``. Details and formulas are in :mod:`core.review.qlimit`.
* T^2 for images that built the model, **Tracy, Young and Mason (1992)** Beta form
  ``(n-1)**2 / n * Beta_level(k/2, (n-k-1)/2)``.
* T^2 for new images scored against an existing model, the F form
  ``k (n-1) (n+1) / (n (n-k)) * F_level(k, n-k)``.

Combined ranking: ``score = max(Q / Q_limit, T^2 / T^2_limit)`` and ``flag = score > 1``, so an
image is flagged when it exceeds either limit; ``order`` sorts images by score, most unusual
first (ties keep column order).

Edge cases (no NaN, no crash)
-----------------------------
* Modes with no variance (``s_j**2 <= 1e-10 * total_energy``) are left out of T^2; the number of
  modes actually used is ``ControlLimits.t2_rank``.
* T^2 with no usable mode: all zeros, limit 0, never flagged.
* T^2 of model images when ``t2_rank >= n - 1``: the model then fits every model image exactly
  and T^2 is the same for all of them, so its limit is set to its largest possible value
  ``(n-1)**2 / n`` and nothing is flagged by T^2. For new images, ``t2_rank >= n`` gives an
  infinite limit (nothing flagged by T^2).
* Q with no residual variance (the Q limit is at or below the noise level
  ``1e-6 * total_energy / n``, for example ``k >= n - 1`` or a full-rank model at ``k = K``): Q
  carries no information about model images, whose Q ratios are set to 0. A new image whose Q
  is above that noise level is outside a model that explains everything, and its Q ratio is
  ``Q / noise level``. (For a collection without any variation the noise level is ``1e-12``
  of the squared norm of the mean image; when that is 0 too, any positive Q has ratio inf.)

Every such case is described in ``ControlLimits.note``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from modescope.core.decomposition import Decomposition
from modescope.core.review.qlimit import (KNOWN_TAIL_TOLERANCE, Q_METHOD_NAMES, QLimit,
                                          ZERO_MODE_SHARE as _ZERO_MODE_SHARE,
                                          as_float_vector as _as_float_vector,
                                          check_decomposition as _check_decomposition,
                                          check_level as _check_level,
                                          discarded_eigenvalues_known, eigenvalues, q_limit,
                                          q_limit_box, q_limit_jackson_mudholkar)
from modescope.core.validation import check_int

__all__ = [
    "ControlLimits", "OutlierTable", "KNOWN_TAIL_TOLERANCE", "Q_METHOD_NAMES", "QLimit",
    "eigenvalues", "discarded_eigenvalues_known", "q_limit", "q_limit_jackson_mudholkar",
    "q_limit_box", "t2_limit_beta", "t2_limit_f", "hotelling_t2", "score_table", "score_new",
]

#: Q noise level as a fraction of the mean squared centred image norm.
_Q_NOISE_SHARE = 1e-6

T2_METHODS = ("beta", "f")


@dataclass(frozen=True)
class ControlLimits:
    """Control limits of Q and T^2 at one rank and confidence level.

    Attributes
    ----------
    level : float
        Confidence level in (0, 1).
    rank : int
        Number of retained modes k.
    q_limit : float
        Limit of Q; 0 when the model leaves no residual variance.
    q_method : str
        ``"jackson-mudholkar"`` (the eigenvalues left out are known),
        ``"jackson-mudholkar-estimated-tail"`` (known eigenvalues plus the modes beyond the
        model's rank estimated from the residuals) or ``"box"`` (chi-square from the moments);
        display names in ``Q_METHOD_NAMES``.
    t2_limit : float
        Limit of T^2 (0 when no mode has variance, inf for new images when ``t2_rank >= n``).
    t2_method : str
        ``"beta"`` (images that built the model) or ``"f"`` (new images).
    t2_rank : int
        Modes actually used in T^2 (the retained modes with non-zero variance), <= rank.
    q_informative : bool
        False when the model leaves no residual variance to compare against.
    t2_informative : bool
        False when T^2 cannot separate images (no usable mode, or the model fits every model
        image exactly).
    note : str
        Plain-language explanation of any edge case met; empty when none.
    q_reason : str
        Why the Q limit method was chosen, in plain words (one sentence, no final full stop).
    """

    level: float
    rank: int
    q_limit: float
    q_method: str
    t2_limit: float
    t2_method: str
    t2_rank: int = 0
    q_informative: bool = True
    t2_informative: bool = True
    note: str = ""
    q_reason: str = ""


@dataclass(frozen=True, eq=False)
class OutlierTable:
    """Outlier statistics of a set of images at one rank.

    Attributes
    ----------
    rank : int
        Number of retained modes k.
    level : float
        Confidence level of the limits.
    limits : ControlLimits
    q : ndarray, shape (n,), float64
        Residual statistic Q of each image (clipped at 0).
    t2 : ndarray, shape (n,), float64
        Hotelling's T^2 of each image.
    score : ndarray, shape (n,), float64
        ``max(q_ratio, t2_ratio)``; above 1 means beyond at least one limit.
    flag : ndarray, shape (n,), bool
        ``score > 1``.
    q_flag, t2_flag : ndarray, shape (n,), bool
        ``q_ratio > 1`` and ``t2_ratio > 1``.
    order : ndarray, shape (n,), int
        Image indices sorted by score, most unusual first (stable for ties).
    q_ratio, t2_ratio : ndarray, shape (n,), float64
        Q and T^2 relative to their limits, with the edge-case rules of the module docstring.
    """

    rank: int
    level: float
    limits: ControlLimits
    q: np.ndarray
    t2: np.ndarray
    score: np.ndarray
    flag: np.ndarray
    q_flag: np.ndarray
    t2_flag: np.ndarray
    order: np.ndarray
    q_ratio: np.ndarray
    t2_ratio: np.ndarray

    @property
    def n_images(self) -> int:
        """Number of images scored."""
        return int(self.q.shape[0])

    @property
    def n_flagged(self) -> int:
        """Number of images flagged."""
        return int(np.count_nonzero(self.flag))

    def flagged_indices(self) -> np.ndarray:
        """Return the indices of flagged images, most unusual first."""
        return self.order[self.flag[self.order]]


# ----- T^2 limits ---------------------------------------------------------------------------


def t2_limit_beta(n: int, k: int, level: float = 0.99) -> float:
    """Return the T^2 limit for images that built the model (Tracy, Young and Mason 1992).

    ``(n-1)**2 / n * Beta_level(k/2, (n-k-1)/2)``, the ``level`` quantile of the Beta
    distribution.

    Parameters
    ----------
    n : int
        Number of images in the model.
    k : int
        Number of retained modes, 1 <= k <= n - 2.
    level : float
        Confidence level in (0, 1), default 0.99.

    Returns
    -------
    float

    Raises
    ------
    TypeError, ValueError
        If ``n`` or ``k`` is not an integer or out of range, or ``level`` is outside (0, 1).
    """
    level = _check_level(level)
    n = check_int("n", n, minimum=3)
    k = check_int("k", k, minimum=1, maximum=n - 2)
    return float((n - 1) ** 2 / n * stats.beta.ppf(level, k / 2.0, (n - k - 1) / 2.0))


def t2_limit_f(n: int, k: int, level: float = 0.99) -> float:
    """Return the T^2 limit for new images scored against an existing model.

    ``k (n-1) (n+1) / (n (n-k)) * F_level(k, n-k)``, the ``level`` quantile of the F
    distribution.

    Parameters
    ----------
    n : int
        Number of images in the model.
    k : int
        Number of retained modes, 1 <= k <= n - 1.
    level : float
        Confidence level in (0, 1), default 0.99.

    Returns
    -------
    float

    Raises
    ------
    TypeError, ValueError
        If ``n`` or ``k`` is not an integer or out of range, or ``level`` is outside (0, 1).
    """
    level = _check_level(level)
    n = check_int("n", n, minimum=2)
    k = check_int("k", k, minimum=1, maximum=n - 1)
    return float(k * (n - 1) * (n + 1) / (n * (n - k)) * stats.f.ppf(level, k, n - k))


def hotelling_t2(weights, singular_values, n: int) -> np.ndarray:
    """Return Hotelling's T^2 of images from their weights over k retained modes.

    ``T2_i = sum_j weights[j, i]**2 / lambda_j`` with ``lambda_j = s_j**2 / (n - 1)``.

    Parameters
    ----------
    weights : array_like, shape (k, m)
        Coordinates of m images along the k retained basis images.
    singular_values : array_like, shape (k,)
        Positive singular values of the retained modes.
    n : int
        Number of images the model was built from, n >= 2.

    Returns
    -------
    ndarray, shape (m,), float64
        Zeros when k is 0.

    Raises
    ------
    TypeError
        If the inputs are not numbers.
    ValueError
        If the shapes disagree, a singular value is not positive, or a value is not finite.
    """
    n = check_int("n", n, minimum=2)
    w = _as_float_vector("weights", weights, ndim=2)
    s = _as_float_vector("singular_values", singular_values)
    if w.shape[0] != s.shape[0]:
        raise ValueError(f"weights must have {s.shape[0]} rows (one per singular value), got "
                         f"shape {w.shape}")
    if np.any(s <= 0):
        raise ValueError("singular_values must be positive, got minimum "
                         f"{float(s.min())!r}; leave modes with no variance out")
    lam = s ** 2 / (n - 1)
    return np.sum(w ** 2 / lam[:, None], axis=0)


# ----- scoring -----------------------------------------------------------------------------

def _resolve_rank(decomposition: Decomposition, rank) -> int:
    if rank is None:
        return decomposition.rank
    return check_int("rank", rank, minimum=0, maximum=decomposition.rank)


def _usable_modes(decomposition: Decomposition, k: int) -> int:
    """Number of leading modes among the first k with non-zero variance."""
    s = np.asarray(decomposition.singular_values[:k], dtype=np.float64)
    total = float(decomposition.total_energy)
    ok = s ** 2 > _ZERO_MODE_SHARE * total if total > 0 else np.zeros(k, dtype=bool)
    ok &= s > 0
    bad = np.flatnonzero(~ok)
    return int(bad[0]) if bad.size else int(k)


def _q_noise(decomposition: Decomposition) -> float:
    """Noise level of Q: 1e-6 of the mean squared centred image norm, or, for a collection
    with no variation at all, 1e-12 of the squared norm of the mean image."""
    total = max(float(decomposition.total_energy), 0.0)
    if total > 0:
        return _Q_NOISE_SHARE * total / decomposition.n_images
    mean = np.asarray(decomposition.mean, dtype=np.float64)
    return 1e-12 * float(mean @ mean)


def _limits(decomposition: Decomposition, k: int, level: float, new: bool
            ) -> tuple[ControlLimits, int]:
    n = decomposition.n_images
    notes = []
    q = q_limit(decomposition, k, level)
    q_limit_value = q.value
    q_informative = q_limit_value > _q_noise(decomposition)
    if not q_informative:
        notes.append("Q: the model leaves no residual variance at this rank, so Q cannot "
                     "separate the model's images")
    k_eff = _usable_modes(decomposition, k)
    if k_eff < k:
        notes.append(f"T2: {k - k_eff} of the {k} retained modes have no variance and are left "
                     "out")
    t2_informative = True
    if k_eff == 0:
        t2_limit, t2_informative = 0.0, False
        notes.append("T2: no retained mode has variance; T2 is 0 for every image" if k > 0
                     else "T2: rank 0 retains no mode; T2 is 0 for every image")
    elif not new:
        if k_eff >= n - 1:
            t2_limit, t2_informative = (n - 1) ** 2 / n, False
            notes.append(f"T2: at rank {k_eff} >= n - 1 = {n - 1} the model fits every model "
                         "image exactly, so T2 cannot separate them")
        else:
            t2_limit = t2_limit_beta(n, k_eff, level)
    else:
        if k_eff >= n:
            t2_limit, t2_informative = math.inf, False
            notes.append(f"T2: at rank {k_eff} >= n = {n} the F limit does not exist")
        else:
            t2_limit = t2_limit_f(n, k_eff, level)
    limits = ControlLimits(level=level, rank=k, q_limit=float(q_limit_value), q_method=q.method,
                           t2_limit=float(t2_limit), t2_method="f" if new else "beta",
                           t2_rank=k_eff, q_informative=bool(q_informative),
                           t2_informative=bool(t2_informative), note="; ".join(notes),
                           q_reason=q.reason)
    return limits, k_eff


def _table(decomposition, k, level, limits, k_eff, weights, q, new) -> OutlierTable:
    q = np.maximum(np.asarray(q, dtype=np.float64), 0.0)
    m = q.shape[0]
    if k_eff > 0:
        t2 = hotelling_t2(weights[:k_eff], decomposition.singular_values[:k_eff],
                          decomposition.n_images)
    else:
        t2 = np.zeros(m)
    if limits.q_informative:
        q_ratio = q / limits.q_limit
    elif new:
        noise = _q_noise(decomposition)
        if noise > 0:
            q_ratio = np.where(q > noise, q / noise, 0.0)
        else:   # black images without variation: any residual at all is outside the model
            q_ratio = np.where(q > 0, np.inf, 0.0)
    else:
        q_ratio = np.zeros(m)
    if limits.t2_informative:
        t2_ratio = t2 / limits.t2_limit
    else:
        t2_ratio = np.zeros(m)
    score = np.maximum(q_ratio, t2_ratio)
    order = np.argsort(-score, kind="stable")
    return OutlierTable(rank=k, level=level, limits=limits, q=q, t2=t2, score=score,
                        flag=score > 1.0, q_flag=q_ratio > 1.0, t2_flag=t2_ratio > 1.0,
                        order=order, q_ratio=q_ratio, t2_ratio=t2_ratio)


def score_table(decomposition: Decomposition, rank: int | None = None,
                level: float = 0.99) -> OutlierTable:
    """Score every image of a decomposition at rank k.

    Q is ``decomposition.residual_at_rank(k)``; its limit is the named choice of
    :func:`core.review.qlimit.q_limit` (see the module docstring). T^2 uses the
    Beta limit for images that built the model. ``score = max(Q/Q_limit, T2/T2_limit)``,
    ``flag = score > 1``.

    Parameters
    ----------
    decomposition : Decomposition
        With residuals (after the scoring pass) and at least 2 images.
    rank : int, optional
        Retained modes k, 0..K (default K = ``decomposition.rank``).
    level : float
        Confidence level in (0, 1), default 0.99.

    Returns
    -------
    OutlierTable

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition or ``rank``/``level`` are not numbers.
    ValueError
        If the decomposition has no residuals or fewer than 2 images, ``rank`` is outside
        0..K, or ``level`` is outside (0, 1).
    """
    d = _check_decomposition(decomposition)
    k = _resolve_rank(d, rank)
    level = _check_level(level)
    if d.residual is None:
        raise ValueError("this decomposition has no residuals yet (a streaming snapshot): run "
                         "the scoring pass before computing outlier scores")
    limits, k_eff = _limits(d, k, level, new=False)
    weights = np.asarray(d.weights[:k], dtype=np.float64)
    return _table(d, k, level, limits, k_eff, weights, d.residual_at_rank(k), new=False)


def score_new(decomposition: Decomposition, weights, residual, rank: int | None = None,
              level: float = 0.99) -> OutlierTable:
    """Score new images against an existing model at rank k.

    Q of a new image at rank k is its residual at the model's rank K plus the squared weights
    of modes k+1..K. The Q limit is the model's (as in :func:`score_table`); T^2 uses the F
    limit for new observations.

    Parameters
    ----------
    decomposition : Decomposition
        The model, with at least 2 images (and residuals when it is truncated: the Q limit
        estimates the modes beyond its rank from them).
    weights : array_like, shape (K, m)
        Coordinates of m new images along all K basis images of the model.
    residual : array_like, shape (m,)
        Squared residual norm of each new image outside the span of all K basis images.
    rank : int, optional
        Retained modes k, 0..K (default K).
    level : float
        Confidence level in (0, 1), default 0.99.

    Returns
    -------
    OutlierTable

    Raises
    ------
    TypeError
        If an input has the wrong type.
    ValueError
        If the shapes disagree with the model, a value is not finite, or ``rank``/``level``
        are out of range.
    """
    d = _check_decomposition(decomposition)
    k = _resolve_rank(d, rank)
    level = _check_level(level)
    w = _as_float_vector("weights", weights, ndim=2)
    if w.shape[0] != d.rank:
        raise ValueError(f"weights must have {d.rank} rows (one per basis image of the model), "
                         f"got shape {w.shape}")
    res = _as_float_vector("residual", residual)
    if res.shape != (w.shape[1],):
        raise ValueError(f"residual must have shape ({w.shape[1]},) to match weights, got "
                         f"{res.shape}")
    q = res + np.sum(w[k:] ** 2, axis=0)
    limits, k_eff = _limits(d, k, level, new=True)
    return _table(d, k, level, limits, k_eff, w[:k], q, new=True)
