"""The outlier table's data: one row per image, sorted with numpy, and its filter.

:class:`OutlierTableModel` holds every image's Q, T², score, limit passed and review mark from an
:class:`~modescope.core.review.outliers.OutlierTable` (no per-row widgets, so 10,000 rows scroll
smoothly); :class:`OutlierFilterProxy` shows all, flagged, excluded or not-reviewed images and
leaves the sorting to the model. Images are numbered from 1 for display.
"""

from __future__ import annotations


import numpy as np
from PySide6.QtCore import QAbstractTableModel, QModelIndex, QSortFilterProxyModel, Qt
from PySide6.QtGui import QColor

from modescope.core.decomposition import Decomposition
from modescope.core.review import marks as review
from modescope.app.desktop.display import display_name, display_path
from modescope.app.words import counted
from modescope.core.review.outliers import Q_METHOD_NAMES, ControlLimits, OutlierTable

__all__ = ["OutlierTableModel", "OutlierFilterProxy", "FILTERS", "SORT_ROLE", "N_COLUMNS",
           "COL_NUMBER", "COL_FILE", "COL_SCORE", "COL_Q", "COL_T2", "COL_BEYOND", "COL_MARK",
           "Q_METHODS", "T2_METHODS", "describe_limits"]

SORT_ROLE = Qt.ItemDataRole.UserRole + 1
(COL_NUMBER, COL_FILE, COL_SCORE, COL_Q, COL_T2, COL_BEYOND, COL_MARK) = range(7)
N_COLUMNS = 7

#: Filter choices of the table: (key, label).
FILTERS = (("all", "all images"), ("flagged", "flagged"), ("excluded", "excluded"),
           ("not reviewed", "not reviewed"))

#: Display names of the methods behind the Q and T² limits.
Q_METHODS = dict(Q_METHOD_NAMES)
T2_METHODS = {"beta": "Beta", "f": "F"}
#: Where each T² limit comes from, in words (Tracy, Young and Mason 1992 give both forms).
T2_ORIGINS = {"beta": "Beta form for the images that built the model (Tracy, Young and Mason "
                      "1992, Phase I)",
              "f": "F form for new images scored against the model (Tracy, Young and Mason "
                   "1992, Phase II)"}
_MARK_TEXT = {review.NOT_REVIEWED: "", review.KEEP: "keep", review.EXCLUDE: "exclude"}

_FLAG_BG = QColor(255, 232, 226)
_KEEP_FG = QColor(30, 120, 60)
_EXCLUDE_FG = QColor(190, 40, 40)
_DIM_FG = QColor(125, 125, 125)


def describe_limits(limits: ControlLimits) -> tuple[str, str]:
    """Return a one-line text of the Q and T² limits and a longer explanation for a tooltip.

    Parameters
    ----------
    limits : ControlLimits
        The limits of a score table (``OutlierTable.limits``).

    Returns
    -------
    text : str
        "Q limit <value> (<method>) · T² limit <value> (<method>)"; "none" for a limit that
        does not apply.
    explanation : str
        Where each limit comes from (for Q the method chosen and why, ``limits.q_reason``), the
        confidence level and the limits' note, if any.

    Raises
    ------
    TypeError
        If ``limits`` is not a ControlLimits.
    """
    if not isinstance(limits, ControlLimits):
        raise TypeError(f"limits must be a ControlLimits, got {type(limits).__name__}")
    lim = limits
    q_part = (f"Q limit {lim.q_limit:.4g} ({Q_METHODS.get(lim.q_method, lim.q_method)})"
              if lim.q_informative else "Q limit: none")
    t2_part = (f"T² limit {lim.t2_limit:.4g} ({T2_METHODS.get(lim.t2_method, lim.t2_method)})"
               if lim.t2_informative else "T² limit: none")
    q_why = lim.q_reason or Q_METHODS.get(lim.q_method, lim.q_method)
    t2_why = T2_ORIGINS.get(lim.t2_method, T2_METHODS.get(lim.t2_method, lim.t2_method))
    tip = (f"Q limit: {q_why}.\nT² limit: {t2_why}, over {counted(lim.t2_rank, 'mode')}."
           f"\nConfidence level {100 * lim.level:g} %.")
    if lim.note:
        tip += f"\n\nNote: {lim.note}."
    return f"{q_part} · {t2_part}", tip


def _image_names(d: Decomposition) -> list[str]:
    names = []
    for i in range(d.n_images):
        path = d.paths[i] if d.paths else ""
        name = display_name(path) if path else f"image {i + 1}"
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
            text = (f"image {i + 1}: {display_path(path)}\nQ = {t.q[i]:.5g} (limit {self.limit_text('q')}), "
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
