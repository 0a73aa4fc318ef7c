"""Help inside the workbench: the guide, the shortcut list read from the actions, and a tooltip
on every control of the window."""

from __future__ import annotations

import pytest
from PySide6.QtGui import QAction, QKeySequence
from PySide6.QtWidgets import QAbstractButton, QAbstractSpinBox, QComboBox, QSlider, QWidget

from modescope.app.desktop.main_window import MainWindow
from modescope.app.desktop.window_help import (GUIDE, controls_without_tooltip,
                                               fill_missing_tooltips, shortcut_rows)


@pytest.fixture
def window(qtbot, ini_settings):
    w = MainWindow(ini_settings, confirm_dialogs=False)
    qtbot.addWidget(w)
    w.resize(1280, 800)
    w.show()
    qtbot.waitExposed(w)
    yield w
    w.close()


def _describe(widget: QWidget) -> str:
    chain, p = [], widget
    while p is not None:
        chain.append(f"{p.metaObject().className()}:{p.objectName()}")
        p = p.parentWidget()
    return " < ".join(chain)


def test_help_menu_lists_guide_shortcuts_and_about(window):
    menus = {a.text(): a.menu() for a in window.menuBar().actions()}
    texts = [a.text() for a in menus["&Help"].actions() if not a.isSeparator()]
    assert texts == ["&How to read this", "&Keyboard shortcuts", "&About Modescope"]


def test_shortcut_list_is_every_action_shortcut(qtbot, window):
    window.show_shortcuts()
    dialog = window.shortcuts_dialog
    qtbot.waitExposed(dialog)
    rows = dict(dialog.rows())
    expected = {}
    for a in window.actions():
        keys = [k.toString(QKeySequence.SequenceFormat.NativeText) for k in a.shortcuts()]
        if keys:
            expected[a.text().replace("&", "").rstrip("…")] = " or ".join(keys)
    assert rows == expected
    assert rows["Start analysis"] == QKeySequence("Ctrl+R").toString(
        QKeySequence.SequenceFormat.NativeText)
    assert "Keyboard shortcuts" in rows and "How to read this" in rows
    assert len(rows) >= 15
    # read from the actions each time: a new action shows up, a changed key is shown as is
    extra = QAction("Zoom &in", window)
    extra.setShortcut(QKeySequence("Ctrl+Alt+I"))
    window.addAction(extra)
    window.rank_up_action.setShortcut(QKeySequence("Ctrl+Alt+U"))
    dialog.hide()
    window.show_shortcuts()
    rows = dict(dialog.rows())
    assert rows["Zoom in"] == QKeySequence("Ctrl+Alt+I").toString(
        QKeySequence.SequenceFormat.NativeText)
    assert rows["Rank up"] == QKeySequence("Ctrl+Alt+U").toString(
        QKeySequence.SequenceFormat.NativeText)


def test_shortcut_rows_checks_its_argument():
    with pytest.raises(TypeError, match="widget must be a QWidget"):
        shortcut_rows("window")
    with pytest.raises(TypeError, match="root must be a QWidget"):
        fill_missing_tooltips(None)


def test_guide_has_each_part_and_the_screening_caution(qtbot, window):
    window.show_guide()
    dialog = window.guide_dialog
    qtbot.waitExposed(dialog)
    text = dialog.text.toPlainText()
    for title in ("Basis images", "Weights", "The residual", "Looking closely",
                  "The rank slider", "The outlier limits"):
        assert title in text
    assert [t for t, _ in GUIDE] == ["Basis images", "Weights", "The residual",
                                     "Looking closely", "The rank slider",
                                     "The outlier limits", "Checking new images",
                                     "Frequencies and pairs"]
    assert "not a verdict on a part, a sample or a person" in text
    assert "Phase II" in text and "ring" in text
    assert "zoom" in text and "Stretch contrast" in text
    assert "screening aid for a person to review, not a verdict" in text


@pytest.mark.parametrize("reset", [False, True])
def test_every_control_has_a_tooltip(qtbot, window, reset):
    if reset:
        window.reset_layout()            # docks tabbed: Qt makes new tab bars
        qtbot.wait(50)
    window.show_shortcuts()
    window.show_guide()
    qtbot.wait(20)
    roots = [window, window.shortcuts_dialog, window.guide_dialog]
    controls = [c for r in roots for kind in (QAbstractButton, QComboBox, QAbstractSpinBox,
                                              QSlider) for c in r.findChildren(kind)]
    assert len(controls) > 30
    missing = [_describe(c) for c in controls if not c.toolTip().strip()]
    assert missing == []
    assert controls_without_tooltip(window) == []


def test_help_dialogs_share_one_close_button_set_up(qtbot, window):
    window.show_shortcuts()
    window.show_guide()
    for dialog, content, tip, size in ((window.shortcuts_dialog, window.shortcuts_dialog.table,
                                        "Close this list", (460, 480)),
                                       (window.guide_dialog, window.guide_dialog.text,
                                        "Close the guide", (560, 560))):
        qtbot.waitExposed(dialog)
        buttons = dialog.buttons.buttons()
        assert [b.text().replace("&", "") for b in buttons] == ["Close"]
        assert buttons[0].toolTip() == tip
        assert dialog.layout().itemAt(0).widget() is content
        assert dialog.layout().itemAt(1).widget() is dialog.buttons
        assert (dialog.width(), dialog.height()) == size
        buttons[0].click()                               # Close closes the dialog
        qtbot.waitUntil(lambda d=dialog: not d.isVisible(), timeout=2000)
