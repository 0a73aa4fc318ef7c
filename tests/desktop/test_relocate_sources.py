"""Locating the moved source files of an opened analysis (File > Locate the sources)."""

from __future__ import annotations

import shutil

import numpy as np
import pytest
from PIL import Image

from modescope.app.desktop.main_window import MainWindow
from modescope.core.engine import pipeline
from modescope.core.engine.options import AnalysisOptions
from modescope.core.output import model_file

TIMEOUT = 30000


@pytest.fixture
def moved_model(small_collection, tmp_path):
    """A saved analysis of tray/ (12 frames), then tray/ moved to elsewhere/tray-copy/."""
    tray = tmp_path / "tray"
    tray.mkdir()
    for f in sorted(small_collection.glob("*.png"))[:12]:
        shutil.copy(f, tray / f.name)
    d = pipeline.analyze([tray], AnalysisOptions(rank=3)).decomposition
    path = model_file.save_model(tmp_path / "tray.npz", d)
    new = tmp_path / "elsewhere" / "tray-copy"
    new.parent.mkdir()
    shutil.move(str(tray), str(new))
    return path, tray, new


@pytest.fixture
def window(qtbot, ini_settings):
    w = MainWindow(ini_settings, confirm_dialogs=False)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    return w


def test_open_says_the_sources_are_missing_and_locate_repoints_them(qtbot, window, moved_model):
    path, tray, new = moved_model
    assert window.open_analysis(str(path))
    assert window.statusBar().currentMessage() == (
        "12 source files of 12 not found where the analysis recorded them: File > Locate the "
        "sources finds moved files.")
    assert window.locate_action.isEnabled()
    window.state.set_marks([4], 2)                       # an unsaved mark, kept through it
    assert window.state.marks_modified
    with qtbot.waitSignal(window.inspector.sourceReady, timeout=TIMEOUT):
        window.state.set_selected(4)
    assert "Source image not available" in window.inspector.source_pane.note()
    with qtbot.waitSignal(window.inspector.sourceReady, timeout=TIMEOUT):
        with qtbot.waitSignal(window.state.decompositionChanged, timeout=TIMEOUT):
            assert window.locate_sources(str(new.parent))
    d = window.state.decomposition
    assert all(p.startswith(str(new)) for p in d.paths)
    assert d.marks[4] == 2 and window.state.marks_modified and window.state.can_undo
    assert window.statusBar().currentMessage() == (
        "Found 12 source files in tray-copy. Save the analysis to keep the new places.")
    assert window.windowTitle().endswith("(sources moved, not saved)")
    assert window.ingest.sources() == [str(new)]
    # the inspector reads the image from its new place: the pixels of the moved file
    # (reference: Pillow's own gray conversion of the file, ITU-R 601-2 luma)
    expected = np.asarray(Image.open(new / d.paths[4].rsplit("/", 1)[1]).convert("L"),
                          dtype=np.float64) / 255.0
    np.testing.assert_allclose(pipeline.load_analysis_image(d, 4)[..., 0], expected,
                               atol=1.5 / 255)
    assert "not available" not in window.inspector.source_pane.note()
    assert not window.inspector.source_pane.image().isNull()
    # saved, the new places are in the file
    saved = window.save_analysis(str(path.parent / "moved.npz"))
    assert model_file.load_model(saved).paths == d.paths


def test_locate_in_a_folder_without_them(qtbot, window, moved_model, tmp_path):
    path, tray, _new = moved_model
    window.open_analysis(str(path))
    empty = tmp_path / "empty"
    empty.mkdir()
    before = window.state.decomposition
    window.locate_sources(str(empty))
    with qtbot.waitSignal(window._locator.finished, timeout=TIMEOUT):
        pass
    assert window.state.decomposition is before
    assert window.statusBar().currentMessage() == (
        "No missing source file was found there; 12 files still missing.")


def test_nothing_to_say_when_the_files_are_in_place(window, moved_model):
    path, tray, new = moved_model
    shutil.move(str(new), str(tray))
    assert window.open_analysis(str(path))
    assert window.check_sources_found() == 0
    assert window.statusBar().currentMessage().startswith("Opened ")


def test_the_question_names_the_first_missing_file(qtbot, ini_settings, moved_model):
    path, tray, _new = moved_model
    w = MainWindow(ini_settings)                     # questions shown (not blocking)
    qtbot.addWidget(w)
    w.show()
    assert w.open_analysis(str(path))
    box = w.sources_box
    qtbot.waitUntil(box.isVisible, timeout=2000)
    first = sorted(p.name for p in _new.glob("*.png"))[0]
    assert box.text().startswith(
        f"12 source files of 12 are not where the analysis recorded them (first: "
        f"{tray / first}).")
    assert [b.text() for b in box.buttons() if b is box.defaultButton()] == [
        "Locate the sources…"]
    box.reject()
    w.close()
