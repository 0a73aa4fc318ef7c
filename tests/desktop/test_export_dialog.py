"""The export dialog: files written, options reaching them, refusals, stop, thread, labels."""

from __future__ import annotations

import csv
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from PySide6.QtCore import Qt
from PySide6.QtGui import QKeySequence
from PySide6.QtWidgets import QApplication

import modescope.app.desktop.dialogs.export_job as export_job_module
from modescope.app.desktop.dialogs.export import ExportDialog
from modescope.app.desktop.main_window import MainWindow
from modescope.app.desktop.state import AppState
from modescope.core.engine import pipeline
from modescope.core.output.atomic import DestinationError
from modescope.core.output.export import ExportOptions, plan_export
from modescope.core.output.metrics import compression_numbers
from modescope.core.review.outliers import score_table

TIMEOUT = 20000


def _make_dialog(qtbot, decomposition, rank=None):
    state = AppState()
    state.set_decomposition(decomposition)
    if rank is not None:
        state.set_rank(rank)
    dlg = ExportDialog(state)
    qtbot.addWidget(dlg)
    dlg.show()
    qtbot.waitExposed(dlg)
    return dlg


def _tick(dlg, parts):
    for name, box in dlg.what_boxes.items():
        box.setChecked(name in parts)


def _click(qtbot, button):
    """Click a radio button as the user does; it must be enabled and end up checked."""
    assert button.isEnabled(), button.text()
    qtbot.mouseClick(button, Qt.MouseButton.LeftButton)
    assert button.isChecked(), button.text()


def _choose_format(dlg, key):
    """Pick the preview format ``key`` in the format box."""
    index = dlg.format_combo.findData(key)
    assert index >= 0, key
    dlg.format_combo.setCurrentIndex(index)


def _export(qtbot, dlg):
    with qtbot.waitSignal(dlg.exportFinished, timeout=TIMEOUT) as blocker:
        qtbot.mouseClick(dlg.export_button, Qt.MouseButton.LeftButton)
    return blocker.args[0]


def _read_csv(path):
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.reader(fh))


def _pixels(path):
    with Image.open(path) as im:
        return np.asarray(im, dtype=np.float64)


def _size(path):
    with Image.open(path) as im:
        return im.size


def _listing(folder):
    return sorted(p.name for p in folder.iterdir())


def _assert_no_work_left(qtbot, dialog):
    """The export's pool thread has left the job and no job of the dialog is still running."""
    qtbot.waitUntil(lambda: dialog.runner.pool.activeThreadCount() == 0, timeout=5000)
    assert not dialog.is_running()


@pytest.fixture
def out(tmp_path):
    folder = tmp_path / "out"
    folder.mkdir()
    return folder


@pytest.fixture
def dialog(qtbot, gray_decomposition):
    return _make_dialog(qtbot, gray_decomposition, rank=3)


# ----- what is written ------------------------------------------------------------------------
def test_previews_weights_spectrum_write_the_planned_files(qtbot, dialog, gray_decomposition,
                                                           gray_pngs, out):
    d = gray_decomposition
    _tick(dialog, ("previews", "weights", "spectrum"))
    dialog.set_folder(out)
    assert dialog.rank_spin.value() == 3                      # state.rank is the default
    planned = plan_export(d, out, ExportOptions(rank=3, what=("previews", "weights",
                                                           "spectrum"))).files
    report = _export(qtbot, dialog)
    assert not report.cancelled
    assert set(_listing(out)) == {p.name for p in planned}
    assert len(planned) == d.n_images + 2
    assert report.written == planned
    assert dialog.report_view.toPlainText() == report.summary()
    assert "Done: 10 files written" in dialog.message_label.text()

    # the weights table against an independent projection of the source files read with
    # Pillow: w = U_k^T (x - mean), U from numpy.linalg.svd (LAPACK, in the conftest fixture)
    rows = _read_csv(out / "weights_r3.csv")
    assert rows[0] == ["path", "page", "w1", "w2", "w3"]
    paths, _ = gray_pngs
    assert [r[0] for r in rows[1:]] == paths
    x = np.stack([_pixels(p).ravel() / 255.0 for p in paths], axis=1)
    projected = d.basis[:, :3].astype(np.float64).T @ (x - d.mean.astype(np.float64)[:, None])
    table = np.array([[float(v) for v in r[2:]] for r in rows[1:]]).T
    np.testing.assert_array_equal(table, d.weights[:3])       # shortest round-trip floats
    np.testing.assert_allclose(table, projected, atol=2e-5)   # float32 basis and mean

    # spectrum: singular values as stored, shares s^2 / ||C||_F^2 (Eckart-Young energy)
    spec = _read_csv(out / "spectrum.csv")
    assert spec[0] == ["index", "singular_value", "energy_share", "cumulative_share"]
    s = np.array([float(r[1]) for r in spec[1:]])
    c = x - x.mean(axis=1, keepdims=True)
    s_ref = np.linalg.svd(c, compute_uv=False)[:d.rank]     # numpy LAPACK
    np.testing.assert_allclose(s, s_ref, rtol=1e-6)
    np.testing.assert_allclose([float(r[2]) for r in spec[1:]],
                               s_ref ** 2 / np.sum(c ** 2), rtol=1e-6)

    # a preview against the rank-3 reconstruction from the LAPACK SVD, 8-bit
    u, sv, vt = np.linalg.svd(c, full_matrices=False)
    xk = x.mean(axis=1) + u[:, :3] @ (sv[:3] * vt[:3, 2])
    png = _pixels(out / "img_02_r3.png").ravel()
    assert np.max(np.abs(png - np.clip(xk, 0, 1) * 255)) <= 0.51


def test_rank_spin_reaches_the_files(qtbot, dialog, out):
    _tick(dialog, ("previews", "weights", "model"))
    dialog.rank_spin.setValue(2)
    dialog.set_folder(out)
    report = _export(qtbot, dialog)
    names = _listing(out)
    assert report.rank == 2
    assert "weights_r2.csv" in names and "model_r2.npz" in names
    previews = [n for n in names if n.startswith("img_")]
    assert len(previews) == 8 and all(n.endswith("_r2.png") for n in previews)
    assert _read_csv(out / "weights_r2.csv")[0] == ["path", "page", "w1", "w2"]


def test_selected_images_export_only_those(qtbot, dialog, gray_pngs, out):
    paths, _ = gray_pngs
    dialog.state.set_selection_set([1, 4])
    _tick(dialog, ("previews", "weights"))
    assert dialog.images_selected.isEnabled()
    assert dialog.images_selected.text() == "Selected images (2)"
    _click(qtbot, dialog.images_selected)
    dialog.set_folder(out)
    _export(qtbot, dialog)
    assert _listing(out) == ["img_01_r3.png", "img_04_r3.png", "weights_r3.csv"]
    rows = _read_csv(out / "weights_r3.csv")
    assert [r[0] for r in rows[1:]] == [paths[1], paths[4]]


def test_selected_falls_back_to_the_current_image(qtbot, dialog, out):
    dialog.state.set_selection_set([])
    dialog.state.set_selected(6)
    _tick(dialog, ("previews",))
    _click(qtbot, dialog.images_selected)
    dialog.set_folder(out)
    _export(qtbot, dialog)
    assert _listing(out) == ["img_06_r3.png"]


def _outlier_decomposition(make_decomposition, tmp_path):
    rng = np.random.default_rng(5)
    rows, cols, m = 16, 16, 30
    yy, xx = np.mgrid[0:rows, 0:cols]
    patterns = [np.sin(xx / 2.5), np.cos(yy / 3.0)]
    images = []
    for i in range(m):
        img = 0.5 + sum(rng.normal(0, 0.1) * p for p in patterns) \
            + rng.normal(0, 0.01, (rows, cols))
        if i in (7, 19):
            img[4:10, 5:11] += 0.35           # a bright square no other image has
        images.append(np.clip(img, 0, 1))
    images = np.stack(images)[..., None].astype(np.float32)
    paths = [str(tmp_path / "src" / f"f_{i:02d}.png") for i in range(m)]
    return make_decomposition(images, 4, paths, {"downscale": 1, "source_size": [16, 16]})


def test_flagged_uses_the_score_table_flags(qtbot, make_decomposition, tmp_path, out):
    d = _outlier_decomposition(make_decomposition, tmp_path)
    dlg = _make_dialog(qtbot, d, rank=2)
    dlg.state.set_level(0.95)
    _tick(dlg, ("previews", "weights"))
    flags = np.asarray(score_table(d, 2, 0.95).flag, dtype=bool)
    expected = np.flatnonzero(flags)
    assert 1 <= expected.size < d.n_images                  # the check can tell
    assert {7, 19} <= set(expected.tolist())
    assert dlg.images_flagged.isEnabled()
    assert f"({expected.size} at 95 %, rank 2)" in dlg.images_flagged.text()
    _click(qtbot, dlg.images_flagged)
    dlg.set_folder(out)
    report = _export(qtbot, dlg)
    names = _listing(out)
    assert [n for n in names if n.endswith(".png")] == [f"f_{i:02d}_r2.png" for i in expected]
    rows = _read_csv(out / "weights_r2.csv")
    assert [r[0] for r in rows[1:]] == [d.paths[i] for i in expected]
    assert report.n_written == expected.size + 1


def test_streaming_snapshot_cannot_export_flagged(qtbot, gray_decomposition):
    snapshot = gray_decomposition.replace(residual=None, exact=False)
    dlg = _make_dialog(qtbot, snapshot)
    assert not dlg.images_flagged.isEnabled()
    assert "needs a finished analysis" in dlg.images_flagged.text()
    assert "partial result" in dlg.analysis_label.text()
    assert dlg.images_all.isChecked()


# ----- refusals -------------------------------------------------------------------------------
def test_existing_file_without_overwrite_is_refused(qtbot, dialog, out):
    (out / "spectrum.csv").write_bytes(b"keep me\n")
    _tick(dialog, ("previews", "weights", "spectrum"))
    dialog.set_folder(out)
    started = []
    dialog.exportStarted.connect(started.append)
    with qtbot.waitSignal(dialog.exportFailed, timeout=TIMEOUT) as blocker:
        qtbot.mouseClick(dialog.export_button, Qt.MouseButton.LeftButton)
    text = dialog.message_label.text()
    assert text == blocker.args[0]
    assert "spectrum.csv" in text and "already exist" in text and "Traceback" not in text
    assert dialog.message_label.isVisible()
    assert started == [] and not dialog.is_running()
    assert _listing(out) == ["spectrum.csv"]
    assert (out / "spectrum.csv").read_bytes() == b"keep me\n"

    dialog.overwrite_check.setChecked(True)                  # now it is allowed
    _export(qtbot, dialog)
    assert (out / "spectrum.csv").read_bytes().startswith(b"index,singular_value")


def test_source_folder_is_refused_unless_allowed(qtbot, dialog, gray_pngs):
    paths, _ = gray_pngs
    source_folder = Path(paths[0]).parent
    before = {p.name: p.read_bytes() for p in source_folder.iterdir() if p.is_file()}
    _tick(dialog, ("spectrum",))
    dialog.set_folder(source_folder)
    assert not dialog.source_folder_check.isChecked()
    assert not dialog.start_export()
    text = dialog.message_label.text()
    assert "source images" in text and "Allow writing into a folder" in text
    after = {p.name: p.read_bytes() for p in source_folder.iterdir() if p.is_file()}
    assert after == before

    dialog.source_folder_check.setChecked(True)
    assert dialog.source_folder_warning.isVisible()
    _export(qtbot, dialog)
    assert (source_folder / "spectrum.csv").is_file()


def test_missing_folder_is_created_and_no_folder_is_explained(qtbot, dialog, tmp_path):
    dialog.set_folder("")
    assert not dialog.export_button.isEnabled()
    assert not dialog.start_export()
    assert "destination folder" in dialog.message_label.text()
    target = tmp_path / "new" / "deeper"
    _tick(dialog, ("spectrum",))
    dialog.set_folder(target)
    _export(qtbot, dialog)
    assert _listing(target) == ["spectrum.csv"]


def test_failures_show_a_message_not_a_traceback(qtbot, dialog, out, monkeypatch):
    def boom(plan, progress=None, cancel=None):
        raise RuntimeError("the disk caught fire")

    monkeypatch.setattr(export_job_module, "run_export", boom)
    _tick(dialog, ("spectrum",))
    dialog.set_folder(out)
    with qtbot.waitSignal(dialog.exportFailed, timeout=TIMEOUT) as blocker:
        assert dialog.start_export()
    assert blocker.args[0].startswith("The export stopped on an unexpected error")
    assert "the disk caught fire" in dialog.message_label.text()
    assert "Traceback" not in dialog.message_label.text()
    assert not dialog.is_running() and dialog.export_button.isEnabled()
    assert dialog.message_label.isVisible() and not dialog.progress_bar.isVisible()
    assert dialog.last_report is None
    _assert_no_work_left(qtbot, dialog)

    def full(plan, progress=None, cancel=None):
        raise DestinationError(f"cannot write {out / 'spectrum.csv'}: no space left on device")

    monkeypatch.setattr(export_job_module, "run_export", full)
    with qtbot.waitSignal(dialog.exportFailed, timeout=TIMEOUT):
        assert dialog.start_export()
    assert "no space left on device" in dialog.message_label.text()
    assert "spectrum.csv" in dialog.message_label.text()
    assert not dialog.message_label.text().startswith("The export stopped on an unexpected error")
    _assert_no_work_left(qtbot, dialog)


# ----- stopping and threads -------------------------------------------------------------------
def test_cancel_after_the_first_file_keeps_it(qtbot, dialog, out):
    _tick(dialog, ("previews", "weights", "spectrum"))
    dialog.set_folder(out)
    seen = []

    def on_started(worker):
        def on_progress(counts):                 # runs in the worker thread, synchronously
            done, total = counts
            seen.append((done, total, threading.get_ident()))
            if done == 1:
                worker.cancel()
        worker.progress.connect(on_progress, Qt.ConnectionType.DirectConnection)

    dialog.exportStarted.connect(on_started)
    report = _export(qtbot, dialog)
    plan = dialog.worker.plan                    # the plan the export wrote from
    assert report.cancelled
    assert report.written == plan.files[:1]
    assert _listing(out) == [plan.files[0].name]
    assert report.skipped == plan.files[1:]
    assert [s[:2] for s in seen] == [(0, 10), (1, 10)]
    assert "Stopped: 1 of 10 files" in dialog.message_label.text()
    _assert_no_work_left(qtbot, dialog)


def test_export_runs_off_the_gui_thread(qtbot, dialog, out):
    gui = threading.get_ident()
    _tick(dialog, ("spectrum", "weights"))
    dialog.set_folder(out)
    writers = []
    dialog.exportStarted.connect(lambda w: w.progress.connect(
        lambda counts: writers.append(threading.get_ident()),
        Qt.ConnectionType.DirectConnection))
    _export(qtbot, dialog)
    worker = dialog.worker
    assert worker.thread_ident is not None and worker.thread_ident != gui
    assert writers and set(writers) == {worker.thread_ident}
    assert dialog.progress_bar.value() == 2 and dialog.progress_bar.maximum() == 2
    # the job's signals stayed in the GUI thread: nothing was moved from the pool thread
    assert worker.signals.thread() is QApplication.instance().thread()
    _assert_no_work_left(qtbot, dialog)


def _hold_after_first_file(dialog):
    """Make the worker wait after its first file until a stop is asked (at most 10 s)."""
    reached = threading.Event()

    def on_started(worker):
        def on_progress(counts):
            if counts[0] == 1:
                reached.set()
                end = time.monotonic() + 10
                while not worker.is_cancel_requested() and time.monotonic() < end:
                    time.sleep(0.005)
        worker.progress.connect(on_progress, Qt.ConnectionType.DirectConnection)

    dialog.exportStarted.connect(on_started)
    return reached


def test_stop_button_stops_after_the_current_file(qtbot, dialog, out):
    _tick(dialog, ("previews", "spectrum"))
    dialog.set_folder(out)
    reached = _hold_after_first_file(dialog)
    assert dialog.start_export()
    qtbot.waitUntil(reached.is_set, timeout=TIMEOUT)
    assert dialog.is_running() and dialog.cancel_button.isEnabled()
    assert not dialog.export_button.isEnabled()
    with qtbot.waitSignal(dialog.exportFinished, timeout=TIMEOUT) as blocker:
        qtbot.mouseClick(dialog.cancel_button, Qt.MouseButton.LeftButton)
    report = blocker.args[0]
    assert report.cancelled and report.n_written == 1
    assert _listing(out) == ["spectrum.csv"]
    assert not dialog.is_running() and dialog.export_button.isEnabled()
    _assert_no_work_left(qtbot, dialog)


def test_closing_during_an_export_stops_and_waits(qtbot, dialog, out):
    _tick(dialog, ("previews", "spectrum"))
    dialog.set_folder(out)
    reached = _hold_after_first_file(dialog)
    assert dialog.start_export()
    qtbot.waitUntil(reached.is_set, timeout=TIMEOUT)
    worker = dialog.worker
    dialog.close()
    assert worker.is_done() and not dialog.is_running()
    assert not dialog.isVisible()
    assert dialog.last_report is not None and dialog.last_report.cancelled
    assert _listing(out) == ["spectrum.csv"]
    _assert_no_work_left(qtbot, dialog)


def test_stopped_before_it_began_writes_nothing(qtbot, dialog, out):
    _tick(dialog, ("previews", "spectrum"))
    dialog.set_folder(out)
    dialog.exportStarted.connect(lambda job: job.cancel())   # before the pool runs it
    finished = []
    dialog.exportFinished.connect(finished.append)
    assert dialog.start_export()
    qtbot.waitUntil(lambda: not dialog.is_running(), timeout=TIMEOUT)
    assert dialog.message_label.text() == "Stopped: 0 of 9 files were written and are complete."
    assert finished == [] and dialog.last_report is None
    assert _listing(out) == []
    assert dialog.export_button.isEnabled()
    _assert_no_work_left(qtbot, dialog)


def test_window_close_stops_a_running_export(qtbot, ini_settings, gray_decomposition, out):
    w = MainWindow(ini_settings, confirm_dialogs=False)
    qtbot.addWidget(w)
    w.state.set_decomposition(gray_decomposition)
    w.show_export_dialog()
    dialog = w.export_dialog
    _tick(dialog, ("previews", "spectrum"))
    dialog.set_folder(out)
    reached = _hold_after_first_file(dialog)
    assert dialog.start_export()
    qtbot.waitUntil(reached.is_set, timeout=TIMEOUT)
    w.close()
    assert dialog.worker.is_done() and not dialog.is_running()
    assert dialog.last_report.cancelled and dialog.last_report.n_written == 1
    _assert_no_work_left(qtbot, dialog)


# ----- the live lines and the enabled state ---------------------------------------------------
def test_resolution_and_compression_lines(qtbot, dialog, gray_decomposition):
    d = gray_decomposition
    n, m = 20 * 24, 8
    for k in (3, 1, 5):
        dialog.rank_spin.setValue(k)
        stored, full = compression_numbers(d.n_pixels, d.n_images, k)
        # the formula of the issue, k(n+m+1)+n against n*m, computed here on its own
        assert (stored, full) == (k * (n + m + 1) + n, n * m)
        text = dialog.compression_label.text()
        assert f"{stored:,} numbers" in text and f"n·m = {full:,}" in text
        assert f"{full / stored:.3g} times fewer" in text
    assert "20 × 24 pixels" in dialog.resolution_label.text()
    assert not dialog.upsample_check.isEnabled()             # not downscaled


def test_quality_only_for_jpeg_and_webp(qtbot, dialog):
    _tick(dialog, ("previews",))
    for key, enabled in (("png", False), ("jpg", True), ("webp", True), ("tiff", False)):
        _choose_format(dialog, key)
        assert dialog.quality_spin.isEnabled() is enabled, key
    _choose_format(dialog, "jpg")
    _tick(dialog, ("weights",))
    assert not dialog.quality_spin.isEnabled()               # no previews, no format
    assert not dialog.float16_check.isEnabled()
    _tick(dialog, ("model",))
    assert dialog.float16_check.isEnabled()


def test_upsample_for_a_downscaled_analysis(qtbot, tmp_path, out):
    rng = np.random.default_rng(2)
    src = tmp_path / "src"
    src.mkdir()
    for i in range(6):
        Image.fromarray(rng.integers(0, 256, (32, 40), dtype=np.uint8)).save(
            src / f"s_{i}.png")
    result = pipeline.analyze([str(src)], pipeline.AnalysisOptions(rank=3, downscale=2))
    d = result.decomposition
    assert tuple(d.image_shape[:2]) == (16, 20)
    dlg = _make_dialog(qtbot, d, rank=2)
    _tick(dlg, ("previews",))
    assert dlg.upsample_check.isEnabled()
    assert "16 × 20 pixels" in dlg.resolution_label.text()
    assert "the sources are 32 × 40" in dlg.resolution_label.text()
    dlg.upsample_check.setChecked(True)
    assert "source size, 32 × 40 pixels" in dlg.resolution_label.text()
    dlg.set_folder(out)
    _export(qtbot, dlg)
    names = _listing(out)
    assert names == [f"s_{i}_r2.png" for i in range(6)]
    assert _size(out / names[0]) == (40, 32)       # Pillow: (cols, rows)


# ----- the main window ------------------------------------------------------------------------
def test_file_export_action(qtbot, ini_settings, gray_decomposition):
    w = MainWindow(ini_settings)
    qtbot.addWidget(w)
    action = w.export_action
    file_menu = w.menuBar().actions()[0].menu()
    assert action in file_menu.actions()
    assert action.text() == "&Export…"
    assert action.shortcut() == QKeySequence("Ctrl+E")
    others = [a for a in w.actions() if a is not action]
    assert all(QKeySequence("Ctrl+E") not in a.shortcuts() for a in others)
    assert not action.isEnabled()                            # no analysis
    w.state.set_decomposition(gray_decomposition)
    w.state.set_rank(4)
    assert action.isEnabled()
    action.trigger()
    dlg = w.export_dialog
    assert isinstance(dlg, ExportDialog) and dlg.isVisible()
    assert dlg.rank_spin.value() == 4 and dlg.rank_spin.maximum() == 5
    w.state.set_decomposition(None)
    assert not action.isEnabled()
    assert not dlg.export_button.isEnabled()
    assert "no analysis" in dlg.analysis_label.text()


def test_destination_is_remembered_for_the_next_session(qtbot, ini_settings,
                                                        gray_decomposition, out, monkeypatch):
    from modescope.app.desktop.dialogs import export as export_dialog
    monkeypatch.setattr(export_dialog, "_session_folder", "")
    state = AppState()
    state.set_decomposition(gray_decomposition)
    first = ExportDialog(state, ini_settings)
    qtbot.addWidget(first)
    assert first.folder() == ""                                 # nothing remembered yet
    first.set_folder(str(out))
    _tick(first, {"basis"})
    report = _export(qtbot, first)
    assert report.written and ini_settings.export_folder() == str(out)
    first.close()
    # a new session: the process-wide folder is gone, the settings still know it
    monkeypatch.setattr(export_dialog, "_session_folder", "")
    second = ExportDialog(state, ini_settings)
    qtbot.addWidget(second)
    assert second.folder() == str(out)
    # a remembered folder that was deleted since is not offered
    monkeypatch.setattr(export_dialog, "_session_folder", "")
    ini_settings.set_export_folder(str(out / "gone"))
    third = ExportDialog(state, ini_settings)
    qtbot.addWidget(third)
    assert third.folder() == ""
