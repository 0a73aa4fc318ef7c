"""Videos as collections: frames decoded as written, containers, frame rate, ranges, damage.

Outside reference: every video here is written by the test from known frames through the same
FFmpeg libraries PyAV ships (``av`` wheel), with a lossless codec (FFV1, in RGB) where the frames
must come back exactly, and with H.264 (4:2:0, near-lossless quality) where they must come back
within the codec's error.
"""

from __future__ import annotations

import numpy as np
import pytest

av = pytest.importorskip("av")

from modescope.core.engine.pipeline import AnalysisOptions, analyze  # noqa: E402
from modescope.core.errors import SourceError  # noqa: E402
from modescope.core.sources.decode import load_image, load_preview  # noqa: E402
from modescope.core.sources.frames import FrameRange  # noqa: E402
from modescope.core.sources.scan import scan_sources  # noqa: E402
from modescope.core.sources.video import probe_video, read_video_frame  # noqa: E402


def smooth_frames(n: int, rows: int = 48, cols: int = 64) -> np.ndarray:
    """A travelling colour wave: smooth, so a lossy codec keeps it within a few levels."""
    r, c = np.mgrid[0:rows, 0:cols]
    out = np.empty((n, rows, cols, 3), dtype=np.uint8)
    for t in range(n):
        phase = 2 * np.pi * t / 16
        out[t, :, :, 0] = 128 + 90 * np.sin(2 * np.pi * c / cols + phase)
        out[t, :, :, 1] = 128 + 90 * np.cos(2 * np.pi * r / rows - phase)
        out[t, :, :, 2] = 64 + 2 * t % 128
    return out


def write_video(path, frames: np.ndarray, codec: str, rate: int = 25,
                pix_fmt: str | None = None, options: dict | None = None) -> None:
    with av.open(str(path), "w") as container:
        stream = container.add_stream(codec, rate=rate, options=options or {})
        stream.width, stream.height = frames.shape[2], frames.shape[1]
        if pix_fmt:
            stream.pix_fmt = pix_fmt
        for frame in frames:
            video_frame = av.VideoFrame.from_ndarray(frame, format="rgb24")
            for packet in stream.encode(video_frame):
                container.mux(packet)
        for packet in stream.encode():
            container.mux(packet)


@pytest.fixture(scope="module")
def lossless(tmp_path_factory):
    frames = smooth_frames(30)
    path = tmp_path_factory.mktemp("video") / "wave.mkv"
    write_video(path, frames, "ffv1", rate=25, pix_fmt="bgr0")
    return path, frames


def test_lossless_video_decodes_to_the_written_frames(lossless):
    path, frames = lossless
    sset = scan_sources([path], color="rgb")
    assert sset.n_images == 30
    assert [ref.page for ref in sset.images] == list(range(30))
    assert sset.reference_size == (48, 64)
    for ref in sset.images:
        got = load_image(ref, sset)
        # exact: FFV1 in RGB is lossless, and 8-bit values are divided by 255 as for PNG
        np.testing.assert_array_equal(got, frames[ref.page].astype(np.float32) / np.float32(255))


def test_gray_frames_are_the_bt601_luma_of_the_rgb_values(lossless):
    path, frames = lossless
    sset = scan_sources([path], color="gray")
    got = load_image(sset.images[7], sset)
    # ITU-R BT.601 luma weights, as for colour image files
    luma = frames[7].astype(np.float64) @ np.array([0.299, 0.587, 0.114]) / 255
    np.testing.assert_allclose(got[:, :, 0], luma, atol=1e-6)


def test_frames_are_read_in_any_order_with_seeking(tmp_path):
    frames = smooth_frames(200, 32, 32)
    path = tmp_path / "long.mkv"
    write_video(path, frames, "ffv1", rate=30, pix_fmt="bgr0", options={"g": "10"})
    for n in (150, 20, 151, 199, 0, 120, 60):
        np.testing.assert_array_equal(read_video_frame(str(path), n), frames[n])
    with pytest.raises(ValueError, match="past the end"):
        read_video_frame(str(path), 200)


def test_h264_mp4_decodes_within_the_codecs_error(tmp_path):
    frames = smooth_frames(20)
    path = tmp_path / "wave.mp4"
    write_video(path, frames, "libx264", rate=30, pix_fmt="yuv420p", options={"crf": "12"})
    sset = scan_sources([path], color="rgb")
    assert sset.n_images == 20
    errors = [np.abs(load_image(ref, sset) * 255 - frames[ref.page]) for ref in sset.images]
    # H.264 at crf 12 with 4:2:0 chroma on smooth content: a few levels on average (measured
    # 0.5-1 here; the bound is the codec's quality, not an exact figure)
    assert max(float(e.mean()) for e in errors) < 3.0
    assert max(float(np.percentile(e, 99)) for e in errors) < 12.0


@pytest.mark.parametrize("suffix, codec, pix_fmt, options", [
    (".mp4", "libx264", "yuv420p", {"crf": "12"}),
    (".avi", "mpeg4", "yuv420p", {"b": "20M"}),   # the default 200 kbit/s drifts by 10 levels
    (".mkv", "ffv1", "bgr0", {}),
    (".mov", "prores_ks", "yuv422p10le", {}),
    (".mov", "mjpeg", "yuvj420p", {}),
])
def test_mp4_avi_mkv_mov_all_open(tmp_path, suffix, codec, pix_fmt, options):
    frames = smooth_frames(12)
    path = tmp_path / f"clip{suffix}"
    write_video(path, frames, codec, rate=24, pix_fmt=pix_fmt, options=options)
    info = probe_video(str(path))
    assert (info.n_frames, info.rows, info.cols) == (12, 48, 64)
    assert info.rate == pytest.approx(24.0)
    sset = scan_sources([path], color="rgb")
    assert sset.n_images == 12 and sset.frame_rate == pytest.approx(24.0)
    last = load_image(sset.images[-1], sset)
    assert np.abs(last * 255 - frames[11]).mean() < 6.0      # each codec's error, loosely


def test_the_frame_rate_comes_from_the_video_and_is_stored(lossless):
    path, _ = lossless
    d = analyze([path], AnalysisOptions(rank=3)).decomposition
    assert d.metadata["frame_rate"] == pytest.approx(25.0)
    assert d.pages.tolist() == list(range(30))
    # a step of 3 samples the sequence at a third of the rate; the frame numbers stay the file's
    d = analyze([path], AnalysisOptions(rank=3, frames=FrameRange(2, 20, 3))).decomposition
    assert d.pages.tolist() == [2, 5, 8, 11, 14, 17]
    assert d.metadata["frame_rate"] == pytest.approx(25.0 / 3)
    # a rate given overrides the file's
    d = analyze([path], AnalysisOptions(rank=3, frame_rate=100.0)).decomposition
    assert d.metadata["frame_rate"] == pytest.approx(100.0)


def test_a_range_past_the_end_is_a_problem_not_a_crash(lossless):
    path, _ = lossless
    with pytest.raises(ValueError, match="selects none of its 30 frames"):
        scan_sources([path], frames=FrameRange(40, 50))


def test_garbage_with_a_video_suffix_is_named(tmp_path):
    bad = tmp_path / "broken.mp4"
    bad.write_bytes(b"this is not a video at all" * 100)
    good = tmp_path / "good.png"
    from PIL import Image
    Image.fromarray(np.zeros((48, 64), np.uint8)).save(good)
    sset = scan_sources([bad, good])
    assert sset.n_images == 1
    (problem,) = sset.problems
    assert problem.path == str(bad)
    assert "not a video Modescope can read" in problem.reason


def test_a_truncated_video_is_named_with_a_plain_reason(tmp_path, lossless):
    path, _ = lossless
    data = path.read_bytes()
    cut = tmp_path / "cut.mp4"
    frames = smooth_frames(30)
    write_video(cut, frames, "libx264", rate=25, pix_fmt="yuv420p")
    cut.write_bytes(cut.read_bytes()[: len(cut.read_bytes()) // 3])
    head = tmp_path / "head.mkv"
    head.write_bytes(data[:200])
    for damaged in (cut, head):
        with pytest.raises(ValueError) as info:
            scan_sources([damaged])
        message = str(info.value)
        assert str(damaged) in message
        assert "video" in message or "frame" in message


def test_a_truncated_stream_loses_only_its_last_frames(tmp_path):
    # Matroska states no frame count: the packets are counted, so a cut file keeps the frames
    # it still holds and every one of them decodes
    frames = smooth_frames(40, 32, 32)
    path = tmp_path / "cut.mkv"
    write_video(path, frames, "ffv1", rate=25, pix_fmt="bgr0")
    path.write_bytes(path.read_bytes()[: int(path.stat().st_size * 0.6)])
    result = analyze([path], AnalysisOptions(rank=2))
    d = result.decomposition
    assert 10 < d.n_images < 40
    failed = [p for p in result.problems if p.path == str(path)]
    assert len(failed) <= 1               # at most the frame cut in the middle
    assert all("frame" in p.reason for p in failed)


def test_preview_of_a_frame(lossless):
    path, frames = lossless
    small = load_preview(path, page=4, max_side=32)
    assert small.shape == (24, 32, 3)
    # a 2 x 2 area average of the exact frame (the preview's rule for whole blocks)
    expected = frames[4].astype(np.float32).reshape(24, 2, 32, 2, 3).mean(axis=(1, 3)) / 255
    np.testing.assert_allclose(small, expected, atol=1e-6)
    with pytest.raises(SourceError, match="past the end"):
        load_preview(path, page=99)


def test_blocks_decoded_by_two_threads_hold_the_right_frames(tmp_path):
    frames = smooth_frames(90, 16, 24)
    path = tmp_path / "many.mkv"
    write_video(path, frames, "ffv1", rate=30, pix_fmt="bgr0", options={"g": "8"})
    sset = scan_sources([path], color="rgb")
    from modescope.core.sources.decode import iter_blocks
    for block in iter_blocks(sset, block_size=16, workers=2):
        for column, index in zip(block.data.T, block.indices):
            expected = frames[sset.images[index].page].astype(np.float32) / np.float32(255)
            np.testing.assert_array_equal(column, expected.ravel())
    # and through the whole analysis: the mean image is the frames' mean (numpy, float64)
    d = analyze([path], AnalysisOptions(rank=2, color="rgb", block_size=16, workers=2)).decomposition
    np.testing.assert_allclose(d.mean.reshape(16, 24, 3), frames.mean(axis=0) / 255, atol=1e-5)
