"""The time line of the demo run: when each frame is taken, its file name, the lamp and the
watering.

The run always spans ten days (240 hours): a collection of ``n_frames`` frames places frame ``i``
at ``i * 240 / n_frames`` hours after the start, so 240 frames are one an hour and 10,000 frames
are one every 86.4 seconds. The grow lamp is on 05:30 to 21:30 with 15-minute ramps; the soil is
watered every second day at 09:00 (days 1, 3, 5, 7 and 9) and dries back over about a day.
"""

from __future__ import annotations

import math
import re

from modescope.core.validation import check_choice, check_int

__all__ = ["RUN_HOURS", "frame_hours", "frame_name"]

#: Length of the run in hours (ten days); frames are spread evenly over it.
RUN_HOURS = 240

_MAX_FRAMES = 1_000_000
_FORMATS = ("jpg", "png")

# Lamp schedule (hours of the day) and ramp time (hours) when it switches.
_LAMP_ON, _LAMP_OFF, _LAMP_RAMP = 5.5, 21.5, 0.25
# Watering: every second day (days 1, 3, 5, 7, 9; zero-based 0, 2, ...) at 09:00.
_WATER_HOUR, _WATER_EVERY_DAYS, _DRY_HOURS = 9.0, 2, 9.0


def check_n_frames(n_frames) -> int:
    """Return ``n_frames`` as an int in 1..1,000,000, or raise TypeError/ValueError."""
    return check_int("n_frames", n_frames, minimum=1, maximum=_MAX_FRAMES)


def check_index(index, n_frames: int) -> int:
    """Return ``index`` as an int in ``[0, n_frames)``, or raise TypeError/ValueError."""
    return check_int("index", index, minimum=0, maximum=n_frames - 1)


def check_fmt(fmt) -> str:
    """Return the file format, "jpg" or "png" ("jpeg" and a leading dot are accepted)."""
    if isinstance(fmt, str):
        fmt = fmt.lower().lstrip(".")
        if fmt == "jpeg":
            fmt = "jpg"
    return check_choice("fmt", fmt, _FORMATS)


def frame_hours(index: int, n_frames: int = 240) -> float:
    """Return the time of a frame in hours since the start of the run (00:00 on day 1).

    Parameters
    ----------
    index : int
        Zero-based frame index, ``0 <= index < n_frames``.
    n_frames : int, default 240
        Number of frames in the collection; the frames are spread evenly over ten days.

    Returns
    -------
    float
        ``index * 240 / n_frames``.

    Raises
    ------
    TypeError
        If an argument is not an integer.
    ValueError
        If ``n_frames < 1`` or ``index`` is outside ``[0, n_frames)``.

    Examples
    --------
    >>> frame_hours(30)
    30.0
    >>> frame_hours(30, n_frames=120)
    60.0
    """
    n_frames = check_n_frames(n_frames)
    index = check_index(index, n_frames)
    return index * RUN_HOURS / n_frames


def frame_name(index: int, n_frames: int = 240, *, fmt: str = "jpg") -> str:
    """Return the file name of a frame; names sort in time order both plainly and naturally.

    For ``n_frames <= 240`` (at most one frame an hour) the name carries the day (1-10) and the
    hour of the day, e.g. ``tray_d03_h14.jpg``. Longer collections put a zero-padded running
    number first and add the minute, e.g. ``tray_4242_d05_h05m48.jpg`` (frame 4242 of 10,000),
    so names stay unique.

    Parameters
    ----------
    index : int
        Zero-based frame index, ``0 <= index < n_frames``.
    n_frames : int, default 240
        Number of frames in the collection.
    fmt : {"jpg", "png"}, default "jpg"
        File extension.

    Returns
    -------
    str
        The file name (no folder).

    Raises
    ------
    TypeError
        If an argument has the wrong type.
    ValueError
        If ``index`` or ``n_frames`` is out of range or ``fmt`` is not a known format.

    Examples
    --------
    >>> frame_name(0)
    'tray_d01_h00.jpg'
    >>> frame_name(61, 240, fmt="png")
    'tray_d03_h13.png'
    """
    n_frames = check_n_frames(n_frames)
    index = check_index(index, n_frames)
    fmt = check_fmt(fmt)
    minutes = (index * RUN_HOURS * 60) // n_frames  # exact integer arithmetic
    day, hour, minute = minutes // (24 * 60) + 1, (minutes // 60) % 24, minutes % 60
    if n_frames <= RUN_HOURS:
        return f"tray_d{day:02d}_h{hour:02d}.{fmt}"
    width = len(str(n_frames - 1))
    return f"tray_{index:0{width}d}_d{day:02d}_h{hour:02d}m{minute:02d}.{fmt}"


#: Names written by frame_name, used to find stale frames when overwriting a folder.
NAME_RE = re.compile(r"^tray_(\d+_)?d\d{2}_h\d{2}(m\d{2})?\.(jpg|png)$")


def lamp_level(hour_of_day: float) -> float:
    """Lamp brightness in [0, 1] at an hour of the day (on 05:30-21:30, 15-minute ramps)."""
    up = (hour_of_day - _LAMP_ON) / _LAMP_RAMP
    down = (_LAMP_OFF - hour_of_day) / _LAMP_RAMP
    return float(min(1.0, max(0.0, up), max(0.0, down)))


def wetness(hours: float) -> float:
    """Soil wetness in [0, ~1]: 1 just after watering, decaying over about a day."""
    w = 0.0
    day = 0
    while day * 24 + _WATER_HOUR <= hours:
        dt = hours - (day * 24 + _WATER_HOUR)
        if dt < 4 * 24:
            w += math.exp(-dt / _DRY_HOURS)
        day += _WATER_EVERY_DAYS
    return min(w, 1.0)
