"""Weights: every image as a point in the plane of two modes, plus two linked plots.

* The weights plane: image i is the point (weights[a, i], weights[b, i]) for the pair of modes
  chosen in two combo boxes (written to ``state.set_modes``). Points are coloured by the residual
  at the current rank (when the decomposition has residuals) or else by image number; a colour
  bar says which. Click a point to select that image; Shift + drag a box to select every image
  inside it (plain drag pans, the wheel zooms).
* A bar chart of the selected image's weights over the modes 1..k (the two plane modes
  highlighted).
* Weights against image number for the two chosen modes, with the selected image as a vertical
  line: click anywhere or drag the line to select the nearest image (useful when the images form
  a sequence, such as frames from a fixed camera).

Images are numbered from 1 for display; ``state.selected`` stays 0-based.
"""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import QRectF, QSignalBlocker, Qt, Signal, Slot
from PySide6.QtGui import QColor
from PySide6.QtWidgets import (QComboBox, QGraphicsRectItem, QHBoxLayout, QLabel, QSplitter,
                               QVBoxLayout, QWidget)

from modescope.core.decomposition import Decomposition

from modescope.app.desktop.imaging import NO_VARIATION
from modescope.app.words import counted
from modescope.app.desktop.display import display_name, display_path
from modescope.app.desktop.redraw import ThrottledRedraw
from modescope.app.desktop.views.drag_line import SnapDrag
from modescope.app.desktop.state import AppState
from modescope.app.desktop.views.frequency_parts import TimeAxis
from modescope.app.desktop.views.plot_style import style_plot

__all__ = ["WeightsView", "POINT_COLOURS"]

#: Number of colours the points of the weights plane take (evenly spaced along the colour bar).
POINT_COLOURS = 64
_A_COLOUR = QColor(40, 120, 190)
_B_COLOUR = QColor(220, 120, 30)
_SEL_COLOUR = QColor(220, 30, 60)
_ZERO_PEN = pg.mkPen(QColor(150, 150, 150), width=1)


class _BoxSelectViewBox(pg.ViewBox):
    """A ViewBox where Shift + left drag draws a box and reports it in data coordinates."""

    sigBoxSelected = Signal(object)  # QRectF in data coordinates

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self._band = QGraphicsRectItem(0, 0, 1, 1)
        self._band.setPen(pg.mkPen(QColor(30, 30, 30), width=1, style=Qt.PenStyle.DashLine))
        self._band.setBrush(pg.mkBrush(60, 120, 220, 40))
        self._band.setZValue(1e9)
        self._band.hide()
        self.addItem(self._band, ignoreBounds=True)

    def mouseDragEvent(self, ev, axis=None):  # noqa: N802 - Qt name
        if (ev.button() == Qt.MouseButton.LeftButton
                and ev.modifiers() & Qt.KeyboardModifier.ShiftModifier):
            ev.accept()
            p0 = self.mapToView(ev.buttonDownPos())
            p1 = self.mapToView(ev.pos())
            rect = QRectF(p0, p1).normalized()
            if ev.isFinish():
                self._band.hide()
                self.sigBoxSelected.emit(rect)
            else:
                self._band.setRect(rect)
                self._band.show()
            return
        super().mouseDragEvent(ev, axis)


class WeightsView(ThrottledRedraw, QWidget):
    """The weights plane, the selected image's weights, and weights against image number.

    Parameters
    ----------
    state : AppState
        Reads the decomposition, rank, modes and selection; writes modes and selection.
    parent : QWidget, optional

    Attributes
    ----------
    scatter : pyqtgraph.ScatterPlotItem
        One point per image at (weights[a], weights[b]).
    bars : pyqtgraph.BarGraphItem
        Weights of the selected image over the modes 1..k.
    seq_a, seq_b : pyqtgraph.PlotDataItem
        weights[a] and weights[b] against image number 1..n.
    seq_line : pyqtgraph.InfiniteLine
        The selected image in the sequence plot.
    """

    DRAG_MS = 60

    def __init__(self, state: AppState, parent: QWidget | None = None):
        super().__init__(parent)
        if not isinstance(state, AppState):
            raise TypeError(f"state must be an AppState, got {type(state).__name__}")
        self.state = state
        self._syncing = False

        self._build_brushes()
        top = self._build_controls()
        self._build_plane()
        self._build_bars()
        self._build_sequence()
        self._build_layout(top)
        self._init_redraw_timer()
        self.seq_drag = SnapDrag((self.seq_line,), self._seq_bounds, self._select_number,
                                 self.DRAG_MS, self)
        self._wire()

        if state.decomposition is not None:
            self._redraw()

    # ----- construction ------------------------------------------------------------------------
    def _build_brushes(self) -> None:
        """Point colours (a viridis table) and the bar colours (plain, mode a, mode b)."""
        cmap = pg.colormap.get("viridis")
        self._cmap = cmap
        lut = cmap.getLookupTable(0.0, 1.0, POINT_COLOURS, alpha=False, mode="byte")
        self._brushes = np.empty(POINT_COLOURS, dtype=object)
        for i, (r, g, b) in enumerate(lut):
            self._brushes[i] = pg.mkBrush(int(r), int(g), int(b), 230)
        self._bar_brushes = (pg.mkBrush(140, 140, 140), pg.mkBrush(_A_COLOUR),
                             pg.mkBrush(_B_COLOUR))

    def _build_controls(self) -> QHBoxLayout:
        """The two mode choices of the weights plane and the summary line."""
        self.combo_a = QComboBox(self)
        self.combo_b = QComboBox(self)
        self.combo_a.setToolTip("Basis image on the horizontal axis of the weights plane.")
        self.combo_b.setToolTip("Basis image on the vertical axis of the weights plane.")
        for c in (self.combo_a, self.combo_b):
            c.setSizeAdjustPolicy(QComboBox.SizeAdjustPolicy.AdjustToContents)
        self.info = QLabel("", self)
        top = QHBoxLayout()
        top.addWidget(QLabel("Horizontal:", self))
        top.addWidget(self.combo_a)
        top.addSpacing(8)
        top.addWidget(QLabel("Vertical:", self))
        top.addWidget(self.combo_b)
        top.addSpacing(12)
        top.addWidget(self.info, 1)
        return top

    def _build_plane(self) -> None:
        """The weights plane: points, selection rings, zero lines and the colour bar."""
        self.plane_widget = pg.GraphicsLayoutWidget(self)
        self.plane_widget.setBackground("w")
        self.plane_vb = _BoxSelectViewBox()
        self.plane = self.plane_widget.addPlot(row=0, col=0, viewBox=self.plane_vb)
        style_plot(self.plane)
        self.plane.setTitle("Weights plane", color="#222", size="10pt")
        # hovering a point names its image (pyqtgraph shows ``tip`` as the tooltip)
        self.scatter = pg.ScatterPlotItem(size=7, pen=None, symbol="o", hoverable=True,
                                          tip=self.point_tip)
        self.plane.addItem(self.scatter)
        self.set_marks = pg.ScatterPlotItem(size=11, pen=pg.mkPen(QColor(20, 20, 20), width=1.5),
                                            brush=None, symbol="o")
        self.sel_mark = pg.ScatterPlotItem(size=16, pen=pg.mkPen(_SEL_COLOUR, width=2.5),
                                           brush=None, symbol="o")
        self.plane.addItem(self.set_marks)
        self.plane.addItem(self.sel_mark)
        # new images checked against the analysis (views/checked.py): diamonds over the cloud
        self._checked_weights = None
        self.checked_points = pg.ScatterPlotItem(size=10, symbol="d", pen=pg.mkPen(90, 20, 0),
                                                 brush=pg.mkBrush(240, 80, 20, 220))
        self.plane.addItem(self.checked_points)
        self.plane.addItem(pg.InfiniteLine(0, angle=90, pen=_ZERO_PEN), ignoreBounds=True)
        self.plane.addItem(pg.InfiniteLine(0, angle=0, pen=_ZERO_PEN), ignoreBounds=True)
        self.colour_bar = pg.ColorBarItem(values=(0, 1), colorMap=self._cmap,
                                          label="image number", interactive=False, width=14)
        self.plane_widget.addItem(self.colour_bar, row=0, col=1)
        for ax in ("left", "right"):
            self.colour_bar.getAxis(ax).setTextPen(pg.mkColor(40, 40, 40))
        self._plane_tip = ("Each point is one image. Click a point to select it; Shift + drag "
                           "a box to select every image inside it. Drag to pan, wheel to zoom.")
        self.plane_widget.setToolTip(self._plane_tip)

    def _build_bars(self) -> None:
        """The selected image's weights on each basis image."""
        self.bars_widget = pg.PlotWidget(self, background="w")
        self.bars_plot = self.bars_widget.getPlotItem()
        style_plot(self.bars_plot)
        # no axis title under the bars: the plot title says what the x axis counts, which
        # leaves the short chart room for the zero tick and its neighbours
        self.bars_plot.setLabel("left", "weight")
        self.bars = pg.BarGraphItem(x=np.zeros(0), height=np.zeros(0), width=0.75,
                                    brush=QColor(120, 120, 120), pen=None)
        self.bars_plot.addItem(self.bars)
        self.bars_plot.addItem(pg.InfiniteLine(0, angle=0, pen=_ZERO_PEN), ignoreBounds=True)
        self.bars_widget.setToolTip("Weights of the selected image on each basis image (the two "
                                    "modes of the weights plane in colour).")

    def _build_sequence(self) -> None:
        """Weights of the two plane modes against image number, with the selection line."""
        self.seq_widget = pg.PlotWidget(self, background="w")
        self.seq_plot = self.seq_widget.getPlotItem()
        self.seq_time_axis = TimeAxis("bottom")    # seconds when the frame rate is known
        self.seq_plot.setAxisItems({"bottom": self.seq_time_axis})
        style_plot(self.seq_plot)
        # the title says what the x axis counts (no axis title: the short plot keeps room for
        # its tick labels)
        self.seq_plot.setLabel("left", "weight")
        self.seq_a = self.seq_plot.plot([], [], pen=pg.mkPen(_A_COLOUR, width=1.5))
        self.seq_b = self.seq_plot.plot([], [], pen=pg.mkPen(_B_COLOUR, width=1.5))
        self.seq_line = pg.InfiniteLine(1, angle=90, movable=True,
                                        pen=pg.mkPen(_SEL_COLOUR, width=2),
                                        hoverPen=pg.mkPen(_SEL_COLOUR, width=4))
        self.seq_line.setZValue(20)
        self.seq_plot.addItem(self.seq_line)
        self.seq_widget.setToolTip("Weights of the two chosen basis images against image number. "
                                   "Click or drag the red line to select the nearest image.")

    def _build_layout(self, top: QHBoxLayout) -> None:
        """The plane left; the bars above the sequence plot right."""
        right = QSplitter(Qt.Orientation.Vertical, self)
        right.addWidget(self.bars_widget)
        right.addWidget(self.seq_widget)
        self.splitter = QSplitter(Qt.Orientation.Horizontal, self)
        self.splitter.addWidget(self.plane_widget)
        self.splitter.addWidget(right)
        self.splitter.setStretchFactor(0, 3)
        self.splitter.setStretchFactor(1, 2)

        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        lay.addLayout(top)
        lay.addWidget(self.splitter, 1)

    def _wire(self) -> None:
        """Every connection of the view, in one place."""
        state = self.state
        state.decompositionChanged.connect(self._schedule)
        state.rankChanged.connect(self._schedule)
        state.modesChanged.connect(self._on_modes)
        state.selectedChanged.connect(self._on_selected)
        state.selectionSetChanged.connect(self._on_selection_set)
        self.combo_a.currentIndexChanged.connect(self._on_combo)
        self.combo_b.currentIndexChanged.connect(self._on_combo)
        self.scatter.sigClicked.connect(self._on_points_clicked)
        self.plane_vb.sigBoxSelected.connect(self._on_box_selected)
        self.seq_widget.scene().sigMouseClicked.connect(self._on_seq_scene_click)

    # ----- helpers ------------------------------------------------------------------------
    def _modes(self, d: Decomposition) -> tuple[int, int]:
        a, b = self.state.modes
        k = d.rank
        return min(max(a, 0), k - 1), min(max(b, 0), k - 1)

    def _colour(self, d: Decomposition) -> tuple[np.ndarray, str]:
        if d.residual is not None:
            r = min(max(self.state.rank, 0), d.rank)
            return d.residual_at_rank(r), f"residual at rank {r}"
        return np.arange(1, d.n_images + 1, dtype=np.float64), "image number"

    def point_tip(self, x: float, y: float, data) -> str:
        """Return the tooltip of the point of image ``data`` (0-based) at weights (x, y)."""
        d = self.state.decomposition
        if d is None or data is None or not 0 <= int(data) < d.n_images:
            return ""
        i = int(data)
        name = display_name(d.paths[i]) if d.paths else ""
        a, b = (m + 1 for m in self._modes(d))
        return (f"Image {i + 1:,}" + (f": {name}" if name else "")
                + f"\nweight on basis image {a}: {x:.4g}\nweight on basis image {b}: {y:.4g}")

    # ----- state -> view ---------------------------------------------------------------------
    @Slot()
    def show_checked(self, weights) -> None:
        """Draw new images checked against the analysis as diamonds in the weights plane.

        ``weights`` has shape (K, m): their coordinates along every basis image (from
        :class:`~modescope.core.review.check.CheckResult`); None removes them.
        """
        self._checked_weights = None if weights is None else np.asarray(weights, np.float64)
        self.plane.setTitle("Weights plane" + ("" if weights is None else
                                               " · ◆ new images checked"), color="#222",
                            size="10pt")
        d = self.state.decomposition
        self._draw_checked(*(self._modes(d) if d is not None and d.rank else (-1, -1)))

    def _draw_checked(self, a: int, b: int) -> None:
        w = self._checked_weights
        if w is None or w.ndim != 2 or min(a, b) < 0 or max(a, b) >= w.shape[0]:
            self.checked_points.setData(x=[], y=[])
            return
        self.checked_points.setData(x=w[a], y=w[b])

    def _redraw(self) -> None:
        self._timed_redraw(self._draw)

    def _draw(self) -> None:
        d = self.state.decomposition
        if d is None or d.rank == 0 or d.n_images == 0:
            self.scatter.setData(x=[], y=[])
            self.checked_points.setData(x=[], y=[])
            self.seq_a.setData([], [])
            self.seq_b.setData([], [])
            self.info.setText("No analysis yet." if d is None or not d.n_images else NO_VARIATION)
            for combo in (self.combo_a, self.combo_b):
                with QSignalBlocker(combo):
                    combo.clear()
            self._update_selected()
            self._update_set_marks()
            return
        self._sync_combos(d)
        a, b = self._modes(d)
        x = np.asarray(d.weights[a], dtype=np.float64)
        y = np.asarray(d.weights[b], dtype=np.float64)
        values, meaning = self._colour(d)
        lo, hi = float(np.min(values)), float(np.max(values))
        if not hi > lo:
            hi = lo + 1.0
        idx = np.clip(np.rint((values - lo) / (hi - lo) * (POINT_COLOURS - 1)), 0,
                      POINT_COLOURS - 1).astype(np.intp)
        self.scatter.setData(x=x, y=y, brush=self._brushes[idx], data=np.arange(d.n_images))
        self._draw_checked(a, b)
        self.colour_bar.setLevels((lo, hi))
        self.colour_bar.getAxis("left").setLabel(meaning)
        if d.residual is not None:
            why = (f"Colour: residual at rank {min(max(self.state.rank, 0), d.rank)}, the squared "
                   f"norm of the part of each centred image the first r basis images do not "
                   f"explain (bright = poorly explained).")
        else:
            why = ("Colour: image number (residuals are known once the run has finished its "
                   "scoring pass).")
        self.colour_bar.setToolTip(why)
        self.plane_widget.setToolTip(self._plane_tip + "\n" + why)
        self.plane.setLabel("bottom", f"weight on basis image {a + 1}")
        self.plane.setLabel("left", f"weight on basis image {b + 1}")
        self.seq_time_axis.set_frame_rate(d)
        along = "time (s)" if self.seq_time_axis.frame_rate else "image number"
        n_idx = np.arange(1, d.n_images + 1, dtype=np.float64)
        self.seq_a.setData(n_idx, x)
        self.seq_b.setData(n_idx, y)
        self.seq_plot.setTitle(
            f"Weights on <span style='color:{_A_COLOUR.name()}'>&#9644; {a + 1}</span>&nbsp;"
            f"and <span style='color:{_B_COLOUR.name()}'>&#9644; {b + 1}</span> against "
            f"{along}", color="#222", size="9pt")
        self.bars_plot.setXRange(0.4, d.rank + 0.6, padding=0)
        self.seq_line.setBounds((1, d.n_images))
        kind = "final" if d.exact else "snapshot during the run"
        self.info.setText(f"{counted(d.n_images, 'image')}, {kind}")
        self._update_selected()
        self._update_set_marks()

    def _sync_combos(self, d: Decomposition) -> None:
        shares = d.energy_shares()
        texts = [f"{j + 1}  ({100 * shares[j]:.3g} %)" for j in range(d.rank)]
        a, b = self._modes(d)
        self._syncing = True
        try:
            for combo, want in ((self.combo_a, a), (self.combo_b, b)):
                with QSignalBlocker(combo):
                    if combo.count() != d.rank:
                        combo.clear()
                        combo.addItems(texts)
                    else:
                        for j, t in enumerate(texts):
                            if combo.itemText(j) != t:
                                combo.setItemText(j, t)
                    combo.setCurrentIndex(want)
        finally:
            self._syncing = False

    @Slot(int, int)
    def _on_modes(self, a: int, b: int) -> None:
        self._schedule()

    @Slot(int)
    def _on_selected(self, index: int) -> None:
        if self._syncing:
            return
        self._update_selected()

    @Slot(object)
    def _on_selection_set(self, indices) -> None:
        self._update_set_marks()

    def _update_selected(self) -> None:
        """Move the highlight, the bar chart and the sequence line to the selected image."""
        d = self.state.decomposition
        i = self.state.selected
        if d is None or d.rank == 0 or not 0 <= i < d.n_images:
            self.sel_mark.setData(x=[], y=[])
            self.bars.setOpts(x=np.zeros(0), height=np.zeros(0))
            self.bars_plot.setTitle("Weights on each basis image: no image selected", color="#222",
                                    size="9pt")
            return
        a, b = self._modes(d)
        self.sel_mark.setData(x=[float(d.weights[a, i])], y=[float(d.weights[b, i])])
        k = d.rank
        brushes = [self._bar_brushes[0]] * k
        brushes[a] = self._bar_brushes[1]
        if b != a:
            brushes[b] = self._bar_brushes[2]
        heights = np.asarray(d.weights[:, i], dtype=np.float64)
        self.bars.setOpts(x=np.arange(1, k + 1, dtype=np.float64), height=heights,
                          brushes=brushes)
        # the range always holds 0 with a margin on both sides, so the zero tick and its label
        # stay visible when every weight has the same sign
        lo, hi = min(0.0, float(heights.min())), max(0.0, float(heights.max()))
        margin = 0.20 * ((hi - lo) or 1.0)
        self.bars_plot.setYRange(lo - margin, hi + margin, padding=0)
        self.bars_plot.setTitle(f"Weights of image {i + 1} on each basis image", color="#222",
                                size="9pt")
        name = display_path(d.paths[i]) if d.paths else ""
        self.bars_widget.setToolTip(f"Weights of image {i + 1} {name} on each basis image (the "
                                    f"two modes of the weights plane in colour).")
        self.seq_drag.set_value(i + 1)

    def _update_set_marks(self) -> None:
        d = self.state.decomposition
        chosen = [i for i in self.state.selection_set if d is not None and i < d.n_images]
        if d is None or d.rank == 0 or not chosen:
            self.set_marks.setData(x=[], y=[])
            return
        a, b = self._modes(d)
        idx = np.asarray(chosen)
        self.set_marks.setData(x=d.weights[a, idx].astype(np.float64),
                               y=d.weights[b, idx].astype(np.float64))

    # ----- view -> state ---------------------------------------------------------------------
    @Slot(int)
    def _on_combo(self, *_):
        if self._syncing:
            return
        a, b = self.combo_a.currentIndex(), self.combo_b.currentIndex()
        if a >= 0 and b >= 0:
            self.state.set_modes(a, b)

    def _on_points_clicked(self, item, points, ev=None) -> None:
        """Select the image of the first clicked point."""
        if len(points) == 0:
            return
        self.state.set_selected(int(points[0].index()))

    def select_box(self, rect: QRectF) -> tuple[int, ...]:
        """Select every image whose point lies in ``rect`` (data coordinates, edges included).

        Returns
        -------
        tuple of int
            The selected image indices (0-based), also written to ``state.selection_set``.
        """
        d = self.state.decomposition
        if d is None or d.rank == 0:
            return ()
        a, b = self._modes(d)
        x, y = d.weights[a], d.weights[b]
        inside = ((x >= rect.left()) & (x <= rect.right())
                  & (y >= rect.top()) & (y <= rect.bottom()))
        chosen = tuple(int(i) for i in np.flatnonzero(inside))
        self.state.set_selection_set(chosen)
        return chosen

    @Slot(object)
    def _on_box_selected(self, rect: QRectF) -> None:
        self.select_box(rect)

    def select_nearest(self, number: float) -> None:
        """Select the image whose number (1-based, as on the sequence axis) is nearest."""
        d = self.state.decomposition
        if d is None or d.n_images == 0:
            return
        i = int(min(max(round(number), 1), d.n_images)) - 1
        self.state.set_selected(i)

    @Slot(object)
    def _on_seq_scene_click(self, ev) -> None:
        if ev.button() != Qt.MouseButton.LeftButton:
            return
        vb = self.seq_plot.getViewBox()
        pos = ev.scenePos()
        if not vb.sceneBoundingRect().contains(pos):
            return
        self.select_nearest(vb.mapSceneToView(pos).x())

    def _seq_bounds(self) -> tuple[int, int] | None:
        """The image numbers a drag of the sequence line may reach (None with no images)."""
        d = self.state.decomposition
        if d is None or d.n_images == 0:
            return None
        return 1, d.n_images

    def _select_number(self, number: int) -> None:
        """Select image ``number`` (1-based) reached by a drag of the sequence line."""
        self.state.set_selected(number - 1)
