"""Frequencies: the weights of each mode read as a time series (the images are frames in order).

* A table of the leading modes (1..rank r): singular value, dominant frequency, share of the
  power there, and the other mode of its pair. Select rows to plot those modes; selecting the
  two modes of a pair shows that pair in the weights plane (``state.set_modes``), where a
  travelling pattern draws a ring. The state's pair of modes is selected when it changes.
* The spectra of the selected modes' weights against frequency (Hz when the frame rate is
  known, else cycles per frame), log power, the dominant frequency of each marked.
* The selected modes' weights against time (seconds when the frame rate is known, else image
  number 1..n).
* A table of the linear model's eigenvalues (exact DMD of the weights of modes 1..r):
  frequency, growth rate and amplitude, with the reasons to distrust the model below it.

Every number comes from :mod:`modescope.core.review.frequencies` and
:mod:`modescope.core.review.dynamics` (through
:func:`~modescope.app.desktop.views.frequency_parts.sequence_report`). The computation runs
in the GUI thread: a periodogram and a small SVD of a k x frames array take milliseconds for
thousands of frames, and only while the view is shown (a hidden view redraws when shown).
"""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import QItemSelectionModel, QSignalBlocker, Qt, Slot
from PySide6.QtGui import QColor
from PySide6.QtWidgets import (QAbstractItemView, QHeaderView, QLabel, QSplitter,
                               QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget)

from modescope.core.review.dynamics import caution

from modescope.app.words import unexplained

from modescope.app.desktop.redraw import ThrottledRedraw
from modescope.app.desktop.state import AppState
from modescope.app.desktop.views.frequency_parts import SequenceResult, sequence_report
from modescope.app.desktop.views.plot_style import style_plot

__all__ = ["FrequenciesView", "MODE_COLOURS"]

#: Colours of the selected modes' curves, in selection order (repeated beyond six).
MODE_COLOURS = (QColor(40, 120, 190), QColor(220, 120, 30), QColor(20, 140, 90),
                QColor(170, 60, 150), QColor(200, 50, 50), QColor(90, 90, 90))
_MODE_HEAD = ("mode", "singular value", "frequency", "power share", "pair")
_DYN_HEAD = ("frequency", "growth rate", "amplitude")


def _table(columns, tip: str, parent: QWidget) -> QTableWidget:
    table = QTableWidget(0, len(columns), parent)
    table.setHorizontalHeaderLabels(list(columns))
    table.verticalHeader().hide()
    table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
    table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
    table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
    table.verticalHeader().setDefaultSectionSize(table.fontMetrics().height() + 6)
    table.setToolTip(tip)
    return table


def _cell(text: str, tip: str = "") -> QTableWidgetItem:
    item = QTableWidgetItem(text)
    item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
    if tip:
        item.setToolTip(tip)
    return item


class FrequenciesView(ThrottledRedraw, QWidget):
    """Spectra, time series, pairs and growth rates of the leading modes' weights.

    Parameters
    ----------
    state : AppState
        Reads the decomposition, rank and pair of modes; writes the pair of modes.
    parent : QWidget, optional

    Attributes
    ----------
    modes_table : QTableWidget
        One row per mode 1..r; selected rows are plotted.
    dynamics_table : QTableWidget
        One row per eigenvalue of the linear model (conjugates once, the offset left out).
    spectrum_curves, series_curves : list of pyqtgraph.PlotDataItem
        One curve per selected mode, in selection order.
    summary, caution : QLabel
    """

    def __init__(self, state: AppState, parent: QWidget | None = None):
        super().__init__(parent)
        if not isinstance(state, AppState):
            raise TypeError(f"state must be an AppState, got {type(state).__name__}")
        self.state = state
        self._syncing = False
        self._stale = False
        self._result = SequenceResult(None, None, "No analysis yet.")
        self.spectrum_curves: list = []
        self.series_curves: list = []
        self._build()
        self._wire()
        self._init_redraw_timer()
        self._redraw()

    # ----- building ----------------------------------------------------------------------
    def _build(self) -> None:
        self.summary = QLabel("No analysis yet.", self)
        self.summary.setWordWrap(True)
        self.modes_table = _table(
            _MODE_HEAD, "Modes 1..r: the dominant frequency of each mode's weights, the share "
            "of its power there and the other mode of its pair. Select rows to plot them; "
            "select the two modes of a pair to show it in the Weights plane.", self)
        self.modes_table.setSelectionMode(QAbstractItemView.SelectionMode.ExtendedSelection)
        self.dynamics_table = _table(
            _DYN_HEAD, "A linear one-step model of the weights (exact dynamic mode "
            "decomposition): each eigenvalue's frequency, growth rate (negative: decays) and "
            "amplitude.", self)
        self.dynamics_table.setSelectionMode(QAbstractItemView.SelectionMode.NoSelection)
        self.caution = QLabel("", self)
        self.caution.setWordWrap(True)
        self.caution.setToolTip("When to distrust the linear model's rates.")
        self.plots = pg.GraphicsLayoutWidget(self)
        self.plots.setBackground("w")
        self.spectrum_plot = self.plots.addPlot(row=0, col=0)
        self.series_plot = self.plots.addPlot(row=1, col=0)
        for plot in (self.spectrum_plot, self.series_plot):
            style_plot(plot)
        self.spectrum_plot.setLogMode(x=False, y=True)
        self.spectrum_plot.setLabel("left", "power (log)", **{"font-size": "8pt"})
        self.series_plot.setLabel("left", "weight", **{"font-size": "8pt"})
        self.spectrum_plot.addLegend(offset=(-10, 10), labelTextSize="8pt")
        self.peak_marks = self.spectrum_plot.plot([], [], pen=None, symbol="t", symbolSize=9,
                                                  symbolPen=None)

        side = QWidget(self)
        side_lay = QVBoxLayout(side)
        side_lay.setContentsMargins(0, 0, 0, 0)
        side_lay.addWidget(self.modes_table, 3)
        side_lay.addWidget(QLabel("Linear model of the weights (exact DMD):", side))
        side_lay.addWidget(self.dynamics_table, 2)
        side_lay.addWidget(self.caution)
        split = QSplitter(Qt.Orientation.Horizontal, self)
        split.addWidget(self.plots)
        split.addWidget(side)
        split.setStretchFactor(0, 3)
        split.setStretchFactor(1, 2)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        lay.addWidget(self.summary)
        lay.addWidget(split, 1)

    def _wire(self) -> None:
        """Every connection of the view, in one place."""
        self.state.decompositionChanged.connect(self._schedule)
        self.state.rankChanged.connect(self._schedule)
        self.state.modesChanged.connect(self._on_modes)
        self.modes_table.itemSelectionChanged.connect(self._on_rows_selected)

    # ----- state -> view -----------------------------------------------------------------
    def _schedule(self, *_) -> None:
        """Redraw soon when shown; when hidden (a tab behind another), once it is shown."""
        if self.isVisible():
            super()._schedule()
        else:
            self._stale = True

    def showEvent(self, event) -> None:  # noqa: N802 - Qt name
        super().showEvent(event)
        if self._stale:
            self._stale = False
            super()._schedule()

    @property
    def result(self) -> SequenceResult:
        """The frequencies and dynamics shown."""
        return self._result

    @Slot()
    def _redraw(self) -> None:
        d = self.state.decomposition
        self._result = sequence_report(d, self.state.rank or (d.rank if d else 0))
        self._fill_modes()
        self._fill_dynamics()
        self._select_modes(self.state.modes)
        self._plot_selected()

    def _fill_modes(self) -> None:
        report = self._result.frequencies
        table = self.modes_table
        with QSignalBlocker(table):
            table.setRowCount(0 if report is None else report.rank)
            if report is None:
                self.summary.setText(self._result.note)
                self.spectrum_plot.setLabel("bottom", "frequency")
                return
            unit = report.unit
            table.setHorizontalHeaderLabels(["mode", "singular value", f"frequency ({unit})",
                                             "power share", "pair"])
            for j in range(report.rank):
                f = report.dominant[j]
                pair = int(report.pair_of[j])
                cells = (str(j + 1), f"{report.singular_values[j]:.4g}",
                         "-" if math.isnan(f) else f"{f:.4g}",
                         f"{100 * report.power_share[j]:.1f} %",
                         "" if pair < 0 else str(pair + 1))
                for c, text in enumerate(cells):
                    table.setItem(j, c, _cell(text))
        rate = (f"frame rate {report.frame_rate:g} Hz" if report.rate_known else
                "frame rate unknown: frequencies in cycles per frame (analyze --frame-rate HZ "
                "stores one)")
        pairs = ", ".join(f"{a + 1}+{b + 1}" for a, b in (p.modes for p in report.pairs))
        pair_text = (f"pairs: {pairs}" if pairs else
                     f"pairs: none ({report.pairs_note})" if report.pairs_note else
                     "pairs: none")
        self.summary.setText(f"Modes 1-{report.rank}, {report.n_frames} frames, {rate}; one bin "
                             f"= {report.resolution:.3g} {report.unit}; {pair_text}.")
        self.spectrum_plot.setLabel("bottom", f"frequency ({report.unit})")
        self.series_plot.setLabel("bottom", "time (s)" if report.rate_known else
                                  "image number")

    def _fill_dynamics(self) -> None:
        dyn = self._result.dynamics
        table = self.dynamics_table
        if dyn is None:
            table.setRowCount(0)
            self.caution.setText(self._result.note)
            return
        table.setHorizontalHeaderLabels([f"frequency ({dyn.unit})",
                                         f"growth rate ({dyn.rate_unit})", "amplitude"])
        rows = dyn.oscillations
        table.setRowCount(len(rows))
        for r, i in enumerate(rows):
            lam = dyn.eigenvalues[i]
            tip = f"eigenvalue per frame {lam.real:.5f}{lam.imag:+.5f}i (|λ| = {abs(lam):.5f})"
            for c, text in enumerate((f"{dyn.frequencies[i]:.4g}",
                                      f"{dyn.growth_rates[i]:+.4g}",
                                      f"{dyn.amplitudes[i]:.4g}")):
                table.setItem(r, c, _cell(text, tip))
        notes = caution(dyn)
        fit = f"One-step fit: {unexplained(dyn.residual)} unexplained."
        self.caution.setText(fit + (" Caution: " + "; ".join(notes) + "." if notes else
                                    " Rates describe the frames seen, not a forecast."))

    def selected_modes(self) -> list[int]:
        """Return the modes (0-based) of the selected rows, in row order."""
        return sorted({i.row() for i in self.modes_table.selectionModel().selectedRows()})

    def _select_modes(self, modes) -> None:
        table = self.modes_table
        with QSignalBlocker(table):
            table.clearSelection()
            for m in dict.fromkeys(modes):
                if 0 <= m < table.rowCount():
                    self._add_row(m)

    def _add_row(self, row: int) -> None:
        index = self.modes_table.model().index(row, 0)
        self.modes_table.selectionModel().select(
            index, QItemSelectionModel.SelectionFlag.Select
            | QItemSelectionModel.SelectionFlag.Rows)

    def _plot_selected(self) -> None:
        for curve in self.spectrum_curves:
            self.spectrum_plot.removeItem(curve)
        for curve in self.series_curves:
            self.series_plot.removeItem(curve)
        self.spectrum_curves, self.series_curves = [], []
        legend = self.spectrum_plot.legend
        if legend is not None:
            legend.clear()
        report = self._result.frequencies
        d = self.state.decomposition
        if report is None or d is None:
            self.peak_marks.setData([], [])
            return
        n = d.n_images
        x_time = (np.arange(n) / report.frame_rate if report.rate_known
                  else np.arange(1, n + 1, dtype=np.float64))
        freqs = report.frequencies[1:]                 # zero frequency left out (detrended)
        peaks, brushes = [], []
        for c, m in enumerate(self.selected_modes()):
            colour = MODE_COLOURS[c % len(MODE_COLOURS)]
            power = np.maximum(report.spectra[m, 1:], 1e-300)
            self.spectrum_curves.append(self.spectrum_plot.plot(
                freqs, power, pen=pg.mkPen(colour, width=1.5), name=f"mode {m + 1}"))
            self.series_curves.append(self.series_plot.plot(
                x_time, d.weights[m], pen=pg.mkPen(colour, width=1.2)))
            f = report.dominant[m]
            if not math.isnan(f):
                peak = int(round(f / report.resolution))
                peaks.append((f, max(report.spectra[m, peak], 1e-300)))
                brushes.append(pg.mkBrush(colour))
        xy = np.asarray(peaks, dtype=np.float64).reshape(-1, 2)
        self.peak_marks.setData(xy[:, 0], xy[:, 1], symbolBrush=brushes)

    # ----- view -> state -----------------------------------------------------------------
    @Slot(int, int)
    def _on_modes(self, a: int, b: int) -> None:
        if self._syncing:
            return
        self._select_modes((a, b))
        self._plot_selected()

    @Slot()
    def _on_rows_selected(self) -> None:
        self._plot_selected()
        report = self._result.frequencies
        modes = self.selected_modes()
        if report is None or len(modes) != 2 or report.pair_of[modes[0]] != modes[1]:
            return
        self._syncing = True
        try:
            self.state.set_modes(modes[0], modes[1])
        finally:
            self._syncing = False
