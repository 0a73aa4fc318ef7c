"""Thumbnails made off the GUI thread, with a bounded least-recently-used cache.

:class:`ThumbnailMaker` takes requests from an item model's ``data()`` (only rows that are shown
ask), keeps the newest requests first (a user scrolling fast through 10,000 rows wants the rows on
screen now, not the ones scrolled past), decodes them with Pillow on a private
:class:`~PySide6.QtCore.QThreadPool` and hands each finished :class:`~PySide6.QtGui.QImage` back
on the GUI thread through :attr:`ThumbnailMaker.thumbnailReady`.

A thumbnail is made from the source file (``Image.draft`` lets JPEG decode at a fraction of full
size, then ``Image.thumbnail``); when the file is missing or unreadable a fallback callable (the
rank-r reconstruction) is used instead, and the result says so.
"""

from __future__ import annotations

import dataclasses
import threading
from collections import OrderedDict, deque
from dataclasses import dataclass
from typing import Any, Callable, Hashable

import numpy as np
from PIL import Image
from PySide6.QtCore import QCoreApplication, QObject, QRunnable, QThreadPool, Signal, Slot
from PySide6.QtGui import QIcon, QImage, QPixmap

__all__ = ["ThumbnailCache", "Thumbnail", "ThumbnailMaker", "make_thumbnail",
           "array_to_qimage"]


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


def _to_uint8(im: Image.Image) -> np.ndarray:
    """Return a Pillow image as uint8 gray (rows, cols) or RGB (rows, cols, 3)."""
    if im.mode in ("L", "RGB"):
        return np.asarray(im)
    if im.mode in ("I;16", "I;16B", "I;16L", "I", "F"):
        a = np.asarray(im).astype(np.float64)
        top = 65535.0 if im.mode.startswith("I;16") else max(float(a.max(initial=0)), 1e-12)
        return np.clip(a / top * 255.0 + 0.5, 0, 255).astype(np.uint8)
    if im.mode in ("1", "LA"):
        return np.asarray(im.convert("L"))
    return np.asarray(im.convert("RGB"))


def _float_to_uint8(image: np.ndarray) -> np.ndarray:
    a = np.asarray(image, dtype=np.float32)
    if a.ndim == 3 and a.shape[2] == 1:
        a = a[:, :, 0]
    return (np.clip(a, 0.0, 1.0) * 255.0 + 0.5).astype(np.uint8)


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

    Returns
    -------
    Thumbnail
    """
    try:
        with Image.open(path) as im:
            if page:
                im.seek(page)
            if im.mode in ("L", "RGB"):
                im.draft(im.mode, (size, size))  # JPEG: decode at 1/2, 1/4 or 1/8 size
            if im.mode in ("I;16", "I;16B", "I;16L", "I", "F"):
                im = Image.fromarray(_to_uint8(im))
            im.thumbnail((size, size))
            return Thumbnail(array_to_qimage(_to_uint8(im)), "file")
    except (OSError, ValueError, EOFError, SyntaxError) as exc:
        note = f"{path}: {exc}" if str(exc) else f"{path}: cannot be read"
        if fallback is None:
            return Thumbnail(QImage(), "failed", note)
        try:
            a = _float_to_uint8(fallback())
        except (ValueError, TypeError, IndexError) as exc2:
            return Thumbnail(QImage(), "failed", f"{note}; reconstruction: {exc2}")
        im = Image.fromarray(a)
        im.thumbnail((size, size))
        return Thumbnail(array_to_qimage(np.asarray(im)), "reconstruction", note)


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

    def keys(self) -> list:
        """Return the keys, least recently used first."""
        return list(self._data)

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
class _Runner(QRunnable):
    """Pulls requests (newest first) from the maker's queue until it is empty."""

    def __init__(self, maker: "ThumbnailMaker"):
        super().__init__()
        self.setAutoDelete(False)  # Python owns it (kept in maker._runners until done)
        self._maker = maker

    def run(self) -> None:  # runs on a pool thread
        maker = self._maker
        try:
            while True:
                job = maker._take()
                if job is None:
                    return
                key, path, page, fallback = job
                try:
                    thumb = make_thumbnail(path, page, maker.size, fallback)
                except Exception as exc:  # noqa: BLE001 - a worker must never die silently
                    thumb = Thumbnail(QImage(), "failed", f"{path}: {exc}")
                try:
                    maker._finished.emit(key, thumb)
                except RuntimeError:  # the maker was deleted meanwhile
                    return
        finally:
            maker._runner_done(self)


class ThumbnailMaker(QObject):
    """Make thumbnails on a private thread pool; newest requests first; bounded LRU cache.

    Parameters
    ----------
    size : int
        Longest side of a thumbnail in pixels.
    cache_size : int
        Most thumbnails kept in memory.
    threads : int
        Pool threads decoding at once.
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
    _finished = Signal(object, object)

    def __init__(self, size: int = 64, cache_size: int = 2000, threads: int = 2,
                 max_pending: int = 512, parent: QObject | None = None):
        super().__init__(parent)
        self.size = int(size)
        self.cache = ThumbnailCache(cache_size)
        self.max_pending = int(max_pending)
        self._pool = QThreadPool(self)
        self._pool.setMaxThreadCount(max(1, int(threads)))
        self._threads = max(1, int(threads))
        self._lock = threading.Lock()
        self._queue: deque = deque()
        self._pending: set = set()   # keys queued or being made (guarded by _lock)
        self._runners: set = set()   # live _Runner objects (guarded by _lock)
        self._stopped = False
        self._finished.connect(self._on_finished)
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
        with self._lock:
            if self._stopped or key in self._pending:
                return None
            self._pending.add(key)
            self._queue.append((key, str(path), int(page), fallback))
            while len(self._queue) > self.max_pending:
                old = self._queue.popleft()
                self._pending.discard(old[0])
            start = len(self._runners) < self._threads
            if start:
                runner = _Runner(self)
                self._runners.add(runner)
        if start:
            self._pool.start(runner)
        return None

    def pending(self) -> int:
        """Return the number of requests queued or being made."""
        with self._lock:
            return len(self._pending)

    def cancel_pending(self) -> None:
        """Forget every queued request (those being made still finish)."""
        with self._lock:
            for job in self._queue:
                self._pending.discard(job[0])
            self._queue.clear()

    def wait(self, msecs: int = 5000) -> bool:
        """Wait until the pool is idle; return False on time-out."""
        return self._pool.waitForDone(int(msecs))

    @Slot()
    def shutdown(self, msecs: int = 3000) -> None:
        """Stop taking requests, drop the queue and wait for running jobs (with a time limit)."""
        with self._lock:
            self._stopped = True
            self._queue.clear()
            self._pending.clear()
        self._pool.waitForDone(int(msecs))

    @Slot(object, object)
    def _on_finished(self, key: Hashable, thumb: Thumbnail) -> None:
        with self._lock:
            self._pending.discard(key)
            stopped = self._stopped
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

    # ----- pool-thread side ----------------------------------------------------------------------
    def _take(self):
        with self._lock:
            if self._stopped or not self._queue:
                return None
            return self._queue.pop()  # newest first

    def _runner_done(self, runner: _Runner) -> None:
        with self._lock:
            self._runners.discard(runner)
            restart = bool(self._queue) and not self._stopped and not self._runners
            if restart:  # a request slipped in between _take() and here
                new = _Runner(self)
                self._runners.add(new)
        if restart:
            self._pool.start(new)
