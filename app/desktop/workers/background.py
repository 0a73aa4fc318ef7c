"""One way to run work off the GUI thread: a job in a thread pool, reporting through signals.

Every piece of background work of the desktop program (the analysis, the Sources pane's scan,
thumbnails, the near-duplicates search, the inspector's image decode, the export) is a plain
Python callable run by a :class:`Job` in the :class:`~PySide6.QtCore.QThreadPool` of a
:class:`BackgroundRunner`. The callable gets a :class:`JobContext`: its ``cancelled`` method is
the ``cancel`` callable core routines take, its ``progress`` method fits their ``progress``
parameter, and ``partial`` hands an intermediate result to the GUI thread.

How a job ends (exactly one of these signals, emitted from the pool thread, received queued in
the GUI thread):

* ``finished(result)``: the callable returned ``result``.
* ``cancelled(partial)``: the callable returned :class:`Stopped` (``partial`` is what it holds),
  raised :class:`~modescope.core.errors.AnalysisCancelled` (``partial`` is None), or the job was
  cancelled before it started (None).
* ``failed(message)``: the callable raised. One error policy for every job:
  :class:`~modescope.core.errors.ModescopeError`, :class:`OSError` and :class:`MemoryError` are
  expected (unreadable files, full disks, too little memory) and become a plain message for the
  user; any other exception is a bug: its traceback is logged (:mod:`logging`, logger
  ``modescope.app.desktop.workers.background``) and the user reads
  "<task> stopped on an unexpected error (<type>: <text>; details in the log)".

Rules that keep this safe:

* A job's :class:`JobSignals` is created in the GUI thread (by :class:`Job`, which the runner
  makes there) and stays there; the pool thread only emits. Nothing is ever moved with
  ``moveToThread`` from a pool thread (that waited for a Qt mutex with the GIL held while the GUI
  thread, destroying QObjects, held the mutex and waited for the GIL: a deadlock seen once).
* The runner keeps each job, and so its signals object, until the job's thread has left
  :meth:`Job.run`, so the signals object is always freed in the GUI thread.
* Workers never touch widgets: results travel through the signals.

Example
-------
>>> runner = BackgroundRunner(parent, task="The scan")            # doctest: +SKIP
>>> runner.finished.connect(show)                                 # doctest: +SKIP
>>> runner.start(lambda ctx: scan_sources(paths, cancel=ctx.cancelled))  # doctest: +SKIP
"""

from __future__ import annotations

import logging
import threading
from dataclasses import dataclass
from typing import Any, Callable

from PySide6.QtCore import QObject, QThreadPool, Signal, Slot

from modescope.core.errors import AnalysisCancelled, ModescopeError

__all__ = ["EXPECTED_ERRORS", "plain_message", "unexpected_message", "error_message", "Stopped",
           "JobSignals", "JobContext", "Job", "BackgroundRunner"]

_log = logging.getLogger(__name__)

#: Exceptions that are the user's situation, not a bug: shown as a plain message, not logged.
EXPECTED_ERRORS: tuple[type[BaseException], ...] = (ModescopeError, OSError, MemoryError)


def plain_message(exc: BaseException, task: str = "The task") -> str:
    """Return the user's message for an expected error (no traceback; the file named if known).

    Parameters
    ----------
    exc : BaseException
        One of :data:`EXPECTED_ERRORS` (anything else gets the unexpected-error wording).
    task : str, default "The task"
        What was running, as the subject of a sentence ("The analysis", "The scan").

    Returns
    -------
    str
    """
    if isinstance(exc, MemoryError):
        return f"There is not enough memory: {task[:1].lower() + task[1:]} stopped."
    if isinstance(exc, ModescopeError):
        return str(exc) or type(exc).__name__
    if isinstance(exc, OSError):
        where = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
        return f"A file could not be read{where}: {exc.strerror or exc}"
    return unexpected_message(exc, task)


def unexpected_message(exc: BaseException, task: str = "The task") -> str:
    """Return the user's message for an unexpected error (a bug; its traceback is logged).

    Parameters
    ----------
    exc : BaseException
    task : str, default "The task"
        Subject of the sentence.

    Returns
    -------
    str
        ``"<task> stopped on an unexpected error (<type>: <text>; details in the log)"``.
    """
    text = str(exc).strip() or "no details"
    return (f"{task} stopped on an unexpected error ({type(exc).__name__}: {text}; "
            "details in the log)")


def error_message(exc: BaseException, task: str = "The task",
                  describe: Callable[[BaseException], str] | None = None) -> str:
    """Return the user's message for ``exc`` under the one error policy (logs nothing).

    Parameters
    ----------
    exc : BaseException
        What the work raised.
    task : str, default "The task"
        Subject of the unexpected-error sentence ("The analysis").
    describe : callable(exc) -> str, optional
        Words for the expected errors (:data:`EXPECTED_ERRORS`) of one kind of work; default
        :func:`plain_message`.

    Returns
    -------
    str
    """
    if isinstance(exc, EXPECTED_ERRORS):
        return describe(exc) if describe is not None else plain_message(exc, task)
    return unexpected_message(exc, task)


@dataclass(frozen=True)
class Stopped:
    """Returned by a job's callable that stopped on request; ``partial`` is what it has.

    Attributes
    ----------
    partial : object
        Sent with the ``cancelled`` signal (None when there is nothing usable).
    """

    partial: Any = None


class JobSignals(QObject):
    """The signals of one job. Create it in the GUI thread; pool threads only emit.

    Signals
    -------
    progress(object)
        Whatever the callable passed to :meth:`JobContext.progress`.
    partial(object)
        Whatever the callable passed to :meth:`JobContext.partial`.
    finished(object)
        The callable's result.
    failed(str)
        A message for the user.
    cancelled(object)
        The partial result of a stopped job, or None.
    """

    progress = Signal(object)
    partial = Signal(object)
    finished = Signal(object)
    failed = Signal(str)
    cancelled = Signal(object)


class JobContext:
    """What a job's callable gets: the cancel check and the way to report back.

    Parameters
    ----------
    cancel_event : threading.Event
        Set (from any thread) to ask the work to stop.
    signals : JobSignals
        Where :meth:`progress` and :meth:`partial` go.
    """

    def __init__(self, cancel_event: threading.Event, signals: JobSignals):
        self.cancel_event = cancel_event
        self._signals = signals

    def cancelled(self) -> bool:
        """Return True once the job was asked to stop (pass as a core routine's ``cancel``)."""
        return self.cancel_event.is_set()

    def progress(self, value: Any) -> None:
        """Send ``value`` to the GUI thread as ``progress`` (pass as a routine's ``progress``)."""
        self._signals.progress.emit(value)

    def partial(self, value: Any) -> None:
        """Send an intermediate result to the GUI thread as ``partial``."""
        self._signals.partial.emit(value)


class Job:
    """Run one callable in a pool thread and report how it ended through :attr:`signals`.

    Create it in the GUI thread (its :class:`JobSignals` lives there). A runner starts it with
    ``QThreadPool.start(job.run)``: Qt's wrapper of that callable lets go of the job right after
    :meth:`run`. (The job is deliberately not a QRunnable: a Python QRunnable handed to a pool
    is owned by C++ from then on, and measured here about 1 in 70 of them was never released
    after the pool deleted it, keeping the job and all it references alive.) Whoever starts a
    job keeps a reference until its thread has left :meth:`run` (a :class:`BackgroundRunner`
    does), so the signals object is freed in the GUI thread. :meth:`run` may also be called
    directly (tests: signals then arrive through direct connections).

    Parameters
    ----------
    work : callable(JobContext) -> object, optional
        The work. Subclasses may override :meth:`execute` instead and leave it None.
    task : str, default "The task"
        Subject of the unexpected-error message ("The analysis").
    describe_error : callable(exception) -> str, optional
        Words for the expected errors; default :func:`plain_message`.

    Raises
    ------
    TypeError
        If ``work`` or ``describe_error`` is not callable, or ``task`` is not a str.
    """

    def __init__(self, work: Callable[[JobContext], Any] | None = None, *,
                 task: str = "The task",
                 describe_error: Callable[[BaseException], str] | None = None):
        if work is not None and not callable(work):
            raise TypeError(f"work must be callable, got {type(work).__name__}")
        if describe_error is not None and not callable(describe_error):
            raise TypeError(f"describe_error must be callable or None, got "
                            f"{type(describe_error).__name__}")
        if not isinstance(task, str):
            raise TypeError(f"task must be a str, got {type(task).__name__}")
        self.signals = JobSignals()
        self.task = task
        self._work = work
        self._describe = describe_error
        self._cancel = threading.Event()
        self._started = threading.Event()
        self._done = threading.Event()
        self._returned = threading.Event()
        #: ``threading.get_ident()`` of the thread that ran the job (None before).
        self.thread_ident: int | None = None

    # ----- the signals, reachable from the job ------------------------------------------------
    @property
    def progress(self):
        """``signals.progress``."""
        return self.signals.progress

    @property
    def partial(self):
        """``signals.partial``."""
        return self.signals.partial

    @property
    def finished(self):
        """``signals.finished``."""
        return self.signals.finished

    @property
    def failed(self):
        """``signals.failed``."""
        return self.signals.failed

    @property
    def cancelled(self):
        """``signals.cancelled``."""
        return self.signals.cancelled

    # ----- control and status (any thread) ----------------------------------------------------
    def cancel(self) -> None:
        """Ask the work to stop (thread-safe; the callable sees it through its context)."""
        self._cancel.set()

    def is_cancel_requested(self) -> bool:
        """Return True once :meth:`cancel` has been called."""
        return self._cancel.is_set()

    def has_started(self) -> bool:
        """Return True once :meth:`run` has begun."""
        return self._started.is_set()

    def is_done(self) -> bool:
        """Return True once the job has ended (set just before its last signal is emitted)."""
        return self._done.is_set()

    def has_returned(self) -> bool:
        """Return True once :meth:`run` has emitted its last signal and is returning."""
        return self._returned.is_set()

    def wait(self, timeout_ms: int = 5000) -> bool:
        """Block until the job has returned or ``timeout_ms`` passed; return True if it has."""
        return self._returned.wait(max(0, int(timeout_ms)) / 1000.0)

    # ----- the work ---------------------------------------------------------------------------
    def execute(self, context: JobContext) -> Any:
        """Do the work (in the pool thread); default: call ``work(context)``."""
        if self._work is None:
            raise NotImplementedError("Job needs a work callable or an execute() override")
        return self._work(context)

    def run(self) -> None:
        """Run the work and emit exactly one ending signal (called by the pool, or directly)."""
        self.thread_ident = threading.get_ident()
        self._started.set()
        signals = self.signals
        try:
            if self._cancel.is_set():
                self._end(signals.cancelled, None)
                return
            try:
                result = self.execute(JobContext(self._cancel, signals))
            except AnalysisCancelled:
                self._end(signals.cancelled, None)
            except Exception as exc:  # noqa: BLE001 - every failure becomes a message
                if not isinstance(exc, EXPECTED_ERRORS):
                    _log.error("%s stopped on an unexpected error", self.task, exc_info=exc)
                self._end(signals.failed, error_message(exc, self.task, self._describe))
            else:
                if isinstance(result, Stopped):
                    self._end(signals.cancelled, result.partial)
                else:
                    self._end(signals.finished, result)
        finally:
            if not self._done.is_set():   # only a BaseException (e.g. SystemExit) gets here
                self._done.set()
            self._returned.set()

    def _end(self, signal: Any, value: Any) -> None:
        self._done.set()
        signal.emit(value)


class BackgroundRunner(QObject):
    """Own a thread pool and its jobs; forward the signals of the active jobs to the GUI.

    Create and use it in the GUI thread. :meth:`start` runs a callable as a new job; by default
    the jobs still active are cancelled and retired first, so only the newest job's signals are
    forwarded (a result of a superseded request never arrives). With ``replace=False`` jobs run
    side by side (up to ``threads`` at once) and all are forwarded.

    Parameters
    ----------
    parent : QObject, optional
    threads : int, default 1
        Pool threads; with 1, jobs run one after the other.
    task : str, default "The task"
        Default subject of unexpected-error messages for :meth:`start`.
    describe_error : callable(exception) -> str, optional
        Default words for expected errors for :meth:`start`.

    Signals
    -------
    progress(object), partial(object), finished(object), failed(str), cancelled(object)
        As :class:`JobSignals`, from the active jobs only.
    runningChanged(bool)
        True when a job starts while none was running; False when the last active job ended or
        was abandoned (emitted before the job's ending signal is forwarded).
    """

    progress = Signal(object)
    partial = Signal(object)
    finished = Signal(object)
    failed = Signal(str)
    cancelled = Signal(object)
    runningChanged = Signal(bool)

    def __init__(self, parent: QObject | None = None, *, threads: int = 1,
                 task: str = "The task",
                 describe_error: Callable[[BaseException], str] | None = None):
        super().__init__(parent)
        if isinstance(threads, bool) or not isinstance(threads, int):
            raise TypeError(f"threads must be an integer, got {type(threads).__name__}")
        if threads < 1:
            raise ValueError(f"threads must be at least 1, got {threads}")
        self._pool = QThreadPool(self)
        self._pool.setMaxThreadCount(threads)
        self._task = task
        self._describe = describe_error
        self._active: list[Job] = []     # started, signals forwarded
        self._retired: list[Job] = []    # ended or superseded; kept until their thread left run()
        self._running = False
        self._closed = False

    # ----- status -------------------------------------------------------------------------------
    @property
    def pool(self) -> QThreadPool:
        """The runner's own thread pool."""
        return self._pool

    def is_running(self) -> bool:
        """Return True while an active job has not ended."""
        return any(not job.is_done() for job in self._active)

    # ----- control (GUI thread) ---------------------------------------------------------------
    def start(self, work: Callable[[JobContext], Any], *, task: str | None = None,
              describe_error: Callable[[BaseException], str] | None = None,
              replace: bool = True) -> Job:
        """Run ``work(context)`` as a new job.

        Parameters
        ----------
        work : callable(JobContext) -> object
        task, describe_error
            Override the runner's defaults for this job.
        replace : bool, default True
            Cancel and retire the active jobs first (their signals are no longer forwarded).

        Returns
        -------
        Job

        Raises
        ------
        TypeError
            If ``work`` is not callable.
        RuntimeError
            After :meth:`shutdown`.
        """
        job = Job(work, task=self._task if task is None else task,
                  describe_error=self._describe if describe_error is None else describe_error)
        return self.submit(job, replace=replace)

    def submit(self, job: Job, *, replace: bool = True) -> Job:
        """Run a ready-made :class:`Job` (e.g. a subclass); see :meth:`start`.

        Raises
        ------
        TypeError
            If ``job`` is not a Job.
        RuntimeError
            After :meth:`shutdown`, or when ``job`` was started before.
        """
        if not isinstance(job, Job):
            raise TypeError(f"job must be a Job, got {type(job).__name__}")
        if self._closed:
            raise RuntimeError("the background runner has been shut down; no new job starts")
        if job.has_started() or job in self._active or job in self._retired:
            raise RuntimeError("a job runs only once")
        if replace:
            self._retire_active()
        self._prune()
        signals = job.signals
        signals.progress.connect(self._on_progress)
        signals.partial.connect(self._on_partial)
        signals.finished.connect(self._on_finished)
        signals.failed.connect(self._on_failed)
        signals.cancelled.connect(self._on_cancelled)
        self._active.append(job)
        self._pool.start(job.run)
        self._set_running(True)
        return job

    def cancel(self) -> None:
        """Ask every active job to stop; their ending (often ``cancelled``) is still forwarded."""
        for job in self._active:
            job.cancel()

    def abandon(self) -> None:
        """Cancel the active jobs and stop forwarding their signals (a newer result replaces
        theirs)."""
        self._retire_active()
        self._set_running(False)

    def wait(self, timeout_ms: int = 5000) -> bool:
        """Wait at most ``timeout_ms`` until every job of this runner has returned.

        Returns
        -------
        bool
            True when no job is left running.
        """
        done = bool(self._pool.waitForDone(max(0, int(timeout_ms))))
        if done:
            self._prune()
        return done

    def shutdown(self, timeout_ms: int = 5000) -> bool:
        """Refuse new jobs, cancel every job and wait for them at most ``timeout_ms``.

        Returns
        -------
        bool
            True when no job is left running.
        """
        self._closed = True
        for job in (*self._active, *self._retired):
            job.cancel()
        done = self.wait(timeout_ms)
        if not done:
            _log.warning("%s: background work did not stop within %d ms", self._task,
                         timeout_ms)
        return done

    # ----- bookkeeping ----------------------------------------------------------------------------
    def _retire_active(self) -> None:
        for job in self._active:
            job.cancel()
        self._retired.extend(self._active)
        self._active = []

    def _prune(self) -> None:
        # A job is let go (and its signals object freed, here in the GUI thread) only once its
        # thread has left run(): the pool is idle, or that thread has started a later job.
        if not self._retired:
            return
        idle = self._pool.activeThreadCount() == 0
        later_threads = {job.thread_ident for job in self._active if job.has_started()}
        keep = []
        for i, job in enumerate(self._retired):
            later = later_threads | {j.thread_ident for j in self._retired[i + 1:]
                                     if j.has_started()}
            if job.has_returned() and (idle or job.thread_ident in later):
                continue
            keep.append(job)
        self._retired = keep

    def _set_running(self, running: bool) -> None:
        if running != self._running:
            self._running = running
            self.runningChanged.emit(running)

    def _active_sender(self) -> Job | None:
        sender = self.sender()
        for job in self._active:
            if job.signals is sender:
                return job
        return None

    def _ended(self) -> bool:
        """Retire the sending job if it is active; return whether its ending is forwarded."""
        job = self._active_sender()
        if job is None:
            return False
        self._active.remove(job)
        self._retired.append(job)
        if not self.is_running():
            self._set_running(False)
        self._prune()
        return True

    # ----- forwarding (GUI thread) --------------------------------------------------------------
    @Slot(object)
    def _on_progress(self, value: Any) -> None:
        if self._active_sender() is not None:
            self.progress.emit(value)

    @Slot(object)
    def _on_partial(self, value: Any) -> None:
        if self._active_sender() is not None:
            self.partial.emit(value)

    @Slot(object)
    def _on_finished(self, result: Any) -> None:
        if self._ended():
            self.finished.emit(result)

    @Slot(str)
    def _on_failed(self, message: str) -> None:
        if self._ended():
            self.failed.emit(message)

    @Slot(object)
    def _on_cancelled(self, partial: Any) -> None:
        if self._ended():
            self.cancelled.emit(partial)
