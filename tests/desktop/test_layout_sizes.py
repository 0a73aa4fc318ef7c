"""The fresh layout fits the window at common screen sizes, after View > Reset layout too."""

from __future__ import annotations

import pytest
from PySide6.QtCore import Qt
from PySide6.QtWidgets import QApplication

from modescope.app.desktop.main_window import MainWindow
from modescope.app.desktop.settings import StoredOptions
from modescope.app.desktop.window_docks import SPLIT_BOTTOM_WIDTH

TIMEOUT = 60000
SIZES = ((1280, 800), (1600, 1000), (1920, 1080))


@pytest.fixture(scope="module")
def analysed(qapp, small_collection, tmp_path_factory):
    """One window holding a finished analysis (the docks' labels at their analysed widths)."""
    from PySide6.QtCore import QEventLoop, QSettings, QTimer

    from modescope.app.desktop.settings import Settings

    ini = tmp_path_factory.mktemp("layout") / "layout.ini"
    w = MainWindow(Settings(QSettings(str(ini), QSettings.Format.IniFormat)))
    w.show()
    loop = QEventLoop()
    w.runner.finished.connect(lambda *_: loop.quit())
    QTimer.singleShot(TIMEOUT, loop.quit)
    assert w.start_analysis([str(small_collection)], StoredOptions(rank=5))
    loop.exec()
    assert w.state.decomposition is not None and w.state.decomposition.exact
    yield w
    w.shutdown()
    w.close()
    w.deleteLater()


def _settle(qtbot) -> None:
    for _ in range(5):
        QApplication.processEvents()
    qtbot.wait(20)


@pytest.mark.parametrize("size", SIZES, ids=[f"{w}x{h}" for w, h in SIZES])
def test_every_dock_within_the_window_after_reset(qtbot, analysed, size):
    w = analysed
    w.resize(*size)
    _settle(qtbot)
    w.reset_layout()
    _settle(qtbot)
    assert (w.width(), w.height()) == size          # no dock's minimum widened the window
    assert w._bottom_split == (size[0] >= SPLIT_BOTTOM_WIDTH)
    for name, dock in w.docks.items():
        dock.raise_()                    # the tabbed ones too, each in its turn
        _settle(qtbot)
        assert dock.isVisible(), name
        g = dock.geometry()
        assert g.left() >= 0 and g.right() <= w.width() - 1, (name, g, size)
        assert g.width() >= dock.minimumSizeHint().width(), (name, g.width())
        assert g.top() >= 0 and g.bottom() <= w.height() - 1, (name, g, size)


def test_bottom_docks_side_by_side_only_when_both_fit(qtbot, analysed):
    w = analysed
    w.resize(2560, 1440)
    _settle(qtbot)
    w.reset_layout()
    _settle(qtbot)
    weights, spectrum = w.docks["weightsDock"], w.docks["spectrumDock"]
    assert spectrum not in w.tabifiedDockWidgets(weights)
    assert weights.geometry().right() < spectrum.geometry().left()
    assert spectrum.geometry().right() <= w.width() - 1
    assert weights.width() >= 900                  # its three plots readable
    w.resize(1920, 1080)
    _settle(qtbot)
    w.reset_layout()
    _settle(qtbot)
    assert spectrum in w.tabifiedDockWidgets(weights)


def test_file_names_elided_at_the_start_with_full_path_tooltip(analysed):
    from modescope.app.desktop.views.image_list import ImageListView

    lists = analysed.findChildren(ImageListView)
    assert len(lists) == 1
    table = lists[0].table
    assert table.textElideMode() == Qt.TextElideMode.ElideLeft
    model = table.model()
    d = analysed.state.decomposition
    tips = [model.data(model.index(r, c), Qt.ItemDataRole.ToolTipRole)
            for r in range(model.rowCount()) for c in range(model.columnCount())]
    for path in d.paths[:3]:
        name = path.replace("\\", "/").rsplit("/", 1)[-1]
        assert any(tip and name in tip for tip in tips), name


def test_gallery_grid_fits_the_longest_caption_line(analysed):
    from modescope.app.desktop.views.gallery import BasisGallery

    galleries = analysed.findChildren(BasisGallery)
    assert len(galleries) == 1
    g = galleries[0]
    fm = g.view.fontMetrics()
    labels = [g.model.label(r) for r in range(g.model.rowCount())]
    assert len(labels) == analysed.state.decomposition.rank + 1
    longest = max(fm.horizontalAdvance(line) for lab in labels for line in lab.split("\n"))
    grid = g.view.gridSize()
    assert grid.width() >= longest + 2 * g.view.spacing() + 20
    assert grid.height() >= g.view.iconSize().height() + 4 * fm.lineSpacing()


def test_every_list_of_files_elides_names_at_the_start(analysed):
    # the end of a name (the frame number) tells files apart: every view listing files keeps it
    from modescope.app.desktop.views.duplicates import DuplicatesView
    from modescope.app.desktop.views.outliers_table import OutlierTableView

    tables = analysed.findChildren(OutlierTableView)
    trees = [v.tree for v in analysed.findChildren(DuplicatesView)]
    assert tables and trees
    for view in tables + trees:
        assert view.textElideMode() == Qt.TextElideMode.ElideLeft
