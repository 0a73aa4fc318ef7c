"""NumPy .npy stacks as collections; frame ranges and the frame rate.

Outside references: the same frames saved as PNG files through Pillow and analysed as image
files (the model must agree with the stack's); the singular values of the centred frames from
LAPACK (``numpy.linalg.svd``); ITU-R BT.601 luma weights; numpy's own ``.npy`` writer
(``np.save``, numpy's format specification) for the files, damaged by hand.
"""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest
from PIL import Image

from modescope.core.engine.options import AnalysisOptions
from modescope.core.engine.pipeline import analyze
from modescope.core.errors import NoUsableImagesError
from modescope.core.output.model_file import load_model, save_model
from modescope.core.sources.arrays import read_array_frame
from modescope.core.sources.decode import load_image
from modescope.core.sources.frames import FrameRange, parse_frames
from modescope.core.sources.scan import scan_sources


def low_rank_frames(n=60, rows=24, cols=32, channels=None, seed=3) -> np.ndarray:
    """Frames made of 4 patterns with random weights plus a little noise, as uint8."""
    rng = np.random.default_rng(seed)
    shape = (rows, cols) if channels is None else (rows, cols, channels)
    patterns = rng.random((4,) + shape)
    weights = rng.random((n, 4))
    stack = np.tensordot(weights, patterns, axes=1) / 4 + 0.05 * rng.random((n,) + shape)
    return np.clip(np.round(stack * 255), 0, 255).astype(np.uint8)


@pytest.mark.parametrize("channels, color", [(None, "gray"), (3, "rgb")])
def test_a_stack_gives_the_same_model_as_the_frames_saved_as_png(tmp_path, channels, color):
    frames = low_rank_frames(channels=channels)
    np.save(tmp_path / "stack.npy", frames)
    folder = tmp_path / "png"
    folder.mkdir()
    for i, frame in enumerate(frames):
        Image.fromarray(frame).save(folder / f"frame_{i:03d}.png")
    options = AnalysisOptions(rank=6, color=color)
    from_stack = analyze([tmp_path / "stack.npy"], options).decomposition
    from_png = analyze([folder], options).decomposition
    assert from_stack.pages.tolist() == list(range(60))
    np.testing.assert_allclose(from_stack.singular_values, from_png.singular_values, rtol=1e-5)
    np.testing.assert_allclose(np.abs(from_stack.basis), np.abs(from_png.basis), atol=1e-4)
    # and both against LAPACK on the centred data in float64
    data = frames.reshape(60, -1).astype(np.float64) / 255
    exact = np.linalg.svd(data - data.mean(axis=0), compute_uv=False)[:6]
    np.testing.assert_allclose(from_stack.singular_values, exact, rtol=1e-4)


def test_four_channels_drop_alpha_and_gray_is_the_bt601_luma(tmp_path):
    rgb = low_rank_frames(n=5, channels=3)
    alpha = np.full(rgb.shape[:3] + (1,), 7, dtype=np.uint8)
    np.save(tmp_path / "rgba.npy", np.concatenate([rgb, alpha], axis=3))
    sset = scan_sources([tmp_path / "rgba.npy"], color="rgb")
    np.testing.assert_array_equal(load_image(sset.images[2], sset),
                                  rgb[2].astype(np.float32) / np.float32(255))
    gray = scan_sources([tmp_path / "rgba.npy"], color="gray")
    luma = rgb[2].astype(np.float64) @ np.array([0.299, 0.587, 0.114]) / 255  # ITU-R BT.601
    np.testing.assert_allclose(load_image(gray.images[2], gray)[:, :, 0], luma, atol=1e-6)


@pytest.mark.parametrize("dtype, values, expected", [
    (np.uint16, [0, 65535, 32768], [0.0, 1.0, 32768 / 65535]),
    (np.int16, [-32767, 0, 32767], [-1.0, 0.0, 1.0]),
    (np.bool_, [False, True, True], [0.0, 1.0, 1.0]),
    (np.float64, [-2.5, 0.25, 7.0], [-2.5, 0.25, 7.0]),      # floats as stored, not clipped
    (np.float16, [0.5, -1.0, 2.0], [0.5, -1.0, 2.0]),
])
def test_value_rules_by_dtype(tmp_path, dtype, values, expected):
    stack = np.zeros((2, 1, 3), dtype=dtype)
    stack[1, 0, :] = np.asarray(values).astype(dtype)
    np.save(tmp_path / "s.npy", stack)
    sset = scan_sources([tmp_path / "s.npy"])
    got = load_image(sset.images[1], sset)
    np.testing.assert_allclose(got[0, :, 0], expected, rtol=1e-6)


def test_downscale_is_the_area_average(tmp_path):
    frames = low_rank_frames(n=3)
    np.save(tmp_path / "s.npy", frames)
    sset = scan_sources([tmp_path / "s.npy"])
    got = load_image(sset.images[1], sset, downscale=4)
    expected = (frames[1].astype(np.float64) / 255).reshape(6, 4, 8, 4).mean(axis=(1, 3))
    np.testing.assert_allclose(got[:, :, 0], expected, atol=1e-6)


def save_object_array(path):
    data = np.empty((2, 3, 3), dtype=object)
    data[...] = "text"
    np.save(path, data, allow_pickle=True)


@pytest.mark.parametrize("make, words", [
    (lambda p: save_object_array(p), "dtype object"),
    (lambda p: np.save(p, np.ones((2, 3, 3), np.complex64)), "complex numbers"),
    (lambda p: np.save(p, np.ones((3, 3), np.uint8)), "2 axes"),
    (lambda p: np.save(p, np.ones((2, 3, 3, 3, 3), np.uint8)), "5 axes"),
    (lambda p: np.save(p, np.ones((2, 3, 3, 2), np.uint8)), "2 channels"),
    (lambda p: np.save(p, np.ones((0, 3, 3), np.uint8)), "no frame"),
    (lambda p: np.save(p, np.array(["ab"] * 8).reshape(2, 2, 2)), "text"),
    (lambda p: p.write_bytes(b"not an array file at all"), "not a NumPy array file"),
])
def test_damaged_or_foreign_stacks_are_named_with_a_reason(tmp_path, make, words):
    path = tmp_path / "bad.npy"
    make(path)
    with pytest.raises(NoUsableImagesError) as info:
        scan_sources([path])
    message = str(info.value)
    assert f"{path}: " in message
    assert words in message


def test_a_truncated_stack_is_named(tmp_path):
    path = tmp_path / "cut.npy"
    np.save(path, low_rank_frames(n=10))
    path.write_bytes(path.read_bytes()[:2000])
    with pytest.raises(NoUsableImagesError, match="truncated"):
        scan_sources([path])


def test_a_frame_holding_nan_is_left_out_with_its_number(tmp_path):
    stack = np.random.default_rng(0).random((6, 8, 8)).astype(np.float32)
    stack[4, 2, 2] = np.nan
    np.save(tmp_path / "s.npy", stack)
    result = analyze([tmp_path / "s.npy"], AnalysisOptions(rank=2))
    assert result.decomposition.pages.tolist() == [0, 1, 2, 3, 5]
    (problem,) = result.problems
    assert problem.page == 4 and "frame 4 holds NaN" in problem.reason


def test_a_frame_is_read_without_loading_the_stack(tmp_path):
    stack = np.zeros((200, 128, 128), dtype=np.float32)          # 13 MB
    stack[150] = 0.5
    np.save(tmp_path / "big.npy", stack)
    del stack
    tracemalloc.start()
    try:
        sset = scan_sources([tmp_path / "big.npy"])
        frame = read_array_frame(str(tmp_path / "big.npy"), 150)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert sset.n_images == 200 and float(frame.mean()) == 0.5
    assert peak < 1_000_000       # a frame is 64 KB; the file is 13 MB


def test_frame_range_and_step_on_a_stack(tmp_path):
    np.save(tmp_path / "s.npy", low_rank_frames(n=30))
    sset = scan_sources([tmp_path / "s.npy"], frames=parse_frames("5:20:4"))
    assert [ref.page for ref in sset.images] == [5, 9, 13, 17]
    assert sset.frame_step == 4
    assert [r.page for r in scan_sources([tmp_path / "s.npy"],
                                         frames=parse_frames("25:")).images] == [25, 26, 27, 28,
                                                                                29]


def test_frames_text_and_its_errors():
    assert parse_frames("10:20") == FrameRange(10, 20, 1)
    assert parse_frames("::5") == FrameRange(0, None, 5)
    assert list(parse_frames(":4").numbers(10)) == [0, 1, 2, 3]
    assert list(FrameRange(8, None, 3).numbers(10)) == [8]
    assert list(FrameRange(12).numbers(10)) == []
    for text, words in [("5", "START:STOP"), ("1:2:3:4", "START:STOP"), ("a:3", "whole number"),
                        ("5:2", "above start"), ("0:10:0", "step must be at least 1"),
                        ("-1:4", "at least 0")]:
        with pytest.raises(ValueError, match=words):
            parse_frames(text)
    with pytest.raises(TypeError):
        parse_frames(3)
    with pytest.raises(TypeError):
        FrameRange(1.5, 3)


def test_a_frame_rate_for_a_folder_of_frames_is_stored_and_read_back(tmp_path):
    frames = low_rank_frames(n=12)
    for i, frame in enumerate(frames):
        Image.fromarray(frame).save(tmp_path / f"f{i:02d}.png")
    d = analyze([tmp_path], AnalysisOptions(rank=2, frame_rate=12.5)).decomposition
    assert d.metadata["frame_rate"] == 12.5
    saved = save_model(tmp_path / "model.npz", d)
    again = load_model(saved)
    assert again.metadata["frame_rate"] == 12.5
    assert again.metadata["options"]["frame_rate"] == 12.5
    # a step on image files does not change their rate (it applies to videos and stacks)
    d = analyze([tmp_path], AnalysisOptions(rank=2, frame_rate=10.0,
                                            frames="0::2")).decomposition
    assert d.n_images == 12 and d.metadata["frame_rate"] == 10.0
    # no rate known: the field is absent
    assert "frame_rate" not in analyze([tmp_path], AnalysisOptions(rank=2)).decomposition.metadata


def test_a_stack_with_a_step_stores_the_sampled_rate_and_options_round_trip(tmp_path):
    np.save(tmp_path / "s.npy", low_rank_frames(n=20))
    options = AnalysisOptions(rank=2, frames="1:19:3", frame_rate=30.0)
    d = analyze([tmp_path / "s.npy"], options).decomposition
    assert d.pages.tolist() == [1, 4, 7, 10, 13, 16]
    assert d.metadata["frame_rate"] == pytest.approx(10.0)
    assert AnalysisOptions.from_dict(d.metadata["options"]) == options


def test_bad_frame_rates_are_refused():
    for value in (0, -1.0, float("inf"), float("nan")):
        with pytest.raises(ValueError, match="frame_rate"):
            AnalysisOptions(frame_rate=value)
    with pytest.raises(TypeError, match="frame_rate"):
        AnalysisOptions(frame_rate="fast")
    from modescope.core.output.model_metadata import check_metadata
    with pytest.raises(ValueError, match="'frame_rate' must be a positive number"):
        check_metadata({"frame_rate": -2}, 1, "modescope-model", 1)


def test_an_analysed_frame_is_read_again_by_its_number(tmp_path):
    from modescope.core.engine.pipeline import load_analysis_image
    frames = low_rank_frames(n=12)
    np.save(tmp_path / "s.npy", frames)
    d = analyze([tmp_path / "s.npy"], AnalysisOptions(rank=2, frames="3::4")).decomposition
    assert d.pages.tolist() == [3, 7, 11]
    np.testing.assert_array_equal(load_analysis_image(d, 1)[:, :, 0],
                                  frames[7].astype(np.float32) / np.float32(255))
