"""The control limit of the residual statistic Q at a chosen rank, with the method named.

Q of an image at rank r is the squared norm of the part of the centred image that the first r
basis images do not explain. If the images are Gaussian, Q is distributed as
``sum_{j>r} lambda_j z_j**2`` (``z_j`` standard normal), where ``lambda_j = s_j**2 / (n - 1)``
are the covariance eigenvalues of the modes left out; the limit needs their moments
``theta_i = sum_{j>r} lambda_j**i``, i = 1, 2, 3.

Which moments are known depends on the model, not on the data; the limit should not. A model of
``K`` modes knows the eigenvalues of modes ``r+1..K`` one by one and, through its per-image
residuals ``Q_K`` (the squared residual norms outside all K modes), something about the modes
beyond K. The limit at rank r is therefore built from the same three moments whatever K is:

* **Known eigenvalues** (modes r+1..K): summed exactly. Modes without variance
  (``s_j**2 <= 1e-10 * total_energy``) count as 0.
* **The tail beyond K**, when the model does not hold all the energy:
  ``theta1 = sum_i Q_K,i / (n - 1)`` exactly (the trace of the residual Gram matrix
  ``G = R^T R``). ``theta2 = ||G||_F**2 / (n - 1)**2`` needs the off-diagonal entries of ``G``,
  which a model does not store: the diagonal (each image's ``Q_K``) is used exactly and the
  ``n (n-1)`` off-diagonal squares are estimated by their expectation for independent Gaussian
  images, ``E[(r_i . r_l)**2] = tr(Sigma**2) = var(Q_K) / 2`` (ddof=1 sample variance over the
  images). The third moment follows Box's (1954) chi-square shape ``g * chi2(h)``, in which
  ``theta3 = theta2**2 / theta1``. ``theta2`` is kept between ``theta1**2 / p`` (the tail spread
  evenly over the ``p`` modes the data can still have) and ``lambda_K * theta1`` (no eigenvalue
  beyond K exceeds the last one held).
  On invented Gaussian data this estimate of ``theta2`` is within 1-3 % of the sum over the
  LAPACK eigenvalues on average, from 30 x 2000 to 1000 x 100 (pixels x images), where the
  plain ``var(Q_K) / 2`` is 1 % to 80 % low because sample eigenvalues spread (our own check,
  not a published result). On images whose residuals are heavier-tailed than Gaussian the
  variance of Q overstates the spread: on scikit-learn's digits it is 1.2-2.7 times the LAPACK
  value, which widens the limit (fewer flags) by an amount that shrinks as K grows past r.

The method is then a named choice (``QLimit.method``, with ``QLimit.reason`` in words):

* ``"jackson-mudholkar"``: every eigenvalue left out is known, because the model holds every
  mode of the data (``K >= min(pixels, images - 1)``) or its modes hold all the energy
  (``total_energy - sum s**2 <= 1e-6 * total_energy``). Jackson and Mudholkar (1979).
* ``"jackson-mudholkar-estimated-tail"``: the known eigenvalues of modes r+1..K plus the tail
  beyond K estimated as above, in the Jackson-Mudholkar formula.
* ``"box"``: no mode beyond r is held (r = K, or only modes without variance), so the whole
  tail is estimated and the limit is Box's ``g * chi2_level(h)`` with ``g = theta2 / theta1``
  and ``h = theta1**2 / theta2``; or the moments give ``h0 <= 0``, where the Jackson-Mudholkar
  formula does not apply, and Box's chi-square with the same moments is used.

So a model of 20 modes and one of every mode give, at rank 3, limits that differ only through
the estimate of the tail's spread beyond mode 20 (a fraction of a percent on the data sets of
the tests). Two caveats. When ``h0`` is close to 0 the two models can fall on either side of
it and use different formulas, which then differ by several percent (on 63 digit images at rank
4: Jackson-Mudholkar 1.396, Box 1.293; a Monte Carlo of the same eigenvalues puts the 99 % point
2-3 % below the first and 5 % above the second): the switch at ``h0 = 0`` is the published
rule, not smoothed here. And when the images are few next to the pixels, sample eigenvalues spread
(Marchenko-Pastur) and the Jackson-Mudholkar limit from them is wider than the spread of the
model images' own Q; the estimate above follows the eigenvalues, not the narrower spread, so
that the limit does not depend on the model's rank.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from modescope.core.decomposition import Decomposition
from modescope.core.validation import check_float, check_int

__all__ = ["QLimit", "Q_METHOD_NAMES", "KNOWN_TAIL_TOLERANCE", "q_limit", "eigenvalues",
           "discarded_eigenvalues_known", "tail_moments", "q_limit_jackson_mudholkar",
           "q_limit_box"]

#: Relative energy left outside the decomposition's modes below which the discarded
#: eigenvalues count as known (the Jackson-Mudholkar limit applies).
KNOWN_TAIL_TOLERANCE = 1e-6
#: Share of total energy at or below which a mode counts as having no variance.
ZERO_MODE_SHARE = 1e-10

#: Display names of the Q limit methods, for both front ends.
Q_METHOD_NAMES = {"jackson-mudholkar": "Jackson-Mudholkar",
                  "jackson-mudholkar-estimated-tail": "Jackson-Mudholkar, tail estimated",
                  "box": "Box"}


@dataclass(frozen=True)
class QLimit:
    """The Q limit at one rank and level, with the method chosen and why.

    Attributes
    ----------
    value : float
        The limit (0 when nothing is left out).
    method : str
        One of ``Q_METHOD_NAMES`` (see the module docstring).
    reason : str
        The choice in plain words, one sentence without a final full stop.
    theta : tuple of float
        ``(theta1, theta2, theta3)`` of the eigenvalues left out, as used.
    """

    value: float
    method: str
    reason: str
    theta: tuple = (0.0, 0.0, 0.0)


# ----- validation helpers (shared with core.review.outliers) ---------------------------------

def check_level(level) -> float:
    """Return ``level`` as a float in (0, 1), or raise naming it."""
    return check_float("level", level, low=0.0, high=1.0, low_open=True, high_open=True)


def check_decomposition(decomposition) -> Decomposition:
    """Return ``decomposition`` if it is a Decomposition of at least 2 images, or raise."""
    if not isinstance(decomposition, Decomposition):
        raise TypeError("decomposition must be a Decomposition, got "
                        f"{type(decomposition).__name__}")
    if decomposition.n_images < 2:
        raise ValueError("outlier scores need a decomposition of at least 2 images, got "
                         f"{decomposition.n_images}")
    return decomposition


def as_float_vector(name: str, values, *, ndim: int = 1) -> np.ndarray:
    """Return ``values`` as a finite float64 array of ``ndim`` dimensions, or raise naming it."""
    if isinstance(values, (str, bytes)) or values is None:
        raise TypeError(f"{name} must be an array of numbers, got {type(values).__name__}")
    try:
        arr = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise TypeError(f"{name} must be an array of numbers, got "
                        f"{type(values).__name__}") from exc
    if arr.ndim != ndim:
        raise ValueError(f"{name} must be {ndim}-dimensional, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must hold finite numbers, found NaN or infinity")
    return arr


# ----- eigenvalues and moments ---------------------------------------------------------------

def eigenvalues(decomposition: Decomposition) -> np.ndarray:
    """Return the covariance eigenvalues ``lambda_j = s_j**2 / (n - 1)`` of a decomposition.

    Parameters
    ----------
    decomposition : Decomposition
        With at least 2 images.

    Returns
    -------
    ndarray, shape (K,), float64
    """
    d = check_decomposition(decomposition)
    s = np.asarray(d.singular_values, dtype=np.float64)
    return s ** 2 / (d.n_images - 1)


def _holds_every_mode(d: Decomposition) -> bool:
    return d.rank >= min(d.n_pixels, d.n_images - 1)


def discarded_eigenvalues_known(decomposition: Decomposition) -> bool:
    """Return True when the decomposition's modes hold all the variation of the collection.

    That is when it holds every mode the data can have (``K >= min(pixels, images - 1)``; any
    energy left over is rounding) or when ``total_energy - sum_j s_j**2 <= 1e-6 *
    total_energy``. The eigenvalues discarded at any rank r are then ``lambda_{r+1..K}`` and
    the Jackson-Mudholkar Q limit applies to them alone.

    Parameters
    ----------
    decomposition : Decomposition

    Returns
    -------
    bool

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition.
    """
    if not isinstance(decomposition, Decomposition):
        raise TypeError("decomposition must be a Decomposition, got "
                        f"{type(decomposition).__name__}")
    if decomposition.n_images >= 2 and _holds_every_mode(decomposition):
        return True
    total = float(decomposition.total_energy)
    kept = float(np.sum(np.asarray(decomposition.singular_values, dtype=np.float64) ** 2))
    return total - kept <= KNOWN_TAIL_TOLERANCE * total


def tail_moments(decomposition: Decomposition) -> tuple[float, float, float]:
    """Estimate ``theta1..3`` of the eigenvalues beyond the decomposition's K modes.

    From the per-image residuals ``Q_K`` outside all K modes (see the module docstring):
    ``theta1 = sum Q_K / (n - 1)`` exactly; ``theta2 = (sum Q_K**2 + n (n-1) var(Q_K) / 2) /
    (n - 1)**2``, kept within ``[theta1**2 / p, theta1**2]`` with ``p = min(pixels, images -
    1) - K`` (at least 1; the tail spread evenly) and ``min(theta1**2, lambda_K theta1)`` (no
    eigenvalue beyond K exceeds the last one held, ``lambda_K``); ``theta3 = theta2**2 /
    theta1`` (Box's chi-square shape, which then also stays below ``lambda_K theta2``).

    Parameters
    ----------
    decomposition : Decomposition
        With residuals (after the scoring pass) and at least 2 images.

    Returns
    -------
    tuple of float
        ``(theta1, theta2, theta3)``; zeros when the residuals are all 0.

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition.
    ValueError
        If it has no residuals or fewer than 2 images.
    """
    d = check_decomposition(decomposition)
    if d.residual is None:
        raise ValueError("decomposition has no residuals yet (a streaming snapshot), so the "
                         "modes beyond its rank cannot be estimated: run the scoring pass first")
    n = d.n_images
    q = np.maximum(np.asarray(d.residual, dtype=np.float64), 0.0)
    theta1 = float(np.sum(q)) / (n - 1)
    if theta1 <= 0:
        return 0.0, 0.0, 0.0
    var = float(np.var(q, ddof=1))
    theta2 = (float(np.sum(q * q)) + n * (n - 1) * var / 2.0) / (n - 1) ** 2
    p = max(1, min(d.n_pixels, n - 1) - d.rank)
    low = theta1 ** 2 / p
    high = theta1 ** 2
    if d.rank:
        lam_k = float(d.singular_values[-1]) ** 2 / (n - 1)
        if lam_k > 0:
            high = max(low, min(high, lam_k * theta1))
    theta2 = min(max(theta2, low), high)
    return theta1, theta2, theta2 ** 2 / theta1


def _thetas(lam: np.ndarray) -> tuple[float, float, float]:
    return tuple(float(np.sum(lam ** i)) for i in (1, 2, 3))


# ----- the two formulas ----------------------------------------------------------------------

def _box_value(theta1: float, theta2: float, level: float) -> float:
    """Box (1954): Q ~ g chi2(h) with mean theta1 and variance 2 theta2."""
    if theta1 <= 0:
        return 0.0
    if theta2 <= 0:
        return theta1
    return float(theta2 / theta1 * stats.chi2.ppf(level, theta1 ** 2 / theta2))


def _jm_value(theta1: float, theta2: float, theta3: float, level: float
              ) -> tuple[float | None, float]:
    """Jackson-Mudholkar (1979) from the moments; (None, h0) when the formula does not apply."""
    if theta1 <= 0 or theta2 <= 0:
        return 0.0, 1.0
    h0 = 1.0 - 2.0 * theta1 * theta3 / (3.0 * theta2 ** 2)
    if h0 > 0:
        c = float(stats.norm.ppf(level))
        base = (c * math.sqrt(2.0 * theta2 * h0 * h0) / theta1 + 1.0
                + theta2 * h0 * (h0 - 1.0) / theta1 ** 2)
        if base > 0:
            value = theta1 * base ** (1.0 / h0)
            if math.isfinite(value) and value > 0:
                return value, h0
    return None, h0


def _jm_limit(lam: np.ndarray, level: float) -> tuple[float, str]:
    """Jackson-Mudholkar limit of known eigenvalues, Box with their moments as a fallback."""
    theta = _thetas(lam[lam > 0])
    value, _ = _jm_value(*theta, level)
    if value is not None:
        return value, "jackson-mudholkar"
    return _box_value(theta[0], theta[1], level), "box"


def q_limit_jackson_mudholkar(discarded_eigenvalues, level: float = 0.99) -> float:
    """Return the Jackson and Mudholkar (1979) control limit of Q.

    With ``theta_i = sum_j lambda_j**i`` over the discarded eigenvalues,
    ``h0 = 1 - 2 theta1 theta3 / (3 theta2**2)`` and ``c`` the standard normal quantile at
    ``level``::

        Q_limit = theta1 * (c sqrt(2 theta2 h0**2) / theta1 + 1
                            + theta2 h0 (h0 - 1) / theta1**2) ** (1 / h0)

    The formula needs ``h0 > 0``. A long tail of small eigenvalues can make ``h0 <= 0``; the
    limit is then Box's (1954) chi-square with the exact moments of Q (mean ``theta1``,
    variance ``2 theta2``, so ``g = theta2/theta1``, ``h = theta1**2/theta2``), which
    :func:`q_limit` reports as method ``"box"``.

    Parameters
    ----------
    discarded_eigenvalues : array_like, shape (m,)
        Non-negative eigenvalues of the modes left out of the model.
    level : float
        Confidence level in (0, 1), default 0.99.

    Returns
    -------
    float
        The limit; 0.0 when every discarded eigenvalue is 0 (or none is given).

    Raises
    ------
    TypeError
        If the inputs are not numbers.
    ValueError
        If the eigenvalues are negative or not finite, or ``level`` is outside (0, 1).

    Examples
    --------
    Ten equal eigenvalues make Q a chi-square with 10 degrees of freedom (95 % point 18.307):

    >>> round(q_limit_jackson_mudholkar([1.0] * 10, 0.95), 2)
    18.29
    """
    level = check_level(level)
    lam = as_float_vector("discarded_eigenvalues", discarded_eigenvalues)
    if np.any(lam < 0):
        raise ValueError("discarded_eigenvalues must be non-negative, got minimum "
                         f"{float(lam.min())!r}")
    return _jm_limit(lam, level)[0]


def q_limit_box(q_values, level: float = 0.99) -> float:
    """Return Box's (1954) moment-matched chi-square control limit of a set of Q values.

    Q is approximated by ``g * chi2(h)`` with ``g = v / (2 m)`` and ``h = 2 m**2 / v``, where
    ``m`` and ``v`` are the mean and (ddof=1) variance of the observed Q values; the limit is
    ``g * chi2.ppf(level, h)``. (The decomposition's limit, :func:`q_limit`, fits the same
    chi-square to the moments of the eigenvalues left out instead; see the module docstring.)

    Parameters
    ----------
    q_values : array_like, shape (n,)
        Q of the images that built the model, n >= 2. Tiny negative values from rounding are
        treated as 0.
    level : float
        Confidence level in (0, 1), default 0.99.

    Returns
    -------
    float
        The limit; ``m`` when every Q is the same (no spread), 0.0 when every Q is 0.

    Raises
    ------
    TypeError
        If the inputs are not numbers.
    ValueError
        If fewer than 2 values are given, a value is not finite, or ``level`` is outside (0, 1).
    """
    level = check_level(level)
    q = as_float_vector("q_values", q_values)
    if q.size < 2:
        raise ValueError(f"q_values must hold at least 2 values, got {q.size}")
    q = np.maximum(q, 0.0)
    m = float(np.mean(q))
    if m <= 0:
        return 0.0
    v = float(np.var(q, ddof=1))
    if v <= 0 or v <= (1e-12 * m) ** 2:
        return m
    g = v / (2.0 * m)
    h = 2.0 * m * m / v
    return float(g * stats.chi2.ppf(level, h))


# ----- the choice ----------------------------------------------------------------------------

def _modes(first: int, last: int) -> str:
    return f"mode {first}" if first == last else f"modes {first}-{last}"


def _known_eigenvalues(d: Decomposition, r: int) -> np.ndarray:
    """lambda_{r+1..K}, with modes of no variance set to 0."""
    lam = eigenvalues(d)[r:]
    s2 = np.asarray(d.singular_values[r:], dtype=np.float64) ** 2
    return np.where(s2 > ZERO_MODE_SHARE * float(d.total_energy), lam, 0.0)


def _known_limit(d: Decomposition, r: int, level: float) -> QLimit:
    lam = _known_eigenvalues(d, r)
    theta = _thetas(lam[lam > 0])
    why = ("the model holds every mode of the data" if _holds_every_mode(d) else
           f"the model's {d.rank} modes hold all the energy of the images")
    left = _modes(r + 1, d.rank) if r < d.rank else "no mode"
    value, h0 = _jm_value(*theta, level)
    if value is not None:
        return QLimit(value, "jackson-mudholkar",
                      f"Jackson-Mudholkar (1979) from the eigenvalues of {left}, known exactly "
                      f"because {why}", theta)
    return QLimit(_box_value(theta[0], theta[1], level), "box",
                  f"Box (1954) chi-square with the exact moments of the eigenvalues of {left} "
                  f"({why}): they give h0 = {h0:.3g} <= 0, where the Jackson-Mudholkar formula "
                  "does not apply", theta)


def _estimated_limit(d: Decomposition, r: int, level: float) -> QLimit:
    lam = _known_eigenvalues(d, r)
    tail = tail_moments(d)
    K = d.rank
    known = _thetas(lam[lam > 0])
    tail_words = (f"the modes beyond {K}, which the model does not hold, estimated from the "
                  f"images' residuals at rank {K}: their sum exactly, their spread from the "
                  "residuals' mean and variance")
    if known[0] <= 0:
        theta = tail
        held = (f"the model holds no mode beyond rank {r}" if r == K else
                f"the model's modes beyond rank {r} have no variance")
        return QLimit(_box_value(tail[0], tail[1], level), "box",
                      f"Box (1954) chi-square, because {held}: the modes left out are estimated "
                      f"from the images' residuals at rank {K}, their sum exactly and their "
                      "spread from the residuals' mean and variance", theta)
    theta = tuple(a + b for a, b in zip(known, tail))
    value, h0 = _jm_value(*theta, level)
    if value is not None:
        return QLimit(value, "jackson-mudholkar-estimated-tail",
                      f"Jackson-Mudholkar (1979) from the eigenvalues of {_modes(r + 1, K)}, "
                      f"which the model holds, and {tail_words} (Box's 1954 chi-square "
                      "shape)", theta)
    return QLimit(_box_value(theta[0], theta[1], level), "box",
                  f"Box (1954) chi-square with the moments of the eigenvalues left out, because "
                  f"they give h0 = {h0:.3g} <= 0, where the Jackson-Mudholkar formula does not "
                  f"apply; the eigenvalues of {_modes(r + 1, K)} are known exactly, "
                  f"{tail_words}", theta)


def q_limit(decomposition: Decomposition, rank: int | None = None,
            level: float = 0.99) -> QLimit:
    """Return the Q limit at rank r, the method chosen and the reason (see module docstring).

    Parameters
    ----------
    decomposition : Decomposition
        At least 2 images; with residuals unless its modes hold all the energy.
    rank : int, optional
        Retained modes r, 0..K (default K = ``decomposition.rank``).
    level : float
        Confidence level in (0, 1), default 0.99.

    Returns
    -------
    QLimit

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition or ``rank``/``level`` are not numbers.
    ValueError
        If ``rank`` is outside 0..K, ``level`` outside (0, 1), or the modes beyond K are
        needed and the decomposition has no residuals.

    Examples
    --------
    >>> import numpy as np
    >>> from modescope.core.decomposition import Decomposition
    >>> s = np.array([3.0, 2.0, 1.0])
    >>> d = Decomposition(mean=np.zeros(3, np.float32), basis=np.eye(3, dtype=np.float32),
    ...                   singular_values=s, weights=np.zeros((3, 5)),
    ...                   total_energy=14.0, image_shape=(3, 1, 1))
    >>> q_limit(d, 1).method
    'jackson-mudholkar'
    """
    d = check_decomposition(decomposition)
    r = d.rank if rank is None else check_int("rank", rank, minimum=0, maximum=d.rank)
    level = check_level(level)
    if discarded_eigenvalues_known(d):
        return _known_limit(d, r, level)
    if d.residual is None:
        raise ValueError("this decomposition is truncated and has no residuals yet, so the Q "
                         "limit cannot be computed (the modes beyond its rank are estimated "
                         "from the residuals): run the scoring pass first")
    return _estimated_limit(d, r, level)
