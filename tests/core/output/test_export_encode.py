"""Tests of modescope.core.output.encode: the 16-bit TIFF encoder and the 8-bit formats.

Outside references: tifffile and imageio as decoders of the written bytes and files.
"""

import io

import imageio.v3 as iio
import numpy as np
import pytest
import tifffile

from modescope.core.output.encode import encode_image, encode_tiff16, png_bytes
from modescope.core.output.export import export
from modescope.core.output.images import preview_image
from modescope.core.output.metrics import quantize
from modescope.core.output.naming import preview_names


def test_tiff_encoder_round_trip():
    rng = np.random.default_rng(5)
    for shape in [(3, 4), (5, 7, 3), (2, 9, 1)]:
        a = rng.integers(0, 65536, shape, dtype=np.uint16)
        data = encode_tiff16(a)
        back = tifffile.imread(io.BytesIO(data))        # tifffile as the outside decoder
        np.testing.assert_array_equal(back, a.reshape(shape[:2]) if len(shape) == 2
                                      or shape[2] == 1 else a)
    with pytest.raises(TypeError, match="uint16"):
        encode_tiff16(np.zeros((2, 2), np.uint8))


def test_jpeg_and_webp_modes_and_quality(tmp_path, gray):
    X, d = gray
    a = tmp_path / "a"
    b = tmp_path / "b"
    c = tmp_path / "c"
    for p in (a, b, c):
        p.mkdir()
    export(d, a, rank=4, what="previews", image_format="jpg", quality=95)
    export(d, b, rank=4, what="previews", image_format="jpg", quality=20)
    rep = export(d, c, rank=4, what="previews", image_format="webp", quality=80)
    name = preview_names(d, [0], 4, "jpg")[0]
    hi, lo = iio.imread(a / name), iio.imread(b / name)
    assert hi.shape == (12, 16)                         # gray JPEG: one channel
    ref = quantize(preview_image(d, 0, 4), 8)[:, :, 0].astype(float)
    assert np.abs(hi - ref).mean() < np.abs(lo - ref).mean()
    assert (a / name).stat().st_size > (b / name).stat().st_size
    webp = iio.imread(c / preview_names(d, [0], 4, "webp")[0])
    assert webp.shape[:2] == (12, 16)
    assert np.array_equal(webp[..., 0], webp[..., 1])   # gray stored as equal channels
    assert any("WebP" in n for n in rep.notes)


def test_png_bytes_round_trip():
    rng = np.random.default_rng(8)
    gray = rng.integers(0, 256, (5, 7, 1), dtype=np.uint8)
    rgb = rng.integers(0, 256, (4, 6, 3), dtype=np.uint8)
    # imageio as the outside decoder: a one-channel image is written as a gray PNG
    np.testing.assert_array_equal(iio.imread(io.BytesIO(png_bytes(gray))), gray[:, :, 0])
    np.testing.assert_array_equal(iio.imread(io.BytesIO(png_bytes(rgb))), rgb)
    with pytest.raises(TypeError, match="uint8"):
        png_bytes(rgb.astype(np.float32))


def test_encode_image_checks_its_arguments():
    img = np.full((3, 4, 1), 0.5)
    with pytest.raises(ValueError, match="image_format"):
        encode_image(img, "gif")
    with pytest.raises(ValueError, match="quality"):
        encode_image(img, "jpg", quality=101)
    with pytest.raises(ValueError, match="shape"):
        encode_image(np.zeros((3, 4)), "png")
    # 16-bit TIFF of the clipped, quantised values (tifffile as the outside decoder)
    back = tifffile.imread(io.BytesIO(encode_image(img, "tiff")))
    assert back.dtype == np.uint16 and np.all(back == 32768)      # rint(0.5 * 65535), ties even
