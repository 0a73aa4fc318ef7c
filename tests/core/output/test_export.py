"""Tests of modescope.core.output.export, modescope.core.output.atomic and modescope.app.cli.export.

Outside references named beside each check: the Eckart-Young-Mirsky theorem (Eckart and Young
1936, Mirsky 1960) with singular values from scipy.linalg.svdvals (LAPACK), scikit-image's
``peak_signal_noise_ratio``, imageio and tifffile as decoders of the written files, Python's csv
module, numpy norms, and Keys (1981): cubic convolution reproduces linear functions exactly.
"""

import csv
import errno
import io
import os
import stat
from pathlib import Path

import imageio.v3 as iio
import numpy as np
import pytest
import scipy.linalg
import tifffile
from PIL import Image
from skimage.metrics import peak_signal_noise_ratio

from modescope.core.output import atomic

from modescope.core.output import export as ex
from modescope.core.output.atomic import (DestinationError, atomic_write_bytes, atomic_writer,
                                   is_temp_name)
from modescope.core.output.colormap import DIVERGING_LUT
from modescope.core.decomposition import Decomposition, fix_signs
from modescope.core.errors import SourceError


# ---------------------------------------------------------------------------------------------
# fixtures
# ---------------------------------------------------------------------------------------------
def make_data(rows=12, cols=16, channels=1, m=14, seed=0):
    """Low-rank structure plus noise, every value inside [0.1, 0.9]."""
    rng = np.random.default_rng(seed)
    n = rows * cols * channels
    patterns = rng.standard_normal((n, 4))
    coeffs = rng.standard_normal((4, m)) * np.array([[3.0], [2.0], [1.0], [0.5]])
    X = patterns @ coeffs + 0.3 * rng.standard_normal((n, m))
    X = 0.5 + 0.4 * X / np.max(np.abs(X))
    return X.astype(np.float32)


def make_decomposition(X, shape, paths=None, pages=None, metadata=None):
    """Exact Decomposition from numpy.linalg.svd of the full centred matrix."""
    Xd = X.astype(np.float64)
    mean = Xd.mean(axis=1)
    C = Xd - mean[:, None]
    U, s, Vt = np.linalg.svd(C, full_matrices=False)
    basis, weights = fix_signs(U, s[:, None] * Vt)
    m = X.shape[1]
    return Decomposition(
        mean=mean.astype(np.float32), basis=basis.astype(np.float32), singular_values=s,
        weights=weights, total_energy=float(np.sum(C ** 2)), image_shape=shape,
        paths=tuple(paths) if paths is not None else tuple(f"/nowhere/img_{i:02d}.png"
                                                           for i in range(m)),
        pages=None if pages is None else np.asarray(pages, dtype=np.int32),
        residual=np.zeros(m), exact=True, metadata=dict(metadata or {}))


def array_loader(X):
    def load(d, i):
        return X[:, i].reshape(d.image_shape)
    return load


def listing(folder):
    return sorted(os.listdir(folder))


def no_temp_files(folder):
    return not any(is_temp_name(n) or n.startswith(".") for n in os.listdir(folder))


@pytest.fixture
def gray():
    X = make_data()
    return X, make_decomposition(X, (12, 16, 1))


@pytest.fixture
def rgb():
    X = make_data(rows=8, cols=10, channels=3, m=9, seed=1)
    return X, make_decomposition(X, (8, 10, 3))


def is_root_like(folder):
    """True when chmod 0o555 does not stop writes (running as root)."""
    probe = Path(folder) / "probe"
    try:
        probe.write_bytes(b"x")
    except PermissionError:
        return False
    probe.unlink()
    return True


# ---------------------------------------------------------------------------------------------
# previews: Eckart-Young-Mirsky and quantisation
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("k", [1, 3, 6])
def test_preview_error_equals_discarded_energy(gray, k):
    X, d = gray
    err = sum(float(np.sum((X[:, i].astype(np.float64)
                            - ex.preview_image(d, i, k, clip=False).ravel()) ** 2))
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
    report = ex.export(d, tmp_path, rank=k, what="previews", image_format=fmt)
    assert report.n_written == d.n_images and not report.cancelled
    names = ex.preview_names(d, range(d.n_images), k, fmt)
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
        clipped = np.clip(ex.preview_image(d, i, k, clip=False).ravel().astype(np.float64), 0, 1)
        assert np.max(np.abs(decoded - clipped)) <= q + 1e-7
        x = X[:, i].astype(np.float64)
        e_i = float(np.sum((x - ex.preview_image(d, i, k, clip=False).ravel()) ** 2))
        total_decoded += float(np.sum((x - decoded) ** 2))
        # triangle inequality: ||x - dec|| <= ||x - clip(x_k)|| + ||clip(x_k) - dec||,
        # and clipping moves x_k closer to x because x lies in [0, 1]
        bound += (np.sqrt(e_i) + q * np.sqrt(n)) ** 2
    eym = float(np.sum(s[k:] ** 2))
    assert total_decoded <= bound * (1 + 1e-5)
    assert bound <= eym * (1 + 1e-4) + 2 * q * np.sqrt(n) * np.sqrt(eym * d.n_images) \
        + d.n_images * n * q * q


def test_quantize_formula():
    v = np.array([-0.1, 0.0, 0.3, 0.5, 1.0, 1.7])
    np.testing.assert_array_equal(ex.quantize(v, 8), np.rint(np.clip(v, 0, 1) * 255))
    np.testing.assert_array_equal(ex.quantize(v, 16), np.rint(np.clip(v, 0, 1) * 65535))
    assert ex.quantize(v, 16).dtype == np.uint16
    with pytest.raises(ValueError, match="bits"):
        ex.quantize(v, 12)


def test_jpeg_and_webp_modes_and_quality(tmp_path, gray):
    X, d = gray
    a = tmp_path / "a"
    b = tmp_path / "b"
    c = tmp_path / "c"
    for p in (a, b, c):
        p.mkdir()
    ex.export(d, a, rank=4, what="previews", image_format="jpg", quality=95)
    ex.export(d, b, rank=4, what="previews", image_format="jpg", quality=20)
    rep = ex.export(d, c, rank=4, what="previews", image_format="webp", quality=80)
    name = ex.preview_names(d, [0], 4, "jpg")[0]
    hi, lo = iio.imread(a / name), iio.imread(b / name)
    assert hi.shape == (12, 16)                         # gray JPEG: one channel
    ref = ex.quantize(ex.preview_image(d, 0, 4), 8)[:, :, 0].astype(float)
    assert np.abs(hi - ref).mean() < np.abs(lo - ref).mean()
    assert (a / name).stat().st_size > (b / name).stat().st_size
    webp = iio.imread(c / ex.preview_names(d, [0], 4, "webp")[0])
    assert webp.shape[:2] == (12, 16)
    assert np.array_equal(webp[..., 0], webp[..., 1])   # gray stored as equal channels
    assert any("WebP" in n for n in rep.notes)


def test_tiff_encoder_round_trip():
    rng = np.random.default_rng(5)
    for shape in [(3, 4), (5, 7, 3), (2, 9, 1)]:
        a = rng.integers(0, 65536, shape, dtype=np.uint16)
        data = ex.encode_tiff16(a)
        back = tifffile.imread(io.BytesIO(data))        # tifffile as the outside decoder
        np.testing.assert_array_equal(back, a.reshape(shape[:2]) if len(shape) == 2
                                      or shape[2] == 1 else a)
    with pytest.raises(TypeError, match="uint16"):
        ex.encode_tiff16(np.zeros((2, 2), np.uint8))


def test_upsample_to_source_size_reproduces_a_linear_ramp(tmp_path):
    rows, cols = 10, 12
    r, c = np.mgrid[0:rows, 0:cols].astype(np.float64)
    ramp = (0.2 + 0.03 * r + 0.02 * c)[:, :, None]
    up = ex.upsample_image(ramp, (2 * rows, 2 * cols))
    assert up.shape == (20, 24, 1)
    # pixel centres: the source coordinate of output row R is (R + 0.5) / 2 - 0.5
    R, Cc = np.mgrid[0:20, 0:24].astype(np.float64)
    expected = 0.2 + 0.03 * ((R + 0.5) / 2 - 0.5) + 0.02 * ((Cc + 0.5) / 2 - 0.5)
    # Keys (1981): cubic convolution is exact for linear functions away from the border
    np.testing.assert_allclose(up[4:-4, 4:-4, 0], expected[4:-4, 4:-4], atol=2e-5)


def test_upsample_option_writes_source_size(tmp_path, gray):
    X, _ = gray
    d = make_decomposition(X, (12, 16, 1), metadata={"source_size": [24, 32], "downscale": 2})
    rep = ex.export(d, tmp_path, rank=2, what="previews", image_format="tiff", upsample=True)
    img = iio.imread(rep.written[0])
    assert img.shape == (24, 32)
    assert any("24x32" in n for n in rep.notes)
    d0 = make_decomposition(X, (12, 16, 1))
    with pytest.raises(ValueError, match="source_size"):
        ex.plan_export(d0, tmp_path, rank=2, what="previews", upsample=True)


# ---------------------------------------------------------------------------------------------
# names
# ---------------------------------------------------------------------------------------------
def test_names_multi_page_and_collisions(gray):
    X, _ = gray
    paths = (["/a/frame.png", "/b/frame.png", "/c/FRAME.tif", "/d/stack.tif", "/d/stack.tif",
              "/e/single.png", "/f/page.tif"] + [f"/g/x{i}.png" for i in range(7)])
    pages = [0, 0, 0, 0, 1, 0, 3] + [0] * 7
    d = make_decomposition(X, (12, 16, 1), paths=paths, pages=pages)
    names = ex.preview_names(d, range(14), 5, "png")
    assert names[:7] == ["frame_i0_r5.png", "frame_i1_r5.png", "FRAME_i2_r5.png",
                         "stack_p0_r5.png", "stack_p1_r5.png", "single_r5.png",
                         "page_p3_r5.png"]
    assert len({n.casefold() for n in names}) == 14
    # a name does not depend on which images are chosen
    assert ex.preview_names(d, [1], 5, "png") == ["frame_i1_r5.png"]
    assert ex.preview_names(d, [5], 2, "tiff") == ["single_r2.tif"]


def test_names_resolve_second_order_collisions(gray):
    X, _ = gray
    paths = ["/a/x.png", "/b/x.png", "/c/x_i1.png"] + [f"/g/y{i}.png" for i in range(11)]
    d = make_decomposition(X, (12, 16, 1), paths=paths)
    names = ex.preview_names(d, range(14), 1, "png")
    assert len({n.casefold() for n in names}) == 14


# ---------------------------------------------------------------------------------------------
# basis images and contact sheet
# ---------------------------------------------------------------------------------------------
def test_gray_basis_and_mean_files(tmp_path, gray):
    X, d = gray
    rep = ex.export(d, tmp_path, rank=3, what="basis")
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
    rep = ex.export(d, tmp_path, rank=2, what="basis")
    for j in range(2):
        b = d.basis[:, j].astype(np.float64).reshape(8, 10, 3)
        limit = np.max(np.abs(b))
        decoded = iio.imread(tmp_path / f"basis_{j + 1:03d}.png")
        np.testing.assert_array_equal(decoded, np.rint((0.5 + b / (2 * limit)) * 255))
    assert iio.imread(tmp_path / "mean.png").shape == (8, 10, 3)
    assert any("mid-gray" in n for n in rep.notes)


def test_contact_sheet_tiles_and_captions(gray):
    X, d = gray
    sheet = ex.contact_sheet(d, count=5)
    img = np.asarray(sheet.image)
    assert len(sheet.tiles) == 5 and sheet.scale == 6.0          # 16 -> 96 (ceil(96/16))
    shares = d.singular_values ** 2 / d.total_energy
    for j, (top, left, bottom, right) in enumerate(sheet.tiles):
        rgb, _ = ex.basis_image_rgb(d, j)
        np.testing.assert_array_equal(img[top:bottom, left:right],
                                      np.repeat(np.repeat(rgb, 6, 0), 6, 1))
        below = img[bottom + 2:bottom + 20, left:right]
        assert (below.min(axis=2) < 80).any()                    # dark caption text drawn
        pct = 100 * shares[j]
        assert sheet.captions[j] == (f"#{j + 1}  {pct:.1f}%" if pct >= 1 else
                                     f"#{j + 1}  {pct:.2g}%")
    assert ex.share_caption(7, 0.000123) == "#7  0.012%"


def test_sheet_file_written(tmp_path, gray):
    X, d = gray
    rep = ex.export(d, tmp_path, rank=4, what="sheet", sheet_count=9)
    img = Image.open(rep.written[0])
    assert img.format == "PNG" and img.mode == "RGB"
    assert np.array_equal(np.asarray(img), np.asarray(ex.contact_sheet(d, 4).image))


# ---------------------------------------------------------------------------------------------
# tables
# ---------------------------------------------------------------------------------------------
def read_csv(path):
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.reader(fh))


def test_weights_and_spectrum_tables(tmp_path, gray):
    X, d = gray
    k = 4
    ex.export(d, tmp_path, rank=k, what="weights,spectrum", images=[3, 1, 3, 7])
    rows = read_csv(tmp_path / f"weights_r{k}.csv")
    assert rows[0] == ["path", "page", "w1", "w2", "w3", "w4"]
    assert [r[0] for r in rows[1:]] == [d.paths[3], d.paths[1], d.paths[7]]
    for r, i in zip(rows[1:], [3, 1, 7]):
        assert int(r[1]) == 0
        np.testing.assert_array_equal([float(v) for v in r[2:]], d.weights[:k, i])
    spec = read_csv(tmp_path / "spectrum.csv")
    assert spec[0] == ["index", "singular_value", "energy_share", "cumulative_share"]
    Xd = X.astype(np.float64)
    C = Xd - Xd.mean(1, keepdims=True)
    s = scipy.linalg.svdvals(C)                     # LAPACK reference
    total = np.linalg.norm(C) ** 2                  # numpy Frobenius norm
    values = np.array([[float(v) for v in r] for r in spec[1:]])
    assert values.shape == (d.rank, 4)
    np.testing.assert_array_equal(values[:, 0], np.arange(1, d.rank + 1))
    np.testing.assert_allclose(values[:, 1], s[:d.rank], rtol=1e-10)
    np.testing.assert_allclose(values[:, 2], s[:d.rank] ** 2 / total, rtol=1e-9)
    np.testing.assert_allclose(values[:, 3], np.cumsum(s[:d.rank] ** 2) / total,
                               rtol=1e-9, atol=1e-12)


def test_psnr_and_relative_error_match_references():
    rng = np.random.default_rng(2)
    a = rng.uniform(0, 1, (9, 11, 3))
    b = np.clip(a + 0.05 * rng.standard_normal(a.shape), 0, 1)
    # scikit-image as the outside reference, peak 1.0
    assert ex.psnr(a, b) == pytest.approx(peak_signal_noise_ratio(a, b, data_range=1.0),
                                          rel=1e-12)
    assert ex.psnr(a, a) == float("inf")
    assert ex.relative_error(a, b) == pytest.approx(np.linalg.norm(a - b) / np.linalg.norm(a))


def test_quality_table_with_a_missing_source(tmp_path, gray):
    X, d = gray
    k = 3

    def loader(dd, i):
        if i == 2:
            raise SourceError(f"{dd.paths[i]}: the source file is missing")
        return X[:, i].reshape(dd.image_shape)

    rep = ex.export(d, tmp_path, rank=k, what="quality", images=[0, 2, 5], loader=loader)
    rows = read_csv(tmp_path / f"quality_r{k}.csv")
    assert rows[0] == ["path", "page", "relative_error", "psnr_db", "note"]
    by_path = {r[0]: r for r in rows[1:]}
    assert "missing" in by_path[d.paths[2]][4] and by_path[d.paths[2]][2] == ""
    for i in (0, 5):
        r = by_path[d.paths[i]]
        src = X[:, i].reshape(12, 16, 1).astype(np.float64)
        est = np.clip(ex.preview_image(d, i, k, clip=False), 0, 1).astype(np.float64)
        assert float(r[3]) == pytest.approx(
            peak_signal_noise_ratio(src, est, data_range=1.0), rel=1e-9)
        assert float(r[2]) == pytest.approx(np.linalg.norm(src - est) / np.linalg.norm(src),
                                            rel=1e-9)
        assert r[4] == ""
    assert d.paths[2] in rep.missing_sources
    assert any("quality" in n for n in rep.notes)


def test_quality_inf_when_exact(tmp_path, gray):
    X, d = gray
    # full rank reconstructs each image exactly (up to float32): use the preview itself as source
    def loader(dd, i):
        return ex.preview_image(dd, i, dd.rank)
    ex.export(d, tmp_path, rank=d.rank, what="quality", images=[0], loader=loader)
    row = read_csv(tmp_path / f"quality_r{d.rank}.csv")[1]
    assert row[3] == "inf" and float(row[2]) == 0.0


# ---------------------------------------------------------------------------------------------
# compact model and ratios
# ---------------------------------------------------------------------------------------------
def test_compact_model_reopens_with_same_previews(tmp_path, gray):
    from modescope.core.output.model_file import load_model
    X, d = gray
    src = tmp_path / "src"
    src.mkdir()
    paths = []
    for i in range(d.n_images - 1):                  # the last source file is missing
        p = src / f"img_{i:02d}.png"
        p.write_bytes(os.urandom(100 + i))
        paths.append(str(p))
    paths.append(str(src / "gone.png"))
    d = d.replace(paths=tuple(paths))
    out = tmp_path / "out"
    out.mkdir()
    k = 3
    rep = ex.export(d, out, rank=k, what="model")
    model = load_model(out / f"model_r{k}.npz")
    assert model.rank == k and model.n_images == d.n_images
    for i in range(d.n_images):
        # same float32 numbers; only the summation order of BLAS may differ (a few ulp)
        np.testing.assert_allclose(ex.preview_image(model, i, k), ex.preview_image(d, i, k),
                                   rtol=0, atol=1e-6)
    n, m = d.n_pixels, d.n_images
    assert (rep.stored_numbers, rep.full_numbers) == (k * (n + m + 1) + n, n * m)
    assert rep.model_bytes == (out / f"model_r{k}.npz").stat().st_size
    assert rep.source_bytes == sum(os.path.getsize(p) for p in paths[:-1])
    assert rep.missing_sources == (os.path.abspath(paths[-1]),)
    assert rep.byte_ratio == pytest.approx(rep.source_bytes / rep.model_bytes)
    assert "k(n+m+1)+n" in rep.summary()


def test_compact_model_float16(tmp_path, gray):
    from modescope.core.output.model_file import load_model
    X, d = gray
    k = 4
    rep = ex.export(d, tmp_path, rank=k, what="model", float16=True)
    path = tmp_path / f"model_r{k}_f16.npz"
    with np.load(path, allow_pickle=False) as npz:
        assert npz["basis"].dtype == np.float16 and npz["weights"].dtype == np.float16
    model = load_model(path)
    # stated tolerance: float16 rounding (unit roundoff u = 2**-11) of mean, basis, weights,
    # |error| <= u|mean| + sum_j (2u + u^2)|b_j||w_j| + 2**-24 (subnormal step) + float32 slack
    u = 2.0 ** -11
    for i in range(d.n_images):
        a = ex.preview_image(model, i, k, clip=False).ravel().astype(np.float64)
        b = ex.preview_image(d, i, k, clip=False).ravel().astype(np.float64)
        bound = (u * np.abs(d.mean) + (2 * u + u * u) * (np.abs(d.basis[:, :k])
                 @ np.abs(d.weights[:k, i])) + 2.0 ** -24 * (k + 1) + 1e-6)
        assert np.all(np.abs(a - b) <= bound)
    full = ex.export(d, tmp_path, rank=k, what="model")
    assert rep.model_bytes < full.model_bytes


# ---------------------------------------------------------------------------------------------
# safety: overwrite, source folder, read-only, disk full, cancel, progress
# ---------------------------------------------------------------------------------------------
def test_overwrite_refused_up_front(tmp_path, gray):
    X, d = gray
    (tmp_path / "spectrum.csv").write_text("mine")
    with pytest.raises(DestinationError, match="already exist"):
        ex.export(d, tmp_path, rank=2, what="previews,spectrum,weights")
    assert listing(tmp_path) == ["spectrum.csv"]
    assert (tmp_path / "spectrum.csv").read_text() == "mine"
    rep = ex.export(d, tmp_path, rank=2, what="previews,spectrum,weights", overwrite=True)
    assert rep.n_written == d.n_images + 2
    assert (tmp_path / "spectrum.csv").read_text().startswith("index,")


def test_writing_into_a_source_folder_needs_the_flag(tmp_path, gray):
    X, d = gray
    src = tmp_path / "src"
    src.mkdir()
    paths = []
    for i in range(d.n_images):
        p = src / f"s{i:02d}.png"
        Image.fromarray(np.rint(X[:, i].reshape(12, 16) * 255).astype(np.uint8)).save(p)
        paths.append(str(p))
    d = d.replace(paths=tuple(paths))
    before = {p: Path(p).read_bytes() for p in paths}
    with pytest.raises(DestinationError, match="source images"):
        ex.export(d, src, rank=2, what="previews")
    assert len(listing(src)) == d.n_images
    rep = ex.export(d, src, rank=2, what="previews", allow_source_folder=True)
    assert rep.n_written == d.n_images
    assert all(Path(p).read_bytes() == b for p, b in before.items())   # sources untouched


def test_read_only_destination(tmp_path, gray, monkeypatch):
    X, d = gray
    dest = tmp_path / "ro"
    dest.mkdir()
    dest.chmod(0o555)
    try:
        if is_root_like(dest):
            # root ignores the mode bits: simulate the refusal of the operating system
            def refuse(*args, **kwargs):
                raise atomic.destination_error(
                    dest / "x", PermissionError(errno.EACCES, "Permission denied"),
                    "create a temporary file for")
            monkeypatch.setattr(atomic, "_open_temp", refuse)
        with pytest.raises(DestinationError, match="read-only|permission"):
            ex.export(d, dest, rank=2, what="previews,spectrum")
        assert listing(dest) == []
    finally:
        dest.chmod(0o755)


def test_rename_refused_midway_leaves_complete_files_only(tmp_path, gray, monkeypatch):
    X, d = gray
    real_replace = os.replace
    calls = {"n": 0}

    def replace(src, dst):
        calls["n"] += 1
        if calls["n"] > 3:
            raise PermissionError(errno.EACCES, "Permission denied", str(dst))
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", replace)
    with pytest.raises(DestinationError, match="permission") as info:
        ex.export(d, tmp_path, rank=2, what="previews")
    assert no_temp_files(tmp_path)
    assert listing(tmp_path) == sorted(p.name for p in info.value.written)
    assert len(info.value.written) == 3
    for p in info.value.written:                     # complete, decodable files
        assert iio.imread(p).shape == (12, 16)


class _FullDisk:
    """A file object that writes part of the data and then fails as a full disk does."""

    def __init__(self, f):
        self.f = f

    def write(self, data):
        self.f.write(bytes(data)[:10])
        self.f.flush()
        raise OSError(errno.ENOSPC, "No space left on device")

    def __getattr__(self, name):
        return getattr(self.f, name)


def test_disk_full_leaves_no_partial_file(tmp_path, gray, monkeypatch):
    X, d = gray
    real_open = atomic._open_temp
    seen = []

    def open_temp(target, mode, encoding, newline):
        f, tmp = real_open(target, mode, encoding, newline)
        seen.append(tmp)
        if target.name.startswith("weights"):
            return _FullDisk(f), tmp
        return f, tmp

    monkeypatch.setattr(atomic, "_open_temp", open_temp)
    with pytest.raises(DestinationError, match="full") as info:
        ex.export(d, tmp_path, rank=2, what="spectrum,weights,previews")
    assert listing(tmp_path) == ["spectrum.csv"]
    assert [p.name for p in info.value.written] == ["spectrum.csv"]
    assert not any(p.exists() for p in seen)
    assert str(tmp_path / "weights_r2.csv") in str(info.value)


@pytest.mark.parametrize("n_done", [0, 1, 5])
def test_cancel_keeps_exactly_n_files(tmp_path, gray, n_done):
    X, d = gray
    done = {"n": 0}
    seen = []

    def progress(a, b):
        done["n"] = a
        seen.append((a, b))

    rep = ex.export(d, tmp_path, rank=2, what="spectrum,basis,previews", progress=progress,
                    cancel=lambda: done["n"] >= n_done)
    total = 1 + 3 + d.n_images
    assert rep.cancelled
    assert rep.n_written == n_done and len(listing(tmp_path)) == n_done
    assert len(rep.skipped) == total - n_done
    assert seen == [(j, total) for j in range(n_done + 1)]
    assert no_temp_files(tmp_path)


def test_cancel_during_quality_rows(tmp_path, gray):
    X, d = gray
    calls = {"n": 0}

    def cancel():
        calls["n"] += 1
        return calls["n"] > 4           # 1 check before spectrum, 1 before quality, then rows

    rep = ex.export(d, tmp_path, rank=2, what="spectrum,quality", cancel=cancel,
                    loader=array_loader(X))
    assert rep.cancelled and [p.name for p in rep.written] == ["spectrum.csv"]
    assert listing(tmp_path) == ["spectrum.csv"]


def test_progress_complete_run(tmp_path, gray):
    X, d = gray
    seen = []
    rep = ex.export(d, tmp_path, rank=2, what="spectrum,weights", progress=lambda a, b:
                    seen.append((a, b)))
    assert seen == [(0, 2), (1, 2), (2, 2)] and not rep.cancelled and rep.skipped == ()


def test_flagged_selection_uses_outlier_table(tmp_path, gray):
    from modescope.core.review.outliers import score_table
    X, d = gray
    X2 = X.copy()
    X2[:, 4] = np.clip(X2[:, 4] + 0.35 * np.sign(np.sin(np.arange(X.shape[0]))), 0, 1)
    d = make_decomposition(X2, (12, 16, 1))
    flags = np.flatnonzero(score_table(d, 2, 0.99).flag)
    np.testing.assert_array_equal(ex.select_images(d, "flagged", rank=2), flags)
    rep = ex.export(d, tmp_path, rank=2, what="previews", images="flagged")
    assert rep.n_written == flags.size


@pytest.mark.parametrize("kwargs, error, match", [
    ({"rank": 0}, ValueError, "rank"),
    ({"rank": 99}, ValueError, "rank"),
    ({"rank": 2, "what": "previews,pictures"}, ValueError, "what"),
    ({"rank": 2, "image_format": "gif"}, ValueError, "image_format"),
    ({"rank": 2, "quality": 0}, ValueError, "quality"),
    ({"rank": 2, "images": [0, 99]}, ValueError, "images"),
    ({"rank": 2, "images": "some"}, ValueError, "images"),
    ({"rank": 2, "overwrite": "yes"}, TypeError, "overwrite"),
    ({"rank": 2.0}, TypeError, "rank"),
])
def test_invalid_arguments(tmp_path, gray, kwargs, error, match):
    X, d = gray
    with pytest.raises(error, match=match):
        ex.export(d, tmp_path, **kwargs)
    assert listing(tmp_path) == []


def test_missing_destination_folder(tmp_path, gray):
    X, d = gray
    with pytest.raises(DestinationError, match="does not exist"):
        ex.export(d, tmp_path / "nope", rank=2)


# ---------------------------------------------------------------------------------------------
# atomic helpers
# ---------------------------------------------------------------------------------------------
def test_atomic_write_bytes(tmp_path):
    p = tmp_path / "a.bin"
    atomic_write_bytes(p, b"one")
    assert p.read_bytes() == b"one"
    with pytest.raises(DestinationError, match="already exists") as info:
        atomic_write_bytes(p, b"two")
    assert info.value.path == p and p.read_bytes() == b"one"
    atomic_write_bytes(p, b"two", overwrite=True)
    assert p.read_bytes() == b"two"
    with pytest.raises(DestinationError, match="does not exist"):
        atomic_write_bytes(tmp_path / "no" / "b.bin", b"x")
    with pytest.raises(TypeError, match="data"):
        atomic_write_bytes(tmp_path / "c.bin", "text")
    assert listing(tmp_path) == ["a.bin"]


def test_atomic_writer_removes_temp_on_error(tmp_path):
    p = tmp_path / "t.csv"
    with pytest.raises(RuntimeError):
        with atomic_writer(p, "w", newline="") as f:
            f.write("partial")
            raise RuntimeError("boom")
    assert listing(tmp_path) == []
    with atomic_writer(p, "w", newline="") as f:
        csv.writer(f).writerow(["a", 1.5])
    assert p.read_bytes() == b"a,1.5\r\n"
    if os.name == "posix":
        mask = os.umask(0)
        os.umask(mask)
        assert stat.S_IMODE(p.stat().st_mode) == 0o666 & ~mask     # umask honoured


def test_destination_error_messages(tmp_path):
    p = tmp_path / "f.png"
    full = atomic.destination_error(p, OSError(errno.ENOSPC, "No space left on device"))
    assert "full" in str(full) and str(p) in str(full)
    ro = atomic.destination_error(p, OSError(errno.EROFS, "Read-only file system"))
    assert "read-only" in str(ro) and str(tmp_path) in str(ro)
    assert isinstance(full, ValueError)


# ---------------------------------------------------------------------------------------------
# end to end with the real pipeline, and the command line
# ---------------------------------------------------------------------------------------------
@pytest.fixture
def analysed(tmp_path):
    from modescope.core.output.model_file import save_model
    from modescope.core.engine.pipeline import AnalysisOptions, analyze
    X = make_data(rows=10, cols=12, m=12, seed=4)
    src = tmp_path / "src"
    src.mkdir()
    for i in range(X.shape[1]):
        Image.fromarray(np.rint(X[:, i].reshape(10, 12) * 255).astype(np.uint8)).save(
            src / f"f{i:02d}.png")
    result = analyze([src], AnalysisOptions(rank=4, workers=1, oversample=4))
    model = tmp_path / "model.npz"
    save_model(model, result.decomposition)
    return result.decomposition, model, src


def test_quality_with_the_real_loader(tmp_path, analysed):
    d, model, src = analysed
    out = tmp_path / "out"
    out.mkdir()
    os.remove(d.paths[5])
    rep = ex.export(d, out, rank=3, what="quality")
    rows = {r[0]: r for r in read_csv(out / "quality_r3.csv")[1:]}
    assert "missing" in rows[d.paths[5]][4]
    for i in (0, 7):
        decoded = iio.imread(d.paths[i]).astype(np.float64)[:, :, None] / 255  # imageio decode
        est = ex.preview_image(d, i, 3).astype(np.float64)
        assert float(rows[d.paths[i]][3]) == pytest.approx(
            peak_signal_noise_ratio(decoded, est, data_range=1.0), rel=1e-6)
    assert d.paths[5] in rep.missing_sources


def run_cli(argv):
    import argparse
    from modescope.app.cli import export as cli_export
    parser = argparse.ArgumentParser(prog="modescope")
    sub = parser.add_subparsers(dest="command")
    cli_export.register(sub)
    args = parser.parse_args(["export", *argv])
    return args.func(args)


def test_cli_export(tmp_path, analysed, capsys):
    d, model, src = analysed
    out = tmp_path / "cli_out"
    code = run_cli([str(model), "--rank", "2", "--out", str(out), "--images", "0,3-4",
                    "--what", "previews,weights,spectrum,model", "--format", "tiff",
                    "--float16"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert "export: " in captured.err and "numbers stored" in captured.out
    names = listing(out)
    assert len([n for n in names if n.endswith(".tif")]) == 3
    assert "model_r2_f16.npz" in names and "weights_r2.csv" in names
    weights = read_csv(out / "weights_r2.csv")
    assert [r[0] for r in weights[1:]] == [d.paths[0], d.paths[3], d.paths[4]]
    # again without --overwrite: refused, nothing changed
    stamp = {n: (out / n).stat().st_mtime_ns for n in names}
    assert run_cli([str(model), "--rank", "2", "--out", str(out), "--images", "0,3-4",
                    "--what", "previews,weights,spectrum,model", "--format", "tiff"]) == 1
    assert "already exist" in capsys.readouterr().err
    assert {n: (out / n).stat().st_mtime_ns for n in listing(out)} == stamp
    # list file of paths, into the source folder only with the flag
    lst = tmp_path / "list.txt"
    lst.write_text(f"# chosen\n{d.paths[2]}\n\n{d.paths[1]}\n")
    assert run_cli([str(model), "--rank", "1", "--out", str(src), "--images", str(lst),
                    "--what", "previews"]) == 1
    assert "source images" in capsys.readouterr().err
    assert run_cli([str(model), "--rank", "1", "--out", str(src), "--images", str(lst),
                    "--what", "previews", "--allow-source-folder"]) == 0
    assert len([n for n in listing(src) if n.endswith("_r1.png")]) == 2
    # usage errors
    assert run_cli([str(model), "--rank", "2", "--out", str(out), "--images", "0,x"]) == 2
    assert run_cli([str(model), "--rank", "9", "--out", str(tmp_path / "o2")]) == 2
    assert run_cli([str(model), "--rank", "2", "--out", str(out), "--what", "nothing"]) == 2
    assert run_cli([str(tmp_path / "missing.npz"), "--rank", "2", "--out", str(out)]) == 1


def test_cli_flagged_and_parse_list(tmp_path, analysed):
    from modescope.app.cli.export import parse_image_list
    d, model, src = analysed
    assert parse_image_list("5,1-3,2", d) == [5, 1, 2, 3]
    with pytest.raises(ValueError, match="0..11"):
        parse_image_list("12", d)
    lst = tmp_path / "l.txt"
    lst.write_text("/not/a/source.png\n")
    with pytest.raises(ValueError, match="not sources"):
        parse_image_list(str(lst), d)
    out = tmp_path / "fl"
    assert run_cli([str(model), "--rank", "2", "--out", str(out), "--images", "flagged",
                    "--what", "previews,spectrum", "--quiet"]) == 0
    from modescope.core.review.outliers import score_table
    n_flagged = int(np.count_nonzero(score_table(d, 2, 0.99).flag))
    assert len(listing(out)) == n_flagged + 1
