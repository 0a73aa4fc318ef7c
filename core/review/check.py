"""Check new images against a frozen analysis (Phase II monitoring): project them on the model,
score them with Q and Hotelling's T^2 against Phase II limits, and flag those beyond a limit.

The model is never changed: the new images do not pull the basis towards themselves (that is
what :func:`modescope.core.engine.pipeline.update_analysis` does). One pass over the files at
decoding speed, one projection per block, no SVD.

Statistics (at rank k of a model of n images and K modes; see :mod:`.outliers`, which computes
them through :func:`~modescope.core.review.outliers.score_new`)
-----------------------------------------------------------------------------------------------
* Q of a new image is the squared norm of the part of ``x - mean`` that the first k basis
  images do not explain. Its limit is the model's own Q limit at rank k
  (:func:`modescope.core.review.qlimit.q_limit`): Jackson and Mudholkar (1979) from the
  eigenvalues left out, with the modes beyond K estimated from the model's residuals when the
  model is truncated, or Box (1954) when no mode beyond k is held.
* T^2 of a new image is ``sum_{j<=k} w_j**2 / lambda_j`` with ``lambda_j = s_j**2 / (n - 1)``.
  Its Phase II limit is ``k (n+1) (n-1) / (n (n-k)) F_level(k, n-k)`` (Tracy, Young and Mason
  1992), wider than the Phase I limit used for the model's own images because a new image did
  not help estimate the mean and the covariance.
* ``score = max(Q / Q limit, T^2 / T^2 limit)`` and ``flag = score > 1``.

Cautions: the limits assume that the reference images were normal (in control) and that the
process has not changed since; at level 0.99 about 1 in 100 ordinary new images is flagged by
each statistic. A flag asks a person to look at the image; it is not a verdict on a part, a
sample or a person.

Reading the new images
----------------------
The images are read with the model's own decoding options: its colour (``color``), downscale
and source size (metadata entries ``color``, ``downscale``, ``source_size``). An image of
another size is skipped and named in the problems, unless ``resize_mismatched`` is True (by
default: what the model was made with), when it is resized to the model's source size with the
same rule as ``analyze`` (Pillow's LANCZOS filter before the downscale). A gray file checked
against a colour model is skipped and named: repeated in three channels it would differ from
every colour image. A colour file checked against a gray model becomes its luma, as ``analyze``
does for colour files in a gray analysis.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np

from modescope.core.decomposition import Decomposition
from modescope.core.engine.options import Clock, blas_limit
from modescope.core.engine.refine import project_block
from modescope.core.errors import AnalysisCancelled, NoUsableImagesError, SourceError
from modescope.core.output.atomic import atomic_write_bytes
from modescope.core.output.tables import csv_bytes, format_float
from modescope.core.review.outliers import OutlierTable, score_new
from modescope.core.review.qlimit import check_decomposition, check_level, q_limit
from modescope.core.sources.decode import analysis_shape, iter_blocks
from modescope.core.sources.scan import Problem, SourceSet, scan_sources
from modescope.core.validation import check_bool, check_callable, check_choice, check_int

__all__ = ["CheckResult", "CHECK_COLUMNS", "GRAY_MODES", "model_reading", "score_columns",
           "check_images", "check_rows", "write_check_csv"]

#: Columns of the CSV written by :func:`write_check_csv`.
CHECK_COLUMNS = ("number", "path", "page", "score", "q", "q_limit", "t2", "t2_limit", "flag")

#: Pillow modes that hold one gray channel (skipped when the model is colour).
GRAY_MODES = frozenset({"1", "L", "LA", "I;16", "I;16B", "I;16L", "I;16N", "I", "F"})


@dataclass(frozen=True, eq=False)
class CheckResult:
    """New images scored against a frozen model.

    Attributes
    ----------
    table : OutlierTable
        Q, T^2, their Phase II limits, score and flag of each checked image, in the order
        checked (``table.limits.t2_method == "f"``).
    weights : ndarray, shape (K, m), float64
        Coordinates of the m checked images along all K basis images of the model.
    residual : ndarray, shape (m,), float64
        Squared residual norm of each checked image outside all K basis images.
    paths : tuple of str
        Source file of each checked image (empty strings for in-memory columns).
    pages : ndarray, shape (m,), int
        Page within a multi-page file (0 otherwise).
    problems : tuple of Problem
        Files skipped (another size, a gray file against a colour model, decode failures).
    cancelled : bool
        True when the cancel check stopped the pass: only the images read before are scored.
    """

    table: OutlierTable
    weights: np.ndarray
    residual: np.ndarray
    paths: tuple = ()
    pages: np.ndarray | None = None
    problems: tuple = ()
    cancelled: bool = False

    def __post_init__(self):
        if self.pages is None:
            object.__setattr__(self, "pages", np.zeros(self.n_images, dtype=np.int64))
        if not self.paths:
            object.__setattr__(self, "paths", ("",) * self.n_images)

    @property
    def n_images(self) -> int:
        """Number of images scored."""
        return int(self.residual.shape[0])

    @property
    def n_flagged(self) -> int:
        """Number of images flagged."""
        return self.table.n_flagged

    @property
    def rank(self) -> int:
        """The rank k the images were scored at."""
        return self.table.rank

    @property
    def level(self) -> float:
        """The confidence level of the limits."""
        return self.table.level


def _check_rank(d: Decomposition, rank) -> int:
    return d.rank if rank is None else check_int("rank", rank, minimum=0, maximum=d.rank)


def _ready(decomposition, rank, level) -> tuple[Decomposition, int, float]:
    """Validate the model, rank and level before any work (the Q limit must be computable)."""
    d = check_decomposition(decomposition)
    k = _check_rank(d, rank)
    level = check_level(level)
    q_limit(d, k, level)          # raises now, not after the pass, when it cannot be computed
    return d, k, level


def _scored(d: Decomposition, k: int, level: float, weights: np.ndarray, residual: np.ndarray,
            **fields) -> CheckResult:
    table = score_new(d, weights, residual, rank=k, level=level)
    return CheckResult(table=table, weights=weights, residual=residual, **fields)


def score_columns(decomposition: Decomposition, data, rank: int | None = None,
                  level: float = 0.99) -> CheckResult:
    """Score new images held in memory as columns against a frozen model.

    Vectorised over the columns: one projection of the whole block, so that many images (a
    Monte Carlo of thousands) are scored at once.

    Parameters
    ----------
    decomposition : Decomposition
        The model, at least 2 images, with residuals unless its modes hold all the energy.
    data : array_like, shape (pixels, m)
        New images at the model's resolution, raveled as the model's columns (C order of
        ``(rows, cols, channels)``), values on the model's scale (0..1).
    rank : int, optional
        Retained modes k, 0..K (default K).
    level : float
        Confidence level of the limits in (0, 1), default 0.99.

    Returns
    -------
    CheckResult
        With empty paths.

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition or ``data`` is not numeric.
    ValueError
        If ``data`` is not 2-dimensional with one row per pixel of the model, holds NaN or
        infinity, or ``rank``/``level`` are out of range.

    Examples
    --------
    >>> import numpy as np
    >>> from modescope.core.decomposition import Decomposition
    >>> d = Decomposition(mean=np.zeros(3, np.float32), basis=np.eye(3, 1, dtype=np.float32),
    ...                   singular_values=np.array([3.0]), weights=np.zeros((1, 9)),
    ...                   total_energy=9.0 + 0.8, image_shape=(3, 1, 1),
    ...                   residual=np.full(9, 0.1))
    >>> score_columns(d, np.array([[0.0], [0.0], [5.0]])).table.flag.tolist()
    [True]
    """
    d, k, level = _ready(decomposition, rank, level)
    if isinstance(data, (str, bytes)) or data is None:
        raise TypeError(f"data must be an array of numbers, got {type(data).__name__}")
    try:
        arr = np.asarray(data, dtype=np.float32)
    except (TypeError, ValueError) as exc:
        raise TypeError(f"data must be an array of numbers, got {type(data).__name__}") from exc
    if arr.ndim != 2 or arr.shape[0] != d.n_pixels:
        raise ValueError(f"data must have shape ({d.n_pixels}, m): one row per pixel value of "
                         f"the model's {tuple(d.image_shape)} images, got {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError("data must hold finite numbers, found NaN or infinity")
    weights, residual, _ = project_block(d.basis, d.mean, arr)
    return _scored(d, k, level, weights, residual)


# ----- reading files with the model's options ------------------------------------------------

def model_reading(decomposition: Decomposition) -> dict:
    """Return how the model's images were read: colour, downscale, source size, resize rule.

    Parameters
    ----------
    decomposition : Decomposition

    Returns
    -------
    dict
        ``{"color": "gray" | "rgb", "downscale": int, "source_size": (rows, cols),
        "resize_mismatched": bool}``; when the metadata does not record the source size, it is
        the analysed size times the downscale.
    """
    if not isinstance(decomposition, Decomposition):
        raise TypeError("decomposition must be a Decomposition, got "
                        f"{type(decomposition).__name__}")
    meta = decomposition.metadata or {}
    rows, cols, channels = (int(v) for v in decomposition.image_shape)
    color = "gray" if channels == 1 else "rgb"
    downscale = int(meta.get("downscale", 1) or 1)
    size = meta.get("source_size") or (rows * downscale, cols * downscale)
    return {"color": color, "downscale": downscale,
            "source_size": (int(size[0]), int(size[1])),
            "resize_mismatched": bool(meta.get("resize_mismatched", False))}


def _fitting(found: SourceSet, reading: dict, resize: bool) -> tuple[tuple, list[Problem]]:
    """The images of ``found`` the model can score, and the others as named problems."""
    reference = reading["source_size"]
    usable, problems = [], []
    for ref in found.images:
        page = ref.page or None
        if reading["color"] == "rgb" and ref.mode in GRAY_MODES:
            problems.append(Problem(ref.path, f"gray file (mode {ref.mode}) but the model is "
                                              "colour (rgb); skipped", page))
        elif tuple(ref.size) != reference and not resize:
            problems.append(Problem(ref.path, f"size {ref.size[0]}x{ref.size[1]} differs from "
                                              f"the model's {reference[0]}x{reference[1]}; "
                                              "skipped (resize mismatched images to include "
                                              "it)", page))
        else:
            usable.append(ref)
    return tuple(usable), problems


def _scan(sources, reading: dict, recursive: bool, cancel) -> SourceSet | None:
    try:
        # every size is kept here: the model's size, not the majority's, decides below
        return scan_sources(sources, recursive=recursive, color=reading["color"],
                            resize_mismatched=True, cancel=cancel)
    except AnalysisCancelled:
        return None


def check_images(decomposition: Decomposition, sources, rank: int | None = None,
                 level: float = 0.99, *, recursive: bool = False,
                 resize_mismatched: bool | None = None, block_size: int = 64,
                 workers: int = 2, progress: Callable | None = None,
                 cancel: Callable[[], bool] | None = None) -> CheckResult:
    """Read new images from folders and files and score them against a frozen model.

    One pass: the images are decoded in blocks with the model's colour, downscale and source
    size (see the module docstring), each block is projected on the model's basis, and the
    weights and residuals are scored with :func:`~modescope.core.review.outliers.score_new`
    (Phase II limits). The model and the source files are not modified.

    Parameters
    ----------
    decomposition : Decomposition
        The frozen model (for instance from
        :func:`modescope.core.output.model_file.load_model`), with at least 2 images.
    sources : str, os.PathLike or sequence of them
        Folders and files holding the new images (the same kinds as ``analyze``).
    rank : int, optional
        Retained modes k, 0..K (default K).
    level : float
        Confidence level of the limits in (0, 1), default 0.99.
    recursive : bool
        Look into sub-folders.
    resize_mismatched : bool, optional
        Resize images of another size to the model's source size (as ``analyze`` does) instead
        of skipping them. Default: as the model was made.
    block_size : int
        Images decoded and projected at once, at least 1 (default 64).
    workers : int
        Decoding threads, at least 1 (default 2).
    progress : callable(Progress), optional
        Called after the scan and after each block with stage ``"check"``.
    cancel : callable() -> bool, optional
        Checked during the scan and between blocks; when it returns True the pass stops and
        the images read so far are scored (``cancelled=True``).

    Returns
    -------
    CheckResult

    Raises
    ------
    TypeError
        If an argument has the wrong type.
    ValueError
        If ``rank``, ``level``, ``block_size`` or ``workers`` is out of range, or the model's
        Q limit cannot be computed (a streaming snapshot).
    NoUsableImagesError
        If ``sources`` holds no image the model can score (the message names the first
        problems).
    SourceError
        If the model does not record how its images were read consistently with its shape.
    """
    d, k, level = _ready(decomposition, rank, level)
    recursive = check_bool("recursive", recursive)
    reading = model_reading(d)
    resize = (reading["resize_mismatched"] if resize_mismatched is None
              else check_bool("resize_mismatched", resize_mismatched))
    block_size = check_int("block_size", block_size, minimum=1)
    workers = check_int("workers", workers, minimum=1)
    check_callable("progress", progress)
    check_callable("cancel", cancel)
    empty = (np.zeros((d.rank, 0)), np.zeros(0))
    found = _scan(sources, reading, recursive, cancel)
    if found is None:
        return _scored(d, k, level, *empty, cancelled=True)
    usable, problems = _fitting(found, reading, resize)
    problems = list(found.problems) + problems
    if not usable:
        listed = "; ".join(str(p) for p in problems[:5])
        raise NoUsableImagesError(f"no image the model can check among the sources: {listed}")
    source_set = dataclasses.replace(found, images=usable, reference_size=reading["source_size"],
                                     resize_mismatched=resize, problems=tuple(problems))
    shape = analysis_shape(source_set, reading["downscale"])
    if tuple(shape) != tuple(d.image_shape):
        raise SourceError(f"the model's images were {tuple(d.image_shape)} but its recorded "
                          f"source size {reading['source_size']} and downscale "
                          f"{reading['downscale']} give {shape}: the model file is inconsistent")
    with blas_limit(1):   # the decoding threads have the other core (see AnalysisOptions)
        return _pass(d, k, level, source_set, problems, block_size, workers, progress, cancel)


def _pass(d, k, level, source_set, problems, block_size, workers, progress, cancel):
    """Decode, project and score; stop between blocks when cancelled."""
    clock = Clock("check", source_set.n_images, progress)
    clock.report(0)
    weights, residual, kept = [], [], []
    cancelled = False
    done = 0
    for block in iter_blocks(source_set, block_size=block_size,
                             downscale=model_reading(d)["downscale"], workers=workers):
        problems.extend(block.problems)
        if block.indices.size:
            w, res, _ = project_block(d.basis, d.mean, block.data)
            weights.append(w)
            residual.append(res)
            kept.append(block.indices)
        done += block.indices.size + len(block.problems)
        clock.report(done)
        if cancel is not None and cancel() and done < source_set.n_images:
            cancelled = True
            break
    if not kept and not cancelled:
        listed = "; ".join(str(p) for p in problems[:5])
        raise NoUsableImagesError(f"none of the new images could be read: {listed}")
    idx = np.concatenate(kept) if kept else np.zeros(0, dtype=np.int64)
    w = np.concatenate(weights, axis=1) if weights else np.zeros((d.rank, 0))
    res = np.concatenate(residual) if residual else np.zeros(0)
    refs = [source_set.images[i] for i in idx]
    return _scored(d, k, level, w, res, paths=tuple(r.path for r in refs),
                   pages=np.array([r.page for r in refs], dtype=np.int64),
                   problems=tuple(problems), cancelled=cancelled)


# ----- rows and CSV --------------------------------------------------------------------------

def check_rows(result: CheckResult, which: str = "all") -> list[dict]:
    """Return the checked images as rows, in the order checked.

    Parameters
    ----------
    result : CheckResult
    which : {"all", "flagged"}
        Every image, or only the flagged ones.

    Returns
    -------
    list of dict
        Keys ``index`` (0-based), ``number`` (1-based, as people read it), ``path``, ``page``,
        ``score``, ``q``, ``q_limit``, ``t2``, ``t2_limit``, ``flag`` (bool), ``q_flag``,
        ``t2_flag``.
    """
    if not isinstance(result, CheckResult):
        raise TypeError(f"result must be a CheckResult, got {type(result).__name__}")
    check_choice("which", which, ("all", "flagged"))
    t = result.table
    rows = []
    for i in range(result.n_images):
        if which == "flagged" and not t.flag[i]:
            continue
        rows.append({"index": i, "number": i + 1, "path": str(result.paths[i]),
                     "page": int(result.pages[i]), "score": float(t.score[i]),
                     "q": float(t.q[i]), "q_limit": float(t.limits.q_limit),
                     "t2": float(t.t2[i]), "t2_limit": float(t.limits.t2_limit),
                     "flag": bool(t.flag[i]), "q_flag": bool(t.q_flag[i]),
                     "t2_flag": bool(t.t2_flag[i])})
    return rows


def _cell(value: float) -> str:
    value = float(value)
    return "nan" if math.isnan(value) else format_float(value)


def write_check_csv(path, result: CheckResult, which: str = "all", *, overwrite: bool = False,
                    protect=()) -> Path:
    """Write the checked images' scores as CSV, atomically.

    Columns ``number, path, page, score, q, q_limit, t2, t2_limit, flag`` (number 1-based in
    the order checked; flag 1 when beyond a limit, 0 otherwise; numbers in their shortest exact
    form). UTF-8, ``\\r\\n`` line ends, bytes of file names that are not UTF-8 as ``\\xNN``.

    Parameters
    ----------
    path : str or os.PathLike
        File to write; its folder must exist.
    result : CheckResult
    which : {"all", "flagged"}
        Rows to write (default every image).
    overwrite : bool
        Replace an existing file (default False).
    protect : iterable of str or os.PathLike
        Files never replaced whatever ``overwrite`` says; the checked images are always
        protected.

    Returns
    -------
    pathlib.Path
        The file written.

    Raises
    ------
    TypeError, ValueError
        On wrong arguments.
    DestinationError
        If the file is refused or cannot be written (no partial file is left).
    """
    rows = check_rows(result, which)
    body = [(r["number"], r["path"], r["page"], _cell(r["score"]), _cell(r["q"]),
             _cell(r["q_limit"]), _cell(r["t2"]), _cell(r["t2_limit"]), int(r["flag"]))
            for r in rows]
    protected = [p for p in result.paths if p] + [str(p) for p in protect]
    return atomic_write_bytes(path, csv_bytes(CHECK_COLUMNS, body),
                              overwrite=check_bool("overwrite", overwrite), protect=protected)
