"""The Frequencies view: modes table, spectra and time series of the selected modes, the pair
sent to the weights plane, the DMD table; pairs marked in the Singular values view."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from modescope.app.desktop.state import AppState
from modescope.app.desktop.views.frequencies import FrequenciesView

FS = 25.0
N = 200


def waves(n=N, freqs=(2.0, 5.0)):
    """Frames (n, 8, 48, 1) of two waves travelling along the columns, plus a little noise."""
    t = np.arange(n) / FS
    x = np.arange(48) / 48.0
    field = sum(a * np.cos(2 * np.pi * (k * x[None, :] - f * t[:, None]))
                for f, k, a in zip(freqs, (2, 5), (1.0, 0.5)))
    frames = 0.5 + 0.2 * np.repeat(field[:, None, :], 8, axis=1)
    frames += np.random.default_rng(0).normal(0.0, 0.02, frames.shape)
    return frames[..., None]


@pytest.fixture
def wave_state(make_decomposition):
    s = AppState()
    s.set_decomposition(make_decomposition(waves(), 6, metadata={"frame_rate": FS}))
    s.set_rank(6)
    return s


def _column(view, c):
    t = view.modes_table
    return [t.item(r, c).text() for r in range(t.rowCount())]


def _select(view, rows):
    from PySide6.QtCore import QItemSelectionModel
    model = view.modes_table.selectionModel()
    model.clearSelection()
    for r in rows:
        model.select(view.modes_table.model().index(r, 0),
                     QItemSelectionModel.SelectionFlag.Select
                     | QItemSelectionModel.SelectionFlag.Rows)


def test_table_lists_frequencies_and_pairs(qtbot, wave_state):
    view = FrequenciesView(wave_state)
    qtbot.addWidget(view)
    view._redraw()
    assert _column(view, 0) == ["1", "2", "3", "4", "5", "6"]
    assert _column(view, 2)[:4] == ["2", "2", "5", "5"]         # Hz: the waves' frequencies
    assert _column(view, 4) == ["2", "1", "4", "3", "", ""]
    header = view.modes_table.horizontalHeaderItem(2).text()
    assert header == "frequency (Hz)"
    text = view.summary.text()
    assert "frame rate 25 Hz" in text and "pairs: 1+2, 3+4" in text and "0.125 Hz" in text
    assert view.spectrum_plot.getAxis("bottom").labelText == "frequency (Hz)"
    assert view.series_plot.getAxis("bottom").labelText == "time (s)"


def test_state_pair_selects_rows_and_plots_spectra_and_series(qtbot, wave_state):
    view = FrequenciesView(wave_state)
    qtbot.addWidget(view)
    view._redraw()
    assert view.selected_modes() == [0, 1]                      # the state's pair of modes
    wave_state.set_modes(2, 3)
    assert view.selected_modes() == [2, 3]
    assert len(view.spectrum_curves) == 2 and len(view.series_curves) == 2
    d = wave_state.decomposition
    # reference: scipy.signal.periodogram of the detrended weights, Hann window
    f_ref, p_ref = signal.periodogram(d.weights[2], fs=FS, window="hann", detrend="linear",
                                      scaling="spectrum")
    x, y = view.spectrum_curves[0].getOriginalDataset()
    np.testing.assert_allclose(x, f_ref[1:])
    np.testing.assert_allclose(y, p_ref[1:], rtol=1e-12)
    tx, ty = view.series_curves[1].getOriginalDataset()
    np.testing.assert_allclose(tx, np.arange(N) / FS)            # seconds
    np.testing.assert_array_equal(ty, d.weights[3])
    px, _ = view.peak_marks.getOriginalDataset()
    np.testing.assert_allclose(px, [5.0, 5.0])


def test_selecting_a_pair_sets_the_weights_plane(qtbot, wave_state):
    view = FrequenciesView(wave_state)
    qtbot.addWidget(view)
    view._redraw()
    with qtbot.waitSignal(wave_state.modesChanged, timeout=1000) as blocker:
        _select(view, [2, 3])
    assert blocker.args == [2, 3] and wave_state.modes == (2, 3)
    _select(view, [0, 2])                                       # not a pair: plane unchanged
    assert wave_state.modes == (2, 3)
    assert view.selected_modes() == [0, 2] and len(view.spectrum_curves) == 2
    _select(view, [4])
    assert wave_state.modes == (2, 3) and len(view.series_curves) == 1


def test_dynamics_table_and_caution(qtbot, wave_state):
    view = FrequenciesView(wave_state)
    qtbot.addWidget(view)
    view._redraw()
    t = view.dynamics_table
    assert t.horizontalHeaderItem(1).text() == "growth rate (1/s)"
    freqs = sorted(float(t.item(r, 0).text()) for r in range(t.rowCount()))
    big = [float(t.item(r, 0).text()) for r in range(2)]        # largest amplitudes first
    assert sorted(big) == pytest.approx([2.0, 5.0], rel=0.01)
    assert all(abs(float(t.item(r, 1).text())) < 0.05 for r in range(2))
    assert len(freqs) == t.rowCount() >= 2
    assert view.caution.text().startswith("One-step fit:")


def test_unknown_rate_and_too_few_frames(qtbot, make_decomposition):
    s = AppState()
    view = FrequenciesView(s)
    qtbot.addWidget(view)
    assert view.summary.text() == "No analysis yet." and view.modes_table.rowCount() == 0
    s.set_decomposition(make_decomposition(waves(n=64), 4))
    s.set_rank(4)
    view._redraw()
    assert view.modes_table.horizontalHeaderItem(2).text() == "frequency (cycles per frame)"
    assert "frame rate unknown" in view.summary.text()
    assert view.series_plot.getAxis("bottom").labelText == "image number"
    assert "frame rate is unknown" in view.caution.text()
    tx, _ = view.series_curves[0].getOriginalDataset()
    assert tx[0] == 1 and tx[-1] == 64
    s.set_decomposition(make_decomposition(waves(n=3), 2))
    view._redraw()
    assert view.modes_table.rowCount() == 0
    assert "at least 4 frames" in view.summary.text()
    assert view.spectrum_curves == []


def test_state_must_be_appstate():
    with pytest.raises(TypeError, match="state must be an AppState"):
        FrequenciesView(object())


def test_hidden_view_redraws_when_shown(qtbot, make_decomposition):
    s = AppState()
    view = FrequenciesView(s)
    qtbot.addWidget(view)
    s.set_decomposition(make_decomposition(waves(n=64), 4, metadata={"frame_rate": FS}))
    qtbot.wait(3 * view.REDRAW_MS)
    assert view.modes_table.rowCount() == 0              # hidden: nothing computed yet
    view.show()
    qtbot.waitUntil(lambda: view.modes_table.rowCount() == s.rank, timeout=2000)
    assert "frame rate 25 Hz" in view.summary.text()


def test_a_pair_picked_in_the_window_shows_its_ring_in_the_weights_plane(qtbot, ini_settings,
                                                                        make_decomposition):
    from modescope.app.desktop.main_window import MainWindow

    window = MainWindow(ini_settings, confirm_dialogs=False)
    qtbot.addWidget(window)
    window.show()
    qtbot.waitExposed(window)
    assert window.docks["frequenciesDock"].windowTitle() == "Frequencies"
    view_menu = next(a.menu() for a in window.menuBar().actions() if a.text() == "&View")
    assert "Frequencies" in [a.text() for a in view_menu.actions()]
    d = make_decomposition(waves(), 6, metadata={"frame_rate": FS})
    window.state.set_decomposition(d)
    window.state.set_rank(6)
    window.docks["frequenciesDock"].raise_()
    view = window.views["frequenciesDock"]
    qtbot.waitUntil(lambda: view.modes_table.rowCount() == 6, timeout=3000)
    _select(view, [2, 3])
    assert window.state.modes == (2, 3)
    weights = window.views["weightsDock"]
    weights._redraw()
    assert (weights.combo_a.currentIndex(), weights.combo_b.currentIndex()) == (2, 3)
    x, y = weights.scatter.getData()
    # a travelling wave's pair: every frame on one ring (radius within 10% of the mean)
    radius = np.hypot(x, y)
    assert np.all(np.abs(radius / radius.mean() - 1) < 0.1)
    np.testing.assert_allclose(x, d.weights[2])
