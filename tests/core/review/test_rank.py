"""Suggested ranks: energy threshold and Gavish-Donoho (2014) hard threshold."""

import numpy as np
import pytest
from scipy import integrate, optimize

from modescope.core.decomposition import Decomposition
from modescope.core.review.rank import (energy_rank, gavish_donoho, gavish_donoho_rank, lambda_star,
                                 omega_approx)


def decomposition_of(x, k):
    # reference decomposition from LAPACK (numpy.linalg.svd)
    mean = x.mean(axis=1)
    c = x - mean[:, None]
    u, s, vt = np.linalg.svd(c, full_matrices=False)
    return Decomposition(mean=mean.astype(np.float32), basis=u[:, :k].astype(np.float32),
                         singular_values=s[:k], weights=u[:, :k].T @ c,
                         total_energy=float(np.sum(c ** 2)), image_shape=(x.shape[0], 1, 1))


def test_energy_rank_matches_cumulative_sum():
    rng = np.random.default_rng(0)
    d = decomposition_of(rng.normal(size=(30, 50)) * np.linspace(5, 0.1, 30)[:, None], 29)
    cum = np.cumsum(d.singular_values ** 2) / d.total_energy
    for t in (0.5, 0.9, 0.99):
        assert energy_rank(d, t) == int(np.searchsorted(cum, t) + 1)
    with pytest.raises(ValueError, match="threshold must be > 0.0"):
        energy_rank(d, 0.0)


def mp_median(beta):
    # median of the Marchenko-Pastur law with ratio beta (variance 1), by quadrature
    lo, hi = (1 - np.sqrt(beta)) ** 2, (1 + np.sqrt(beta)) ** 2

    def density(t):
        return np.sqrt(max((hi - t) * (t - lo), 0.0)) / (2 * np.pi * beta * t)

    def cdf(x):
        return integrate.quad(density, lo, x)[0]

    return optimize.brentq(lambda x: cdf(x) - 0.5, lo, hi)


@pytest.mark.parametrize("beta", [0.1, 0.3, 0.5, 0.8, 1.0])
def test_omega_approximation_against_marchenko_pastur(beta):
    # Gavish & Donoho 2014: omega(beta) = lambda*(beta) / sqrt(mu_beta); their cubic fit is
    # stated to be accurate to about 0.02 (value from memory); we check 0.03
    exact = lambda_star(beta) / np.sqrt(mp_median(beta))
    assert omega_approx(beta) == pytest.approx(exact, abs=0.03)


def test_lambda_star_square_case_is_4_over_sqrt3():
    # the paper's title: the optimal threshold for square matrices is 4/sqrt(3) sqrt(n) sigma
    assert lambda_star(1.0) == pytest.approx(4 / np.sqrt(3), rel=1e-12)


def test_gavish_donoho_recovers_planted_rank():
    rng = np.random.default_rng(1)
    m, n, r = 80, 200, 4
    signal = rng.normal(size=(m, r)) @ rng.normal(size=(r, n)) * 2.0
    x = signal + rng.normal(size=(m, n)) * 0.5
    full = decomposition_of(x, 80)
    s = gavish_donoho(full)
    assert s.method == "median" and s.rank == r
    truncated = decomposition_of(x, 15)
    t = gavish_donoho(truncated)
    assert t.method == "estimated-noise" and t.rank == r
    assert gavish_donoho_rank(truncated) == r


def test_gavish_donoho_not_applicable_cases():
    rng = np.random.default_rng(2)
    x = rng.normal(size=(40, 60)) * np.linspace(10, 1, 40)[:, None]
    d = decomposition_of(x, 3)    # all kept modes are signal-sized: rank may exceed k
    s = gavish_donoho(d)
    assert s.rank is None and "larger rank" in s.note
    tiny = decomposition_of(rng.normal(size=(5, 2)), 1)
    assert gavish_donoho(tiny).rank is None
