"""The size of a selection is always visible in the main window's status bar."""

from __future__ import annotations

import pytest

from modescope.app.desktop.main_window import MainWindow
from modescope.app.desktop.window_status import selection_text


def test_selection_text_counts_images():
    assert selection_text(()) == ""
    assert selection_text((4,)) == "1 image selected"
    assert selection_text((0, 3, 9)) == "3 images selected"
    assert selection_text(range(1234)) == "1,234 images selected"


@pytest.fixture
def window(qtbot, ini_settings):
    w = MainWindow(ini_settings)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    return w


def test_status_bar_follows_every_selection_change(window, gray_decomposition, gray_pngs,
                                                   make_decomposition):
    label = window.selection_label
    assert label.isHidden() and label.text() == ""
    window.state.set_decomposition(gray_decomposition)
    window.state.set_selection_set([1, 4, 6])
    assert label.text() == "3 images selected" and label.isVisible()
    window.state.set_selection_set([2])
    assert label.text() == "1 image selected" and label.isVisible()
    window.state.set_selection_set([0, 1, 2, 3, 4, 5, 6, 7])
    assert label.text() == "8 images selected"
    # the label sits in the status bar, beside the analysis summary
    assert label.parent() is not None and window.statusBar().isAncestorOf(label)
    assert window.summary_label.text() != label.text()
    window.state.set_selection_set([])
    assert label.isHidden() and label.text() == ""
    # a smaller analysis drops the indices it no longer has, and the count follows
    window.state.set_selection_set([2, 5, 6])
    assert label.text() == "3 images selected"
    paths, images = gray_pngs
    fewer = make_decomposition(images[:4], 3, paths[:4],
                               {"source_size": [20, 24], "color": "gray", "downscale": 1,
                                "resize_mismatched": False})
    window.state.set_decomposition(fewer)
    assert window.state.selection_set == (2,)
    assert label.text() == "1 image selected"
    window.state.set_decomposition(None)
    assert label.isHidden()
