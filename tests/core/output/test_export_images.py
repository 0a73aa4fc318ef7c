"""Tests of modescope.core.output.images: previews (Eckart-Young-Mirsky, quantisation,
upsampling), the mean image and the basis images in colour.

Outside references: the Eckart-Young-Mirsky theorem (Eckart and Young 1936, Mirsky 1960) with
singular values from scipy.linalg.svdvals (LAPACK), imageio and tifffile as decoders of the
written files, and Keys (1981): cubic convolution reproduces linear functions exactly.
"""

import imageio.v3 as iio
import numpy as np
import pytest
import scipy.linalg
import tifffile

from export_testdata import make_decomposition
from modescope.core.output.colormap import DIVERGING_LUT
from modescope.core.output.export import ExportOptions, export, plan_export
from modescope.core.output.images import (basis_image_rgb, mean_image, preview_image,
                                           source_size, upsample_image)
from modescope.core.output.naming import preview_names


@pytest.mark.parametrize("k", [1, 3, 6])
def test_preview_error_equals_discarded_energy(gray, k):
    X, d = gray
    err = sum(float(np.sum((X[:, i].astype(np.float64)
                            - preview_image(d, i, k, clip=False).ravel()) ** 2))
              for i in range(d.n_images))
    # Eckart-Young-Mirsky: ||C - C_k||_F^2 = sum_{j>k} s_j^2, s from scipy's LAPACK svdvals
    C = X.astype(np.float64) - X.astype(np.float64).mean(axis=1, keepdims=True)
    s = scipy.linalg.svdvals(C)
    assert err == pytest.approx(float(np.sum(s[k:] ** 2)), rel=1e-4)


@pytest.mark.parametrize("fmt, bits", [("png", 8), ("tiff", 16)])
@pytest.mark.parametrize("which", ["gray", "rgb"])
def test_written_previews_stay_within_quantisation(tmp_path, gray, rgb, fmt, bits, which):
    X, d = gray if which == "gray" else rgb
    k = 3
    report = export(d, tmp_path, rank=k, what="previews", image_format=fmt)
    assert report.n_written == d.n_images and not report.cancelled
    names = preview_names(d, range(d.n_images), k, fmt)
    q = 0.5 / (2 ** bits - 1)
    n = d.n_pixels
    s = scipy.linalg.svdvals(X.astype(np.float64) - X.astype(np.float64).mean(1, keepdims=True))
    total_decoded = 0.0
    bound = 0.0
    for i, name in enumerate(names):
        decoded = iio.imread(tmp_path / name)        # imageio as the outside decoder
        if fmt == "tiff":
            assert decoded.dtype == np.uint16
            np.testing.assert_array_equal(tifffile.imread(tmp_path / name), decoded)
        else:
            assert decoded.dtype == np.uint8
        if d.image_shape[2] == 1:
            assert decoded.shape == d.image_shape[:2]          # single-channel file
        else:
            assert decoded.shape == d.image_shape               # RGB file
        decoded = decoded.astype(np.float64).ravel() / (2 ** bits - 1)
        clipped = np.clip(preview_image(d, i, k, clip=False).ravel().astype(np.float64), 0, 1)
        assert np.max(np.abs(decoded - clipped)) <= q + 1e-7
        x = X[:, i].astype(np.float64)
        e_i = float(np.sum((x - preview_image(d, i, k, clip=False).ravel()) ** 2))
        total_decoded += float(np.sum((x - decoded) ** 2))
        # triangle inequality: ||x - dec|| <= ||x - clip(x_k)|| + ||clip(x_k) - dec||,
        # and clipping moves x_k closer to x because x lies in [0, 1]
        bound += (np.sqrt(e_i) + q * np.sqrt(n)) ** 2
    eym = float(np.sum(s[k:] ** 2))
    assert total_decoded <= bound * (1 + 1e-5)
    assert bound <= eym * (1 + 1e-4) + 2 * q * np.sqrt(n) * np.sqrt(eym * d.n_images) \
        + d.n_images * n * q * q


def test_upsample_to_source_size_reproduces_a_linear_ramp(tmp_path):
    rows, cols = 10, 12
    r, c = np.mgrid[0:rows, 0:cols].astype(np.float64)
    ramp = (0.2 + 0.03 * r + 0.02 * c)[:, :, None]
    up = upsample_image(ramp, (2 * rows, 2 * cols))
    assert up.shape == (20, 24, 1)
    # pixel centres: the source coordinate of output row R is (R + 0.5) / 2 - 0.5
    R, Cc = np.mgrid[0:20, 0:24].astype(np.float64)
    expected = 0.2 + 0.03 * ((R + 0.5) / 2 - 0.5) + 0.02 * ((Cc + 0.5) / 2 - 0.5)
    # Keys (1981): cubic convolution is exact for linear functions away from the border
    np.testing.assert_allclose(up[4:-4, 4:-4, 0], expected[4:-4, 4:-4], atol=2e-5)


def test_upsample_option_writes_source_size(tmp_path, gray):
    X, _ = gray
    d = make_decomposition(X, (12, 16, 1), metadata={"source_size": [24, 32], "downscale": 2})
    rep = export(d, tmp_path, rank=2, what="previews", image_format="tiff", upsample=True)
    img = iio.imread(rep.written[0])
    assert img.shape == (24, 32)
    assert any("24x32" in n for n in rep.notes)
    d0 = make_decomposition(X, (12, 16, 1))
    with pytest.raises(ValueError, match="source_size"):
        plan_export(d0, tmp_path, ExportOptions(rank=2, what="previews", upsample=True))


def test_gray_basis_and_mean_files(tmp_path, gray):
    X, d = gray
    rep = export(d, tmp_path, rank=3, what="basis")
    assert [p.name for p in rep.written] == ["mean.png", "basis_001.png", "basis_002.png",
                                             "basis_003.png"]
    mean = iio.imread(tmp_path / "mean.png")
    np.testing.assert_array_equal(mean, np.rint(np.clip(d.mean, 0, 1) * 255).reshape(12, 16))
    for j in range(3):
        b = d.basis[:, j].astype(np.float64).reshape(12, 16)
        limit = np.max(np.abs(b))
        assert rep.basis_limits[j] == pytest.approx(limit)
        decoded = iio.imread(tmp_path / f"basis_{j + 1:03d}.png")
        expected = DIVERGING_LUT[(128 + np.rint(127 * b / limit)).astype(int)]
        np.testing.assert_array_equal(decoded, expected)
        # sign convention: the entry of largest magnitude is positive -> brick end
        r, c = np.unravel_index(np.argmax(np.abs(b)), b.shape)
        assert decoded[r, c].tolist() == DIVERGING_LUT[255].tolist()
    assert any("diverging" in n and "teal" in n for n in rep.notes)


def test_rgb_basis_files(tmp_path, rgb):
    X, d = rgb
    rep = export(d, tmp_path, rank=2, what="basis")
    for j in range(2):
        b = d.basis[:, j].astype(np.float64).reshape(8, 10, 3)
        limit = np.max(np.abs(b))
        decoded = iio.imread(tmp_path / f"basis_{j + 1:03d}.png")
        np.testing.assert_array_equal(decoded, np.rint((0.5 + b / (2 * limit)) * 255))
    assert iio.imread(tmp_path / "mean.png").shape == (8, 10, 3)
    assert any("mid-gray" in n for n in rep.notes)


def test_basis_image_rgb_with_a_given_limit(gray, rgb):
    _, d = gray
    b = d.basis[:, 1].astype(np.float64).reshape(12, 16)
    lim = 2.0 * np.max(np.abs(b))
    got, used = basis_image_rgb(d, 1, lim)
    assert used == lim
    # table layout of core.colormap: row 128 + rint(127 v / L)
    np.testing.assert_array_equal(got, DIVERGING_LUT[(128 + np.rint(127 * b / lim)).astype(int)])
    _, e = rgb
    w = e.basis[:, 0].astype(np.float64).reshape(8, 10, 3)
    lim = 0.5 * np.max(np.abs(w))                         # half the range: the ends are clipped
    got, _ = basis_image_rgb(e, 0, lim)
    np.testing.assert_array_equal(got, np.rint(np.clip(0.5 + w / (2 * lim), 0, 1) * 255))
    assert np.all(basis_image_rgb(e, 0, 0.0)[0] == 128)
    with pytest.raises(ValueError, match="limit"):
        basis_image_rgb(d, 0, -1.0)
    with pytest.raises(ValueError, match="limit must be finite"):
        basis_image_rgb(d, 0, float("inf"))
    with pytest.raises(ValueError, match="index"):
        basis_image_rgb(d, d.rank)


def test_mean_image_and_source_size(gray):
    X, d = gray
    np.testing.assert_array_equal(mean_image(d)[:, :, 0],
                                  np.rint(np.clip(d.mean, 0, 1) * 255).reshape(12, 16))
    with pytest.raises(ValueError, match="source_size"):
        source_size(d)
    d2 = make_decomposition(X, (12, 16, 1), metadata={"source_size": [24, 32]})
    assert source_size(d2) == (24, 32)
    with pytest.raises(TypeError, match="decomposition must be a Decomposition"):
        mean_image("model.npz")
