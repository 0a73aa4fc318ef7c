"""The outlier view's table widget: the image rows of an :class:`OutlierTableModel` shown
through an :class:`OutlierFilterProxy`, most unusual first, with rows picked by image number.
"""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np
from PySide6.QtCore import QItemSelection, QItemSelectionModel, Qt
from PySide6.QtWidgets import QAbstractItemView, QHeaderView, QTableView, QWidget

from modescope.app.desktop.views.outliers_model import (COL_BEYOND, COL_FILE, COL_MARK,
                                                        COL_NUMBER, COL_Q, COL_SCORE, COL_T2,
                                                        N_COLUMNS, OutlierFilterProxy,
                                                        OutlierTableModel)

__all__ = ["OutlierTableView"]

_TABLE_TIP = ("Images sorted by score, most unusual first (flagged rows tinted). Click to "
              "select an image; Shift/Ctrl + click to pick several. Click a column title to "
              "sort.")


class OutlierTableView(QTableView):
    """Rows of images sorted by score; rows are addressed by image index.

    Parameters
    ----------
    source : OutlierTableModel
        The rows (one per image).
    proxy : OutlierFilterProxy
        The filter between ``source`` and the table (its source model is set here).
    parent : QWidget, optional
    """

    def __init__(self, source: OutlierTableModel, proxy: OutlierFilterProxy,
                 parent: QWidget | None = None):
        super().__init__(parent)
        if not isinstance(source, OutlierTableModel):
            raise TypeError(f"source must be an OutlierTableModel, got {type(source).__name__}")
        if not isinstance(proxy, OutlierFilterProxy):
            raise TypeError(f"proxy must be an OutlierFilterProxy, got {type(proxy).__name__}")
        self._source = source
        self._proxy = proxy
        proxy.setSourceModel(source)
        self.setModel(proxy)
        self._set_up_rows()
        self._set_up_columns()
        self.setToolTip(_TABLE_TIP)

    def _set_up_rows(self) -> None:
        self.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.setSelectionMode(QAbstractItemView.SelectionMode.ExtendedSelection)
        self.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.setSortingEnabled(True)
        self.sortByColumn(COL_SCORE, Qt.SortOrder.DescendingOrder)
        self.setWordWrap(False)
        self.setShowGrid(False)
        self.setAlternatingRowColors(False)
        self.setTextElideMode(Qt.TextElideMode.ElideLeft)
        self.setVerticalScrollMode(QAbstractItemView.ScrollMode.ScrollPerPixel)
        vh = self.verticalHeader()
        vh.hide()
        vh.setSectionResizeMode(QHeaderView.ResizeMode.Fixed)
        vh.setDefaultSectionSize(self.fontMetrics().height() + 6)

    def _set_up_columns(self) -> None:
        hh = self.horizontalHeader()
        for col in range(N_COLUMNS):
            hh.setSectionResizeMode(col, QHeaderView.ResizeMode.Interactive)
        hh.setSectionResizeMode(COL_FILE, QHeaderView.ResizeMode.Stretch)
        fm = self.fontMetrics()
        widths = {COL_NUMBER: "0000", COL_SCORE: "score", COL_Q: "limit 0000.0",
                  COL_T2: "limit 0000.0", COL_BEYOND: "beyond", COL_MARK: "exclude"}
        for col, sample in widths.items():
            hh.resizeSection(col, fm.horizontalAdvance(sample) + 24)   # room for the arrow

    # ----- rows by image -------------------------------------------------------------------
    def proxy_row(self, image: int) -> int:
        """Return the shown row of image ``image`` (-1 when filtered out or absent)."""
        row = self._source.row_of(image)
        if row < 0:
            return -1
        return self._proxy.mapFromSource(self._source.index(row, 0)).row()

    def image_at(self, proxy_row: int) -> int:
        """Return the image index shown in row ``proxy_row``."""
        return self._source.image_at(
            self._proxy.mapToSource(self._proxy.index(proxy_row, 0)).row())

    def shown_images(self) -> np.ndarray:
        """Return the image indices of the rows shown, top to bottom."""
        return np.array([self.image_at(r) for r in range(self._proxy.rowCount())],
                        dtype=np.intp)

    def selected_images(self) -> tuple[list[int], int]:
        """Return (sorted images of the selected rows, image of the current row or -1)."""
        sm = self.selectionModel()
        images = sorted({self.image_at(i.row()) for i in sm.selectedRows()})
        current = sm.currentIndex()
        return images, (self.image_at(current.row()) if current.isValid() else -1)

    def select_images(self, images: Iterable[int], current: int) -> None:
        """Select the rows of ``images`` (those shown) and make ``current``'s row current."""
        proxy_rows = sorted(r for r in (self.proxy_row(i) for i in images) if r >= 0)
        selection = QItemSelection()
        last = self._proxy.columnCount() - 1
        start = prev = None
        for r in proxy_rows + [None]:
            if start is not None and (r is None or r != prev + 1):
                selection.select(self._proxy.index(start, 0), self._proxy.index(prev, last))
                start = None
            if r is not None and start is None:
                start = r
            prev = r
        self.selectionModel().select(selection,
                                     QItemSelectionModel.SelectionFlag.ClearAndSelect)
        self.move_current(current)

    def show_top(self) -> None:
        """Scroll to the first row (the highest score while sorted by score)."""
        self.executeDelayedItemsLayout()   # a pending layout would scroll back to the current row
        self.scrollToTop()

    def move_current(self, image: int) -> None:
        """Make the row of ``image`` current (without changing the selection) and show it."""
        pr = self.proxy_row(image)
        if pr >= 0:
            index = self._proxy.index(pr, COL_FILE)
            self.selectionModel().setCurrentIndex(
                index, QItemSelectionModel.SelectionFlag.NoUpdate)
            self.scrollTo(index, QAbstractItemView.ScrollHint.EnsureVisible)
