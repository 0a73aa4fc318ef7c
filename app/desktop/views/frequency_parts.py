"""Small parts shared by the Frequencies view and the other views that show sequence results.

* :func:`sequence_report` computes (and remembers for the last analysis and rank) the
  frequencies, pairs and dynamics of an analysis, all from core;
* :class:`PairMarks` marks the pairs of modes in a plot against mode number (the Singular
  values view): a bracket joining the two points of each pair, labelled with its frequency;
* :class:`TimeAxis` labels an image-number axis with the time of each frame when the frame
  rate is known.
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass

import numpy as np
import pyqtgraph as pg
from PySide6.QtGui import QColor

from modescope.core.decomposition import Decomposition
from modescope.core.review.dynamics import DynamicsReport, dynamics_of
from modescope.core.review.frequencies import (MIN_FRAMES, FrequencyReport, frame_rate_of,
                                               frequencies_of)

__all__ = ["SequenceResult", "sequence_report", "PairMarks", "TimeAxis", "PAIR_COLOUR"]

PAIR_COLOUR = QColor(20, 140, 90)


@dataclass(frozen=True)
class SequenceResult:
    """Frequencies and dynamics of the leading modes, or why there are none.

    Attributes
    ----------
    frequencies : FrequencyReport or None
    dynamics : DynamicsReport or None
        None when the linear model could not be fitted (``note`` says why).
    note : str
        Why something is missing, else "".
    """

    frequencies: FrequencyReport | None
    dynamics: DynamicsReport | None
    note: str = ""


#: The results for the last analysis asked about, by rank: views share one computation (a weak
#: reference, so a closed analysis is not kept alive).
_CACHE: dict = {"ref": lambda: None, "results": {}}


def sequence_report(decomposition: Decomposition | None, rank: int, *,
                    dynamics: bool = True) -> SequenceResult:
    """Return the frequencies (and dynamics) of the first ``rank`` modes, remembered for the
    last analysis so several views share one computation.

    Parameters
    ----------
    decomposition : Decomposition or None
    rank : int
        Leading modes to read; clipped to 1..k.
    dynamics : bool, default True
        Also fit the linear model (False leaves ``dynamics`` None unless already known).

    Returns
    -------
    SequenceResult
    """
    if decomposition is None or decomposition.rank == 0:
        return SequenceResult(None, None, "No analysis yet." if decomposition is None
                              else "The images do not vary: no weights to read.")
    if decomposition.n_images < MIN_FRAMES:
        return SequenceResult(None, None, f"A spectrum needs at least {MIN_FRAMES} frames; "
                                          f"this analysis has {decomposition.n_images}.")
    r = int(min(max(rank, 1), decomposition.rank))
    if _CACHE["ref"]() is not decomposition:
        _CACHE.update(ref=weakref.ref(decomposition), results={})
    results = _CACHE["results"]
    if r not in results:
        try:
            results[r] = SequenceResult(frequencies_of(decomposition, r), None)
        except ValueError as exc:       # e.g. weights that are not finite in a snapshot
            return SequenceResult(None, None, f"No spectrum: {exc}.")
    result = results[r]
    if dynamics and result.dynamics is None and not result.note:
        try:
            result = SequenceResult(result.frequencies, dynamics_of(decomposition, r))
        except ValueError as exc:       # e.g. weights all zero: say so, keep the spectra
            result = SequenceResult(result.frequencies, None, f"No linear model: {exc}.")
        results[r] = result
    return result


class PairMarks:
    """Brackets joining the two modes of each pair in a plot against mode number.

    Parameters
    ----------
    plot : pyqtgraph.PlotItem
        A plot whose horizontal axis is the mode number 1..k.
    log_y : bool
        True when the plot shows its vertical axis in log mode.
    """

    def __init__(self, plot: pg.PlotItem, log_y: bool = False):
        self.plot = plot
        self.log_y = log_y
        self.curve = pg.PlotDataItem([], [], pen=pg.mkPen(PAIR_COLOUR, width=2), connect="pairs")
        self.curve.setZValue(15)
        plot.addItem(self.curve)
        self.labels: list[pg.TextItem] = []
        self.pairs: tuple = ()

    def update(self, decomposition: Decomposition | None) -> tuple:
        """Mark the pairs found among all modes of ``decomposition``; return them (0-based).

        Only a final result is read (a snapshot during a run is left unmarked: the search
        would run in the GUI thread at every snapshot).
        """
        for label in self.labels:
            self.plot.removeItem(label)
        self.labels = []
        if decomposition is not None and not decomposition.exact:
            decomposition = None
        result = sequence_report(decomposition, decomposition.rank if decomposition else 0,
                                 dynamics=False)
        report = result.frequencies
        self.pairs = () if report is None else tuple(p.modes for p in report.pairs)
        if not self.pairs:
            self.curve.setData([], [])
            return self.pairs
        s = np.asarray(decomposition.singular_values, dtype=np.float64)
        xs, ys = [], []
        for p in report.pairs:
            a, b = p.modes
            # a bracket under the two points: down from a, across, up to b (segment pairs),
            # the label under it (below a pair the plot is mostly empty: the curve falls to
            # the right); the curve takes data values (a log plot logs them), the label view
            # coordinates
            low = min(s[a], s[b]) / (1.25 if self.log_y else 1.0) - (
                0.0 if self.log_y else 0.05 * max(s[a], s[b]))
            xs += [a + 1, a + 1, a + 1, b + 1, b + 1, b + 1]
            ys += [s[a], low, low, low, low, s[b]]
            label = pg.TextItem(f"pair {p.frequency:.3g} {report.unit}", color=PAIR_COLOUR,
                                anchor=(0.5, 0.0))
            label.setPos(0.5 * (a + b) + 1, np.log10(low) if self.log_y else low)
            label.setToolTip(f"Modes {a + 1} and {b + 1} form a pair: nearly equal singular "
                             f"values, weights a quarter period apart (phase "
                             f"{p.phase_lag:+.0f} degrees, coherence {p.coherence:.2f}).")
            self.plot.addItem(label)
            self.labels.append(label)
        self.curve.setData(np.asarray(xs, float), np.asarray(ys, float))
        self._make_room(min(ys))
        return self.pairs

    def _make_room(self, bottom: float) -> None:
        """Lower the bottom of the plot's vertical range so the lowest label fits under its
        bracket (18 pixels of text; a third of a decade before the plot has a size)."""
        vb = self.plot.getViewBox()
        y0, y1 = vb.viewRange()[1]
        pixel = vb.viewPixelSize()[1]
        text = 18 * pixel if np.isfinite(pixel) and 0 < pixel < (y1 - y0) else 0.3
        need = (np.log10(bottom) if self.log_y else bottom) - text
        if need < y0:
            self.plot.setYRange(need, y1, padding=0)


class TimeAxis(pg.AxisItem):
    """An axis over image numbers 1..n that labels them with the frame time in seconds,
    ``(number - 1) / frame_rate``, when a frame rate is set (else with the numbers)."""

    def __init__(self, orientation: str = "bottom", **kwargs):
        super().__init__(orientation, **kwargs)
        self.frame_rate: float | None = None

    def set_frame_rate(self, decomposition: Decomposition | None) -> None:
        """Take the frame rate of ``decomposition`` (None when unknown) and relabel."""
        self.frame_rate = None if decomposition is None else frame_rate_of(decomposition)
        self.picture = None
        self.update()

    def tickValues(self, minVal, maxVal, size):  # noqa: N802 - pyqtgraph name
        if not self.frame_rate:
            return super().tickValues(minVal, maxVal, size)
        rate = self.frame_rate        # round times, placed at their image numbers
        levels = super().tickValues((minVal - 1) / rate, (maxVal - 1) / rate, size)
        return [(spacing * rate, [v * rate + 1 for v in values]) for spacing, values in levels]

    def tickStrings(self, values, scale, spacing):  # noqa: N802 - pyqtgraph name
        if not self.frame_rate:
            return super().tickStrings(values, scale, spacing)
        # round away the float error of the mapping (1.0000000002 -> 1)
        return [f"{round((v - 1) / self.frame_rate, 9):.6g}" for v in values]
