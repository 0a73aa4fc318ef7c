"""Checked images: new images scored against the current analysis without changing it.

"Check new images against this analysis" (File menu, or the button here) asks for folders and
files, then reads them in the background (:mod:`~modescope.app.desktop.workers.background`) with
the analysis' own colour, size and downscale, with progress and Cancel. Every number comes from
:func:`modescope.core.review.check.check_images` (Phase II limits). The view shows:

* a table of the checked images with their score, Q, T² and the limits they are beyond;
* the residual map of the selected checked image (what the analysis at the current rank cannot
  explain, in the image's own layout; diverging colours, the largest absolute value at both
  ends) and each mode's part of its T²;
* export of the flagged list to CSV.

The checked images also appear in the weights plane (diamonds over the reference cloud) and in
the Q-against-T² plot with the Phase II T² limit; they follow the rank and level of the state.
"""

from __future__ import annotations

import os

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt, Slot
from PySide6.QtWidgets import (QAbstractItemView, QFileDialog, QHBoxLayout, QLabel,
                               QProgressBar, QPushButton, QSplitter, QTableWidget,
                               QTableWidgetItem, QVBoxLayout, QWidget)

from modescope.core.errors import ModescopeError
from modescope.core.output.atomic import refuse_sources
from modescope.core.output.images import signed_image_rgb
from modescope.core.review.check import check_images, write_check_csv
from modescope.core.review.maps import read_like_model, residual_map, t2_contributions

from modescope.app.desktop.display import display_name, display_path
from modescope.app.desktop.state import AppState
from modescope.app.desktop.views.checked_parts import CheckedImages, CheckSourcesDialog
from modescope.app.desktop.workers.background import BackgroundRunner, Stopped
from modescope.app.words import counted

__all__ = ["CheckedView", "CheckedImages", "CheckSourcesDialog", "HELP_TEXT", "COLUMNS"]

HELP_TEXT = ("New images are scored against this analysis with Phase II limits, which assume "
             "that the reference images were normal and that the process has not changed "
             "since. A flag asks a person to look at the image; it is not a verdict on a part, "
             "a sample or a person.")

#: Columns of the table of checked images.
COLUMNS = ("number", "file", "score", "Q", "T²", "beyond")


class _NumberItem(QTableWidgetItem):
    """A table cell that sorts by its number."""

    def __init__(self, value: float, text: str):
        super().__init__(text)
        self.setData(Qt.ItemDataRole.UserRole + 1, float(value))
        self.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)

    def __lt__(self, other):  # noqa: D105 - Qt's sort order
        return (self.data(Qt.ItemDataRole.UserRole + 1)
                < other.data(Qt.ItemDataRole.UserRole + 1))


class CheckedView(QWidget):
    """The table of checked images, their residual maps and the controls of a check.

    Parameters
    ----------
    state : AppState
        Reads the analysis, rank and level (never writes them).
    parent : QWidget, optional

    Attributes
    ----------
    checked : CheckedImages
        What was checked, scored at the state's rank and level.
    table : QTableWidget
    map_item : pyqtgraph.ImageItem
        The residual map of the selected checked image (RGB).
    map_values : ndarray or None
        The residual values drawn there, shape (rows, cols, channels).
    contributions : pyqtgraph.BarGraphItem
        Each mode's part of the selected image's T².
    """

    def __init__(self, state: AppState, parent: QWidget | None = None):
        super().__init__(parent)
        if not isinstance(state, AppState):
            raise TypeError(f"state must be an AppState, got {type(state).__name__}")
        self.state = state
        self.checked = CheckedImages(self)
        self.runner = BackgroundRunner(self, task="The check")
        self.map_runner = BackgroundRunner(self, task="Reading the image")
        self.last_message = ""
        self.map_limit = 0.0
        self.map_values = None
        self._dir = ""
        self._build()
        self._wire()
        self._show_result(None)

    # ----- construction ------------------------------------------------------------------------
    def _build(self) -> None:
        self.check_button = QPushButton("Check new images…", self)
        self.check_button.setToolTip("Choose folders or files of new images and score them "
                                     "against this analysis (the analysis is not changed)")
        self.cancel_button = QPushButton("Cancel", self)
        self.cancel_button.setToolTip("Stop the check; the images read so far are shown")
        self.cancel_button.setEnabled(False)
        self.export_button = QPushButton("Export flagged…", self)
        self.export_button.setToolTip("Write the flagged checked images with their scores to a "
                                      "CSV file")
        self.progress = QProgressBar(self)
        self.progress.setToolTip("Images of the check read so far")
        self.progress.setVisible(False)
        self.summary = QLabel(self)
        self.summary.setWordWrap(True)
        self.help_label = QLabel(HELP_TEXT, self)
        self.help_label.setWordWrap(True)
        self.help_label.setStyleSheet("color: #555;")
        self.table = QTableWidget(0, len(COLUMNS), self)
        self.table.setHorizontalHeaderLabels(list(COLUMNS))
        self.table.setToolTip("The checked images; select one to see its residual map")
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.verticalHeader().setVisible(False)
        self.table.setSortingEnabled(True)
        self.plots = pg.GraphicsLayoutWidget(self)
        self.plots.setBackground("w")
        self.plots.setToolTip("Residual of the selected checked image at the current rank (red "
                              "brighter, blue darker than the analysis explains) and each "
                              "mode's part of its T²")
        self.map_plot = self.plots.addPlot(row=0, col=0)
        self.map_plot.setTitle("Residual map", color="#222", size="10pt")
        self.map_plot.setAspectLocked(True)
        self.map_plot.invertY(True)
        self.map_plot.hideAxis("left")
        self.map_plot.hideAxis("bottom")
        self.map_plot.setMenuEnabled(False)
        self.map_item = pg.ImageItem(axisOrder="row-major")
        self.map_plot.addItem(self.map_item)
        self.bar_plot = self.plots.addPlot(row=0, col=1)
        self.bar_plot.setTitle("T² by mode", color="#222", size="10pt")
        self.bar_plot.setMenuEnabled(False)
        self.bar_plot.getAxis("bottom").setTickSpacing(1, 1)
        self.contributions = pg.BarGraphItem(x=[], height=[], width=0.7,
                                             brush=pg.mkBrush(200, 90, 40))
        self.bar_plot.addItem(self.contributions)
        self.plots.ci.layout.setColumnStretchFactor(0, 3)
        self.plots.ci.layout.setColumnStretchFactor(1, 2)
        buttons = QHBoxLayout()
        for w in (self.check_button, self.cancel_button, self.export_button):
            buttons.addWidget(w)
        buttons.addWidget(self.progress, 1)
        split = QSplitter(Qt.Orientation.Horizontal, self)
        split.addWidget(self.table)
        split.addWidget(self.plots)
        split.setStretchFactor(0, 1)
        split.setStretchFactor(1, 1)
        split.setSizes([480, 420])
        self.plots.setMinimumWidth(220)
        layout = QVBoxLayout(self)
        layout.setContentsMargins(4, 4, 4, 4)
        layout.addLayout(buttons)
        layout.addWidget(self.summary)
        layout.addWidget(split, 1)
        layout.addWidget(self.help_label)

    def _wire(self) -> None:
        self.check_button.clicked.connect(self.choose_and_check)
        self.cancel_button.clicked.connect(self.runner.cancel)
        self.export_button.clicked.connect(lambda: self.export_flagged())
        self.runner.progress.connect(self._on_progress)
        self.runner.finished.connect(self._on_finished)
        self.runner.cancelled.connect(self._on_cancelled)
        self.runner.failed.connect(self._on_failed)
        self.runner.runningChanged.connect(self._on_running)
        self.map_runner.finished.connect(self._show_map)
        self.map_runner.failed.connect(self._map_failed)
        self.table.itemSelectionChanged.connect(self._on_table_selection)
        self.checked.changed.connect(self._show_result)
        self.checked.selectedChanged.connect(self._on_selected)
        for signal in (self.state.decompositionChanged, self.state.rankChanged,
                       self.state.levelChanged):
            signal.connect(self._follow_state)

    def attach(self, weights_view=None, outlier_plot=None) -> None:
        """Draw the checked images in the weights plane and the Q-against-T² plot too."""
        if weights_view is not None:
            self.checked.changed.connect(
                lambda r: weights_view.show_checked(None if r is None else r.weights))
        if outlier_plot is not None:
            self.checked.changed.connect(
                lambda r: outlier_plot.show_checked(None if r is None else r.table))

    # ----- running a check ---------------------------------------------------------------------
    @Slot()
    def choose_and_check(self) -> bool:
        """Ask for folders and files (a dialog), then check them. Return True if started."""
        if not self._ready():
            return False
        dialog = CheckSourcesDialog(self, self._dir)
        if dialog.exec() != CheckSourcesDialog.DialogCode.Accepted or not dialog.sources():
            return False
        self._dir = os.path.dirname(dialog.sources()[0])
        return self.check_sources(dialog.sources())

    def _ready(self) -> bool:
        d = self.state.decomposition
        if d is None:
            why = "Open or run an analysis first: new images are checked against it."
        elif d.residual is None or not d.exact:
            why = ("This analysis is not finished (a partial result); finish it before "
                   "checking new images against it.")
        else:
            return True
        self._say(why)
        self._raise_dock()
        return False

    def check_sources(self, sources) -> bool:
        """Check the images of ``sources`` (folders and files) in the background.

        Returns
        -------
        bool
            False (with a message) when there is no finished analysis to check against.
        """
        if not self._ready():
            return False
        d, rank, level = self.state.decomposition, self.state.rank, self.state.level
        sources = [os.fspath(s) for s in sources]

        def work(ctx):
            result = check_images(d, sources, rank=rank, level=level,
                                  progress=ctx.progress, cancel=ctx.cancelled)
            return Stopped((d, result)) if result.cancelled else (d, result)

        self.progress.setRange(0, 0)
        self._say(f"Checking {counted(len(sources), 'source')}…")
        self.runner.start(work)
        return True

    @Slot(object)
    def _on_progress(self, p) -> None:
        self.progress.setRange(0, max(int(p.total), 1))
        self.progress.setValue(int(p.done))

    @Slot(bool)
    def _on_running(self, running: bool) -> None:
        self.progress.setVisible(running)
        self.cancel_button.setEnabled(running)
        self.check_button.setEnabled(not running)

    @Slot(object)
    def _on_finished(self, value) -> None:
        d, result = value
        self.checked.set_result(d, result)
        self._raise_dock()

    @Slot(object)
    def _on_cancelled(self, partial) -> None:
        if partial is None:
            self._say("Check stopped before any image was read.")
            return
        d, result = partial
        self.checked.set_result(d, result)
        self._say(f"Check stopped: {counted(result.n_images, 'image')} scored before the "
                  "stop. " + self.summary.text())

    @Slot(str)
    def _on_failed(self, message: str) -> None:
        self._say(f"The check stopped: {message}")
        show = getattr(self.window(), "_show_error", None)
        if callable(show):
            show("Cannot check the images", message)

    def _raise_dock(self) -> None:
        dock = self.parent()
        if dock is not None and hasattr(dock, "raise_") and dock is not self.window():
            dock.show()
            dock.raise_()

    # ----- showing the result ------------------------------------------------------------------
    @Slot()
    def _follow_state(self, *_) -> None:
        self.checked.follow(self.state.decomposition, self.state.rank, self.state.level)

    def _say(self, text: str) -> None:
        self.last_message = text
        self.summary.setText(text)

    @Slot(object)
    def _show_result(self, result) -> None:
        self.table.setSortingEnabled(False)
        self.table.setRowCount(0)
        self.export_button.setEnabled(result is not None and result.n_flagged > 0)
        if result is None:
            self._say("No new images checked yet. Use “Check new images…” to score images "
                      "against this analysis.")
            self._clear_map()
            return
        t = result.table
        self.table.setRowCount(result.n_images)
        for i in range(result.n_images):
            beyond = ", ".join(n for n, on in (("Q", t.q_flag[i]), ("T²", t.t2_flag[i])) if on)
            cells = (_NumberItem(i + 1, str(i + 1)),
                     QTableWidgetItem(display_name(result.paths[i]) or f"image {i + 1}"),
                     _NumberItem(t.score[i], f"{t.score[i]:.3g}"),
                     _NumberItem(t.q[i], f"{t.q[i]:.4g}"), _NumberItem(t.t2[i], f"{t.t2[i]:.4g}"),
                     QTableWidgetItem(beyond))
            cells[1].setToolTip(display_path(result.paths[i]))
            for c, item in enumerate(cells):
                item.setData(Qt.ItemDataRole.UserRole, i)
                self.table.setItem(i, c, item)
        self.table.setSortingEnabled(True)
        self.table.sortItems(2, Qt.SortOrder.DescendingOrder)    # most unusual first
        self.table.resizeColumnsToContents()
        lim = t.limits
        skipped = (f"; {counted(len(result.problems), 'file')} skipped (hover for why)"
                   if result.problems else "")
        self.summary.setToolTip("\n".join(str(p) for p in result.problems[:20]))
        self._say(f"{counted(result.n_images, 'new image')} checked at rank {t.rank}, level "
                  f"{100 * t.level:g} %: {result.n_flagged} flagged (Q limit {lim.q_limit:.4g}, "
                  f"Phase II T² limit {lim.t2_limit:.4g}){skipped}.")
        self._on_selected(self.checked.selected)

    def selected_row_index(self) -> int:
        """Return the checked image of the selected table row (-1 for none)."""
        rows = self.table.selectionModel().selectedRows()
        if not rows:
            return -1
        return int(self.table.item(rows[0].row(), 0).data(Qt.ItemDataRole.UserRole))

    @Slot()
    def _on_table_selection(self) -> None:
        index = self.selected_row_index()
        if index >= 0:
            self.checked.set_selected(index)

    @Slot(int)
    def _on_selected(self, index: int) -> None:
        r, d = self.checked.result, self.checked.model
        if r is None or d is None or not 0 <= index < r.n_images:
            self._clear_map()
            return
        if self.selected_row_index() != index:
            for row in range(self.table.rowCount()):
                if self.table.item(row, 0).data(Qt.ItemDataRole.UserRole) == index:
                    self.table.selectRow(row)
                    break
        k = r.rank
        parts = t2_contributions(d, r.weights[:, index], k)
        self.contributions.setOpts(x=np.arange(1, k + 1), height=parts, width=0.7)
        path, page = r.paths[index], int(r.pages[index])
        self.map_plot.setTitle(f"Residual, image {index + 1}, rank {k}", color="#222",
                               size="10pt")
        if path:
            self.map_runner.start(lambda ctx: residual_map(
                d, read_like_model(d, path, page, resize_mismatched=True), k))

    @Slot(object)
    def _show_map(self, resid) -> None:
        self.map_values = resid
        self.map_limit = float(np.max(np.abs(resid))) if resid.size else 0.0
        self.map_item.setImage(signed_image_rgb(resid, self.map_limit), autoLevels=False,
                               levels=(0, 255))
        self.map_plot.autoRange()

    @Slot(str)
    def _map_failed(self, message: str) -> None:
        self._clear_map()
        self._say(f"The residual map cannot be shown: {message}")

    def _clear_map(self) -> None:
        self.map_item.clear()
        self.map_values = None
        self.map_limit = 0.0
        self.contributions.setOpts(x=[], height=[], width=0.7)

    # ----- export and shutdown -----------------------------------------------------------------
    def export_flagged(self, path: str | None = None) -> str | None:
        """Write the flagged checked images to a CSV file (asked for when ``path`` is None).

        Returns
        -------
        str or None
            The file written; None when cancelled, when nothing is flagged, or on failure
            (the message names the file).
        """
        r, d = self.checked.result, self.checked.model
        if r is None or r.n_flagged == 0:
            self._say("No checked image is flagged: nothing to export.")
            return None
        overwrite = path is not None
        if path is None:
            path, _ = QFileDialog.getSaveFileName(self, "Export the flagged checked images",
                                                  os.path.join(self._dir, "checked_flagged.csv"),
                                                  "CSV files (*.csv);;All files (*)")
            if not path:
                return None
            overwrite = os.path.exists(path)     # the dialog asked before replacing it
        try:
            refuse_sources(path, [*d.paths, *r.paths])
            written = write_check_csv(path, r, "flagged", overwrite=overwrite,
                                      protect=d.paths)
        except (ModescopeError, OSError, ValueError, TypeError) as exc:
            self._say(f"Cannot write the list: {exc}")
            return None
        self._say(f"{counted(r.n_flagged, 'flagged image')} written to "
                  f"{display_path(os.fspath(written))}.")
        return os.fspath(written)

    def shutdown(self, timeout_ms: int = 5000) -> bool:
        """Stop the check and the map reading (waiting at most ``timeout_ms`` for each)."""
        ok = self.runner.shutdown(timeout_ms)
        return self.map_runner.shutdown(timeout_ms) and ok
