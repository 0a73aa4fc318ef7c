"""File names that are not valid UTF-8 and Pillow's notes on used files, in the workbench.

Qt cannot hold the lone surrogates Python uses for undecodable bytes of a file name (a label
silently drops them), so the views show paths through one helper that writes such bytes as
``\\xNN``. A folder holding ``caf\\xe9.png`` (Latin-1 bytes) analyses in the window; the name shows
in the image list, and a damaged file with such a name shows in the skipped table. A JPEG whose
EXIF is cut short is used, and the Sources pane lists its note apart from the skipped files.
"""

from __future__ import annotations

import logging
import os
import shutil
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from PySide6.QtCore import Qt
from PySide6.QtWidgets import QMessageBox

from modescope.app.desktop.display import display_name, display_path, display_text
from modescope.app.desktop.main_window import MainWindow
from modescope.app.desktop.settings import StoredOptions
from modescope.app.desktop.views.image_list import COL_FILE
from modescope.app.desktop.views.sources import KIND_ROLE, NOTE_PREFIX, IngestPane

TIMEOUT = 60000
RAW_NAME = b"caf\xe9.png"             # Latin-1 "é": not valid UTF-8
BAD_NAME = b"ru\xefn\xff.png"         # a damaged file with an undecodable name


# ----- the helper ------------------------------------------------------------------------------
def test_display_helpers():
    decoded = os.fsdecode(RAW_NAME)                          # 'caf\udce9.png'
    assert display_path(decoded) == "caf\\xe9.png"
    assert display_path(RAW_NAME) == "caf\\xe9.png"
    assert display_path(Path("/x") / decoded) == "/x/caf\\xe9.png"
    assert display_name("/a/b/" + decoded) == "caf\\xe9.png"
    assert display_name("/a/folder/") == "folder"
    assert display_name("/") == "/"
    assert display_path("/données/été.png") == "/données/été.png"   # valid UTF-8 unchanged
    assert display_text(f"cannot read {decoded}: bad") == "cannot read caf\\xe9.png: bad"
    assert display_text("x\ud800y") == "x\\xed\\xa0\\x80y"     # not an escaped byte
    for bad in (None, 3, ["a"]):
        with pytest.raises(TypeError, match="path must be"):
            display_path(bad)
    with pytest.raises(TypeError, match="text must be a str, got bytes"):
        display_text(b"x")


# ----- notes on used files ---------------------------------------------------------------------
def _exif_cut_short() -> bytes:
    exif = Image.Exif()
    exif[0x010E] = "d" * 200                 # ImageDescription: its data lies past the cut
    exif[0x0112] = 1
    return exif.tobytes()[:-150]


@pytest.fixture
def noted_folder(tmp_path):
    """Five gray 16x20 PNG files, a JPEG of that size with damaged EXIF, and a broken PNG."""
    folder = tmp_path / "noted"
    folder.mkdir()
    rng = np.random.default_rng(2)
    for i in range(5):
        Image.fromarray(rng.integers(0, 255, (16, 20), dtype=np.uint8)).save(
            folder / f"f{i}.png")
    Image.fromarray(rng.integers(0, 255, (16, 20), dtype=np.uint8)).save(
        folder / "f5_exif.jpg", quality=95, exif=_exif_cut_short())
    (folder / "zz_broken.png").write_bytes(b"not a png")
    return folder


def _rows(table):
    return [(table.item(r, 0).text(), table.item(r, 1).text(), table.item(r, 0).data(KIND_ROLE))
            for r in range(table.rowCount())]


def test_sources_pane_lists_notes_apart_from_skipped_files(qtbot, noted_folder):
    pane = IngestPane()
    qtbot.addWidget(pane)
    with qtbot.waitSignal(pane.scanFinished, timeout=TIMEOUT) as blocker:
        pane.set_sources([str(noted_folder)])
    source_set = blocker.args[0]
    assert source_set.n_images == 6
    rows = _rows(pane.problem_table)
    assert [r[0] for r in rows] == ["zz_broken.png", "f5_exif.jpg"]
    assert [r[2] for r in rows] == ["skipped", "note"]
    assert rows[1][1].startswith(NOTE_PREFIX + "damaged EXIF metadata")
    assert rows[1][1] == NOTE_PREFIX + source_set.notes[0].reason
    assert pane.problem_table.item(1, 0).font().italic()
    assert not pane.problem_table.item(0, 0).font().italic()
    assert pane.problems_box.title() == "Skipped files and notes"
    pane.set_problems(())
    assert pane.problem_table.rowCount() == 0 and pane.problems_box.title() == "Skipped files"
    pane.shutdown()


@pytest.fixture
def window(qtbot, ini_settings, monkeypatch):
    monkeypatch.setattr(QMessageBox, "question", staticmethod(
        lambda *a, **k: QMessageBox.StandardButton.Discard))
    w = MainWindow(ini_settings)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    yield w
    w.close()


def _run(qtbot, window, folder):
    with qtbot.waitSignal(window.runner.finished, timeout=TIMEOUT):
        assert window.start_analysis([os.fspath(folder)], StoredOptions(rank=2))


def test_a_run_shows_the_notes_of_its_files(qtbot, window, noted_folder):
    _run(qtbot, window, noted_folder)
    assert window.state.decomposition.n_images == 6
    rows = _rows(window.ingest.problem_table)
    assert [(r[0], r[2]) for r in rows] == [("zz_broken.png", "skipped"),
                                            ("f5_exif.jpg", "note")]
    assert rows[1][1].startswith(NOTE_PREFIX + "damaged EXIF metadata")


# ----- names that are not valid UTF-8 ----------------------------------------------------------
@pytest.fixture
def odd_folder(tmp_path, small_collection):
    """Six frames of the small collection, one of them named ``caf\\xe9.png``, and a damaged
    file named ``ru\\xefn\\xff.png``."""
    folder = tmp_path / "odd"
    folder.mkdir()
    frames = sorted(Path(small_collection).iterdir())[:6]
    for src in frames[:5]:
        shutil.copyfile(src, folder / src.name)
    raw = os.fsencode(folder)
    shutil.copyfile(os.fsencode(frames[5]), raw + b"/" + RAW_NAME)
    with open(raw + b"/" + BAD_NAME, "wb") as fh:
        fh.write(b"this is not a PNG file")
    return folder


def test_undecodable_names_analyse_and_show(qtbot, window, odd_folder, caplog):
    with caplog.at_level(logging.WARNING):
        _run(qtbot, window, odd_folder)
    d = window.state.decomposition
    assert d is not None and d.n_images == 6
    odd = os.fsdecode(os.fsencode(odd_folder) + b"/" + RAW_NAME)
    assert odd in d.paths                                   # the path itself is kept exact
    model = window.views["imagesDock"].model
    qtbot.waitUntil(lambda: model.rowCount() == 6, timeout=5000)
    names = [model.index(r, COL_FILE).data(Qt.ItemDataRole.DisplayRole) for r in
             range(model.rowCount())]
    assert "caf\\xe9.png" in names
    row = names.index("caf\\xe9.png")
    tip = model.index(row, COL_FILE).data(Qt.ItemDataRole.ToolTipRole)
    assert display_path(odd) in tip
    rows = _rows(window.ingest.problem_table)
    assert [(r[0], r[2]) for r in rows] == [("ru\\xefn\\xff.png", "skipped")]
    tip = window.ingest.problem_table.item(0, 0).toolTip()
    assert tip == display_path(os.fsencode(odd_folder) + b"/" + BAD_NAME)
    assert not [r for r in caplog.records if r.exc_info]
    assert "Traceback" not in window.statusBar().currentMessage()
