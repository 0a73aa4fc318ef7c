"""Relaunching with no path reopens what the previous start left (settings in a temporary INI).

A second start is a new MainWindow over a new Settings reading the same INI file, as a new
process would see it; :func:`modescope.app.desktop.launch.start_window` is what ``modescope``
with no argument runs once the window is shown.
"""

from __future__ import annotations

import os

import pytest
from PySide6.QtCore import QSettings

from modescope.app.desktop.launch import NOTHING_LEFT, remembered_paths, start_window
from modescope.app.desktop.main_window import MainWindow
from modescope.app.desktop.settings import Settings, StoredOptions
from modescope.core.output.model_file import save_model

TIMEOUT = 60000


def _settings(ini_path) -> Settings:
    return Settings(QSettings(str(ini_path), QSettings.Format.IniFormat))


def _window(qtbot, settings) -> MainWindow:
    w = MainWindow(settings, confirm_dialogs=False)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    return w


def _second_start(qtbot, first: MainWindow, ini_path) -> MainWindow:
    """Close ``first`` as a quit would and make the window of a new start."""
    first.settings.sync()
    first.close()
    return _window(qtbot, _settings(ini_path))


# ----- what is remembered ------------------------------------------------------------------------
def test_first_start_remembers_nothing(ini_settings):
    assert ini_settings.last_opened() == ""
    assert ini_settings.last_folders() == []
    assert remembered_paths(ini_settings) is None


def test_the_last_opened_wins_and_the_other_stands_in(ini_settings, ini_path, tmp_path):
    model = tmp_path / "a.npz"
    model.write_bytes(b"")
    folder = tmp_path / "frames"
    folder.mkdir()
    ini_settings.add_recent_file(str(model))
    assert remembered_paths(_settings(ini_path)) == [str(model)]
    ini_settings.set_last_folders([folder, str(folder)])       # stored once, absolute
    ini_settings.sync()
    again = _settings(ini_path)
    assert (again.last_opened(), again.last_folders()) == ("folders", [str(folder)])
    assert remembered_paths(again) == [str(folder)]
    folder.rmdir()                                             # gone: the file stands in
    assert remembered_paths(again) == [str(model)]
    model.unlink()                                             # both gone: nothing to open
    assert remembered_paths(again) == []


def test_set_last_folders_rejects_a_string(ini_settings):
    with pytest.raises(TypeError, match="paths"):
        ini_settings.set_last_folders("frames")
    with pytest.raises(TypeError, match="paths"):
        ini_settings.set_last_folders([3])
    with pytest.raises(TypeError, match="settings"):
        remembered_paths("settings.ini")


# ----- a second start opens what the first one left ---------------------------------------------
def test_first_start_opens_the_sample(qtbot, ini_settings, monkeypatch):
    w = _window(qtbot, ini_settings)
    opened = []
    monkeypatch.setattr(w, "open_sample", lambda: opened.append("sample") or True)
    assert start_window(w, []) == "sample"
    assert opened == ["sample"]


def test_second_start_reopens_the_folders_analysed(qtbot, ini_settings, ini_path,
                                                   small_collection, monkeypatch):
    first = _window(qtbot, ini_settings)
    first.ingest.set_options(StoredOptions(rank=4))          # as chosen in the Sources pane
    with qtbot.waitSignal(first.runner.finished, timeout=TIMEOUT):
        assert first.start_analysis([str(small_collection)], first.ingest.options())
    second = _second_start(qtbot, first, ini_path)
    monkeypatch.setattr(second, "open_sample", lambda: pytest.fail("the sample was opened"))
    with qtbot.waitSignal(second.runner.finished, timeout=TIMEOUT) as blocker:
        assert start_window(second, []) == "remembered"
    assert second.ingest.sources() == [str(small_collection)]
    d = blocker.args[0].decomposition
    assert d.n_images == 40 and d.rank == 4                   # the options came back too


def test_second_start_reopens_the_analysis_file(qtbot, ini_settings, ini_path, tmp_path,
                                                gray_decomposition, small_collection):
    model = tmp_path / "kept.npz"
    save_model(model, gray_decomposition)
    first = _window(qtbot, ini_settings)
    with qtbot.waitSignal(first.runner.finished, timeout=TIMEOUT):
        assert first.start_analysis([str(small_collection)], StoredOptions(rank=3))
    assert first.open_analysis(str(model))                    # opened after the folders
    second = _second_start(qtbot, first, ini_path)
    assert start_window(second, []) == "remembered"
    assert second.current_file == str(model)
    assert second.state.decomposition.n_images == 8
    assert not second.runner.is_running()


def test_second_start_reopens_the_saved_file_then_the_folders(qtbot, ini_settings, ini_path,
                                                             tmp_path, small_collection):
    first = _window(qtbot, ini_settings)
    with qtbot.waitSignal(first.runner.finished, timeout=TIMEOUT):
        assert first.start_analysis([str(small_collection)], StoredOptions(rank=3))
    saved = first.save_analysis(str(tmp_path / "saved.npz"))
    assert saved is not None
    second = _second_start(qtbot, first, ini_path)
    assert start_window(second, []) == "remembered"
    assert second.current_file == os.path.abspath(saved)
    assert second.state.decomposition.n_images == 40
    # the saved file is gone: a third start analyses the folders again
    os.remove(saved)
    third = _second_start(qtbot, second, ini_path)
    with qtbot.waitSignal(third.runner.finished, timeout=TIMEOUT):
        assert start_window(third, []) == "remembered"
    assert third.ingest.sources() == [str(small_collection)]


def test_nothing_left_says_so(qtbot, ini_settings, tmp_path, monkeypatch):
    gone = tmp_path / "gone"
    ini_settings.set_last_folders([gone])
    w = _window(qtbot, ini_settings)
    monkeypatch.setattr(w, "open_sample", lambda: pytest.fail("the sample was opened"))
    assert start_window(w, []) == "nothing"
    assert w.statusBar().currentMessage() == NOTHING_LEFT
    assert w.state.decomposition is None


def test_given_paths_come_first(qtbot, ini_settings, tmp_path, gray_decomposition):
    model = tmp_path / "given.npz"
    save_model(model, gray_decomposition)
    ini_settings.set_last_folders([tmp_path])
    w = _window(qtbot, ini_settings)
    assert start_window(w, [str(model)]) == "given"
    assert w.current_file == str(model)
