"""Run an analysis off the GUI thread, on the program's one background pattern.

:class:`AnalysisWorker` is a :class:`~modescope.app.desktop.workers.background.Job` that runs
:func:`modescope.core.engine.pipeline.analyze` once and thins what it reports; it never touches a
widget. :class:`AnalysisRunner` runs one analysis at a time in its
:class:`~modescope.app.desktop.workers.background.BackgroundRunner` (one pool thread), forwards
the signals of the current run only (a cancelled run that is still winding down cannot overwrite
a newer one) and stops with a time limit when the window closes.

Signals (both classes)
----------------------
progress(object)
    A ``pipeline.Progress`` after each block (the scan's per-file progress thinned to one signal
    per ``SCAN_PROGRESS_INTERVAL``, its first and last always sent).
partial(object)
    A streaming ``Decomposition`` snapshot, at most every ``partial_interval`` seconds; the
    snapshot pending when learning ends (or when the run is cancelled) is always sent.
finished(object)
    The ``pipeline.AnalysisResult`` of a completed run.
failed(str)
    A message for the user naming the file or folder at fault (never a traceback; an unexpected
    error is logged with its traceback and the message says so).
cancelled(object)
    The ``AnalysisResult`` of a cancelled run (its decomposition is the partial model, or None
    when the run stopped before the first block); None when the run stopped before the scan
    produced a result.
"""

from __future__ import annotations

import logging
import time
from typing import Any, Callable, Sequence

from PySide6.QtCore import QObject, QThreadPool, Signal

from modescope.core.errors import AnalysisCancelled

from modescope.app.desktop.workers import background
from modescope.app.desktop.workers.background import BackgroundRunner, Job, Stopped

__all__ = ["AnalysisWorker", "AnalysisRunner", "error_message", "PARTIAL_INTERVAL"]

_log = logging.getLogger(__name__)

#: Seconds between two partial snapshots sent to the GUI.
PARTIAL_INTERVAL = 0.15

#: Seconds between two progress signals of the scan stage (the scan reports every file: 10,000
#: queued signals would keep the GUI thread busy and delay the first partial result).
SCAN_PROGRESS_INTERVAL = 0.05

_TASK = "The analysis"


def _describe(exc: BaseException) -> str:
    if isinstance(exc, MemoryError):
        return ("There is not enough memory for this analysis. Try a larger downscale factor, "
                "a lower rank or gray instead of RGB.")
    return background.plain_message(exc, _TASK)


def error_message(exc: BaseException) -> str:
    """Return a message for the user about ``exc``: no traceback, the file named when known.

    Parameters
    ----------
    exc : BaseException
        What the analysis raised.

    Returns
    -------
    str
        The plain message of an expected error (unreadable input, files, memory); for any other
        exception, the unexpected-error sentence of the background pattern.
    """
    return background.error_message(exc, _TASK, _describe)


def _default_analyze() -> Callable[..., Any]:
    # Looked up at run time so that tests can monkeypatch pipeline.analyze.
    from modescope.core.engine import pipeline

    return pipeline.analyze


class AnalysisWorker(Job):
    """Run one analysis and report through signals (a background job).

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

    Raises
    ------
    TypeError
        If ``analyze`` is neither callable nor None.
    ValueError
        If ``partial_interval`` is negative.
    """

    def __init__(self, sources: Sequence[str] | Any, options: Any, *,
                 analyze: Callable[..., Any] | None = None,
                 partial_interval: float = PARTIAL_INTERVAL, only: Any = None):
        if analyze is not None and not callable(analyze):
            raise TypeError(f"analyze must be callable or None, got {type(analyze).__name__}")
        if partial_interval < 0:
            raise ValueError(f"partial_interval must be >= 0 seconds, got {partial_interval}")
        super().__init__(task=_TASK, describe_error=_describe)
        self._sources = sources
        self._options = options
        self._analyze = analyze
        self._interval = float(partial_interval)
        self._only = None if only is None else list(only)
        self._last_partial_time = -float("inf")
        self._last_scan_progress = -float("inf")
        self._pending = None
        self._stage = ""

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
        self.signals.progress.emit(progress)

    def _on_partial(self, decomposition: Any) -> None:
        now = time.monotonic()
        if now - self._last_partial_time >= self._interval:
            self._pending = None
            self._send_partial(decomposition, now)
        else:
            self._pending = decomposition

    def _send_partial(self, decomposition: Any, now: float | None = None) -> None:
        self._last_partial_time = time.monotonic() if now is None else now
        self.signals.partial.emit(decomposition)

    def _flush_partial(self) -> None:
        if self._pending is not None:
            pending, self._pending = self._pending, None
            self._send_partial(pending)

    # ----- the run ------------------------------------------------------------------------------
    def execute(self, context: background.JobContext) -> Any:
        """Run the analysis (in the pool thread): the result, or :class:`Stopped` with it."""
        analyze = self._analyze if self._analyze is not None else _default_analyze()
        extra = {} if self._only is None else {"only": self._only}
        try:
            result = analyze(self._sources, self._options, progress=self._on_progress,
                             cancel=context.cancelled, on_partial=self._on_partial, **extra)
        except AnalysisCancelled:
            self._flush_partial()
            raise
        except BaseException:
            self._pending = None
            raise
        if getattr(result, "cancelled", False):
            self._flush_partial()
            return Stopped(result)
        self._pending = None
        return result


class AnalysisRunner(QObject):
    """Run one analysis at a time off the GUI thread and forward the current run's signals.

    Parameters
    ----------
    parent : QObject, optional
    analyze : callable, optional
        Stand-in for ``pipeline.analyze`` given to every worker (tests; read at each start).
    partial_interval : float, default PARTIAL_INTERVAL
        Given to every worker (read at each start).

    Signals
    -------
    progress, partial, finished, failed, cancelled
        As :class:`AnalysisWorker`, for the current run only.
    runningChanged(bool)
        True when a run starts while none was running, False when it ends (before its ending
        signal) or is abandoned.
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
        self._worker: AnalysisWorker | None = None
        self._jobs = BackgroundRunner(self, threads=1, task=_TASK, describe_error=_describe)
        for name in ("progress", "partial", "finished", "failed", "cancelled", "runningChanged"):
            getattr(self._jobs, name).connect(getattr(self, name))

    @property
    def worker(self) -> AnalysisWorker | None:
        """The worker of the current (or last) run."""
        return self._worker

    @property
    def pool(self) -> QThreadPool:
        """The thread pool the runs use (one thread)."""
        return self._jobs.pool

    def is_running(self) -> bool:
        """Return True while a run has not ended."""
        return self._jobs.is_running()

    def start(self, sources: Sequence[str] | Any, options: Any,
              only: Any = None) -> AnalysisWorker:
        """Start a new run; a run still going is cancelled and no longer forwarded.

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
        worker = AnalysisWorker(sources, options, analyze=self._analyze,
                                partial_interval=self._interval, only=only)
        self._worker = worker
        self._jobs.submit(worker)
        return worker

    def cancel(self) -> None:
        """Ask the current run to stop at the next block boundary (its end is forwarded)."""
        self._jobs.cancel()

    def abandon(self) -> None:
        """Cancel the current run and stop forwarding its signals (a newer result replaces it)."""
        self._jobs.abandon()

    def wait(self, timeout_ms: int = 5000) -> bool:
        """Wait at most ``timeout_ms`` for every run (current or cancelled) to end."""
        return self._jobs.wait(timeout_ms)

    def shutdown(self, timeout_ms: int = 5000) -> bool:
        """Cancel any run and wait for it at most ``timeout_ms`` (a new run may start later).

        Returns
        -------
        bool
            True when no run is left in the pool thread.
        """
        self._jobs.cancel()
        stopped = self._jobs.wait(timeout_ms)
        if not stopped:
            _log.warning("the analysis did not stop within %d ms", timeout_ms)
        return stopped
