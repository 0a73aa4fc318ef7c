"""The workbench never writes over a source image, and opens a damaged model with one message.

Every writer of the workbench is driven through its widgets with a file dialog that answers a
source image's name: the outlier view's CSV and path list, the model save, the export dialog
(with "allow writing into a folder of sources" and "overwrite" ticked). Each shows a message
naming the file, and the source's bytes stay the same (hashed before and after). A model file
damaged after it was written (metadata of the wrong types, a named pipe) is refused by Open with
one message naming the file and the problem, and the analysis shown stays.
"""

from __future__ import annotations

import hashlib
import io
import json
import logging
import os
import zipfile
from pathlib import Path

import numpy as np
import pytest
from PySide6.QtCore import Qt
from PySide6.QtWidgets import QFileDialog, QMessageBox

from modescope.app.desktop.dialogs.export import ExportDialog
from modescope.app.desktop.main_window import MainWindow
from modescope.app.desktop.state import AppState
from modescope.app.desktop.views.outliers import OutlierView
from modescope.core import save_model
from modescope.core.review import marks as review

TIMEOUT = 20000


def _digest(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def _save_as(monkeypatch, path):
    monkeypatch.setattr(QFileDialog, "getSaveFileName",
                        staticmethod(lambda *a, **k: (str(path), "")))


@pytest.fixture
def no_questions(monkeypatch):
    """Every question is answered Yes (replace) or Discard (unsaved marks): only the source
    rule can refuse."""
    asked = []

    def question(*args, **kwargs):
        asked.append(args[2] if len(args) > 2 else "")
        buttons = args[3] if len(args) > 3 else kwargs.get("buttons")
        if buttons is not None and buttons & QMessageBox.StandardButton.Discard:
            return QMessageBox.StandardButton.Discard      # the unsaved-marks question
        return QMessageBox.StandardButton.Yes
    monkeypatch.setattr(QMessageBox, "question", staticmethod(question))
    return asked


@pytest.fixture
def sources(gray_pngs):
    """The eight gray PNG files, the first renamed ``mean.png`` and the second ``frame.npz``
    (a source whose name a model or an export would take); returns (paths, images)."""
    paths, images = gray_pngs
    renamed = []
    for i, p in enumerate(paths):
        new = {0: "mean.png", 1: "frame.npz"}.get(i)
        if new:
            target = str(Path(p).with_name(new))
            os.rename(p, target)
            p = target
        renamed.append(p)
    return renamed, images


@pytest.fixture
def decomposition(make_decomposition, sources):
    paths, images = sources
    meta = {"source_size": [20, 24], "color": "gray", "downscale": 1,
            "resize_mismatched": False}
    return make_decomposition(images, 5, paths, meta)


@pytest.fixture
def hashes(sources):
    paths, _ = sources
    return {p: _digest(p) for p in paths}


def _unchanged(hashes) -> bool:
    return all(_digest(p) == h for p, h in hashes.items())


# ----- the outlier view's lists ----------------------------------------------------------------
@pytest.fixture
def outlier_view(qtbot, decomposition):
    state = AppState()
    state.set_decomposition(decomposition)
    state.set_rank(2)
    v = OutlierView(state)
    qtbot.addWidget(v)
    v.show()
    qtbot.waitExposed(v)
    state.set_marks([2, 5], review.EXCLUDE)
    return v


@pytest.mark.parametrize("kind", ["csv", "paths"])
def test_outlier_lists_refuse_a_source(qtbot, outlier_view, sources, hashes, kind,
                                       monkeypatch, no_questions):
    paths, _ = sources
    target = paths[3]                      # img_03.png, an image of the analysis
    _save_as(monkeypatch, target)
    assert outlier_view.export_list("excluded", kind) is None
    text = outlier_view.message_box.text()
    assert target in text and "source image" in text and "Traceback" not in text
    assert no_questions == []              # refused before asking to replace it
    assert _unchanged(hashes)
    outlier_view.message_box.close()


def test_outlier_list_refuses_a_link_to_a_source(qtbot, outlier_view, sources, hashes,
                                                 tmp_path, monkeypatch, no_questions):
    paths, _ = sources
    link = tmp_path / "elsewhere.csv"
    os.symlink(paths[4], link)
    _save_as(monkeypatch, link)
    assert outlier_view.export_list("excluded", "csv") is None
    text = outlier_view.message_box.text()
    assert str(link) in text and paths[4] in text
    assert _unchanged(hashes) and link.is_symlink()


# ----- the model save --------------------------------------------------------------------------
@pytest.fixture
def window(qtbot, ini_settings, no_questions):
    w = MainWindow(ini_settings)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    yield w
    w.close()


@pytest.mark.parametrize("answer", ["frame.npz", "frame"])   # ".npz" is added to the second
def test_model_save_refuses_a_source(qtbot, window, decomposition, sources, hashes, answer,
                                     monkeypatch):
    paths, _ = sources
    window.state.set_decomposition(decomposition)
    source = paths[1]
    _save_as(monkeypatch, Path(source).with_name(answer))
    assert window.choose_save() is None
    text = window.message_box.text()
    assert source in text and "source image" in text and "Traceback" not in text
    assert _unchanged(hashes)
    assert window.current_file != source
    # a name that is not a source is written
    other = Path(source).with_name("analysis.npz")
    _save_as(monkeypatch, other)
    assert window.choose_save() == other and other.is_file()
    assert _unchanged(hashes)


# ----- the export dialog -----------------------------------------------------------------------
def test_export_dialog_refuses_a_source_even_with_overwrite(qtbot, decomposition, sources,
                                                            hashes):
    paths, _ = sources
    state = AppState()
    state.set_decomposition(decomposition)
    dlg = ExportDialog(state)
    qtbot.addWidget(dlg)
    dlg.show()
    qtbot.waitExposed(dlg)
    folder = Path(paths[0]).parent
    for name, box in dlg.what_boxes.items():
        box.setChecked(name in ("basis", "spectrum"))      # basis writes mean.png
    dlg.set_folder(folder)
    dlg.source_folder_check.setChecked(True)
    dlg.overwrite_check.setChecked(True)
    before = sorted(p.name for p in folder.iterdir())
    with qtbot.waitSignal(dlg.exportFailed, timeout=TIMEOUT) as blocker:
        qtbot.mouseClick(dlg.export_button, Qt.MouseButton.LeftButton)
    text = dlg.message_label.text()
    assert text == blocker.args[0]
    assert str(folder / "mean.png") in text and "source image" in text
    assert "Traceback" not in text and not dlg.is_running()
    assert sorted(p.name for p in folder.iterdir()) == before      # nothing was written
    assert _unchanged(hashes)


# ----- Open on a damaged model -----------------------------------------------------------------
def _with_metadata(good: Path, path: Path, **changes) -> Path:
    """Copy ``good`` with its metadata member rewritten (fields of ``changes`` replaced)."""
    with zipfile.ZipFile(good) as src:
        meta = json.loads(str(np.load(io.BytesIO(src.read("metadata.npy")))))
        meta.update(changes)
        with zipfile.ZipFile(path, "w") as dst:
            for name in src.namelist():
                data = src.read(name)
                if name == "metadata.npy":
                    buf = io.BytesIO()
                    np.save(buf, np.asarray(json.dumps(meta)))
                    data = buf.getvalue()
                dst.writestr(name, data)
    return path


def _damaged(kind: str, good: Path, tmp_path: Path) -> tuple[Path, str]:
    """Return a damaged model file and words its message must hold."""
    if kind == "wrong types":
        return (_with_metadata(good, tmp_path / "hand_edited.npz", downscale="2"),
                "'downscale' must be an integer")
    if kind == "options":
        return (_with_metadata(good, tmp_path / "options.npz", options="fast"),
                "'options' must be a JSON object")
    fifo = tmp_path / "pipe.npz"
    os.mkfifo(fifo)
    return fifo, "named pipe"


@pytest.mark.parametrize("kind", [
    "wrong types", "options",
    pytest.param("fifo", marks=pytest.mark.skipif(not hasattr(os, "mkfifo"),
                                                   reason="no named pipes here"))])
def test_open_on_a_damaged_model_keeps_the_analysis(qtbot, window, decomposition, tmp_path,
                                                    kind, caplog):
    good = save_model(tmp_path / "good.npz", decomposition)
    window.state.set_decomposition(decomposition)
    window.state.set_marks([1], review.EXCLUDE)
    shown = window.state.decomposition
    title = window.windowTitle()
    path, words = _damaged(kind, good, tmp_path)
    with caplog.at_level(logging.WARNING):
        assert window.open_analysis(str(path)) is False
    text = window.message_box.text()
    assert text.count(str(path)) == 1 and words in text
    assert "Traceback" not in text and "allow_pickle" not in text
    assert not [r for r in caplog.records if r.exc_info]
    assert window.state.decomposition is shown
    assert review.excluded_indices(window.state.decomposition).tolist() == [1]
    assert window.windowTitle() == title
    window.message_box.close()
    # the good file still opens
    assert window.open_analysis(str(good)) is True
    assert window.state.decomposition.n_images == decomposition.n_images
