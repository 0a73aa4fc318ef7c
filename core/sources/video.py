"""Video files as image collections: one decoded frame, one image, in time order.

Videos are read with PyAV (the ``av`` package, installed by the ``video`` extra), whose wheels
ship their own FFmpeg libraries. PyAV was chosen over imageio-ffmpeg because it reads the
container in-process: it can seek to a key frame and decode forward (imageio-ffmpeg pipes raw
frames out of an ``ffmpeg`` program and restarts it to seek), and it exposes the stream's
metadata (frame count, average frame rate, time base) directly.

Frames
------
The first video stream of the file is used (audio and other streams are ignored). Frames are
numbered from 0 in presentation order; frame ``n`` becomes the image with ``page == n``. The
frame count is the one the container states, or, when it states none (Matroska often does not),
the number of video packets found by reading the file once without decoding. Every frame is
converted by FFmpeg to 8-bit RGB (``rgb24``) and then follows the rules of image files (values
divided by 255; ``color="gray"`` takes the BT.601 luma of the RGB values). A rotation stored in
the file's metadata (phone videos) is not applied: frames are analysed as stored.

Reading a frame: one reader per file is kept open for the process, and it decodes forward, so
frames asked for in order are decoded once each. A decoding thread holds the file's lock for a
whole run of frames (:func:`hold`), so two threads never interleave their frames and the reader
keeps going forward. A frame far ahead of, or behind, the last one decoded is reached by seeking
to the key frame before it; the frame number of a decoded frame is then
``round((pts - start_time) * time_base * rate)``, which assumes a constant frame rate (the
common case for cameras and simulations; a variable-rate file may then have a frame read
twice or skipped near a seek).

Frame rate
----------
:attr:`VideoInfo.rate` is the stream's average frame rate (``avg_frame_rate``), or FFmpeg's
guess from the time stamps when the file states none; None when neither is known.
"""

from __future__ import annotations

import contextlib
import os
import threading
from dataclasses import dataclass
from typing import Iterator

import numpy as np

from modescope.core.sources.frames import FrameFileError

__all__ = ["VIDEO_SUFFIXES", "VideoInfo", "probe_video", "read_video_frame",
           "video_available", "hold"]

VIDEO_SUFFIXES = (".mp4", ".m4v", ".mov", ".avi", ".mkv", ".webm")

# a frame at most this far ahead of the last one decoded is reached by decoding forward
# (cheaper than a seek to the key frame before it: our choice, no published source)
_FORWARD_LIMIT = 64
_MAX_OPEN = 4                     # readers kept open at once (least recently used closed first)
_READERS: dict = {}               # path -> _Reader, in order of use
_LOCKS: dict = {}                 # path -> RLock held while a reader of that path is used
_GUARD = threading.Lock()         # guards the two dicts


@dataclass(frozen=True)
class VideoInfo:
    """What a video file says about its first video stream.

    Attributes
    ----------
    n_frames : int
        Frames in the stream (see the module docstring).
    rows, cols : int
        Size of every frame.
    rate : float or None
        Frames per second, None when unknown.
    codec : str
        FFmpeg's name of the codec, e.g. "h264", "ffv1".
    """

    n_frames: int
    rows: int
    cols: int
    rate: float | None
    codec: str


def video_available() -> bool:
    """Return True when PyAV can be imported (the ``video`` extra is installed)."""
    try:
        import av  # noqa: F401
    except ImportError:
        return False
    return True


def _av():
    try:
        import av
    except ImportError:
        raise FrameFileError("is a video, and reading videos needs PyAV: install it with "
                             "pip install 'modescope[video]'") from None
    return av


def _plain(exc: BaseException) -> str:
    """FFmpeg's message without the file name, in one short line."""
    text = getattr(exc, "strerror", None) or str(exc) or type(exc).__name__
    text = " ".join(str(text).split())
    return text if len(text) <= 120 else text[:117] + "..."


def _failures():
    av = _av()
    return (av.FFmpegError, OSError, EOFError, ValueError, MemoryError)


def _open(path: str):
    """Open ``path`` and return ``(container, stream)`` or raise FrameFileError."""
    av = _av()
    try:
        container = av.open(path, mode="r")
    except MemoryError:
        raise
    except _failures() as exc:
        raise FrameFileError(f"not a video Modescope can read (FFmpeg says: {_plain(exc)}; "
                             "the file may be damaged, truncated or of another kind)") from None
    if not container.streams.video:
        container.close()
        raise FrameFileError("holds no video stream")
    stream = container.streams.video[0]
    stream.thread_type = "AUTO"
    return container, stream


def _rate(stream) -> float | None:
    for value in (stream.average_rate, getattr(stream, "guessed_rate", None)):
        if value is not None and float(value) > 0:
            return float(value)
    return None


def _count_packets(container, stream) -> int:
    count = 0
    for packet in container.demux(stream):
        if packet.size:
            count += 1
    return count


def probe_video(path: str) -> VideoInfo:
    """Read a video's stream information and decode its first frame to check it.

    Parameters
    ----------
    path : str
        The file.

    Returns
    -------
    VideoInfo

    Raises
    ------
    FrameFileError
        If PyAV is missing, or the file is not a video FFmpeg can open, has no video stream,
        holds no frame, or its first frame cannot be decoded; ``reason`` says which.
    """
    container, stream = _open(path)
    try:
        rows, cols = int(stream.codec_context.height), int(stream.codec_context.width)
        rate = _rate(stream)
        codec = str(stream.codec_context.name)
        try:
            first = next(iter(container.decode(stream)), None)
        except MemoryError:
            raise
        except _failures() as exc:
            raise FrameFileError(f"its first frame cannot be decoded ({_plain(exc)})") from None
        if first is None:
            raise FrameFileError("holds no frame that can be decoded")
        rows, cols = int(first.height), int(first.width)
        n_frames = int(stream.frames or 0)
        if n_frames <= 0:
            container.seek(0)
            n_frames = _count_packets(container, stream)
    except MemoryError:
        raise
    except FrameFileError:
        raise
    except _failures() as exc:
        raise FrameFileError(f"cannot be read ({_plain(exc)})") from None
    finally:
        container.close()
    if rows < 1 or cols < 1 or n_frames < 1:
        raise FrameFileError(f"holds no usable frame ({n_frames} frames of {rows}x{cols})")
    return VideoInfo(n_frames=n_frames, rows=rows, cols=cols, rate=rate, codec=codec)


class _Reader:
    """One open video, decoding forward from the last frame handed out."""

    def __init__(self, path: str, stamp: tuple):
        self.path, self.stamp = path, stamp
        self.container, self.stream = _open(path)
        self.rate = _rate(self.stream)
        tb = self.stream.time_base
        self.time_base = float(tb) if tb is not None else None
        self.start = self.stream.start_time or 0
        self._restart()

    def _restart(self) -> None:
        self.frames = iter(self.container.decode(self.stream))
        self.next = 0                     # number of the frame the iterator gives next
        self.exact = True                 # numbers counted from the start, not from a seek

    def close(self) -> None:
        self.container.close()

    def _number(self, frame) -> int | None:
        if frame.pts is None or self.rate is None or self.time_base is None:
            return None
        return int(round((frame.pts - self.start) * self.time_base * self.rate))

    def _seek(self, n: int) -> None:
        """Seek to the key frame before frame ``n``, or to the start when that is not known."""
        if self.rate is None or self.time_base is None or n < _FORWARD_LIMIT:
            self.container.seek(0)
            self._restart()
            return
        target = self.start + int((n / self.rate) / self.time_base)
        self.container.seek(target, stream=self.stream, backward=True, any_frame=False)
        self.frames = iter(self.container.decode(self.stream))
        self.next = None                  # known from the next frame's time stamp
        self.exact = False

    def read(self, n: int) -> np.ndarray:
        if self.next is None or n < self.next or n > self.next + _FORWARD_LIMIT:
            self._seek(n)
        while True:
            frame = next(self.frames, None)
            if frame is None:
                raise FrameFileError(f"frame {n} is past the end of the video (the file may be "
                                     "truncated or may have changed since the scan)")
            number = self.next if self.next is not None else self._number(frame)
            if number is None or (not self.exact and number > n):
                # the time stamps do not place this frame: count from the start instead
                self.container.seek(0)
                self._restart()
                continue
            self.next = number + 1
            if number == n:
                return frame.to_ndarray(format="rgb24")


def _lock(path: str) -> threading.RLock:
    with _GUARD:
        lock = _LOCKS.get(path)
        if lock is None:
            lock = _LOCKS[path] = threading.RLock()
        return lock


@contextlib.contextmanager
def hold(paths) -> Iterator[None]:
    """Hold the readers of the video files among ``paths`` for a run of frames.

    The locks are taken in sorted order (no two holders can wait for each other); a thread
    that holds them reads its frames without another thread moving the readers in between.
    """
    wanted = sorted({p for p in paths if os.path.splitext(p)[1].lower() in VIDEO_SUFFIXES})
    with contextlib.ExitStack() as stack:
        for path in wanted:
            stack.enter_context(_lock(path))
        yield


def _reader(path: str) -> _Reader:
    """Return the open reader of ``path`` (the caller holds the file's lock)."""
    try:
        info = os.stat(path)
    except OSError as exc:
        raise FrameFileError(f"cannot be read ({exc.strerror or exc})") from None
    stamp = (info.st_size, info.st_mtime_ns, info.st_ino)
    with _GUARD:
        held = _READERS.pop(path, None)
        if held is not None and held.stamp == stamp:
            _READERS[path] = held            # most recently used last
            return held
    if held is not None:
        held.close()
    reader = _Reader(path, stamp)
    closing = []
    with _GUARD:
        _READERS[path] = reader
        while len(_READERS) > _MAX_OPEN:
            old_path = next(iter(_READERS))
            lock = _LOCKS.get(old_path)
            if lock is None or not lock.acquire(blocking=False):
                break                        # in use by another thread: closed later
            try:
                closing.append(_READERS.pop(old_path))
            finally:
                lock.release()
    for old in closing:
        old.close()
    return reader


def read_video_frame(path: str, frame: int) -> np.ndarray:
    """Decode frame ``frame`` of a video as 8-bit RGB.

    Parameters
    ----------
    path : str
        The file.
    frame : int
        Frame number, from 0 (module docstring).

    Returns
    -------
    ndarray, shape (rows, cols, 3), uint8

    Raises
    ------
    FrameFileError
        If PyAV is missing, the file cannot be opened, or the frame cannot be decoded or lies
        past the end of the stream.
    """
    with _lock(path):
        reader = _reader(path)
        try:
            return reader.read(frame)
        except MemoryError:
            raise
        except FrameFileError:
            _drop(path)
            raise
        except _failures() as exc:
            _drop(path)
            raise FrameFileError(f"frame {frame} cannot be decoded ({_plain(exc)})") from None


def _drop(path: str) -> None:
    """Close the reader of ``path`` (after a failure: the next read opens the file anew)."""
    with _GUARD:
        held = _READERS.pop(path, None)
    if held is not None:
        held.close()
