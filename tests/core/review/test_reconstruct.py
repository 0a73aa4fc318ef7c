"""Incremental live reconstruction equals the direct formula at every rank."""

import numpy as np
import pytest

from modescope.core.decomposition import Decomposition
from modescope.core.review.reconstruct import LiveReconstruction


@pytest.fixture()
def decomposition():
    # reference factors from LAPACK (numpy.linalg.svd) of a random centred matrix
    rng = np.random.default_rng(0)
    x = rng.random((6 * 7 * 3, 40))
    mean = x.mean(axis=1)
    u, s, _ = np.linalg.svd(x - mean[:, None], full_matrices=False)
    k = 30
    return Decomposition(mean=mean.astype(np.float32), basis=u[:, :k].astype(np.float32),
                         singular_values=s[:k], weights=u[:, :k].T @ (x - mean[:, None]),
                         total_energy=float(np.sum((x - mean[:, None]) ** 2)),
                         image_shape=(6, 7, 3))


def test_matches_direct_reconstruction_along_a_slider_walk(decomposition):
    live = LiveReconstruction(decomposition, 5, refresh_after=10_000)
    rng = np.random.default_rng(1)
    walk = list(range(0, 31)) + list(range(30, -1, -1)) + list(rng.integers(0, 31, 200))
    for r in walk:
        got = live.at(int(r))
        np.testing.assert_allclose(got, decomposition.reconstruct(5, int(r)), atol=2e-5)
    assert live.image_at(7).shape == (6, 7, 3)


def test_full_rank_reconstruction_is_the_image(decomposition):
    # with every non-zero mode, the reconstruction equals mean + C column (up to float32)
    live = LiveReconstruction(decomposition, 0)
    direct = decomposition.mean + decomposition.basis @ decomposition.weights[:, 0].astype(
        np.float32)
    np.testing.assert_allclose(live.at(30), direct, atol=1e-5)
    np.testing.assert_allclose(live.at(0), decomposition.mean, atol=1e-6)


def test_validation(decomposition):
    with pytest.raises(ValueError, match="index must be at most 39"):
        LiveReconstruction(decomposition, 40)
    live = LiveReconstruction(decomposition, 1)
    with pytest.raises(ValueError, match="rank must be at most 30"):
        live.at(31)
    with pytest.raises(TypeError, match="must be a Decomposition"):
        LiveReconstruction("model", 0)


def test_residual_image_is_the_image_minus_the_reconstruction(decomposition):
    # reference: the column of the data matrix the factors came from, x = mean + C[:, i]
    d = decomposition
    live = LiveReconstruction(d, 5)
    x = (d.mean.astype(np.float64) + d.basis.astype(np.float64) @ d.weights[:, 5])
    image = x.reshape(6, 7, 3).astype(np.float32)
    for r in (0, 1, 12, 30, 3):
        got = live.residual_image(image, r)
        assert got.shape == (6, 7, 3) and got.dtype == np.float32
        direct = image.astype(np.float64) - d.reconstruct(5, r).reshape(6, 7, 3)
        np.testing.assert_allclose(got, direct, atol=2e-5)
        # its squared norm is the energy of the weights of the modes left out (orthonormal basis)
        np.testing.assert_allclose(np.sum(got.astype(np.float64) ** 2),
                                   np.sum(d.weights[r:, 5] ** 2), rtol=1e-4, atol=1e-8)
    # a raveled image gives the same; the returned array is a new one each time
    np.testing.assert_array_equal(live.residual_image(image.ravel(), 3),
                                  live.residual_image(image, 3))
    assert not np.shares_memory(live.residual_image(image, 3), live.at(3))


def test_residual_image_validation(decomposition):
    live = LiveReconstruction(decomposition, 2)
    with pytest.raises(ValueError, match=r"image must have shape \(6, 7, 3\) or \(126,\)"):
        live.residual_image(np.zeros((7, 6, 3)), 1)
    with pytest.raises(TypeError, match="numeric"):
        live.residual_image(np.array([["a"] * 3] * 42), 1)
    with pytest.raises(ValueError, match="rank must be at most 30"):
        live.residual_image(np.zeros((6, 7, 3)), 31)
