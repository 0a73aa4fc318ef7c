"""Arithmetic shortcuts of the learning pass and the refinement passes keep their accuracy.

References: the float64 sums of numpy (squared norms) and the streaming update with every
second projection made (``_REPROJECT_BELOW = 0`` forces the check of a second projection on
every block), on the same data.
"""

import numpy as np
import pytest

import modescope.core.engine.streaming as streaming
from modescope.core.engine.refine import row_energy
from modescope.core.engine.streaming import StreamingSVD


@pytest.mark.parametrize("pixels", [1, 5, 1023, 1024, 1025, 3000, 16384, 40000])
@pytest.mark.parametrize("order", ["C", "F"])
def test_row_energy_matches_float64_sums(pixels, order):
    rng = np.random.default_rng(pixels)
    rows = np.asarray(rng.standard_normal((6, pixels)) * 0.3 + 0.2, dtype=np.float32,
                      order=order)
    reference = np.sum(rows.astype(np.float64) ** 2, axis=1)      # numpy, float64
    got = row_energy(rows)
    assert got.dtype == np.float64 and got.shape == (6,)
    # float32 runs of 1024 pixels: about sqrt(1024) * 2**-24 relative at worst
    np.testing.assert_allclose(got, reference, rtol=2e-6, atol=0)


def test_row_energy_of_zero_rows_is_zero():
    assert row_energy(np.zeros((3, 2048), dtype=np.float32)).tolist() == [0.0, 0.0, 0.0]


def _stream(data, reproject_below, monkeypatch):
    monkeypatch.setattr(streaming, "_REPROJECT_BELOW", reproject_below)
    engine = StreamingSVD(data.shape[0], rank=8, oversample=6)
    for start in range(0, data.shape[1], 50):
        engine.update(np.asfortranarray(data[:, start:start + 50]))
    return engine


@pytest.mark.parametrize("noise", [0.3, 1e-4])
def test_skipping_the_second_projection_changes_nothing_that_matters(noise, monkeypatch):
    # invented low-rank-plus-noise columns; noise 0.3 keeps every column well outside the
    # basis (the second projection is skipped), 1e-4 does not (it is made)
    rng = np.random.default_rng(7)
    pixels, n = 900, 400
    patterns = np.linalg.qr(rng.standard_normal((pixels, 8)))[0]
    data = (patterns @ (rng.standard_normal((8, n)) * np.geomspace(30, 3, 8)[:, None])
            + noise * rng.standard_normal((pixels, n)) + 1.0).astype(np.float32)
    fast = _stream(data, streaming._REPROJECT_BELOW, monkeypatch)
    careful = _stream(data, 0.0, monkeypatch)
    np.testing.assert_allclose(fast.singular_values[:8], careful.singular_values[:8],
                               rtol=1e-5)
    # the basis stays orthonormal to float32 accuracy either way
    gram = fast.basis.T.astype(np.float64) @ fast.basis.astype(np.float64)
    assert np.max(np.abs(gram - np.eye(gram.shape[0]))) < 1e-5
    # and both agree with LAPACK on the centred data (numpy.linalg.svd, float64)
    centred = data.astype(np.float64) - data.mean(axis=1, keepdims=True)
    exact = np.linalg.svd(centred, compute_uv=False)[:8]
    np.testing.assert_allclose(fast.singular_values[:8], exact, rtol=1e-3)


def test_weights_stay_right_across_many_flushes_and_merges(monkeypatch):
    # exactly rank-5 data (invented) with 8 internal directions: the streaming weights are
    # then the exact coordinates U^T (x - mean), whatever the book-keeping of the pieces
    monkeypatch.setattr(streaming, "_CHUNKS_PER_FLUSH", 2)
    rng = np.random.default_rng(3)
    pixels, n = 120, 7 * 61
    data = (rng.standard_normal((pixels, 5)) @ rng.standard_normal((5, n))
            + 3.0).astype(np.float32)
    engine = StreamingSVD(pixels, rank=5, oversample=3)
    groups_seen = []
    for start in range(0, n, 7):
        engine.update(np.asfortranarray(data[:, start:start + 7]))
        groups_seen.append(len(engine._groups))
    flushes = n // 7 // 2
    # binary merging: never more groups than bits in the number of flushes
    assert max(groups_seen) <= int(np.log2(flushes)) + 1
    snap = engine.snapshot()
    centred = data.astype(np.float64) - data.mean(axis=1, keepdims=True)
    expected = snap.basis.astype(np.float64).T @ centred        # numpy, float64
    np.testing.assert_allclose(snap.weights, expected, atol=2e-3 * np.abs(expected).max())
    # the weights rows reproduce the data: rank-5 reconstruction error at float32 level
    recon = snap.basis.astype(np.float64) @ snap.weights
    assert np.max(np.abs(recon - centred)) < 1e-3 * np.abs(centred).max()
