"""The planted problems: frames of the demo run that are wrong on purpose (a gloved hand, a
fogged lens, an over-exposed frame, the tray pulled out)."""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

from modescope.core.demo.schedule import RUN_HOURS, check_n_frames

__all__ = ["PlantedProblem", "PROBLEM_KINDS", "planted_problems"]

#: The kinds of planted problem, in the order they appear in the run.
PROBLEM_KINDS = ("glove", "fog", "overexposed", "tray_out")

_DESCRIPTIONS = {
    "glove": "A blue-gloved hand in a white lab-coat sleeve reaches over the tray and hides "
             "several pots.",
    "fog": "The lens is fogged: the frame is blurred, low in contrast and under a whitish veil.",
    "overexposed": "The exposure failed: the frame is clipped to near white with only faint "
                   "traces of the tray.",
    "tray_out": "The tray has been pulled out to the right, leaving mostly empty bench in view.",
}
# Where each kind sits, as a fraction of the run (per copy when there are several copies).
_PROBLEM_FRACTIONS = {"glove": 0.22, "fog": 0.41, "overexposed": 0.61, "tray_out": 0.81}
# Planted frames are moved to the nearest frame taken in these hours of the day (lamp on).
_PROBLEM_HOURS = {"glove": (9.0, 12.0), "fog": (6.0, 9.0), "overexposed": (12.0, 17.0),
                  "tray_out": (13.0, 18.0)}
_LIT_HOURS = (6.0, 21.5)


@dataclass(frozen=True)
class PlantedProblem:
    """A frame of the demo collection that is wrong on purpose.

    Attributes
    ----------
    index : int
        Zero-based frame index in the collection.
    kind : str
        One of ``"glove"``, ``"fog"``, ``"overexposed"``, ``"tray_out"``.
    description : str
        One sentence saying what the frame looks like.
    """

    index: int
    kind: str
    description: str


def _copies_per_kind(n_frames: int) -> int:
    if n_frames < 20:
        return 0
    return min(4, 1 + n_frames // 2500)


@functools.lru_cache(maxsize=64)
def planted_with_copies(n_frames: int) -> tuple[tuple[PlantedProblem, int], ...]:
    """Planted problems with their copy number, sorted by index."""
    copies = _copies_per_kind(n_frames)
    taken: set[int] = set()
    gap = n_frames // 100   # keep planted frames apart: neighbours of one are normal frames
    found: list[tuple[PlantedProblem, int]] = []
    for copy in range(copies):
        for kind in PROBLEM_KINDS:
            start = round((copy + _PROBLEM_FRACTIONS[kind]) / copies * (n_frames - 1))
            chosen = None
            # The kind's own hours within about a day and a half, else any lit frame, else any.
            near = max(2, math.ceil(36 * n_frames / RUN_HOURS))
            for (lo, hi), reach in ((_PROBLEM_HOURS[kind], near), (_LIT_HOURS, n_frames),
                                    ((0.0, 24.0), n_frames)):
                for step in range(2 * reach + 1):
                    # 0, +1, -1, +2, -2, ...: the nearest suitable frame not yet used
                    i = start + (step + 1) // 2 * (1 if step % 2 else -1)
                    if not 0 < i < n_frames - 1 or any(abs(i - j) <= gap for j in taken):
                        continue
                    if lo <= (i * RUN_HOURS / n_frames) % 24 < hi:
                        chosen = i
                        break
                if chosen is not None:
                    break
            if chosen is None:  # pragma: no cover - a run of >= 20 frames has room for all
                continue
            taken.add(chosen)
            found.append((PlantedProblem(chosen, kind, _DESCRIPTIONS[kind]), copy))
    return tuple(sorted(found, key=lambda pc: pc[0].index))


def planted_problems(n_frames: int) -> tuple[PlantedProblem, ...]:
    """Return the frames of a collection of ``n_frames`` that are wrong on purpose.

    Each kind sits at a fixed fraction of the run, moved to the nearest frame taken in its own
    hours of the day while the lamp is on: the glove at about 22 % of the run (09:00-12:00,
    when the tray is watered), fog at 41 % (06:00-09:00), the over-exposed frame at 61 %
    (12:00-17:00) and the pulled-out tray at 81 % (13:00-18:00). When a sparse collection has
    no frame in those hours within a day and a half, the nearest lit frame is used.

    Collections of 20 frames or more hold one frame of each kind; from 2,500 frames on there
    are several copies of each (two, three, then at most four from 7,500), spread over the run
    and at least ``n_frames // 100`` frames apart. Collections shorter than 20 frames hold no
    planted problem, so that the wrong frames stay a small minority.

    Parameters
    ----------
    n_frames : int
        Number of frames in the collection, ``1 <= n_frames <= 1,000,000``.

    Returns
    -------
    tuple of PlantedProblem
        Sorted by frame index; indices are distinct and never the first or last frame.

    Raises
    ------
    TypeError
        If ``n_frames`` is not an integer.
    ValueError
        If ``n_frames`` is out of range.

    Examples
    --------
    >>> [(p.index, p.kind) for p in planted_problems(240)]
    [(57, 'glove'), (102, 'fog'), (156, 'overexposed'), (185, 'tray_out')]
    """
    n_frames = check_n_frames(n_frames)
    return tuple(p for p, _ in planted_with_copies(n_frames))
