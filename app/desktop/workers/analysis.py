"""Run an analysis off the GUI thread.

:class:`AnalysisWorker` is a QObject that runs :func:`modescope.core.engine.pipeline.analyze` once, in
whatever thread it lives in, and reports through signals; it never touches a widget.
:class:`AnalysisRunner` owns one QThread, moves each new worker into it, forwards the signals of
the current worker only (a cancelled run that is still winding down cannot overwrite a newer one)
and shuts the thread down with a time limit when the window closes.

Signals (both classes)
----------------------
progress(object)
    A ``pipeline.Progress`` after each block.
partial(object)
    A streaming ``Decomposition`` snapshot, at most every ``partial_interval`` seconds; the
    snapshot pending when learning ends (or when the run is cancelled) is always sent.
finished(object)
    The ``pipeline.AnalysisResult`` of a completed run.
failed(str)
    A message for the user naming the file or folder at fault (never a traceback).
cancelled(object)
    The ``AnalysisResult`` of a cancelled run (its decomposition is the partial model, or None
    when the run stopped before the first block); None when the run stopped before the scan
    produced a result.
"""

from __future__ import annotations

import logging
import threading
import time
from typing import Any, Callable, Sequence

from PySide6.QtCore import QObject, QThread, Signal, Slot

from modescope.core.errors import AnalysisCancelled, ModescopeError

__all__ = ["AnalysisWorker", "AnalysisRunner", "error_message", "PARTIAL_INTERVAL"]

_log = logging.getLogger(__name__)

#: Seconds between two partial snapshots sent to the GUI.
PARTIAL_INTERVAL = 0.15

#: Seconds between two progress signals of the scan stage (the scan reports every file: 10,000
#: queued signals would keep the GUI thread busy and delay the first partial result).
SCAN_PROGRESS_INTERVAL = 0.05


def error_message(exc: BaseException) -> str:
    """Return a message for the user about ``exc``: no traceback, the file named when known.

    Parameters
    ----------
    exc : BaseException
        What the analysis raised.

    Returns
    -------
    str
    """
    if isinstance(exc, MemoryError):
        return ("There is not enough memory for this analysis. Try a larger downscale factor, "
                "a lower rank or gray instead of RGB.")
    if isinstance(exc, ModescopeError):
        return str(exc) or type(exc).__name__
    if isinstance(exc, OSError):
        where = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
        return f"A file could not be read{where}: {exc.strerror or exc}"
    text = str(exc).strip() or "no details"
    return f"The analysis stopped on an unexpected error ({type(exc).__name__}: {text})"


def _default_analyze() -> Callable[..., Any]:
    # Looked up at run time so that tests can monkeypatch pipeline.analyze.
    from modescope.core.engine import pipeline

    return pipeline.analyze


class AnalysisWorker(QObject):
    """Run one analysis and report through signals.

    Parameters
    ----------
    sources : sequence of str, or a pipeline.SourceSet
        What to analyse (passed to ``pipeline.analyze`` unchanged).
    options : pipeline.AnalysisOptions
        Analysis options.
    analyze : callable, optional
        Stand-in for ``pipeline.analyze`` with the same signature (tests). Default: the
        pipeline's, looked up when the run starts.
    partial_interval : float, default PARTIAL_INTERVAL
        Least number of seconds between two ``partial`` signals.
    only : iterable of (path, page), optional
        Analyse only these images of the sources (passed to ``pipeline.analyze``).
    """

    progress = Signal(object)
    partial = Signal(object)
    finished = Signal(object)
    failed = Signal(str)
    cancelled = Signal(object)
    _kick = Signal()

    def __init__(self, sources: Sequence[str] | Any, options: Any, *,
                 analyze: Callable[..., Any] | None = None,
                 partial_interval: float = PARTIAL_INTERVAL, only: Any = None):
        super().__init__()
        if analyze is not None and not callable(analyze):
            raise TypeError(f"analyze must be callable or None, got {type(analyze).__name__}")
        if partial_interval < 0:
            raise ValueError(f"partial_interval must be >= 0 seconds, got {partial_interval}")
        self._sources = sources
        self._options = options
        self._analyze = analyze
        self._interval = float(partial_interval)
        self._only = None if only is None else list(only)
        self._cancel = threading.Event()
        self._last_partial_time = -float("inf")
        self._last_scan_progress = -float("inf")
        self._pending = None
        self._stage = ""
        self._done = threading.Event()
        self._started = threading.Event()
        self.partials_seen = 0      # snapshots handed over by the pipeline
        self.partials_sent = 0      # snapshots emitted
        self._kick.connect(self.run)

    # ----- control (any thread) ----------------------------------------------------------------
    def cancel(self) -> None:
        """Ask the run to stop at the next block boundary (thread-safe)."""
        self._cancel.set()

    def is_cancel_requested(self) -> bool:
        """Return True once :meth:`cancel` has been called (thread-safe)."""
        return self._cancel.is_set()

    def is_done(self) -> bool:
        """Return True once the run has ended, whichever way (thread-safe)."""
        return self._done.is_set()

    def request_start(self) -> None:
        """Start :meth:`run` in the worker's thread (through a queued signal)."""
        self._kick.emit()

    # ----- callbacks from the pipeline (worker thread) ---------------------------------------
    def _on_progress(self, progress: Any) -> None:
        stage = getattr(progress, "stage", "")
        if self._stage == "learn" and stage != "learn":
            self._flush_partial()
        if stage == "scan" and self._stage == "scan":
            now = time.monotonic()
            last = getattr(progress, "done", 0) >= getattr(progress, "total", 0)
            if not last and now - self._last_scan_progress < SCAN_PROGRESS_INTERVAL:
                return
            self._last_scan_progress = now
        elif stage == "scan":
            self._last_scan_progress = time.monotonic()
        self._stage = stage
        self.progress.emit(progress)

    def _on_partial(self, decomposition: Any) -> None:
        self.partials_seen += 1
        now = time.monotonic()
        if now - self._last_partial_time >= self._interval:
            self._pending = None
            self._send_partial(decomposition, now)
        else:
            self._pending = decomposition

    def _send_partial(self, decomposition: Any, now: float | None = None) -> None:
        self._last_partial_time = time.monotonic() if now is None else now
        self.partials_sent += 1
        self.partial.emit(decomposition)

    def _flush_partial(self) -> None:
        if self._pending is not None:
            pending, self._pending = self._pending, None
            self._send_partial(pending)

    # ----- the run ------------------------------------------------------------------------------
    @Slot()
    def run(self) -> None:
        """Run the analysis (call in the worker's thread; blocks until it ends)."""
        self._started.set()
        try:
            if self._cancel.is_set():
                self._emit_end(self.cancelled, None)
                return
            analyze = self._analyze if self._analyze is not None else _default_analyze()
            extra = {} if self._only is None else {"only": self._only}
            result = analyze(self._sources, self._options, progress=self._on_progress,
                             cancel=self._cancel.is_set, on_partial=self._on_partial, **extra)
        except AnalysisCancelled:
            self._flush_partial()
            self._emit_end(self.cancelled, None)
        except Exception as exc:  # noqa: BLE001 - every failure becomes a message
            if not isinstance(exc, (ModescopeError, OSError, MemoryError)):
                _log.error("analysis failed", exc_info=exc)
            self._pending = None
            self._emit_end(self.failed, error_message(exc))
        else:
            if getattr(result, "cancelled", False):
                self._flush_partial()
                self._emit_end(self.cancelled, result)
            else:
                self._pending = None
                self._emit_end(self.finished, result)

    def _emit_end(self, signal: Any, value: Any) -> None:
        # No moveToThread here: called from this thread with the GIL held, it waits for Qt's
        # pooled signal/slot mutexes, and the GUI thread can hold one of those while it waits
        # for the GIL (destroying a Python-made QObject asks PySide for overrides). That
        # deadlock was seen once in the tests. The runner deletes a finished worker only once
        # the thread has moved on to a newer one or has stopped (see _drop_finished_workers).
        self._done.set()
        signal.emit(value)

    def has_started(self) -> bool:
        """Return True once :meth:`run` has begun in the worker thread (thread-safe)."""
        return self._started.is_set()


class AnalysisRunner(QObject):
    """Own a worker thread and run one analysis at a time in it.

    Parameters
    ----------
    parent : QObject, optional
    analyze : callable, optional
        Stand-in for ``pipeline.analyze`` given to every worker (tests).
    partial_interval : float, default PARTIAL_INTERVAL

    Signals
    -------
    progress, partial, finished, failed, cancelled
        As :class:`AnalysisWorker`, for the current run only.
    runningChanged(bool)
        True when a run starts, False when it ends.
    """

    progress = Signal(object)
    partial = Signal(object)
    finished = Signal(object)
    failed = Signal(str)
    cancelled = Signal(object)
    runningChanged = Signal(bool)

    def __init__(self, parent: QObject | None = None, *,
                 analyze: Callable[..., Any] | None = None,
                 partial_interval: float = PARTIAL_INTERVAL):
        super().__init__(parent)
        self._analyze = analyze
        self._interval = partial_interval
        self._thread: QThread | None = None
        self._worker: AnalysisWorker | None = None
        self._old_workers: list[AnalysisWorker] = []

    @property
    def worker(self) -> AnalysisWorker | None:
        """The worker of the current (or last) run."""
        return self._worker

    @property
    def worker_thread(self) -> QThread | None:
        """The worker thread (None before the first run and after shutdown)."""
        return self._thread

    def is_running(self) -> bool:
        """Return True while a run has not ended."""
        return self._worker is not None and not self._worker.is_done()

    def start(self, sources: Sequence[str] | Any, options: Any,
              only: Any = None) -> AnalysisWorker:
        """Start a new run; a run still going is cancelled first.

        Parameters
        ----------
        sources : sequence of str, or pipeline.SourceSet
        options : pipeline.AnalysisOptions
        only : iterable of (path, page), optional
            Analyse only these images of the sources.

        Returns
        -------
        AnalysisWorker
            The new worker (its signals are forwarded by the runner).
        """
        if self.is_running():
            self.cancel()
        if self._thread is None:
            self._thread = QThread()
            self._thread.setObjectName("modescope-analysis")
            self._thread.start()
        self._drop_finished_workers()
        if self._worker is not None:
            self._old_workers.append(self._worker)
        worker = AnalysisWorker(sources, options, analyze=self._analyze,
                                partial_interval=self._interval, only=only)
        worker.moveToThread(self._thread)
        worker.progress.connect(self._on_progress)
        worker.partial.connect(self._on_partial)
        worker.finished.connect(self._on_finished)
        worker.failed.connect(self._on_failed)
        worker.cancelled.connect(self._on_cancelled)
        self._worker = worker
        worker.request_start()
        self.runningChanged.emit(True)
        return worker

    def cancel(self) -> None:
        """Ask the current run to stop at the next block boundary."""
        if self._worker is not None:
            self._worker.cancel()

    def abandon(self) -> None:
        """Cancel the current run and stop forwarding its signals (a newer result replaces it)."""
        if self._worker is not None:
            self._worker.cancel()
            self._old_workers.append(self._worker)
            self._worker = None
            self.runningChanged.emit(False)

    def shutdown(self, timeout_ms: int = 5000) -> bool:
        """Cancel any run, stop the thread and wait for it at most ``timeout_ms``.

        Returns
        -------
        bool
            True when the thread has stopped.
        """
        for w in [self._worker, *self._old_workers]:
            if w is not None:
                w.cancel()
        thread = self._thread
        if thread is None:
            return True
        thread.quit()
        stopped = bool(thread.wait(int(timeout_ms)))
        if stopped:
            self._thread = None
            thread.deleteLater()
            self._drop_finished_workers()
        else:
            _log.warning("the analysis thread did not stop within %d ms", timeout_ms)
        return stopped

    def _drop_finished_workers(self) -> None:
        # A finished worker still lives in the worker thread, which may be finishing the event
        # that ran it. It is let go (and so deleted, from this thread) only when that thread is
        # gone or has started a newer worker: it then has nothing of the old one left to do.
        thread_moved_on = (self._thread is None or
                           (self._worker is not None and self._worker.has_started()))
        if thread_moved_on:
            self._old_workers = [w for w in self._old_workers if not w.is_done()]

    def _is_current(self) -> bool:
        sender = self.sender()
        return sender is not None and sender is self._worker

    # ----- forwarding (GUI thread) --------------------------------------------------------------
    @Slot(object)
    def _on_progress(self, progress: Any) -> None:
        if self._is_current():
            self.progress.emit(progress)

    @Slot(object)
    def _on_partial(self, decomposition: Any) -> None:
        if self._is_current():
            self.partial.emit(decomposition)

    @Slot(object)
    def _on_finished(self, result: Any) -> None:
        if self._is_current():
            self.runningChanged.emit(False)
            self.finished.emit(result)
        self._drop_finished_workers()

    @Slot(str)
    def _on_failed(self, message: str) -> None:
        if self._is_current():
            self.runningChanged.emit(False)
            self.failed.emit(message)
        self._drop_finished_workers()

    @Slot(object)
    def _on_cancelled(self, result: Any) -> None:
        if self._is_current():
            self.runningChanged.emit(False)
            self.cancelled.emit(result)
        self._drop_finished_workers()
