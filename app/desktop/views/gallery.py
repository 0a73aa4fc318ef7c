"""Basis gallery: the mean image and the ranked basis images as tiles.

Each tile shows one basis image with its number, singular value, energy share and cumulative share.
Signed values are drawn with the diverging colour table of :mod:`modescope.core.output.colormap`
centred on zero; the limit L (the value shown at both ends) is set **per tile** to the largest
absolute value of that basis image and is stated in the tile's tooltip; a shared colour bar above
the tiles says how to read the colours. RGB basis images are shown per channel as
``0.5 + value / (2 L)`` (mid-gray is zero, black -L, white +L).

Tiles are rendered on demand in the model's ``data()`` (only tiles on screen are asked for) and
kept in a small cache keyed by (decomposition serial number, mode), so k = 200 costs nothing until
scrolled to.
"""

from __future__ import annotations

from collections import OrderedDict

import numpy as np
from PySide6.QtCore import (QAbstractListModel, QItemSelectionModel, QModelIndex, QRect, QSize,
                            Qt, Slot)
from PySide6.QtGui import QBrush, QColor, QFont, QIcon, QLinearGradient, QPainter, QPixmap
from PySide6.QtWidgets import QLabel, QListView, QSizePolicy, QVBoxLayout, QWidget

from modescope.core.output.colormap import DIVERGING_LUT
from modescope.core.output.images import basis_image_rgb, mean_image, signed_image_rgb
from modescope.core.decomposition import Decomposition

from modescope.app.words import counted
from modescope.app.desktop.redraw import ThrottledRedraw
from modescope.app.desktop.state import AppState
from modescope.app.desktop.workers.thumbnails import array_to_qimage

__all__ = ["BasisGallery", "BasisModel", "basis_tile_rgb", "mean_tile_rgb", "share_text",
           "cumulative_text", "MODE_ROLE", "LIMIT_ROLE"]

MODE_ROLE = Qt.ItemDataRole.UserRole + 1
LIMIT_ROLE = Qt.ItemDataRole.UserRole + 2


def _subsample(image: np.ndarray, longest: int) -> np.ndarray:
    """Take every n-th pixel so that the longest side is at most about 2 * ``longest``."""
    step = max(1, int(np.ceil(max(image.shape[:2]) / (2 * longest))))
    return image[::step, ::step]


def mean_tile_rgb(decomposition: Decomposition, longest: int = 10_000) -> np.ndarray:
    """Return the mean image as uint8 gray (rows, cols) or RGB (rows, cols, 3) for display.

    The levels are core's (:func:`~modescope.core.output.images.mean_image`: clipped to [0, 1],
    rounded to 8 bits), so the tile shows exactly the pixels of the exported ``mean.png``;
    large images keep every n-th pixel.
    """
    a = _subsample(mean_image(decomposition), longest)
    return a[:, :, 0] if a.shape[2] == 1 else a


def basis_tile_rgb(decomposition: Decomposition, mode: int, limit: float | None = None,
                   longest: int = 10_000) -> np.ndarray:
    """Return basis image ``mode`` as uint8 RGB (rows, cols, 3) for display.

    The colours are core's (:func:`~modescope.core.output.images.basis_image_rgb`), so a tile
    shows exactly the pixels of the exported basis PNG. ``limit`` defaults to the largest
    absolute value of the basis image; large images keep every n-th pixel.
    """
    if limit is None:
        return _subsample(basis_image_rgb(decomposition, mode)[0], longest)
    return signed_image_rgb(_subsample(decomposition.to_image(decomposition.basis[:, mode]),
                                       longest), limit)


def share_text(share: float) -> str:
    """Return an energy share (a fraction) as percent text with three significant digits."""
    return f"{100.0 * share:.3g} %"


def cumulative_text(share: float) -> str:
    """Return a cumulative energy share (a fraction) as percent text with one decimal."""
    return f"{100.0 * share:.1f} %"


class BasisModel(QAbstractListModel):
    """List model: row 0 is the mean image, row j + 1 is basis image j (0-based mode j).

    Roles: DisplayRole (label), DecorationRole (QIcon, rendered lazily), ToolTipRole,
    ForegroundRole (gray beyond the current rank), ``MODE_ROLE`` (mode, -1 for the mean),
    ``LIMIT_ROLE`` (the colour limit L of the tile).
    """

    def __init__(self, icon_size: int = 112, cache_size: int = 256, parent=None):
        super().__init__(parent)
        self.icon_size = int(icon_size)
        self.cache_size = int(cache_size)
        self._d: Decomposition | None = None
        self._serial = 0
        self._shares = np.zeros(0)
        self._cumulative = np.zeros(0)
        self._limits: dict[int, float] = {}
        self._icons: OrderedDict[tuple[int, int], QIcon] = OrderedDict()
        self._rank = 0

    # ----- contents ------------------------------------------------------------------------
    @property
    def decomposition(self) -> Decomposition | None:
        return self._d

    def set_decomposition(self, d: Decomposition | None) -> None:
        """Install a new decomposition, keeping rows (and the view's selection) where possible."""
        old_rows = self.rowCount()
        new_rows = 0 if d is None else d.rank + 1
        self._serial += 1
        self._icons.clear()
        self._limits.clear()
        if new_rows < old_rows:
            self.beginRemoveRows(QModelIndex(), new_rows, old_rows - 1)
            self._set(d)
            self.endRemoveRows()
        elif new_rows > old_rows:
            self.beginInsertRows(QModelIndex(), old_rows, new_rows - 1)
            self._set(d)
            self.endInsertRows()
        else:
            self._set(d)
        common = min(old_rows, new_rows)
        if common:
            self.dataChanged.emit(self.index(0), self.index(common - 1))

    def _set(self, d: Decomposition | None) -> None:
        self._d = d
        if d is None:
            self._shares = self._cumulative = np.zeros(0)
        else:
            self._shares = d.energy_shares()
            self._cumulative = d.cumulative_energy()

    def set_rank(self, rank: int) -> None:
        """Gray out the labels of modes beyond ``rank``."""
        if rank != self._rank:
            self._rank = int(rank)
            if self.rowCount():
                self.dataChanged.emit(self.index(0), self.index(self.rowCount() - 1),
                                      [Qt.ItemDataRole.ForegroundRole,
                                       Qt.ItemDataRole.ToolTipRole])

    def limit(self, mode: int) -> float:
        """Return the colour limit L of basis image ``mode`` (its largest absolute value)."""
        lim = self._limits.get(mode)
        if lim is None:
            col = self._d.basis[:, mode]
            lim = float(np.max(np.abs(col))) if col.size else 0.0
            self._limits[mode] = lim
        return lim

    def label(self, row: int) -> str:
        """Return the text shown under tile ``row``."""
        d = self._d
        if row == 0:
            kind = "snapshot" if not d.exact else "final"
            return f"Mean image\n{counted(d.n_images, 'image')}\n({kind})"
        j = row - 1
        return (f"Basis image {j + 1}\n"
                f"singular value {d.singular_values[j]:.4g}\n"
                f"energy {share_text(self._shares[j])}\n"
                f"cumulative {cumulative_text(self._cumulative[j])}")

    def tooltip(self, row: int) -> str:
        d = self._d
        if row == 0:
            return ("Mean image of the collection, values 0 (black) to 1 (white).\n"
                    "Click: show the mean in the other views.")
        j = row - 1
        lim = self.limit(j)
        if d.image_shape[2] == 1:
            how = (f"Colours: -L teal, 0 off-white, +L brick, with L = {lim:.4g} "
                   f"(largest |value| of this basis image).")
        else:
            how = (f"Each colour channel shows 0.5 + value / (2 L) with L = {lim:.4g} "
                   f"(largest |value| of this basis image): mid-gray is zero, "
                   f"black -L, white +L.")
        used = ("used in the reconstruction at rank r = {0}".format(self._rank)
                if j < self._rank else
                f"beyond the current rank r = {self._rank}: not used in the reconstruction")
        return (f"Basis image {j + 1}: singular value {d.singular_values[j]:.6g}, "
                f"energy {share_text(self._shares[j])}, "
                f"cumulative {cumulative_text(self._cumulative[j])}; {used}.\n{how}\n"
                f"Click: show this basis image in the other views; it becomes the horizontal "
                f"axis of the weights plane (the vertical axis is kept).")

    # ----- icons ---------------------------------------------------------------------------
    def icon(self, row: int) -> QIcon:
        """Return the tile picture of ``row``, rendering it when not cached."""
        key = (self._serial, row - 1)
        icon = self._icons.get(key)
        if icon is not None:
            self._icons.move_to_end(key)
            return icon
        d = self._d
        if row == 0:
            rgb = mean_tile_rgb(d, self.icon_size)
        else:
            rgb = basis_tile_rgb(d, row - 1, self.limit(row - 1), self.icon_size)
        image = array_to_qimage(rgb)
        s = self.icon_size
        bigger = image.width() < s and image.height() < s
        image = image.scaled(s, s, Qt.AspectRatioMode.KeepAspectRatio,
                             Qt.TransformationMode.FastTransformation if bigger
                             else Qt.TransformationMode.SmoothTransformation)
        icon = QIcon()
        picture = QPixmap.fromImage(image)
        # the same picture when selected: no highlight tint over the values
        icon.addPixmap(picture, QIcon.Mode.Normal)
        icon.addPixmap(picture, QIcon.Mode.Selected)
        self._icons[key] = icon
        while len(self._icons) > self.cache_size:
            self._icons.popitem(last=False)
        return icon

    # ----- Qt model interface ----------------------------------------------------------------
    def rowCount(self, parent: QModelIndex = QModelIndex()) -> int:
        if parent.isValid() or self._d is None:
            return 0
        return self._d.rank + 1

    def data(self, index: QModelIndex, role: int = Qt.ItemDataRole.DisplayRole):
        if not index.isValid() or self._d is None or not 0 <= index.row() < self.rowCount():
            return None
        row = index.row()
        if role == Qt.ItemDataRole.DisplayRole:
            return self.label(row)
        if role == Qt.ItemDataRole.DecorationRole:
            return self.icon(row)
        if role == Qt.ItemDataRole.ToolTipRole:
            return self.tooltip(row)
        if role == Qt.ItemDataRole.ForegroundRole:
            if row > 0 and row - 1 >= self._rank:
                return QBrush(QColor(130, 130, 130))
            return None
        if role == Qt.ItemDataRole.TextAlignmentRole:
            return int(Qt.AlignmentFlag.AlignHCenter | Qt.AlignmentFlag.AlignTop)
        if role == MODE_ROLE:
            return row - 1
        if role == LIMIT_ROLE:
            return 0.0 if row == 0 else self.limit(row - 1)
        return None


class _Legend(QWidget):
    """A colour bar: the diverging table (gray images) or a gray ramp (RGB images), -L, 0, +L."""

    def __init__(self, parent=None):
        super().__init__(parent)
        self.rgb = False
        self.setMinimumHeight(46)
        self.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Fixed)
        self._update_tip()

    def set_rgb(self, rgb: bool) -> None:
        if rgb != self.rgb:
            self.rgb = rgb
            self._update_tip()
            self.update()

    def _update_tip(self) -> None:
        if self.rgb:
            self.setToolTip("RGB basis images: each channel shows 0.5 + value / (2 L); mid-gray "
                            "is zero, black -L, white +L. L is set per tile (largest |value| "
                            "of that basis image) and stated in the tile's tooltip.")
        else:
            self.setToolTip("Basis image values: -L teal, 0 off-white, +L brick. L is set per "
                            "tile (largest |value| of that basis image) and stated in the "
                            "tile's tooltip.")

    def sizeHint(self) -> QSize:
        return QSize(320, 46)

    def paintEvent(self, event) -> None:  # noqa: N802 - Qt name
        p = QPainter(self)
        fm = p.fontMetrics()
        w = self.width()
        caption = ("channel value, L per tile:" if self.rgb else "basis image value, L per tile:")
        cap_w = fm.horizontalAdvance(caption) + 10
        bar_w = max(60, min(260, w - cap_w - 16))
        x0 = cap_w
        y0 = 6
        bar_h = 14
        p.drawText(QRect(4, y0, cap_w - 6, bar_h), Qt.AlignmentFlag.AlignVCenter, caption)
        grad = QLinearGradient(x0, 0, x0 + bar_w, 0)
        if self.rgb:
            grad.setColorAt(0.0, QColor(0, 0, 0))
            grad.setColorAt(0.5, QColor(128, 128, 128))
            grad.setColorAt(1.0, QColor(255, 255, 255))
        else:
            for i in range(1, 256, 8):
                r, g, b = (int(c) for c in DIVERGING_LUT[i])
                grad.setColorAt((i - 1) / 254.0, QColor(r, g, b))
            r, g, b = (int(c) for c in DIVERGING_LUT[255])
            grad.setColorAt(1.0, QColor(r, g, b))
        p.fillRect(QRect(x0, y0, bar_w, bar_h), grad)
        p.setPen(self.palette().color(self.foregroundRole()))
        p.drawRect(QRect(x0, y0, bar_w, bar_h))
        for frac, text in ((0.0, "-L"), (0.5, "0"), (1.0, "+L")):
            x = int(x0 + frac * bar_w)
            p.drawLine(x, y0 + bar_h, x, y0 + bar_h + 4)
            tw = fm.horizontalAdvance(text)
            p.drawText(x - tw // 2, y0 + bar_h + 6 + fm.ascent(), text)
        p.end()


class BasisGallery(ThrottledRedraw, QWidget):
    """The mean image and the basis images as tiles; clicking a tile picks that mode.

    Parameters
    ----------
    state : AppState
        Shared state: reads the decomposition and rank, writes the focus mode and the pair of
        modes of the weights plane.
    parent : QWidget, optional
    icon_size : int
        Longest side of a tile picture in pixels.
    """

    def __init__(self, state: AppState, parent: QWidget | None = None, icon_size: int = 112):
        super().__init__(parent)
        if not isinstance(state, AppState):
            raise TypeError(f"state must be an AppState, got {type(state).__name__}")
        self.state = state
        self._syncing = False

        self.model = BasisModel(icon_size=icon_size, parent=self)
        self.view = QListView(self)
        self.view.setViewMode(QListView.ViewMode.IconMode)
        self.view.setMovement(QListView.Movement.Static)
        self.view.setResizeMode(QListView.ResizeMode.Adjust)
        self.view.setUniformItemSizes(True)
        self.view.setWordWrap(True)
        self.view.setSelectionMode(QListView.SelectionMode.SingleSelection)
        self.view.setIconSize(QSize(icon_size, icon_size))
        self._icon_size = icon_size
        self._fit_grid(["singular value 0000.00", "cumulative 100.0 %"])
        self.view.setModel(self.model)
        self.view.setToolTip("Click a tile to show that basis image in the other views; "
                             "double-click it to see it large.")

        self.legend = _Legend(self)
        self.header = QLabel("No analysis yet.", self)
        self.header.setWordWrap(True)
        f = QFont(self.header.font())
        f.setBold(True)
        self.header.setFont(f)

        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        lay.setSpacing(2)
        lay.addWidget(self.header)
        lay.addWidget(self.legend)
        lay.addWidget(self.view, 1)

        self._init_redraw_timer()

        # all connections in one place
        state.decompositionChanged.connect(self._schedule)
        state.rankChanged.connect(self._on_rank)
        state.focusModeChanged.connect(self._on_focus_mode)
        self.view.clicked.connect(self._on_clicked)
        self.view.doubleClicked.connect(self._on_double_clicked)
        self.view.selectionModel().currentChanged.connect(self._on_current_changed)

        if state.decomposition is not None:
            self._redraw()

    # ----- state -> view ---------------------------------------------------------------------
    @Slot()
    def _redraw(self) -> None:
        d = self.state.decomposition
        self._syncing = True
        try:
            self.model.set_rank(self.state.rank)
            self.model.set_decomposition(d)
            if d is None:
                self.header.setText("No analysis yet.")
            else:
                kind = "final" if d.exact else "snapshot during the run"
                self.header.setText(f"Mean image and {d.rank} basis images ({kind})")
                self.legend.set_rgb(d.image_shape[2] == 3)
                self._fit_grid(self.model.label(row)
                               for row in range(self.model.rowCount()))
            self._select_row(self.state.focus_mode + 1)
        finally:
            self._syncing = False

    def _fit_grid(self, labels) -> None:
        """Size the grid cells so the longest caption line shown fits unwrapped, four lines high."""
        fm = self.view.fontMetrics()
        lines = [line for label in labels for line in str(label).split("\n")]
        text_w = max((fm.horizontalAdvance(line) for line in lines), default=0)
        # the view lays the text out in the cell less its spacing and the item's own margins
        width = max(self._icon_size + 16, text_w + 2 * self.view.spacing() + 20)
        height = self._icon_size + 4 * fm.lineSpacing() + 2 * self.view.spacing() + 16
        self.view.setGridSize(QSize(width, height))

    @Slot(int)
    def _on_rank(self, rank: int) -> None:
        self.model.set_rank(rank)

    @Slot(int)
    def _on_focus_mode(self, mode: int) -> None:
        if self._syncing:
            return
        self._syncing = True
        try:
            self._select_row(mode + 1)
        finally:
            self._syncing = False

    def _select_row(self, row: int) -> None:
        if not 0 <= row < self.model.rowCount():
            return
        index = self.model.index(row)
        if self.view.currentIndex() != index:
            self.view.selectionModel().setCurrentIndex(
                index, QItemSelectionModel.SelectionFlag.ClearAndSelect)
        self.view.scrollTo(index)

    # ----- view -> state ---------------------------------------------------------------------
    @Slot(QModelIndex, QModelIndex)
    def _on_current_changed(self, current: QModelIndex, _previous: QModelIndex) -> None:
        if self._syncing or not current.isValid():
            return
        self.pick(current.row() - 1)

    @Slot(QModelIndex)
    def _on_clicked(self, index: QModelIndex) -> None:
        if self._syncing or not index.isValid():
            return
        self.pick(index.row() - 1)

    @Slot(QModelIndex)
    def _on_double_clicked(self, index: QModelIndex) -> None:
        d = self.state.decomposition
        if d is None or not index.isValid():
            return
        self.enlarge(index.row() - 1)

    def enlarge(self, mode: int):
        """Open a window showing basis image ``mode`` (-1: the mean) large; return it."""
        from modescope.app.desktop.dialogs.enlarged import EnlargedImage

        window = EnlargedImage(self.state.decomposition, mode, self)
        window.setAttribute(Qt.WidgetAttribute.WA_DeleteOnClose)
        window.show()
        return window

    def pick(self, mode: int) -> None:
        """Pick ``mode`` (0-based, -1 for the mean) for the other views.

        The focus mode becomes ``mode``; for a basis image the weights plane shows it on the
        horizontal axis and keeps the vertical one (or the next mode when they would be equal).
        """
        d = self.state.decomposition
        if d is None:
            return
        self._syncing = True
        try:
            self.state.set_focus_mode(mode)
            k = d.rank
            if mode >= 0 and k >= 2:
                a, b = self.state.modes
                if mode not in (a, b):
                    self.state.set_modes(mode, b)
        finally:
            self._syncing = False
