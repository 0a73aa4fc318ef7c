"""The passes after the learning pass: read every image again (from the block cache where it
holds them, from the files otherwise), project it on the current basis, and refine until every
reported singular value is certified within the tolerance or the pass limit is reached."""

from __future__ import annotations

import dataclasses
import functools
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Callable, Iterator

import numpy as np

from modescope.core.engine.blockcache import BlockCache, rows_into
from modescope.core.engine.options import AnalysisOptions, Clock, block_size_for
from modescope.core.engine.refine import (PassAccumulator, RitzStep, Workspace, columns_into,
                                          rayleigh_ritz_step, rounding_error)
from modescope.core.errors import SourceError
from modescope.core.sources.decode import analysis_shape, iter_blocks
from modescope.core.sources.scan import Problem, SourceSet

__all__ = ["Refined", "refine", "close_pass", "pass_rounding", "pass_lanes"]


@dataclass(frozen=True)
class Refined:
    """Outcome of :func:`refine`.

    Attributes
    ----------
    basis, singular_values, weights, residual, error : ndarray
        The first ``rank`` Ritz triplets of the last complete pass (see
        :meth:`~modescope.core.engine.refine.RitzStep.truncate`); ``error`` is None without
        refinement (``options.refine`` False).
    energy : ndarray, shape (n,)
        Squared norm of every centred image.
    passes : int
        Complete passes over the data.
    stopped : bool
        True when cancelled before the first pass completed (then the arrays are None).
    interrupted : bool
        True when cancelled after at least one complete pass (the arrays are that pass's).
    kept : ndarray of int or None
        Indices (into the ``used`` given to :func:`refine`) of the images the arrays cover,
        ascending; None when they cover every image.
    dropped : tuple of Problem
        The images left out because their file changed or became unreadable after the
        learning pass, each with its reason.
    """

    basis: np.ndarray | None
    singular_values: np.ndarray | None
    weights: np.ndarray | None
    residual: np.ndarray | None
    error: np.ndarray | None
    energy: np.ndarray | None
    passes: int
    stopped: bool
    interrupted: bool = False
    kept: np.ndarray | None = None
    dropped: tuple = ()


class _Changed(Exception):
    """Internal: images of a pass failed to decode again; ``indices`` into the pass's set."""

    def __init__(self, indices: list[int], problems: tuple):
        super().__init__(indices)
        self.indices, self.problems = indices, problems


def _blocks(used: SourceSet, options: AnalysisOptions, workers: int, cancel,
            cache: BlockCache | None, cache_start: int) -> Iterator[tuple]:
    """Yield every image of ``used`` in order, as ``(m, put)`` per block: ``put(out)`` writes
    the block's m images as float32 rows into ``out`` (a cached block is made float32 there,
    so that the lanes of :func:`_one_pass` do that work in parallel, into arrays they reuse).

    Images ``cache_start`` to ``cache_start + cache.images`` come back from ``cache``; the
    others are decoded from their files (a file that fails now, after a good learning pass,
    changed during the analysis: ``_Changed`` names the images of that block that failed).
    """
    pixels = int(np.prod(analysis_shape(used, options.downscale)))
    # the learning pass's block width: files and cache then give the very same float32
    # products, so the result does not depend on what the cache could hold
    block_size = block_size_for(options, pixels)
    cached = cache.images if cache is not None else 0

    def from_files(start: int, stop: int):
        if stop <= start:
            return
        part = dataclasses.replace(used, images=used.images[start:stop])
        for block in iter_blocks(part, block_size=block_size, downscale=options.downscale,
                                 workers=workers, cancel=cancel):
            if block.problems:
                attempted = range(block.start, min(block.start + block_size, stop - start))
                failed = sorted(set(attempted) - set(block.indices.tolist()))
                raise _Changed([start + i for i in failed], block.problems)
            yield block.data.shape[1], functools.partial(columns_into, block.data)

    yield from from_files(0, cache_start)
    if cached:
        for _entry, rows in cache.stored():
            yield rows.shape[0], functools.partial(rows_into, rows)
    yield from from_files(cache_start + cached, used.n_images)


def pass_lanes(options: AnalysisOptions) -> int:
    """Threads that share the blocks of a pass after learning, each with one BLAS thread
    (``AnalysisOptions.pass_blas_threads``; 1 when it is 0)."""
    return max(1, options.pass_blas_threads)


def _one_pass(basis, mean, used, options, workers, cancel, cache, cache_start, clock,
              want_y: bool) -> PassAccumulator | None:
    """One pass over ``used``; blocks go in turn to ``pass_lanes(options)`` threads.

    Block ``i`` goes to lane ``i mod lanes``, each lane adds its blocks in order into its own
    ``M U`` sum and the sums are added in lane order at the end: the result does not depend
    on timing. Two lanes of one BLAS thread each took 0.27 s where one lane of two BLAS threads
    took 0.32 s (5,000 cached 128x128 images, q = 70, measured here): OpenBLAS splits these
    thin products poorly.
    """
    acc = PassAccumulator(basis, mean, used.n_images, want_y=want_y)
    lanes = pass_lanes(options)
    works = [Workspace() for _ in range(lanes)]
    sums = [acc.yt] + [np.zeros_like(acc.yt) for _ in range(lanes - 1)] if want_y else None
    running: list = [None] * lanes
    with ThreadPoolExecutor(lanes, thread_name_prefix="modescope-pass") as pool:
        # leaving the block (return, or an error such as _Changed) waits for running blocks
        for i, (m, put) in enumerate(_blocks(used, options, workers, cancel, cache,
                                             cache_start)):
            lane = i % lanes
            job = (put, acc.reserve(m), None if sums is None else sums[lane], works[lane])
            if lanes == 1:
                acc.fill(*job)                    # one lane: in this thread
            else:
                if running[lane] is not None:
                    running[lane].result()
                running[lane] = pool.submit(acc.fill, *job)
            clock.report(acc.done)
            if cancel():
                return None
    for job in running:
        if job is not None:
            job.result()                  # an error in the last blocks
    if sums is not None:
        for other in sums[1:]:
            acc.yt += other
    return acc if acc.done == used.n_images else None


def _without(used: SourceSet, cache_start: int, kept: np.ndarray,
             failed: list[int]) -> tuple[SourceSet, int, np.ndarray]:
    """Leave the images ``failed`` (indices into ``used``) out of the passes."""
    bad = set(failed)
    keep = [i for i in range(used.n_images) if i not in bad]
    used = dataclasses.replace(used, images=tuple(used.images[i] for i in keep))
    return used, cache_start - sum(1 for i in bad if i < cache_start), kept[keep]


def _dropped(problems) -> list[Problem]:
    return [Problem(p.path, f"changed or became unreadable during the analysis ({p.reason}); "
                            "left out of the result (the mean image still counts it as first "
                            "read)", p.page) for p in problems]


def _source_note(cache: BlockCache | None, n_images: int) -> str:
    cached = cache.images if cache is not None else 0
    if cached >= n_images:
        return "from the block cache"
    if cached == 0:
        return "re-reading the files"
    return f"{cached:,} images from the block cache, the others re-read from their files"


def refine(basis: np.ndarray, mean: np.ndarray, used: SourceSet, options: AnalysisOptions, *,
           workers: int, cache: BlockCache | None = None, cache_start: int = 0,
           progress: Callable | None = None,
           cancel: Callable[[], bool] = lambda: False,
           after_first_pass: Callable[[], None] | None = None) -> Refined:
    """Score every image exactly and refine the basis until it is certified.

    Pass 1 is the scoring pass: exact weights and residuals of every image in ``span(basis)``
    with a Rayleigh-Ritz step and a certificate (:func:`~modescope.core.engine.refine.certify`).
    While a reported mode's bound exceeds ``options.tolerance`` times its singular value, the
    basis takes one subspace-iteration step and another pass follows, up to
    ``options.max_passes``, or until no open mode can reach its target in the passes left at
    the rate its bound shrank in the last pass. A pass stopped by ``cancel`` is dropped: the
    result is the last complete pass. An image whose file fails to decode in a pass (it
    changed after the learning pass) is named in ``Refined.dropped`` and left out: that pass
    starts again without it (the mean is not changed), the other images' work is kept.

    Parameters
    ----------
    basis : ndarray, shape (pixels, q)
        Orthonormal start basis (the streaming pass's internal directions).
    mean : ndarray, shape (pixels,)
        Exact mean of the images.
    used : SourceSet
        The images, in column order.
    options : AnalysisOptions
        ``rank``, ``refine``, ``tolerance``, ``max_passes``, ``downscale``, ``block_size``.
    workers : int
        Decoding threads for images not in the cache.
    cache : BlockCache, optional
        Decoded blocks of images ``cache_start ...`` of ``used``.
    cache_start : int, optional
    progress, cancel : callable, optional
        Progress (stage "score", with the pass in ``detail``) and the stop request.
    after_first_pass : callable, optional
        Called once the first pass is complete: from then on a stopped run returns the last
        complete pass, so the caller may free what it kept for an earlier stop (the streaming
        weights).

    Returns
    -------
    Refined

    Raises
    ------
    SourceError
        If every image read from its files failed in a pass.
    """
    rank = options.rank
    given = used
    kept = np.arange(used.n_images)
    last_kept = kept
    dropped: list[Problem] = []
    note = _source_note(cache, used.n_images)
    last: RitzStep | None = None
    energy = None
    passes = 0
    rounding = 0.0
    interrupted = False
    while passes < (options.max_passes if options.refine else 1):
        detail = (f"pass {passes + 1} of at most {options.max_passes}, {note}"
                  if options.refine else note)
        clock = Clock("score", used.n_images, progress, detail)
        try:
            acc = _one_pass(basis, mean, used, options, workers, cancel, cache, cache_start,
                            clock, want_y=options.refine)
        except _Changed as changed:
            dropped.extend(_dropped(changed.problems))
            used, cache_start, kept = _without(used, cache_start, kept, changed.indices)
            if used.n_images == 0:
                raise SourceError("every image changed or became unreadable during the "
                                  f"analysis: {dropped[0]}") from None
            continue                      # the same pass again without them
        if acc is None:
            interrupted = last is not None
            break
        passes += 1
        if passes == 1 and after_first_pass is not None:
            after_first_pass()
        energy = acc.energy
        if not options.refine:
            return dataclasses.replace(_plain(acc, rank, passes), kept=_kept(kept, given),
                                       dropped=tuple(dropped))
        if passes == 1:
            rounding = pass_rounding(acc, mean, used.n_images)
        previous = None if last is None else _excess(last, rank, options.tolerance)
        last = None                       # free the previous pass's arrays before the next
        last, stop = close_pass(acc, previous, rounding, options, passes)
        last_kept = kept
        del acc
        if stop:
            break
        basis = last.next_basis()
    if last is None:
        return Refined(None, None, None, None, None, None, passes, True)
    b, s, w, res, err = last.truncate(rank)
    if last_kept.size != kept.size:       # cancelled in a pass restarted without an image:
        present = {given.images[i].path for i in last_kept}     # the last pass still has it
        dropped = [p for p in dropped if p.path not in present]
    return Refined(b, s, w, res, err, energy, passes, False, interrupted,
                   _kept(last_kept, given), tuple(dropped))


def pass_rounding(acc: PassAccumulator, mean: np.ndarray, n_images: int) -> float:
    """Return the float32 rounding budget of the certificate, from the first complete pass
    (see :func:`~modescope.core.engine.refine.rounding_error`)."""
    return rounding_error(mean.size, n_images, np.sqrt(float(np.sum(acc.energy))),
                          float(np.linalg.norm(mean)))


def close_pass(acc: PassAccumulator, previous: np.ndarray | None, rounding: float,
               options: AnalysisOptions, passes: int) -> tuple[RitzStep, bool]:
    """Rayleigh-Ritz step and certificate on a complete pass, and whether the passes stop.

    Shared by :func:`refine` and the Dask engine, so that both follow one set of rules: stop
    when every reported mode is converged (:func:`_excess`) or when no open mode can close in
    the passes left (:func:`_out_of_reach`).

    Parameters
    ----------
    acc : PassAccumulator
        The pass, complete, with ``want_y``.
    previous : ndarray or None
        ``_excess`` of the previous pass's step (None after the first pass).
    rounding : float
        From :func:`pass_rounding`.
    options : AnalysisOptions
        ``rank``, ``tolerance``, ``max_passes``.
    passes : int
        Complete passes so far, this one included.

    Returns
    -------
    step : RitzStep
    stop : bool
    """
    step = rayleigh_ritz_step(acc, rounding)
    excess = _excess(step, options.rank, options.tolerance)
    stop = bool(np.all(excess <= 1.0)) or _out_of_reach(
        previous, excess, _predicted_rate(step, options.rank), options.max_passes - passes)
    return step, stop


def _kept(kept: np.ndarray, given: SourceSet) -> np.ndarray | None:
    """None when no image of ``given`` was left out."""
    return None if kept.size == given.n_images else kept


def _excess(step: RitzStep, rank: int, tolerance: float) -> np.ndarray:
    """How far each reported mode is from converged (at most 1: converged).

    A mode is converged when its singular value is certified within ``tolerance`` (relative)
    and its basis image within ``10 * tolerance`` radians (Davis-Kahan bound) unless it is
    part of a near-degenerate pair (then only the pair's plane is meaningful). The factor 10
    keeps the basis as settled as the numbers (singular values converge about twice as fast as
    vectors); it is our own choice, no published source.
    """
    k = min(rank, step.singular_values.size)
    sv = step.singular_values[:k]
    with np.errstate(divide="ignore", invalid="ignore"):
        by_value = np.where(sv > 0, step.error[:k] / (tolerance * sv), np.inf)
        angle = step.angle[:k]
        by_angle = np.where(np.isnan(angle), 0.0, angle / (10.0 * tolerance))
    return np.maximum(by_value, by_angle)


def _predicted_rate(step: RitzStep, rank: int) -> np.ndarray:
    """Per-pass shrink factor subspace iteration should give each reported mode.

    The error of mode i shrinks by about ``lambda_(q+1) / lambda_i`` per pass (Golub and Van
    Loan, "Matrix Computations", 4th ed., Thm 8.2.2); the last Ritz value stands in for the
    unknown ``lambda_(q+1)``.
    """
    k = min(rank, step.singular_values.size)
    theta = step.singular_values ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(theta[:k] > 0, theta[-1] / theta[:k], 1.0)


def _out_of_reach(previous: np.ndarray | None, last: np.ndarray, predicted: np.ndarray,
                  passes_left: int) -> bool:
    """True when no mode still open (excess above 1) can close in the passes left.

    A mode's excess shrinks by a rate per pass: the one measured between the last two passes
    when there are two, else the one predicted by :func:`_predicted_rate`. At that rate it
    reaches 1 in about ``log(1 / excess) / log(rate)`` more passes (subspace iteration
    converges linearly). A mode whose excess shrinks by less than a fifth is stalled (the
    float32 rounding budget, or a spectrum without a gap). The rule and the factor are our own
    choice, no published source: they stop passes that would cost time for nothing.
    """
    n = min(last.size, predicted.size) if previous is None else min(previous.size, last.size,
                                                                       predicted.size)
    last = last[:n]
    with np.errstate(divide="ignore", invalid="ignore"):
        if previous is None:
            rate = predicted[:n]
        else:
            previous = previous[:n]
            rate = np.where((previous > 0) & np.isfinite(previous), last / previous, 1.0)
        needed = np.where(rate < 0.8, np.log(1.0 / last) / np.log(rate), np.inf)
    return bool(np.all(needed[last > 1.0] > passes_left))


def _plain(acc: PassAccumulator, rank: int, passes: int) -> Refined:
    """Keep the basis as it is: singular values are the norms of the weight rows, sorted."""
    from modescope.core.decomposition import fix_signs

    weights = acc.weights.astype(np.float64)
    norms = np.sqrt(np.sum(weights ** 2, axis=1))
    order = np.argsort(norms)[::-1]
    k = min(rank, norms.size)
    basis = np.asarray(acc.basis, dtype=np.float32)[:, order]
    weights = weights[order]
    residual = acc.residual + np.sum(weights[k:] ** 2, axis=0)
    b, w = fix_signs(basis[:, :k], weights[:k])
    return Refined(np.asfortranarray(b), norms[order][:k].copy(), w, residual, None,
                   acc.energy, passes, False)
