"""The analysis worker and its thread: completion, failure, cancel, throttling, clean-up."""

from __future__ import annotations

import gc
import logging
import threading
import time
import weakref
from types import SimpleNamespace

import numpy as np
import pytest
from PIL import Image

from modescope.app.desktop.workers.analysis import AnalysisRunner, AnalysisWorker, error_message
from modescope.core.output import model_file
from modescope.core.engine import pipeline
from modescope.core.errors import NoUsableImagesError, SourceError

TIMEOUT = 60000


def _gray_matrix(folder) -> np.ndarray:
    """The collection as a (pixels, n) matrix read with Pillow directly (outside the reader).

    Gray is ITU-R BT.601 luma 0.299 R + 0.587 G + 0.114 B of the 8-bit values / 255, the rule
    stated in core/reader.py.
    """
    cols = []
    for path in sorted(folder.glob("*.png")):
        rgb = np.asarray(Image.open(path).convert("RGB"), dtype=np.float64) / 255.0
        cols.append((rgb @ np.array([0.299, 0.587, 0.114])).ravel())
    return np.stack(cols, axis=1)


@pytest.fixture
def runner():
    r = AnalysisRunner()
    yield r
    assert r.shutdown(10000)


def test_run_completes_with_progress_and_partials(qtbot, runner, small_collection):
    progress, partials = [], []
    runner.progress.connect(progress.append)
    runner.partial.connect(partials.append)
    options = pipeline.AnalysisOptions(rank=5, block_size=8)
    with qtbot.waitSignal(runner.finished, timeout=TIMEOUT) as blocker:
        runner.start([str(small_collection)], options)
        assert runner.is_running()
    result = blocker.args[0]
    assert not runner.is_running()
    d = result.decomposition
    assert d.exact and d.n_images == 40 and d.rank == 5
    assert tuple(d.image_shape) == (48, 64, 1)
    # singular values against LAPACK on the same data read by Pillow
    x = _gray_matrix(small_collection)
    s_ref = np.linalg.svd(x - x.mean(axis=1, keepdims=True), compute_uv=False)[:5]
    np.testing.assert_allclose(d.singular_values, s_ref, rtol=2e-3)
    assert {p.stage for p in progress} >= {"learn", "score"}
    learn = [p for p in progress if p.stage == "learn"]
    assert learn[-1].done == learn[-1].total == 40
    assert partials, "no streaming snapshot reached the GUI thread"
    assert all(not p.exact for p in partials)
    assert [p.n_images for p in partials] == sorted(p.n_images for p in partials)


def test_signals_arrive_in_gui_thread(qtbot, runner, small_collection):
    seen = []

    def note(_):
        seen.append(threading.current_thread() is threading.main_thread())

    runner.progress.connect(note)
    with qtbot.waitSignal(runner.finished, timeout=TIMEOUT):
        worker = runner.start([str(small_collection)],
                              pipeline.AnalysisOptions(rank=3, block_size=16))
    assert seen and all(seen)
    assert worker.thread_ident not in (None, threading.main_thread().ident)   # a pool thread


def test_broken_source_fails_with_file_named(qtbot, runner, broken_folder):
    with qtbot.waitSignal(runner.failed, timeout=TIMEOUT) as blocker:
        runner.start([str(broken_folder)], pipeline.AnalysisOptions(rank=3))
    message = blocker.args[0]
    assert str(broken_folder) in message or "frame_0.png" in message
    assert "Traceback" not in message
    assert not runner.is_running()


def test_cancel_from_partial_keeps_usable_model(qtbot, runner, small_collection, tmp_path):
    def slow_analyze(sources, options, *, progress, cancel, on_partial):
        # the real pipeline, with a pause after each snapshot so that the cancel request sent
        # from the GUI thread arrives while blocks are still left
        def slow_partial(d):
            on_partial(d)
            time.sleep(0.08)
        return pipeline.analyze(sources, options, progress=progress, cancel=cancel,
                                on_partial=slow_partial)

    r = AnalysisRunner(analyze=slow_analyze, partial_interval=0.0)
    try:
        r.partial.connect(lambda _d: r.cancel())
        with qtbot.waitSignal(r.cancelled, timeout=TIMEOUT) as blocker:
            r.start([str(small_collection)], pipeline.AnalysisOptions(rank=4, block_size=4))
        result = blocker.args[0]
        assert result.cancelled
        d = result.decomposition
        assert d is not None and 0 < d.n_images < 40
        assert len(d.paths) == d.n_images
        # usable: a reconstruction at every rank has the image's size
        assert d.reconstruct(0, d.rank).shape == (48 * 64,)
        saved = model_file.save_model(tmp_path / "partial.npz", d)
        back = model_file.load_model(saved)
        np.testing.assert_array_equal(back.basis, d.basis)
        np.testing.assert_array_equal(back.weights, d.weights)
        np.testing.assert_array_equal(back.mean, d.mean)
        assert back.paths == d.paths
    finally:
        assert r.shutdown(10000)


def test_new_run_replaces_old_one(qtbot, runner, small_collection):
    finished = []
    runner.finished.connect(finished.append)
    first = runner.start([str(small_collection)], pipeline.AnalysisOptions(rank=2))
    second_options = pipeline.AnalysisOptions(rank=3)
    with qtbot.waitSignal(runner.finished, timeout=TIMEOUT):
        second = runner.start([str(small_collection)], second_options)
    assert first.is_cancel_requested()
    qtbot.wait(50)
    assert [f.decomposition.rank for f in finished] == [3]
    assert runner.worker is second


def _fake_analyze_factory(n_partials: int, *, raise_exc=None):
    """A stand-in for pipeline.analyze that sends snapshots as fast as it can.

    ``fake.taken`` lists the snapshots whose ``on_partial`` call returned (the worker took them).
    """

    def fake(sources, options, *, progress, cancel, on_partial):
        progress(SimpleNamespace(stage="learn", done=0, total=n_partials, elapsed=0.0,
                                 rate=0.0, seconds_left=None))
        for i in range(n_partials):
            on_partial(("snapshot", i))
            fake.taken.append(i)
        if raise_exc is not None:
            raise raise_exc
        progress(SimpleNamespace(stage="score", done=0, total=n_partials, elapsed=0.0,
                                 rate=0.0, seconds_left=None))
        return SimpleNamespace(decomposition=None, cancelled=False, problems=())

    fake.taken = []
    return fake


def test_partials_throttled_and_last_one_sent(qtbot):
    fake = _fake_analyze_factory(200)
    worker = AnalysisWorker(["x"], None, analyze=fake, partial_interval=10.0)
    sent, done = [], []
    worker.partial.connect(sent.append)
    worker.finished.connect(done.append)
    worker.run()          # in this thread: direct connections
    assert fake.taken == list(range(200))        # every snapshot was handed to the worker
    assert sent == [("snapshot", 0), ("snapshot", 199)]
    assert len(done) == 1


def test_unexpected_error_becomes_a_message(qtbot, caplog):
    worker = AnalysisWorker(["x"], None,
                            analyze=_fake_analyze_factory(1, raise_exc=RuntimeError("boom")))
    messages, partials = [], []
    worker.failed.connect(messages.append)
    worker.partial.connect(partials.append)
    with caplog.at_level(logging.ERROR):
        worker.run()
    assert messages == ["The analysis stopped on an unexpected error (RuntimeError: boom; "
                        "details in the log)"]
    # the traceback is in the log
    [record] = caplog.records
    assert record.exc_info[0] is RuntimeError
    assert partials == [("snapshot", 0)]          # a failed run sends no pending snapshot


def test_expected_error_is_not_logged(qtbot, caplog):
    worker = AnalysisWorker(["x"], None, analyze=_fake_analyze_factory(
        1, raise_exc=SourceError("/data/f.png: cannot be decoded")))
    messages = []
    worker.failed.connect(messages.append)
    with caplog.at_level(logging.ERROR):
        worker.run()
    assert messages == ["/data/f.png: cannot be decoded"]
    assert not caplog.records


@pytest.mark.parametrize("exc, expected", [
    (SourceError("/data/f.png: the source file is missing"), "/data/f.png: the source file"),
    (NoUsableImagesError("no usable image in '/data'"), "no usable image in '/data'"),
    (FileNotFoundError(2, "No such file or directory", "/data/g.png"), "/data/g.png"),
    (MemoryError(), "not enough memory for this analysis"),
    (RuntimeError("bug"), "unexpected error (RuntimeError: bug; details in the log)"),
])
def test_error_messages_name_the_file(exc, expected):
    text = error_message(exc)
    assert expected in text
    assert "Traceback" not in text


def test_cancel_before_start_emits_cancelled(qtbot):
    calls = []
    worker = AnalysisWorker(["x"], None, analyze=lambda *a, **k: calls.append(1))
    got = []
    worker.cancelled.connect(got.append)
    worker.cancel()
    worker.run()
    assert got == [None] and calls == []


def test_worker_rejects_bad_arguments():
    with pytest.raises(TypeError, match="analyze"):
        AnalysisWorker([], None, analyze=42)
    with pytest.raises(ValueError, match="partial_interval"):
        AnalysisWorker([], None, partial_interval=-1)


def test_runner_and_worker_freed_after_shutdown(qtbot, small_collection):
    r = AnalysisRunner()
    with qtbot.waitSignal(r.finished, timeout=TIMEOUT):
        worker = r.start([str(small_collection)], pipeline.AnalysisOptions(rank=2))
    pool = r.pool
    worker_ref = weakref.ref(worker)
    runner_ref = weakref.ref(r)
    del worker
    assert r.shutdown(10000)
    assert pool.activeThreadCount() == 0
    assert not r.is_running()
    del r, pool
    gc.collect()
    qtbot.wait(10)
    gc.collect()
    assert runner_ref() is None
    assert worker_ref() is None


def test_analysis_runs_off_the_gui_thread(qtbot, runner):
    where = []

    def fake(sources, options, *, progress, cancel, on_partial):
        where.append(threading.current_thread() is threading.main_thread())
        return SimpleNamespace(decomposition=None, cancelled=False, problems=())

    runner._analyze = fake
    with qtbot.waitSignal(runner.finished, timeout=TIMEOUT):
        worker = runner.start(["x"], None)
    assert where == [False]
    # the worker never moves between threads (no moveToThread from the pool thread: see
    # workers/background.py); it is only a job the pool thread ran
    assert worker.is_done() and worker.has_started()
    assert runner.wait(TIMEOUT) and worker.has_returned()


def test_scan_progress_is_thinned_but_ends_complete(qtbot):
    # the scan reports every file; the GUI gets a few signals, always the first and the last
    def fake(sources, options, *, progress, cancel, on_partial):
        for done in range(1, 5001):
            progress(SimpleNamespace(stage="scan", done=done, total=5000, elapsed=0.0,
                                     rate=0.0, seconds_left=None))
        progress(SimpleNamespace(stage="learn", done=10, total=10, elapsed=0.0, rate=0.0,
                                 seconds_left=None))
        return SimpleNamespace(cancelled=False, decomposition=None)

    worker = AnalysisWorker(["x"], None, analyze=fake)
    seen = []
    worker.progress.connect(seen.append)
    worker.run()
    scan = [p.done for p in seen if p.stage == "scan"]
    assert scan[0] == 1 and scan[-1] == 5000
    assert len(scan) < 100                           # 5,000 calls in well under 5 s
    assert [p.stage for p in seen][-1] == "learn"     # other stages pass unchanged


def test_finished_workers_are_let_go(qtbot, runner):
    # a finished worker is let go once the pool thread has left it (here: the pool is idle)
    def fake(sources, options, *, progress, cancel, on_partial):
        return SimpleNamespace(decomposition=None, cancelled=False, problems=())

    runner._analyze = fake
    refs = []
    for sources in (["x"], ["y"], ["z"]):
        with qtbot.waitSignal(runner.finished, timeout=TIMEOUT):
            refs.append(weakref.ref(runner.start(sources, None)))
    assert runner.wait(TIMEOUT)
    gc.collect()
    assert [r() is None for r in refs] == [True, True, False]    # the runner keeps the last
    assert runner.worker is refs[2]()


def test_cancel_of_a_running_analysis_keeps_its_partial(qtbot, runner):
    # pipeline stand-in: snapshots until asked to stop, then the partial result
    def fake(sources, options, *, progress, cancel, on_partial):
        i = 0
        while i < 3 or not cancel():       # at least one snapshot is pending when it stops
            on_partial(("snapshot", i))
            i += 1
            time.sleep(0.005)
        return SimpleNamespace(decomposition=("snapshot", i - 1), cancelled=True, problems=())

    runner._analyze = fake
    runner._interval = 10.0          # only the first snapshot and the flushed last one are sent
    partials = []
    runner.partial.connect(partials.append)
    with qtbot.waitSignal(runner.partial, timeout=TIMEOUT):
        runner.start(["x"], None)
    with qtbot.waitSignal(runner.cancelled, timeout=TIMEOUT) as blocker:
        runner.cancel()
    result = blocker.args[0]
    assert result.cancelled and partials[0] == ("snapshot", 0)
    assert partials[-1] == result.decomposition and len(partials) == 2
