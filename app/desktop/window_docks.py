"""The main window's docks: where they go on a fresh start, and the remembered layout.

:class:`DockLayoutMixin` is one part of :class:`~modescope.app.desktop.main_window.MainWindow`.
Fresh layout: "Sources" and "Images" as tabs on the left, full height; "Basis images" right of
the inspector; "Weights" and "Singular values" at the bottom, side by side in a window at least
:data:`SPLIT_BOTTOM_WIDTH` pixels wide (and wide enough for both docks' smallest widths beside the
left column) and as tabs in a smaller one; "Outliers" and "Near-duplicates" as tabs beside
"Weights" and "Images". A first start (no remembered geometry) fills the screen's available
area (not the maximised state: restoring a layout saved from it crashed Qt offscreen).
"""

from __future__ import annotations

from PySide6.QtCore import Qt, Slot
from PySide6.QtWidgets import QApplication, QDockWidget, QWidget

__all__ = ["DockLayoutMixin", "DEFAULT_SIZE", "SPLIT_BOTTOM_WIDTH"]

DEFAULT_SIZE = (1280, 800)
#: Below this window width "Weights" and "Singular values" share the bottom area as tabs. The
#: Singular values pane's controls alone need about 810 pixels once an analysis is shown and the
#: Weights pane's three plots about 900 to be read; the left column takes about a quarter. At
#: 1920 pixels side by side squeezed the Weights plots out of their dock, so tabs up to there.
SPLIT_BOTTOM_WIDTH = 2200
#: Room for the dock separators and frames in a row of docks.
_SEPARATORS = 24


class DockLayoutMixin:
    """Docks, window geometry and their settings (a part of ``MainWindow``).

    Uses ``self.settings`` and ``self.ingest``; keeps the docks in ``self.docks`` by object
    name and the fresh layout in ``self._default_state``.
    """

    def _add_dock(self, name: str, title: str, widget: QWidget) -> QDockWidget:
        dock = QDockWidget(title, self)
        dock.setObjectName(name)
        dock.setWidget(widget)
        dock.setFeatures(QDockWidget.DockWidgetFeature.DockWidgetMovable
                         | QDockWidget.DockWidgetFeature.DockWidgetClosable
                         | QDockWidget.DockWidgetFeature.DockWidgetFloatable)
        self.docks[name] = dock
        return dock

    def _place_docks(self) -> None:
        d = self.docks
        self.setCorner(Qt.Corner.TopLeftCorner, Qt.DockWidgetArea.LeftDockWidgetArea)
        self.setCorner(Qt.Corner.BottomLeftCorner, Qt.DockWidgetArea.LeftDockWidgetArea)
        self.setCorner(Qt.Corner.TopRightCorner, Qt.DockWidgetArea.RightDockWidgetArea)
        self.setCorner(Qt.Corner.BottomRightCorner, Qt.DockWidgetArea.BottomDockWidgetArea)
        for dock in d.values():
            dock.setFloating(False)
            dock.show()
        tabs = (("outliersDock", "weightsDock"), ("duplicatesDock", "imagesDock"),
                ("checkedDock", "outliersDock"),
                ("frequenciesDock", "weightsDock"))
        for name, _beside in tabs:   # out of the way, so no row of docks wider than the window
            self.removeDockWidget(d[name])
        self.addDockWidget(Qt.DockWidgetArea.LeftDockWidgetArea, d["sourcesDock"])
        self.addDockWidget(Qt.DockWidgetArea.LeftDockWidgetArea, d["imagesDock"])
        self.tabifyDockWidget(d["sourcesDock"], d["imagesDock"])
        self.addDockWidget(Qt.DockWidgetArea.RightDockWidgetArea, d["basisDock"])
        self.addDockWidget(Qt.DockWidgetArea.BottomDockWidgetArea, d["weightsDock"])
        self.addDockWidget(Qt.DockWidgetArea.BottomDockWidgetArea, d["spectrumDock"])
        width = max(self.width(), DEFAULT_SIZE[0])
        self._bottom_split = width >= max(SPLIT_BOTTOM_WIDTH, self._split_needs())
        if self._bottom_split:
            self.splitDockWidget(d["weightsDock"], d["spectrumDock"], Qt.Orientation.Horizontal)
        else:
            self.tabifyDockWidget(d["weightsDock"], d["spectrumDock"])
        for name, beside in tabs:
            self.tabifyDockWidget(d[beside], d[name])
            d[name].show()
        d["weightsDock"].raise_()
        d["sourcesDock"].raise_()
        self._size_docks(width, max(self.height(), DEFAULT_SIZE[1]))

    def _split_needs(self) -> int:
        """Return the window width the bottom docks need side by side, from their minimums."""
        d = self.docks

        def least(*names: str) -> int:
            return max(d[n].minimumSizeHint().width() for n in names)

        return (least("sourcesDock", "imagesDock", "duplicatesDock")
                + least("weightsDock", "outliersDock", "frequenciesDock") + least("spectrumDock")
                + _SEPARATORS)

    def _size_docks(self, width: int, height: int) -> None:
        d = self.docks
        left = max(290, int(width * 0.23))
        right = max(300, int(width * 0.27))
        self.resizeDocks([d["sourcesDock"], d["basisDock"]], [left, right],
                         Qt.Orientation.Horizontal)
        if self._bottom_split:
            bottom = width - left - _SEPARATORS
            spectrum = max(int(bottom * 0.5), d["spectrumDock"].minimumSizeHint().width())
            self.resizeDocks([d["weightsDock"], d["spectrumDock"]],
                             [bottom - spectrum, spectrum], Qt.Orientation.Horizontal)
        self.resizeDocks([d["weightsDock"]], [max(220, int(height * 0.36))],
                         Qt.Orientation.Vertical)

    def _restore_window(self) -> None:
        geometry = self.settings.window_geometry()
        restored = not geometry.isEmpty() and self.restoreGeometry(geometry)
        if not restored:            # a first start: fill the screen, as a workbench should
            screen = QApplication.primaryScreen()
            w, h = DEFAULT_SIZE
            if screen is not None:
                avail = screen.availableGeometry()
                w, h = avail.width(), avail.height()
                self.move(avail.topLeft())
            self.resize(w, h)
            self._place_docks()     # tabs or side by side for this width
        state = self.settings.window_state()
        if not state.isEmpty():
            self.restoreState(state)

    def save_settings(self) -> None:
        """Remember layout, geometry, options and the dialog folder."""
        self.settings.set_window_geometry(self.saveGeometry())
        self.settings.set_window_state(self.saveState())
        self.settings.set_options(self.ingest.options())
        if self.ingest.dialog_dir():
            self.settings.set_last_dir(self.ingest.dialog_dir())
        self.settings.sync()

    @Slot()
    def reset_layout(self) -> None:
        """Put every dock back where a fresh start has it."""
        self.restoreState(self._default_state)
        self._place_docks()
        self._size_docks(self.width(), self.height())
