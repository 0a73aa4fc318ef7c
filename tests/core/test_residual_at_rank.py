"""Decomposition.residual_at_rank for every image and for one image."""

import numpy as np
import pytest

from modescope.core.decomposition import Decomposition


@pytest.fixture()
def decomposition():
    # reference factors from LAPACK (numpy.linalg.svd) of a random matrix, rank 4 of 9 kept
    rng = np.random.default_rng(3)
    x = rng.random((30, 10))
    mean = x.mean(axis=1)
    c = x - mean[:, None]
    u, s, _ = np.linalg.svd(c, full_matrices=False)
    k = 4
    weights = u[:, :k].T @ c
    residual = np.sum((c - u[:, :k] @ weights) ** 2, axis=0)
    d = Decomposition(mean=mean.astype(np.float32), basis=u[:, :k].astype(np.float32),
                      singular_values=s[:k], weights=weights, total_energy=float(np.sum(c ** 2)),
                      image_shape=(5, 6, 1), residual=residual, exact=True)
    return d, c, u


def test_residual_at_rank_is_the_squared_norm_left_out(decomposition):
    d, c, u = decomposition
    for r in range(0, 5):
        # reference: ||c_i - U_r U_r^T c_i||^2 straight from the data
        expected = np.sum((c - u[:, :r] @ (u[:, :r].T @ c)) ** 2, axis=0)
        np.testing.assert_allclose(d.residual_at_rank(r), expected, rtol=1e-10, atol=1e-12)
        for i in (0, 7, 9):
            one = d.residual_at_rank(r, index=i)
            assert isinstance(one, float)
            assert one == pytest.approx(expected[i], rel=1e-10, abs=1e-12)
    # rank 0 is the image's whole centred energy
    assert d.residual_at_rank(0, index=2) == pytest.approx(float(np.sum(c[:, 2] ** 2)), rel=1e-10)
    np.testing.assert_allclose(d.residual_at_rank(), d.residual)


def test_residual_at_rank_validation(decomposition):
    d, _, _ = decomposition
    with pytest.raises(ValueError, match="index must be at most 9"):
        d.residual_at_rank(2, index=10)
    with pytest.raises(TypeError, match="index must be an integer"):
        d.residual_at_rank(2, index=1.0)
    with pytest.raises(ValueError, match="rank must be at most 4"):
        d.residual_at_rank(5, index=0)
    with pytest.raises(ValueError, match="no residuals yet"):
        d.replace(residual=None).residual_at_rank(1, index=0)
