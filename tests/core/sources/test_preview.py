"""Tests of modescope.core.sources.decode.load_preview: the analysis's decoding at reduced size."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import tifffile
from PIL import Image

from modescope.core.errors import SourceError
from modescope.core.sources.decode import load_image, load_preview
from modescope.core.sources.scan import scan_sources


def save(path: Path, arr: np.ndarray, **kwargs) -> Path:
    Image.fromarray(arr).save(path, **kwargs)
    return path


def analysed(path: Path, color: str = "gray", downscale: int = 1) -> np.ndarray:
    sset = scan_sources([path], color=color)
    return load_image(sset.images[0], sset, downscale)


def smooth(rows: int, cols: int, top: int, dtype, wave: float = 1.0) -> np.ndarray:
    """A smooth field; ``wave`` stretches its waves (periods of about 57 x 82 pixels at 1)."""
    r, c = np.mgrid[0:rows, 0:cols] / wave
    field = 0.5 + 0.3 * np.sin(r / 9.0) * np.cos(c / 13.0) + 0.15 * (c * wave / cols)
    return np.rint(field * top).astype(dtype)


def test_16_bit_png_equals_the_analysis_downscale(tmp_path):
    # 96 x 128 at max_side 64: a whole-block average by 2, the rule of load_image(downscale=2)
    arr = smooth(96, 128, 65535, np.uint16)
    arr[0, 0] = 65535
    path = save(tmp_path / "deep.png", arr)
    preview = load_preview(path, max_side=64)
    reference = analysed(path, downscale=2)
    assert preview.shape == reference.shape == (48, 64, 1) and preview.dtype == np.float32
    np.testing.assert_allclose(preview, reference, rtol=0, atol=1e-7)
    # and the 16-bit scale is 65535 (not the 8-bit conversion Pillow would make)
    expected = arr.reshape(48, 2, 64, 2).mean(axis=(1, 3)) / 65535.0
    np.testing.assert_allclose(preview[:, :, 0], expected, rtol=0, atol=1e-6)


def test_16_bit_png_resized_stays_close_to_the_analysis(tmp_path):
    # 90 x 150 at max_side 64: block average by 2 (45 x 75), then LANCZOS to 38 x 64
    arr = smooth(90, 150, 65535, np.uint16)
    path = save(tmp_path / "deep.png", arr)
    preview = load_preview(path, max_side=64)
    assert preview.shape == (38, 64, 1)
    # reference: the analysis's decode at full size, resized by Pillow in float (bilinear is
    # enough for a smooth field); tolerance 0.01 of full scale (rule of thumb for two filters)
    full = analysed(path)[:, :, 0]
    ref = np.asarray(Image.fromarray(full).resize((64, 38), Image.Resampling.BILINEAR))
    np.testing.assert_allclose(preview[:, :, 0], ref, rtol=0, atol=0.01)


def test_8_bit_png_block_average_within_half_a_level(tmp_path):
    arr = np.random.default_rng(4).integers(0, 256, (64, 96, 3), dtype=np.uint8)
    path = save(tmp_path / "rgb.png", arr)
    preview = load_preview(path, max_side=48)
    reference = analysed(path, color="rgb", downscale=2)
    assert preview.shape == reference.shape == (32, 48, 3)
    # Pillow averages 8-bit blocks and rounds: at most half an 8-bit level off
    np.testing.assert_allclose(preview, reference, rtol=0, atol=0.5 / 255 + 1e-6)


@pytest.mark.parametrize("suffix", ["jpg", "png"])
def test_orientation_6_gives_the_analysis_aspect(tmp_path, suffix):
    stored = smooth(40, 80, 255, np.uint8)            # stored 40 rows x 80 columns
    exif = Image.Exif()
    exif[0x0112] = 6                                  # shown turned a quarter clockwise
    path = save(tmp_path / f"turned.{suffix}", stored, exif=exif)
    full = analysed(path)
    assert full.shape == (80, 40, 1)
    preview = load_preview(path, max_side=64)
    assert preview.shape == (64, 32, 1)               # the analysis's aspect, not 32 x 64
    # and its content is the analysis's image made smaller (bilinear reference, smooth data;
    # two different filters: tolerance 0.015 of full scale, rule of thumb; 0.005 seen)
    ref = np.asarray(Image.fromarray(full[:, :, 0]).resize((32, 64),
                                                             Image.Resampling.BILINEAR))
    np.testing.assert_allclose(preview[:, :, 0], ref, rtol=0, atol=0.015)


def test_large_jpeg_is_decoded_at_reduced_size(tmp_path, monkeypatch):
    arr = smooth(512, 768, 255, np.uint8, wave=8.0)
    path = save(tmp_path / "big.jpg", np.dstack([arr, arr[::-1], arr[:, ::-1]]), quality=95)
    from PIL import JpegImagePlugin

    sizes = []
    real = JpegImagePlugin.JpegImageFile.draft

    def recording(self, mode, size):
        out = real(self, mode, size)
        sizes.append(self.size)
        return out

    monkeypatch.setattr(JpegImagePlugin.JpegImageFile, "draft", recording)
    preview = load_preview(path, max_side=64)
    assert preview.shape == (43, 64, 3)
    assert sizes == [(96, 64)]                        # decoded at 1/8 of 768 x 512
    full = analysed(path, color="rgb")
    ref = np.asarray(Image.fromarray(np.uint8(np.rint(full * 255))).resize(
        (64, 43), Image.Resampling.BILINEAR)) / 255.0
    # decoded at 1/8 in the DCT, then two different filters: tolerance 0.02 of full scale
    # (rule of thumb; 0.009 seen)
    np.testing.assert_allclose(preview, ref, rtol=0, atol=0.02)


def test_colour_choice_and_pages(tmp_path):
    rgb = np.zeros((8, 8, 3), np.uint8)
    rgb[..., 0] = 200
    path = save(tmp_path / "red.png", rgb)
    assert load_preview(path).shape == (8, 8, 3)                 # as stored
    gray = load_preview(path, color="gray")
    np.testing.assert_allclose(gray, analysed(path), atol=1e-7)  # BT.601 luma like the analysis
    assert gray[0, 0, 0] == pytest.approx(0.299 * 200 / 255, abs=1e-6)
    stack = np.stack([np.full((6, 6), v, np.uint8) for v in (10, 200)])
    tifffile.imwrite(tmp_path / "two.tif", stack, photometric="minisblack")
    second = load_preview(tmp_path / "two.tif", page=1)
    assert second.shape == (6, 6, 1) and second[0, 0, 0] == pytest.approx(200 / 255)


def test_unreadable_files_and_bad_arguments(tmp_path):
    with pytest.raises(SourceError, match="gone.png"):
        load_preview(tmp_path / "gone.png")
    bad = tmp_path / "bad.png"
    bad.write_bytes(b"not an image")
    with pytest.raises(SourceError, match="bad.png: cannot be decoded"):
        load_preview(bad)
    one = save(tmp_path / "one.png", np.zeros((4, 4), np.uint8))
    with pytest.raises(SourceError, match=r"one.png \(page 3\)"):
        load_preview(one, page=3)
    with pytest.raises(TypeError, match="path"):
        load_preview(42)
    with pytest.raises(ValueError, match="max_side"):
        load_preview(one, max_side=0)
    with pytest.raises(ValueError, match="color"):
        load_preview(one, color="cmyk")
