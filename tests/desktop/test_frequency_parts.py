"""Parts shared by the sequence views: the shared results, pair brackets, the time axis."""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
import pytest

from modescope.app.desktop.views.frequency_parts import PairMarks, TimeAxis, sequence_report

FS = 20.0


def waves(n=160):
    """Frames (n, 6, 40, 1): one wave travelling along the columns at 2 Hz, another at 4.5 Hz
    (both on bins: 160 frames at 20 Hz, one bin 0.125 Hz), plus noise."""
    t = np.arange(n) / FS
    x = np.arange(40) / 40.0
    field = (np.cos(2 * np.pi * (2 * x[None, :] - 2.0 * t[:, None]))
             + 0.4 * np.cos(2 * np.pi * (5 * x[None, :] - 4.5 * t[:, None])))
    frames = 0.5 + 0.2 * np.repeat(field[:, None, :], 6, axis=1)
    return (frames + np.random.default_rng(3).normal(0, 0.02, frames.shape))[..., None]


def test_sequence_report_is_shared_and_follows_the_analysis(make_decomposition):
    d = make_decomposition(waves(), 5, metadata={"frame_rate": FS})
    first = sequence_report(d, 5)
    assert sequence_report(d, 5) is first                   # computed once per analysis+rank
    assert first.dynamics is not None
    assert sequence_report(d, 3, dynamics=False).dynamics is None
    assert sequence_report(d, 9).frequencies.rank == 5      # clipped to k
    assert sequence_report(d, 2).frequencies.rank == 2
    assert [p.modes for p in first.frequencies.pairs] == [(0, 1), (2, 3)]
    other = d.replace(metadata={})
    assert sequence_report(other, 5).frequencies.unit == "cycles per frame"
    assert sequence_report(None, 3).note == "No analysis yet."
    few = make_decomposition(waves(n=3), 2)
    assert "at least 4 frames" in sequence_report(few, 2).note


def test_pair_marks_draw_one_bracket_per_pair(qtbot, make_decomposition):
    widget = pg.PlotWidget()
    qtbot.addWidget(widget)
    plot = widget.getPlotItem()
    plot.setLogMode(x=False, y=True)
    marks = PairMarks(plot, log_y=True)
    d = make_decomposition(waves(), 5, metadata={"frame_rate": FS})
    assert marks.update(d) == ((0, 1), (2, 3))
    x, y = marks.curve.getOriginalDataset()
    s = d.singular_values
    # segments: down from mode a, across to mode b, up to b, for each pair (modes from 1)
    np.testing.assert_array_equal(x, [1, 1, 1, 2, 2, 2, 3, 3, 3, 4, 4, 4])
    assert y[0] == s[0] and y[5] == s[1] and y[6] == s[2] and y[11] == s[3]
    assert y[1] == pytest.approx(min(s[0], s[1]) / 1.25)
    assert [lab.toPlainText() for lab in marks.labels] == ["pair 2 Hz", "pair 4.5 Hz"]
    assert marks.labels[1].pos().y() == pytest.approx(np.log10(s[3] / 1.25))
    assert plot.getViewBox().viewRange()[1][0] < np.log10(s[3] / 1.25)   # room for the label
    assert marks.update(d.replace(exact=False)) == ()       # a snapshot during a run
    assert marks.labels == []
    assert marks.update(d) == ((0, 1), (2, 3))
    assert marks.update(None) == () and marks.labels == []
    x, _ = marks.curve.getOriginalDataset()
    assert x is None or len(x) == 0


def test_time_axis_labels_numbers_with_seconds(make_decomposition):
    axis = TimeAxis("bottom")
    d = make_decomposition(waves(n=40), 3, metadata={"frame_rate": FS})
    assert axis.tickStrings([1, 21], 1.0, 20) == ["1", "21"]        # no rate: the numbers
    axis.set_frame_rate(d)
    assert axis.tickStrings([1, 21, 41], 1.0, 20) == ["0", "1", "2"]  # (number - 1) / rate
    levels = axis.tickValues(1, 201, 400)            # frames 1..201 = 0..10 s at 20 Hz
    assert levels[0][1] == pytest.approx([1 + FS * t for t in (0, 2, 4, 6, 8, 10)])
    assert axis.tickStrings(levels[0][1], 1.0, levels[0][0]) == ["0", "2", "4", "6", "8", "10"]
    axis.set_frame_rate(d.replace(metadata={}))
    assert axis.frame_rate is None


def test_singular_values_view_marks_the_pairs(qtbot, make_decomposition):
    from modescope.app.desktop.state import AppState
    from modescope.app.desktop.views.spectrum import SpectrumView

    state = AppState()
    view = SpectrumView(state)
    qtbot.addWidget(view)
    state.set_decomposition(make_decomposition(waves(), 5, metadata={"frame_rate": FS}))
    view._redraw()
    assert view.pair_marks.pairs == ((0, 1), (2, 3))
    assert [lab.toPlainText() for lab in view.pair_marks.labels] == ["pair 2 Hz", "pair 4.5 Hz"]
    state.set_decomposition(None)
    view._redraw()
    assert view.pair_marks.pairs == () and view.pair_marks.labels == []


def test_weights_that_are_not_finite_give_a_note_not_an_error(make_decomposition):
    d = make_decomposition(waves(n=40), 3)
    w = d.weights.copy()
    w[0, 5] = np.nan
    result = sequence_report(d.replace(weights=w), 3)
    assert result.frequencies is None and "finite" in result.note


def test_weights_sequence_plot_reads_time_when_the_rate_is_known(qtbot, make_decomposition):
    from modescope.app.desktop.state import AppState
    from modescope.app.desktop.views.weights import WeightsView

    state = AppState()
    view = WeightsView(state)
    qtbot.addWidget(view)
    d = make_decomposition(waves(n=40), 3, metadata={"frame_rate": FS})
    state.set_decomposition(d)
    view._redraw()
    assert "against time (s)" in view.seq_plot.titleLabel.text
    assert view.seq_time_axis.tickStrings([1, 21], 1.0, 20) == ["0", "1"]
    x, _ = view.seq_a.getOriginalDataset()
    assert x[0] == 1 and x[-1] == 40            # still image numbers: selection unchanged
    state.set_decomposition(d.replace(metadata={}))
    view._redraw()
    assert "against image number" in view.seq_plot.titleLabel.text
    assert view.seq_time_axis.tickStrings([1, 21], 1.0, 20) == ["1", "21"]
