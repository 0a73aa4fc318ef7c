"""Property tests (hypothesis) of the streaming engine: whatever the block sizes and the order of
the images, the basis is orthonormal, the singular values are non-negative and descending, and
the energy bookkeeping is exact.

Outside reference for the energy: the squared Frobenius norm of the centred matrix computed
directly in float64 (numpy); for the singular values, LAPACK (numpy.linalg.svd): a truncated
SVD's singular values never exceed the true ones by more than rounding (they are singular values
of a projection of the data).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from modescope.core.engine.streaming import StreamingSVD


@st.composite
def collections(draw):
    pixels = draw(st.integers(4, 40))
    n = draw(st.integers(2, 60))
    true_rank = draw(st.integers(1, min(pixels, n)))
    seed = draw(st.integers(0, 2 ** 32 - 1))
    rng = np.random.default_rng(seed)
    scales = 10.0 ** rng.uniform(-3, 0, true_rank)          # spectra over up to 3 decades
    data = (rng.standard_normal((pixels, true_rank)) * scales) @ rng.standard_normal(
        (true_rank, n))
    data = (data + rng.uniform(-1, 1, (pixels, 1))).astype(np.float32)
    if draw(st.booleans()):                                  # repeated images
        data[:, n // 2:] = data[:, : n - n // 2]
    order = draw(st.permutations(list(range(n))))
    cuts = sorted(set(draw(st.lists(st.integers(1, n - 1), max_size=6))))
    rank = draw(st.integers(1, 8))
    oversample = draw(st.integers(0, 6))
    return data, order, cuts, rank, oversample


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(collections())
def test_any_block_order_and_size(case):
    data, order, cuts, rank, oversample = case
    data = data[:, order]
    engine = StreamingSVD(data.shape[0], rank, oversample)
    for start, stop in zip([0, *cuts], [*cuts, data.shape[1]]):
        engine.update(data[:, start:stop])
    d = engine.snapshot()
    k = d.rank
    # orthonormal basis (float32 data: 1e-4 is rounding)
    gram = d.basis.astype(np.float64).T @ d.basis.astype(np.float64)
    assert np.allclose(gram, np.eye(k), atol=1e-4)
    # non-negative, descending singular values
    s = d.singular_values
    assert np.all(s >= 0) and np.all(np.diff(s) <= 1e-6 * max(s[0] if s.size else 0, 1e-30))
    # exact energy bookkeeping against the centred matrix (float64, numpy)
    x = data.astype(np.float64)
    centred = x - x.mean(axis=1, keepdims=True)
    energy = float(np.sum(centred ** 2))
    assert d.total_energy == pytest.approx(energy, rel=1e-4, abs=1e-9 * float(np.sum(x ** 2)))
    np.testing.assert_allclose(d.mean, x.mean(axis=1), rtol=1e-5, atol=1e-6)
    # the kept energy never exceeds the total, and no singular value exceeds LAPACK's
    assert float(np.sum(s ** 2)) <= energy * (1 + 1e-4) + (1e-6 * float(np.linalg.norm(x))) ** 2
    lapack = np.linalg.svd(centred, compute_uv=False)
    # float32 centring rounds every value by about 6e-8 of its raw size: a floor relative to
    # the raw data's norm, not to the centred spectrum
    floor = 1e-6 * float(np.linalg.norm(x))
    assert np.all(s <= lapack[:k] * (1 + 1e-3) + floor)
