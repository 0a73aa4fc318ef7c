"""Outliers: every image's Q and T² against their control limits, and the review marks.

* A table of every image sorted by score (``max(Q / Q limit, T² / T² limit)``), with Q, T², the
  limits in the column titles, which limit an image is beyond, and its review mark. It is a
  :class:`OutlierTableModel` (sorted with numpy, no per-row widgets) behind a filter proxy
  (all / flagged / excluded / not reviewed), so 10,000 rows scroll smoothly.
* Q against T² (log axes by default) with both limits drawn as labelled lines; a click on a point
  selects that image.
* A confidence-level spin box (``state.set_level``, default 99 %); the scores use ``state.rank``
  and are recomputed, merged into one redraw per ``REDRAW_MS``, when the rank, the level or the
  analysis changes. A snapshot during a run has no residuals: a note says the scores appear when
  the analysis finishes.
* Review: mark the selected image(s) keep (K), exclude (X) or not reviewed (U) through
  ``state.set_marks``; refit without the excluded images (:attr:`OutlierView.refitRequested`);
  export the excluded or flagged images as CSV or as a list of paths. Source images are never
  moved, changed or deleted.

Every number comes from :func:`modescope.core.review.outliers.score_table` and
:mod:`modescope.core.review.marks`. Images are numbered from 1 for display; ``state.selected`` stays
0-based.
"""

from __future__ import annotations

import os

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import (QAbstractTableModel, QItemSelection, QItemSelectionModel,
                            QModelIndex, QSortFilterProxyModel, Qt, Signal, Slot)
from PySide6.QtGui import QAction, QColor, QFont, QKeySequence
from PySide6.QtWidgets import (QAbstractItemView, QCheckBox, QComboBox, QDoubleSpinBox,
                               QFileDialog, QHBoxLayout, QHeaderView, QLabel, QMenu,
                               QMessageBox, QSizePolicy, QSplitter, QStackedWidget, QTableView,
                               QToolButton, QVBoxLayout, QWidget)

from modescope.core.review import marks as review
from modescope.core.decomposition import Decomposition
from modescope.core.errors import ModescopeError
from modescope.core.review.outliers import OutlierTable, score_table

from modescope.app.desktop.redraw import ThrottledRedraw
from modescope.app.desktop.settings import StoredOptions
from modescope.app.desktop.views.spectrum import log_ticks
from modescope.app.desktop.state import AppState

__all__ = ["OutlierView", "OutlierTableModel", "OutlierFilterProxy", "FILTERS",
           "stored_options_of", "WAITING_TEXT", "CAUTION_TEXT"]

SORT_ROLE = Qt.ItemDataRole.UserRole + 1
(COL_NUMBER, COL_FILE, COL_SCORE, COL_Q, COL_T2, COL_BEYOND, COL_MARK) = range(7)
N_COLUMNS = 7

#: Filter choices of the table: (key, label).
FILTERS = (("all", "all images"), ("flagged", "flagged"), ("excluded", "excluded"),
           ("not reviewed", "not reviewed"))

WAITING_TEXT = ("Outlier scores appear when the analysis finishes (they need every image's "
                "residual, which the final scoring pass computes).")
CAUTION_TEXT = ("Flags are a screening aid for a person to review, not a verdict about an "
                "image.")

_Q_METHODS = {"jackson-mudholkar": "Jackson-Mudholkar", "box": "Box"}
_T2_METHODS = {"beta": "Beta", "f": "F"}
_MARK_TEXT = {review.NOT_REVIEWED: "", review.KEEP: "keep", review.EXCLUDE: "exclude"}

_FLAG_BG = QColor(255, 232, 226)
_KEEP_FG = QColor(30, 120, 60)
_EXCLUDE_FG = QColor(190, 40, 40)
_DIM_FG = QColor(125, 125, 125)
_SEL_COLOUR = QColor(220, 30, 60)
_LIMIT_COLOUR = QColor(200, 90, 20)


def stored_options_of(decomposition: Decomposition) -> StoredOptions:
    """Return the sources pane's options of the analysis that made ``decomposition``.

    Reads ``decomposition.metadata["options"]`` (a dict of
    :class:`~modescope.core.engine.pipeline.AnalysisOptions` fields, as the pipeline stores it); the
    defaults when it is absent.

    Raises
    ------
    TypeError, ValueError
        If the stored options are not a dict or hold values AnalysisOptions refuses.
    """
    from modescope.core.engine.pipeline import AnalysisOptions

    stored = (decomposition.metadata or {}).get("options")
    if stored is None:
        options = AnalysisOptions()
    elif not isinstance(stored, dict):
        raise TypeError("the analysis's metadata 'options' must be a dict of analysis "
                        f"options, got {type(stored).__name__}")
    else:
        options = AnalysisOptions.from_dict(stored)
    return StoredOptions(rank=int(options.rank), color=str(options.color),
                         downscale=int(options.downscale), recursive=bool(options.recursive),
                         resize_mismatched=bool(options.resize_mismatched))


def _image_names(d: Decomposition) -> list[str]:
    names = []
    for i in range(d.n_images):
        path = d.paths[i] if d.paths else ""
        name = os.path.basename(path) if path else f"image {i + 1}"
        page = int(d.pages[i])
        names.append(f"{name} [page {page + 1}]" if page else name)
    return names


class OutlierTableModel(QAbstractTableModel):
    """One row per image: number, file, score, Q, T², limit passed, review mark.

    Rows are kept in a display order (``row_images``), sorted with numpy by :meth:`sort`; the
    default order is the score table's (most unusual first).
    """

    HEADERS = ("#", "file", "score", "Q", "T²", "beyond", "mark")

    def __init__(self, parent=None):
        super().__init__(parent)
        self._d: Decomposition | None = None
        self._t: OutlierTable | None = None
        self._names: list[str] = []
        self._rows = np.zeros(0, dtype=np.intp)       # image shown in each row
        self._pos = np.zeros(0, dtype=np.intp)        # row of each image
        self._marks = np.zeros(0, dtype=np.int8)
        self._sort = (COL_SCORE, Qt.SortOrder.DescendingOrder)

    # ----- contents ------------------------------------------------------------------------
    @property
    def table(self) -> OutlierTable | None:
        """The scores shown (None when there are none)."""
        return self._t

    @property
    def decomposition(self) -> Decomposition | None:
        return self._d

    @property
    def row_images(self) -> np.ndarray:
        """Image index of every row, in display order (a copy)."""
        return self._rows.copy()

    @property
    def marks(self) -> np.ndarray:
        return self._marks

    def set_scores(self, d: Decomposition | None, table: OutlierTable | None) -> None:
        """Show ``table`` (the scores of ``d``), keeping the current sort column and order."""
        self.beginResetModel()
        try:
            same_images = (self._d is not None and d is not None
                           and tuple(self._d.paths) == tuple(d.paths)
                           and self._d.n_images == d.n_images)
            if not same_images:
                self._names = [] if d is None else _image_names(d)
            self._d = d
            self._t = table if d is not None else None
            if self._t is None:
                self._rows = np.zeros(0, dtype=np.intp)
                self._marks = np.zeros(0, dtype=np.int8)
            else:
                self._marks = np.asarray(d.marks, dtype=np.int8).copy()
                self._rows = self._ordered(*self._sort)
            self._update_pos()
        finally:
            self.endResetModel()

    def set_marks(self, d: Decomposition) -> None:
        """Take the review marks of ``d`` (same images, new marks)."""
        if self._t is None or d.n_images != self._t.n_images:
            return
        self._d = d
        self._marks = np.asarray(d.marks, dtype=np.int8).copy()
        if self._sort[0] == COL_MARK:
            self.sort(*self._sort)
        n = len(self._rows)
        if n:
            self.dataChanged.emit(self.index(0, 0), self.index(n - 1, N_COLUMNS - 1))

    def _update_pos(self) -> None:
        self._pos = np.empty(len(self._rows), dtype=np.intp)
        self._pos[self._rows] = np.arange(len(self._rows))

    def image_at(self, row: int) -> int:
        """Return the image index shown in source row ``row``."""
        return int(self._rows[row])

    def row_of(self, image: int) -> int:
        """Return the source row of image ``image`` (-1 when not shown)."""
        if 0 <= image < len(self._pos):
            return int(self._pos[image])
        return -1

    def name(self, image: int) -> str:
        """Return the display name of image ``image``."""
        return self._names[image]

    def limit_text(self, which: str) -> str:
        """Return the limit of Q or T² formatted for display ("" without scores)."""
        if self._t is None:
            return ""
        lim = self._t.limits
        if which == "q":
            return f"{lim.q_limit:.4g}" if lim.q_informative else "none"
        return f"{lim.t2_limit:.4g}" if lim.t2_informative else "none"

    # ----- sorting with numpy --------------------------------------------------------------
    def _key(self, column: int) -> np.ndarray:
        t = self._t
        n = t.n_images
        if column == COL_NUMBER:
            return np.arange(n, dtype=np.float64)
        if column == COL_FILE:
            _, codes = np.unique(np.array([s.lower() for s in self._names], dtype=object)
                                 .astype(str), return_inverse=True)
            return codes.astype(np.float64)
        if column == COL_Q:
            return np.asarray(t.q, dtype=np.float64)
        if column == COL_T2:
            return np.asarray(t.t2, dtype=np.float64)
        if column == COL_BEYOND:
            return 2.0 * t.q_flag + 1.0 * t.t2_flag
        if column == COL_MARK:
            return self._marks.astype(np.float64)
        return np.asarray(t.score, dtype=np.float64)

    def _ordered(self, column: int, order) -> np.ndarray:
        """Image indices sorted by ``column``; ties keep the score order (most unusual first)."""
        base = np.asarray(self._t.order, dtype=np.intp)
        key = self._key(column)[base]
        if order == Qt.SortOrder.DescendingOrder:
            key = -key
        return base[np.argsort(key, kind="stable")]

    def sort(self, column: int, order=Qt.SortOrder.AscendingOrder) -> None:  # noqa: D401
        """Sort the rows by ``column`` (numpy, stable; ties keep the score order)."""
        if not 0 <= column < N_COLUMNS:
            return
        self._sort = (int(column), order)
        if self._t is None:
            return
        self.layoutAboutToBeChanged.emit()
        old_rows = self._rows
        new_rows = self._ordered(column, order)
        new_pos = np.empty(len(new_rows), dtype=np.intp)
        new_pos[new_rows] = np.arange(len(new_rows))
        old = self.persistentIndexList()
        new = [self.index(int(new_pos[old_rows[i.row()]]), i.column()) for i in old]
        self._rows = new_rows
        self._pos = new_pos
        self.changePersistentIndexList(old, new)
        self.layoutChanged.emit()

    # ----- Qt model interface ----------------------------------------------------------------
    def rowCount(self, parent: QModelIndex = QModelIndex()) -> int:  # noqa: N802 - Qt name
        return 0 if parent.isValid() else len(self._rows)

    def columnCount(self, parent: QModelIndex = QModelIndex()) -> int:  # noqa: N802
        return 0 if parent.isValid() else N_COLUMNS

    def headerData(self, section, orientation, role=Qt.ItemDataRole.DisplayRole):  # noqa: N802
        if orientation != Qt.Orientation.Horizontal or not 0 <= section < N_COLUMNS:
            return None
        t = self._t
        if role == Qt.ItemDataRole.DisplayRole:
            if t is not None and section == COL_Q:
                return f"Q\nlimit {self.limit_text('q')}"
            if t is not None and section == COL_T2:
                return f"T²\nlimit {self.limit_text('t2')}"
            return self.HEADERS[section]
        if role == Qt.ItemDataRole.ToolTipRole:
            r = "r" if t is None else str(t.rank)
            return ("image number (1 = first column of the analysis)",
                    "source file name",
                    "score = the larger of Q / Q limit and T² / T² limit; above 1 means beyond "
                    "at least one limit (flagged)",
                    f"Q: residual at rank {r}, the squared norm of the part of the centred "
                    f"image the first {r} basis images do not explain",
                    f"T²: Hotelling's T² over the first {r} basis images, how far the image's "
                    "weights are from the centre of the collection",
                    "which limit the image is beyond",
                    "review mark: keep, exclude, or empty when not reviewed")[section]
        return None

    def data(self, index: QModelIndex, role: int = Qt.ItemDataRole.DisplayRole):
        if not index.isValid() or self._t is None:
            return None
        row, col = index.row(), index.column()
        if not 0 <= row < len(self._rows):
            return None
        i = int(self._rows[row])
        t = self._t
        if role == Qt.ItemDataRole.DisplayRole:
            if col == COL_NUMBER:
                return str(i + 1)
            if col == COL_FILE:
                return self._names[i]
            if col == COL_SCORE:
                return f"{t.score[i]:.3g}"
            if col == COL_Q:
                return f"{t.q[i]:.4g}"
            if col == COL_T2:
                return f"{t.t2[i]:.4g}"
            if col == COL_BEYOND:
                parts = [name for name, on in (("Q", t.q_flag[i]), ("T²", t.t2_flag[i])) if on]
                return ", ".join(parts)
            return _MARK_TEXT.get(int(self._marks[i]), "")
        if role == SORT_ROLE:
            return float(self._key(col)[i]) if col != COL_FILE else self._names[i].lower()
        if role == Qt.ItemDataRole.BackgroundRole:
            return _FLAG_BG if t.flag[i] else None
        if role == Qt.ItemDataRole.ForegroundRole:
            mark = int(self._marks[i])
            if col == COL_MARK:
                return _KEEP_FG if mark == review.KEEP else _EXCLUDE_FG
            if mark == review.EXCLUDE:
                return _DIM_FG
            return None
        if role == Qt.ItemDataRole.ToolTipRole:
            d = self._d
            path = d.paths[i] if d.paths else "(no file recorded)"
            lim = t.limits
            text = (f"image {i + 1}: {path}\nQ = {t.q[i]:.5g} (limit {self.limit_text('q')}), "
                    f"T² = {t.t2[i]:.5g} (limit {self.limit_text('t2')}), score "
                    f"{t.score[i]:.4g}")
            if t.flag[i]:
                text += "\nflagged for review (beyond a limit at the "
                text += f"{100 * lim.level:g} % level)"
            return text
        if role == Qt.ItemDataRole.TextAlignmentRole:
            if col in (COL_FILE, COL_BEYOND, COL_MARK):
                return int(Qt.AlignmentFlag.AlignLeft | Qt.AlignmentFlag.AlignVCenter)
            return int(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
        return None


class OutlierFilterProxy(QSortFilterProxyModel):
    """Shows all, flagged, excluded or not-reviewed images; sorting is left to the source
    model (numpy), so clicking a column title stays fast for 10,000 rows."""

    def __init__(self, parent=None):
        super().__init__(parent)
        self._mode = "all"
        self._accept: np.ndarray | None = None     # per image

    @property
    def mode(self) -> str:
        return self._mode

    def set_mode(self, mode: str) -> None:
        """Choose the filter: one of the keys of :data:`FILTERS`."""
        keys = [k for k, _ in FILTERS]
        if mode not in keys:
            raise ValueError(f"filter must be one of {keys}, got {mode!r}")
        self._mode = mode
        self.refilter()

    def _mask(self) -> np.ndarray | None:
        model = self.sourceModel()
        t = None if model is None else model.table
        if t is None or self._mode == "all":
            return None
        marks = model.marks
        if self._mode == "flagged":
            return np.asarray(t.flag, dtype=bool)
        if self._mode == "excluded":
            return marks == review.EXCLUDE
        return marks == review.NOT_REVIEWED

    def refilter(self) -> None:
        """Recompute which images pass (after new scores, marks or filter)."""
        self.beginFilterChange()
        self._accept = self._mask()
        self.endFilterChange(QSortFilterProxyModel.Direction.Rows)

    def filterAcceptsRow(self, source_row: int, source_parent: QModelIndex) -> bool:  # noqa
        if self._accept is None:
            return True
        return bool(self._accept[self.sourceModel().image_at(source_row)])

    def sort(self, column: int, order=Qt.SortOrder.AscendingOrder) -> None:
        self.sourceModel().sort(column, order)


class OutlierView(ThrottledRedraw, QWidget):
    """Outlier table, Q against T² plot, confidence level and review actions.

    Parameters
    ----------
    state : AppState
        Reads the decomposition, rank, level, selection and marks; writes the level, the
        selection and the marks.
    parent : QWidget, optional

    Signals
    -------
    refitRequested(object, object)
        ``(images, options)``: the images not marked excluded as ``(path, page)`` pairs in
        column order, and the :class:`~modescope.app.desktop.settings.StoredOptions` of the analysis,
        for the main window to start a new analysis of them.

    Attributes
    ----------
    scores : OutlierTable or None
        The scores shown (``score_table(state.decomposition, state.rank, state.level)``).
    model, proxy, table
        The table of images.
    scatter : pyqtgraph.ScatterPlotItem
        One point per image at (T², Q) (log10 of both when :attr:`log_axes` is checked).
    q_line, t2_line : pyqtgraph.InfiniteLine
        The Q limit (horizontal) and the T² limit (vertical).
    keep_action, exclude_action, clear_action, refit_action : QAction
    export_actions : dict
        ``(which, kind) -> QAction`` for which in {"excluded", "flagged"} and kind in
        {"csv", "paths"}.
    """

    refitRequested = Signal(object, object)

    #: Log-axis floor for values of 0, in decades below the smallest positive value.
    LOG_FLOOR_DECADES = 1.0

    def __init__(self, state: AppState, parent: QWidget | None = None):
        super().__init__(parent)
        if not isinstance(state, AppState):
            raise TypeError(f"state must be an AppState, got {type(state).__name__}")
        self.state = state
        self.scores: OutlierTable | None = None
        self.redraw_count = 0
        self.last_message = ""
        self.message_box: QMessageBox | None = None
        self._syncing = False
        self._shown: set[int] = set()
        self._export_dir = ""

        self._build_actions()
        self._build_widgets()
        self._init_redraw_timer()
        self._wire()
        self._redraw()

    # ----- construction ------------------------------------------------------------------------
    def _build_actions(self) -> None:
        def action(text: str, slot, shortcut: str | None, tip: str) -> QAction:
            a = QAction(text, self)
            if shortcut:
                a.setShortcut(QKeySequence(shortcut))
                tip = f"{tip} ({shortcut})"
            a.setToolTip(tip)
            a.setStatusTip(tip)
            a.triggered.connect(slot)
            self.addAction(a)
            return a

        self.keep_action = action("Keep", self.keep_selected, "K",
                                  "Mark the selected image(s) as reviewed and kept")
        self.exclude_action = action("Exclude", self.exclude_selected, "X",
                                     "Mark the selected image(s) as excluded from the next "
                                     "analysis (the files are not touched)")
        self.clear_action = action("Clear mark", self.clear_selected, "U",
                                   "Mark the selected image(s) as not reviewed")
        self.refit_action = action("Refit without excluded…", self.refit, None,
                                   "Analyse the collection again without the images marked "
                                   "excluded")
        self.clear_action.setIconText("Clear")
        self.refit_action.setIconText("Refit…")
        self.export_actions: dict[tuple[str, str], QAction] = {}
        for which in ("excluded", "flagged"):
            for kind, what in (("csv", "as CSV with scores…"),
                               ("paths", "as a list of file paths…")):
                a = action(f"Export {which} images {what}",
                           lambda _=False, w=which, k=kind: self.export_list(w, k), None,
                           f"Write the {which} images {what.rstrip('…')} to a file")
                self.export_actions[(which, kind)] = a

    def review_actions(self) -> list:
        """Return the actions for a menu (None stands for a separator)."""
        return [self.keep_action, self.exclude_action, self.clear_action, None,
                self.refit_action, None, *self.export_actions.values()]

    def _build_widgets(self) -> None:
        # ----- controls --------------------------------------------------------------------
        self.level_spin = QDoubleSpinBox(self)
        self.level_spin.setRange(50.0, 99.99)
        self.level_spin.setDecimals(2)
        self.level_spin.setSingleStep(0.5)
        self.level_spin.setSuffix(" %")
        self.level_spin.setKeyboardTracking(False)
        self.level_spin.setValue(100.0 * self.state.level)
        self.level_spin.setToolTip(
            "Confidence level of the Q and T² limits: about (100 - level) % of ordinary images "
            "lie beyond each limit by chance (99 % = about 1 in 100).")
        self.filter_combo = QComboBox(self)
        for key, label in FILTERS:
            self.filter_combo.addItem(label, key)
        self.filter_combo.setToolTip("Which images the table shows.")
        self.log_axes = QCheckBox("log axes", self)
        self.log_axes.setChecked(True)
        self.log_axes.setToolTip("Draw Q and T² on logarithmic axes (values of 0 are drawn at "
                                 "the bottom or left edge).")
        self.summary = QLabel("", self)
        self.marks_label = QLabel("", self)
        self.marks_label.setStyleSheet("color: #444;")
        top = QHBoxLayout()
        top.addWidget(QLabel("Level:", self))
        top.addWidget(self.level_spin)
        top.addSpacing(10)
        top.addWidget(QLabel("Show:", self))
        top.addWidget(self.filter_combo)
        top.addSpacing(10)
        top.addWidget(self.summary, 1)
        top.addWidget(self.marks_label)

        self.limits_label = QLabel("", self)
        self.limits_label.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.note_label = QLabel("", self)
        self.note_label.setWordWrap(True)
        self.note_label.setStyleSheet("color: #8a4b00;")
        self.note_label.hide()
        self.caution = QLabel(CAUTION_TEXT, self)
        font = QFont(self.caution.font())
        font.setItalic(True)
        self.caution.setFont(font)
        self.caution.setStyleSheet("color: #555;")

        # ----- the table ---------------------------------------------------------------------
        self.model = OutlierTableModel(self)
        self.proxy = OutlierFilterProxy(self)
        self.proxy.setSourceModel(self.model)
        self.table = QTableView(self)
        self.table.setModel(self.proxy)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.ExtendedSelection)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.setSortingEnabled(True)
        self.table.sortByColumn(COL_SCORE, Qt.SortOrder.DescendingOrder)
        self.table.setWordWrap(False)
        self.table.setShowGrid(False)
        self.table.setAlternatingRowColors(False)
        self.table.setTextElideMode(Qt.TextElideMode.ElideMiddle)
        self.table.setVerticalScrollMode(QAbstractItemView.ScrollMode.ScrollPerPixel)
        vh = self.table.verticalHeader()
        vh.hide()
        vh.setSectionResizeMode(QHeaderView.ResizeMode.Fixed)
        vh.setDefaultSectionSize(self.table.fontMetrics().height() + 6)
        hh = self.table.horizontalHeader()
        for col in range(N_COLUMNS):
            hh.setSectionResizeMode(col, QHeaderView.ResizeMode.Interactive)
        hh.setSectionResizeMode(COL_FILE, QHeaderView.ResizeMode.Stretch)
        fm = self.table.fontMetrics()
        widths = {COL_NUMBER: "0000", COL_SCORE: "score", COL_Q: "limit 0000.0",
                  COL_T2: "limit 0000.0", COL_BEYOND: "beyond", COL_MARK: "exclude"}
        for col, sample in widths.items():
            hh.resizeSection(col, fm.horizontalAdvance(sample) + 24)   # room for the arrow
        self.table.setToolTip("Images sorted by score, most unusual first (flagged rows "
                              "tinted). Click to select an image; Shift/Ctrl + click to pick "
                              "several. Click a column title to sort.")

        # ----- the plot ----------------------------------------------------------------------
        self.plot_widget = pg.PlotWidget(self, background="w")
        self.plot = self.plot_widget.getPlotItem()
        fg = pg.mkColor(40, 40, 40)
        self.plot.showGrid(x=True, y=True, alpha=0.25)
        for ax in ("left", "bottom"):
            self.plot.getAxis(ax).setTextPen(fg)
            self.plot.getAxis(ax).setPen(fg)
            self.plot.getAxis(ax).enableAutoSIPrefix(False)
        self.plot.setMenuEnabled(False)
        self.plot.setLabel("bottom", "T² (Hotelling)")
        self.plot.setLabel("left", "Q (residual)")
        self._brushes = {
            "normal": pg.mkBrush(70, 110, 160, 170), "flag": pg.mkBrush(225, 75, 40, 230),
            "exclude": pg.mkBrush(150, 150, 150, 200), "keep": pg.mkBrush(40, 150, 80, 220)}
        self.scatter = pg.ScatterPlotItem(size=7, pen=None, symbol="o", hoverable=True,
                                          tip=self._point_tip)
        self.plot.addItem(self.scatter)
        self.set_marks_item = pg.ScatterPlotItem(size=11, brush=None, symbol="o",
                                                 pen=pg.mkPen(QColor(20, 20, 20), width=1.5))
        self.sel_mark = pg.ScatterPlotItem(size=16, brush=None, symbol="o",
                                           pen=pg.mkPen(_SEL_COLOUR, width=2.5))
        self.plot.addItem(self.set_marks_item)
        self.plot.addItem(self.sel_mark)
        limit_pen = pg.mkPen(_LIMIT_COLOUR, width=1.5, style=Qt.PenStyle.DashLine)
        label_opts = {"color": _LIMIT_COLOUR, "movable": False, "fill": pg.mkBrush(255, 255,
                                                                                   255, 200)}
        self.q_line = pg.InfiniteLine(0, angle=0, pen=limit_pen, label="Q limit",
                                      labelOpts=dict(label_opts, position=0.03,
                                                     anchors=[(0, 0), (0, 0)]))
        self.t2_line = pg.InfiniteLine(0, angle=90, pen=limit_pen, label="T² limit",
                                       labelOpts=dict(label_opts, position=0.97,
                                                      rotateAxis=(1, 0),
                                                      anchors=[(1, 1), (1, 1)]))
        for line in (self.q_line, self.t2_line):
            line.setZValue(-5)
            self.plot.addItem(line)
        self.plot_widget.setToolTip("Each point is one image: Q (how much of it the basis "
                                    "images do not explain) against T² (how unusual its "
                                    "weights are). Points beyond a dashed limit are flagged "
                                    "(red). Click a point to select the image.")

        # ----- review buttons ----------------------------------------------------------------
        def button(action: QAction) -> QToolButton:
            b = QToolButton(self)
            b.setDefaultAction(action)
            b.setToolButtonStyle(Qt.ToolButtonStyle.ToolButtonTextOnly)
            return b

        self.keep_button = button(self.keep_action)
        self.exclude_button = button(self.exclude_action)
        self.clear_button = button(self.clear_action)
        self.refit_button = button(self.refit_action)
        self.export_menu = QMenu(self)
        self.export_menu.addActions(list(self.export_actions.values()))
        self.export_button = QToolButton(self)
        self.export_button.setText("Export list")
        self.export_button.setToolTip("Write the excluded or flagged images to a CSV file or a "
                                      "plain list of paths.")
        self.export_button.setMenu(self.export_menu)
        self.export_button.setPopupMode(QToolButton.ToolButtonPopupMode.InstantPopup)
        for label in (self.summary, self.limits_label):
            # long texts are cut rather than widening the dock (the tooltip has them whole)
            label.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Preferred)
            label.setMinimumWidth(40)
        buttons = QHBoxLayout()
        buttons.addWidget(QLabel("Mark:", self))
        for b in (self.keep_button, self.exclude_button, self.clear_button):
            buttons.addWidget(b)
        buttons.addStretch(1)
        buttons.addWidget(self.refit_button)
        buttons.addWidget(self.export_button)

        # ----- layout ------------------------------------------------------------------------
        left = QWidget(self)
        left_lay = QVBoxLayout(left)
        left_lay.setContentsMargins(0, 0, 0, 0)
        left_lay.addWidget(self.table, 1)
        left_lay.addLayout(buttons)
        right = QWidget(self)
        right_lay = QVBoxLayout(right)
        right_lay.setContentsMargins(0, 0, 0, 0)
        plot_top = QHBoxLayout()
        plot_top.addWidget(self.limits_label, 1)
        plot_top.addWidget(self.log_axes)
        right_lay.addLayout(plot_top)
        right_lay.addWidget(self.plot_widget, 1)
        self.splitter = QSplitter(Qt.Orientation.Horizontal, self)
        self.splitter.addWidget(left)
        self.splitter.addWidget(right)
        self.splitter.setStretchFactor(0, 3)
        self.splitter.setStretchFactor(1, 2)
        self.splitter.setChildrenCollapsible(False)
        self._split_set = False     # True once sized (or moved by the user)
        self.splitter.splitterMoved.connect(self._on_splitter_moved)

        content = QWidget(self)
        c_lay = QVBoxLayout(content)
        c_lay.setContentsMargins(0, 0, 0, 0)
        c_lay.addLayout(top)
        c_lay.addWidget(self.splitter, 1)
        c_lay.addWidget(self.note_label)
        c_lay.addWidget(self.caution)
        self.content = content

        self.waiting_label = QLabel(WAITING_TEXT, self)
        self.waiting_label.setWordWrap(True)
        self.waiting_label.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.waiting_label.setMargin(16)
        self.stack = QStackedWidget(self)
        self.stack.addWidget(self.waiting_label)
        self.stack.addWidget(content)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        lay.addWidget(self.stack)

    def _wire(self) -> None:
        s = self.state
        s.decompositionChanged.connect(self._schedule)
        s.rankChanged.connect(self._schedule)
        s.levelChanged.connect(self._on_level)
        s.marksChanged.connect(self._on_marks)
        s.selectedChanged.connect(self._on_state_selected)
        s.selectionSetChanged.connect(self._on_state_selection_set)
        self.level_spin.valueChanged.connect(self._on_level_spin)
        self.filter_combo.currentIndexChanged.connect(self._on_filter)
        self.log_axes.toggled.connect(self._draw_plot)
        sm = self.table.selectionModel()
        sm.selectionChanged.connect(self._on_view_selection)
        sm.currentRowChanged.connect(self._on_view_selection)
        self.scatter.sigClicked.connect(self._on_points_clicked)
        self.plot.getViewBox().sigRangeChanged.connect(self._update_ticks)

    def resizeEvent(self, event) -> None:  # noqa: N802 - Qt name
        super().resizeEvent(event)
        width = self.width() - 8 - self.splitter.handleWidth()   # less the margins
        if not self._split_set and width > 200:
            # table and plot share the width 60:40 until the user moves the divider
            self.splitter.setSizes([int(width * 0.6), width - int(width * 0.6)])

    @Slot(int, int)
    def _on_splitter_moved(self, *_):
        self._split_set = True

    # ----- helpers -----------------------------------------------------------------------------
    def proxy_row(self, image: int) -> int:
        """Return the shown row of image ``image`` (-1 when filtered out or absent)."""
        row = self.model.row_of(image)
        if row < 0:
            return -1
        return self.proxy.mapFromSource(self.model.index(row, 0)).row()

    def image_at(self, proxy_row: int) -> int:
        """Return the image index shown in row ``proxy_row``."""
        return self.model.image_at(self.proxy.mapToSource(self.proxy.index(proxy_row, 0)).row())

    def shown_images(self) -> np.ndarray:
        """Return the image indices of the rows shown, top to bottom."""
        return np.array([self.image_at(r) for r in range(self.proxy.rowCount())], dtype=np.intp)

    def plot_values(self) -> tuple[np.ndarray, np.ndarray]:
        """Return (T², Q) of the plotted points, in image order, in data units (not log)."""
        x, y = self.scatter.getData()
        x = np.asarray(x, dtype=np.float64)
        y = np.asarray(y, dtype=np.float64)
        if self.log_axes.isChecked():
            return 10.0 ** x, 10.0 ** y
        return x, y

    def limit_positions(self) -> tuple[float, float]:
        """Return (T² limit, Q limit) where the lines are drawn, in data units (not log)."""
        x, y = float(self.t2_line.value()), float(self.q_line.value())
        if self.log_axes.isChecked():
            return 10.0 ** x, 10.0 ** y
        return x, y

    def _point_tip(self, x, y, data) -> str:
        t = self.scores
        if t is None or data is None:
            return ""
        i = int(data)
        if not 0 <= i < t.n_images:
            return ""
        return (f"image {i + 1}: {self.model.name(i)}\nQ = {t.q[i]:.4g}, T² = {t.t2[i]:.4g}, "
                f"score {t.score[i]:.3g}")

    def _ready(self) -> bool:
        d = self.state.decomposition
        return self.scores is not None and d is not None and d.n_images == self.scores.n_images

    def _targets(self) -> list[int]:
        """The images a mark applies to: the picked set when the selected image is in it."""
        chosen = self.state.selection_set
        cur = self.state.selected
        if len(chosen) > 1 and (cur in chosen or cur < 0):
            return list(chosen)
        return [cur] if cur >= 0 else []

    # ----- state -> view -----------------------------------------------------------------------
    def flush(self) -> None:
        """Recompute now if a recomputation is pending (tests, screenshots)."""
        if self._timer.isActive():
            self._timer.stop()
            self._redraw()

    @Slot()
    def _redraw(self) -> None:
        self._timed_redraw(self._recompute)

    def _show_waiting(self, text: str) -> None:
        self.scores = None
        self._syncing = True
        try:
            self.model.set_scores(None, None)
            self.proxy.refilter()
        finally:
            self._syncing = False
        self.waiting_label.setText(text)
        self.stack.setCurrentWidget(self.waiting_label)
        self._draw_plot()
        self._update_actions()

    def _recompute(self) -> None:
        d = self.state.decomposition
        if d is None:
            self._show_waiting("No analysis yet. " + WAITING_TEXT)
            return
        if d.residual is None:
            self._show_waiting(WAITING_TEXT)
            return
        try:
            table = score_table(d, min(max(self.state.rank, 0), d.rank), self.state.level)
        except (TypeError, ValueError) as exc:
            self._show_waiting(f"No outlier scores for this analysis: {exc}")
            return
        self.scores = table
        self._syncing = True
        try:
            self.model.set_scores(d, table)
            self.proxy.refilter()
            self._apply_state_selection()
        finally:
            self._syncing = False
        self.stack.setCurrentWidget(self.content)
        self._update_labels()
        self._draw_plot()
        self._update_actions()

    def _update_labels(self) -> None:
        t = self.scores
        d = self.state.decomposition
        if t is None or d is None:
            return
        lim = t.limits
        level = f"{100 * lim.level:g} %"
        self.summary.setText(f"{t.n_images:,} images · {t.n_flagged:,} flagged at rank "
                             f"{t.rank} ({level} level)")
        self.summary.setToolTip(self.summary.text())
        q_part = (f"Q limit {lim.q_limit:.4g} ({_Q_METHODS.get(lim.q_method, lim.q_method)})"
                  if lim.q_informative else "Q limit: none")
        t2_part = (f"T² limit {lim.t2_limit:.4g} "
                   f"({_T2_METHODS.get(lim.t2_method, lim.t2_method)})"
                   if lim.t2_informative else "T² limit: none")
        self.limits_label.setText(f"{q_part} · {t2_part}")
        why = {"jackson-mudholkar": "Jackson-Mudholkar (1979): from the eigenvalues of the "
                                    "modes left out, which are known because the "
                                    "decomposition holds all the variation",
               "box": "Box (1954): a chi-square matched to the mean and spread of the images' "
                      "Q values (the decomposition is truncated, so the eigenvalues left out "
                      "are not known)"}
        tip = (f"Q limit: {why.get(lim.q_method, lim.q_method)}.\nT² limit: Beta form for the "
               f"images that built the model (Tracy, Young and Mason 1992), over "
               f"{lim.t2_rank} mode(s).\nConfidence level {level}.")
        if lim.note:
            tip += f"\n\nNote: {lim.note}."
        self.limits_label.setToolTip(f"{self.limits_label.text()}\n\n{tip}")
        self.note_label.setText(f"Note: {lim.note}." if lim.note else "")
        self.note_label.setVisible(bool(lim.note))
        self.model.headerDataChanged.emit(Qt.Orientation.Horizontal, 0, N_COLUMNS - 1)
        self._update_marks_label()

    def _update_marks_label(self) -> None:
        d = self.state.decomposition
        if d is None or not self._ready():
            self.marks_label.setText("")
            return
        marks = np.asarray(d.marks)
        n_ex = int(np.count_nonzero(marks == review.EXCLUDE))
        n_keep = int(np.count_nonzero(marks == review.KEEP))
        n_open = int(np.count_nonzero(marks == review.NOT_REVIEWED))
        self.marks_label.setText(f"{n_ex} excluded, {n_keep} kept, {n_open} not reviewed")
        self.marks_label.setToolTip(self.marks_label.text())

    def _update_actions(self) -> None:
        ready = self._ready()
        for a in (self.keep_action, self.exclude_action, self.clear_action):
            a.setEnabled(ready)
        d = self.state.decomposition
        has_excluded = ready and bool(np.any(np.asarray(d.marks) == review.EXCLUDE))
        self.refit_action.setEnabled(has_excluded and bool(d.paths))
        for (which, kind), a in self.export_actions.items():
            a.setEnabled(ready and (kind == "csv" or bool(d.paths)))
        self.export_button.setEnabled(ready)

    def _log(self, values: np.ndarray, floor: float) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            out = np.log10(np.maximum(values, floor))
        return out

    def _draw_plot(self, *_) -> None:
        t = self.scores
        log = self.log_axes.isChecked()
        if t is None:
            self.scatter.setData(x=[], y=[])
            self.sel_mark.setData(x=[], y=[])
            self.set_marks_item.setData(x=[], y=[])
            self.q_line.hide()
            self.t2_line.hide()
            return
        q = np.asarray(t.q, dtype=np.float64)
        t2 = np.asarray(t.t2, dtype=np.float64)
        lim = t.limits
        if log:
            self._floors = (self._floor(t2, lim.t2_limit), self._floor(q, lim.q_limit))
            x, y = self._log(t2, self._floors[0]), self._log(q, self._floors[1])
        else:
            x, y = t2, q
        self._plot_xy = (x, y)
        self.scatter.setData(x=x, y=y, brush=self._point_brushes(), data=np.arange(t.n_images))
        for line, value, ok, name, method in (
                (self.q_line, lim.q_limit, lim.q_informative, "Q limit",
                 _Q_METHODS.get(lim.q_method, lim.q_method)),
                (self.t2_line, lim.t2_limit, lim.t2_informative, "T² limit",
                 _T2_METHODS.get(lim.t2_method, lim.t2_method))):
            if ok and np.isfinite(value) and value > 0:
                line.setValue(float(np.log10(value)) if log else float(value))
                line.show()     # before setFormat: a hidden label does not take new text
                line.label.setFormat(f"{name} {value:.4g}")
                line.label.setToolTip(f"{name} {value:.5g} ({method}, {100 * lim.level:g} % "
                                      "level)")
            else:
                line.hide()
        self._update_plot_selection()
        self.plot.enableAutoRange()
        self._update_ticks()

    def _update_ticks(self, *_) -> None:
        """Label powers of ten (and 2, 5 times them) on log axes; automatic ticks otherwise."""
        log = self.log_axes.isChecked()
        (x0, x1), (y0, y1) = self.plot.getViewBox().viewRange()
        self.plot.getAxis("bottom").setTicks(log_ticks(x0, x1) if log else None)
        self.plot.getAxis("left").setTicks(log_ticks(y0, y1) if log else None)

    @staticmethod
    def _floor(values: np.ndarray, limit: float) -> float:
        positive = values[values > 0]
        smallest = float(positive.min()) if positive.size else (limit if limit > 0 else 1.0)
        if limit > 0 and np.isfinite(limit):
            smallest = min(smallest, float(limit))
        return smallest / 10.0 ** OutlierView.LOG_FLOOR_DECADES

    def _point_brushes(self) -> np.ndarray:
        t = self.scores
        marks = self.model.marks
        brushes = np.empty(t.n_images, dtype=object)
        brushes[:] = self._brushes["normal"]
        brushes[np.asarray(t.flag, dtype=bool)] = self._brushes["flag"]
        if marks.shape == (t.n_images,):
            brushes[marks == review.KEEP] = self._brushes["keep"]
            brushes[marks == review.EXCLUDE] = self._brushes["exclude"]
        return brushes

    def _update_plot_selection(self) -> None:
        t = self.scores
        if t is None or not hasattr(self, "_plot_xy"):
            self.sel_mark.setData(x=[], y=[])
            self.set_marks_item.setData(x=[], y=[])
            return
        x, y = self._plot_xy
        cur = self.state.selected
        if 0 <= cur < t.n_images:
            self.sel_mark.setData(x=[float(x[cur])], y=[float(y[cur])])
        else:
            self.sel_mark.setData(x=[], y=[])
        chosen = np.array([i for i in self.state.selection_set if 0 <= i < t.n_images],
                          dtype=np.intp)
        if chosen.size:
            self.set_marks_item.setData(x=x[chosen], y=y[chosen])
        else:
            self.set_marks_item.setData(x=[], y=[])

    @Slot(float)
    def _on_level(self, level: float) -> None:
        self.level_spin.blockSignals(True)
        try:
            self.level_spin.setValue(100.0 * level)
        finally:
            self.level_spin.blockSignals(False)
        self._schedule()

    @Slot(object)
    def _on_marks(self, _changed) -> None:
        d = self.state.decomposition
        if d is None or not self._ready():
            return
        self._syncing = True
        try:
            self.model.set_marks(d)
            if self.proxy.mode in ("excluded", "not reviewed"):
                self.proxy.refilter()
            self._apply_state_selection()
        finally:
            self._syncing = False
        if self.scores is not None and hasattr(self, "_plot_xy"):
            self.scatter.setBrush(self._point_brushes())
        self._update_marks_label()
        self._update_actions()

    @Slot(int)
    def _on_state_selected(self, index: int) -> None:
        if self._syncing:
            return
        self._syncing = True
        try:
            chosen = self.state.selection_set
            if len(chosen) > 1 and index in chosen and self._shown == set(chosen):
                self._move_current(index)
            else:
                self._apply_state_selection()
        finally:
            self._syncing = False
        self._update_plot_selection()

    @Slot(object)
    def _on_state_selection_set(self, _indices) -> None:
        if self._syncing:
            return
        self._syncing = True
        try:
            self._apply_state_selection()
        finally:
            self._syncing = False
        self._update_plot_selection()

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
        sm.select(selection, QItemSelectionModel.SelectionFlag.ClearAndSelect)
        self._move_current(cur)

    def _move_current(self, image: int) -> None:
        pr = self.proxy_row(image)
        if pr >= 0:
            index = self.proxy.index(pr, COL_FILE)
            self.table.selectionModel().setCurrentIndex(
                index, QItemSelectionModel.SelectionFlag.NoUpdate)
            self.table.scrollTo(index, QAbstractItemView.ScrollHint.EnsureVisible)

    # ----- view -> state -----------------------------------------------------------------------
    @Slot(float)
    def _on_level_spin(self, value: float) -> None:
        self.state.set_level(round(float(value), 4) / 100.0)

    @Slot(int)
    def _on_filter(self, _index: int) -> None:
        self._syncing = True
        try:
            self.proxy.set_mode(str(self.filter_combo.currentData()))
            self._apply_state_selection()
        finally:
            self._syncing = False

    @Slot()
    def _on_view_selection(self, *_) -> None:
        if self._syncing:
            return
        sm = self.table.selectionModel()
        images = sorted({self.image_at(i.row()) for i in sm.selectedRows()})
        current = sm.currentIndex()
        cur = self.image_at(current.row()) if current.isValid() else -1
        if cur < 0 and images:
            cur = images[0]
        self._syncing = True
        try:
            if cur >= 0 and (not images or cur in images):
                self.state.set_selected(cur)
            elif images:
                self.state.set_selected(images[0])
            self.state.set_selection_set(images if len(images) > 1 else ())
        finally:
            self._syncing = False
        self._update_plot_selection()

    def _on_points_clicked(self, _item, points, _ev=None) -> None:
        """Select the image of the first clicked point."""
        if len(points) == 0 or self.scores is None:
            return
        self.state.set_selected(int(points[0].data()))

    # ----- review --------------------------------------------------------------------------
    def mark_selected(self, mark: int) -> list[int]:
        """Give the selected image(s) review mark ``mark`` (0 not reviewed, 1 keep, 2 exclude).

        When a single image is marked, the next row of the table becomes the selected image, so
        a sorted list can be reviewed with the keyboard.

        Returns
        -------
        list of int
            The images marked.
        """
        if not self._ready():
            return []
        targets = self._targets()
        if not targets:
            return []
        nxt = -1
        if len(targets) == 1:
            row = self.proxy_row(targets[0])
            if 0 <= row < self.proxy.rowCount() - 1:
                nxt = self.image_at(row + 1)
        self.state.set_marks(targets, mark)
        if nxt >= 0:
            self.state.set_selection_set(())
            self.state.set_selected(nxt)
        return targets

    @Slot()
    def keep_selected(self) -> None:
        """Mark the selected image(s) as reviewed and kept."""
        self.mark_selected(review.KEEP)

    @Slot()
    def exclude_selected(self) -> None:
        """Mark the selected image(s) as excluded from the next analysis."""
        self.mark_selected(review.EXCLUDE)

    @Slot()
    def clear_selected(self) -> None:
        """Mark the selected image(s) as not reviewed."""
        self.mark_selected(review.NOT_REVIEWED)

    def confirm(self, title: str, text: str) -> bool:
        """Ask a yes/no question (QMessageBox.question); True for yes."""
        answer = QMessageBox.question(self, title, text, QMessageBox.StandardButton.Yes
                                      | QMessageBox.StandardButton.Cancel,
                                      QMessageBox.StandardButton.Cancel)
        return answer == QMessageBox.StandardButton.Yes

    def _warn(self, title: str, text: str) -> None:
        """Show a message without blocking (the text is kept in :attr:`last_message`)."""
        self.last_message = text
        if self.message_box is not None:
            self.message_box.close()
        box = QMessageBox(QMessageBox.Icon.Warning, title, text, QMessageBox.StandardButton.Ok,
                          self)
        box.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.message_box = box
        box.open()

    @Slot()
    def refit(self) -> bool:
        """Ask, then emit :attr:`refitRequested` with the images not marked excluded.

        Returns
        -------
        bool
            True when the request was sent.
        """
        d = self.state.decomposition
        if d is None or not self._ready():
            return False
        excluded = review.excluded_indices(d)
        if excluded.size == 0:
            self._warn("Nothing excluded", "No image is marked excluded: mark images with "
                       "Exclude (X) first.")
            return False
        try:
            remaining = review.remaining_sources(d)
            options = stored_options_of(d)
        except (TypeError, ValueError) as exc:
            self._warn("Cannot refit", str(exc))
            return False
        text = (f"Analyse again the {len(remaining):,} images not marked excluded "
                f"({excluded.size:,} excluded), with the same options?\n\nThe new analysis "
                "replaces the current one and its marks: save the current one first (File > "
                "Save analysis) to keep them. The source images are not moved or deleted.")
        if not self.confirm("Refit without excluded images", text):
            return False
        self.refitRequested.emit(list(remaining), options)
        return True

    def _start_dir(self) -> str:
        if self._export_dir and os.path.isdir(self._export_dir):
            return self._export_dir
        d = self.state.decomposition
        if d is not None and d.paths:
            folder = os.path.dirname(os.path.dirname(os.path.abspath(d.paths[0])))
            if os.path.isdir(folder):
                return folder
        return os.path.expanduser("~")

    def export_list(self, which: str, kind: str) -> str | None:
        """Ask for a file name and write the excluded or flagged images to it.

        Parameters
        ----------
        which : {"excluded", "flagged"}
        kind : {"csv", "paths"}
            A CSV with scores (:func:`modescope.core.review.marks.write_csv`) or one source path per
            line (:func:`modescope.core.review.marks.write_path_list`).

        Returns
        -------
        str or None
            The file written; None when cancelled or on failure (with a message naming the
            file).
        """
        if which not in ("excluded", "flagged") or kind not in ("csv", "paths"):
            raise ValueError(f"which must be 'excluded' or 'flagged' and kind 'csv' or "
                             f"'paths', got {which!r}, {kind!r}")
        d, t = self.state.decomposition, self.scores
        if d is None or not self._ready():
            return None
        count = (int(np.count_nonzero(np.asarray(d.marks) == review.EXCLUDE))
                 if which == "excluded" else t.n_flagged)
        if count == 0:
            self._warn("Nothing to export", f"No image is {which} at present.")
            return None
        suffix, file_filter = ((".csv", "CSV files (*.csv);;All files (*)") if kind == "csv"
                               else (".txt", "Text files (*.txt);;All files (*)"))
        start = os.path.join(self._start_dir(), f"{which}{suffix}")
        path, _ = QFileDialog.getSaveFileName(
            self, f"Export the {count} {which} image(s)", start, file_filter,
            options=QFileDialog.Option.DontConfirmOverwrite)
        if not path:
            return None
        if not os.path.splitext(path)[1]:
            path += suffix
        overwrite = False
        if os.path.exists(path):
            if not self.confirm("Replace the file?",
                                f"{path} already exists. Replace it?"):
                return None
            overwrite = True
        try:
            if kind == "csv":
                written = review.write_csv(path, d, t, which, overwrite=overwrite)
            else:
                written = review.write_path_list(path, d, which, t, overwrite=overwrite)
        except (ModescopeError, OSError, ValueError, TypeError) as exc:
            message = str(exc)
            self._warn("Cannot write the list",
                       message if os.fspath(path) in message else f"{path}: {message}")
            return None
        self._export_dir = os.path.dirname(os.fspath(written))
        return os.fspath(written)
