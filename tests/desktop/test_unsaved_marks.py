"""Review work is safe: undo/redo of marks, and the question before marks are thrown away."""

from __future__ import annotations

import numpy as np
import pytest
from PySide6.QtCore import Qt
from PySide6.QtWidgets import QFileDialog, QMessageBox

from modescope.app.desktop.main_window import MainWindow
from modescope.app.desktop.settings import StoredOptions
from modescope.app.desktop.state import AppState
from modescope.core.output import model_file
from modescope.core.review import marks as review

TIMEOUT = 60000
B = QMessageBox.StandardButton


class _Answers:
    """Stands in for QMessageBox.question: gives the queued answers and records each text."""

    def __init__(self):
        self.queue: list = []
        self.asked: list[str] = []

    def __call__(self, parent, title, text, *args, **kwargs):
        self.asked.append(f"{title}: {text}")
        return self.queue.pop(0) if self.queue else B.Discard


@pytest.fixture
def answers(monkeypatch):
    a = _Answers()
    monkeypatch.setattr(QMessageBox, "question", staticmethod(a))
    return a


@pytest.fixture
def window(qtbot, ini_settings, answers):
    w = MainWindow(ini_settings)          # questions are asked (answered by ``answers``)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    yield w
    answers.queue[:] = [B.Discard]        # the window closes at the end whatever is left
    w.close()


@pytest.fixture
def opened(window, gray_decomposition, tmp_path):
    """The window showing ``gray_decomposition`` opened from a file."""
    path = model_file.save_model(tmp_path / "opened.npz", gray_decomposition)
    assert window.open_analysis(str(path))
    return window, path


def _save_as(monkeypatch, path):
    calls = []

    def get_save(*args, **kwargs):
        calls.append(args)
        return str(path), ""
    monkeypatch.setattr(QFileDialog, "getSaveFileName", staticmethod(get_save))
    return calls


# ----- the state's history -------------------------------------------------------------------
def test_undo_redo_restore_exact_marks(qtbot, gray_decomposition):
    s = AppState()
    s.set_decomposition(gray_decomposition)
    assert not s.can_undo and not s.can_redo and not s.marks_modified
    history = [s.decomposition.marks.copy()]
    s.set_marks([1, 2], review.EXCLUDE)
    history.append(s.decomposition.marks.copy())
    s.set_marks([2, 5], review.KEEP)
    history.append(s.decomposition.marks.copy())
    s.set_marks([2, 5], review.KEEP)                 # no change: no step
    s.set_marks([1], review.NOT_REVIEWED)
    history.append(s.decomposition.marks.copy())
    np.testing.assert_array_equal(history[-1], [0, 0, 1, 0, 0, 1, 0, 0])
    assert s.marks_modified and s.can_undo

    for expected in reversed(history[:-1]):           # undo, one step at a time
        with qtbot.waitSignal(s.marksChanged) as blocker:
            assert s.undo_marks()
        np.testing.assert_array_equal(s.decomposition.marks, expected)
        assert s.decomposition.marks.dtype == np.int8
    assert blocker.args == [(1, 2)]                  # the images of the step taken back
    assert not s.undo_marks() and not s.can_undo
    assert not s.marks_modified                      # back to the marks it was opened with
    for expected in history[1:]:                     # and redo
        assert s.redo_marks()
        np.testing.assert_array_equal(s.decomposition.marks, expected)
    assert not s.redo_marks()

    s.undo_marks()                                   # image 1 excluded again
    s.set_marks([7], review.EXCLUDE)                 # a new change drops the redo steps
    assert not s.can_redo
    np.testing.assert_array_equal(s.decomposition.marks, [0, 2, 1, 0, 0, 1, 0, 2])


def test_saved_marks_and_a_new_analysis_start_a_clean_page(qtbot, gray_decomposition):
    s = AppState()
    s.set_decomposition(gray_decomposition)
    s.set_marks([3], review.EXCLUDE)
    with qtbot.waitSignal(s.marksHistoryChanged):
        s.marks_saved()
    assert not s.marks_modified and s.can_undo        # saving keeps the history
    s.undo_marks()
    assert s.marks_modified                          # differs from what was saved
    s.redo_marks()
    assert not s.marks_modified
    snap = s.snapshot()
    s.set_decomposition(gray_decomposition.replace(marks=np.full(8, 2, np.int8)))
    assert not s.marks_modified and not s.can_undo   # a new analysis: its own marks, no history
    s.set_decomposition(None)
    assert not s.marks_modified
    s.restore(snap)
    np.testing.assert_array_equal(s.decomposition.marks, [0, 0, 0, 2, 0, 0, 0, 0])
    assert s.can_undo and not s.marks_modified
    s.undo_marks()
    np.testing.assert_array_equal(s.decomposition.marks, np.zeros(8))
    with pytest.raises(TypeError, match="snapshot must be a ReviewSnapshot"):
        s.restore(gray_decomposition)


def test_undo_keys_and_review_menu(qtbot, opened):
    w, _ = opened
    assert not w.undo_marks_action.isEnabled() and not w.redo_marks_action.isEnabled()
    texts = [a.text() for a in w.review_menu.actions()]
    assert texts[:2] == ["&Undo mark", "&Redo mark"]
    assert w.undo_marks_action.shortcut().toString() == "Ctrl+Z"
    assert w.redo_marks_action.shortcut().toString() == "Ctrl+Shift+Z"
    w.state.set_marks([0, 4], review.EXCLUDE)
    assert w.undo_marks_action.isEnabled()
    w.inspector.setFocus()
    qtbot.keyClick(w, Qt.Key.Key_Z, Qt.KeyboardModifier.ControlModifier)
    np.testing.assert_array_equal(w.state.decomposition.marks, np.zeros(8))
    assert w.redo_marks_action.isEnabled() and not w.undo_marks_action.isEnabled()
    qtbot.keyClick(w, Qt.Key.Key_Z, Qt.KeyboardModifier.ControlModifier
                   | Qt.KeyboardModifier.ShiftModifier)
    np.testing.assert_array_equal(w.state.decomposition.marks, [2, 0, 0, 0, 2, 0, 0, 0])
    w.undo_marks_action.trigger()                     # the menu entry does the same
    np.testing.assert_array_equal(w.state.decomposition.marks, np.zeros(8))
    assert "undone" in w.statusBar().currentMessage()


# ----- the question --------------------------------------------------------------------------
def test_no_question_without_unsaved_marks(qtbot, opened, answers, tmp_path,
                                           gray_decomposition):
    w, path = opened
    other = model_file.save_model(tmp_path / "other.npz", gray_decomposition)
    assert w.open_analysis(str(other))
    w.state.set_marks([1], review.KEEP)
    w.state.undo_marks()                               # back to the saved marks
    assert w.open_analysis(str(path))
    assert answers.asked == []


def test_cancel_keeps_marks_on_open_start_refit_and_quit(qtbot, opened, answers, tmp_path,
                                                         gray_decomposition, small_collection):
    w, path = opened
    w.state.set_marks([2, 6], review.EXCLUDE)
    marked = w.state.decomposition
    other = model_file.save_model(tmp_path / "other.npz", gray_decomposition)
    answers.queue[:] = [B.Cancel] * 4
    assert not w.open_analysis(str(other))
    assert not w.start_analysis([str(small_collection)], StoredOptions(rank=3))
    assert not w.refit_analysis([(p, 0) for p in marked.paths[:4]], StoredOptions(rank=2))
    w.close()
    assert w.isVisible()                               # Quit cancelled
    assert len(answers.asked) == 4
    assert all(a.startswith("Unsaved review marks: ") for a in answers.asked)
    assert "Opening other.npz throws them away" in answers.asked[0]
    assert "A new analysis throws them away" in answers.asked[1]
    assert "The refit throws them away" in answers.asked[2]
    assert "Quitting throws them away" in answers.asked[3]
    assert not w.runner.is_running()
    assert w.state.decomposition is marked             # nothing happened
    assert w.current_file == str(path)
    np.testing.assert_array_equal(marked.marks, [0, 0, 2, 0, 0, 0, 2, 0])


def test_discard_goes_on(qtbot, opened, answers, tmp_path, gray_decomposition):
    w, path = opened
    w.state.set_marks([2], review.EXCLUDE)
    other = model_file.save_model(tmp_path / "other.npz", gray_decomposition)
    answers.queue[:] = [B.Discard]
    assert w.open_analysis(str(other))
    assert w.current_file == str(other)
    np.testing.assert_array_equal(w.state.decomposition.marks, np.zeros(8))
    assert len(answers.asked) == 1
    assert model_file.load_model(path).marks.sum() == 0    # the first file was not touched


def test_discard_on_quit_closes(qtbot, ini_settings, answers, gray_decomposition, tmp_path):
    w = MainWindow(ini_settings)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    path = model_file.save_model(tmp_path / "q.npz", gray_decomposition)
    assert w.open_analysis(str(path))
    w.state.set_marks([0], review.KEEP)
    answers.queue[:] = [B.Discard]
    w.quit_action.trigger()
    assert not w.isVisible()
    assert answers.asked and "Quitting" in answers.asked[0]
    assert model_file.load_model(path).marks.sum() == 0


def test_save_answer_writes_marks_then_goes_on(qtbot, window, answers, monkeypatch,
                                               small_collection, tmp_path):
    w = window
    with qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT):
        assert w.start_analysis([str(small_collection)], StoredOptions(rank=3))
    assert answers.asked == []                         # a fresh window has nothing to lose
    w.state.set_marks([0, 5, 9], review.EXCLUDE)
    w.state.set_marks([1], review.KEEP)
    expected = w.state.decomposition.marks.copy()
    target = tmp_path / "reviewed.npz"
    saves = _save_as(monkeypatch, target)
    answers.queue[:] = [B.Save]
    with qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT):
        assert w.start_analysis([str(small_collection)], StoredOptions(rank=2))
    assert len(saves) == 1 and len(answers.asked) == 1
    assert not np.any(w.state.decomposition.marks)     # the new analysis
    back = model_file.load_model(target)
    np.testing.assert_array_equal(back.marks, expected)

    # reopened, the marks are there and nothing is unsaved
    answers.asked.clear()
    assert w.open_analysis(str(target))
    np.testing.assert_array_equal(w.state.decomposition.marks, expected)
    assert not w.state.marks_modified
    w.state.set_marks([2], review.EXCLUDE)
    assert w.save_analysis(str(target)) is not None    # File > Save: no more question
    assert not w.state.marks_modified
    w.close()
    assert not w.isVisible() and answers.asked == []
    np.testing.assert_array_equal(model_file.load_model(target).marks[:3], [2, 1, 2])


def test_save_answer_cancelled_in_the_file_dialog_aborts(qtbot, opened, answers, monkeypatch,
                                                         tmp_path, gray_decomposition):
    w, path = opened
    w.state.set_marks([3], review.KEEP)
    monkeypatch.setattr(QFileDialog, "getSaveFileName", staticmethod(lambda *a, **k: ("", "")))
    other = model_file.save_model(tmp_path / "other.npz", gray_decomposition)
    answers.queue[:] = [B.Save]
    assert not w.open_analysis(str(other))
    assert w.current_file == str(path)
    assert w.state.marks_modified
    np.testing.assert_array_equal(w.state.decomposition.marks, [0, 0, 0, 1, 0, 0, 0, 0])


def test_refit_from_the_review_menu_asks_once(qtbot, window, answers, small_collection):
    w = window
    with qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT):
        assert w.start_analysis([str(small_collection)], StoredOptions(rank=3))
    first = w.state.decomposition
    view = w.views["outliersDock"]
    view.flush()
    w.state.set_marks([4, 8], review.EXCLUDE)          # unsaved marks, and two excluded
    answers.queue[:] = [B.Cancel]                       # refit? cancel
    view.refit_action.trigger()
    assert len(answers.asked) == 1
    assert answers.asked[0].startswith("Refit without excluded images: Analyse again the 38 "
                                       "images not marked excluded (2 excluded)")
    assert "save the current one first" in answers.asked[0]   # how to keep the marks
    assert not w.runner.is_running() and w.state.decomposition.paths == first.paths
    answers.queue[:] = [B.Yes]                          # yes: the refit runs, no second question
    with qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT) as blocker:
        view.refit_action.trigger()
    assert blocker.args[0].decomposition.n_images == 38
    assert len(answers.asked) == 2
    assert not w.state.marks_modified and not w.state.can_undo
    # called directly (not from the view), the window still asks about unsaved marks
    w.state.set_marks([0], review.EXCLUDE)
    answers.queue[:] = [B.Cancel]
    assert not w.refit_analysis([(p, 0) for p in w.state.decomposition.paths[1:]],
                                StoredOptions(rank=2))
    assert len(answers.asked) == 3 and "The refit throws them away" in answers.asked[2]

