"""Options, progress reports and results of an analysis, and the small shared pieces of the
engine's passes (clock, block size, decoding threads, BLAS limit, model metadata)."""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as _dt
import time
from dataclasses import dataclass
from importlib import metadata as _metadata
from typing import Callable

import numpy as np

from modescope.core.decomposition import Decomposition
from modescope.core.sources.frames import (FrameRange, check_frame_rate, parse_frames,
                                           sampled_rate)
from modescope.core.sources.scan import SourceSet
from modescope.core.validation import check_choice, check_int

__all__ = ["AnalysisOptions", "Progress", "AnalysisResult", "Clock", "block_size_for",
           "decode_workers", "blas_limit", "metadata_for", "version", "stored_options"]


def version() -> str:
    """Return the installed Modescope version ("unknown" when not installed)."""
    try:
        return _metadata.version("modescope")
    except _metadata.PackageNotFoundError:  # pragma: no cover - only when run from a raw tree
        return "unknown"


@dataclass(frozen=True)
class AnalysisOptions:
    """Options of one analysis.

    Attributes
    ----------
    rank : int
        Number of basis images reported, k >= 1.
    color : {"gray", "rgb"}
    downscale : int
        Integer area-average factor applied to every image before analysis (1 = none).
    recursive : bool
        Look into sub-folders.
    resize_mismatched : bool
        Resize images of another size to the reference size instead of skipping them.
    block_size : int
        Images per streaming update (default 128; 64-128 is the measured sweet spot, 128
        measured faster here for both 128x128 gray and 256x256 RGB). For large images it is
        lowered so that one decoded block stays within 256 MB (see :func:`block_size_for`).
    oversample : int
        Extra directions kept internally beyond ``rank`` (default 20, chosen from measurement
        on 2026-12-03: on 3,000 smooth random 64x64 fields with no spectral gap, k = 50, four
        passes certified 27, 43, 47 and 50 of the 50 modes with 10, 20, 30 and 40 extra
        directions, in 0.89, 1.00, 1.05 and 1.03 s; on 5,000 low-rank-plus-noise 128x128
        images every value gave the same time within the noise, and every one certified the 30
        signal modes in one pass; each extra direction costs about 4 bytes per image).
    refine : bool
        Run the refinement passes with their Rayleigh-Ritz step and certificate (False: one
        plain projection pass, no rotation, no certificate).
    tolerance : float
        Relative accuracy asked of every reported singular value: refinement passes run until
        each certified bound is at most ``tolerance`` times its singular value (default 1e-4).
    max_passes : int
        Most passes over the data after the learning pass (the first is the scoring pass).
    workers : int
        Decoding threads; 0 (default) chooses 2. The next blocks decode while the SVD update
        runs; a block is shared out between the threads only while decoding is the slower part
        (one thread while the update is: see ``sources.decode._Pace``).
    blas_threads : int
        Threads for the matrix products (pinned with threadpoolctl so that decoding and BLAS do not
        fight over the cores).
    pass_blas_threads : int
        Threads for the matrix products of the passes after learning, when nothing decodes
        (images come back from the block cache): the blocks are shared out between this many
        threads, each with one BLAS thread (faster than several BLAS threads on one block for
        these thin products; see ``passes._one_pass``); 0 (default) keeps one thread. The
        command line sets it to the number of cores; the desktop program keeps 0, because
        changing OpenBLAS's thread count while the GUI thread may be inside a BLAS call is
        risky (from memory of OpenBLAS reports, not verified here).
    frames : FrameRange or None
        Frames taken from each video or array file (numbered from 0, ``stop`` excluded, as a
        Python slice; see :mod:`modescope.core.sources.frames`); None takes every frame. A
        dict ``{"start", "stop", "step"}`` (as stored in a model file) or text
        ``"START:STOP[:STEP]"`` is accepted too.
    frame_rate : float or None
        Frames per second of the sources in Hz, overriding the rate a video file states (and
        the only rate of a folder of frames or an array stack). None: the videos' own rate,
        when they state one. The model stores the rate of its columns,
        ``frame_rate / frames.step``, as ``metadata["frame_rate"]``.
    """

    rank: int = 20
    color: str = "gray"
    downscale: int = 1
    recursive: bool = False
    resize_mismatched: bool = False
    block_size: int = 128
    oversample: int = 20
    refine: bool = True
    workers: int = 0
    blas_threads: int = 1
    pass_blas_threads: int = 0
    tolerance: float = 1e-4
    max_passes: int = 4
    frames: FrameRange | None = None
    frame_rate: float | None = None

    def __post_init__(self):
        if isinstance(self.frames, str):
            object.__setattr__(self, "frames", parse_frames(self.frames))
        elif isinstance(self.frames, dict):
            object.__setattr__(self, "frames", FrameRange(**self.frames))
        elif self.frames is not None and not isinstance(self.frames, FrameRange):
            raise TypeError(f"frames must be a FrameRange, text START:STOP[:STEP] or None, got "
                            f"{type(self.frames).__name__} {self.frames!r}")
        object.__setattr__(self, "frame_rate", check_frame_rate("frame_rate", self.frame_rate))
        check_int("rank", self.rank, minimum=1, maximum=10_000)
        check_choice("color", self.color, ("gray", "rgb"))
        check_int("downscale", self.downscale, minimum=1, maximum=1024)
        check_int("block_size", self.block_size, minimum=1, maximum=100_000)
        check_int("oversample", self.oversample, minimum=0, maximum=10_000)
        check_int("workers", self.workers, minimum=0, maximum=256)
        check_int("blas_threads", self.blas_threads, minimum=1, maximum=256)
        check_int("pass_blas_threads", self.pass_blas_threads, minimum=0, maximum=256)
        check_int("max_passes", self.max_passes, minimum=1, maximum=1000)
        if isinstance(self.tolerance, bool) or not isinstance(self.tolerance, (int, float)):
            raise TypeError(f"tolerance must be a number, got {self.tolerance!r}")
        if not 0.0 < float(self.tolerance) < 1.0:
            raise ValueError(f"tolerance must be between 0 and 1 (relative), got "
                             f"{self.tolerance!r}")
        for name in ("recursive", "resize_mismatched", "refine"):
            if not isinstance(getattr(self, name), bool):
                raise TypeError(f"{name} must be True or False, got {getattr(self, name)!r}")

    def to_dict(self) -> dict:
        """Return the options as a JSON-serialisable dict."""
        return dataclasses.asdict(self)

    @classmethod
    def from_dict(cls, values: dict) -> "AnalysisOptions":
        """Build options from a dict (unknown keys are ignored)."""
        names = {f.name for f in dataclasses.fields(cls)}
        return cls(**{k: v for k, v in dict(values).items() if k in names})


@dataclass(frozen=True)
class Progress:
    """Progress of one stage of an analysis.

    Attributes
    ----------
    stage : {"scan", "learn", "score"}
    done, total : int
        Images done in this stage, and the number the stage will handle.
    elapsed : float
        Seconds since the stage began.
    rate : float
        Images per second in this stage so far.
    seconds_left : float or None
        Estimate for the stage (None until a rate is known).
    detail : str
        What the stage is doing, when it says more than its name (for instance which
        refinement pass runs and whether it re-reads the files).
    """

    stage: str
    done: int
    total: int
    elapsed: float
    rate: float
    seconds_left: float | None
    detail: str = ""


@dataclass(frozen=True)
class AnalysisResult:
    """Outcome of :func:`analyze`.

    Attributes
    ----------
    decomposition : Decomposition or None
        Exact (``exact=True``) when the run completed; a streaming snapshot when it was cancelled
        during learning or scoring; None only when cancelled before the first block.
    source_set : SourceSet
    problems : tuple of Problem
        Scan problems followed by decode problems.
    cancelled : bool
    """

    decomposition: Decomposition | None
    source_set: SourceSet
    problems: tuple
    cancelled: bool


class Clock:
    """Report the progress of one stage to a ``progress`` callable (None: report nothing)."""

    def __init__(self, stage: str, total: int, progress: Callable | None, detail: str = ""):
        self.stage, self.total, self.progress, self.detail = stage, total, progress, detail
        self.start = time.perf_counter()

    def report(self, done: int) -> None:
        """Report ``done`` of ``total`` images of this stage."""
        if self.progress is None:
            return
        elapsed = time.perf_counter() - self.start
        rate = done / elapsed if elapsed > 0 else 0.0
        left = (self.total - done) / rate if rate > 0 else None
        self.progress(Progress(self.stage, done, self.total, elapsed, rate, left, self.detail))


# Largest float32 block the passes decode at once. Several block-sized arrays are alive during
# an update (the block, the next one being decoded, the remainder, products), so this bounds the
# peak memory at a few times the figure for any image size. Our own choice, no published source.
_BLOCK_BYTES = 256 * 2 ** 20


def stored_options(decomposition: Decomposition) -> AnalysisOptions:
    """Return the options a model was made with, to continue or extend it.

    The rank is the rank asked for when the model was made, not the model's own: a partial
    result (a run stopped early) may hold fewer modes because few images had been read, and
    completing it with that smaller rank would keep the loss. Without stored options (a model
    from elsewhere) the defaults are used, with a rank of at least the model's.

    Parameters
    ----------
    decomposition : Decomposition

    Returns
    -------
    AnalysisOptions

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition, or its metadata ``options`` is not a dict.
    ValueError
        If the stored options hold values AnalysisOptions refuses.
    """
    if not isinstance(decomposition, Decomposition):
        raise TypeError(f"decomposition must be a Decomposition, got "
                        f"{type(decomposition).__name__}")
    stored = (decomposition.metadata or {}).get("options")
    if stored is None:
        return AnalysisOptions(rank=max(decomposition.rank, AnalysisOptions().rank))
    if not isinstance(stored, dict):
        raise TypeError(f"the model's metadata 'options' must be a dict of analysis options, "
                        f"got {type(stored).__name__}")
    return AnalysisOptions.from_dict(stored)


def block_size_for(options: AnalysisOptions, n_pixels: int, minimum: int = 1) -> int:
    """Return the images per block used for images of ``n_pixels`` values.

    ``max(minimum, options.block_size)``, lowered so that a float32 block stays within 256 MB
    (never below 8 images, the update slows down sharply with thinner blocks).
    """
    cap = max(8, _BLOCK_BYTES // (4 * max(int(n_pixels), 1)))
    return max(1, min(max(options.block_size, minimum), cap))


def decode_workers(source_set: SourceSet, options: AnalysisOptions) -> int:
    """Return the number of decoding threads an analysis uses (see ``AnalysisOptions.workers``)."""
    if options.workers:
        return options.workers
    return 2


def blas_limit(threads: int):
    """Return a context that limits the BLAS threads (one limit for the whole run)."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl is a dependency
        return contextlib.nullcontext()
    return threadpool_limits(limits=threads, user_api="blas")


def metadata_for(options: AnalysisOptions, source_set: SourceSet, problems, stage: str,
                 internal: int) -> dict:
    """Return the JSON metadata of a model made with ``options`` from ``source_set``."""
    import scipy
    meta = {
        "format": "modescope-model",
        "format_version": 1,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "versions": {"modescope": version(), "numpy": np.__version__, "scipy": scipy.__version__},
        "options": options.to_dict(),
        "source_size": list(source_set.reference_size),
        "color": source_set.color,
        "downscale": options.downscale,
        "resize_mismatched": source_set.resize_mismatched,
        "internal_directions": internal,
        "stage": stage,
        "problems": [{"path": p.path, "page": p.page, "reason": p.reason} for p in problems],
    }
    # the time axis: columns per second (the rate given, else the videos' own, over the step)
    rate = sampled_rate(options.frame_rate or source_set.frame_rate, source_set.frame_step)
    if rate is not None:
        meta["frame_rate"] = rate
    return meta
