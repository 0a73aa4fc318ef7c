"""Outside check of the near-duplicate groups on scikit-learn's bundled digits.

Source of the images: ``sklearn.datasets.load_digits`` (1,797 images of 8x8 pixels) with planted
exact and near copies. Source of the true distances: numpy (``np.linalg.norm`` of the pixel
differences of the centred images). Source of the model: numpy's LAPACK SVD.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_digits

from modescope.core.decomposition import Decomposition, fix_signs
from modescope.core.review.duplicates import DEFAULT_TOLERANCE, find_duplicates


def _model(X, K) -> Decomposition:
    """Exact mean-centred SVD of the columns of X (numpy LAPACK), keeping K modes."""
    mean = X.mean(axis=1)
    C = X - mean[:, None]
    U, s, Vt = np.linalg.svd(C, full_matrices=False)
    basis, weights = fix_signs(U[:, :K], s[:K, None] * Vt[:K])
    residual = np.sum((C - basis @ weights) ** 2, axis=0)
    return Decomposition(mean=mean.astype(np.float32), basis=basis.astype(np.float32),
                         singular_values=s[:K].copy(), weights=weights,
                         total_energy=float(np.sum(C ** 2)), image_shape=(8, 8, 1),
                         residual=residual, exact=True)


@pytest.fixture(scope="module")
def digits_with_copies():
    """Digits (scikit-learn) plus exact copies of 3 and 700 and near copies of 42 and 1500."""
    X = load_digits().data.T.astype(np.float64)          # 64 x 1797, values 0..16
    n = X.shape[1]
    rng = np.random.default_rng(12)
    near = X[:, [42, 1500]] + 0.02 * rng.standard_normal((64, 2))
    X = np.hstack([X, X[:, [3, 700]], near])
    planted = {(3, n), (700, n + 1), (42, n + 2), (1500, n + 3)}
    return X, planted


def _true_distances(X):
    return lambda i, j: float(np.linalg.norm(X[:, i] - X[:, j]))      # numpy


def _check_every_pair(report, X):
    distance = _true_distances(X)
    limit = report.threshold + 1e-6 * report.rms_norm
    for g in report.groups:
        for a, i in enumerate(g.indices):
            for j in g.indices[a + 1:]:
                assert distance(i, j) <= limit, (g.indices, i, j)
        for i, dist in zip(g.indices, g.distances):
            assert distance(g.indices[0], i) <= dist * (1 + 1e-9) + 1e-9


@pytest.mark.parametrize("tolerance", [DEFAULT_TOLERANCE, 0.2, 0.3])
def test_truncated_model_with_pixels_finds_copies_and_only_true_pairs(digits_with_copies,
                                                                      tolerance):
    X, planted = digits_with_copies
    d = _model(X, 20)
    report = find_duplicates(d, tolerance=tolerance, read_image=lambda i: X[:, i])
    _check_every_pair(report, X)
    groups = {g.indices for g in report.groups}
    if tolerance == DEFAULT_TOLERANCE:
        assert groups == planted        # ordinary digits are >= 15 % apart
    else:
        for pair in planted:
            assert any(set(pair) <= set(g) for g in groups), pair
    seen = [i for g in report.groups for i in g.indices]
    assert len(seen) == len(set(seen))


def test_bounds_only_confirms_only_true_pairs(digits_with_copies):
    X, planted = digits_with_copies
    truncated = find_duplicates(_model(X, 20), tolerance=0.2)
    _check_every_pair(truncated, X)
    assert truncated.n_unsure > 0            # pairs the bounds cannot decide are left out
    complete = find_duplicates(_model(X, 64), tolerance=DEFAULT_TOLERANCE)
    _check_every_pair(complete, X)
    assert {g.indices for g in complete.groups} == planted


def test_default_tolerance_groups_no_ordinary_digits():
    X = load_digits().data.T.astype(np.float64)
    report = find_duplicates(_model(X, 20), read_image=lambda i: X[:, i])
    assert report.groups == ()
