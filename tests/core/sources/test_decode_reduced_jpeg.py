"""Tests of the reduced-size JPEG decode of modescope.core.sources.decode (downscale > 1).

JPEG files analysed with a downscale factor are decoded by libjpeg at 1/2, 1/4 or 1/8 of their
size (Pillow's draft mode) and the rest of the factor is the area average. The reference is the
full decode followed by the area average (``jpeg_draft=False``), and numpy's area average of
the pixel values that were encoded.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from PIL import Image, JpegImagePlugin

from modescope.core.sources.decode import analysis_shape, iter_blocks, load_image
from modescope.core.sources.scan import scan_sources


def smooth_rgb(rows: int, cols: int, seed: int = 1) -> np.ndarray:
    """An invented smooth colour picture: waves of 100-250 pixels and a colour ramp."""
    rng = np.random.default_rng(seed)
    r, c = np.mgrid[0:rows, 0:cols]
    out = np.empty((rows, cols, 3))
    for ch in range(3):
        out[..., ch] = (0.5 + 0.15 * np.sin(r / 17.0 + rng.uniform(0, 6))
                        * np.cos(c / 23.0 + rng.uniform(0, 6))
                        + 0.2 * (c / cols - 0.5) * (ch - 1) + 0.1 * np.cos((r + c) / 41.0 + ch))
    return np.uint8(np.rint(np.clip(out, 0, 1) * 255))


def save_jpeg(path: Path, arr: np.ndarray, orientation: int = 1) -> Path:
    exif = Image.Exif()
    exif[0x0112] = orientation
    Image.fromarray(arr).save(path, exif=exif, quality=95)
    return path


@pytest.fixture
def draft_scales(monkeypatch):
    """Record the scale of every draft Pillow makes (stored width / reduced width)."""
    scales = []
    real = JpegImagePlugin.JpegImageFile.draft

    def recording(self, mode, size):
        width = self.size[0]
        out = real(self, mode, size)
        scales.append(round(width / out[1][2]) if out is not None else 1)
        assert self.size[0] == -(-width // scales[-1])          # reduced width, rounded up
        return out

    monkeypatch.setattr(JpegImagePlugin.JpegImageFile, "draft", recording)
    return scales


# measured here on smooth_rgb(240, 320) at quality 95 (Pillow 13, libjpeg-turbo), largest
# difference from the full decode + area average, in 8-bit levels: RGB 2.5 (downscale 2),
# 2.0 (4 and 8); the luma of the RGB file 1.2; a gray file 0.75; mean differences 0.25-0.5.
# Acceptable: the JPEG's own coding error is as large (full decode vs the encoded values:
# up to 3.0 levels for RGB, 1.0 for gray, checked below), and the reduced decode rounds to
# whole levels once more (half a level). Limits: the measured values plus about a third.
TOLERANCE = {("rgb", "rgb"): 3.25, ("rgb", "gray"): 1.6, ("gray", "gray"): 1.0}
CODING = {("rgb", "rgb"): 4.5, ("rgb", "gray"): 2.0, ("gray", "gray"): 1.5}


@pytest.mark.parametrize("kind, color", [("rgb", "rgb"), ("rgb", "gray"), ("gray", "gray")])
@pytest.mark.parametrize("f, s", [(2, 2), (4, 4), (8, 8)])
def test_reduced_decode_equals_full_decode_within_tolerance(tmp_path, draft_scales, kind,
                                                            color, f, s):
    arr = smooth_rgb(240, 320)
    stored = arr if kind == "rgb" else arr[..., 1]
    path = save_jpeg(tmp_path / "turned.jpg", stored, orientation=6)   # quarter turn clockwise
    sset = scan_sources([path], color=color)
    reduced = load_image(sset.images[0], sset, f)
    assert draft_scales == [s]                                          # decoded at 1/s
    full = load_image(sset.images[0], sset, f, jpeg_draft=False)
    assert draft_scales == [s]                                          # no draft there
    assert reduced.shape == full.shape == analysis_shape(sset, f) == (320 // f, 240 // f,
                                                                      sset.channels)
    diff = np.abs(reduced.astype(np.float64) - full) * 255
    assert diff.max() <= TOLERANCE[kind, color]
    assert diff.mean() <= 0.6
    # the orientation is applied: against numpy's area average of the encoded values turned
    # a quarter clockwise (numpy.rot90 reference), within the JPEG's own coding error
    shown = np.rot90(stored, -1).astype(np.float64) / 255
    if color == "gray" and kind == "rgb":
        shown = shown @ np.array([0.299, 0.587, 0.114])                # ITU-R BT.601 luma
    shown = shown.reshape(320, 240, -1)
    rows, cols = reduced.shape[:2]
    expected = shown[: rows * f, : cols * f].reshape(rows, f, cols, f, -1).mean(axis=(1, 3))
    assert np.abs(reduced - expected).max() * 255 <= CODING[kind, color]
    assert np.abs(full - expected).max() * 255 <= CODING[kind, color]


# stored (rows, cols), downscale, and the scale used for each orientation: 8 where it divides
# every stored length that the orientation reverses (orientations 3, 7 reverse both, 4 and 6
# the rows, 2 and 8 the columns), else the largest of 4, 2 that does, else 1
ALIGNMENT = [
    ((100, 132), 8, {1: 8, 2: 4, 3: 4, 4: 4, 5: 8, 6: 4, 7: 4, 8: 4}),
    ((94, 124), 16, {1: 8, 2: 4, 3: 2, 4: 2, 5: 8, 6: 2, 7: 2, 8: 4}),
]


@pytest.mark.parametrize("size, f, scales", ALIGNMENT)
@pytest.mark.parametrize("orientation", range(1, 9))
def test_reduced_blocks_line_up_for_every_orientation(tmp_path, draft_scales, size, f, scales,
                                                      orientation):
    # a steep ramp: blocks shifted by 4 pixels would differ from the full decode's by 4-10
    # levels (measured here with the alignment rule switched off); aligned, 0.64 at most
    rows, cols = size
    r, c = np.mgrid[0:rows, 0:cols]
    ramp = np.uint8(np.clip(20 + 1.6 * c + 0.9 * r, 0, 255))
    path = save_jpeg(tmp_path / f"o{orientation}.jpg", ramp, orientation)
    sset = scan_sources([path])
    reduced = load_image(sset.images[0], sset, f)
    assert draft_scales == [scales[orientation]]
    full = load_image(sset.images[0], sset, f, jpeg_draft=False)
    assert reduced.shape == full.shape == analysis_shape(sset, f)
    assert np.abs(reduced - full).max() * 255 <= 1.0


@pytest.mark.parametrize("f, s", [(3, 1), (5, 1), (6, 2), (12, 4), (16, 8), (24, 8)])
def test_scale_divides_the_downscale(tmp_path, draft_scales, f, s):
    path = save_jpeg(tmp_path / "a.jpg", smooth_rgb(96, 144))
    sset = scan_sources([path], color="rgb")
    reduced = load_image(sset.images[0], sset, f)
    assert draft_scales == ([s] if s > 1 else [])
    full = load_image(sset.images[0], sset, f, jpeg_draft=False)
    assert reduced.shape == full.shape == (96 // f, 144 // f, 3)
    if s == 1:
        np.testing.assert_array_equal(reduced, full)
    else:
        assert np.abs(reduced - full).max() * 255 <= TOLERANCE["rgb", "rgb"]


def test_exact_8_bit_only_when_the_reduced_decode_made_the_whole_downscale(tmp_path):
    for i in range(5):
        save_jpeg(tmp_path / f"{i}.jpg", smooth_rgb(64, 96, seed=i))
    rgb = scan_sources(tmp_path, color="rgb")
    # downscale 8 = decoded at 1/8: the values are v / 255 of the 8-bit decode, restored bit
    # for bit from uint8 by the block cache, and the same on every decode
    blocks = list(iter_blocks(rgb, block_size=3, downscale=8, keep_raw=True))
    assert [b.exact8 for b in blocks] == [True, True]
    for b in blocks:
        assert b.raw8.dtype == np.uint8 and b.raw8.shape == b.data.T.shape
        np.testing.assert_array_equal(np.divide(b.raw8, np.float32(255), dtype=np.float32),
                                      b.data.T)
        for j, i in enumerate(b.indices):
            np.testing.assert_array_equal(load_image(rgb.images[i], rgb, 8).ravel(),
                                          b.data[:, j])
    # downscale 2 = decoded at 1/2, nothing after it: exact too
    assert all(b.exact8 for b in iter_blocks(rgb, block_size=5, downscale=2))
    # an area average after the reduced decode, a luma mix, or the full decode + average:
    # not 8-bit values, so the cache keeps them as float32
    for sset, f, draft in [(rgb, 16, True), (scan_sources(tmp_path), 8, True), (rgb, 8, False)]:
        got = list(iter_blocks(sset, block_size=5, downscale=f, keep_raw=True,
                               jpeg_draft=draft))
        assert [(b.exact8, b.raw8) for b in got] == [(False, None)]


def test_other_formats_and_resized_files_keep_the_full_decode(tmp_path, draft_scales):
    arr = smooth_rgb(64, 96)
    png = tmp_path / "png"
    png.mkdir()
    Image.fromarray(arr).save(png / "a.png")
    sset = scan_sources(png, color="rgb")
    np.testing.assert_array_equal(load_image(sset.images[0], sset, 8),
                                  load_image(sset.images[0], sset, 8, jpeg_draft=False))
    # a JPEG of another size is resized at full size first (rule 5), never drafted
    mixed = tmp_path / "mixed"
    mixed.mkdir()
    save_jpeg(mixed / "a.jpg", arr)
    save_jpeg(mixed / "b.jpg", smooth_rgb(72, 104))
    sset = scan_sources(mixed, color="rgb", resize_mismatched=True)
    other = next(ref for ref in sset.images if ref.size != sset.reference_size)
    draft_scales.clear()
    np.testing.assert_array_equal(load_image(other, sset, 8),
                                  load_image(other, sset, 8, jpeg_draft=False))
    assert draft_scales == []


def test_jpeg_draft_must_be_a_bool(tmp_path):
    sset = scan_sources([save_jpeg(tmp_path / "a.jpg", smooth_rgb(16, 16))])
    with pytest.raises(TypeError, match="jpeg_draft must be True or False, got str"):
        load_image(sset.images[0], sset, 2, jpeg_draft="yes")
    with pytest.raises(TypeError, match="jpeg_draft must be True or False, got int"):
        iter_blocks(sset, downscale=2, jpeg_draft=1)
