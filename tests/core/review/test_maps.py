"""Tests of modescope.core.review.maps: residual maps, T^2 contributions, per-pixel spread.

Outside references named beside each check: numpy's LAPACK SVD (numpy.linalg.svd) for the
model, numpy.std (ddof=1) for the per-pixel standard deviations, the Phase II limits of
core.review.check (themselves checked against scipy.stats in test_check.py).
"""

from __future__ import annotations

import numpy as np
import pytest
from PIL import Image

from modescope.core.decomposition import Decomposition, fix_signs
from modescope.core.engine.pipeline import AnalysisOptions, analyze
from modescope.core.errors import SourceError
from modescope.core.review.check import score_columns
from modescope.core.review.maps import (pixel_energy, pixel_energy_pass, pixel_spread,
                                        read_like_model, residual_map, t2_contributions)
from modescope.core.review.outliers import score_table

SHAPE = (16, 16, 1)


def lapack_model(X, K, shape=SHAPE) -> Decomposition:
    """Exact mean-centred SVD of the columns of X (numpy.linalg.svd, LAPACK), K modes."""
    X = np.asarray(X, dtype=np.float64)
    mean = X.mean(axis=1)
    C = X - mean[:, None]
    U, s, Vt = np.linalg.svd(C, full_matrices=False)
    basis, weights = fix_signs(U[:, :K], s[:K, None] * Vt[:K])
    residual = np.sum((C - basis @ weights) ** 2, axis=0)
    return Decomposition(mean=mean.astype(np.float32), basis=basis.astype(np.float32),
                         singular_values=s[:K].copy(), weights=weights,
                         total_energy=float(np.sum(C ** 2)), image_shape=shape,
                         residual=residual, exact=True)


def smooth_images(seed, n, noise=0.02):
    """16x16 images: three smooth patterns with Gaussian weights plus white noise."""
    rng = np.random.default_rng(seed)
    r, c = np.mgrid[0:16, 0:16] / 15.0
    patterns = np.stack([np.sin(np.pi * r), np.cos(np.pi * c), r * c]).reshape(3, -1).T
    return 0.5 + patterns @ (rng.standard_normal((3, n)) * [[0.2], [0.15], [0.1]]) \
        + noise * rng.standard_normal((256, n))


def test_a_planted_blob_is_flagged_and_its_residual_map_peaks_at_the_blob():
    d = lapack_model(smooth_images(0, 300), K=30)
    new = smooth_images(1, 6)
    rows, cols = np.mgrid[0:16, 0:16]
    blob = 0.3 * np.exp(-((rows - 4) ** 2 + (cols - 11) ** 2) / 2.0)
    new[:, 0] += blob.reshape(-1)
    result = score_columns(d, new, rank=3)
    assert result.table.flag[0] and result.table.q_flag[0]
    # the Phase II limit flags none of the five ordinary images here
    assert not np.any(result.table.flag[1:])
    resid = residual_map(d, new[:, 0], rank=3)
    assert resid.shape == SHAPE
    assert np.unravel_index(np.argmax(np.abs(resid[..., 0])), (16, 16)) == (4, 11)
    # the map's squared sum is Q at that rank
    assert float(np.sum(resid.astype(np.float64) ** 2)) == pytest.approx(result.table.q[0],
                                                                         rel=1e-4)


def test_residual_map_of_rank_zero_is_the_centred_image_and_accepts_the_image_layout():
    d = lapack_model(smooth_images(2, 50), K=5)
    x = smooth_images(3, 1)[:, 0]
    np.testing.assert_allclose(residual_map(d, x, rank=0).reshape(-1), x - d.mean, atol=1e-6)
    np.testing.assert_array_equal(residual_map(d, x.reshape(SHAPE), 2),
                                  residual_map(d, x, 2))
    with pytest.raises(ValueError, match=r"model's shape \(16, 16, 1\)"):
        residual_map(d, np.zeros((8, 8)))
    with pytest.raises(ValueError, match="rank"):
        residual_map(d, x, rank=6)
    with pytest.raises(ValueError, match="finite"):
        residual_map(d, np.full(256, np.inf))


def test_t2_contributions_add_up_to_t2_and_point_at_the_unusual_mode():
    d = lapack_model(smooth_images(4, 200), K=8)
    x = smooth_images(5, 1)
    sd2 = d.singular_values[1] / np.sqrt(d.n_images - 1)
    x[:, 0] += 8.0 * sd2 * d.basis[:, 1]           # 8 standard deviations along mode 2
    result = score_columns(d, x, rank=4)
    parts = t2_contributions(d, result.weights[:, 0], rank=4)
    assert parts.shape == (4,)
    assert float(parts.sum()) == pytest.approx(result.table.t2[0], rel=1e-10)
    assert int(np.argmax(parts)) == 1
    # the model's own images: the same identity with score_table (Phase I)
    table = score_table(d, rank=4)
    np.testing.assert_allclose(t2_contributions(d, d.weights, 4).sum(axis=0), table.t2,
                               rtol=1e-10)
    with pytest.raises(ValueError, match="8 rows"):
        t2_contributions(d, np.zeros(3))


def test_pixel_spread_with_the_energy_is_numpy_std_of_the_data_and_of_the_residuals():
    X = smooth_images(6, 120)
    d = lapack_model(X, K=10)
    spread = pixel_spread(d, rank=3, energy=pixel_energy(d, X))
    assert spread.exact and spread.rank == 3
    # outside check: numpy.std with ddof=1 of the data and of the rank-3 residuals (LAPACK SVD)
    np.testing.assert_allclose(spread.collection.reshape(-1), np.std(X, axis=1, ddof=1),
                               rtol=1e-4)
    C = X - X.mean(axis=1, keepdims=True)
    U = np.linalg.svd(C, full_matrices=False)[0][:, :3]
    R = C - U @ (U.T @ C)
    np.testing.assert_allclose(spread.unexplained.reshape(-1),
                               np.sqrt(np.sum(R ** 2, axis=1) / (X.shape[1] - 1)), rtol=1e-3)


def test_pixel_spread_from_the_model_alone_spreads_the_tail_evenly_and_says_so():
    X = smooth_images(7, 400, noise=0.02)      # white noise: the even spread is right here
    d = lapack_model(X, K=10)
    spread = pixel_spread(d, rank=3)
    assert not spread.exact and "spread evenly" in spread.note
    np.testing.assert_allclose(spread.collection.reshape(-1), np.std(X, axis=1, ddof=1),
                               rtol=0.05)
    full = lapack_model(X, K=256)                # every mode held: nothing is assumed
    held = pixel_spread(full, rank=3)
    assert held.exact and "hold all the energy" in held.note
    np.testing.assert_allclose(held.collection.reshape(-1), np.std(X, axis=1, ddof=1),
                               rtol=1e-4)


def test_energy_pass_over_the_files_matches_the_decoded_images(tmp_path):
    folder = tmp_path / "frames"
    folder.mkdir()
    data = np.clip(smooth_images(8, 30), 0, 1)
    for i in range(30):
        img = (data[:, i].reshape(16, 16) * 255).round().astype(np.uint8)
        Image.fromarray(img).save(folder / f"f_{i:02d}.png")
    d = analyze([str(folder)], AnalysisOptions(rank=4)).decomposition
    seen = []
    energy, n_read, problems = pixel_energy_pass(d, progress=seen.append)
    assert n_read == 30 and problems == () and seen[-1].stage == "maps"
    decoded = np.stack([read_like_model(d, p).reshape(-1) for p in d.paths], axis=1)
    np.testing.assert_allclose(energy, pixel_energy(d, decoded), rtol=1e-5)
    assert pixel_energy_pass(d, cancel=lambda: True)[0] is None
    with pytest.raises(SourceError, match="size 4x4 differs from the model's 16x16"):
        Image.fromarray(np.zeros((4, 4), np.uint8)).save(tmp_path / "small.png")
        read_like_model(d, tmp_path / "small.png")
    with pytest.raises(SourceError, match="missing"):
        read_like_model(d, tmp_path / "gone.png")
