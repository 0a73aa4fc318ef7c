"""The analysis pipeline: sources -> decoded blocks -> streaming SVD -> exact scoring pass.

This is the one routine behind both the command line and the desktop program's worker thread:
:func:`analyze` takes folders/files (or an already scanned :class:`SourceSet`), reports progress,
checks a cancel flag between blocks, hands out streaming snapshots, and returns an
:class:`AnalysisResult` whose decomposition is usable even when the run was cancelled.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import os
import time
from dataclasses import dataclass
from importlib import metadata as _metadata
from typing import Callable

import numpy as np

from modescope.core.validation import check_choice, check_int
from modescope.core.engine.blockcache import BlockCache
from modescope.core.decomposition import Decomposition
from modescope.core.errors import AnalysisCancelled, ModescopeError, SourceError
from modescope.core.engine.streaming import StreamingSVD
from modescope.core.sources.decode import analysis_shape, iter_blocks, load_image
from modescope.core.engine.projection import ProjectionAccumulator, project_block, rayleigh_ritz
from modescope.core.sources.scan import Problem, SourceSet, scan_sources

__all__ = ["AnalysisOptions", "Progress", "AnalysisResult", "scan", "analyze", "update_analysis",
           "load_analysis_image", "project_images", "block_size_for", "version"]


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
        Extra directions kept internally to hold accuracy of the reported ones.
    refine : bool
        Run the Rayleigh-Ritz step of the scoring pass (exact singular values for the subspace).
    workers : int
        Decoding threads; 0 (default) chooses 2. Decoding alone of small gray PNGs is faster in
        one thread (Pillow's per-file Python work holds the GIL), but with the next block
        decoding while the SVD update runs, two threads measured faster end to end here
        (5,000 gray 128x128 PNG: 3.1 s vs 3.5 s).
    blas_threads : int
        Threads for the matrix products (pinned with threadpoolctl so that decoding and BLAS do not
        fight over the cores).
    """

    rank: int = 20
    color: str = "gray"
    downscale: int = 1
    recursive: bool = False
    resize_mismatched: bool = False
    block_size: int = 128
    oversample: int = 10
    refine: bool = True
    workers: int = 0
    blas_threads: int = 1

    def __post_init__(self):
        check_int("rank", self.rank, minimum=1, maximum=10_000)
        check_choice("color", self.color, ("gray", "rgb"))
        check_int("downscale", self.downscale, minimum=1, maximum=1024)
        check_int("block_size", self.block_size, minimum=1, maximum=100_000)
        check_int("oversample", self.oversample, minimum=0, maximum=10_000)
        check_int("workers", self.workers, minimum=0, maximum=256)
        check_int("blas_threads", self.blas_threads, minimum=1, maximum=256)
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
    """

    stage: str
    done: int
    total: int
    elapsed: float
    rate: float
    seconds_left: float | None


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


class _Clock:
    def __init__(self, stage: str, total: int, progress: Callable | None):
        self.stage, self.total, self.progress = stage, total, progress
        self.start = time.perf_counter()

    def report(self, done: int) -> None:
        if self.progress is None:
            return
        elapsed = time.perf_counter() - self.start
        rate = done / elapsed if elapsed > 0 else 0.0
        left = (self.total - done) / rate if rate > 0 else None
        self.progress(Progress(self.stage, done, self.total, elapsed, rate, left))


# Largest float32 block the passes decode at once. Several block-sized arrays are alive during
# an update (the block, the next one being decoded, the remainder, products), so this bounds the
# peak memory at a few times the figure for any image size. Our own choice, no published source.
_BLOCK_BYTES = 256 * 2 ** 20


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


def scan(sources, options: AnalysisOptions = AnalysisOptions(), *, progress=None,
         cancel=None) -> SourceSet:
    """Scan folders and files with the options' colour, recursion and size policy.

    Raises
    ------
    NoUsableImagesError
        If no usable image is found (the message lists the first problems).
    """
    clocks: dict = {}

    def scan_progress(done, total):
        clock = clocks.setdefault("scan", _Clock("scan", total, progress))
        clock.total = total
        clock.report(done)
    return scan_sources(sources, recursive=options.recursive, color=options.color,
                        resize_mismatched=options.resize_mismatched,
                        progress=scan_progress if progress else None, cancel=cancel)


def _blas_limit(threads: int):
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl is a dependency
        import contextlib
        return contextlib.nullcontext()
    return threadpool_limits(limits=threads, user_api="blas")


def _metadata_for(options: AnalysisOptions, source_set: SourceSet, problems, stage: str,
                  internal: int) -> dict:
    import scipy
    return {
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


def analyze(sources, options: AnalysisOptions | None = None, *,
            progress: Callable[[Progress], None] | None = None,
            cancel: Callable[[], bool] | None = None,
            on_partial: Callable[[Decomposition], None] | None = None,
            partial_interval: float = 0.0,
            only=None) -> AnalysisResult:
    """Analyse a collection: stream it through the SVD engine, then score every image exactly.

    Parameters
    ----------
    sources : sequence of str or path, or SourceSet
        Folders and files, or the result of :func:`scan`.
    options : AnalysisOptions, optional
    progress : callable, optional
        Called with a :class:`Progress` after every block of every stage.
    cancel : callable, optional
        Returns True to stop; checked between blocks. A cancelled run returns what it had.
    on_partial : callable, optional
        Called with a streaming :class:`Decomposition` snapshot after learning blocks (at most
        every ``partial_interval`` seconds, and always after the first block).
    partial_interval : float, optional
        Minimum seconds between two snapshots handed to ``on_partial``.
    only : iterable of (path, page), optional
        Analyse only these images of the scanned sources (for instance the pages of a
        multi-page file that were not excluded). Paths are compared as absolute, case-normalised
        paths; pages count from 0.

    Returns
    -------
    AnalysisResult

    Raises
    ------
    NoUsableImagesError
        If the sources hold no usable image, or every image failed to decode.
    SourceError
        If a file changed or became unreadable between the two passes.

    Examples
    --------
    >>> result = analyze(["sample_images"], AnalysisOptions(rank=10))   # doctest: +SKIP
    >>> result.decomposition.singular_values[:3]                          # doctest: +SKIP
    """
    options = AnalysisOptions() if options is None else options
    if not isinstance(options, AnalysisOptions):
        raise TypeError(f"options must be AnalysisOptions, got {type(options).__name__}")
    cancel = cancel or (lambda: False)
    if isinstance(sources, SourceSet):
        source_set = sources
    else:
        try:
            source_set = scan(sources, options, progress=progress, cancel=cancel)
        except AnalysisCancelled:
            empty = SourceSet(images=(), reference_size=(0, 0), color=options.color,
                              resize_mismatched=options.resize_mismatched, problems=())
            return AnalysisResult(None, empty, (), True)
    if only is not None:
        source_set = _select(source_set, only)
    try:
        shape = analysis_shape(source_set, options.downscale)
    except ValueError as exc:                   # a downscale too large for these images
        raise SourceError(str(exc)) from None
    pixels = int(np.prod(shape))
    workers = decode_workers(source_set, options)
    engine = StreamingSVD(pixels, options.rank, options.oversample)
    problems: list[Problem] = list(source_set.problems)
    kept: list[int] = []
    cancelled = False
    # decoded blocks are kept in a temporary file for the scoring pass (see blockcache)
    with _blas_limit(options.blas_threads), BlockCache(pixels) as cache:
        # ---- learning pass ------------------------------------------------------------------
        clock = _Clock("learn", source_set.n_images, progress)
        last_partial = -np.inf
        attempted = 0
        for block in iter_blocks(source_set, block_size=block_size_for(options, pixels),
                                 downscale=options.downscale, workers=workers,
                                 cancel=cancel, keep_raw=True):
            problems.extend(block.problems)
            attempted = block.start + len(block.indices) + len(block.problems)
            if block.data.shape[1]:
                engine.update(block.data)
                kept.extend(int(i) for i in block.indices)
                cache.put(block)
            clock.report(attempted)
            if on_partial is not None and engine.n_seen and (
                    time.perf_counter() - last_partial >= partial_interval):
                last_partial = time.perf_counter()
                on_partial(_snapshot(engine, source_set, kept, shape, options, problems,
                                     "streaming"))
            if cancel():
                break
        if cancel() or attempted < source_set.n_images:
            cancelled = True
        if engine.n_seen == 0:
            if cancelled:
                return AnalysisResult(None, source_set, tuple(problems), True)
            from modescope.core.errors import NoUsableImagesError
            first = "; ".join(str(p) for p in problems[:5])
            raise NoUsableImagesError(
                f"none of the {source_set.n_images} images could be decoded: {first}")
        if cancelled:
            return AnalysisResult(
                _snapshot(engine, source_set, kept, shape, options, problems, "cancelled"),
                source_set, tuple(problems), True)
        # ---- exact scoring pass -------------------------------------------------------------
        used = dataclasses.replace(source_set, images=tuple(source_set.images[i] for i in kept),
                                   problems=())
        acc = _score_pass(engine, used, options, workers, progress, cancel, cache)
        if acc.done < len(kept):
            return AnalysisResult(
                _snapshot(engine, source_set, kept, shape, options, problems, "cancelled"),
                source_set, tuple(problems), True)
        ritz = rayleigh_ritz(engine.basis, acc.weights, acc.residual, options.rank,
                             refine=options.refine)
        total_energy = float(np.sum(acc.energy))
        meta = _metadata_for(options, source_set, problems, "exact", engine.internal)
        decomposition = Decomposition(
            mean=engine.mean.astype(np.float32), basis=ritz.basis,
            singular_values=ritz.singular_values, weights=ritz.weights,
            total_energy=total_energy, image_shape=shape,
            paths=tuple(source_set.images[i].path for i in kept),
            pages=np.array([source_set.images[i].page for i in kept], dtype=np.int32),
            residual=ritz.residual, exact=True, metadata=meta)
    return AnalysisResult(decomposition, source_set, tuple(problems), False)


def _select(source_set: SourceSet, only) -> SourceSet:
    """Keep the images of ``source_set`` listed in ``only`` ((path, page) pairs)."""
    def key(path, page):
        return os.path.normcase(os.path.abspath(os.fspath(path))), int(page)
    try:
        wanted = {key(path, page) for path, page in only}
    except (TypeError, ValueError):
        raise TypeError("only must be an iterable of (path, page) pairs") from None
    images = tuple(r for r in source_set.images if key(r.path, r.page) in wanted)
    if not images:
        from modescope.core.errors import NoUsableImagesError
        raise NoUsableImagesError(f"none of the {len(wanted)} images asked for was found "
                                  f"among the {source_set.n_images} images of the sources")
    return dataclasses.replace(source_set, images=images)


def _score_pass(engine, used: SourceSet, options, workers, progress, cancel,
                cache: BlockCache | None = None, cache_start: int = 0):
    """Project every image of ``used`` onto the engine's basis (the exact scoring pass).

    Images ``cache_start`` to ``cache_start + cache.images`` of ``used`` are read back from
    ``cache`` (the decoded blocks of the learning pass, in the same order); the others are
    decoded from their files. Stops early when ``cancel()`` answers True (then
    ``acc.done < used.n_images``).
    """
    acc = ProjectionAccumulator(engine.basis, engine.mean, used.n_images)
    clock = _Clock("score", used.n_images, progress)
    pixels = int(np.prod(analysis_shape(used, options.downscale)))
    block_size = block_size_for(options, pixels, minimum=128)
    cached = cache.images if cache is not None else 0

    def from_files(stop: int) -> bool:
        part = dataclasses.replace(used, images=used.images[acc.done:stop])
        for block in iter_blocks(part, block_size=block_size, downscale=options.downscale,
                                 workers=workers, cancel=cancel):
            if block.problems:
                bad = block.problems[0]
                raise SourceError(f"{bad.path}: changed or became unreadable during the "
                                  f"analysis ({bad.reason})")
            acc.add(block.data)
            clock.report(acc.done)
            if cancel():
                return False
        return acc.done == stop

    if cached and not from_files(cache_start):
        return acc
    if cached:
        # (BLAS threads are not raised here although nothing decodes: changing OpenBLAS's
        # thread count in mid-run, from a worker thread while the GUI thread may be inside BLAS,
        # is risky (from memory of OpenBLAS reports, not verified here), and the gain measured
        # here was about 0.05 s)
        for block in cache.blocks():
            acc.add(block.data)
            clock.report(acc.done)
            if cancel():
                return acc
    from_files(used.n_images)
    return acc


def _snapshot(engine, source_set, kept, shape, options, problems, stage) -> Decomposition:
    meta = _metadata_for(options, source_set, problems, stage, engine.internal)
    return engine.snapshot(
        shape, paths=tuple(source_set.images[i].path for i in kept),
        pages=np.array([source_set.images[i].page for i in kept], dtype=np.int32),
        metadata=meta)


def load_analysis_image(decomposition: Decomposition, index: int) -> np.ndarray:
    """Read image ``index`` of an analysis again from its source file, at analysis resolution.

    Parameters
    ----------
    decomposition : Decomposition
        Needs ``paths`` and the ``source_size``/``color``/``downscale`` entries of its metadata.
    index : int

    Returns
    -------
    ndarray, shape (rows, cols, channels), float32 in [0, 1]

    Raises
    ------
    SourceError
        If the file is missing, unreadable, or no longer matches the analysis (size, pages).
    """
    index = check_int("index", index, minimum=0, maximum=decomposition.n_images - 1)
    if not decomposition.paths:
        raise SourceError("this analysis does not record its source files")
    path = decomposition.paths[index]
    page = int(decomposition.pages[index])
    meta = decomposition.metadata
    color = meta.get("color", "gray" if decomposition.image_shape[2] == 1 else "rgb")
    downscale = int(meta.get("downscale", 1))
    resize = bool(meta.get("resize_mismatched", False))
    import os
    if not os.path.exists(path):
        raise SourceError(f"{path}: the source file is missing (moved or deleted since the "
                          f"analysis)")
    try:
        found = scan_sources([path], color=color, resize_mismatched=True)
    except ModescopeError as exc:
        raise SourceError(f"{path}: cannot be read again: {exc}") from None
    refs = [r for r in found.images if r.page == page]
    if not refs:
        raise SourceError(f"{path}: page {page} is no longer in the file")
    ref = refs[0]
    reference = tuple(meta.get("source_size", ref.size))
    if tuple(ref.size) != reference and not resize:
        raise SourceError(f"{path}: size is now {ref.size[0]}x{ref.size[1]}, the analysis used "
                          f"{reference[0]}x{reference[1]}")
    ss = dataclasses.replace(found, images=(ref,), reference_size=reference,
                             resize_mismatched=resize)
    img = load_image(ref, ss, downscale)
    if img.shape != tuple(decomposition.image_shape):
        raise SourceError(f"{path}: decodes to shape {img.shape}, the analysis used "
                          f"{tuple(decomposition.image_shape)}")
    return img


def project_images(decomposition: Decomposition, data: np.ndarray):
    """Project new image columns onto an existing analysis.

    Parameters
    ----------
    decomposition : Decomposition
    data : ndarray, shape (pixels, m)
        New images at analysis resolution, raveled as columns.

    Returns
    -------
    weights : ndarray, shape (k, m)
    residual : ndarray, shape (m,)
        Squared norm of each centred image outside the span of the k basis images.
    """
    data = np.asarray(data)
    if data.ndim != 2 or data.shape[0] != decomposition.n_pixels:
        raise ValueError(f"data must have shape ({decomposition.n_pixels}, m), got {data.shape}")
    w, res, _ = project_block(decomposition.basis, decomposition.mean, data)
    return w, res


def update_analysis(decomposition: Decomposition, sources, options: AnalysisOptions | None = None,
                    *, progress: Callable[[Progress], None] | None = None,
                    cancel: Callable[[], bool] | None = None,
                    on_partial: Callable[[Decomposition], None] | None = None) -> AnalysisResult:
    """Add more images to an existing analysis.

    The new images stream into an engine started from ``decomposition`` (its mean, count,
    energy, basis and weights), then the exact scoring pass runs over the old and the new images
    together, re-reading the old ones from their files. When an old file is missing, the result
    is the streaming update (``exact=False``) and the missing files are listed as problems;
    nothing is lost, the old model file is untouched.

    Parameters
    ----------
    decomposition : Decomposition
        The analysis to extend (for instance from :func:`modescope.core.output.model_file.load_model`).
    sources : sequence of str or path
        Folders and files holding the new images. Files already in the analysis are skipped.
    options : AnalysisOptions, optional
        Default: the options stored in the analysis. ``color`` and ``downscale`` must match it.

    Returns
    -------
    AnalysisResult
        Its ``source_set`` holds the new images only.

    Raises
    ------
    SourceError
        If the new images' size, colour or downscale do not match the analysis.
    NoUsableImagesError
        If ``sources`` holds no usable new image.
    """
    if not isinstance(decomposition, Decomposition):
        raise TypeError(f"decomposition must be a Decomposition, got "
                        f"{type(decomposition).__name__}")
    d = decomposition
    meta = d.metadata
    if options is None:
        options = AnalysisOptions.from_dict(meta.get("options", {}))
        options = dataclasses.replace(options, rank=max(d.rank, 1))
    color = "gray" if d.image_shape[2] == 1 else "rgb"
    if options.color != color:
        raise SourceError(f"the analysis is {color}; new images cannot be added as "
                          f"{options.color}")
    if options.downscale != int(meta.get("downscale", options.downscale)):
        raise SourceError(f"the analysis used downscale {meta.get('downscale')}; got "
                          f"{options.downscale}")
    cancel = cancel or (lambda: False)
    found = scan(sources, options, progress=progress, cancel=cancel)
    known = {(os.path.realpath(p), int(g)) for p, g in zip(d.paths, d.pages)}
    new_refs = tuple(r for r in found.images if (os.path.realpath(r.path), r.page) not in known)
    reference = tuple(meta.get("source_size", found.reference_size))
    problems = list(found.problems)
    usable = []
    for r in new_refs:
        if tuple(r.size) != reference and not options.resize_mismatched:
            problems.append(Problem(r.path, f"size {r.size[0]}x{r.size[1]} differs from the "
                                            f"analysis ({reference[0]}x{reference[1]}); skipped",
                                    None))
        else:
            usable.append(r)
    if not usable:
        from modescope.core.errors import NoUsableImagesError
        raise NoUsableImagesError("no new image to add: every image found is already in the "
                                  "analysis or does not fit it")
    new_set = dataclasses.replace(found, images=tuple(usable), reference_size=reference,
                                  problems=tuple(problems))
    shape = analysis_shape(new_set, options.downscale)
    if tuple(shape) != tuple(d.image_shape):
        raise SourceError(f"new images give shape {shape}, the analysis has "
                          f"{tuple(d.image_shape)}")
    engine = StreamingSVD.from_decomposition(d, options.oversample)
    engine.rank = options.rank
    engine.internal = options.rank + options.oversample
    workers = decode_workers(new_set, options)
    old_paths = list(d.paths)
    old_pages = [int(g) for g in d.pages]
    kept: list[int] = []

    def snapshot(stage, exact_fields=None):
        paths = tuple(old_paths + [new_set.images[i].path for i in kept])
        pages = np.array(old_pages + [new_set.images[i].page for i in kept], dtype=np.int32)
        m = _metadata_for(options, new_set, problems, stage, engine.internal)
        m["problems"] = list(meta.get("problems", [])) + m["problems"]
        marks = np.concatenate([d.marks, np.zeros(len(kept), dtype=np.int8)])
        return engine.snapshot(shape, paths=paths, pages=pages, marks=marks, metadata=m)

    with _blas_limit(options.blas_threads), BlockCache(engine.n_pixels) as cache:
        clock = _Clock("learn", new_set.n_images, progress)
        attempted = 0
        for block in iter_blocks(new_set, block_size=block_size_for(options, engine.n_pixels),
                                 downscale=options.downscale, workers=workers, cancel=cancel,
                                 keep_raw=True):
            problems.extend(block.problems)
            attempted = block.start + len(block.indices) + len(block.problems)
            if block.data.shape[1]:
                engine.update(block.data)
                kept.extend(int(i) for i in block.indices)
                cache.put(block)
            clock.report(attempted)
            if on_partial is not None:
                on_partial(snapshot("streaming"))
            if cancel():
                break
        if cancel() or attempted < new_set.n_images:
            return AnalysisResult(snapshot("cancelled"), new_set, tuple(problems), True)
        # exact pass over old and new images
        missing = [p for p in dict.fromkeys(old_paths) if not os.path.exists(p)]
        if missing:
            problems.extend(Problem(p, "source file missing: the exact scoring pass was skipped "
                                       "and the result is the streaming update", None)
                            for p in missing)
            return AnalysisResult(snapshot("streaming"), new_set, tuple(problems), False)
        old_set = scan_sources(list(dict.fromkeys(old_paths)), color=color,
                               resize_mismatched=True)
        by_key = {(r.path, r.page): r for r in old_set.images}
        try:
            old_refs = [by_key[(os.path.abspath(p), g)] for p, g in zip(old_paths, old_pages)]
        except KeyError as exc:
            raise SourceError(f"{exc.args[0][0]}: page {exc.args[0][1]} is no longer in the "
                              f"file") from None
        all_refs = tuple(old_refs) + tuple(new_set.images[i] for i in kept)
        all_set = dataclasses.replace(new_set, images=all_refs, problems=(),
                                      resize_mismatched=bool(meta.get("resize_mismatched",
                                                                      options.resize_mismatched)))
        # the old images are read from their files, the new ones back from the cache
        acc = _score_pass(engine, all_set, options, workers, progress, cancel, cache,
                          cache_start=len(old_refs))
        if acc.done < len(all_refs):
            return AnalysisResult(snapshot("cancelled"), new_set, tuple(problems), True)
        ritz = rayleigh_ritz(engine.basis, acc.weights, acc.residual, options.rank,
                             refine=options.refine)
        m = _metadata_for(options, new_set, problems, "exact", engine.internal)
        m["problems"] = list(meta.get("problems", [])) + m["problems"]
        m["updated_from"] = {"images": d.n_images, "created": meta.get("created")}
        result = Decomposition(
            mean=engine.mean.astype(np.float32), basis=ritz.basis,
            singular_values=ritz.singular_values, weights=ritz.weights,
            total_energy=float(np.sum(acc.energy)), image_shape=shape,
            paths=tuple(r.path for r in all_refs),
            pages=np.array([r.page for r in all_refs], dtype=np.int32),
            residual=ritz.residual, exact=True,
            marks=np.concatenate([d.marks, np.zeros(len(kept), dtype=np.int8)]), metadata=m)
    return AnalysisResult(result, new_set, tuple(problems), False)
