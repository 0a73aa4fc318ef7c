"""Learning while the scan still reads headers.

Reading every header of a large collection takes a while (about 40 microseconds a PNG and 45 a
JPEG file with Pillow, one thread: 0.2 s for 5,000 files, 0.45 s for 10,000), and a person in
front of the desktop program waits for the first basis images meanwhile. Here the scan runs in
a thread of its own and hands out each image as soon as its header is read
(``scan_sources(found=...)``); the first block is learned (and handed out as the first partial
result) while the scan goes on, if its images are plain images of the first image's size. When
the scan ends, the learning pass goes on from there if the scan's images start with the ones
learned (the usual case); otherwise (the most common size is not the first images' size) the
head start is dropped and the analysis starts afresh from the full scan, so the result never
depends on it.

Only the first block: learning more while the scan runs made the whole run slower here, as
the scan is Python code that holds the interpreter lock and the decoding threads need it too
(5,000 PNGs: the scan took 1.0-1.2 s instead of 0.19 s, the analysis 2.3-2.4 s instead of
2.2 s). Used only with a partial-result callback (the desktop program) and for sources of at
least :data:`HEADSTART_FILES` files; below that the scan is quick, and the order of events
stays the simple one (scan, then learn).
"""

from __future__ import annotations

import contextlib
import dataclasses
import threading
from typing import Callable

import numpy as np

from modescope.core.engine.blockcache import BlockCache
from modescope.core.engine.learning import Learned, learn
from modescope.core.engine.options import AnalysisOptions, blas_limit
from modescope.core.engine.streaming import StreamingSVD
from modescope.core.errors import AnalysisCancelled
from modescope.core.sources.decode import analysis_shape
from modescope.core.sources.scan import SourceSet
from modescope.core.sources.sequences import is_sequence

__all__ = ["HEADSTART_FILES", "Head", "scan_and_learn"]

#: Files in the sources from which learning starts while the scan reads headers.
HEADSTART_FILES = 2000


@dataclasses.dataclass
class Head:
    """What was learned while the scan was still reading headers.

    Attributes
    ----------
    source_set : SourceSet
        The images learned (a provisional set: the first image's size, no problems).
    shape : tuple
        ``analysis_shape`` of those images.
    engine : StreamingSVD
    cache : BlockCache
    learned : Learned
        The learning pass over ``source_set.images``, to go on from (``learn(after=...)``).
    """

    source_set: SourceSet
    shape: tuple
    engine: StreamingSVD
    cache: BlockCache
    learned: Learned

    def fits(self, source_set: SourceSet, shape: tuple) -> bool:
        """True when the full scan starts with the images learned, at the same size."""
        k = self.source_set.n_images
        return (shape == self.shape and source_set.color == self.source_set.color
                and source_set.images[:k] == self.source_set.images)


class _Scanner(threading.Thread):
    """The scan in a thread: ``found`` grows as headers are read; ``result`` or ``error``."""

    def __init__(self, scan: Callable, sources, options: AnalysisOptions, progress, cancel):
        super().__init__(name="modescope-scan", daemon=True)
        self.found: list = []
        self.total: int | None = None
        self.result: SourceSet | None = None
        self.error: BaseException | None = None
        self.ended = False
        self.changed = threading.Condition()
        self._scan, self._args = scan, (sources, options, progress, cancel)

    def run(self) -> None:
        sources, options, progress, cancel = self._args

        def files(done: int, total: int) -> None:
            with self.changed:
                self.total = total
                self.changed.notify_all()
        try:
            self.result = self._scan(sources, options, progress=progress, cancel=cancel,
                                     files=files, found=self.found)
        except BaseException as exc:  # noqa: BLE001 - handed to the caller's thread as is
            self.error = exc
        finally:
            with self.changed:
                self.ended = True
                self.changed.notify_all()

    def wait_for(self, predicate: Callable[[], bool]) -> None:
        with self.changed:
            self.changed.wait_for(lambda: self.ended or predicate(), timeout=None)


def _next_images(found: list, start: int, block: int, size: tuple) -> int:
    """Return the end of the whole blocks after ``start`` that can be learned now (0: none).

    Images count while they are plain image files of ``size``; the first other one stops.
    """
    available = found[start:len(found)]
    end = start
    for ref in available:
        if ref.size != size or is_sequence(ref.path):
            break
        end += 1
    return start + ((end - start) // block) * block


def scan_and_learn(sources, options: AnalysisOptions, scan: Callable, make_run: Callable, *,
                   progress, cancel, on_partial, partial_interval: float,
                   stack: contextlib.ExitStack) -> tuple[SourceSet | None, Head | None]:
    """Scan ``sources`` in a thread and learn whole blocks of its images meanwhile.

    Parameters
    ----------
    sources : sequence of str or path
    options : AnalysisOptions
    scan : callable
        ``scan(sources, options, progress=, cancel=, files=, found=)`` returning a SourceSet
        (:func:`modescope.core.engine.pipeline.scan`).
    make_run : callable
        ``make_run(engine, source_set, shape)`` returning an object with ``workers`` and
        ``snapshot(learned, stage)`` (the pipeline's run state).
    progress, cancel, on_partial : callable or None
        As for :func:`~modescope.core.engine.pipeline.analyze`; the scan reports progress, the
        learning meanwhile does not (it reports from the first image on once the scan ended).
    partial_interval : float
    stack : contextlib.ExitStack
        Owns the block cache.

    Returns
    -------
    source_set : SourceSet or None
        The full scan; None when it was cancelled.
    head : Head or None
        What was learned meanwhile; None when nothing was.

    Raises
    ------
    Exception
        Whatever the scan raised (NoUsableImagesError, ...), but a cancel.
    """
    scanner = _Scanner(scan, sources, options, progress, cancel)
    scanner.start()
    head = None
    try:
        head = _learn_meanwhile(scanner, options, make_run, cancel, on_partial,
                                partial_interval, stack)
    finally:
        if head is None or not head.learned.stopped:
            scanner.join()
    if scanner.error is not None and not isinstance(scanner.error, AnalysisCancelled):
        if head is not None:
            head.cache.close()
        raise scanner.error
    return scanner.result, head


def _learn_meanwhile(scanner: _Scanner, options: AnalysisOptions, make_run: Callable, cancel,
                     on_partial, partial_interval: float,
                     stack: contextlib.ExitStack) -> Head | None:
    """Learn the first block as soon as its headers are read; None when it cannot be."""
    block = options.block_size
    scanner.wait_for(lambda: scanner.total is not None)
    if scanner.total is None or scanner.total < HEADSTART_FILES:
        return None
    scanner.wait_for(lambda: len(scanner.found) >= block)
    if scanner.ended:                    # the whole scan is there: no head start needed
        return None
    size = scanner.found[0].size
    end = _next_images(scanner.found, 0, block, size)
    if end == 0:                         # another size or a sequence: the full scan decides
        return None
    first = SourceSet(images=tuple(scanner.found[:end]), reference_size=size,
                      color=options.color, resize_mismatched=options.resize_mismatched,
                      problems=())
    try:
        shape = analysis_shape(first, options.downscale)
    except ValueError:                   # a downscale too large: the full scan says so
        return None
    engine = StreamingSVD(int(np.prod(shape)), options.rank, options.oversample)
    cache = stack.enter_context(BlockCache(engine.n_pixels))
    run = make_run(engine, first, shape)
    with blas_limit(options.blas_threads):
        learned = learn(engine, first, options, workers=run.workers, cache=cache,
                        cancel=cancel, on_partial=on_partial, snapshot=run.snapshot,
                        partial_interval=partial_interval)
    return Head(first, shape, engine, cache, learned)
