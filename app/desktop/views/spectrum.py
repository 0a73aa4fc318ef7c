"""Spectrum: singular values (log scale) and cumulative energy, with the rank marked.

Two stacked plots share the horizontal axis (mode number 1..k). The current rank r is a
draggable vertical line in both (it snaps to whole numbers and writes ``state.set_rank``). Two
suggested ranks are marked as labelled lines: the smallest rank reaching an energy threshold
(spin box, default 90 %) and the Gavish-Donoho optimal hard threshold (with its singular-value
threshold drawn as a horizontal line when known); when the latter does not apply the panel says
"not applicable" and why, in a tooltip.
"""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from PySide6.QtCore import Qt, Slot
from PySide6.QtGui import QColor
from PySide6.QtWidgets import (QDoubleSpinBox, QHBoxLayout, QLabel, QPushButton, QVBoxLayout,
                               QWidget)

from modescope.core.review.accuracy import describe_accuracy, model_tolerance
from modescope.core.review.rank import DEFAULT_ENERGY_SHARE, energy_rank, gavish_donoho

from modescope.app.desktop.imaging import NO_VARIATION
from modescope.app.words import counted
from modescope.app.desktop.redraw import ThrottledRedraw
from modescope.app.desktop.views.drag_line import SnapDrag
from modescope.app.desktop.views.frequency_parts import PairMarks
from modescope.app.desktop.state import AppState
from modescope.app.desktop.views.plot_style import style_plot

__all__ = ["SpectrumView", "log_ticks"]

_RANK_COLOUR = QColor(200, 60, 40)
_ENERGY_COLOUR = QColor(40, 120, 190)
_GD_COLOUR = QColor(120, 80, 170)


def log_ticks(lo: float, hi: float) -> list[list[tuple[float, str]]]:
    """Return pyqtgraph ticks for a log10 axis spanning ``lo``..``hi`` (in log10 units).

    Powers of ten are labelled; when the range spans less than about two decades 2 and 5 times
    a power of ten are labelled too; the other integer multiples are unlabelled minor ticks.
    """
    major, minor = [], []
    few = hi - lo < 2.2
    for e in range(int(np.floor(lo)), int(np.ceil(hi)) + 1):
        for m in range(1, 10):
            v = np.log10(m) + e
            if not lo <= v <= hi:
                continue
            if m == 1 or (few and m in (2, 5)):
                major.append((float(v), f"{m * 10.0 ** e:g}"))
            else:
                minor.append((float(v), ""))
    return [major, minor]


class SpectrumView(ThrottledRedraw, QWidget):
    """Singular values and cumulative energy with the rank line and suggested ranks.

    Parameters
    ----------
    state : AppState
        Reads the decomposition and rank; writes the rank.
    parent : QWidget, optional

    Attributes
    ----------
    singular_curve, energy_curve : pyqtgraph.PlotDataItem
        Singular values against mode 1..k; cumulative energy in percent against rank 1..k.
    rank_lines : tuple of pyqtgraph.InfiniteLine
        The draggable rank line in each plot.
    """

    DRAG_MS = 60

    def __init__(self, state: AppState, parent: QWidget | None = None):
        super().__init__(parent)
        if not isinstance(state, AppState):
            raise TypeError(f"state must be an AppState, got {type(state).__name__}")
        self.state = state
        self._syncing = False
        self.energy_suggestion: int | None = None
        self.gd_suggestion = None  # core.rank.RankSuggestion

        rows = self._build_controls()
        self._build_plots()
        self._build_curves()
        self._build_rank_lines()
        self._build_suggestion_lines()
        self._build_layout(rows)
        self._init_redraw_timer()
        self.rank_drag = SnapDrag(self.rank_lines, self._rank_bounds, self._write_rank,
                                  self.DRAG_MS, self)
        self._wire()

        if state.decomposition is not None:
            self._redraw()

    # ----- construction ------------------------------------------------------------------------
    def _build_controls(self) -> tuple[QHBoxLayout, QHBoxLayout]:
        """The summary line, and the energy threshold with both suggested ranks."""
        self.summary = QLabel("No analysis yet.", self)
        self.threshold = QDoubleSpinBox(self)
        self.threshold.setRange(1.0, 100.0)
        self.threshold.setDecimals(1)
        self.threshold.setSingleStep(1.0)
        # the default rank's own threshold (core.review.rank.default_rank), so the suggestion
        # shown first is the rank the workbench opened at and the commands use
        self.threshold.setValue(100.0 * DEFAULT_ENERGY_SHARE)
        self.threshold.setSuffix(" %")
        self.threshold.setToolTip("Energy threshold: the suggested rank is the smallest r whose "
                                  "modes capture at least this share of the total energy.")
        self.energy_label = QLabel("energy rank: -", self)
        self.use_energy = QPushButton("Use", self)
        self.use_energy.setToolTip("Set the rank to the energy-threshold suggestion.")
        self.gd_label = QLabel("optimal hard threshold: -", self)
        self.use_gd = QPushButton("Use", self)
        self.use_gd.setToolTip("Set the rank to the optimal hard threshold suggestion.")
        for b in (self.use_energy, self.use_gd):
            b.setEnabled(False)
            b.setAutoDefault(False)

        row1 = QHBoxLayout()
        row1.addWidget(self.summary, 1)
        row2 = QHBoxLayout()
        row2.addWidget(QLabel("Energy threshold", self))
        row2.addWidget(self.threshold)
        row2.addWidget(self.energy_label)
        row2.addWidget(self.use_energy)
        row2.addSpacing(16)
        row2.addWidget(self.gd_label)
        row2.addWidget(self.use_gd)
        row2.addStretch(1)
        return row1, row2

    def _build_plots(self) -> None:
        """Singular values (log) above cumulative energy, sharing the mode axis."""
        self.plots = pg.GraphicsLayoutWidget(self)
        self.plots.setBackground("w")
        self.sv_plot = self.plots.addPlot(row=0, col=0)
        self.en_plot = self.plots.addPlot(row=1, col=0)
        for p in (self.sv_plot, self.en_plot):
            style_plot(p, si_prefix=True)
        # short axis titles: longer ones than these short plots drew over each other (the dock's
        # title says "Singular values")
        self.sv_plot.setLabel("left", "value (log)", **{"font-size": "8pt"})
        self.sv_plot.setLogMode(x=False, y=True)
        self.sv_plot.getAxis("bottom").setStyle(showValues=False)
        self.en_plot.setLabel("left", "energy %", **{"font-size": "8pt"})
        self.en_plot.setLabel("bottom", "mode / rank r")
        self.en_plot.setXLink(self.sv_plot)
        self.en_plot.setYRange(0, 100, padding=0.1)
        self.en_plot.getAxis("left").setTicks([[(v, str(v)) for v in (0, 25, 50, 75, 100)]])
        self.en_plot.setMouseEnabled(x=True, y=False)
        self.sv_plot.setMouseEnabled(x=True, y=False)
        self.plots.ci.layout.setRowStretchFactor(0, 3)
        self.plots.ci.layout.setRowStretchFactor(1, 2)

    def _build_curves(self) -> None:
        self.singular_curve = self.sv_plot.plot(
            [], [], pen=pg.mkPen(QColor(50, 50, 50), width=1.5), symbol="o", symbolSize=5,
            symbolBrush=QColor(50, 50, 50), symbolPen=None, name="singular value")
        self.energy_curve = self.en_plot.plot(
            [], [], pen=pg.mkPen(_ENERGY_COLOUR, width=2), symbol="o", symbolSize=4,
            symbolBrush=_ENERGY_COLOUR, symbolPen=None, name="cumulative energy")
        self.pair_marks = PairMarks(self.sv_plot, log_y=True)   # pairs of a sequence's modes

    def _build_rank_lines(self) -> None:
        """The draggable rank line, once in each plot."""
        label_opts = dict(position=0.92, color=_RANK_COLOUR, fill=pg.mkBrush(255, 255, 255, 220),
                          movable=False)
        self.rank_lines = (
            pg.InfiniteLine(1, angle=90, movable=True, pen=pg.mkPen(_RANK_COLOUR, width=2.5),
                            hoverPen=pg.mkPen(_RANK_COLOUR, width=4),
                            label="rank r = {value:.0f}", labelOpts=label_opts),
            pg.InfiniteLine(1, angle=90, movable=True, pen=pg.mkPen(_RANK_COLOUR, width=2.5),
                            hoverPen=pg.mkPen(_RANK_COLOUR, width=4)),
        )
        self.sv_plot.addItem(self.rank_lines[0])
        self.en_plot.addItem(self.rank_lines[1])
        for line in self.rank_lines:
            line.setToolTip("Current rank r: drag to change it (snaps to whole numbers).")
            line.setZValue(20)

    def _build_suggestion_lines(self) -> None:
        """The energy-threshold and optimal-hard-threshold marks (hidden until known)."""
        dash, dot = Qt.PenStyle.DashLine, Qt.PenStyle.DotLine
        white = pg.mkBrush(255, 255, 255, 220)
        self.energy_line = pg.InfiniteLine(
            1, angle=90, movable=False, pen=pg.mkPen(_ENERGY_COLOUR, width=1.5, style=dash),
            label="energy", labelOpts=dict(position=0.12, color=_ENERGY_COLOUR, fill=white,
                                            anchors=[(0, 1), (0, 1)]))
        self.threshold_line = pg.InfiniteLine(
            90, angle=0, movable=False, pen=pg.mkPen(_ENERGY_COLOUR, width=1, style=dot))
        self.en_plot.addItem(self.energy_line)
        self.en_plot.addItem(self.threshold_line)
        self.gd_line = pg.InfiniteLine(
            1, angle=90, movable=False, pen=pg.mkPen(_GD_COLOUR, width=1.5, style=dash),
            label="optimal hard threshold", labelOpts=dict(position=0.1, color=_GD_COLOUR,
                                                          fill=white, anchors=[(0, 1), (0, 1)]))
        self.gd_tau_line = pg.InfiniteLine(
            0, angle=0, movable=False, pen=pg.mkPen(_GD_COLOUR, width=1, style=dot))
        self.gd_tau_line.setToolTip("Singular-value threshold of the optimal hard threshold rule.")
        self.sv_plot.addItem(self.gd_line)
        self.sv_plot.addItem(self.gd_tau_line)
        for item in (self.energy_line, self.threshold_line, self.gd_line, self.gd_tau_line):
            item.setVisible(False)

    def _build_layout(self, rows: tuple[QHBoxLayout, QHBoxLayout]) -> None:
        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        for row in rows:
            lay.addLayout(row)
        lay.addWidget(self.plots, 1)

    def _wire(self) -> None:
        """Every connection of the view, in one place."""
        self.state.decompositionChanged.connect(self._schedule)
        self.state.rankChanged.connect(self._on_rank)
        self.threshold.valueChanged.connect(self._update_suggestions)
        self.use_energy.clicked.connect(self._use_energy)
        self.use_gd.clicked.connect(self._use_gd)

    # ----- state -> view ---------------------------------------------------------------------
    @Slot()
    def _redraw(self) -> None:
        d = self.state.decomposition
        if d is None or d.rank == 0:
            self.singular_curve.setData([], [])
            self.energy_curve.setData([], [])
            self.summary.setText("No analysis yet." if d is None or not d.n_images
                                 else NO_VARIATION)
            for item in (self.energy_line, self.threshold_line, self.gd_line, self.gd_tau_line):
                item.setVisible(False)
            self.pair_marks.update(None)
            return
        k = d.rank
        x = np.arange(1, k + 1, dtype=np.float64)
        s = np.asarray(d.singular_values, dtype=np.float64)
        keep = s > 0  # a log axis cannot show zeros
        self.singular_curve.setData(x[keep], s[keep])
        self.energy_curve.setData(x, 100.0 * d.cumulative_energy())
        for line in self.rank_lines:
            line.setBounds((1, k))
        self.sv_plot.setXRange(0.5, k + 0.5, padding=0.02)
        if keep.any():
            lo, hi = np.log10(s[keep].min()), np.log10(s[keep].max())
            pad = max(0.05 * (hi - lo), 0.1)
            self.sv_plot.setYRange(lo - pad, hi + pad, padding=0)
            self.sv_plot.getAxis("left").setTicks(log_ticks(lo - pad, hi + pad))
        self._set_lines(self.state.rank)
        self._update_suggestions()
        self._update_summary()
        self.pair_marks.update(d)

    def _update_summary(self) -> None:
        d = self.state.decomposition
        if d is None or d.rank == 0:
            return
        r = self.state.rank
        cum = d.cumulative_energy()
        kept = cum[r - 1] if r >= 1 else 0.0
        kind = "final" if d.exact else "snapshot during the run"
        if d.exact and d.singular_value_error is not None:
            bad = d.unconverged_modes(model_tolerance(d)).size
            kind = ("final, certified" if bad == 0 else
                    f"final, {counted(bad, 'mode')} not converged")
        self.summary.setText(f"Rank r = {r} of {d.rank}: {100 * kept:.1f} % of the energy "
                             f"({counted(d.n_images, 'image')}, {kind})")
        self.summary.setToolTip("Singular values: " + describe_accuracy(d))

    @Slot()
    def _update_suggestions(self, *_) -> None:
        d = self.state.decomposition
        if d is None or d.rank == 0:
            return
        k = d.rank
        frac = self.threshold.value() / 100.0
        found = energy_rank(d, frac)
        r_e = found.rank
        cum = d.cumulative_energy()
        reached = found.reached and r_e >= 1
        self.energy_suggestion = r_e if reached else None
        self.threshold_line.setValue(100.0 * frac)
        self.threshold_line.setVisible(True)
        if reached:
            self.energy_line.setValue(r_e)
            self.energy_line.setVisible(True)  # the label only updates while visible
            self.energy_line.label.setFormat(f"{self.threshold.value():g} %: r = {r_e}")
            self.energy_label.setText(f"energy rank: {r_e}")
            self.energy_label.setToolTip(f"The first {r_e} modes capture "
                                         f"{100 * cum[r_e - 1]:.1f} % of the energy.")
        else:
            self.energy_line.setVisible(False)
            self.energy_label.setText(f"energy rank: more than {k}")
            self.energy_label.setToolTip(f"All {k} kept modes capture only "
                                         f"{100 * found.captured:.1f} % of the energy, so "
                                         f"{self.threshold.value():g} % needs more than {k} "
                                         "modes; analyse with a larger rank to find how many.")
        self.use_energy.setEnabled(reached)

        g = gavish_donoho(d)
        self.gd_suggestion = g
        why = ("Optimal hard threshold for singular values (Gavish and Donoho, 2014): modes "
               "whose singular value is above the threshold are kept.")
        if g.rank is None:
            self.gd_line.setVisible(False)
            self.gd_label.setText("optimal hard threshold: not applicable"
                                  + ("" if g.needed_rank is None else
                                     f" below rank {g.needed_rank}"))
            self.gd_label.setToolTip(f"{why}\nNot applicable here: {g.note}.")
            self.use_gd.setEnabled(False)
        else:
            self.gd_line.setValue(g.rank)
            self.gd_line.setVisible(True)  # the label only updates while visible
            self.gd_line.label.setFormat(f"optimal hard threshold: r = {g.rank}")
            self.gd_label.setText(f"optimal hard threshold: {g.rank}")
            self.gd_label.setToolTip(f"{why}\nThreshold {g.threshold:.4g}; {g.note}.")
            self.use_gd.setEnabled(g.rank >= 1)
        if g.threshold is not None and g.threshold > 0:
            self.gd_tau_line.setValue(np.log10(g.threshold))
            self.gd_tau_line.setVisible(True)
        else:
            self.gd_tau_line.setVisible(False)

    @Slot(int)
    def _on_rank(self, rank: int) -> None:
        if self._syncing:
            return
        self._set_lines(rank)
        self._update_summary()

    def _set_lines(self, rank: int) -> None:
        self.rank_drag.set_value(rank)

    # ----- view -> state ---------------------------------------------------------------------
    def _rank_bounds(self) -> tuple[int, int] | None:
        """The ranks a drag of the rank line may reach (None when there is no analysis)."""
        d = self.state.decomposition
        if d is None or d.rank == 0:
            return None
        return 1, d.rank

    def _write_rank(self, r: int) -> None:
        """Write the rank a drag of the rank line reached (called by ``rank_drag``)."""
        self._syncing = True
        try:
            self.state.set_rank(r)
        finally:
            self._syncing = False
        self._update_summary()

    @Slot()
    def _use_energy(self) -> None:
        if self.energy_suggestion is not None:
            self.state.set_rank(self.energy_suggestion)

    @Slot()
    def _use_gd(self) -> None:
        g = self.gd_suggestion
        if g is not None and g.rank:
            self.state.set_rank(g.rank)
