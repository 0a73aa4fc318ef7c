"""Suggested ranks: an energy threshold and the Gavish-Donoho optimal hard threshold.

Energy rank
-----------
The smallest rank whose modes capture a share of the *total* centred energy (the exact sum of
the squared centred images, ``Decomposition.total_energy``, not the energy of the modes kept).
When the kept modes do not reach the share, the answer is "more than k", never a rank at or
below k: :class:`EnergyRank` has ``rank = None`` and ``more_than = k``. A model that holds every
mode the data can have (``k >= min(pixels, images - 1)``) reaches every share, up to rounding.

Gavish-Donoho
-------------
Gavish and Donoho ("The optimal hard threshold for singular values is 4/sqrt(3)", IEEE Trans.
Inf. Theory 60, 2014) give, for an ``m x n`` matrix (aspect ratio ``beta = m/n <= 1``) holding a
low-rank signal plus white noise of unknown level, the threshold
``tau = omega(beta) * median(singular values)`` with ``omega(beta) = lambda*(beta) /
sqrt(mu_beta)``, where ``lambda*(beta) = sqrt(2 (beta + 1) + 8 beta / ((beta + 1) +
sqrt(beta^2 + 14 beta + 1)))`` and ``mu_beta`` is the median of the Marchenko-Pastur law of
ratio ``beta``; modes whose singular value is above ``tau`` are kept. ``omega`` is computed here
from the median by quadrature (:func:`omega`); the paper's cubic fit
``0.56 beta^3 - 0.95 beta^2 + 1.82 beta + 1.43`` is :func:`omega_approx`.

Centring removes one dimension, so the matrix is ``pixels x (images - 1)`` and there are
``p = min(pixels, images - 1)`` singular values. The rule needs their median, which a model
knows when

* it holds every mode (``k >= p``), or its modes hold all the energy (the rest are 0). Modes
  without variance (``s**2 <= 1e-10`` of the total: pixels that never change, images that
  repeat others exactly) carry no noise and are left out: the rule sees a ``p' x q`` matrix,
  ``p'`` the modes with variance and ``q = max(pixels, images - 1)``. When fewer than half of the
  ``p`` modes have variance the data are exactly low-rank and the rule, which needs noise in
  every direction, does not apply;
* or it holds more than half of them (``k >= p // 2 + 1``): the median is then one of the kept
  values (or the mean of two), and since ``omega >= sqrt(2) > 1`` the threshold lies above
  every mode not kept, so the count is exact.

Otherwise the rule does not apply and the note says what rank to analyse with.

The default rank
----------------
One rule, :func:`default_rank`, picks the rank every front end starts at (the workbench's rank
slider, ``modescope info``'s suggestion, ``--rank`` of ``outliers`` and ``export`` when not
given): **the smallest rank whose modes capture 95% of the total centred energy; all k kept
modes when they capture less; 0 when the images do not vary.** Why this rule:

* it depends on the data only, not on how many modes were analysed: ``total_energy`` is exact,
  so a model of rank 20 and one of rank 239 of the same images give the same default (when k
  reaches the share). The Gavish-Donoho threshold needs the median singular value, which a
  model of the usual rank (20 of 239 possible modes on the sample set) does not know;
* Gavish-Donoho is a denoising rule (white noise of one level in every direction); ordinary
  slow variation of a collection (growth, watering, colour drift) is not white noise, and on the
  sample set analysed with every mode it gives rank 27, at which the outlier limits flag 119 of
  the 240 frames. At the 95% rank (3) exactly the 4 planted problem frames are flagged (at the
  90% rank, 2, too; 95% was already the workbench's starting rank, so that does not move);
* 95% is a common-practice share (a rule of thumb, no source), kept as one named constant,
  :data:`DEFAULT_ENERGY_SHARE`.

The other suggestions (any energy share, Gavish-Donoho) stay available as second opinions.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
from scipy import integrate, optimize

from modescope.core.decomposition import Decomposition
from modescope.core.validation import check_float

__all__ = ["energy_rank", "EnergyRank", "gavish_donoho", "gavish_donoho_rank",
           "RankSuggestion", "omega", "omega_approx", "lambda_star", "marchenko_pastur_median",
           "DEFAULT_ENERGY_SHARE", "DefaultRank", "default_rank"]

#: Share of the total centred energy the default rank captures (a rule of thumb, no source).
DEFAULT_ENERGY_SHARE = 0.95

#: Energy left outside the kept modes, relative to the total, below which they hold it all.
_ALL_ENERGY_TOLERANCE = 1e-6
#: Share of the total energy at or below which a mode counts as having no variance.
_ZERO_MODE_SHARE = 1e-10


def _check_decomposition(decomposition) -> Decomposition:
    if not isinstance(decomposition, Decomposition):
        raise TypeError("decomposition must be a Decomposition, got "
                        f"{type(decomposition).__name__}")
    return decomposition


def _possible_modes(d: Decomposition) -> int:
    """Number of singular values of the centred data, min(pixels, images - 1)."""
    return max(0, min(d.n_pixels, d.n_images - 1))


def _holds_all_energy(d: Decomposition) -> bool:
    if d.rank >= _possible_modes(d):
        return True
    total = float(d.total_energy)
    kept = float(np.sum(np.asarray(d.singular_values, dtype=np.float64) ** 2))
    return total - kept <= _ALL_ENERGY_TOLERANCE * total


# ----- energy rank ---------------------------------------------------------------------------

@dataclass(frozen=True)
class EnergyRank:
    """The smallest rank reaching a share of the energy, or "more than k".

    Attributes
    ----------
    threshold : float
        The share asked for, in (0, 1].
    rank : int or None
        The smallest rank whose modes capture at least ``threshold`` of the total energy; None
        when the kept modes do not reach it (the rank is more than ``kept``). 0 when the images
        do not vary at all.
    kept : int
        Number of modes the decomposition holds, k.
    captured : float
        Share of the total energy captured by all kept modes.
    """

    threshold: float
    rank: int | None
    kept: int
    captured: float

    @property
    def reached(self) -> bool:
        """True when the kept modes reach the threshold."""
        return self.rank is not None

    @property
    def more_than(self) -> int | None:
        """k when the threshold is not reached (the rank is more than k), else None."""
        return None if self.reached else self.kept

    def describe(self) -> str:
        """Return e.g. "3 for 90 % of the energy" or "more than 10 for 90 % of the energy"."""
        share = f"{100 * self.threshold:g} % of the energy"
        if self.reached:
            return f"{self.rank} for {share}"
        return f"more than {self.kept} for {share}"


def energy_rank(decomposition: Decomposition, threshold: float = 0.9) -> EnergyRank:
    """Return the smallest rank whose modes capture ``threshold`` of the total energy.

    Parameters
    ----------
    decomposition : Decomposition
    threshold : float, optional
        Share of the total centred energy, 0 < threshold <= 1 (default 0.9).

    Returns
    -------
    EnergyRank
        ``rank`` in 1..k, or None with ``more_than = k`` when the k kept modes capture less
        than the threshold (and do not hold every mode); ``rank = 0`` when the images do not
        vary.

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition or ``threshold`` is not a number.
    ValueError
        If ``threshold`` is outside (0, 1].

    Examples
    --------
    >>> import numpy as np
    >>> from modescope.core.decomposition import Decomposition
    >>> d = Decomposition(mean=np.zeros(4, np.float32), basis=np.eye(4, 2, dtype=np.float32),
    ...                   singular_values=np.array([3.0, 2.0]), weights=np.zeros((2, 9)),
    ...                   total_energy=16.0, image_shape=(4, 1, 1))
    >>> energy_rank(d, 0.5).describe()
    '1 for 50 % of the energy'
    >>> energy_rank(d, 0.9).describe()
    'more than 2 for 90 % of the energy'
    """
    d = _check_decomposition(decomposition)
    threshold = check_float("threshold", threshold, low=0.0, high=1.0, low_open=True)
    k = d.rank
    if float(d.total_energy) <= 0:
        return EnergyRank(threshold, 0, k, 1.0)
    cum = d.cumulative_energy()
    captured = float(cum[-1]) if k else 0.0
    hits = np.nonzero(cum >= threshold - 1e-12)[0]
    if hits.size:
        return EnergyRank(threshold, int(hits[0] + 1), k, captured)
    if k and k >= _possible_modes(d):
        # every mode is held: the energy missing is rounding, the last mode completes it
        return EnergyRank(threshold, k, k, captured)
    return EnergyRank(threshold, None, k, captured)


# ----- Gavish-Donoho -------------------------------------------------------------------------

def lambda_star(beta: float) -> float:
    """Return Gavish-Donoho's optimal threshold coefficient for a known noise level.

    Parameters
    ----------
    beta : float
        Aspect ratio of the matrix, 0 < beta <= 1.

    Returns
    -------
    float
        ``sqrt(2 (beta + 1) + 8 beta / ((beta + 1) + sqrt(beta^2 + 14 beta + 1)))``;
        ``4 / sqrt(3)`` for a square matrix.

    Raises
    ------
    TypeError, ValueError
        If ``beta`` is not a number in (0, 1].
    """
    beta = check_float("beta", beta, low=0.0, high=1.0, low_open=True)
    return float(np.sqrt(2 * (beta + 1) + 8 * beta
                         / ((beta + 1) + np.sqrt(beta ** 2 + 14 * beta + 1))))


@functools.lru_cache(maxsize=256)
def _mp_median(beta: float) -> float:
    # With t = 1 + beta - 2 sqrt(beta) cos(a), a in [0, pi], the Marchenko-Pastur density
    # sqrt((b - t)(t - a)) / (2 pi beta t) on [(1 - sqrt beta)^2, (1 + sqrt beta)^2] becomes
    # (2 / pi) sin(a)^2 / (1 + beta - 2 sqrt(beta) cos(a)) da: smooth and well scaled for every
    # beta in (0, 1] (for beta = 1 it is (1 + cos a) / pi; quadrature never evaluates a = 0).
    root = np.sqrt(beta)

    def density(a: float) -> float:
        return 2.0 / np.pi * np.sin(a) ** 2 / (1.0 + beta - 2.0 * root * np.cos(a))

    def cdf_minus_half(u: float) -> float:
        return integrate.quad(density, 0.0, u, epsabs=1e-13, epsrel=1e-12, limit=200)[0] - 0.5

    u = optimize.brentq(cdf_minus_half, 0.0, np.pi, xtol=1e-14)
    return float(1.0 + beta - 2.0 * root * np.cos(u))


def marchenko_pastur_median(beta: float) -> float:
    """Return the median of the Marchenko-Pastur law of ratio ``beta`` (variance 1).

    Parameters
    ----------
    beta : float
        Aspect ratio, 0 < beta <= 1.

    Returns
    -------
    float
        About 0.6528 for beta = 1; tends to 1 as beta tends to 0.

    Raises
    ------
    TypeError, ValueError
        If ``beta`` is not a number in (0, 1].
    """
    beta = check_float("beta", beta, low=0.0, high=1.0, low_open=True)
    return _mp_median(beta)


def omega(beta: float) -> float:
    """Return Gavish-Donoho's coefficient omega(beta) for an unknown noise level.

    ``omega(beta) = lambda_star(beta) / sqrt(marchenko_pastur_median(beta))``; the threshold is
    ``omega(beta)`` times the median singular value.

    Parameters
    ----------
    beta : float
        Aspect ratio, 0 < beta <= 1.

    Returns
    -------
    float
        2.858 for a square matrix; tends to sqrt(2) as beta tends to 0.

    Raises
    ------
    TypeError, ValueError
        If ``beta`` is not a number in (0, 1].

    Examples
    --------
    >>> round(omega(1.0), 3)
    2.858
    """
    beta = check_float("beta", beta, low=0.0, high=1.0, low_open=True)
    return lambda_star(beta) / float(np.sqrt(_mp_median(beta)))


def omega_approx(beta: float) -> float:
    """Return the paper's cubic fit of omega(beta): ``0.56 b^3 - 0.95 b^2 + 1.82 b + 1.43``.

    Parameters
    ----------
    beta : float
        Aspect ratio, 0 < beta <= 1.

    Returns
    -------
    float

    Raises
    ------
    TypeError, ValueError
        If ``beta`` is not a number in (0, 1].
    """
    beta = check_float("beta", beta, low=0.0, high=1.0, low_open=True)
    return float(0.56 * beta ** 3 - 0.95 * beta ** 2 + 1.82 * beta + 1.43)


@dataclass(frozen=True)
class RankSuggestion:
    """A suggested rank with how it was reached, or why there is none.

    Attributes
    ----------
    rank : int or None
        None when the rule does not apply.
    threshold : float or None
        Singular-value threshold used.
    method : str
        "median" (threshold from the median singular value) or "none".
    note : str
        A sentence for a tooltip, without a final full stop.
    needed_rank : int or None
        When the rule does not apply because too few modes are kept: the smallest rank to
        analyse with for it to apply.
    """

    rank: int | None
    threshold: float | None
    method: str
    note: str
    needed_rank: int | None = None


def _median_of_descending(s: np.ndarray, p: int) -> float:
    """Median of p values sorted in descending order, of which at least p // 2 + 1 are in s."""
    if p % 2:
        return float(s[p // 2])
    return float(0.5 * (s[p // 2 - 1] + s[p // 2]))


def _threshold(s: np.ndarray, med: float, p: int, q: int, how: str) -> RankSuggestion:
    beta = p / q
    tau = omega(beta) * med
    return RankSuggestion(int(np.sum(s > tau)), float(tau), "median",
                          f"unknown noise level; threshold = omega({beta:.3g}) = "
                          f"{omega(beta):.3f} x the median singular value {med:.4g}, {how}")


def gavish_donoho(decomposition: Decomposition) -> RankSuggestion:
    """Suggest a rank with the Gavish-Donoho optimal hard threshold (see the module notes).

    Parameters
    ----------
    decomposition : Decomposition

    Returns
    -------
    RankSuggestion
        ``method = "median"`` with the rank and threshold, or ``"none"`` with a note saying why
        the rule does not apply (and ``needed_rank`` when a larger rank would make it apply).

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition.
    """
    d = _check_decomposition(decomposition)
    m, n, k = d.n_pixels, d.n_images, d.rank
    if n < 3:
        return RankSuggestion(None, None, "none", "needs at least 3 images")
    p, q = sorted((m, n - 1))
    total = float(d.total_energy)
    if total <= 0 or k == 0:
        return RankSuggestion(None, None, "none", "the images do not vary: there are no "
                              "singular values to threshold")
    s = np.asarray(d.singular_values, dtype=np.float64)[:p]
    if _holds_all_energy(d):
        alive = s[s ** 2 > _ZERO_MODE_SHARE * total]
        p_var = int(alive.size)
        if 2 * p_var < p:
            return RankSuggestion(None, None, "none",
                                  f"only {p_var} of the {p} modes the data can have carry any "
                                  "variance: the data are exactly low-rank, and the rule needs "
                                  "noise in every direction")
        how = "from every mode of the data"
        if p_var < p:
            how += (f" ({p - p_var} mode(s) without variance left out: pixels that never "
                    "change or images that repeat others)")
        return _threshold(alive, _median_of_descending(alive, p_var), p_var, q, how)
    need = p // 2 + 1
    if k < need:
        return RankSuggestion(None, None, "none",
                              f"the median singular value is unknown: the model keeps {k} of "
                              f"the {p} modes the data can have, and the median is mode "
                              f"{(p + 1) // 2}; analyse with rank {need} or more (or {p}, every "
                              "mode)", needed_rank=need)
    med = _median_of_descending(s, p)
    if med <= 0:
        return RankSuggestion(None, None, "none", "the median singular value is zero: the data "
                              "are exactly low-rank, and the rule needs noise in every direction")
    return _threshold(s, med, p, q, f"from the {k} modes kept, more than half of the {p}")


def gavish_donoho_rank(decomposition: Decomposition) -> int | None:
    """Return the Gavish-Donoho suggested rank, or None when the rule does not apply.

    Parameters
    ----------
    decomposition : Decomposition

    Returns
    -------
    int or None
    """
    return gavish_donoho(decomposition).rank


# ----- the default rank ----------------------------------------------------------------------

class DefaultRank(NamedTuple):
    """The rank every front end starts at, with the reason in words.

    Attributes
    ----------
    rank : int
        0..k (0 only when the model has no mode or the images do not vary).
    reason : str
        Why this rank, one clause without a final full stop, e.g. "the smallest rank capturing
        95 % of the energy (3 modes capture 96.6 %)".
    """

    rank: int
    reason: str


def _percent(share: float) -> str:
    # one way of writing a percentage in every front end: a space before the sign, as the
    # workbench and the command line's level ("99 %") write it (SI Brochure, 9th ed., 5.4.7)
    return f"{100 * share:.1f} %"


def default_rank(decomposition: Decomposition) -> DefaultRank:
    """Return the default rank of a model and why (the rule is stated in the module notes).

    The smallest rank whose modes capture :data:`DEFAULT_ENERGY_SHARE` (95%) of the total
    centred energy; all k kept modes when they capture less; 0 when the model has no mode.

    Parameters
    ----------
    decomposition : Decomposition

    Returns
    -------
    DefaultRank
        ``(rank, reason)``; ``rank`` lies in 1..k whenever k >= 1.

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition.

    Examples
    --------
    >>> import numpy as np
    >>> from modescope.core.decomposition import Decomposition
    >>> d = Decomposition(mean=np.zeros(4, np.float32), basis=np.eye(4, 3, dtype=np.float32),
    ...                   singular_values=np.array([3.0, 2.0, 0.5]), weights=np.zeros((3, 9)),
    ...                   total_energy=13.5, image_shape=(4, 1, 1))
    >>> default_rank(d).rank
    2
    >>> default_rank(d).reason
    'the smallest rank capturing 95 % of the energy (2 modes capture 96.3 %)'
    """
    d = _check_decomposition(decomposition)
    k = d.rank
    share = f"{100 * DEFAULT_ENERGY_SHARE:g} %"
    if k == 0:
        return DefaultRank(0, "the model has no basis image (the images do not vary)")
    found = energy_rank(d, DEFAULT_ENERGY_SHARE)
    if found.rank is None:
        return DefaultRank(k, f"all {k} modes of the model: together they capture "
                              f"{_percent(found.captured)} of the energy, less than {share}")
    rank = max(1, min(k, found.rank))
    if float(d.total_energy) <= 0:
        return DefaultRank(rank, "the images do not vary: one mode is shown")
    cum = float(d.cumulative_energy()[rank - 1])
    modes = "1 mode captures" if rank == 1 else f"{rank} modes capture"
    return DefaultRank(rank, f"the smallest rank capturing {share} of the energy "
                             f"({modes} {_percent(cum)})")
