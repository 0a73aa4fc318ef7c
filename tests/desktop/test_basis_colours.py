"""The basis gallery shows the colours of the exported basis and mean images, pixel for pixel.

The exported PNGs are read back with imageio (an outside decoder); the tiles come from the
gallery's model exactly as it draws them (its colour limit and icon size).
"""

from __future__ import annotations

import imageio.v3 as iio
import numpy as np
import pytest
from PySide6.QtGui import QColor

from modescope.app.desktop.views.gallery import BasisModel, basis_tile_rgb, mean_tile_rgb
from modescope.app.desktop.workers.thumbnails import array_to_qimage
from modescope.core.decomposition import Decomposition
from modescope.core.output.export import export


def _images(channels: int, rows: int = 30, cols: int = 40, n: int = 12, seed: int = 0):
    """Smooth random images in [0.1, 0.9], shape (n, rows, cols, channels)."""
    rng = np.random.default_rng(seed)
    r, c = np.mgrid[0:rows, 0:cols] / max(rows, cols)
    out = np.empty((n, rows, cols, channels))
    for i in range(n):
        for ch in range(channels):
            a, b, p = rng.uniform(1, 6, 3)
            out[i, :, :, ch] = np.sin(a * r + p) * np.cos(b * c) + 0.2 * rng.standard_normal(
                (rows, cols))
    return 0.5 + 0.4 * out / np.max(np.abs(out))


@pytest.mark.parametrize("channels", [1, 3])
def test_gallery_tiles_equal_the_exported_basis_pngs(tmp_path, make_decomposition, channels):
    d = make_decomposition(_images(channels, seed=channels), k=5)
    report = export(d, tmp_path, rank=5, what="basis")
    model = BasisModel(icon_size=112)
    model.set_decomposition(d)
    for j in range(5):
        png = iio.imread(tmp_path / f"basis_{j + 1:03d}.png")
        assert png.shape == (30, 40, 3)
        assert model.limit(j) == report.basis_limits[j]
        # the tile as the gallery draws it (its limit, its icon size) and with the defaults
        np.testing.assert_array_equal(basis_tile_rgb(d, j, model.limit(j), model.icon_size), png)
        np.testing.assert_array_equal(basis_tile_rgb(d, j), png)
        # and the picture handed to Qt holds the same colours
        image = array_to_qimage(basis_tile_rgb(d, j, model.limit(j), model.icon_size))
        for row, col in ((0, 0), (7, 21), (29, 39)):
            assert image.pixelColor(col, row) == QColor(*(int(v) for v in png[row, col]))


def test_subsampled_tiles_keep_the_exported_colours(tmp_path, make_decomposition):
    # a large basis image is shown by keeping every n-th pixel of the exported colours
    d = make_decomposition(_images(3, rows=90, cols=120, n=6, seed=5), k=3)
    export(d, tmp_path, rank=3, what="basis")
    model = BasisModel(icon_size=24)
    model.set_decomposition(d)
    for j in range(3):
        png = iio.imread(tmp_path / f"basis_{j + 1:03d}.png")
        tile = basis_tile_rgb(d, j, model.limit(j), model.icon_size)
        step = int(np.ceil(120 / 48))                        # longest side about 2 * icon size
        np.testing.assert_array_equal(tile, png[::step, ::step])


def test_values_halfway_between_two_levels_round_as_in_the_file(tmp_path):
    # RGB shows 0.5 + v / (2 L): these values land halfway between two 8-bit levels (ties) or a
    # float32 rounding step away from halfway, where a second rounding rule would differ by one
    levels = np.arange(255)
    t = 2 * (levels + 0.5) / 255 - 1
    t = np.concatenate([t, t[::-1], -t])
    t[0], t[-1] = 1.0, -1.0                                   # the limit L = 1 is reached
    col = (t / np.linalg.norm(t)).astype(np.float32)
    basis = np.asfortranarray(np.stack([col, t.astype(np.float32)], axis=1))
    d = Decomposition(mean=np.full(765, 0.5, np.float32), basis=basis,
                      singular_values=np.array([3.0, 1.0]),
                      weights=np.random.default_rng(1).standard_normal((2, 4)),
                      total_energy=10.0, image_shape=(15, 17, 3),
                      paths=tuple(f"/nowhere/f{i}.png" for i in range(4)))
    export(d, tmp_path, rank=2, what="basis")
    model = BasisModel(icon_size=112)
    model.set_decomposition(d)
    for j in range(2):
        png = iio.imread(tmp_path / f"basis_{j + 1:03d}.png")
        np.testing.assert_array_equal(basis_tile_rgb(d, j, model.limit(j), model.icon_size), png)


@pytest.mark.parametrize("channels", [1, 3])
def test_mean_tile_equals_the_exported_mean_png(tmp_path, channels):
    # a mean whose values sit on or a float32 step from the halfway points between two 8-bit
    # levels, and beyond [0, 1]: a second rounding rule (e.g. adding 0.5) differs by one level
    levels = (np.arange(255) + 0.5) / 255
    values = np.concatenate([levels, [-0.2, 0.0, 1.0, 1.3]] * channels)
    rows, cols = 7, 37                                          # 259 pixels per channel
    mean = values.reshape(channels, rows * cols).T.ravel().astype(np.float32)
    basis = np.zeros((mean.size, 1), np.float32)
    basis[0, 0] = 1.0
    d = Decomposition(mean=mean, basis=basis, singular_values=np.array([1.0]),
                      weights=np.array([[1.0, -1.0]]), total_energy=2.0,
                      image_shape=(rows, cols, channels),
                      paths=("/nowhere/a.png", "/nowhere/b.png"))
    export(d, tmp_path, rank=1, what="basis")
    png = iio.imread(tmp_path / "mean.png")
    # the outside reference of the file: round half to even of 255 x after clipping
    file_levels = np.rint(np.clip(mean.astype(np.float64), 0, 1) * 255).reshape(png.shape)
    np.testing.assert_array_equal(png, file_levels)
    model = BasisModel(icon_size=112)
    model.set_decomposition(d)
    np.testing.assert_array_equal(mean_tile_rgb(d, model.icon_size), png)
    np.testing.assert_array_equal(mean_tile_rgb(d), png)
    image = array_to_qimage(mean_tile_rgb(d, model.icon_size))   # the picture handed to Qt
    for row, col in ((0, 0), (3, 20), (6, 36)):
        expected = png[row, col] if channels == 3 else [png[row, col]] * 3
        assert image.pixelColor(col, row) == QColor(*(int(v) for v in expected))
