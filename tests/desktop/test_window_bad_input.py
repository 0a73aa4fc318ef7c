"""Bad input through the workbench's worker: a damaged image, a file that vanishes after the
scan, an empty folder. Each run ends with a message in the window and no traceback; a run that
yields nothing leaves the previous analysis (and its review marks) shown."""

from __future__ import annotations

import logging

import numpy as np
import pytest
from PySide6.QtWidgets import QMessageBox

from modescope.app.desktop.main_window import MainWindow
from modescope.app.desktop.settings import StoredOptions
from modescope.core import demo
from modescope.core.engine import pipeline
from modescope.core.review import marks as review

TIMEOUT = 60000


@pytest.fixture
def vanishing(monkeypatch):
    """Files to delete when the scan has reported its last file (before any is decoded)."""
    doomed: list = []
    real = pipeline.analyze

    def analyze(sources, options, *, progress, **kwargs):
        def report(p):
            if p.stage == "scan" and p.done >= p.total:
                for path in doomed:
                    path.unlink()
            progress(p)
        return real(sources, options, progress=report, **kwargs)
    monkeypatch.setattr(pipeline, "analyze", analyze)     # the worker looks it up per run
    return doomed


@pytest.fixture
def window(qtbot, ini_settings, monkeypatch):
    answers = []
    monkeypatch.setattr(QMessageBox, "question", staticmethod(
        lambda *a, **k: answers.pop(0) if answers else QMessageBox.StandardButton.Discard))
    w = MainWindow(ini_settings)
    w.answers = answers
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    yield w
    w.close()


@pytest.fixture
def reviewed(qtbot, window, small_collection):
    """The window after a run over the small collection, with two images marked."""
    with qtbot.waitSignal(window.runner.finished, timeout=TIMEOUT):
        assert window.start_analysis([str(small_collection)], StoredOptions(rank=3))
    window.state.set_marks([3, 7], review.EXCLUDE)
    return window


def _frames(folder, n):
    demo.write_collection(folder, n, size=(24, 32), seed=5, fmt="png")
    return sorted(folder.glob("*.png"))


def _no_traceback_logged(caplog):
    for record in caplog.records:
        assert record.exc_info is None, record.getMessage()
        assert "Traceback" not in record.getMessage()


def _fails_and_keeps_previous(qtbot, w, folder, caplog, *named):
    before = w.state.decomposition
    title = w.windowTitle()
    w.answers[:] = [QMessageBox.StandardButton.Discard]   # the marks question of the start
    with caplog.at_level(logging.WARNING), \
            qtbot.waitSignal(w.runner.failed, timeout=TIMEOUT) as blocker:
        assert w.start_analysis([str(folder)], StoredOptions(rank=3))
    qtbot.wait(20)
    message = blocker.args[0]
    box = w.message_box
    assert isinstance(box, QMessageBox) and box.isVisible()
    assert box.text() == message and "Traceback" not in message
    for word in named:
        assert word in message
    assert w.statusBar().currentMessage() == "The analysis failed."
    _no_traceback_logged(caplog)
    # the previous analysis is shown again, with its marks, their history and its title
    assert w.state.decomposition is before
    np.testing.assert_array_equal(np.flatnonzero(w.state.decomposition.marks), [3, 7])
    assert w.state.marks_modified and w.state.can_undo
    assert w.windowTitle() == title
    assert w.views["imagesDock"].model.rowCount() == before.n_images
    assert w.ingest.start_button.isEnabled()
    box.close()
    return message


def test_damaged_image_is_skipped_and_named(qtbot, reviewed, tmp_path, caplog):
    w = reviewed
    files = _frames(tmp_path / "damaged", 12)
    data = files[5].read_bytes()
    files[5].write_bytes(data[: len(data) // 2])       # the header reads, the pixels do not
    w.answers[:] = [QMessageBox.StandardButton.Discard]
    with caplog.at_level(logging.WARNING), \
            qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT) as blocker:
        assert w.start_analysis([str(tmp_path / "damaged")], StoredOptions(rank=3))
    qtbot.wait(20)
    d = blocker.args[0].decomposition
    assert d.n_images == 11 and files[5].as_posix() not in d.paths
    assert w.state.decomposition is d
    status = w.statusBar().currentMessage()
    assert status.startswith("Analysis finished: 11 images") and "1 skipped" in status
    table = w.ingest.problem_table
    assert table.rowCount() == 1 and table.item(0, 0).text() == files[5].name
    assert "truncated" in table.item(0, 1).text() and "Traceback" not in table.item(0, 1).text()
    assert w.message_box is None
    _no_traceback_logged(caplog)


def test_only_damaged_images_fail_and_keep_the_previous_analysis(qtbot, reviewed, tmp_path,
                                                                 caplog):
    files = _frames(tmp_path / "allbad", 3)
    for f in files:
        data = f.read_bytes()
        f.write_bytes(data[: len(data) // 2])
    _fails_and_keeps_previous(qtbot, reviewed, tmp_path / "allbad", caplog, files[0].name)


def test_file_vanishing_after_the_scan_is_skipped(qtbot, reviewed, tmp_path, vanishing, caplog):
    w = reviewed
    files = _frames(tmp_path / "vanish", 12)
    vanishing.append(files[-1])
    w.answers[:] = [QMessageBox.StandardButton.Discard]
    with caplog.at_level(logging.WARNING), \
            qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT) as blocker:
        assert w.start_analysis([str(tmp_path / "vanish")], StoredOptions(rank=3))
    qtbot.wait(20)
    assert not files[-1].exists()
    d = blocker.args[0].decomposition
    assert d.n_images == 11 and str(files[-1]) not in d.paths
    assert "1 skipped" in w.statusBar().currentMessage()
    table = w.ingest.problem_table
    assert [table.item(r, 0).text() for r in range(table.rowCount())] == [files[-1].name]
    assert "No such file" in table.item(0, 1).text()
    _no_traceback_logged(caplog)


def test_every_file_vanishing_fails_and_keeps_the_previous_analysis(qtbot, reviewed, tmp_path,
                                                                    vanishing, caplog):
    files = _frames(tmp_path / "gone", 3)
    vanishing.extend(files)
    _fails_and_keeps_previous(qtbot, reviewed, tmp_path / "gone", caplog, files[0].name,
                              "No such file")
    assert not any(f.exists() for f in files)


def test_empty_folder_fails_and_keeps_the_previous_analysis(qtbot, reviewed, tmp_path, caplog,
                                                            small_collection):
    empty = tmp_path / "empty"
    empty.mkdir()
    message = _fails_and_keeps_previous(qtbot, reviewed, empty, caplog, str(empty))
    assert "no usable image" in message
    # and the window still works
    reviewed.answers[:] = [QMessageBox.StandardButton.Discard]
    with qtbot.waitSignal(reviewed.runner.finished, timeout=TIMEOUT) as blocker:
        assert reviewed.start_analysis([str(small_collection)], StoredOptions(rank=2))
    assert reviewed.state.decomposition is blocker.args[0].decomposition
    assert not reviewed.state.marks_modified
