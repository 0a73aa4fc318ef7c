"""``modescope analyze`` on videos and .npy stacks: --frames, --frame-rate, damaged files.

Outside reference: the stack is written by numpy's own writer (``np.save``) and the video by the
FFmpeg libraries of the ``av`` wheel; the frame numbers and rates checked are the ones written.
"""

from __future__ import annotations

import numpy as np
import pytest

from modescope.app.cli.main import main
from modescope.core.output.model_file import load_model


@pytest.fixture()
def stack(tmp_path):
    rng = np.random.default_rng(5)
    path = tmp_path / "flow.npy"
    np.save(path, rng.random((24, 16, 20)).astype(np.float32))
    return path


def test_frames_and_frame_rate_reach_the_model(tmp_path, stack, capsys):
    out = tmp_path / "m.npz"
    code = main(["analyze", str(stack), "-o", str(out), "--rank", "3", "--quiet",
                 "--frames", "2:12:2", "--frame-rate", "8"])
    assert code == 0
    d = load_model(out)
    assert d.pages.tolist() == [2, 4, 6, 8, 10]
    assert d.metadata["frame_rate"] == pytest.approx(4.0)     # 8 Hz, every second frame
    assert "time axis: 4 images per second" in capsys.readouterr().err


@pytest.mark.parametrize("argv, words", [
    (["--frames", "7"], "START:STOP"),
    (["--frames", "9:3"], "above start"),
    (["--frame-rate", "0"], "positive number of frames per second"),
    (["--frame-rate", "fast"], "expected a number"),
])
def test_bad_frames_or_rate_are_usage_errors(tmp_path, stack, capsys, argv, words):
    with pytest.raises(SystemExit) as info:
        main(["analyze", str(stack), "-o", str(tmp_path / "m.npz"), *argv])
    assert info.value.code == 2
    assert words in capsys.readouterr().err


def test_a_damaged_stack_is_named_without_a_traceback(tmp_path, capsys):
    bad = tmp_path / "bad.npy"
    np.save(bad, np.ones((4, 5, 5), np.complex128))
    code = main(["analyze", str(bad), "-o", str(tmp_path / "m.npz"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 1
    assert str(bad) in err and "complex numbers" in err
    assert "Traceback" not in err
    assert not (tmp_path / "m.npz").exists()


def test_a_video_keeps_its_own_rate(tmp_path):
    av = pytest.importorskip("av")
    path = tmp_path / "clip.mkv"
    with av.open(str(path), "w") as container:
        stream = container.add_stream("ffv1", rate=15)
        stream.width, stream.height, stream.pix_fmt = 16, 16, "bgr0"
        for t in range(10):
            frame = np.full((16, 16, 3), 20 * t, dtype=np.uint8)
            for packet in stream.encode(av.VideoFrame.from_ndarray(frame, format="rgb24")):
                container.mux(packet)
        for packet in stream.encode():
            container.mux(packet)
    out = tmp_path / "m.npz"
    assert main(["analyze", str(path), "-o", str(out), "--rank", "2", "--quiet"]) == 0
    d = load_model(out)
    assert d.metadata["frame_rate"] == pytest.approx(15.0)
    assert d.pages.tolist() == list(range(10))
    # the mean of frames 0..9, each one value 20 t / 255
    assert float(d.mean.mean()) == pytest.approx(20 * 4.5 / 255, abs=1e-6)
