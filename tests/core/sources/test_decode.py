"""Tests of modescope.core.sources.decode: decoding rules and block streaming."""

from __future__ import annotations

import threading
from pathlib import Path

import imageio.v3 as iio
import numpy as np
import pytest
import tifffile
from PIL import Image

from modescope.core.errors import SourceError
from modescope.core.sources.decode import Block, analysis_shape, iter_blocks, load_image
from modescope.core.sources.scan import scan_sources

RNG_SEED = 20240611


def rng():
    return np.random.default_rng(RNG_SEED)


def save(path: Path, arr: np.ndarray, **kwargs) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(arr).save(path, **kwargs)
    return path


def one(path: Path, color: str = "gray", downscale: int = 1):
    """Scan a single file and decode it."""
    sset = scan_sources([path], color=color)
    return load_image(sset.images[0], sset, downscale), sset


# -- scaling -------------------------------------------------------------------------------

def test_8bit_gray_png_matches_imageio(tmp_path):
    arr = rng().integers(0, 256, (9, 13), dtype=np.uint8)
    path = save(tmp_path / "a.png", arr)
    out, _ = one(path)
    assert out.dtype == np.float32 and out.shape == (9, 13, 1)
    # Outside reference: imageio's own PNG decode, scaled by 255.
    expected = iio.imread(path).astype(np.float64) / 255.0
    np.testing.assert_allclose(out[:, :, 0], expected, rtol=0, atol=1e-7)


def test_8bit_rgb_png_matches_imageio(tmp_path):
    arr = rng().integers(0, 256, (7, 5, 3), dtype=np.uint8)
    path = save(tmp_path / "a.png", arr)
    out, _ = one(path, color="rgb")
    # Outside reference: imageio decode; channel order R, G, B kept.
    expected = iio.imread(path).astype(np.float64) / 255.0
    np.testing.assert_allclose(out, expected, rtol=0, atol=1e-7)


def test_16bit_png_scaling_and_imageio(tmp_path):
    arr = rng().integers(0, 65536, (6, 8), dtype=np.uint16)
    arr[0, 0], arr[0, 1], arr[0, 2] = 65535, 32768, 0
    path = save(tmp_path / "a.png", arr)
    out, sset = one(path)
    assert sset.images[0].mode == "I;16"
    assert out[0, 0, 0] == 1.0
    assert out[0, 1, 0] == np.float32(32768 / 65535)
    assert out[0, 2, 0] == 0.0
    # Outside reference: imageio reads the same 16-bit file; scale by 65535.
    expected = iio.imread(path).astype(np.float64) / 65535.0
    np.testing.assert_allclose(out[:, :, 0], expected, rtol=0, atol=1e-7)


def test_16bit_big_endian_tiff(tmp_path):
    arr = rng().integers(0, 65536, (6, 8), dtype=np.uint16)
    tifffile.imwrite(tmp_path / "a.tif", arr, byteorder=">")
    out, sset = one(tmp_path / "a.tif")
    assert sset.images[0].mode == "I;16B"
    # Reference: tifffile's decode of the same file.
    expected = tifffile.imread(tmp_path / "a.tif").astype(np.float64) / 65535.0
    np.testing.assert_allclose(out[:, :, 0], expected, rtol=0, atol=1e-7)


def test_float_tiff_clipped_as_is(tmp_path):
    arr = np.array([[-0.5, 0.0, 0.25], [0.75, 1.0, 2.0]], np.float32)
    tifffile.imwrite(tmp_path / "a.tif", arr)
    out, sset = one(tmp_path / "a.tif")
    assert sset.images[0].mode == "F"
    np.testing.assert_array_equal(out[:, :, 0], np.clip(arr, 0, 1))


def test_float_tiff_with_nan_is_a_decode_failure(tmp_path):
    arr = np.array([[0.5, np.nan], [0.1, 0.2]], np.float32)
    tifffile.imwrite(tmp_path / "a.tif", arr)
    with pytest.raises(SourceError, match="NaN"):
        one(tmp_path / "a.tif")


def test_int32_tiff_rule(tmp_path):
    small = np.array([[0, 1000, 65535], [-5, 32768, 7]], np.int32)
    tifffile.imwrite(tmp_path / "small.tif", small)
    out, _ = one(tmp_path / "small.tif")
    np.testing.assert_allclose(out[:, :, 0], np.maximum(small, 0) / 65535.0, atol=1e-7)
    big = np.array([[0, 100000], [2**31 - 1, 5]], np.int32)
    tifffile.imwrite(tmp_path / "big.tif", big)
    out, _ = one(tmp_path / "big.tif")
    np.testing.assert_allclose(out[:, :, 0], big / (2**31 - 1), rtol=1e-6, atol=1e-9)


def test_bilevel_is_zero_or_one(tmp_path):
    arr = np.array([[0, 255, 0], [255, 255, 0]], np.uint8)
    Image.fromarray(arr).convert("1").save(tmp_path / "a.png")
    out, sset = one(tmp_path / "a.png")
    assert sset.images[0].mode == "1"
    np.testing.assert_array_equal(out[:, :, 0], arr / 255)


# -- colour --------------------------------------------------------------------------------

def test_gray_luma_of_known_pixel(tmp_path):
    arr = np.zeros((2, 3, 3), np.uint8)
    arr[0, 0] = (200, 100, 50)
    arr[1, 2] = (255, 255, 255)
    arr[0, 1] = (0, 0, 255)
    out, _ = one(save(tmp_path / "a.png", arr))
    # ITU-R BT.601 luma weights.
    assert out[0, 0, 0] == pytest.approx((0.299 * 200 + 0.587 * 100 + 0.114 * 50) / 255,
                                         abs=1e-6)
    assert out[0, 1, 0] == pytest.approx(0.114, abs=1e-6)
    assert out[1, 2, 0] == pytest.approx(1.0, abs=1e-6)
    assert out.max() <= 1.0


def test_rgb_channel_order_and_gray_repeated(tmp_path):
    arr = np.zeros((2, 2, 3), np.uint8)
    arr[0, 0] = (255, 0, 0)
    arr[1, 1] = (10, 20, 30)
    out, _ = one(save(tmp_path / "c.png", arr), color="rgb")
    np.testing.assert_allclose(out[0, 0], [1, 0, 0])
    np.testing.assert_allclose(out[1, 1], np.array([10, 20, 30]) / 255, atol=1e-7)
    g = np.array([[0, 128], [255, 7]], np.uint8)
    out, _ = one(save(tmp_path / "g.png", g), color="rgb")
    assert out.shape == (2, 2, 3)
    for c in range(3):
        np.testing.assert_allclose(out[:, :, c], g / 255, atol=1e-7)


def test_alpha_dropped_not_composited(tmp_path):
    rgba = np.zeros((2, 2, 4), np.uint8)
    rgba[..., :3] = (200, 100, 50)
    rgba[..., 3] = (0, 128)  # fully transparent and half transparent columns
    out, _ = one(save(tmp_path / "a.png", rgba), color="rgb")
    np.testing.assert_allclose(out, np.broadcast_to(np.array([200, 100, 50]) / 255, (2, 2, 3)),
                               atol=1e-7)
    la = np.zeros((2, 2, 2), np.uint8)
    la[..., 0], la[..., 1] = 90, 0
    out, _ = one(save(tmp_path / "la.png", la))
    np.testing.assert_allclose(out, 90 / 255, atol=1e-7)


def test_palette_converted_to_rgb(tmp_path):
    img = Image.new("P", (2, 1))
    img.putpalette([10, 20, 30, 200, 150, 100] + [0, 0, 0] * 254)
    img.putpixel((0, 0), 0)
    img.putpixel((1, 0), 1)
    img.save(tmp_path / "p.png")
    out, sset = one(tmp_path / "p.png", color="rgb")
    assert sset.images[0].mode == "P"
    # Reference: the palette entries written above.
    np.testing.assert_allclose(out[0], np.array([[10, 20, 30], [200, 150, 100]]) / 255,
                               atol=1e-7)


def test_cmyk_converted_to_rgb(tmp_path):
    cmyk = np.zeros((1, 3, 4), np.uint8)
    cmyk[0, 1] = (0, 255, 0, 0)      # magenta ink
    cmyk[0, 2] = (0, 0, 0, 255)      # black ink
    Image.frombytes("CMYK", (3, 1), cmyk.tobytes()).save(tmp_path / "a.tif")
    out, _ = one(tmp_path / "a.tif", color="rgb")
    # Subtractive model: no ink is white, magenta removes green, full black is black.
    np.testing.assert_allclose(out[0], [[1, 1, 1], [1, 0, 1], [0, 0, 0]], atol=1e-7)


# -- orientation ---------------------------------------------------------------------------

@pytest.mark.parametrize("orientation, k", [(1, 0), (3, 2), (6, -1), (8, 1)])
def test_exif_orientation_png(tmp_path, orientation, k):
    stored = rng().integers(0, 256, (4, 7), dtype=np.uint8)
    exif = Image.Exif()
    exif[0x0112] = orientation
    out, sset = one(save(tmp_path / "a.png", stored, exif=exif))
    # EXIF 2.3 (CIPA DC-008): 6 = the viewer turns the picture 90 degrees clockwise,
    # 8 = counter-clockwise, 3 = half turn. numpy.rot90 (k>0 counter-clockwise) is the reference.
    expected = np.rot90(stored, k) / 255.0
    assert sset.images[0].size == expected.shape
    np.testing.assert_allclose(out[:, :, 0], expected, atol=1e-7)


def test_exif_orientation_jpeg(tmp_path):
    stored = np.kron(np.array([[0, 80, 160], [240, 40, 120]], np.uint8), np.ones((8, 8),
                                                                                np.uint8))
    exif = Image.Exif()
    exif[0x0112] = 6
    path = save(tmp_path / "a.jpg", stored, exif=exif, quality=95)
    out, sset = one(path)
    assert sset.images[0].size == (24, 16)
    with Image.open(path) as raw:  # Pillow's decode of the stored (unrotated) pixels
        as_stored = np.asarray(raw)
    np.testing.assert_allclose(out[:, :, 0], np.rot90(as_stored, -1) / 255.0, atol=1e-7)


# -- multi-page, resize, downscale ---------------------------------------------------------

def test_multipage_tiff_pages(tmp_path):
    stack = rng().integers(0, 256, (3, 5, 6), dtype=np.uint8)
    tifffile.imwrite(tmp_path / "s.tif", stack, photometric="minisblack")
    sset = scan_sources(tmp_path)
    assert [ref.page for ref in sset.images] == [0, 1, 2]
    for ref in sset.images:
        # Reference: tifffile's decode of each page.
        expected = tifffile.imread(tmp_path / "s.tif", key=ref.page) / 255.0
        np.testing.assert_allclose(load_image(ref, sset)[:, :, 0], expected, atol=1e-7)


def test_resize_mismatched_constant_and_ramp(tmp_path):
    save(tmp_path / "a0.png", np.zeros((8, 12), np.uint8))
    save(tmp_path / "a1.png", np.zeros((8, 12), np.uint8))
    save(tmp_path / "b.png", np.full((4, 6), 100, np.uint8))
    ramp = np.tile(np.linspace(0, 255, 6).round().astype(np.uint8), (4, 1))
    save(tmp_path / "c.png", ramp)
    sset = scan_sources(tmp_path, resize_mismatched=True)
    assert sset.reference_size == (8, 12)
    out_b = load_image(sset.images[2], sset)
    assert out_b.shape == (8, 12, 1)
    # A resampling filter with normalised weights keeps a constant image constant.
    np.testing.assert_allclose(out_b, 100 / 255, atol=1e-5)
    out_c = load_image(sset.images[3], sset)
    from skimage.transform import resize  # test-only reference (scikit-image)
    ref_c = resize(ramp / 255.0, (8, 12), order=3, mode="edge", anti_aliasing=False)
    np.testing.assert_allclose(out_c[:, 2:-2, 0], ref_c[:, 2:-2], atol=0.03)
    assert 0.0 <= out_c.min() and out_c.max() <= 1.0


def test_mismatch_without_resize_after_scan_is_a_source_error(tmp_path):
    path = save(tmp_path / "a.png", np.zeros((6, 8), np.uint8))
    sset = scan_sources(tmp_path)
    save(path, np.zeros((5, 8), np.uint8))  # the file changes after the scan
    with pytest.raises(SourceError, match=r"a\.png: decoded size 5x8 differs"):
        load_image(sset.images[0], sset)


@pytest.mark.parametrize("color", ["gray", "rgb"])
@pytest.mark.parametrize("f", [1, 2, 3])
def test_downscale_is_reshape_mean_with_crop(tmp_path, color, f):
    arr = rng().integers(0, 256, (7, 10, 3), dtype=np.uint8)
    sset = scan_sources([save(tmp_path / "a.png", arr)], color=color)
    full = load_image(sset.images[0], sset, 1).astype(np.float64)
    out = load_image(sset.images[0], sset, f)
    r, c = 7 // f, 10 // f
    assert out.shape == (r, c, sset.channels) == analysis_shape(sset, f)
    # Reference: numpy area average over f x f blocks of the cropped full-resolution image.
    expected = full[: r * f, : c * f].reshape(r, f, c, f, -1).mean(axis=(1, 3))
    np.testing.assert_allclose(out, expected, atol=1e-6)


def test_analysis_shape_validation(tmp_path):
    sset = scan_sources([save(tmp_path / "a.png", np.zeros((5, 40), np.uint8))], color="rgb")
    assert analysis_shape(sset) == (5, 40, 3)
    assert analysis_shape(sset, 2) == (2, 20, 3)
    with pytest.raises(ValueError, match="downscale 6 is too large for the reference size 5x40"):
        analysis_shape(sset, 6)
    with pytest.raises(ValueError, match="downscale must be at least 1, got 0"):
        analysis_shape(sset, 0)
    with pytest.raises(TypeError, match="downscale must be an integer"):
        analysis_shape(sset, 2.0)
    with pytest.raises(TypeError, match="source_set must be a SourceSet"):
        analysis_shape("folder")
    with pytest.raises(TypeError, match="ref must be an ImageRef"):
        load_image("a.png", sset)


def test_load_image_source_error_names_file(tmp_path):
    arr = rng().integers(0, 256, (16, 24), dtype=np.uint8)
    path = save(tmp_path / "a.png", arr)
    sset = scan_sources(tmp_path)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(SourceError, match=r"a\.png: cannot be decoded \(image file is truncated"):
        load_image(sset.images[0], sset)
    path.unlink()
    with pytest.raises(SourceError, match=r"a\.png: cannot be decoded"):
        load_image(sset.images[0], sset)


# -- iter_blocks ---------------------------------------------------------------------------

def make_collection(folder: Path, n: int, shape=(6, 8), channels: int = 1) -> list[Path]:
    gen = rng()
    size = shape if channels == 1 else shape + (channels,)
    return [save(folder / f"img_{i}.png", gen.integers(0, 256, size, dtype=np.uint8))
            for i in range(n)]


@pytest.mark.parametrize("color, f, block_size, workers", [
    ("gray", 1, 4, 2), ("rgb", 1, 3, 1), ("gray", 2, 5, 3), ("rgb", 3, 64, 2)])
def test_iter_blocks_columns_equal_load_image(tmp_path, color, f, block_size, workers):
    make_collection(tmp_path, 10, shape=(7, 9), channels=3)
    sset = scan_sources(tmp_path, color=color)
    blocks = list(iter_blocks(sset, block_size=block_size, downscale=f, workers=workers))
    starts = list(range(0, 10, block_size))
    assert [b.start for b in blocks] == starts
    assert np.concatenate([b.indices for b in blocks]).tolist() == list(range(10))
    pixels = int(np.prod(analysis_shape(sset, f)))
    for block in blocks:
        assert isinstance(block, Block)
        assert block.indices.dtype == np.int64
        assert block.data.dtype == np.float32
        assert block.data.shape == (pixels, len(block.indices))
        assert block.data.flags.f_contiguous
        assert block.problems == ()
        for j, i in enumerate(block.indices):
            expected = load_image(sset.images[i], sset, f).ravel(order="C")
            np.testing.assert_array_equal(block.data[:, j], expected)


def test_iter_blocks_truncated_file_lands_in_problems(tmp_path):
    paths = make_collection(tmp_path, 7, shape=(16, 24))
    sset = scan_sources(tmp_path)
    data = paths[3].read_bytes()
    paths[3].write_bytes(data[: len(data) // 2])
    expected = {i: load_image(sset.images[i], sset).ravel() for i in range(7) if i != 3}
    blocks = list(iter_blocks(sset, block_size=3))
    assert [b.indices.tolist() for b in blocks] == [[0, 1, 2], [4, 5], [6]]
    assert blocks[1].start == 3
    assert len(blocks[1].problems) == 1
    problem = blocks[1].problems[0]
    assert problem.path == str(paths[3]) and problem.page is None
    assert "truncated" in problem.reason
    assert blocks[1].data.flags.f_contiguous and blocks[1].data.shape == (16 * 24, 2)
    for block in blocks:
        for j, i in enumerate(block.indices):
            np.testing.assert_array_equal(block.data[:, j], expected[int(i)])


def test_iter_blocks_problem_pages_for_multipage(tmp_path):
    stack = np.zeros((3, 4, 5), np.uint8)
    tifffile.imwrite(tmp_path / "s.tif", stack, photometric="minisblack")
    sset = scan_sources(tmp_path)
    (tmp_path / "s.tif").unlink()
    blocks = list(iter_blocks(sset, block_size=2))
    problems = [p for b in blocks for p in b.problems]
    assert [p.page for p in problems] == [0, 1, 2]
    assert all(b.data.shape == (20, 0) for b in blocks)
    with pytest.raises(SourceError, match=r"s\.tif \(page 1\)"):
        load_image(sset.images[1], sset)


def test_iter_blocks_cancel_stops_early(tmp_path):
    make_collection(tmp_path, 9)
    sset = scan_sources(tmp_path)
    got = []
    for block in iter_blocks(sset, block_size=2, cancel=lambda: len(got) >= 2):
        got.append(block)
    assert [b.start for b in got] == [0, 2]


def _decode_threads():
    return [t for t in threading.enumerate() if t.name.startswith("modescope-decode")]


def test_iter_blocks_close_early_shuts_pool_down(tmp_path):
    make_collection(tmp_path, 9)
    sset = scan_sources(tmp_path)
    gen = iter_blocks(sset, block_size=2)
    first = next(gen)
    assert first.indices.tolist() == [0, 1]
    gen.close()
    assert _decode_threads() == []
    list(iter_blocks(sset, block_size=4))  # a full run also leaves no thread behind
    assert _decode_threads() == []


def test_iter_blocks_validation(tmp_path):
    make_collection(tmp_path, 2)
    sset = scan_sources(tmp_path)
    with pytest.raises(ValueError, match="block_size must be at least 1, got 0"):
        iter_blocks(sset, block_size=0)
    with pytest.raises(ValueError, match="workers must be at least 1, got 0"):
        iter_blocks(sset, workers=0)
    with pytest.raises(TypeError, match="cancel must be callable"):
        iter_blocks(sset, cancel=True)
    with pytest.raises(ValueError, match="downscale 7 is too large"):
        iter_blocks(sset, downscale=7)


def test_bug_in_own_conversion_is_not_reported_as_a_damaged_file(tmp_path, monkeypatch):
    # only Pillow's work is guarded: an error in our own conversion must not turn into
    # "cannot be decoded" (which would hide a bug behind a skipped file)
    from modescope.core.sources import decode

    # a TIFF file: plain 8-bit PNG files are read without _native (see plainpng)
    path = save(tmp_path / "a.tif", np.zeros((4, 5), np.uint8))
    sset = scan_sources([path])

    def broken(img):
        raise RuntimeError("bug in _native")

    monkeypatch.setattr(decode, "_native", broken)
    with pytest.raises(RuntimeError, match="bug in _native"):
        load_image(sset.images[0], sset)


def test_damaged_file_is_still_a_source_error(tmp_path):
    path = save(tmp_path / "a.png", rng().integers(0, 256, (40, 50), dtype=np.uint8))
    sset = scan_sources([path])
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])  # truncated after the scan
    with pytest.raises(SourceError, match="a.png"):
        load_image(sset.images[0], sset)


def test_pace_one_thread_only_while_the_caller_is_the_slower_part():
    from modescope.core.sources.decode import _ONE_THREAD_UP_TO, _Pace
    pace = _Pace(2)
    assert pace.threads == 2                          # nothing known yet: every thread
    pace.decoded(0.010)
    assert pace.threads == 2
    pace.caller(0.030)                                # decoding a third of the caller's time
    assert pace.threads == 1
    for _ in range(10):                               # decoding becomes the slower part
        pace.decoded(0.050)
        pace.caller(0.030)
    assert pace.threads == 2
    pace = _Pace(2)
    pace.decoded(0.030 * _ONE_THREAD_UP_TO)           # at the limit: one thread
    pace.caller(0.030)
    assert pace.threads == 1


def test_blocks_alike_whatever_the_pace(tmp_path, monkeypatch):
    # a slow caller switches the decoding to one thread part way: the blocks do not change
    # (reference: the blocks of a quick caller, decoded with every thread throughout)
    import time
    from modescope.core.sources import decode
    rng = np.random.default_rng(4)
    for i in range(40):
        Image.fromarray(rng.integers(0, 256, (6, 5), dtype=np.uint8)).save(
            tmp_path / f"p_{i:02d}.png")
    sset = scan_sources([tmp_path])
    quick = [(b.start, b.indices.copy(), b.data.copy()) for b in
             iter_blocks(sset, block_size=4, workers=2)]
    chosen = []

    class Recorded(decode._Pace):
        def caller(self, seconds):
            super().caller(seconds)
            chosen.append(self.threads)

    monkeypatch.setattr(decode, "_Pace", Recorded)
    slow = []
    for b in iter_blocks(sset, block_size=4, workers=2):
        slow.append((b.start, b.indices.copy(), b.data.copy()))
        time.sleep(0.02)                              # the caller's work
    assert chosen and chosen[-1] == 1                 # decoding 4 tiny files is far quicker
    for (s1, i1, d1), (s2, i2, d2) in zip(quick, slow, strict=True):
        assert s1 == s2
        np.testing.assert_array_equal(i1, i2)
        np.testing.assert_array_equal(d1, d2)
