"""The learning pass shared by :func:`~modescope.core.engine.pipeline.analyze` and
:func:`~modescope.core.engine.pipeline.update_analysis`: decode the images block by block,
stream each block into the engine, keep it in the block cache for the later passes, report
progress, hand out snapshots at most every ``partial_interval`` seconds, and stop between blocks
when asked."""

from __future__ import annotations

import dataclasses
import time
from dataclasses import dataclass, field
from typing import Callable

from modescope.core.decomposition import Decomposition
from modescope.core.engine.blockcache import BlockCache
from modescope.core.engine.options import AnalysisOptions, Clock, block_size_for
from modescope.core.engine.streaming import StreamingSVD
from modescope.core.sources.decode import iter_blocks
from modescope.core.sources.scan import SourceSet

__all__ = ["Learned", "learn"]


@dataclass
class Learned:
    """What the learning pass saw.

    Attributes
    ----------
    kept : list of int
        Indices (into the source set's images) of the images streamed into the engine, in order.
    problems : list of Problem
        Images that could not be decoded.
    stopped : bool
        True when the pass ended before every image was tried (cancelled).
    attempted : int
        Images tried, from the first one (decoded or refused).
    """

    kept: list = field(default_factory=list)
    problems: list = field(default_factory=list)
    stopped: bool = False
    attempted: int = 0


def learn(engine: StreamingSVD, source_set: SourceSet, options: AnalysisOptions, *,
          workers: int, cache: BlockCache | None,
          progress: Callable | None = None, cancel: Callable[[], bool] = lambda: False,
          on_partial: Callable[[Decomposition], None] | None = None,
          snapshot: Callable[[Learned, str], Decomposition] | None = None,
          partial_interval: float = 0.0, after: Learned | None = None) -> Learned:
    """Stream every image of ``source_set`` into ``engine`` (one block at a time).

    Parameters
    ----------
    engine : StreamingSVD
        Updated in place.
    source_set : SourceSet
        The images to learn from, in order.
    options : AnalysisOptions
        Gives the block size and the downscale factor.
    workers : int
        Decoding threads.
    cache : BlockCache or None
        Receives every decoded block (for the later passes).
    progress, cancel : callable, optional
        Progress reports (stage "learn") and the stop request, checked between blocks.
    on_partial : callable, optional
        Receives ``snapshot(learned, "streaming")`` after the first block and then at most every
        ``partial_interval`` seconds.
    snapshot : callable, optional
        Makes a Decomposition of the engine's state; required with ``on_partial``.
    partial_interval : float, optional
        Least seconds between two snapshots.
    after : Learned, optional
        A pass over the first images of ``source_set`` already streamed into ``engine`` (and
        ``cache``), not stopped: the pass goes on from the first image it did not try, and
        the result covers both.

    Returns
    -------
    Learned
    """
    learned = Learned()
    clock = Clock("learn", source_set.n_images, progress)
    last_partial = -float("inf")
    attempted = skip = 0
    rest = source_set
    if after is not None:
        learned.kept.extend(after.kept)
        learned.problems.extend(after.problems)
        attempted = skip = after.attempted
        rest = dataclasses.replace(source_set, images=source_set.images[skip:])
        last_partial = time.perf_counter()         # the caller has just shown that pass
        clock.report(attempted)
    blocks = () if not rest.images else iter_blocks(
        rest, block_size=block_size_for(options, engine.n_pixels), downscale=options.downscale,
        workers=workers, cancel=cancel, keep_raw=cache is not None)
    for block in blocks:
        learned.problems.extend(block.problems)
        attempted = skip + block.start + len(block.indices) + len(block.problems)
        if block.data.shape[1]:
            engine.update(block.data)
            learned.kept.extend(skip + int(i) for i in block.indices)
            if cache is not None:
                cache.put(block)
        clock.report(attempted)
        if on_partial is not None and engine.n_seen and (
                time.perf_counter() - last_partial >= partial_interval):
            last_partial = time.perf_counter()
            on_partial(snapshot(learned, "streaming"))
        if cancel():
            break
    learned.attempted = attempted
    learned.stopped = bool(cancel()) or attempted < source_set.n_images
    return learned

