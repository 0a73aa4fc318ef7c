"""The one background-work pattern: jobs in a pool, their signals, cancel, errors, shutdown."""

from __future__ import annotations

import gc
import logging
import threading
import time
import weakref

import pytest

from modescope.app.desktop.workers.background import (BackgroundRunner, Job, JobContext,
                                                      Stopped, error_message, plain_message)
from modescope.core.errors import AnalysisCancelled, SourceError

TIMEOUT = 10000


@pytest.fixture
def runner(qtbot):
    r = BackgroundRunner(task="The test work")
    yield r
    assert r.shutdown(TIMEOUT)


def test_result_and_progress_arrive_in_gui_thread(qtbot, runner):
    where, seen, partials = [], [], []

    def work(ctx: JobContext):
        where.append(threading.current_thread() is threading.main_thread())
        for i in range(3):
            ctx.progress(i)
        ctx.partial("half")
        return 6 * 7

    def note(value):
        seen.append((value, threading.current_thread() is threading.main_thread()))

    runner.progress.connect(note)
    runner.partial.connect(partials.append)
    with qtbot.waitSignal(runner.finished, timeout=TIMEOUT) as blocker:
        job = runner.start(work)
        assert runner.is_running()
    assert blocker.args == [42]
    assert where == [False]                             # the work ran in a pool thread
    assert seen == [(0, True), (1, True), (2, True)]    # delivered in the GUI thread, in order
    assert partials == ["half"]
    assert job.is_done() and not runner.is_running()
    assert runner.wait(TIMEOUT) and job.has_returned()


def test_cancel_reaches_the_work_and_keeps_the_partial(qtbot, runner):
    started = threading.Event()

    def work(ctx):
        started.set()
        n = 0
        while not ctx.cancelled():
            n += 1
            time.sleep(0.002)
        return Stopped(("partial", n > 0))

    with qtbot.waitSignal(runner.cancelled, timeout=TIMEOUT) as blocker:
        runner.start(work)
        assert started.wait(5)
        runner.cancel()
    assert blocker.args == [("partial", True)]
    assert not runner.is_running()


def test_core_cancellation_is_a_cancel_without_partial(qtbot, runner):
    def work(ctx):
        raise AnalysisCancelled("stopped")

    with qtbot.waitSignal(runner.cancelled, timeout=TIMEOUT) as blocker:
        runner.start(work)
    assert blocker.args == [None]


def test_cancel_before_start_does_not_run_the_work(qtbot):
    calls, got = [], []
    job = Job(lambda ctx: calls.append(1))
    job.cancelled.connect(got.append)
    job.cancel()
    job.run()                                       # in this thread: direct connections
    assert got == [None] and calls == []
    assert job.is_done() and job.has_returned()


@pytest.mark.parametrize("exc, expected", [
    (SourceError("/data/f.png: cannot be decoded"), "/data/f.png: cannot be decoded"),
    (FileNotFoundError(2, "No such file or directory", "/data/g.png"),
     "A file could not be read (/data/g.png): No such file or directory"),
    (MemoryError(), "There is not enough memory: the test work stopped."),
])
def test_expected_errors_are_plain_messages_not_logged(qtbot, runner, caplog, exc, expected):
    def work(ctx):
        raise exc

    with caplog.at_level(logging.ERROR):
        with qtbot.waitSignal(runner.failed, timeout=TIMEOUT) as blocker:
            runner.start(work)
    assert blocker.args == [expected]
    assert not caplog.records


def test_unexpected_error_is_logged_with_traceback_and_shown(qtbot, runner, caplog):
    def work(ctx):
        raise KeyError("boom")

    with caplog.at_level(logging.ERROR):
        with qtbot.waitSignal(runner.failed, timeout=TIMEOUT) as blocker:
            runner.start(work)
    assert blocker.args == ["The test work stopped on an unexpected error "
                            "(KeyError: 'boom'; details in the log)"]
    [record] = caplog.records
    assert record.exc_info is not None and record.exc_info[0] is KeyError
    assert "The test work" in record.getMessage()


def test_error_words_per_task():
    exc = SourceError("bad.png: damaged")
    assert error_message(exc, "The scan") == "bad.png: damaged"
    assert error_message(exc, "The scan", lambda e: f"Scan: {e}") == "Scan: bad.png: damaged"
    # the task's own words never hide a bug
    assert error_message(ValueError("x"), "The scan", lambda e: "hidden").startswith(
        "The scan stopped on an unexpected error (ValueError: x;")
    assert plain_message(MemoryError(), "The analysis") == \
        "There is not enough memory: the analysis stopped."


def test_new_job_supersedes_the_old_one(qtbot, runner):
    gate = threading.Event()
    finished = []
    runner.finished.connect(finished.append)

    def slow(ctx):
        gate.wait(5)
        return "old"

    first = runner.start(slow)
    second = runner.start(lambda ctx: "new")
    assert first.is_cancel_requested() and not second.is_cancel_requested()
    gate.set()
    qtbot.waitUntil(lambda: second.is_done(), timeout=TIMEOUT)
    assert runner.wait(TIMEOUT)
    qtbot.wait(20)                                    # let queued signals arrive
    assert finished == ["new"]                        # the superseded result never arrives


def test_side_by_side_jobs_are_all_forwarded(qtbot):
    r = BackgroundRunner(threads=2)
    got = []
    r.finished.connect(got.append)
    try:
        for i in range(4):
            r.start(lambda ctx, i=i: i * i, replace=False)
        qtbot.waitUntil(lambda: len(got) == 4, timeout=TIMEOUT)
        assert sorted(got) == [0, 1, 4, 9]
    finally:
        assert r.shutdown(TIMEOUT)


def test_running_changed_once_per_run(qtbot, runner):
    seen = []
    runner.runningChanged.connect(seen.append)
    with qtbot.waitSignal(runner.finished, timeout=TIMEOUT):
        runner.start(lambda ctx: 1)
    assert seen == [True, False]
    runner.start(lambda ctx: time.sleep(0.05))
    runner.abandon()
    assert seen == [True, False, True, False]


def test_shutdown_cancels_waits_and_refuses_new_jobs(qtbot):
    r = BackgroundRunner()
    started = threading.Event()

    def forever(ctx):
        started.set()
        while not ctx.cancelled():
            time.sleep(0.002)
        return Stopped()

    job = r.start(forever)
    assert started.wait(5)
    t0 = time.monotonic()
    assert r.shutdown(TIMEOUT)
    assert time.monotonic() - t0 < 2.0
    assert job.has_returned() and r.pool.activeThreadCount() == 0
    with pytest.raises(RuntimeError, match="shut down"):     # closed: no new job starts
        r.start(lambda ctx: None)


def test_shutdown_reports_work_that_does_not_stop(qtbot, caplog):
    r = BackgroundRunner(task="The stubborn work")
    gate = threading.Event()
    started = threading.Event()

    def stubborn(ctx):
        started.set()
        gate.wait(10)

    r.start(stubborn)
    assert started.wait(5)
    with caplog.at_level(logging.WARNING):
        assert r.shutdown(50) is False
    assert "did not stop within 50 ms" in caplog.text
    gate.set()
    assert r.wait(TIMEOUT)


def test_jobs_and_signals_are_freed(qtbot):
    r = BackgroundRunner()
    refs = []
    for i in range(30):             # a leak of 1 job in 70 (seen with QRunnable jobs) shows up
        with qtbot.waitSignal(r.finished, timeout=TIMEOUT):
            job = r.start(lambda ctx: i)
        refs.append((weakref.ref(job), weakref.ref(job.signals)))
        del job
    assert r.shutdown(TIMEOUT)
    runner_ref = weakref.ref(r)
    del r
    gc.collect()
    assert runner_ref() is None
    assert [(a() is None, b() is None) for a, b in refs] == [(True, True)] * 30


def test_bad_arguments():
    with pytest.raises(TypeError, match="work"):
        Job(42)
    with pytest.raises(TypeError, match="describe_error"):
        Job(lambda ctx: 1, describe_error="words")
    with pytest.raises(ValueError, match="threads"):
        BackgroundRunner(threads=0)
    r = BackgroundRunner()
    with pytest.raises(TypeError, match="job must be a Job"):
        r.submit(lambda ctx: 1)
    assert r.shutdown(1000)
