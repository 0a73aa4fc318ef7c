"""Suggested ranks: an energy threshold and the Gavish-Donoho optimal hard threshold.

Gavish and Donoho ("The optimal hard threshold for singular values is 4/sqrt(3)", IEEE Trans.
Inf. Theory 60, 2014) give, for an ``m x n`` matrix (aspect ratio ``beta = m/n <= 1``) holding a
low-rank signal plus white noise:

* noise level unknown: threshold ``tau = omega(beta) * median(singular values)``, with
  ``omega(beta) = lambda*(beta) / sqrt(mu_beta)`` where ``mu_beta`` is the median of the
  Marchenko-Pastur distribution; the paper's approximation
  ``omega(beta) ~ 0.56 beta^3 - 0.95 beta^2 + 1.82 beta + 1.43`` is used;
* noise level ``sigma`` known: ``tau = lambda*(beta) * sqrt(n) * sigma`` with
  ``lambda*(beta) = sqrt(2 (beta + 1) + 8 beta / ((beta + 1) + sqrt(beta^2 + 14 beta + 1)))``.

When it applies here: the unknown-noise rule needs the median of *all* singular values, which a
truncated decomposition knows only when it holds every non-zero one (k >= min(pixels, images - 1)).
Otherwise the noise level is estimated from the energy the k modes leave out, assuming it is all
noise: ``sigma^2 = discarded / ((m - k)(n - k))`` (our own estimate, not from the paper; it is
biased upward when signal remains beyond k, which makes the suggestion conservative). If the
threshold falls below every kept singular value the true rank may exceed k and no rank is
suggested.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from modescope.core.validation import check_float
from modescope.core.decomposition import Decomposition

__all__ = ["energy_rank", "gavish_donoho", "gavish_donoho_rank", "RankSuggestion",
           "omega_approx", "lambda_star"]


def energy_rank(decomposition: Decomposition, threshold: float = 0.9) -> int:
    """Return the smallest rank whose modes capture at least ``threshold`` of the energy.

    Parameters
    ----------
    decomposition : Decomposition
    threshold : float, optional
        Share of the total centred energy, 0 < threshold <= 1 (default 0.9).

    Returns
    -------
    int
        1..k; k when even all k modes capture less than the threshold.
    """
    threshold = check_float("threshold", threshold, low=0.0, high=1.0, low_open=True)
    cum = decomposition.cumulative_energy()
    if cum.size == 0:
        return 0
    hits = np.nonzero(cum >= threshold - 1e-12)[0]
    return int(hits[0] + 1) if hits.size else int(cum.size)


def lambda_star(beta: float) -> float:
    """Return Gavish-Donoho's optimal threshold coefficient for a known noise level."""
    return float(np.sqrt(2 * (beta + 1) + 8 * beta / ((beta + 1) + np.sqrt(beta ** 2 + 14 * beta + 1))))


def omega_approx(beta: float) -> float:
    """Return the paper's cubic approximation of omega(beta) (unknown noise level)."""
    return float(0.56 * beta ** 3 - 0.95 * beta ** 2 + 1.82 * beta + 1.43)


@dataclass(frozen=True)
class RankSuggestion:
    """A suggested rank with how it was reached.

    Attributes
    ----------
    rank : int or None
        None when the rule does not apply.
    threshold : float or None
        Singular-value threshold used.
    method : str
        "median" (unknown noise, all singular values known), "estimated-noise", or "none".
    note : str
        A sentence for a tooltip.
    """

    rank: int | None
    threshold: float | None
    method: str
    note: str


def gavish_donoho(decomposition: Decomposition) -> RankSuggestion:
    """Suggest a rank with the Gavish-Donoho optimal hard threshold (see module notes)."""
    d = decomposition
    m, n = d.n_pixels, d.n_images
    k = d.rank
    if n < 3 or k == 0:
        return RankSuggestion(None, None, "none", "needs at least 3 images")
    dims = sorted((m, n - 1))        # centring removes one dimension
    beta = dims[0] / dims[1]
    s = np.asarray(d.singular_values, dtype=np.float64)
    if k >= dims[0]:
        full = np.concatenate([s, np.zeros(max(0, dims[0] - k))])[:dims[0]]
        med = float(np.median(full))
        if med <= 0:
            return RankSuggestion(None, None, "none", "the median singular value is zero: "
                                  "the data are exactly low-rank, the rule needs noise")
        tau = omega_approx(beta) * med
        return RankSuggestion(int(np.sum(s > tau)), tau, "median",
                              "unknown noise level; threshold = omega(beta) x median singular value")
    discarded = max(d.total_energy - float(np.sum(s ** 2)), 0.0)
    dof = (dims[0] - k) * (dims[1] - k)
    if discarded <= 0 or dof <= 0:
        return RankSuggestion(None, None, "none", "no energy left outside the kept modes")
    sigma = np.sqrt(discarded / dof)
    tau = lambda_star(beta) * np.sqrt(dims[1]) * sigma
    r = int(np.sum(s > tau))
    if r >= k:
        return RankSuggestion(None, float(tau), "none",
                              f"every kept mode is above the threshold: the rank may exceed {k}; "
                              f"analyse with a larger rank")
    return RankSuggestion(r, float(tau), "estimated-noise",
                          "noise level estimated from the energy outside the kept modes")


def gavish_donoho_rank(decomposition: Decomposition) -> int | None:
    """Return the Gavish-Donoho suggested rank, or None when the rule does not apply."""
    return gavish_donoho(decomposition).rank
