"""Image list: every image of the analysis with a thumbnail, its file name and its residual.

A :class:`QTableView` over :class:`ImageTableModel` (one row per image, no per-row widgets, fixed
row height) behind a :class:`QSortFilterProxyModel` driven by a filter box, so 10,000 images scroll
smoothly. Thumbnails are asked for only by rows on screen and made off the GUI thread by
:class:`~modescope.app.desktop.workers.thumbnails.ThumbnailMaker` from the source files (the
reconstruction at the current rank when a file is missing). Selecting rows writes
``state.set_selected`` / ``state.set_selection_set``; state changes select and scroll to the row
without echo.

Images are numbered from 1 for display; ``state.selected`` stays 0-based.
"""

from __future__ import annotations


import numpy as np
from PySide6.QtCore import (QAbstractTableModel, QItemSelection, QItemSelectionModel,
                            QModelIndex, QSize, QSortFilterProxyModel, Qt, Slot)
from PySide6.QtWidgets import (QAbstractItemView, QHBoxLayout, QHeaderView, QLabel, QLineEdit,
                               QTableView, QVBoxLayout, QWidget)

from modescope.core.decomposition import Decomposition

from modescope.app.words import counted
from modescope.app.desktop.display import display_name, display_path
from modescope.app.desktop.redraw import ThrottledRedraw
from modescope.app.desktop.state import AppState
from modescope.app.desktop.workers.thumbnails import ThumbnailMaker

__all__ = ["ImageListView", "ImageTableModel"]

SORT_ROLE = Qt.ItemDataRole.UserRole + 1
COL_NUMBER, COL_FILE, COL_RESIDUAL = 0, 1, 2


class ImageTableModel(QAbstractTableModel):
    """One row per image of a decomposition: number, file name (with thumbnail), residual.

    Parameters
    ----------
    maker : ThumbnailMaker
        Makes thumbnails off the GUI thread; asked only from ``data(DecorationRole)``.
    """

    HEADERS = ("#", "file", "residual")

    def __init__(self, maker: ThumbnailMaker, parent=None):
        super().__init__(parent)
        self.maker = maker
        self._d: Decomposition | None = None
        self._names: list[str] = []
        self._keys: list[tuple] = []
        self._rows_of: dict[tuple, list[int]] = {}
        self._residual: np.ndarray | None = None
        self._rank = 0
        maker.thumbnailReady.connect(self._on_thumbnail)

    # ----- contents ------------------------------------------------------------------------
    @property
    def decomposition(self) -> Decomposition | None:
        return self._d

    @property
    def rank(self) -> int:
        return self._rank

    def _row_keys(self, d: Decomposition, start: int, stop: int):
        for i in range(start, stop):
            path = d.paths[i] if d.paths else ""
            page = int(d.pages[i])
            name = display_name(path) if path else f"image {i + 1}"
            if page:
                name = f"{name} [page {page + 1}]"
            key = (path or f"#{i}", page)
            yield name, key

    def set_decomposition(self, d: Decomposition | None, rank: int) -> None:
        """Install a new decomposition; rows are appended when the old paths are a prefix."""
        old = self._d
        old_n = len(self._names)
        new_n = 0 if d is None else d.n_images
        same_prefix = (old is not None and d is not None and new_n >= old_n
                       and tuple(d.paths[:old_n]) == tuple(old.paths[:old_n])
                       and np.array_equal(d.pages[:old_n], old.pages[:old_n]))
        if not same_prefix:
            self.beginResetModel()
            self._d = d
            self._names, self._keys, self._rows_of = [], [], {}
            self._append(0, new_n)
            self._set_rank(rank)
            self.endResetModel()
            return
        if new_n > old_n:
            self.beginInsertRows(QModelIndex(), old_n, new_n - 1)
            self._d = d
            self._append(old_n, new_n)
            self._set_rank(rank)
            self.endInsertRows()
        else:
            self._d = d
            self._set_rank(rank)
        if old_n:
            self.dataChanged.emit(self.index(0, COL_RESIDUAL),
                                  self.index(old_n - 1, COL_RESIDUAL))

    def _append(self, start: int, stop: int) -> None:
        if self._d is None:
            return
        for i, (name, key) in enumerate(self._row_keys(self._d, start, stop), start):
            self._names.append(name)
            self._keys.append(key)
            self._rows_of.setdefault(key, []).append(i)

    def _set_rank(self, rank: int) -> None:
        d = self._d
        self._rank = 0 if d is None else min(max(int(rank), 0), d.rank)
        self._residual = (None if d is None or d.residual is None
                          else d.residual_at_rank(self._rank))

    def set_rank(self, rank: int) -> None:
        """Recompute the residual column for rank ``rank``."""
        self._set_rank(rank)
        self.headerDataChanged.emit(Qt.Orientation.Horizontal, COL_RESIDUAL, COL_RESIDUAL)
        if self._names:
            self.dataChanged.emit(self.index(0, COL_RESIDUAL),
                                  self.index(len(self._names) - 1, COL_RESIDUAL))

    @Slot(object)
    def _on_thumbnail(self, key) -> None:
        for row in self._rows_of.get(key, ()):
            index = self.index(row, COL_FILE)
            self.dataChanged.emit(index, index, [Qt.ItemDataRole.DecorationRole,
                                                 Qt.ItemDataRole.ToolTipRole])

    def _thumbnail(self, row: int):
        d = self._d
        key = self._keys[row]
        rank = self._rank
        path = d.paths[row] if d.paths else ""

        def fallback(d=d, row=row, rank=rank):
            return d.to_image(d.reconstruct(row, rank))

        return self.maker.request(key, path, int(d.pages[row]), fallback)

    # ----- Qt model interface ----------------------------------------------------------------
    def rowCount(self, parent: QModelIndex = QModelIndex()) -> int:
        return 0 if parent.isValid() else len(self._names)

    def columnCount(self, parent: QModelIndex = QModelIndex()) -> int:
        return 0 if parent.isValid() else 3

    def headerData(self, section: int, orientation, role=Qt.ItemDataRole.DisplayRole):
        if orientation != Qt.Orientation.Horizontal:
            return None
        if role == Qt.ItemDataRole.DisplayRole:
            if section == COL_RESIDUAL:
                return "residual"
            return self.HEADERS[section]
        if role == Qt.ItemDataRole.ToolTipRole:
            return ("image number (1 = first column of the analysis)",
                    "source file name; the thumbnail is made from the file",
                    f"residual at rank r = {self._rank}: squared norm of the part of the centred "
                    f"image the first r basis images do not explain (unknown for a snapshot "
                    f"during a run)")[section]
        return None

    def data(self, index: QModelIndex, role: int = Qt.ItemDataRole.DisplayRole):
        if not index.isValid():
            return None
        row, col = index.row(), index.column()
        if not 0 <= row < len(self._names):
            return None
        if role == Qt.ItemDataRole.DisplayRole:
            if col == COL_NUMBER:
                return str(row + 1)
            if col == COL_FILE:
                return self._names[row]
            if self._residual is None:
                return "-"
            return f"{self._residual[row]:.4g}"
        if role == SORT_ROLE:
            if col == COL_NUMBER:
                return row
            if col == COL_FILE:
                return self._names[row].lower()
            return -1.0 if self._residual is None else float(self._residual[row])
        if role == Qt.ItemDataRole.DecorationRole and col == COL_FILE:
            thumb = self._thumbnail(row)
            if thumb is None or thumb.icon is None:
                return None
            return thumb.icon
        if role == Qt.ItemDataRole.ToolTipRole:
            d = self._d
            path = d.paths[row] if d.paths else "(no file recorded)"
            text = f"image {row + 1}: {display_path(path)}"
            if int(d.pages[row]):
                text += f", page {int(d.pages[row]) + 1}"
            thumb = self.maker.thumbnail(self._keys[row])
            if thumb is not None and thumb.source != "file":
                text += (f"\nthumbnail shows the reconstruction: {thumb.note}"
                         if thumb.source == "reconstruction" else f"\nno thumbnail: {thumb.note}")
            return text
        if role == Qt.ItemDataRole.TextAlignmentRole:
            if col == COL_FILE:
                return int(Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignVCenter)
            return int(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
        return None


class ImageListView(ThrottledRedraw, QWidget):
    """Thumbnails, file names and residuals of every image, filterable by name.

    Parameters
    ----------
    state : AppState
        Reads the decomposition, rank and selection; writes the selection.
    parent : QWidget, optional
    thumbnail_size : int
        Longest side of a thumbnail in pixels.
    cache_size : int
        Most thumbnails kept in memory.

    Notes
    -----
    Call :meth:`shutdown` (or close the widget) before the application quits so that the
    thumbnail threads are stopped.
    """

    def __init__(self, state: AppState, parent: QWidget | None = None,
                 thumbnail_size: int = 64, cache_size: int = 2000):
        super().__init__(parent)
        if not isinstance(state, AppState):
            raise TypeError(f"state must be an AppState, got {type(state).__name__}")
        self.state = state
        self._syncing = False
        self._shown: set[int] = set()  # image rows last shown selected by the state

        self.maker = ThumbnailMaker(size=thumbnail_size, cache_size=cache_size, parent=self)
        self.model = ImageTableModel(self.maker, self)
        self.proxy = QSortFilterProxyModel(self)
        self.proxy.setSourceModel(self.model)
        self.proxy.setFilterKeyColumn(COL_FILE)
        self.proxy.setFilterCaseSensitivity(Qt.CaseSensitivity.CaseInsensitive)
        self.proxy.setSortRole(SORT_ROLE)

        self.filter = QLineEdit(self)
        self.filter.setPlaceholderText("Filter by file name")
        self.filter.setClearButtonEnabled(True)
        self.filter.setToolTip("Show only images whose file name contains this text "
                               "(upper/lower case ignored).")
        self.count = QLabel("", self)

        self.table = QTableView(self)
        self.table.setModel(self.proxy)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.ExtendedSelection)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.setSortingEnabled(True)
        self.table.sortByColumn(COL_NUMBER, Qt.SortOrder.AscendingOrder)
        self.table.setWordWrap(False)
        self.table.setShowGrid(False)
        self.table.setAlternatingRowColors(True)
        self.table.setIconSize(QSize(thumbnail_size, thumbnail_size))
        self.table.setVerticalScrollMode(QAbstractItemView.ScrollMode.ScrollPerPixel)
        vh = self.table.verticalHeader()
        vh.hide()
        vh.setSectionResizeMode(QHeaderView.ResizeMode.Fixed)
        vh.setDefaultSectionSize(thumbnail_size + 6)
        hh = self.table.horizontalHeader()
        hh.setSectionResizeMode(COL_NUMBER, QHeaderView.ResizeMode.Interactive)
        hh.setSectionResizeMode(COL_FILE, QHeaderView.ResizeMode.Stretch)
        hh.setSectionResizeMode(COL_RESIDUAL, QHeaderView.ResizeMode.Interactive)
        fm = self.table.fontMetrics()
        hh.resizeSection(COL_NUMBER, fm.horizontalAdvance("00000") + 10)
        hh.resizeSection(COL_RESIDUAL, fm.horizontalAdvance("residual") + 28)
        # cut file names at the start: the end (frame number, time) tells frames apart; the
        # full path is in each row's tooltip
        self.table.setTextElideMode(Qt.TextElideMode.ElideLeft)
        self.table.setToolTip("Click to select an image; Shift/Ctrl + click to pick several. "
                              "Click a column title to sort.")

        top = QHBoxLayout()
        top.addWidget(self.filter, 1)
        top.addWidget(self.count)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        lay.addLayout(top)
        lay.addWidget(self.table, 1)

        self._init_redraw_timer()

        # all connections in one place
        state.decompositionChanged.connect(self._schedule)
        state.rankChanged.connect(self._on_rank)
        state.selectedChanged.connect(self._on_state_selected)
        state.selectionSetChanged.connect(self._on_state_selection_set)
        self.filter.textChanged.connect(self._on_filter)
        sm = self.table.selectionModel()
        sm.selectionChanged.connect(self._on_view_selection)
        sm.currentRowChanged.connect(self._on_view_selection)

        if state.decomposition is not None:
            self._redraw()

    # ----- lifetime --------------------------------------------------------------------------
    def shutdown(self) -> None:
        """Stop the thumbnail threads (waits a few seconds at most)."""
        self.maker.shutdown()

    def closeEvent(self, event) -> None:  # noqa: N802 - Qt name
        self.shutdown()
        super().closeEvent(event)

    # ----- helpers ---------------------------------------------------------------------------
    def proxy_row(self, source_row: int) -> int:
        """Return the shown row of image ``source_row`` (-1 when filtered out)."""
        if not 0 <= source_row < self.model.rowCount():
            return -1
        return self.proxy.mapFromSource(self.model.index(source_row, 0)).row()

    def _update_count(self) -> None:
        n, shown = self.model.rowCount(), self.proxy.rowCount()
        text = counted(n, "image") if shown == n else f"{shown:,} of {counted(n, 'image')}"
        d = self.model.decomposition
        if d is not None and d.residual is not None:
            text += f", residual at rank {self.model.rank}"
        self.count.setText(text)

    # ----- state -> view ---------------------------------------------------------------------
    @Slot()
    def _redraw(self) -> None:
        self._syncing = True
        try:
            self.model.set_decomposition(self.state.decomposition, self.state.rank)
            self._update_count()
            self._apply_state_selection()
        finally:
            self._syncing = False

    @Slot(int)
    def _on_rank(self, rank: int) -> None:
        self.model.set_rank(rank)
        self._update_count()

    @Slot(str)
    def _on_filter(self, text: str) -> None:
        self._syncing = True
        try:
            self.proxy.setFilterFixedString(text)
            self._update_count()
            self._apply_state_selection()
        finally:
            self._syncing = False

    @Slot(int)
    def _on_state_selected(self, index: int) -> None:
        if self._syncing:
            return
        self._syncing = True
        try:
            chosen = self.state.selection_set
            if len(chosen) > 1 and index in chosen and self._shown == set(chosen):
                self._move_current(index)  # the rows shown selected stay the same
            else:
                self._apply_state_selection()
        finally:
            self._syncing = False

    @Slot(object)
    def _on_state_selection_set(self, indices) -> None:
        if self._syncing:
            return
        self._syncing = True
        try:
            self._apply_state_selection()
        finally:
            self._syncing = False

    def _apply_state_selection(self) -> None:
        """Make the table show state.selected (current row) and state.selection_set."""
        sm = self.table.selectionModel()
        rows = set(self.state.selection_set)
        cur = self.state.selected
        if cur >= 0:
            rows.add(cur)
        self._shown = rows
        proxy_rows = sorted(r for r in (self.proxy_row(i) for i in rows) if r >= 0)
        selection = QItemSelection()
        last = self.proxy.columnCount() - 1
        start = prev = None
        for r in proxy_rows + [None]:
            if start is not None and (r is None or r != prev + 1):
                selection.select(self.proxy.index(start, 0), self.proxy.index(prev, last))
                start = None
            if r is not None and start is None:
                start = r
            prev = r
        flags = QItemSelectionModel.SelectionFlag
        sm.select(selection, flags.ClearAndSelect)
        self._move_current(cur)

    def _move_current(self, source_row: int) -> None:
        pr = self.proxy_row(source_row)
        if pr >= 0:
            index = self.proxy.index(pr, COL_FILE)
            self.table.selectionModel().setCurrentIndex(
                index, QItemSelectionModel.SelectionFlag.NoUpdate)
            self.table.scrollTo(index, QAbstractItemView.ScrollHint.EnsureVisible)

    # ----- view -> state ---------------------------------------------------------------------
    @Slot()
    def _on_view_selection(self, *_) -> None:
        if self._syncing:
            return
        sm = self.table.selectionModel()
        rows = sorted({self.proxy.mapToSource(i).row() for i in sm.selectedRows()})
        current = sm.currentIndex()
        cur = self.proxy.mapToSource(current).row() if current.isValid() else -1
        self._syncing = True
        try:
            self.state.select_from_view(rows, cur)
        finally:
            self._syncing = False
