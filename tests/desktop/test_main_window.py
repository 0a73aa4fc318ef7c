"""The main window: a whole run, errors, cancel and save, settings, layout, clean-up."""

from __future__ import annotations

import dataclasses
import gc
import importlib
import sys
import time
import weakref
from importlib import metadata
from pathlib import Path

import numpy as np
import pytest
from PySide6.QtCore import QMimeData, QPointF, Qt, QTimer, QUrl
from PySide6.QtGui import QDropEvent, QImage
from PySide6.QtWidgets import QApplication, QMessageBox

import modescope.app.desktop.main_window as main_window_module
import modescope.app.desktop.window_files as window_files_module
import modescope.app.desktop.window_status as window_status_module
from modescope.app.desktop.main_window import (CAUTIONS, MainWindow, memory_in_use,
                                       sample_images_dir)
from modescope.app.desktop.settings import StoredOptions
from modescope.core.output import model_file
from modescope.core.engine import pipeline
from modescope.core.sources.scan import SourceSet

TIMEOUT = 60000


@pytest.fixture
def window(qtbot, ini_settings):
    w = MainWindow(ini_settings)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    return w


def _run(qtbot, window, sources, options=StoredOptions(rank=5)):
    with qtbot.waitSignal(window.runner.finished, timeout=TIMEOUT) as blocker:
        assert window.start_analysis([str(s) for s in sources], options)
    qtbot.wait(20)
    return blocker.args[0]


def _pixels(img: QImage) -> np.ndarray:
    img = img.convertToFormat(QImage.Format.Format_RGB888)
    arr = np.frombuffer(img.constBits(), dtype=np.uint8, count=img.sizeInBytes())
    return arr.reshape(img.height(), img.bytesPerLine())[:, :img.width() * 3]


def test_fresh_layout(window):
    # every dock is docked and not hidden (a tabbed dock behind another one is not hidden)
    for name, dock in window.docks.items():
        assert not dock.isFloating(), name
        assert not dock.isHidden(), name
        assert window.dockWidgetArea(dock) != Qt.DockWidgetArea.NoDockWidgetArea, name
    area = window.dockWidgetArea
    assert area(window.docks["sourcesDock"]) == Qt.DockWidgetArea.LeftDockWidgetArea
    assert area(window.docks["basisDock"]) == Qt.DockWidgetArea.RightDockWidgetArea
    assert area(window.docks["weightsDock"]) == Qt.DockWidgetArea.BottomDockWidgetArea
    assert window.centralWidget() is window.inspector


def test_layout_at_1280_by_800(qtbot, window, small_collection):
    _run(qtbot, window, [small_collection])
    window.resize(1280, 800)
    window.reset_layout()
    qtbot.wait(50)
    assert window.minimumSizeHint().width() <= 1280      # fits such a screen with the data shown
    assert window.minimumSizeHint().height() <= 800
    assert (window.width(), window.height()) == (1280, 800)
    panes = (window.inspector.source_pane, window.inspector.reconstruction_pane,
             window.inspector.residual_pane)
    for pane in panes:
        rect = pane.image_rect()
        assert rect.width() >= 150 and rect.height() >= 110, pane.title()
    assert window.docks["sourcesDock"].width() >= 280
    assert window.docks["basisDock"].width() >= 280
    assert window.docks["weightsDock"].height() >= 200


def test_analysis_reaches_every_view_and_grab_not_blank(qtbot, window, small_collection):
    partial_seen = []
    window.state.decompositionChanged.connect(
        lambda d: partial_seen.append(d is not None and not d.exact))
    result = _run(qtbot, window, [small_collection])
    d = result.decomposition
    assert window.state.decomposition is d and d.exact and d.n_images == 40
    assert any(partial_seen), "partial results did not reach the state during the run"
    # the review starts at the image with the highest outlier score (the top of the ranked list)
    from modescope.core.review.outliers import score_table
    worst = int(score_table(d, window.state.rank, window.state.level).order[0])
    assert window.state.selected == worst
    inspector = window.inspector               # the image and its reconstruction are shown
    qtbot.waitUntil(lambda: not inspector.source_pane.image().isNull(), timeout=TIMEOUT)
    assert not inspector.reconstruction_pane.image().isNull()
    assert not inspector.residual_pane.image().isNull()
    assert not window.ingest.is_running() and window.ingest.start_button.isEnabled()
    assert not window.progress_bar.isVisible()
    text = window.status_text()
    r = window.state.rank
    assert "40 images" in text and "48 × 64 pixels" in text
    assert f"{100 * float(np.sum(d.singular_values[:r] ** 2) / d.total_energy):.1f} %" in text
    # the picture of the window is not blank
    pix = _pixels(window.grab().toImage())
    assert pix.std() > 20
    # the image panes themselves hold an image (not only the frame around them)
    pane = _pixels(window.inspector.source_pane.grab().toImage())
    assert pane.std() > 5


def test_progress_shown_during_run(qtbot, window, small_collection):
    texts = []

    def slow_analyze(sources, options, *, progress, cancel, on_partial):
        def slow_progress(p):
            progress(p)
            time.sleep(0.02)
        return pipeline.analyze(sources, options, progress=slow_progress, cancel=cancel,
                                on_partial=on_partial)

    window.runner._analyze = slow_analyze
    window.runner.progress.connect(lambda _p: texts.append(window.progress_label.text()))
    with qtbot.waitSignal(window.runner.finished, timeout=TIMEOUT):
        window.start_analysis([str(small_collection)],
                              StoredOptions(rank=3))
        assert window.progress_bar.isVisible()
        assert window.cancel_action.isEnabled() and not window.start_action.isEnabled()
    learn = [t for t in texts if t.startswith("Learning the basis")]
    assert learn and "of 40" in learn[-1]
    assert any("images/s" in t for t in texts)


def test_failed_source_shows_message_and_window_keeps_working(qtbot, window, broken_folder,
                                                              small_collection):
    with qtbot.waitSignal(window.runner.failed, timeout=TIMEOUT):
        window.start_analysis([str(broken_folder)], StoredOptions(rank=3))
    qtbot.wait(20)
    box = window.message_box
    assert isinstance(box, QMessageBox) and box.isVisible()
    assert str(broken_folder) in box.text() or "frame_0.png" in box.text()
    assert "Traceback" not in box.text()
    assert window.isVisible()
    assert window.ingest.start_button.isEnabled()
    box.close()
    result = _run(qtbot, window, [small_collection])      # the window still works
    assert result.decomposition.n_images == 40


def test_cancel_keeps_partial_model_which_saves(qtbot, window, small_collection, tmp_path):
    def slow_analyze(sources, options, *, progress, cancel, on_partial):
        def slow_partial(d):
            on_partial(d)
            time.sleep(0.08)
        return pipeline.analyze(sources, dataclasses.replace(options, block_size=4),
                                progress=progress, cancel=cancel, on_partial=slow_partial)

    window.runner._analyze = slow_analyze
    window.runner._interval = 0.0
    window.runner.partial.connect(lambda _d: window.cancel_analysis())
    window.ingest.set_options(StoredOptions(rank=4))
    with qtbot.waitSignal(window.runner.cancelled, timeout=TIMEOUT):
        window.start_analysis([str(small_collection)], StoredOptions(rank=4))
    qtbot.wait(20)
    d = window.state.decomposition
    assert d is not None and not d.exact and 0 < d.n_images < 40
    assert "partial" in window.statusBar().currentMessage()
    saved = window.save_analysis(str(tmp_path / "partial.npz"))
    assert saved is not None and saved.exists()
    back = model_file.load_model(saved)
    np.testing.assert_array_equal(back.weights, d.weights)
    assert window.settings.recent_files()[0] == str(saved)
    assert window.recent_menu.actions()[0].data() == str(saved)


def test_open_saved_analysis_and_bad_file(qtbot, window, gray_decomposition, tmp_path):
    path = model_file.save_model(tmp_path / "model.npz", gray_decomposition)
    assert window.open_analysis(str(path))
    d = window.state.decomposition
    np.testing.assert_array_equal(d.basis, gray_decomposition.basis)
    assert window.windowTitle().endswith("model.npz")
    bad = tmp_path / "bad.npz"
    bad.write_bytes(b"not an npz")
    assert not window.open_analysis(str(bad))
    assert window.message_box.isVisible() and "bad.npz" in window.message_box.text()
    assert window.state.decomposition is d            # the good analysis stays
    window.message_box.close()


def test_open_paths_with_npz(qtbot, window, gray_decomposition, tmp_path):
    path = model_file.save_model(tmp_path / "m.npz", gray_decomposition)
    window.open_paths([str(path)])
    assert window.state.decomposition is not None
    assert not window.runner.is_running()
    assert window.settings.recent_files() == [str(path)]


def test_recent_menu_opens_file(qtbot, window, gray_decomposition, tmp_path):
    path = model_file.save_model(tmp_path / "r.npz", gray_decomposition)
    window.settings.add_recent_file(str(path))
    window._rebuild_recent_menu()
    action = window.recent_menu.actions()[0]
    window.recent_menu.triggered.emit(action)
    assert window.current_file == str(path)
    assert window.state.decomposition.n_images == 8


def test_shortcuts_step_image_and_rank(qtbot, window, gray_decomposition):
    window.state.set_decomposition(gray_decomposition)
    window.state.set_selected(2)
    window.state.set_rank(3)
    window.activateWindow()
    window.inspector.setFocus()
    qtbot.keyClick(window.inspector, Qt.Key.Key_PageDown)
    assert window.state.selected == 3
    qtbot.keyClick(window.inspector, Qt.Key.Key_PageUp)
    qtbot.keyClick(window.inspector, Qt.Key.Key_PageUp)
    assert window.state.selected == 1
    qtbot.keyClick(window.inspector, Qt.Key.Key_Plus)
    assert window.state.rank == 4
    qtbot.keyClick(window.inspector, Qt.Key.Key_Minus)
    qtbot.keyClick(window.inspector, Qt.Key.Key_Minus)
    assert window.state.rank == 2
    # clamped at the ends
    for _ in range(20):
        window.next_action.trigger()
    assert window.state.selected == 7
    for _ in range(20):
        window.rank_down_action.trigger()
    assert window.state.rank == 1


def test_settings_round_trip_through_window(qtbot, ini_settings, small_collection):
    first = MainWindow(ini_settings)
    qtbot.addWidget(first)
    first.show()
    qtbot.waitExposed(first)
    first.ingest.set_options(StoredOptions(rank=6, color="rgb", downscale=2, recursive=True))
    first.docks["spectrumDock"].hide()
    first.resize(1000, 700)
    qtbot.wait(10)
    first.ingest.set_dialog_dir(str(small_collection))
    first.close()
    second = MainWindow(ini_settings)
    qtbot.addWidget(second)
    second.show()
    qtbot.waitExposed(second)
    assert second.ingest.options() == StoredOptions(rank=6, color="rgb", downscale=2,
                                                    recursive=True)
    assert not second.docks["spectrumDock"].isVisible()
    assert second.docks["weightsDock"].isVisible()
    # the offscreen screen is 800 pixels wide, so Qt fits the restored width to the screen and
    # the window's minimum width; the height fits and comes back as it was
    assert second.height() == 700
    assert not ini_settings.window_geometry().isEmpty()
    assert second.ingest.dialog_dir() == str(small_collection)
    second.reset_layout()
    assert second.docks["spectrumDock"].isVisible() or \
        second.tabifiedDockWidgets(second.docks["spectrumDock"])
    assert not second.docks["spectrumDock"].isHidden()


def test_window_and_worker_freed_after_close(qtbot, ini_settings, small_collection):
    w = MainWindow(ini_settings)
    w.show()
    qtbot.waitExposed(w)
    with qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT):
        w.start_analysis([str(small_collection)], StoredOptions(rank=3))
    pool = w.runner.pool
    refs = [weakref.ref(w), weakref.ref(w.runner.worker), weakref.ref(w.inspector),
            weakref.ref(w.state)]
    w.close()
    assert pool.activeThreadCount() == 0
    assert not w.runner.is_running()
    del w, pool
    for _ in range(3):
        gc.collect()
        QApplication.processEvents()
    assert [r() is None for r in refs] == [True] * len(refs)


def test_close_during_run_stops_thread(qtbot, ini_settings, small_collection):
    def slow_analyze(sources, options, *, progress, cancel, on_partial):
        def slow_partial(d):
            on_partial(d)
            time.sleep(0.05)
        return pipeline.analyze(sources, dataclasses.replace(options, block_size=2),
                                progress=progress, cancel=cancel, on_partial=slow_partial)

    w = MainWindow(ini_settings, analyze=slow_analyze)
    w.show()
    w.runner._interval = 0.0
    with qtbot.waitSignal(w.runner.partial, timeout=TIMEOUT):
        w.start_analysis([str(small_collection)], StoredOptions(rank=3))
    pool = w.runner.pool
    started = time.monotonic()
    w.close()
    assert time.monotonic() - started < 5.0
    assert pool.activeThreadCount() == 0


def test_shutdown_waits_for_the_inspectors_read(qtbot, ini_settings, gray_decomposition,
                                                 tmp_path, monkeypatch):
    import threading

    gate, started = threading.Event(), threading.Event()
    real_load = pipeline.load_analysis_image

    def slow_load(decomposition, index):
        started.set()
        gate.wait(10)
        return real_load(decomposition, index)

    monkeypatch.setattr(pipeline, "load_analysis_image", slow_load)
    w = MainWindow(ini_settings, confirm_dialogs=False)
    qtbot.addWidget(w)
    assert w.open_analysis(str(model_file.save_model(tmp_path / "m.npz", gray_decomposition)))
    w.state.set_selected(1)
    assert started.wait(10)                    # the inspector is reading an image file
    assert w.shutdown(200) is False            # ... and the window waits for that read
    gate.set()
    assert w.shutdown(5000) is True


def test_about_shows_version_and_cautions(qtbot, window):
    text = window.about_text()
    assert metadata.version("modescope") in text
    for caution in CAUTIONS:
        assert caution in text
    assert "personal data" in text and "not a verdict" in text
    window.show_about()
    assert window.message_box.isVisible()
    window.message_box.close()


def test_menus(window):
    titles = [a.text().replace("&", "") for a in window.menuBar().actions()]
    assert titles == ["File", "View", "Review", "Help"]
    file_items = [a.text().replace("&", "") for a in window.menuBar().actions()[0].menu().actions()
                  if a.text()]
    for wanted in ("Add folder…", "Add files…", "Open analysis…", "Save analysis…",
                   "Recent analyses", "Quit"):
        assert wanted in file_items
    view_items = [a.text().replace("&", "") for a in window.menuBar().actions()[1].menu().actions()]
    for dock in window.docks.values():
        assert dock.windowTitle() in view_items
    assert "Reset layout" in view_items


def test_memory_in_use_is_plausible():
    resource = pytest.importorskip("resource")
    used = memory_in_use()
    # the peak resident size from getrusage (kilobytes on Linux) bounds the current one
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    assert 10 * 2 ** 20 < used <= peak * 1.05


# the window's own modules, imported afresh by the tests that simulate a different platform
_WINDOW_MODULES = ("modescope.app.desktop.main_window", "modescope.app.desktop.window_status",
                   "modescope.app.desktop.window_run", "modescope.app.desktop.window_files",
                   "modescope.app.desktop.window_menus", "modescope.app.desktop.window_docks")


def _import_window_afresh(monkeypatch):
    """Import main_window again as a new start of the program would (restored afterwards)."""
    for name in _WINDOW_MODULES:
        monkeypatch.delitem(sys.modules, name, raising=False)
    return importlib.import_module("modescope.app.desktop.main_window")


def test_window_imports_without_the_resource_module(monkeypatch, tmp_path):
    # Windows has no `resource` module: None in sys.modules makes `import resource` fail
    monkeypatch.setitem(sys.modules, "resource", None)
    with pytest.raises(ImportError):
        importlib.import_module("resource")
    fresh = _import_window_afresh(monkeypatch)
    assert fresh is not main_window_module and hasattr(fresh, "MainWindow")
    # where /proc is readable the figure does not need `resource` at all
    used = fresh.memory_in_use()
    assert 10 * 2 ** 20 < used < 2 ** 40
    # with neither /proc nor `resource` (as on Windows) the figure is 0: unknown
    status = sys.modules["modescope.app.desktop.window_status"]
    monkeypatch.setattr(status, "_STATM", str(tmp_path / "no_statm"))
    assert fresh.memory_in_use() == 0


def test_unknown_memory_is_not_shown(window, monkeypatch):
    assert window.memory_label.text().startswith("Memory ")
    assert window.memory_label.text().endswith((" MB", " GB"))
    monkeypatch.setattr(window_status_module, "memory_in_use", lambda: 0)
    window._update_memory()
    assert window.memory_label.text() == "" and window.memory_label.isHidden()


def test_a_broken_view_import_fails_loudly(monkeypatch):
    # a view module that cannot be imported stops the window's import with that error,
    # instead of a placeholder in the dock
    monkeypatch.setitem(sys.modules, "modescope.app.desktop.views.gallery", None)
    with pytest.raises(ImportError, match="modescope.app.desktop.views.gallery"):
        _import_window_afresh(monkeypatch)


def test_sample_dir_is_next_to_the_packages():
    import modescope.core

    assert sample_images_dir() == Path(modescope.core.__file__).resolve().parent.parent / \
        "sample_images"


def test_empty_sample_folder_gives_hint(qtbot, window, tmp_path, monkeypatch):
    monkeypatch.setattr(window_files_module, "sample_images_dir", lambda: tmp_path)
    assert window.open_sample() is False
    assert "Add a folder" in window.statusBar().currentMessage()
    assert not window.runner.is_running()


# ----- the sources pane ------------------------------------------------------------------------
def test_ingest_scan_summary(qtbot, window, small_collection):
    pane = window.ingest
    with qtbot.waitSignal(pane.scanFinished, timeout=TIMEOUT) as blocker:
        pane.set_sources([str(small_collection)])
    source_set = blocker.args[0]
    assert source_set.n_images == 40
    assert "40 images of 48 × 64 pixels" in pane.summary_label.text()
    assert pane.problem_table.rowCount() == 0
    pane.downscale_spin.setValue(2)
    assert "at 24 × 32" in pane.summary_label.text()


def test_ingest_lists_skipped_files(qtbot, window, small_collection, tmp_path):
    mixed = tmp_path / "mixed"
    mixed.mkdir()
    for p in sorted(small_collection.glob("*.png"))[:5]:
        (mixed / p.name).write_bytes(p.read_bytes())
    (mixed / "zz_broken.png").write_bytes(b"garbage")
    with qtbot.waitSignal(window.ingest.scanFinished, timeout=TIMEOUT):
        window.ingest.set_sources([str(mixed)])
    pane = window.ingest
    assert pane.problem_table.rowCount() == 1
    assert pane.problem_table.item(0, 0).text() == "zz_broken.png"
    assert pane.problem_table.item(0, 1).text()
    assert "5 images" in pane.summary_label.text() and "1 skipped" in pane.summary_label.text()


def test_ingest_no_usable_images(qtbot, window, broken_folder):
    with qtbot.waitSignal(window.ingest.scanFinished, timeout=TIMEOUT) as blocker:
        window.ingest.set_sources([str(broken_folder)])
    assert blocker.args[0] is None
    assert "No usable image" in window.ingest.summary_label.text()


def test_ingest_drop_and_remove(qtbot, window, small_collection, tmp_path):
    pane = window.ingest
    mime = QMimeData()
    mime.setUrls([QUrl.fromLocalFile(str(small_collection)), QUrl.fromLocalFile(str(tmp_path))])
    event = QDropEvent(QPointF(10, 10), Qt.DropAction.CopyAction, mime,
                       Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier)
    pane.dropEvent(event)
    assert pane.sources() == [str(small_collection), str(tmp_path)]
    pane.add_sources([str(small_collection)])          # duplicates are ignored
    assert len(pane.sources()) == 2
    pane.source_list.item(1).setSelected(True)
    assert pane.remove_button.isEnabled()
    pane.remove_selected()
    assert pane.sources() == [str(small_collection)]


def test_ingest_start_button_emits_request(qtbot, window, small_collection):
    pane = window.ingest
    pane.set_sources([str(small_collection)])
    pane.set_options(StoredOptions(rank=2))
    with qtbot.waitSignal(window.runner.finished, timeout=TIMEOUT):
        qtbot.mouseClick(pane.start_button, Qt.MouseButton.LeftButton)
        assert pane.cancel_button.isEnabled() and not pane.start_button.isEnabled()
        assert not pane.rank_spin.isEnabled()
    qtbot.wait(20)
    assert window.state.decomposition.rank == 2
    assert pane.start_button.isEnabled() and not pane.cancel_button.isEnabled()


def test_run_gui_opens_and_closes(qtbot, ini_settings, small_collection, monkeypatch):
    from modescope.app.desktop import launch as main_module

    monkeypatch.setattr(main_window_module, "Settings", lambda: ini_settings)
    windows = []

    def close_when_done():
        tops = [w for w in QApplication.topLevelWidgets() if isinstance(w, MainWindow)
                and w.isVisible()]
        for w in tops:
            if w.state.decomposition is not None and w.state.decomposition.exact:
                windows.append(w.state.decomposition.n_images)
                w.close()
                return
        QTimer.singleShot(50, close_when_done)

    QTimer.singleShot(50, close_when_done)
    assert main_module.run_gui([str(small_collection)]) == 0
    assert windows == [40]


def test_run_gui_rejects_a_string():
    from modescope.app.desktop.launch import run_gui

    with pytest.raises(TypeError, match="paths"):
        run_gui("sample_images")


def test_open_sample_analyses_bundled_images(qtbot, window):
    folder = sample_images_dir()
    frames = [p for p in folder.iterdir() if p.suffix.lower() == ".jpg"]
    assert frames, f"{folder} holds no sample frames"
    with qtbot.waitSignal(window.runner.finished, timeout=TIMEOUT) as blocker:
        assert window.open_sample()
    assert blocker.args[0].decomposition.n_images == len(frames)
    assert window.ingest.sources() == [str(folder)]


# ----- the sources pane while a run scans for itself --------------------------------------------
def test_pane_reports_the_runs_own_scan(qtbot, window, small_collection):
    w = window
    seen = {"scan": [], "learn": []}
    # connected after the window's own slot, so the pane has been updated for this signal
    w.runner.progress.connect(lambda p: seen[p.stage].append(w.ingest.summary_label.text())
                              if p.stage in seen else None)
    with qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT):
        assert w.start_analysis([str(small_collection)], StoredOptions(rank=3))
        # started straight away: no invitation to add a folder while the run reads the files
        assert w.ingest.summary_label.text().startswith("The analysis is reading the files")
    assert seen["scan"] and all(t.startswith("The analysis is reading the files")
                                for t in seen["scan"])
    # once the run's scan is over, the pane says how many images it found
    assert seen["learn"] and seen["learn"][0].startswith("The analysis found 40 usable images")
    assert "40 images of 48 × 64 pixels" in w.ingest.summary_label.text()


def test_pane_after_a_failed_or_scan_cancelled_run(qtbot, ini_settings, broken_folder):
    w = MainWindow(ini_settings, confirm_dialogs=False)
    qtbot.addWidget(w)
    w._show_error = lambda title, text: None          # no modal box in the test
    with qtbot.waitSignal(w.runner.failed, timeout=TIMEOUT):
        assert w.start_analysis([str(broken_folder)], StoredOptions(rank=3))
    assert w.ingest.summary_label.text().startswith("Not analysed: no usable image")
    assert "frame_0.png" in w.ingest.summary_label.text()      # the file and its problem

    def cancelled_in_scan(sources, options, *, progress, cancel, on_partial):
        progress(pipeline.Progress("scan", 3, 10, 0.1, 30.0, 0.2))
        empty = SourceSet(images=(), reference_size=(0, 0), color="gray",
                          resize_mismatched=False, problems=())
        return pipeline.AnalysisResult(None, empty, (), True)

    w.runner._analyze = cancelled_in_scan
    with qtbot.waitSignal(w.runner.cancelled, timeout=TIMEOUT):
        assert w.start_analysis([str(broken_folder) + "_other"], StoredOptions(rank=3))
    assert w.ingest.summary_label.text().startswith("Not scanned: the analysis stopped")
    w.close()


def test_nothing_to_analyse_and_bad_options_are_messages(qtbot, ini_settings):
    w = MainWindow(ini_settings, confirm_dialogs=False)
    qtbot.addWidget(w)
    shown = w.statusBar().currentMessage      # the message boxes are off: the status bar
    assert w.start_analysis([], StoredOptions()) is False
    assert shown() == "Nothing to analyse: Add a folder or image files first."
    assert w.refit_analysis([], StoredOptions()) is False
    assert shown() == "Nothing to analyse: Every image is marked excluded."
    assert w.refit_analysis([("a.png", 0)], StoredOptions(rank=0)) is False
    assert shown().startswith("Options not valid: ") and "rank" in shown()
    assert not w.runner.is_running()
    w.close()


def test_a_single_image_is_a_mean_only_analysis(qtbot, ini_settings, tmp_path):
    # one image: no basis image can exist; the views say why instead of "no analysis yet"
    from PIL import Image
    from modescope.app.desktop.imaging import NO_VARIATION
    folder = tmp_path / "one"
    folder.mkdir()
    Image.fromarray(np.full((12, 16), 90, np.uint8)).save(folder / "only.png")
    w = MainWindow(ini_settings, confirm_dialogs=False)
    qtbot.addWidget(w)
    with qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT):
        assert w.start_analysis([str(folder)], StoredOptions(rank=3))
    d = w.state.decomposition
    assert d.n_images == 1 and d.rank == 0
    assert "Analysis finished: 1 image in" in w.statusBar().currentMessage()
    qtbot.waitUntil(lambda: w.views["weightsDock"].info.text() == NO_VARIATION, timeout=5000)
    assert w.inspector.title_label.text() == NO_VARIATION
    assert w.views["basisDock"].model.label(0) == "Mean image\n1 image\n(final)"
    w.close()
