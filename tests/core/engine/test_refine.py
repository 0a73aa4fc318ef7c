"""Refinement passes and the per-mode certificate, checked against LAPACK.

Outside references: numpy's LAPACK SVD (``numpy.linalg.svd``, gesdd) on the same decoded
float32 data in float64; scipy.linalg.subspace_angles for principal angles; the
Eckart-Young-Mirsky theorem (the rank-k truncated SVD is the best rank-k approximation in the
Frobenius norm); scikit-learn's bundled digits (``sklearn.datasets.load_digits``).
"""

from __future__ import annotations

import numpy as np
import pytest
from PIL import Image
from scipy.linalg import subspace_angles

from modescope.core.engine.pipeline import AnalysisOptions, analyze, update_analysis
from modescope.core.engine.refine import PassAccumulator, certify, rayleigh_ritz_step
from modescope.core.sources.scan import scan_sources


@pytest.fixture(scope="module")
def digits(tmp_path_factory):
    """scikit-learn's bundled digits as 8-bit PNG files (values 0..16 times 15: exact)."""
    from sklearn.datasets import load_digits
    folder = tmp_path_factory.mktemp("digits")
    images = (load_digits().images * 15).astype(np.uint8)
    for i, img in enumerate(images):
        Image.fromarray(img).save(folder / f"d_{i:04d}.png")
    X = images.reshape(len(images), -1).T.astype(np.float32) / np.float32(255)
    A = X.astype(np.float64) - X.astype(np.float64).mean(axis=1, keepdims=True)
    u, s, _ = np.linalg.svd(A, full_matrices=False)          # LAPACK reference
    return folder, X, A, u, s


@pytest.mark.parametrize("rank, lanes", [(5, 0), (20, 0), (40, 0), (20, 2), (40, 3)])
def test_digits_match_lapack_and_the_bound_holds(digits, rank, lanes):
    # lanes: the passes' blocks shared out between that many threads (pass_blas_threads)
    folder, X, A, u, s = digits
    d = analyze([folder], AnalysisOptions(rank=rank, max_passes=8,
                                          pass_blas_threads=lanes)).decomposition
    err = np.abs(d.singular_values - s[:rank])
    # singular values within 1e-4 relative of LAPACK
    assert np.all(err <= 1e-4 * s[:rank])
    # the certificate holds for every mode: |computed - LAPACK| <= stored bound
    assert d.singular_value_error is not None
    assert np.all(err <= d.singular_value_error)
    # and it says the model is converged to the default tolerance
    assert d.unconverged_modes(1e-4).size == 0
    assert d.metadata["refinement"]["unconverged"] == []
    # principal angles of the top 10 below 0.1 degree (scipy.linalg.subspace_angles)
    top = min(10, rank)
    angles = np.degrees(subspace_angles(d.basis[:, :top].astype(np.float64), u[:, :top]))
    assert angles.max() < 0.1
    # reconstruction within 1.0005 of the Eckart-Young-Mirsky optimum
    approx = d.basis.astype(np.float64) @ d.weights
    optimum = np.sqrt(np.sum(s[rank:] ** 2))
    assert np.linalg.norm(A - approx) <= 1.0005 * optimum
    # exact energy bookkeeping
    assert d.total_energy == pytest.approx(np.sum(s ** 2), rel=1e-5)


def test_order_of_the_images_does_not_matter(digits, tmp_path):
    folder, X, A, u, s = digits
    options = AnalysisOptions(rank=20, max_passes=8)
    forward = analyze([folder], options).decomposition
    files = sorted(folder.glob("*.png"))
    rng = np.random.default_rng(3)
    for order in (files[::-1], [files[i] for i in rng.permutation(len(files))]):
        sset = scan_sources([str(p) for p in order])
        # keep the given order (the scan sorts folders, not an explicit file list)
        other = analyze(sset, options).decomposition
        assert other.paths[0] == str(order[0])
        np.testing.assert_allclose(other.singular_values, forward.singular_values, rtol=1e-4)


def test_update_in_two_halves_equals_one_run(digits, tmp_path):
    folder, X, A, u, s = digits
    files = sorted(folder.glob("*.png"))
    half = len(files) // 2
    first, second = tmp_path / "a", tmp_path / "b"
    first.mkdir()
    second.mkdir()
    for p in files[:half]:
        (first / p.name).write_bytes(p.read_bytes())
    for p in files[half:]:
        (second / p.name).write_bytes(p.read_bytes())
    options = AnalysisOptions(rank=20, max_passes=8)
    base = analyze([first], options).decomposition
    updated = update_analysis(base, [second], options).decomposition
    one = analyze([folder], options).decomposition
    assert updated.n_images == one.n_images == len(files)
    np.testing.assert_allclose(updated.singular_values, one.singular_values, rtol=1e-4)
    np.testing.assert_allclose(updated.singular_values, s[:20], rtol=1e-4)   # LAPACK
    assert np.all(np.abs(updated.singular_values - s[:20]) <= updated.singular_value_error)


def test_slowly_decaying_spectrum_bound_holds_and_says_what_is_not_converged(tmp_path):
    # invented smooth data with a slowly decaying spectrum (no gap): with one pass the tail
    # cannot converge; the model must say so, and every bound must still hold (LAPACK)
    rng = np.random.default_rng(11)
    rows = cols = 16
    n = 400
    freqs = np.arange(1, 41)
    basis = np.linalg.qr(rng.standard_normal((rows * cols, 40)))[0]
    coeffs = rng.standard_normal((40, n)) * (1.0 / freqs)[:, None]
    X = 0.5 + 0.05 * basis @ coeffs + 0.002 * rng.standard_normal((rows * cols, n))
    images = np.clip(np.round(X * 255), 0, 255).astype(np.uint8)
    for i in range(n):
        Image.fromarray(images[:, i].reshape(rows, cols)).save(tmp_path / f"f_{i:03d}.png")
    Xf = images.astype(np.float32) / np.float32(255)
    A = Xf.astype(np.float64) - Xf.astype(np.float64).mean(axis=1, keepdims=True)
    s = np.linalg.svd(A, compute_uv=False)                      # LAPACK reference
    quick = analyze([tmp_path], AnalysisOptions(rank=30, oversample=2, max_passes=1))
    d = quick.decomposition
    assert np.all(np.abs(d.singular_values - s[:30]) <= d.singular_value_error)
    assert d.metadata["refinement"]["passes"] == 1
    assert d.unconverged_modes(1e-4).size > 0          # it says the tail is not converged
    assert d.metadata["refinement"]["unconverged"] == [int(i) + 1 for i in
                                                       d.unconverged_modes(1e-4)]
    full = analyze([tmp_path], AnalysisOptions(rank=30, oversample=30, max_passes=30))
    e = full.decomposition
    assert np.all(np.abs(e.singular_values - s[:30]) <= e.singular_value_error)
    np.testing.assert_allclose(e.singular_values, s[:30], rtol=1e-3)   # no gap: 1e-3


def test_certificate_formula_on_a_known_matrix():
    # the formulas by hand: theta = (9, 0), r = (0.3, 0.04). Mode 1 is separated from the other
    # interval by delta = 9 - 0.04 = 8.96 > r, so Kato-Temple gives 0.3**2 / 8.96, divided by
    # s = 3; mode 2 (nothing known beyond it) keeps the residual bound, sqrt(0.04) as s = 0
    sv = certify(np.array([3.0, 0.0]), np.array([0.3, 0.04]), rounding=0.01)
    assert sv.tolist() == pytest.approx([0.09 / 8.96 / 3 + 0.01, 0.2 + 0.01])
    rng = np.random.default_rng(0)
    X = rng.standard_normal((30, 12)).astype(np.float32)
    mean = X.mean(axis=1)
    A = X.astype(np.float64) - mean[:, None]
    u = np.linalg.qr(rng.standard_normal((30, 5)))[0]
    acc = PassAccumulator(u, mean, 12)
    acc.add(X[:, :7])
    acc.add(X[:, 7:])
    step = rayleigh_ritz_step(acc)
    s = np.linalg.svd(A, compute_uv=False)                       # LAPACK
    # each Ritz value is below its singular value (Cauchy interlacing) and the bound holds
    assert np.all(step.singular_values <= s[:5] * (1 + 1e-6))
    lam = s ** 2
    for i in range(5):
        theta = step.singular_values[i] ** 2
        nearest = np.min(np.abs(lam - theta))
        assert nearest <= step.error[i] * step.singular_values[i] * (1 + 1e-6)


def test_passes_in_several_lanes_agree_with_one_and_do_not_depend_on_timing(digits):
    # the same collection with the passes' blocks in one, two and three threads: the lanes
    # only change where float64 sums of float32 products are split
    folder = digits[0]
    runs = {lanes: analyze([folder], AnalysisOptions(rank=20, block_size=64, max_passes=3,
                                                     pass_blas_threads=lanes)).decomposition
            for lanes in (0, 2, 3)}
    again = analyze([folder], AnalysisOptions(rank=20, block_size=64, max_passes=3,
                                              pass_blas_threads=2)).decomposition
    one = runs[0]
    for lanes in (2, 3):
        d = runs[lanes]
        assert d.metadata["refinement"]["passes"] == one.metadata["refinement"]["passes"]
        np.testing.assert_allclose(d.singular_values, one.singular_values, rtol=1e-9)
        np.testing.assert_allclose(d.weights, one.weights, rtol=1e-6, atol=1e-6)
        np.testing.assert_allclose(d.residual, one.residual, rtol=1e-6, atol=1e-9)
    # two runs with the same lanes are identical to the last bit
    np.testing.assert_array_equal(again.singular_values, runs[2].singular_values)
    np.testing.assert_array_equal(again.weights, runs[2].weights)


@pytest.mark.parametrize("lanes", [0, 2])
def test_a_stop_during_a_later_pass_keeps_the_last_complete_pass(digits, lanes):
    # cancel once the second pass has started: the result is the first pass's exact
    # projections (final, certified as far as one pass goes), marked as interrupted
    folder, X, A, u, s = digits
    seen = []

    def progress(p):
        seen.append((p.stage, p.detail))

    def cancel():
        return any(stage == "score" and detail.startswith("pass 2") for stage, detail in seen)

    result = analyze([folder], AnalysisOptions(rank=40, max_passes=6, tolerance=1e-9,
                                               pass_blas_threads=lanes),
                     progress=progress, cancel=cancel)
    d = result.decomposition
    assert result.cancelled and d.exact
    assert d.metadata["refinement"]["passes"] == 1 and d.metadata["refinement"]["interrupted"]
    assert np.all(np.abs(d.singular_values - s[:40]) <= d.singular_value_error)   # LAPACK


def test_the_passes_start_from_an_orthonormal_basis(digits, monkeypatch):
    # the streaming basis may drift up to 1e-5 from orthonormal between corrections; the
    # passes must get an orthonormalised copy (their Rayleigh-Ritz step assumes one), and the
    # result still matches LAPACK within its bound
    from modescope.core.engine import pipeline
    folder, X, A, u, s = digits
    real_learn, real_refine = pipeline.learn, pipeline.refine
    rng = np.random.default_rng(5)
    starts = []

    def learn_then_drift(engine, *args, **kwargs):
        learned = real_learn(engine, *args, **kwargs)
        q = engine.basis.shape[1]
        drift = np.eye(q) + 1.5e-6 * rng.normal(size=(q, q))
        engine.basis = np.asfortranarray(
            (engine.basis.astype(np.float64) @ drift).astype(np.float32))
        off = np.abs(engine.basis.astype(np.float64).T @ engine.basis - np.eye(q)).max()
        assert off > 2e-6
        return learned

    def refine_and_keep_start(basis, *args, **kwargs):
        starts.append(np.array(basis, dtype=np.float64))
        return real_refine(basis, *args, **kwargs)

    monkeypatch.setattr(pipeline, "learn", learn_then_drift)
    monkeypatch.setattr(pipeline, "refine", refine_and_keep_start)
    d = analyze([folder], AnalysisOptions(rank=20)).decomposition
    (start,) = starts
    assert np.abs(start.T @ start - np.eye(start.shape[1])).max() <= 1e-6
    err = np.abs(d.singular_values - s[:20])                  # LAPACK reference
    assert np.all(err <= d.singular_value_error)
    assert np.all(err <= 1e-4 * s[:20])
