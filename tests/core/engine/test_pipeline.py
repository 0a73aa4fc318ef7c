"""The whole pipeline (files -> reader -> streaming SVD -> exact scoring pass) against LAPACK."""

import numpy as np
import pytest
from PIL import Image
from scipy.linalg import subspace_angles

from modescope.core.errors import NoUsableImagesError, SourceError
from modescope.core.engine.pipeline import (AnalysisOptions, analyze, load_analysis_image,
                                     project_images)


def write_pngs(folder, images):
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for i, img in enumerate(images):
        p = folder / f"img_{i}.png"
        Image.fromarray(img).save(p)
        paths.append(p)
    return paths


def decoded_matrix(paths):
    # the matrix as the files hold it: 8-bit values / 255, one column per image
    cols = [np.asarray(Image.open(p), dtype=np.float64).ravel() / 255.0 for p in paths]
    return np.stack(cols, axis=1)


def lapack(x):
    # reference: LAPACK SVD (numpy.linalg.svd) of the centred float64 matrix
    centred = x - x.mean(axis=1, keepdims=True)
    u, s, vt = np.linalg.svd(centred, full_matrices=False)
    return centred, u, s


@pytest.fixture(scope="module")
def digits_folder(tmp_path_factory):
    # open dataset shipped inside scikit-learn: 1,797 8x8 digit images with values 0..16
    from sklearn.datasets import load_digits
    digits = load_digits()
    images = np.round(digits.images[:600] * (255 / 16)).astype(np.uint8)
    folder = tmp_path_factory.mktemp("digits")
    paths = write_pngs(folder, images)
    return folder, paths


def test_digits_exact_when_rank_covers_pixels(digits_folder):
    folder, paths = digits_folder
    x = decoded_matrix(paths)
    centred, u, s = lapack(x)
    result = analyze([folder], AnalysisOptions(rank=64, block_size=64))
    d = result.decomposition
    assert d.exact and not result.cancelled
    # natural order: img_2 before img_10, so columns follow the file numbers
    assert [p.split("img_")[1] for p in d.paths[:12]] == [f"{i}.png" for i in range(12)]
    k = int(np.sum(s > 1e-6 * s[0]))
    np.testing.assert_allclose(d.singular_values[:k], s[:k], rtol=1e-4, atol=1e-5 * s[0])
    np.testing.assert_allclose(d.mean, x.mean(axis=1), atol=1e-5)
    assert d.total_energy == pytest.approx(np.sum(centred ** 2), rel=1e-6)
    ref_w = u[:, :20].T @ centred
    signs = np.sign(np.sum(ref_w * d.weights[:20], axis=1))
    np.testing.assert_allclose(d.weights[:20], signs[:, None] * ref_w, atol=1e-3 * s[0])
    # Eckart-Young-Mirsky, exact case: rank-r reconstruction error = sum of discarded s_j^2
    for r in (5, 15, 30):
        recon = d.mean[:, None] + d.basis[:, :r] @ d.weights[:r].astype(np.float32)
        err = np.sum((x - recon) ** 2)
        assert err == pytest.approx(np.sum(s[r:] ** 2), rel=1e-3)
        # and the stored residual at rank r says the same per image
        np.testing.assert_allclose(d.residual_at_rank(r), np.sum((x - recon) ** 2, axis=0),
                                   rtol=1e-3, atol=1e-6)


def test_digits_truncated_with_refinement(digits_folder):
    folder, paths = digits_folder
    x = decoded_matrix(paths)
    centred, u, s = lapack(x)
    d = analyze([folder], AnalysisOptions(rank=10, oversample=10)).decomposition
    # stated tolerance for the truncated, refined case on digits: 1% on the top-10 singular
    # values, 0.05 rad on the top-5 subspace
    np.testing.assert_allclose(d.singular_values, s[:10], rtol=1e-2)
    assert np.max(subspace_angles(d.basis[:, :5].astype(np.float64), u[:, :5])) < 0.05
    # Eckart-Young-Mirsky, streaming case: error never below the optimum
    recon = d.mean[:, None] + d.basis @ d.weights.astype(np.float32)
    err = np.sum((x - recon) ** 2)
    assert err >= np.sum(s[10:] ** 2) * (1 - 1e-4)
    # the residual from the scoring pass is exact for this basis
    np.testing.assert_allclose(d.residual, np.sum((x - recon) ** 2, axis=0), rtol=1e-3,
                               atol=1e-6)


def test_refinement_reduces_trailing_error(tmp_path):
    rng = np.random.default_rng(3)
    base = rng.random((6, 24, 24))
    imgs = []
    for _ in range(300):
        v = 0.45 + 0.08 * np.tensordot(rng.normal(size=6), base - 0.5, 1)
        v += 0.04 * rng.normal(size=(24, 24))
        imgs.append(np.clip(np.round(v * 255), 0, 255).astype(np.uint8))
    paths = write_pngs(tmp_path / "noisy", imgs)
    x = decoded_matrix(paths)
    _, _, s = lapack(x)
    partials = []
    refined = analyze([tmp_path / "noisy"], AnalysisOptions(rank=20, oversample=10),
                      on_partial=partials.append)
    streaming = partials[-1]          # snapshot after the last block, before the scoring pass
    assert streaming.n_images == 300 and not streaming.exact
    err_stream = np.max(np.abs(streaming.singular_values - s[:20]) / s[:20])
    err_ref = np.max(np.abs(refined.decomposition.singular_values - s[:20]) / s[:20])
    # the exact scoring pass can only raise the singular values towards the true ones
    # (Rayleigh-Ritz values are exact for the subspace and interlace with the true ones)
    assert err_ref < err_stream
    assert np.all(refined.decomposition.singular_values <= s[:20] * (1 + 1e-5))
    assert err_ref < 0.05     # stated bound on this noise-dominated tail, measured 3.3%


def test_progress_partial_and_cancel(tmp_path):
    rng = np.random.default_rng(4)
    imgs = [rng.integers(0, 255, size=(16, 16), dtype=np.uint8) for _ in range(100)]
    write_pngs(tmp_path / "c", imgs)
    seen, partials = [], []
    result = analyze([tmp_path / "c"], AnalysisOptions(rank=5, block_size=10),
                     progress=seen.append, on_partial=partials.append)
    stages = {p.stage for p in seen}
    assert {"learn", "score"} <= stages
    learn = [p for p in seen if p.stage == "learn"]
    assert learn[-1].done == learn[-1].total == 100
    assert [p.n_images for p in partials] == list(range(10, 101, 10))
    assert all(not p.exact for p in partials)
    # cancel after the third block: partial model of 30 images, consistent and usable
    count = {"n": 0}

    def cancel():
        return count["n"] >= 3

    def on_partial(snapshot):
        count["n"] += 1

    cancelled = analyze([tmp_path / "c"], AnalysisOptions(rank=5, block_size=10),
                        cancel=cancel, on_partial=on_partial)
    assert cancelled.cancelled
    d = cancelled.decomposition
    assert d.n_images == 30 and len(d.paths) == 30 and not d.exact
    assert d.metadata["stage"] == "cancelled"
    np.testing.assert_allclose(d.basis.T @ d.basis, np.eye(5), atol=1e-5)


def test_cancel_before_first_block_returns_none(tmp_path):
    write_pngs(tmp_path / "z", [np.zeros((4, 4), np.uint8)] * 3)
    result = analyze([tmp_path / "z"], AnalysisOptions(rank=2), cancel=lambda: True)
    assert result.cancelled and result.decomposition is None


def test_problems_reported_and_all_broken_is_an_error(tmp_path):
    folder = tmp_path / "mixed"
    write_pngs(folder, [np.full((8, 8), i, np.uint8) for i in range(5)])
    (folder / "broken.png").write_bytes(b"not really a png")
    result = analyze([folder], AnalysisOptions(rank=2))
    assert result.decomposition.n_images == 5
    assert any("broken.png" in p.path for p in result.problems)
    assert result.decomposition.metadata["problems"][0]["path"].endswith("broken.png")
    only_bad = tmp_path / "bad"
    only_bad.mkdir()
    (only_bad / "a.png").write_bytes(b"junk")
    with pytest.raises(NoUsableImagesError, match="a.png"):
        analyze([only_bad], AnalysisOptions(rank=2))


def test_load_analysis_image_and_project(tmp_path):
    rng = np.random.default_rng(5)
    imgs = [rng.integers(0, 255, size=(12, 10, 3), dtype=np.uint8) for _ in range(20)]
    paths = write_pngs(tmp_path / "rgb", imgs)
    d = analyze([tmp_path / "rgb"], AnalysisOptions(rank=4, color="rgb")).decomposition
    assert d.image_shape == (12, 10, 3)
    img = load_analysis_image(d, 7)
    np.testing.assert_allclose(img, imgs[7] / 255.0, atol=1e-6)
    w, res = project_images(d, img.reshape(-1, 1))
    np.testing.assert_allclose(w[:, 0], d.weights[:, 7], atol=1e-4)
    np.testing.assert_allclose(res[0], d.residual[7], rtol=1e-3)
    paths[7].unlink()
    with pytest.raises(SourceError, match="img_7.png: the source file is missing"):
        load_analysis_image(d, 7)


def test_downscale_shape(tmp_path):
    write_pngs(tmp_path / "ds", [np.full((17, 22), i * 10, np.uint8) for i in range(6)])
    d = analyze([tmp_path / "ds"], AnalysisOptions(rank=2, downscale=4)).decomposition
    assert d.image_shape == (4, 5, 1)
    assert d.metadata["source_size"] == [17, 22]


def test_options_validation():
    with pytest.raises(ValueError, match="color must be one of gray, rgb"):
        AnalysisOptions(color="cmyk")
    with pytest.raises(ValueError, match="rank must be at least 1"):
        AnalysisOptions(rank=0)
    with pytest.raises(TypeError, match="recursive must be True or False"):
        AnalysisOptions(recursive="yes")
    opts = AnalysisOptions(rank=7, color="rgb")
    assert AnalysisOptions.from_dict(opts.to_dict() | {"unknown": 1}) == opts


def test_block_size_is_capped_for_large_images(tmp_path, monkeypatch):
    from modescope.core.engine import options as engine_options
    from modescope.core.engine.pipeline import block_size_for
    opts = AnalysisOptions(block_size=128)
    # 128x128 gray: 128 images of 64 KB fit the 256 MB block budget
    assert block_size_for(opts, 128 * 128) == 128
    # 1024x1024 RGB: 12 MB per image, so 21 images per block (256 MB / 12 MB)
    assert block_size_for(opts, 1024 * 1024 * 3) == 21
    # never below 8 images, and the scoring pass's minimum applies below the cap
    assert block_size_for(opts, 8192 * 8192 * 3) == 8
    assert block_size_for(AnalysisOptions(block_size=16), 64, minimum=128) == 128
    # the passes follow the cap: a budget of 10 images' worth of 6x5 gray gives blocks of 10
    rng = np.random.default_rng(4)
    write_pngs(tmp_path / "imgs", [rng.integers(0, 256, (6, 5), dtype=np.uint8)
                                   for _ in range(35)])
    monkeypatch.setattr(engine_options, "_BLOCK_BYTES", 10 * 30 * 4)
    seen = []
    result = analyze([tmp_path / "imgs"], AnalysisOptions(rank=3, block_size=128),
                     progress=lambda p: seen.append((p.stage, p.done)))
    assert result.decomposition.exact
    assert [d for s, d in seen if s == "learn"] == [10, 20, 30, 35]


def test_only_analyses_the_listed_images(tmp_path):
    from modescope.core.errors import NoUsableImagesError
    rng = np.random.default_rng(8)
    paths = write_pngs(tmp_path / "imgs", [rng.integers(0, 256, (6, 5), dtype=np.uint8)
                                           for _ in range(12)])
    wanted = [(str(paths[i]), 0) for i in (1, 4, 7, 8, 11)]
    d = analyze([tmp_path / "imgs"], AnalysisOptions(rank=3), only=wanted).decomposition
    assert list(d.paths) == [p for p, _ in wanted]
    # the same as analysing those files directly
    ref = analyze([p for p, _ in wanted], AnalysisOptions(rank=3)).decomposition
    np.testing.assert_allclose(d.singular_values, ref.singular_values, rtol=1e-6)
    with pytest.raises(NoUsableImagesError, match="none of the 1 images asked for"):
        analyze([tmp_path / "imgs"], AnalysisOptions(rank=3), only=[(str(paths[0]), 3)])
    with pytest.raises(TypeError, match="pairs"):
        analyze([tmp_path / "imgs"], AnalysisOptions(rank=3), only=[str(paths[0])])
