"""The outlier view's plot: every image's Q against its T², with both control limits.

:class:`OutlierPlot` draws one point per image at (T², Q), on log axes by default (values of 0
are drawn a decade below the smallest positive value), tinted by flag and review mark; the Q limit
(horizontal) and the T² limit (vertical) are dashed lines labelled with their values. A click on
a point emits :attr:`OutlierPlot.imageClicked`. The plot only draws what it is given: the scores
come from :func:`modescope.core.review.outliers.score_table`.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt, Signal
from PySide6.QtGui import QColor
from PySide6.QtWidgets import QWidget

from modescope.core.review import marks as review
from modescope.core.review.outliers import OutlierTable

from modescope.app.desktop.views.outliers_model import Q_METHODS, T2_METHODS, describe_limits
from modescope.app.desktop.views.plot_style import style_plot
from modescope.app.desktop.views.spectrum import log_ticks

__all__ = ["OutlierPlot"]

_SEL_COLOUR = QColor(220, 30, 60)
_LIMIT_COLOUR = QColor(200, 90, 20)

_TOOLTIP = ("Each point is one image: Q (how much of it the basis images do not explain) "
            "against T² (how unusual its weights are). Points beyond a dashed limit are flagged "
            "(red). Click a point to select the image.")


def _image_label(i: int) -> str:
    return f"image {i + 1}"


class OutlierPlot(pg.PlotWidget):
    """Q against T² with the limits drawn as labelled lines.

    Parameters
    ----------
    parent : QWidget, optional
    names : callable, optional
        ``names(i)`` is the display name of image ``i`` (0-based) in a point's tooltip; by
        default "image i+1".

    Signals
    -------
    imageClicked(int)
        The image (0-based) of the first point under a click.

    Attributes
    ----------
    plot_item : pyqtgraph.PlotItem
    scatter : pyqtgraph.ScatterPlotItem
        One point per image at (T², Q) (log10 of both when :attr:`log` is true).
    sel_mark, set_marks_item : pyqtgraph.ScatterPlotItem
        Rings around the selected image and around the images of the picked set.
    q_line, t2_line : pyqtgraph.InfiniteLine
        The Q limit (horizontal) and the T² limit (vertical).
    """

    imageClicked = Signal(int)

    #: Log-axis floor for values of 0, in decades below the smallest positive value.
    LOG_FLOOR_DECADES = 1.0

    def __init__(self, parent: QWidget | None = None,
                 names: Callable[[int], str] | None = None):
        super().__init__(parent, background="w")
        self._names = names if names is not None else _image_label
        self._table: OutlierTable | None = None
        self._marks = np.zeros(0, dtype=np.int8)
        self._log = True
        self._xy: tuple[np.ndarray, np.ndarray] | None = None   # drawn coordinates
        self._selected = -1
        self._chosen: tuple[int, ...] = ()
        self.plot_item = self.getPlotItem()
        self._build_axes()
        self._build_points()
        self._build_limit_lines()
        self._build_checked()
        self.setToolTip(_TOOLTIP)
        self._wire()

    # ----- construction ------------------------------------------------------------------------
    def _build_axes(self) -> None:
        style_plot(self.plot_item)
        self.plot_item.setLabel("bottom", "T² (Hotelling)")
        self.plot_item.setLabel("left", "Q (residual)")

    def _build_points(self) -> None:
        self._brushes = {
            "normal": pg.mkBrush(70, 110, 160, 170), "flag": pg.mkBrush(225, 75, 40, 230),
            "exclude": pg.mkBrush(150, 150, 150, 200), "keep": pg.mkBrush(40, 150, 80, 220)}
        self.scatter = pg.ScatterPlotItem(size=7, pen=None, symbol="o", hoverable=True,
                                          tip=self._point_tip)
        self.plot_item.addItem(self.scatter)
        self.set_marks_item = pg.ScatterPlotItem(size=11, brush=None, symbol="o",
                                                 pen=pg.mkPen(QColor(20, 20, 20), width=1.5))
        self.sel_mark = pg.ScatterPlotItem(size=16, brush=None, symbol="o",
                                           pen=pg.mkPen(_SEL_COLOUR, width=2.5))
        self.plot_item.addItem(self.set_marks_item)
        self.plot_item.addItem(self.sel_mark)

    def _build_limit_lines(self) -> None:
        limit_pen = pg.mkPen(_LIMIT_COLOUR, width=1.5, style=Qt.PenStyle.DashLine)
        label_opts = {"color": _LIMIT_COLOUR, "movable": False,
                      "fill": pg.mkBrush(255, 255, 255, 200)}
        self.q_line = pg.InfiniteLine(0, angle=0, pen=limit_pen, label="Q limit",
                                      labelOpts=dict(label_opts, position=0.03,
                                                     anchors=[(0, 0), (0, 0)]))
        self.t2_line = pg.InfiniteLine(0, angle=90, pen=limit_pen, label="T² limit",
                                       labelOpts=dict(label_opts, position=0.97,
                                                      rotateAxis=(1, 0),
                                                      anchors=[(1, 1), (1, 1)]))
        for line in (self.q_line, self.t2_line):
            line.setZValue(-5)
            self.plot_item.addItem(line)

    def _build_checked(self) -> None:
        """New images checked against the analysis (views/checked.py): diamonds, and their
        Phase II T² limit as a dotted line (the Q limit is the same for them)."""
        self._checked: OutlierTable | None = None
        self.checked_scatter = pg.ScatterPlotItem(size=10, symbol="d", pen=pg.mkPen(90, 20, 0),
                                                  brush=pg.mkBrush(240, 80, 20, 220),
                                                  hoverable=True, tip=self._checked_tip)
        self.plot_item.addItem(self.checked_scatter)
        self.t2_new_line = pg.InfiniteLine(
            0, angle=90, pen=pg.mkPen(_LIMIT_COLOUR, width=1.5, style=Qt.PenStyle.DotLine),
            label="T² limit, new images",
            labelOpts={"color": _LIMIT_COLOUR, "movable": False, "position": 0.3,
                       "rotateAxis": (1, 0), "anchors": [(1, 1), (1, 1)],
                       "fill": pg.mkBrush(255, 255, 255, 200)})
        self.t2_new_line.setZValue(-5)
        self.plot_item.addItem(self.t2_new_line)
        self.t2_new_line.hide()

    def show_checked(self, table: OutlierTable | None) -> None:
        """Draw the scores of new images checked against the analysis (Phase II limits,
        from :func:`modescope.core.review.check.check_images`); None removes them."""
        self._checked = table
        self._draw_checked()

    def _checked_tip(self, x, y, data) -> str:
        c = self._checked
        i = -1 if data is None else int(data)
        if c is None or not 0 <= i < c.n_images:
            return ""
        return (f"checked image {i + 1} (diamond: a new image, not in the analysis)\n"
                f"Q = {c.q[i]:.4g}, T² = {c.t2[i]:.4g}, score {c.score[i]:.3g}")

    def checked_values(self) -> tuple[np.ndarray, np.ndarray]:
        """Return (T², Q) of the checked images drawn, in data units (not log)."""
        x, y = (np.asarray(v, dtype=np.float64) for v in self.checked_scatter.getData())
        return (10.0 ** x, 10.0 ** y) if self._log else (x, y)

    def _draw_checked(self) -> None:
        t, c = self._table, self._checked
        if t is None or c is None or c.n_images == 0:
            self.checked_scatter.setData(x=[], y=[])
            self.t2_new_line.hide()
            return
        t2, q = np.asarray(c.t2, dtype=np.float64), np.asarray(c.q, dtype=np.float64)
        if self._log:   # the reference points' floors, so both sets share the axes
            lim = t.limits
            t2 = self._log10(t2, self._floor(np.asarray(t.t2, np.float64), lim.t2_limit))
            q = self._log10(q, self._floor(np.asarray(t.q, np.float64), lim.q_limit))
        self.checked_scatter.setData(x=t2, y=q, data=np.arange(c.n_images))
        self._draw_limit(self.t2_new_line, c.limits.t2_limit, c.limits.t2_informative,
                         "T² limit, new images", "F, Phase II", c.limits.level)

    def _wire(self) -> None:
        self.scatter.sigClicked.connect(self._on_points_clicked)
        self.plot_item.getViewBox().sigRangeChanged.connect(self._update_ticks)

    # ----- contents ----------------------------------------------------------------------------
    def set_log(self, log: bool) -> None:
        """Draw on logarithmic (True) or linear (False) axes."""
        self._log = bool(log)
        self._draw()

    def show_scores(self, table: OutlierTable | None, marks: np.ndarray) -> None:
        """Draw ``table`` (None: an empty plot) with the review ``marks`` (one per image)."""
        self._table = table
        self._marks = np.asarray(marks, dtype=np.int8)
        self._draw()

    def set_marks(self, marks: np.ndarray) -> None:
        """Tint the points by the review ``marks`` (one per image) without moving them."""
        self._marks = np.asarray(marks, dtype=np.int8)
        if self._table is not None and self._xy is not None:
            self.scatter.setBrush(self._point_brushes())

    def show_selection(self, selected: int, chosen: Iterable[int]) -> None:
        """Ring the ``selected`` image (-1 for none) and every image of ``chosen``."""
        self._selected = int(selected)
        self._chosen = tuple(int(i) for i in chosen)
        self._draw_selection()

    def plot_values(self) -> tuple[np.ndarray, np.ndarray]:
        """Return (T², Q) of the plotted points, in image order, in data units (not log)."""
        x, y = self.scatter.getData()
        x = np.asarray(x, dtype=np.float64)
        y = np.asarray(y, dtype=np.float64)
        if self._log:
            return 10.0 ** x, 10.0 ** y
        return x, y

    def limit_positions(self) -> tuple[float, float]:
        """Return (T² limit, Q limit) where the lines are drawn, in data units (not log)."""
        x, y = float(self.t2_line.value()), float(self.q_line.value())
        if self._log:
            return 10.0 ** x, 10.0 ** y
        return x, y

    # ----- drawing -----------------------------------------------------------------------------
    def _draw(self) -> None:
        t = self._table
        if t is None:
            self._xy = None
            self.scatter.setData(x=[], y=[])
            self.q_line.hide()
            self.t2_line.hide()
            self.setToolTip(_TOOLTIP)
            self._draw_selection()
            self._draw_checked()
            return
        q = np.asarray(t.q, dtype=np.float64)
        t2 = np.asarray(t.t2, dtype=np.float64)
        lim = t.limits
        if self._log:
            floors = (self._floor(t2, lim.t2_limit), self._floor(q, lim.q_limit))
            x, y = self._log10(t2, floors[0]), self._log10(q, floors[1])
        else:
            x, y = t2, q
        self._xy = (x, y)
        self.scatter.setData(x=x, y=y, brush=self._point_brushes(), data=np.arange(t.n_images))
        self._draw_limit(self.q_line, lim.q_limit, lim.q_informative, "Q limit",
                         Q_METHODS.get(lim.q_method, lim.q_method), lim.level, lim.q_reason)
        # the limits and why each was computed as it was (the Q method's reason included)
        self.setToolTip(f"{_TOOLTIP}\n\n{describe_limits(lim)[1]}")
        self._draw_limit(self.t2_line, lim.t2_limit, lim.t2_informative, "T² limit",
                         T2_METHODS.get(lim.t2_method, lim.t2_method), lim.level)
        self._draw_selection()
        self._draw_checked()
        self.plot_item.enableAutoRange()
        self._update_ticks()

    def _draw_limit(self, line: pg.InfiniteLine, value: float, informative: bool, name: str,
                    method: str, level: float, reason: str = "") -> None:
        if not (informative and np.isfinite(value) and value > 0):
            line.hide()
            return
        line.setValue(float(np.log10(value)) if self._log else float(value))
        line.show()     # before setFormat: a hidden label does not take new text
        line.label.setFormat(f"{name} {value:.4g}")
        line.label.setToolTip(f"{name} {value:.5g} ({method}, {100 * level:g} % level)"
                              + (f": {reason}" if reason else ""))

    def _draw_selection(self) -> None:
        t = self._table
        if t is None or self._xy is None:
            self.sel_mark.setData(x=[], y=[])
            self.set_marks_item.setData(x=[], y=[])
            return
        x, y = self._xy
        cur = self._selected
        if 0 <= cur < t.n_images:
            self.sel_mark.setData(x=[float(x[cur])], y=[float(y[cur])])
        else:
            self.sel_mark.setData(x=[], y=[])
        chosen = np.array([i for i in self._chosen if 0 <= i < t.n_images], dtype=np.intp)
        if chosen.size:
            self.set_marks_item.setData(x=x[chosen], y=y[chosen])
        else:
            self.set_marks_item.setData(x=[], y=[])

    def _update_ticks(self, *_) -> None:
        """Label powers of ten (and 2, 5 times them) on log axes; automatic ticks otherwise."""
        (x0, x1), (y0, y1) = self.plot_item.getViewBox().viewRange()
        self.plot_item.getAxis("bottom").setTicks(log_ticks(x0, x1) if self._log else None)
        self.plot_item.getAxis("left").setTicks(log_ticks(y0, y1) if self._log else None)

    def _point_brushes(self) -> np.ndarray:
        t = self._table
        brushes = np.empty(t.n_images, dtype=object)
        brushes[:] = self._brushes["normal"]
        brushes[np.asarray(t.flag, dtype=bool)] = self._brushes["flag"]
        if self._marks.shape == (t.n_images,):
            brushes[self._marks == review.KEEP] = self._brushes["keep"]
            brushes[self._marks == review.EXCLUDE] = self._brushes["exclude"]
        return brushes

    @classmethod
    def _floor(cls, values: np.ndarray, limit: float) -> float:
        positive = values[values > 0]
        smallest = float(positive.min()) if positive.size else (limit if limit > 0 else 1.0)
        if limit > 0 and np.isfinite(limit):
            smallest = min(smallest, float(limit))
        return smallest / 10.0 ** cls.LOG_FLOOR_DECADES

    @staticmethod
    def _log10(values: np.ndarray, floor: float) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.log10(np.maximum(values, floor))

    def _point_tip(self, x, y, data) -> str:
        t = self._table
        if t is None or data is None:
            return ""
        i = int(data)
        if not 0 <= i < t.n_images:
            return ""
        return (f"image {i + 1}: {self._names(i)}\nQ = {t.q[i]:.4g}, T² = {t.t2[i]:.4g}, "
                f"score {t.score[i]:.3g}")

    def _on_points_clicked(self, _item, points, _ev=None) -> None:
        """Emit the image of the first clicked point."""
        if len(points) == 0 or self._table is None:
            return
        self.imageClicked.emit(int(points[0].data()))
