"""The analysis pipeline: sources -> decoded blocks -> streaming SVD -> refinement passes.

This is the one routine behind both the command line and the desktop program's worker thread:
:func:`analyze` takes folders/files (or an already scanned :class:`SourceSet`), reports progress,
checks a cancel flag between blocks, hands out streaming snapshots, and returns an
:class:`AnalysisResult` whose decomposition is usable even when the run was cancelled.
:func:`update_analysis` adds images to a saved analysis through the same learning pass
(:mod:`~modescope.core.engine.learning`) and the same refinement passes
(:mod:`~modescope.core.engine.passes`).
"""

from __future__ import annotations

import contextlib
import dataclasses
import os
from typing import Callable

import numpy as np

from modescope.core.decomposition import Decomposition
from modescope.core.engine.blockcache import BlockCache
from modescope.core.engine.headstart import Head, scan_and_learn
from modescope.core.engine.learning import Learned, learn
from modescope.core.engine.options import (AnalysisOptions, AnalysisResult, Clock, Progress,
                                           blas_limit, block_size_for, decode_workers,
                                           metadata_for, stored_options, version)
from modescope.core.engine.passes import Refined, pass_lanes, refine
from modescope.core.engine.refine import project_block
from modescope.core.engine.streaming import StreamingSVD
from modescope.core.errors import (AnalysisCancelled, ModescopeError, NoUsableImagesError,
                                   SourceError)
from modescope.core.sources.decode import analysis_shape, load_image
from modescope.core.sources.frames import FrameRange
from modescope.core.sources.scan import Problem, SourceSet, scan_sources
from modescope.core.sources.sequences import is_sequence
from modescope.core.validation import check_int

__all__ = ["AnalysisOptions", "Progress", "AnalysisResult", "scan", "analyze", "update_analysis",
           "load_analysis_image", "project_images", "block_size_for", "version"]


def scan(sources, options: AnalysisOptions = AnalysisOptions(), *, progress=None,
         cancel=None, files=None, found=None) -> SourceSet:
    """Scan folders and files with the options' colour, recursion and size policy.

    ``files(done, total)`` is told the headers read and the files found after each header;
    ``found`` is passed on to :func:`~modescope.core.sources.scan.scan_sources`.

    Raises
    ------
    NoUsableImagesError
        If no usable image is found (the message lists the first problems).
    """
    clocks: dict = {}

    def scan_progress(done, total):
        if files is not None:
            files(done, total)
        if progress is not None:
            clock = clocks.setdefault("scan", Clock("scan", total, progress))
            clock.total = total
            clock.report(done)
    return scan_sources(sources, recursive=options.recursive, color=options.color,
                        resize_mismatched=options.resize_mismatched, frames=options.frames,
                        progress=scan_progress if progress or files else None,
                        cancel=cancel, found=found)


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
        If every file changed or became unreadable after the learning pass (one that did is
        left out of the result and listed in ``problems``; the others' work is kept).

    Examples
    --------
    >>> result = analyze(["sample_images"], AnalysisOptions(rank=10))   # doctest: +SKIP
    >>> result.decomposition.singular_values[:3]                          # doctest: +SKIP
    """
    options = AnalysisOptions() if options is None else options
    if not isinstance(options, AnalysisOptions):
        raise TypeError(f"options must be AnalysisOptions, got {type(options).__name__}")
    cancel = cancel or (lambda: False)
    with contextlib.ExitStack() as stack:
        head = None
        if on_partial is not None and only is None and not isinstance(sources, SourceSet):
            def make_run(engine, source_set, shape):
                return _Run(engine, source_set, options, shape, [])
            try:
                source_set, head = scan_and_learn(
                    sources, options, scan, make_run, progress=progress, cancel=cancel,
                    on_partial=on_partial, partial_interval=partial_interval, stack=stack)
            except AnalysisCancelled:
                source_set = None
            if source_set is None or (head is not None and head.learned.stopped):
                return _cancelled_early(head, options)
        else:
            source_set = _scanned(sources, options, progress, cancel)
            if source_set is None:
                return _cancelled_early(None, options)
        return _analyze_scanned(source_set, options, progress, cancel, on_partial,
                                partial_interval, only, head, stack)


def _cancelled_early(head: Head | None, options: AnalysisOptions) -> AnalysisResult:
    """The result of a run cancelled during the scan: what was learned meanwhile, if any."""
    if head is not None and head.engine.n_seen:
        run = _Run(head.engine, head.source_set, options, head.shape,
                   list(head.learned.problems))
        return run.result(run.snapshot(head.learned, "cancelled"), True)
    empty = SourceSet(images=(), reference_size=(0, 0), color=options.color,
                      resize_mismatched=options.resize_mismatched, problems=())
    return AnalysisResult(None, empty, (), True)


def _analyze_scanned(source_set: SourceSet, options, progress, cancel, on_partial,
                     partial_interval, only, head: Head | None,
                     stack: contextlib.ExitStack) -> AnalysisResult:
    """The rest of :func:`analyze`: the learning pass and the passes."""
    if only is not None:
        source_set = _select(source_set, only)
    try:
        shape = analysis_shape(source_set, options.downscale)
    except ValueError as exc:                   # a downscale too large for these images
        raise SourceError(str(exc)) from None
    if head is not None and head.fits(source_set, shape):
        engine, cache, after = head.engine, head.cache, head.learned
    else:                  # no head start, or the full scan disagrees with it: start afresh
        if head is not None:
            head.cache.close()
        engine = StreamingSVD(int(np.prod(shape)), options.rank, options.oversample)
        cache, after = None, None
    run = _Run(engine, source_set, options, shape, list(source_set.problems))
    # decoded blocks are kept in a temporary file for the later passes (see blockcache)
    if cache is None:
        cache = stack.enter_context(BlockCache(engine.n_pixels))
    with blas_limit(options.blas_threads):
        learned = learn(engine, source_set, options, workers=run.workers, cache=cache,
                        progress=progress, cancel=cancel, on_partial=on_partial,
                        snapshot=run.snapshot, partial_interval=partial_interval,
                        after=after)
        run.problems.extend(learned.problems)
        if engine.n_seen == 0:
            if learned.stopped:
                return AnalysisResult(None, source_set, tuple(run.problems), True)
            first = "; ".join(str(p) for p in run.problems[:5])
            raise NoUsableImagesError(
                f"none of the {source_set.n_images} images could be decoded: {first}")
        if learned.stopped:
            return run.result(run.snapshot(learned, "cancelled"), True)
        used = dataclasses.replace(source_set, problems=(),
                                   images=tuple(source_set.images[i] for i in learned.kept))
        with _pass_threads(options):
            refined = refine(engine.orthonormal_basis(), engine.mean, used, options,
                             workers=run.workers, cache=cache, progress=progress,
                             cancel=cancel, after_first_pass=engine.release_weights)
    if refined.stopped:
        return run.result(run.snapshot(learned, "cancelled"), True)
    run.problems.extend(refined.dropped)          # files that changed after the learning pass
    return run.result(run.final(refined, used.images, run.metadata("exact")),
                      refined.interrupted)


class _Run:
    """The state one analysis or update carries between its steps (snapshots, result)."""

    def __init__(self, engine: StreamingSVD, source_set: SourceSet, options: AnalysisOptions,
                 shape: tuple, problems: list, base: Decomposition | None = None):
        self.engine, self.source_set, self.options = engine, source_set, options
        self.shape, self.problems, self.base = shape, problems, base
        self.workers = decode_workers(source_set, options)
        # rows of the base analysis kept in the final result (an update may leave old ones out)
        self.old_rows = None if base is None else np.arange(base.n_images)

    def metadata(self, stage: str) -> dict:
        meta = metadata_for(self.options, self.source_set, self.problems, stage,
                            self.engine.internal)
        if self.base is not None:
            meta["problems"] = list(self.base.metadata.get("problems", [])) + meta["problems"]
            if "frame_rate" not in meta and "frame_rate" in self.base.metadata:
                meta["frame_rate"] = self.base.metadata["frame_rate"]   # the time axis stays
        return meta

    def _old(self):
        if self.base is None:
            return [], [], np.zeros(0, dtype=np.int8)
        return (list(self.base.paths), [int(g) for g in self.base.pages], self.base.marks)

    def snapshot(self, learned: Learned, stage: str) -> Decomposition:
        """Return the engine's streaming state with the images seen so far."""
        paths, pages, marks = self._old()
        refs = [self.source_set.images[i] for i in learned.kept]
        return self.engine.snapshot(
            self.shape, paths=tuple(paths + [r.path for r in refs]),
            pages=np.array(pages + [r.page for r in refs], dtype=np.int32),
            marks=np.concatenate([marks, np.zeros(len(refs), dtype=np.int8)]),
            metadata=self.metadata(stage))

    def final(self, refined: Refined, refs, meta: dict) -> Decomposition:
        """Return the refined decomposition of the images ``refs`` (old images first)."""
        n_old = 0 if self.base is None else len(self.old_rows)
        marks = (None if self.base is None else
                 np.concatenate([self.base.marks[self.old_rows],
                                 np.zeros(len(refs) - n_old, dtype=np.int8)]))
        if refined.kept is not None:              # images left out by the passes
            refs = [refs[i] for i in refined.kept]
            marks = None if marks is None else marks[refined.kept]
        meta["refinement"] = _refinement_summary(refined, self.options)
        return Decomposition(
            mean=self.engine.mean.astype(np.float32), basis=refined.basis,
            singular_values=refined.singular_values, weights=refined.weights,
            total_energy=float(np.sum(refined.energy)), image_shape=self.shape,
            paths=tuple(r.path for r in refs),
            pages=np.array([r.page for r in refs], dtype=np.int32),
            residual=refined.residual, exact=True, marks=marks, metadata=meta,
            singular_value_error=refined.error)

    def result(self, decomposition: Decomposition, cancelled: bool) -> AnalysisResult:
        return AnalysisResult(decomposition, self.source_set, tuple(self.problems), cancelled)


def _refinement_summary(refined: Refined, options: AnalysisOptions) -> dict:
    """Return the JSON summary of the refinement passes stored in the model's metadata."""
    summary = {"passes": refined.passes, "tolerance": options.tolerance,
               "max_passes": options.max_passes, "certified": refined.error is not None,
               "interrupted": refined.interrupted}
    if refined.error is not None:
        ok = refined.error <= options.tolerance * refined.singular_values
        summary["converged_modes"] = int(np.sum(ok))
        summary["unconverged"] = [int(i) + 1 for i in np.flatnonzero(~ok)]
    return summary


def _pass_threads(options: AnalysisOptions):
    """One BLAS thread per lane for the passes after learning when they run in several lanes
    (see ``AnalysisOptions.pass_blas_threads`` and :func:`~.passes.pass_lanes`)."""
    import contextlib
    if pass_lanes(options) == 1 or options.blas_threads == 1:
        return contextlib.nullcontext()
    return blas_limit(1)


def _scanned(sources, options, progress, cancel) -> SourceSet | None:
    """Return ``sources`` scanned (or as given when already a SourceSet); None if cancelled."""
    if isinstance(sources, SourceSet):
        return sources
    try:
        return scan(sources, options, progress=progress, cancel=cancel)
    except AnalysisCancelled:
        return None


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
        raise NoUsableImagesError(f"none of the {len(wanted)} images asked for was found "
                                  f"among the {source_set.n_images} images of the sources")
    return dataclasses.replace(source_set, images=images)


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
    if not os.path.exists(path):
        raise SourceError(f"{path}: the source file is missing (moved or deleted since the "
                          f"analysis)")
    try:
        # one frame of a video or stack is looked for, not a reference per frame of the file
        frames = FrameRange(page, page + 1) if is_sequence(path) else None
        found = scan_sources([path], color=color, resize_mismatched=True, frames=frames)
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
                    on_partial: Callable[[Decomposition], None] | None = None,
                    partial_interval: float = 0.0) -> AnalysisResult:
    """Add more images to an existing analysis.

    The new images stream into an engine started from ``decomposition`` (its mean, count,
    energy, basis and weights) through the same learning pass as :func:`analyze`, then the
    same refinement passes run over the old and the new images together (the old ones re-read
    from their files), so the result is as accurate as one run over all of them. When an old file is missing, the result
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
    options = _update_options(d, options)
    cancel = cancel or (lambda: False)
    new_set = _new_images(d, scan(sources, options, progress=progress, cancel=cancel), options)
    shape = analysis_shape(new_set, options.downscale)
    if tuple(shape) != tuple(d.image_shape):
        raise SourceError(f"new images give shape {shape}, the analysis has "
                          f"{tuple(d.image_shape)}")
    engine = StreamingSVD.from_decomposition(d, options.rank, options.oversample)
    run = _Run(engine, new_set, options, shape, list(new_set.problems), base=d)
    with blas_limit(options.blas_threads), BlockCache(engine.n_pixels) as cache:
        learned = learn(engine, new_set, options, workers=run.workers, cache=cache,
                        progress=progress, cancel=cancel, on_partial=on_partial,
                        snapshot=run.snapshot, partial_interval=partial_interval)
        run.problems.extend(learned.problems)
        if learned.stopped:
            return run.result(run.snapshot(learned, "cancelled"), True)
        # old images that cannot be read again (missing, damaged) are left out with a note;
        # the others are read from their files, the new ones back from the cache
        all_set, unread, old_rows = _old_and_new(d, new_set, learned, options)
        run.problems.extend(unread)
        run.old_rows = old_rows
        with _pass_threads(options):
            refined = refine(engine.padded_basis(), engine.mean, all_set, options,
                             workers=run.workers, cache=cache, cache_start=len(old_rows),
                             progress=progress, cancel=cancel,
                             after_first_pass=engine.release_weights)
    if refined.stopped:
        return run.result(run.snapshot(learned, "cancelled"), True)
    run.problems.extend(refined.dropped)
    meta = run.metadata("exact")
    meta["updated_from"] = {"images": d.n_images, "created": d.metadata.get("created")}
    return run.result(run.final(refined, all_set.images, meta), refined.interrupted)


def _update_options(d: Decomposition, options: AnalysisOptions | None) -> AnalysisOptions:
    """Return the options of an update (default: the analysis' own), checked against it."""
    meta = d.metadata
    if options is None:
        options = stored_options(d)     # the rank asked for, not a partial result's
    elif not isinstance(options, AnalysisOptions):
        raise TypeError(f"options must be AnalysisOptions, got {type(options).__name__}")
    color = "gray" if d.image_shape[2] == 1 else "rgb"
    if options.color != color:
        raise SourceError(f"the analysis is {color}; new images cannot be added as "
                          f"{options.color}")
    if options.downscale != int(meta.get("downscale", options.downscale)):
        raise SourceError(f"the analysis used downscale {meta.get('downscale')}; got "
                          f"{options.downscale}")
    return options


def _new_images(d: Decomposition, found: SourceSet, options: AnalysisOptions) -> SourceSet:
    """Return the images of ``found`` not yet in ``d`` that fit it (the others as problems)."""
    known = {(os.path.realpath(p), int(g)) for p, g in zip(d.paths, d.pages)}
    new_refs = tuple(r for r in found.images if (os.path.realpath(r.path), r.page) not in known)
    reference = tuple(d.metadata.get("source_size", found.reference_size))
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
        raise NoUsableImagesError("no new image to add: every image found is already in the "
                                  "analysis or does not fit it")
    return dataclasses.replace(found, images=tuple(usable), reference_size=reference,
                               problems=tuple(problems))


def _old_and_new(d: Decomposition, new_set: SourceSet, learned: Learned,
                 options: AnalysisOptions) -> tuple[SourceSet, list[Problem], np.ndarray]:
    """Return one SourceSet of the analysis' old images followed by the new ones learned.

    Old images that cannot be read again (missing, damaged, a page gone) are left out: the
    second value names them, the third gives the rows of ``d`` that are kept, in order.
    """
    color = "gray" if d.image_shape[2] == 1 else "rgb"
    old_paths, old_pages = list(d.paths), [int(g) for g in d.pages]
    files = list(dict.fromkeys(old_paths))
    try:
        old_set = scan_sources(files, color=color, resize_mismatched=True)
        found, reasons = old_set.images, old_set.problems
    except NoUsableImagesError:
        found, reasons = (), [p for f in files for p in _scan_problems(f)]
    by_key = {(r.path, r.page): r for r in found}
    why = {p.path: p.reason for p in reasons}
    old_refs, unread, rows = [], [], []
    for row, (p, g) in enumerate(zip(old_paths, old_pages)):
        ref = by_key.get((os.path.abspath(p), g))
        if ref is None:
            reason = why.get(os.path.abspath(p), f"page {g} is no longer in the file")
            unread.append(Problem(p, f"old image cannot be read again ({reason}): left out of "
                                     "the updated analysis (the mean still counts it as first "
                                     "analysed)", g or None))
            continue
        old_refs.append(ref)
        rows.append(row)
    refs = tuple(old_refs) + tuple(new_set.images[i] for i in learned.kept)
    resize = bool(d.metadata.get("resize_mismatched", options.resize_mismatched))
    return (dataclasses.replace(new_set, images=refs, problems=(), resize_mismatched=resize),
            unread, np.asarray(rows, dtype=np.int64))


def _scan_problems(path: str) -> list[Problem]:
    """The scan's problems for one file (used only when no old file could be read)."""
    from modescope.core.sources.scan import _probe

    problems: list[Problem] = []
    _probe(os.path.abspath(path), problems)
    return problems
