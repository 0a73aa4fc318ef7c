"""Suggested ranks: energy threshold and Gavish-Donoho (2014) hard threshold.

Outside references: LAPACK singular values (numpy.linalg.svd) of invented low-rank-plus-noise
data whose rank is known; the Marchenko-Pastur median by scipy quadrature written here from the
density; the constants printed in the paper's abstract.
"""

import numpy as np
import pytest
from scipy import integrate, optimize

from modescope.core.decomposition import Decomposition
from modescope.core.review.rank import (EnergyRank, energy_rank, gavish_donoho,
                                        gavish_donoho_rank, lambda_star,
                                        marchenko_pastur_median, omega, omega_approx)


def decomposition_of(x, k):
    # reference decomposition from LAPACK (numpy.linalg.svd)
    mean = x.mean(axis=1)
    c = x - mean[:, None]
    u, s, vt = np.linalg.svd(c, full_matrices=False)
    return Decomposition(mean=mean.astype(np.float32), basis=u[:, :k].astype(np.float32),
                         singular_values=s[:k], weights=u[:, :k].T @ c,
                         total_energy=float(np.sum(c ** 2)), image_shape=(x.shape[0], 1, 1))


def low_rank_plus_noise(m, n, r, seed, strength=3.0):
    """m x n data: rank-r signal well above the noise edge plus unit Gaussian noise."""
    rng = np.random.default_rng(seed)
    edge = np.sqrt(m) + np.sqrt(n)       # largest noise singular value, about
    u, _ = np.linalg.qr(rng.normal(size=(m, r)))
    v, _ = np.linalg.qr(rng.normal(size=(n, r)))
    signal = (u * (strength * edge * np.linspace(2.0, 1.0, r))) @ v.T
    return signal + rng.normal(size=(m, n))


# ----- energy rank ---------------------------------------------------------------------------

def test_energy_rank_matches_cumulative_sum():
    rng = np.random.default_rng(0)
    d = decomposition_of(rng.normal(size=(30, 50)) * np.linspace(5, 0.1, 30)[:, None], 29)
    cum = np.cumsum(d.singular_values ** 2) / d.total_energy
    for t in (0.5, 0.9, 0.99):
        found = energy_rank(d, t)
        assert found.rank == int(np.searchsorted(cum, t) + 1)
        assert found.reached and found.more_than is None
        assert found.describe() == f"{found.rank} for {100 * t:g} % of the energy"
    with pytest.raises(ValueError, match="threshold must be > 0.0"):
        energy_rank(d, 0.0)
    with pytest.raises(TypeError, match="decomposition must be a Decomposition"):
        energy_rank("model.npz", 0.9)


def test_energy_rank_says_more_than_k_when_the_kept_modes_fall_short():
    rng = np.random.default_rng(3)
    x = rng.normal(size=(40, 60)) * np.linspace(3, 1, 40)[:, None]
    d = decomposition_of(x, 10)
    cum10 = float(np.sum(d.singular_values ** 2) / d.total_energy)   # LAPACK, about 0.45
    assert cum10 < 0.9
    found = energy_rank(d, 0.9)
    assert found == EnergyRank(0.9, None, 10, pytest.approx(cum10, rel=1e-12))
    assert not found.reached and found.more_than == 10
    assert found.describe() == "more than 10 for 90 % of the energy"
    # the full LAPACK spectrum says how many it really takes: more than 10
    s = np.linalg.svd(x - x.mean(axis=1, keepdims=True), compute_uv=False)
    true_rank = int(np.searchsorted(np.cumsum(s ** 2) / np.sum(s ** 2), 0.9) + 1)
    assert true_rank > 10
    assert energy_rank(decomposition_of(x, 40), 0.9).rank == true_rank


def test_energy_rank_of_a_model_holding_every_mode_reaches_every_share():
    x = np.random.default_rng(4).normal(size=(12, 30))
    d = decomposition_of(x, 12)                        # 12 pixels: every mode held
    found = energy_rank(d, 1.0)
    assert found.reached and found.rank <= 12
    # rounding cannot make a complete model claim "more than 12"
    short = d.replace(total_energy=d.total_energy * (1 + 1e-9))
    assert energy_rank(short, 1.0).rank == 12


def test_energy_rank_of_images_that_do_not_vary_is_zero():
    x = np.tile(np.arange(5.0)[:, None], (1, 4))
    d = decomposition_of(x, 0)
    assert d.total_energy == 0
    assert energy_rank(d, 0.9).rank == 0


# ----- omega(beta) ---------------------------------------------------------------------------

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
    # the module's own median (another change of variable) agrees with the plain quadrature
    assert marchenko_pastur_median(beta) == pytest.approx(mp_median(beta), rel=1e-6)
    assert omega(beta) == pytest.approx(exact, rel=1e-6)


def test_omega_against_the_published_constants():
    # The paper's abstract (checked against its text): square matrices, sigma known:
    # (4/sqrt 3) sqrt(n) sigma ~ 2.309 sqrt(n) sigma; sigma unknown: 2.858 * y_med.
    assert lambda_star(1.0) == pytest.approx(2.309, abs=5e-4)
    assert omega(1.0) == pytest.approx(2.858, abs=5e-4)
    # The cubic fit 0.56 b^3 - 0.95 b^2 + 1.82 b + 1.43 (from the paper, from memory); our
    # quadrature stays within 0.02 of it over (0, 1], and omega tends to sqrt(2) (lambda* -> sqrt 2,
    # the median -> 1) as beta -> 0, where the fit gives 1.43.
    for beta in np.linspace(0.01, 1.0, 23):
        assert omega(beta) == pytest.approx(omega_approx(beta), abs=0.02)
    assert omega(1e-8) == pytest.approx(np.sqrt(2), abs=1e-3)
    with pytest.raises(ValueError, match="beta must be <= 1.0"):
        omega(1.5)
    with pytest.raises(TypeError, match="beta must be a number"):
        omega("square")


def test_lambda_star_square_case_is_4_over_sqrt3():
    # the paper's title: the optimal threshold for square matrices is 4/sqrt(3) sqrt(n) sigma
    assert lambda_star(1.0) == pytest.approx(4 / np.sqrt(3), rel=1e-12)


# ----- Gavish-Donoho -------------------------------------------------------------------------

def reference_rank(x):
    """Gavish-Donoho from the full LAPACK spectrum of the centred data."""
    c = x - x.mean(axis=1, keepdims=True)
    s = np.linalg.svd(c, compute_uv=False)
    p, q = sorted((x.shape[0], x.shape[1] - 1))
    s = s[:p]
    tau = lambda_star(p / q) / np.sqrt(mp_median(p / q)) * np.median(s)
    return int(np.sum(s > tau)), tau


def test_gavish_donoho_recovers_planted_rank():
    rng = np.random.default_rng(1)
    m, n, r = 80, 200, 4
    signal = rng.normal(size=(m, r)) @ rng.normal(size=(r, n)) * 2.0
    x = signal + rng.normal(size=(m, n)) * 0.5
    full = decomposition_of(x, 80)
    s = gavish_donoho(full)
    assert s.method == "median" and s.rank == r
    assert (s.rank, s.threshold) == (reference_rank(x)[0], pytest.approx(reference_rank(x)[1]))
    # 15 of 80 modes: the median singular value is unknown, the note says what to analyse with
    truncated = decomposition_of(x, 15)
    t = gavish_donoho(truncated)
    assert t.method == "none" and t.rank is None and t.needed_rank == 41
    assert "analyse with rank 41 or more (or 80, every mode)" in t.note
    assert gavish_donoho_rank(truncated) is None
    # 41 of 80 modes hold the median: the same threshold and rank as the full spectrum
    half = gavish_donoho(decomposition_of(x, 41))
    assert half.method == "median" and half.rank == r
    assert half.threshold == pytest.approx(s.threshold, rel=1e-12)


@pytest.mark.parametrize("m,n,r,seed", [(60, 400, 3, 0), (300, 50, 5, 1), (120, 121, 2, 2),
                                        (500, 30, 4, 3)])
def test_gavish_donoho_on_a_model_holding_every_mode(m, n, r, seed):
    # k = min(pixels, images - 1): the unknown-noise rule on the complete spectrum
    x = low_rank_plus_noise(m, n, r, seed)
    k = min(m, n - 1)
    d = decomposition_of(x, k)
    g = gavish_donoho(d)
    expect, tau = reference_rank(x)
    assert expect == r                       # the invented data carry rank r
    assert g.method == "median" and g.rank == r
    assert g.threshold == pytest.approx(tau, rel=1e-9)
    assert "from every mode of the data" in g.note


def test_gavish_donoho_leaves_out_modes_without_variance():
    # 10 of 60 pixels never change: 50 modes carry noise, the rule sees a 50 x 199 matrix
    x = low_rank_plus_noise(60, 200, 3, 5)
    x[:10] = 0.25
    d = decomposition_of(x, 60)
    g = gavish_donoho(d)
    c = x[10:] - x[10:].mean(axis=1, keepdims=True)
    s = np.linalg.svd(c, compute_uv=False)             # LAPACK, the 50 pixels that vary
    tau = lambda_star(50 / 199) / np.sqrt(mp_median(50 / 199)) * np.median(s)
    assert g.rank == int(np.sum(s > tau)) == 3
    assert g.threshold == pytest.approx(tau, rel=1e-9)
    assert "10 mode(s) without variance left out" in g.note
    # a model keeping only the 50 modes with variance holds all the energy: same answer
    kept = gavish_donoho(decomposition_of(x, 50))
    assert (kept.rank, kept.threshold) == (3, pytest.approx(tau, rel=1e-9))


def test_gavish_donoho_not_applicable_cases():
    rng = np.random.default_rng(2)
    x = rng.normal(size=(40, 60)) * np.linspace(10, 1, 40)[:, None]
    d = decomposition_of(x, 3)    # 3 of 40 modes: the median is unknown
    s = gavish_donoho(d)
    assert s.rank is None and s.needed_rank == 21 and "analyse with rank 21" in s.note
    tiny = decomposition_of(rng.normal(size=(5, 2)), 1)
    assert gavish_donoho(tiny).rank is None
    assert gavish_donoho(tiny).note == "needs at least 3 images"
    # exactly low-rank data (no noise): 2 of 30 modes carry variance
    exact = rng.normal(size=(30, 2)) @ rng.normal(size=(2, 80))
    e = gavish_donoho(decomposition_of(exact, 30))
    assert e.rank is None and "exactly low-rank" in e.note
    with pytest.raises(TypeError, match="decomposition must be a Decomposition"):
        gavish_donoho(None)


# ----- the default rank ----------------------------------------------------------------------

def test_default_rank_is_the_95_percent_rank_whatever_k():
    from modescope.core.review.rank import DEFAULT_ENERGY_SHARE, DefaultRank, default_rank
    assert DEFAULT_ENERGY_SHARE == 0.95
    rng = np.random.default_rng(5)
    x = rng.normal(size=(30, 60)) * np.geomspace(10, 0.1, 30)[:, None]
    c = x - x.mean(axis=1, keepdims=True)
    s = np.linalg.svd(c, compute_uv=False)                      # LAPACK reference
    cum = np.cumsum(s ** 2) / np.sum(s ** 2)
    expect = int(np.searchsorted(cum, 0.95) + 1)
    assert 1 < expect < 10
    for k in (expect, 10, 29):                                  # the same rank for any k >= it
        found = default_rank(decomposition_of(x, k))
        assert isinstance(found, DefaultRank)
        rank, reason = found
        assert rank == expect
        assert reason == (f"the smallest rank capturing 95 % of the energy ({expect} modes "
                          f"capture {100 * cum[expect - 1]:.1f} %)")
    # fewer modes than that: all kept modes, and the reason says they fall short
    short = default_rank(decomposition_of(x, expect - 1))
    assert short.rank == expect - 1
    assert short.reason == (f"all {expect - 1} modes of the model: together they capture "
                            f"{100 * cum[expect - 2]:.1f} % of the energy, less than 95 %")


def test_default_rank_edge_cases():
    from modescope.core.review.rank import default_rank
    # one dominant mode: "1 mode captures"
    x = np.outer(np.arange(8.0), np.linspace(-1, 1, 20)) + 1e-3 * np.random.default_rng(0) \
        .normal(size=(8, 20))
    one = default_rank(decomposition_of(x, 5))
    assert one.rank == 1 and "(1 mode captures 100.0 %)" in one.reason
    # no mode at all: rank 0
    flat = decomposition_of(np.ones((8, 5)), 0)
    assert default_rank(flat) == (0, "the model has no basis image (the images do not vary)")
    with pytest.raises(TypeError, match="decomposition must be a Decomposition"):
        default_rank("model.npz")


def test_percentages_written_one_way():
    """Every share in the rank and accuracy sentences is written "95 %" (a space before the
    sign), as the workbench and the command line's level ("99 %") write it."""
    import re

    from modescope.core.review.accuracy import describe_accuracy
    from modescope.core.review.rank import default_rank

    rng = np.random.default_rng(1)
    x = rng.normal(size=(30, 50)) * np.linspace(5, 0.1, 30)[:, None]
    d = decomposition_of(x, 12)
    d = d.replace(exact=True, singular_value_error=np.full(12, 1e-9))
    texts = [default_rank(d).reason, default_rank(decomposition_of(x, 2)).reason,
             energy_rank(d, 0.9).describe(), energy_rank(decomposition_of(x, 2), 0.99).describe(),
             describe_accuracy(d)]
    for text in texts:
        assert "%" in text
        assert re.search(r"\d%", text) is None, text
        assert re.search(r"\d %", text) is not None, text
