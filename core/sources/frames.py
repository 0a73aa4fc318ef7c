"""Which frames of a sequence file (video, array stack) are analysed: :class:`FrameRange`.

Frame numbers
-------------
Frames are numbered from 0 in time order, the way the model and every table store them (the
``page`` of an :class:`~modescope.core.sources.scan.ImageRef` and the ``page`` column of the
CSV tables). A range ``START:STOP:STEP`` takes frames ``START, START + STEP, ...`` below
``STOP``, as a Python slice does: ``0:100:2`` is frames 0, 2, ..., 98 (50 frames). ``STOP`` may
be left out (to the last frame) and so may ``START`` (from frame 0); ``STEP`` is 1 unless given.
The range applies to each video or array file on its own; image files and multi-page TIFF
pages are not affected.

With a step, consecutive analysed frames are ``STEP`` frames of the file apart, so the time
between two columns of the model is ``STEP / rate`` (see :func:`sampled_rate`).
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass

__all__ = ["FrameFileError", "FrameRange", "parse_frames", "sampled_rate", "check_frame_rate"]



class FrameFileError(ValueError):
    """Internal: a video, an array stack or one of its frames cannot be used; ``reason`` is a
    sentence for the user (the scan and the decoder turn it into a Problem)."""

    def __init__(self, reason: str):
        super().__init__(reason)
        self.reason = reason


@dataclass(frozen=True)
class FrameRange:
    """A range of frame numbers (from 0, ``stop`` excluded), as a Python slice.

    Attributes
    ----------
    start : int
        First frame taken, at least 0.
    stop : int or None
        Frames from ``stop`` on are not taken; None: up to the last frame. Above ``start``.
    step : int
        Take every ``step``-th frame, at least 1.
    """

    start: int = 0
    stop: int | None = None
    step: int = 1

    def __post_init__(self):
        for name in ("start", "step"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, numbers.Integral):
                raise TypeError(f"frames {name} must be an integer, got "
                                f"{type(value).__name__} {value!r}")
        if self.stop is not None and (isinstance(self.stop, bool)
                                      or not isinstance(self.stop, numbers.Integral)):
            raise TypeError(f"frames stop must be an integer or None, got "
                            f"{type(self.stop).__name__} {self.stop!r}")
        if self.start < 0:
            raise ValueError(f"frames start must be at least 0 (frames are numbered from 0), "
                             f"got {self.start}")
        if self.step < 1:
            raise ValueError(f"frames step must be at least 1, got {self.step}")
        if self.stop is not None and self.stop <= self.start:
            raise ValueError(f"frames stop must be above start ({self.start}), got {self.stop}")

    def numbers(self, n_frames: int) -> range:
        """Return the frame numbers taken from a file of ``n_frames`` frames.

        Parameters
        ----------
        n_frames : int
            Frames in the file, at least 0.

        Returns
        -------
        range
            Frame numbers in time order (empty when ``start`` is past the last frame).
        """
        stop = n_frames if self.stop is None else min(self.stop, n_frames)
        return range(self.start, max(stop, self.start), self.step)

    def __str__(self) -> str:
        stop = "" if self.stop is None else str(self.stop)
        return f"{self.start}:{stop}:{self.step}"


def parse_frames(text) -> FrameRange:
    """Read a frame range written ``START:STOP[:STEP]`` (frames numbered from 0).

    Parameters
    ----------
    text : str
        For instance ``"10:200"``, ``"0::5"`` (every fifth frame), ``":100"``.

    Returns
    -------
    FrameRange

    Raises
    ------
    TypeError
        If ``text`` is not a str.
    ValueError
        If it is not two or three fields separated by ":" holding whole numbers, or the numbers
        are out of range; the message repeats the text.

    Examples
    --------
    >>> parse_frames("10:20:2").numbers(100)
    range(10, 20, 2)
    """
    if not isinstance(text, str):
        raise TypeError(f"frames must be text like START:STOP[:STEP], got "
                        f"{type(text).__name__} {text!r}")
    fields = text.strip().split(":")
    if len(fields) not in (2, 3):
        raise ValueError(f"frames must be written START:STOP or START:STOP:STEP (frames "
                         f"numbered from 0, STOP excluded), got {text!r}")
    values = []
    for name, field in zip(("start", "stop", "step"), fields):
        field = field.strip()
        if field == "":
            values.append(None)
            continue
        try:
            values.append(int(field))
        except ValueError:
            raise ValueError(f"frames {name} must be a whole number, got {field!r} in "
                             f"{text!r}") from None
    start, stop = values[0], values[1]
    step = values[2] if len(values) == 3 else None
    try:
        return FrameRange(0 if start is None else start, stop, 1 if step is None else step)
    except ValueError as exc:
        raise ValueError(f"{exc} (in {text!r})") from None


def check_frame_rate(name: str, value) -> float | None:
    """Return ``value`` as a positive finite float in Hz (None stays None), or raise."""
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a number of frames per second or None, got "
                        f"{type(value).__name__} {value!r}")
    value = float(value)
    if not (math.isfinite(value) and value > 0):
        raise ValueError(f"{name} must be a positive number of frames per second, got {value}")
    return value


def sampled_rate(rate: float | None, step: int = 1) -> float | None:
    """Return the rate of the analysed sequence: ``rate / step`` (None when ``rate`` is None).

    Parameters
    ----------
    rate : float or None
        Frames per second of the source.
    step : int, default 1
        Frames of the source between two analysed frames (``FrameRange.step`` when a range was
        applied to sequence files, 1 otherwise).

    Returns
    -------
    float or None
        Columns of the model per second of the source's time.
    """
    if rate is None:
        return None
    return float(rate) / step
