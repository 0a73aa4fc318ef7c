"""Help inside the workbench: the reading guide, the keyboard shortcut list, and tooltips for
the small buttons Qt makes itself (dock title buttons, tab scroll arrows, table corners).

The shortcut list is read from the window's actions each time it is shown, so it never goes
stale: an action added later, or given another key, shows up as it is.
"""

from __future__ import annotations

from PySide6.QtGui import QKeySequence
from PySide6.QtWidgets import (QAbstractButton, QAbstractItemView, QAbstractSpinBox, QComboBox,
                               QDialog, QDialogButtonBox, QHeaderView, QLineEdit, QMenuBar,
                               QSlider, QTabBar, QTableWidget, QTableWidgetItem, QTextBrowser,
                               QVBoxLayout, QWidget)

__all__ = ["GUIDE", "CONTROL_TYPES", "shortcut_rows", "fill_missing_tooltips",
           "controls_without_tooltip", "ShortcutsDialog", "GuideDialog"]

#: The widget types that count as controls (each must carry a tooltip).
CONTROL_TYPES = (QAbstractButton, QComboBox, QAbstractSpinBox, QSlider)

#: (title, paragraph) of the reading guide, in the order of the dialog.
GUIDE = (
    ("Basis images",
     "The analysis finds a few images, the basis images, that together describe how the "
     "images of the collection differ from their mean image. The first basis image follows "
     "the largest variation shared by many images, the second the largest of what is left, "
     "and so on. The colour bar above the tiles says how to read them: the middle colour is "
     "zero, and the two ends pull an image in opposite directions. Which end is which means "
     "nothing by itself; the pattern does."),
    ("Weights",
     "Each image is the mean image plus a weighted sum of the basis images. Its weights say "
     "how much of each basis image it holds. In the Weights plane every point is one image, "
     "placed by its weights on two modes: images close together look alike in those two "
     "patterns, and a point far from the others is unusual in them."),
    ("The residual",
     "The residual is what is left of an image after its reconstruction from the mean and the "
     "first basis images: the image minus the reconstruction. Where the residual is bright or "
     "dark, the image holds something the kept basis images do not describe, such as a "
     "scratch, a passing object or a change of light."),
    ("Looking closely",
     "Turn the mouse wheel over the image, the reconstruction or the residual to zoom all "
     "three about the same spot; drag to pan, double-click (or Fit) to see the whole image "
     "again. Point at a pixel to read its value, its reconstruction and its residual under the "
     "panes. Stretch contrast shows a dark or bright image with its own darkest and brightest "
     "levels as black and white; the numbers do not change."),
    ("The rank slider",
     "The rank is the number of basis images used for the reconstruction and the outlier "
     "scores. A low rank keeps only the broad, shared patterns and leaves more in the "
     "residual; a high rank reproduces each image more closely, noise included. The Singular "
     "values pane shows how much of the variation each extra basis image adds."),
    ("The outlier limits",
     "Two numbers describe how unusual an image is at the rank chosen: T², how far its "
     "weights lie from those of the others, and Q, how large its residual is. Each has a "
     "limit for the confidence level chosen: at 99 %, about 1 ordinary image in 100 lies "
     "beyond a limit by chance. The Outliers table lists the images by score, the larger of "
     "the two ratios to their limits, most unusual first. Outlier flags are a screening aid "
     "for a person to review, not a verdict about an image or about anyone in it."),
    ("Checking new images",
     "File > Check new images against this analysis scores a new batch against the analysis "
     "shown without changing it: each new image gets its weights, Q and T² with Phase II "
     "limits, which are meant for images that took no part in the analysis. The new images "
     "appear as diamonds in the Weights plane and the Q-against-T² plot, and the Checked "
     "images pane lists them with their residual map. The limits assume that the images of "
     "the analysis were normal and that nothing has changed since; a flag asks a person to "
     "look, it is not a verdict on a part, a sample or a person."),
    ("Frequencies and pairs",
     "For a sequence in time (video frames, a time-lapse, snapshots of a flow) each mode's "
     "weights are a time series. The Frequencies pane shows the spectrum of the selected "
     "modes' weights, the dominant frequency of each mode and the pairs of modes that "
     "oscillate together a quarter period apart (a travelling pattern): select the two modes "
     "of a pair and the Weights plane shows their ring. The growth rates come from a linear "
     "model of the weights (dynamic mode decomposition); its caution says when that model "
     "does not fit. The frequencies are in hertz when the frame rate is known, otherwise per "
     "frame."),
)

#: Tooltips for the buttons Qt adds by itself, by object name.
_TIPS_BY_NAME = {
    "qt_dockwidget_closebutton": "Close this pane (the View menu brings it back)",
    "qt_dockwidget_floatbutton": "Float this pane in a window of its own, or dock it again",
    "qt_menubar_ext_button": "More menus",
}


def _plain(text: str) -> str:
    """An action's text without its mnemonic marker and closing dots."""
    return text.replace("&&", "\0").replace("&", "").replace("\0", "&").rstrip("…").strip()


def shortcut_rows(widget: QWidget) -> list[tuple[str, str]]:
    """Return (what it does, keys) for every action of ``widget`` that has a shortcut.

    Parameters
    ----------
    widget : QWidget
        The window whose actions are read (``widget.actions()``).

    Returns
    -------
    list of (str, str)
        The action's text without its mnemonic, and its shortcuts in the platform's notation
        joined with " or "; in the order the actions were added, each action once.

    Raises
    ------
    TypeError
        If ``widget`` is not a QWidget.
    """
    if not isinstance(widget, QWidget):
        raise TypeError(f"widget must be a QWidget, got {type(widget).__name__}")
    rows, seen = [], set()
    for action in widget.actions():
        keys = [k.toString(QKeySequence.SequenceFormat.NativeText) for k in action.shortcuts()]
        keys = [k for k in keys if k]
        if not keys or id(action) in seen:
            continue
        seen.add(id(action))
        rows.append((_plain(action.text()), " or ".join(keys)))
    return rows


def _qt_tip(control: QWidget) -> str:
    """The tooltip of a button Qt made itself ("" when ``control`` is not one)."""
    tip = _TIPS_BY_NAME.get(control.objectName(), "")
    if tip:
        return tip
    parent = control.parentWidget()
    if isinstance(parent, QTabBar):
        return "Show the tabs hidden at this side"
    if isinstance(parent, QAbstractItemView) and control.metaObject().className() == "QTableCornerButton":
        return "Select every row"
    if isinstance(parent, QLineEdit):
        return "Clear the text"
    if isinstance(parent, QMenuBar):
        return "More menus"
    return ""


def fill_missing_tooltips(root: QWidget) -> int:
    """Give a tooltip to each button that Qt made itself under ``root`` and that has none.

    Parameters
    ----------
    root : QWidget
        The window (or a part of it) to walk, ``root`` included.

    Returns
    -------
    int
        How many tooltips were set.

    Raises
    ------
    TypeError
        If ``root`` is not a QWidget.
    """
    if not isinstance(root, QWidget):
        raise TypeError(f"root must be a QWidget, got {type(root).__name__}")
    n = 0
    for control in [root, *root.findChildren(QAbstractButton)]:
        if isinstance(control, QAbstractButton) and not control.toolTip():
            tip = _qt_tip(control)
            if tip:
                control.setToolTip(tip)
                n += 1
    return n


def controls_without_tooltip(root: QWidget) -> list[QWidget]:
    """Return the controls (:data:`CONTROL_TYPES`) under ``root`` that have no tooltip.

    Raises
    ------
    TypeError
        If ``root`` is not a QWidget.
    """
    if not isinstance(root, QWidget):
        raise TypeError(f"root must be a QWidget, got {type(root).__name__}")
    found = []
    for kind in CONTROL_TYPES:
        found.extend(c for c in root.findChildren(kind) if not c.toolTip().strip())
    return list(dict.fromkeys(found))


def _lay_out_with_close(dialog: QDialog, content: QWidget, close_tip: str, width: int,
                        height: int) -> QDialogButtonBox:
    """Put ``content`` above a Close button (tooltip ``close_tip``) in ``dialog`` and size it.

    The one set-up both Help dialogs share. Returns the button box.
    """
    buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Close, dialog)
    buttons.rejected.connect(dialog.reject)
    for b in buttons.buttons():
        b.setToolTip(close_tip)
    lay = QVBoxLayout(dialog)
    lay.addWidget(content)
    lay.addWidget(buttons)
    dialog.resize(width, height)
    return buttons


class ShortcutsDialog(QDialog):
    """A table of the window's keyboard shortcuts, read from its actions when shown.

    Parameters
    ----------
    window : QWidget
        The window whose actions are listed (see :func:`shortcut_rows`).
    """

    def __init__(self, window: QWidget):
        super().__init__(window)
        self.setWindowTitle("Keyboard shortcuts")
        self._window = window
        self.table = QTableWidget(0, 2, self)
        self.table.setHorizontalHeaderLabels(["Action", "Keys"])
        self.table.verticalHeader().hide()
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.horizontalHeader().setSectionResizeMode(
            0, QHeaderView.ResizeMode.ResizeToContents)
        self.table.horizontalHeader().setStretchLastSection(True)
        self.table.setToolTip("Every keyboard shortcut of the window's menus and actions")
        self.buttons = _lay_out_with_close(self, self.table, "Close this list", 460, 480)
        self.refresh()

    def refresh(self) -> None:
        """Read the shortcuts from the window's actions again."""
        rows = shortcut_rows(self._window)
        self.table.setRowCount(len(rows))
        for r, (text, keys) in enumerate(rows):
            self.table.setItem(r, 0, QTableWidgetItem(text))
            self.table.setItem(r, 1, QTableWidgetItem(keys))

    def rows(self) -> list[tuple[str, str]]:
        """Return the (action, keys) pairs shown."""
        return [(self.table.item(r, 0).text(), self.table.item(r, 1).text())
                for r in range(self.table.rowCount())]

    def showEvent(self, event) -> None:  # noqa: N802 - Qt name
        self.refresh()
        super().showEvent(event)


class GuideDialog(QDialog):
    """The short guide "How to read this": one paragraph per part of :data:`GUIDE`."""

    def __init__(self, parent: QWidget | None = None):
        super().__init__(parent)
        self.setWindowTitle("How to read this")
        self.text = QTextBrowser(self)
        self.text.setOpenExternalLinks(False)
        self.text.setHtml("".join(f"<h3>{title}</h3><p>{body}</p>" for title, body in GUIDE))
        self.buttons = _lay_out_with_close(self, self.text, "Close the guide", 560, 560)
