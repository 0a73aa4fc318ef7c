"""Thumbnails made off the GUI thread, with a bounded least-recently-used cache.

:class:`ThumbnailMaker` takes requests from an item model's ``data()`` (only rows that are shown
ask), keeps the newest requests first (a user scrolling fast through 10,000 rows wants the rows on
screen now, not the ones scrolled past), makes them in background jobs (the program's one pattern,
:mod:`~modescope.app.desktop.workers.background`; two pool threads drain the queue) and hands
each finished :class:`~PySide6.QtGui.QImage` back on the GUI thread through
:attr:`ThumbnailMaker.thumbnailReady`.

A thumbnail is the source file decoded by the analysis's own rules at reduced size
(:func:`modescope.core.sources.decode.load_preview`: EXIF orientation, 8/16-bit scaling and colour
exactly as analysed; JPEG decoded at a fraction of its size); when the file is missing or
unreadable a fallback callable (the rank-r reconstruction) is used instead, and the result says
so.
"""

from __future__ import annotations

import dataclasses
import logging
import threading
from collections import OrderedDict, deque
from dataclasses import dataclass
from typing import Any, Callable, Hashable

import numpy as np
from PIL import Image
from PySide6.QtCore import QCoreApplication, QObject, Signal, Slot
from PySide6.QtGui import QIcon, QImage, QPixmap

from modescope.core.errors import ModescopeError
from modescope.core.output.metrics import quantize
from modescope.core.sources.decode import load_preview

from modescope.app.desktop.workers.background import (EXPECTED_ERRORS, BackgroundRunner,
                                                      JobContext)

__all__ = ["ThumbnailCache", "Thumbnail", "ThumbnailMaker", "make_thumbnail",
           "array_to_qimage"]

_log = logging.getLogger(__name__)


# ----- numpy -> QImage ---------------------------------------------------------------------------
def array_to_qimage(array: np.ndarray) -> QImage:
    """Return a QImage owning a copy of a uint8 gray or RGB array.

    Parameters
    ----------
    array : ndarray, shape (rows, cols), (rows, cols, 1) or (rows, cols, 3), uint8

    Returns
    -------
    QImage
        ``Format_Grayscale8`` or ``Format_RGB888``, independent of ``array``'s memory.

    Raises
    ------
    TypeError
        When ``array`` is not a uint8 ndarray.
    ValueError
        When its shape is not one of the above.
    """
    if not isinstance(array, np.ndarray) or array.dtype != np.uint8:
        raise TypeError(f"array must be a uint8 ndarray, got "
                        f"{getattr(array, 'dtype', type(array).__name__)}")
    if array.ndim == 3 and array.shape[2] == 1:
        array = array[:, :, 0]
    if array.ndim == 2:
        fmt = QImage.Format.Format_Grayscale8
    elif array.ndim == 3 and array.shape[2] == 3:
        fmt = QImage.Format.Format_RGB888
    else:
        raise ValueError(f"array must have shape (rows, cols), (rows, cols, 1) or "
                         f"(rows, cols, 3), got {array.shape}")
    array = np.ascontiguousarray(array)
    rows, cols = array.shape[:2]
    image = QImage(array.data, cols, rows, array.strides[0], fmt)
    return image.copy()  # own the pixels: the numpy buffer goes away


def _float_to_uint8(image: np.ndarray) -> np.ndarray:
    """Clip to [0, 1] and round to 8 bits by core's rule
    (:func:`~modescope.core.output.metrics.quantize`)."""
    a = quantize(image, 8)
    return a[:, :, 0] if a.ndim == 3 and a.shape[2] == 1 else a


@dataclass(frozen=True)
class Thumbnail:
    """A finished thumbnail.

    Attributes
    ----------
    image : QImage
        Null when neither the file nor the fallback gave a picture.
    source : str
        ``"file"``, ``"reconstruction"`` (the file could not be read) or ``"failed"``.
    note : str
        Why the file was not used ('' when it was).
    icon : QIcon or None
        The image as an icon that looks the same when selected (made on the GUI thread when the
        thumbnail enters the cache; None before).
    """

    image: QImage
    source: str
    note: str = ""
    icon: QIcon | None = None


def make_thumbnail(path: str, page: int = 0, size: int = 64,
                   fallback: Callable[[], np.ndarray] | None = None) -> Thumbnail:
    """Make a thumbnail of one image, from its file or else from a fallback.

    Parameters
    ----------
    path : str
        Source image file (never modified).
    page : int
        Page of a multi-page file.
    size : int
        Longest side of the thumbnail in pixels.
    fallback : callable, optional
        Returns a float image (rows, cols, channels) in [0, 1], e.g. the reconstruction; used when
        the file cannot be read.

    The picture is :func:`~modescope.core.sources.decode.load_preview` of the file (oriented and
    scaled as the analysis reads it, in the file's own colours) rounded to 8 bits.

    Returns
    -------
    Thumbnail
    """
    try:
        image = load_preview(path, page, max_side=size)
    except ModescopeError as exc:     # missing, damaged or unsupported: the message names it
        note = str(exc) or f"{path}: cannot be read"
        if fallback is None:
            return Thumbnail(QImage(), "failed", note)
        try:
            a = _float_to_uint8(fallback())
        except (ValueError, TypeError, IndexError) as exc2:
            return Thumbnail(QImage(), "failed", f"{note}; reconstruction: {exc2}")
        im = Image.fromarray(a)
        im.thumbnail((size, size))
        return Thumbnail(array_to_qimage(np.asarray(im)), "reconstruction", note)
    return Thumbnail(array_to_qimage(_float_to_uint8(image)), "file")


# ----- bounded LRU cache -------------------------------------------------------------------------
class ThumbnailCache:
    """A least-recently-used mapping holding at most ``maxsize`` entries.

    Used from the GUI thread only (finished thumbnails arrive there through a queued signal).

    Parameters
    ----------
    maxsize : int
        Largest number of entries kept; the least recently used one is dropped beyond it.
    """

    def __init__(self, maxsize: int = 2000):
        if isinstance(maxsize, bool) or not isinstance(maxsize, int):
            raise TypeError(f"maxsize must be an integer, got {type(maxsize).__name__}")
        if maxsize < 1:
            raise ValueError(f"maxsize must be at least 1, got {maxsize}")
        self.maxsize = maxsize
        self._data: OrderedDict[Hashable, Any] = OrderedDict()

    def __len__(self) -> int:
        return len(self._data)

    def __contains__(self, key: Hashable) -> bool:
        return key in self._data

    def get(self, key: Hashable, default: Any = None) -> Any:
        """Return the entry for ``key`` (marking it as recently used) or ``default``."""
        try:
            self._data.move_to_end(key)
        except KeyError:
            return default
        return self._data[key]

    def put(self, key: Hashable, value: Any) -> None:
        """Store ``value`` under ``key`` and drop the oldest entries beyond ``maxsize``."""
        self._data[key] = value
        self._data.move_to_end(key)
        while len(self._data) > self.maxsize:
            self._data.popitem(last=False)

    def clear(self) -> None:
        """Drop every entry."""
        self._data.clear()


# ----- the off-thread maker ----------------------------------------------------------------------
class _Requests:
    """The queue of thumbnail requests, shared by the GUI thread and the draining jobs.

    A plain object (not the maker) so that the jobs hold no reference to a QObject: a cycle
    through the maker could be collected, and the maker deleted, in the middle of a slot.
    """

    def __init__(self, size: int, threads: int, max_pending: int):
        self.size = size
        self.threads = threads
        self.max_pending = max_pending
        self.lock = threading.Lock()
        self.queue: deque = deque()
        self.pending: set = set()    # keys queued or being made
        self.drainers = 0            # jobs draining the queue
        self.stopped = False

    def add(self, key: Hashable, path: str, page: int, fallback) -> bool:
        """Queue a request; return True when a new draining job must start (GUI thread)."""
        with self.lock:
            if self.stopped or key in self.pending:
                return False
            self.pending.add(key)
            self.queue.append((key, path, page, fallback))
            while len(self.queue) > self.max_pending:
                old = self.queue.popleft()
                self.pending.discard(old[0])
            start = self.drainers < self.threads
            if start:
                self.drainers += 1
            return start

    def drain(self, context: JobContext) -> int:
        """Make queued thumbnails, newest first, until the queue is empty (a job's work)."""
        made = 0
        counted = True
        try:
            while True:
                with self.lock:
                    if self.stopped or context.cancelled() or not self.queue:
                        # leave in the same locked step that saw the queue empty, so that a
                        # request arriving now starts a new job
                        self.drainers -= 1
                        counted = False
                        return made
                    key, path, page, fallback = self.queue.pop()
                try:
                    thumb = make_thumbnail(path, page, self.size, fallback)
                except Exception as exc:  # noqa: BLE001 - one bad file must not stop the rest
                    if not isinstance(exc, EXPECTED_ERRORS):
                        _log.error("thumbnail of %s failed", path, exc_info=exc)
                    thumb = Thumbnail(QImage(), "failed", f"{path}: {exc}")
                context.partial((key, thumb))
                made += 1
        finally:
            if counted:
                with self.lock:
                    self.drainers -= 1


class ThumbnailMaker(QObject):
    """Make thumbnails in background jobs; newest requests first; bounded LRU cache.

    Parameters
    ----------
    size : int
        Longest side of a thumbnail in pixels.
    cache_size : int
        Most thumbnails kept in memory.
    threads : int
        Pool threads decoding at once (each runs one job that drains the queue).
    max_pending : int
        Most requests waiting; the oldest are dropped (and may be asked for again when their rows
        come back into view).
    parent : QObject, optional

    Signals
    -------
    thumbnailReady(object)
        The key of a thumbnail now in the cache (emitted on the GUI thread).
    """

    thumbnailReady = Signal(object)

    def __init__(self, size: int = 64, cache_size: int = 2000, threads: int = 2,
                 max_pending: int = 512, parent: QObject | None = None):
        super().__init__(parent)
        self.size = int(size)
        self.cache = ThumbnailCache(cache_size)
        self.max_pending = int(max_pending)
        threads = max(1, int(threads))
        self._requests = _Requests(self.size, threads, self.max_pending)
        self._jobs = BackgroundRunner(self, threads=threads, task="Making thumbnails")
        self._jobs.partial.connect(self._on_thumbnail)
        app = QCoreApplication.instance()
        if app is not None:
            app.aboutToQuit.connect(self.shutdown)

    # ----- GUI-thread API ----------------------------------------------------------------------
    def thumbnail(self, key: Hashable) -> Thumbnail | None:
        """Return the cached thumbnail for ``key`` or None (does not start any work)."""
        return self.cache.get(key)

    def request(self, key: Hashable, path: str, page: int = 0,
                fallback: Callable[[], np.ndarray] | None = None) -> Thumbnail | None:
        """Return the cached thumbnail for ``key``, or queue it and return None.

        Parameters
        ----------
        key : hashable
            Cache key, e.g. ``(path, page)``.
        path, page
            Source file and page.
        fallback : callable, optional
            Called on a pool thread when the file cannot be read; returns a float image in [0, 1].
        """
        thumb = self.cache.get(key)
        if thumb is not None:
            return thumb
        if self._requests.add(key, str(path), int(page), fallback):
            self._jobs.start(self._requests.drain, replace=False)
        return None

    def pending(self) -> int:
        """Return the number of requests queued or being made."""
        with self._requests.lock:
            return len(self._requests.pending)

    def wait(self, msecs: int = 5000) -> bool:
        """Wait until no thumbnail is being made; return False on time-out."""
        return self._jobs.wait(int(msecs))

    @Slot()
    def shutdown(self, msecs: int = 3000) -> None:
        """Stop taking requests, drop the queue and wait for running jobs (with a time limit)."""
        requests = self._requests
        with requests.lock:
            requests.stopped = True
            requests.queue.clear()
            requests.pending.clear()
        self._jobs.shutdown(int(msecs))

    @Slot(object)
    def _on_thumbnail(self, made: tuple) -> None:
        key, thumb = made
        requests = self._requests
        with requests.lock:
            requests.pending.discard(key)
            stopped = requests.stopped
        if stopped:
            return
        if not thumb.image.isNull():
            picture = QPixmap.fromImage(thumb.image)  # QPixmap: GUI thread only
            icon = QIcon()
            icon.addPixmap(picture, QIcon.Mode.Normal)
            icon.addPixmap(picture, QIcon.Mode.Selected)  # no selection tint over the picture
            thumb = dataclasses.replace(thumb, icon=icon)
        self.cache.put(key, thumb)
        self.thumbnailReady.emit(key)
