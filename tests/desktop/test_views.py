"""Tests of the four linked data views: basis gallery, spectrum, weights, image list.

Reference values come from numpy.linalg.svd (LAPACK) of a small synthetic centred matrix, computed
here in the test, independently of the views.
"""

from __future__ import annotations

import time
from pathlib import Path

import os

import numpy as np
import pytest
from PIL import Image
from PySide6.QtCore import QItemSelectionModel, QPointF, QRectF, Qt
from PySide6.QtWidgets import QApplication

import modescope.app.desktop.views.gallery as gallery_module
from modescope.app.desktop.views.gallery import (LIMIT_ROLE, MODE_ROLE, BasisGallery, BasisModel,
                                                basis_tile_rgb)
from modescope.app.desktop.views.image_list import (COL_FILE, COL_NUMBER, COL_RESIDUAL,
                                                    SORT_ROLE, ImageListView)
from modescope.app.desktop.views.spectrum import SpectrumView, log_ticks
from modescope.app.desktop.state import AppState
from modescope.app.desktop.views.weights import POINT_COLOURS, WeightsView
from modescope.core.output.colormap import DIVERGING_LUT
from modescope.core.decomposition import Decomposition, fix_signs

ROWS, COLS, N, K = 12, 16, 30, 8


def _svd_decomposition(data: np.ndarray, shape, k: int, paths=(), residual=True,
                       exact=True) -> Decomposition:
    """Build a Decomposition from numpy.linalg.svd (LAPACK gesdd) of the centred data."""
    data = data.astype(np.float64)
    mean = data.mean(axis=1)
    c = data - mean[:, None]
    u, s, vt = np.linalg.svd(c, full_matrices=False)
    basis, _ = fix_signs(u[:, :k])
    weights = basis.T @ c
    res = np.sum((c - basis @ weights) ** 2, axis=0) if residual else None
    return Decomposition(mean=mean.astype(np.float32), basis=basis.astype(np.float32),
                         singular_values=s[:k].copy(), weights=weights,
                         total_energy=float(np.sum(c ** 2)), image_shape=tuple(shape),
                         paths=tuple(paths), residual=res, exact=exact)


def _synthetic(n: int, channels: int, seed: int = 0) -> np.ndarray:
    """(pixels, n) values in [0, 1]: three smooth patterns with varying weights plus noise."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:ROWS, 0:COLS] / np.array([ROWS, COLS])[:, None, None]
    patterns = [np.sin(2 * np.pi * xx), np.cos(3 * np.pi * yy), xx * yy - 0.25]
    pix = ROWS * COLS * channels
    p = np.stack([np.repeat(q[:, :, None], channels, axis=2).ravel() for q in patterns], axis=1)
    if channels == 3:
        p[0::3, 2] *= -1.0  # make the third pattern differ between channels
    w = rng.normal(size=(3, n)) * np.array([[0.2], [0.1], [0.05]])
    x = 0.5 + p @ w + 0.01 * rng.normal(size=(pix, n))
    return np.clip(x, 0.0, 1.0)


@pytest.fixture
def files(tmp_path: Path):
    """Write the synthetic gray images as PNG files; names 'frame_*' and a few 'other_*'."""
    data = _synthetic(N, 1)
    paths = []
    for i in range(N):
        name = f"other_{i:03d}.png" if i % 7 == 3 else f"frame_{i:03d}.png"
        p = tmp_path / name
        img = (data[:, i].reshape(ROWS, COLS) * 255 + 0.5).astype(np.uint8)
        Image.fromarray(img).save(p)
        paths.append(str(p))
    return data, paths


@pytest.fixture
def gray(files):
    data, paths = files
    return _svd_decomposition(data, (ROWS, COLS, 1), K, paths)


@pytest.fixture
def rgb():
    return _svd_decomposition(_synthetic(N, 3, seed=1), (ROWS, COLS, 3), K,
                              [f"/nowhere/rgb_{i}.png" for i in range(N)])


@pytest.fixture
def state(gray):
    s = AppState()
    s.set_decomposition(gray)
    return s


def _flush(qtbot, view):
    """Let the view's coalescing timer fire."""
    qtbot.waitUntil(lambda: not view._timer.isActive(), timeout=2000)


def _count_redraws(monkeypatch, cls) -> list:
    """Wrap ``cls._redraw`` with a counter; views made afterwards call the wrapper from their
    redraw timer (the timer is connected to the bound method when the view is made)."""
    calls = []
    original = cls._redraw

    def counting(self, *args):
        calls.append(self)
        return original(self, *args)

    monkeypatch.setattr(cls, "_redraw", counting)
    return calls


class _Counter:
    def __init__(self, signal):
        self.n = 0
        signal.connect(self)

    def __call__(self, *args):
        self.n += 1


# ===== basis gallery ===========================================================================
def test_gallery_rows_labels_and_tooltips(qtbot, state, gray):
    g = BasisGallery(state)
    qtbot.addWidget(g)
    m = g.model
    assert m.rowCount() == K + 1
    assert m.data(m.index(0), MODE_ROLE) == -1
    assert "Mean image" in m.data(m.index(0))
    # reference: energy shares s^2 / ||C||_F^2 from the LAPACK singular values
    s = gray.singular_values
    share = s ** 2 / gray.total_energy
    cum = np.cumsum(share)
    for j in range(K):
        text = m.data(m.index(j + 1))
        assert m.data(m.index(j + 1), MODE_ROLE) == j
        assert f"Basis image {j + 1}" in text
        assert f"{s[j]:.4g}" in text
        assert f"{100 * share[j]:.3g} %" in text
        assert f"{100 * cum[j]:.1f} %" in text
        lim = float(np.max(np.abs(gray.basis[:, j])))
        assert m.data(m.index(j + 1), LIMIT_ROLE) == pytest.approx(lim)
        assert f"L = {lim:.4g}" in m.data(m.index(j + 1), Qt.ItemDataRole.ToolTipRole)
    # numbers agree with the Decomposition's own accessors too
    np.testing.assert_allclose(gray.energy_shares(), share, rtol=1e-12)


def test_gallery_click_sets_focus_and_modes(qtbot, state):
    g = BasisGallery(state)
    qtbot.addWidget(g)
    g.resize(600, 500)
    g.show()
    qtbot.waitExposed(g)
    focus = _Counter(state.focusModeChanged)
    idx = g.model.index(4)  # basis image 4 -> mode 3
    g.view.scrollTo(idx)
    qtbot.mouseClick(g.view.viewport(), Qt.MouseButton.LeftButton,
                     pos=g.view.visualRect(idx).center())
    assert state.focus_mode == 3
    assert state.modes == (3, 1)  # the clicked mode goes on the horizontal axis
    assert focus.n == 1
    qtbot.mouseClick(g.view.viewport(), Qt.MouseButton.LeftButton,
                     pos=g.view.visualRect(g.model.index(0)).center())
    assert state.focus_mode == -1
    assert state.modes == (3, 1)  # the mean leaves the plane alone
    # clicking a mode already in the plane keeps the pair
    g.pick(1)
    assert state.focus_mode == 1 and state.modes == (3, 1)


def test_gallery_follows_state_without_echo(qtbot, state):
    g = BasisGallery(state)
    qtbot.addWidget(g)
    focus = _Counter(state.focusModeChanged)
    modes = _Counter(state.modesChanged)
    state.set_focus_mode(5)
    assert g.view.currentIndex().row() == 6
    assert focus.n == 1 and modes.n == 0


def test_gallery_icons_are_lazy_and_cached(qtbot, gray, monkeypatch):
    # count the tile pictures the model computes (it calls the module's tile functions)
    renders = []
    for name in ("basis_tile_rgb", "mean_tile_rgb"):
        original = getattr(gallery_module, name)
        monkeypatch.setattr(gallery_module, name,
                            lambda *a, _f=original, _n=name, **k: renders.append(_n) or _f(*a, **k))
    m = BasisModel(icon_size=32)
    m.set_decomposition(gray)
    assert renders == []  # nothing drawn until asked
    icon = m.data(m.index(3), Qt.ItemDataRole.DecorationRole)
    assert renders == ["basis_tile_rgb"] and not icon.isNull()
    size = icon.availableSizes()[0]
    assert (size.width(), size.height()) == (32, 32 * ROWS // COLS)  # aspect ratio kept
    again = m.data(m.index(3), Qt.ItemDataRole.DecorationRole)
    assert len(renders) == 1  # cached by (decomposition, mode)
    assert again.cacheKey() == icon.cacheKey()
    m.set_decomposition(gray.replace())
    m.data(m.index(3), Qt.ItemDataRole.DecorationRole)
    assert len(renders) == 2  # a new decomposition renders again
    m.data(m.index(0), Qt.ItemDataRole.DecorationRole)
    assert renders[-1] == "mean_tile_rgb"  # row 0 is the mean image


def test_tile_colours_gray_and_rgb(gray, rgb):
    # gray: row 128 + rint(127 v / L) of the diverging table (table layout of core.colormap)
    j = 2
    v = gray.basis[:, j].reshape(ROWS, COLS)
    lim = float(np.max(np.abs(v)))
    expect = DIVERGING_LUT[(128 + np.rint(127 * np.clip(v / lim, -1, 1))).astype(int)]
    np.testing.assert_array_equal(basis_tile_rgb(gray, j), expect)
    # rgb: 0.5 + v / (2 L) per channel, L the largest |value| over all channels
    w = rgb.basis[:, 1].reshape(ROWS, COLS, 3).astype(np.float64)
    lim = np.max(np.abs(w))
    expect = np.rint(np.clip(0.5 + w / (2 * lim), 0, 1) * 255).astype(np.uint8)
    got = basis_tile_rgb(rgb, 1)
    assert np.max(np.abs(got.astype(int) - expect.astype(int))) <= 1
    # zero maps to mid-gray
    zero = rgb.replace(basis=np.zeros_like(rgb.basis))
    assert np.all(basis_tile_rgb(zero, 0) == 128)


def test_gallery_rgb_legend_and_tooltip(qtbot, rgb):
    st = AppState()
    st.set_decomposition(rgb)
    g = BasisGallery(st)
    qtbot.addWidget(g)
    assert g.legend.rgb
    tip = g.model.data(g.model.index(2), Qt.ItemDataRole.ToolTipRole)
    assert "0.5 + value / (2 L)" in tip and "mid-gray is zero" in tip


# ===== spectrum ================================================================================
def test_spectrum_plots_singular_values_and_energy(qtbot, state, gray):
    sp = SpectrumView(state)
    qtbot.addWidget(sp)
    x, y = sp.singular_curve.xData, sp.singular_curve.yData
    np.testing.assert_array_equal(x, np.arange(1, K + 1))
    # reference: LAPACK singular values of the centred matrix
    c = gray.weights  # (k, n) = diag(s) Vt
    np.testing.assert_allclose(y, np.linalg.svd(c, compute_uv=False), rtol=1e-9)
    cum = 100 * np.cumsum(gray.singular_values ** 2) / gray.total_energy
    np.testing.assert_allclose(sp.energy_curve.yData, cum, rtol=1e-12)
    np.testing.assert_allclose(sp.energy_curve.yData, 100 * gray.cumulative_energy())


def test_spectrum_rank_line_drag_and_follow(qtbot, state):
    sp = SpectrumView(state)
    qtbot.addWidget(sp)
    line = sp.rank_lines[0]
    rank = _Counter(state.rankChanged)
    line.setValue(4.3)  # a drag moves the line, the view snaps it to the whole number
    assert line.value() == 4 and sp.rank_lines[1].value() == 4
    qtbot.waitUntil(lambda: state.rank == 4, timeout=2000)
    line.setValue(6.0)
    line.sigPositionChangeFinished.emit(line)  # end of the drag: written at once
    assert state.rank == 6
    assert rank.n == 2
    state.set_rank(3)
    assert [ln.value() for ln in sp.rank_lines] == [3, 3]
    assert rank.n == 3  # no echo from the lines
    assert "Rank r = 3" in sp.summary.text()


def test_spectrum_suggestions(qtbot, state, gray):
    sp = SpectrumView(state)
    qtbot.addWidget(sp)
    cum = np.cumsum(gray.singular_values ** 2) / gray.total_energy
    for pct in (50.0, 90.0):
        sp.threshold.setValue(pct)
        expect = int(np.argmax(cum >= pct / 100) + 1)  # smallest r reaching the threshold
        assert sp.energy_suggestion == expect
        assert sp.energy_line.value() == expect
        assert f"r = {expect}" in sp.energy_line.label.textItem.toPlainText()
    sp.threshold.setValue(100.0)  # more than k modes hold: not reached
    assert sp.energy_suggestion is None and not sp.energy_line.isVisible()
    sp.use_energy.setEnabled(True)
    sp.threshold.setValue(50.0)
    sp.use_energy.click()
    assert state.rank == sp.energy_suggestion


def test_log_ticks():
    major, minor = log_ticks(np.log10(3.0), np.log10(250.0))  # 1.9 decades: 2x and 5x labelled
    assert [t for _, t in major] == ["5", "10", "20", "50", "100", "200"]
    np.testing.assert_allclose([v for v, _ in major], np.log10([5, 10, 20, 50, 100, 200]))
    assert len(minor) == len({3, 4, 6, 7, 8, 9, 30, 40, 60, 70, 80, 90})
    major, _ = log_ticks(-2.5, 3.2)  # many decades: powers of ten only
    assert [t for _, t in major] == ["0.01", "0.1", "1", "10", "100", "1000"]


def test_spectrum_optimal_threshold_not_applicable(qtbot):
    two = _svd_decomposition(_synthetic(2, 1), (ROWS, COLS, 1), 1)
    st = AppState()
    st.set_decomposition(two)
    sp = SpectrumView(st)
    qtbot.addWidget(sp)
    assert "not applicable" in sp.gd_label.text()
    assert "at least 3 images" in sp.gd_label.toolTip()
    assert not sp.use_gd.isEnabled()


def test_spectrum_optimal_threshold_full_spectrum(qtbot, files):
    data, _ = files
    # every non-zero singular value kept (k = n - 1): Gavish-Donoho's median rule applies.
    full = _svd_decomposition(data, (ROWS, COLS, 1), N - 1)
    st = AppState()
    st.set_decomposition(full)
    sp = SpectrumView(st)
    qtbot.addWidget(sp)
    # reference: Gavish & Donoho (2014), tau = omega(beta) * median(s), omega by their cubic fit
    beta = (N - 1) / (ROWS * COLS)
    omega = 0.56 * beta ** 3 - 0.95 * beta ** 2 + 1.82 * beta + 1.43
    s = np.linalg.svd(data - data.mean(axis=1, keepdims=True), compute_uv=False)[:N - 1]
    expect = int(np.sum(s > omega * np.median(s)))
    assert sp.gd_suggestion.rank == expect
    assert sp.gd_label.text() == f"optimal hard threshold: {expect}"
    assert sp.gd_line.value() == expect
    sp.use_gd.click()
    assert st.rank == expect


# ===== weights =================================================================================
def test_weights_scatter_follows_modes(qtbot, state, gray):
    w = WeightsView(state)
    qtbot.addWidget(w)
    x, y = w.scatter.getData()
    np.testing.assert_allclose(x, gray.weights[0]); np.testing.assert_allclose(y, gray.weights[1])
    state.set_modes(2, 4)
    _flush(qtbot, w)
    x, y = w.scatter.getData()
    np.testing.assert_allclose(x, gray.weights[2]); np.testing.assert_allclose(y, gray.weights[4])
    assert (w.combo_a.currentIndex(), w.combo_b.currentIndex()) == (2, 4)
    w.combo_b.setCurrentIndex(5)  # the user picks another mode
    assert state.modes == (2, 5)


def _assert_point_colours(w, values):
    """The points of the weights plane are coloured by ``values`` along the colour bar: each
    point has the bar's colour nearest to its value's place between the bar's two ends."""
    lo, hi = w.colour_bar.levels()
    table = w.colour_bar.colorMap().getLookupTable(0.0, 1.0, POINT_COLOURS, alpha=False,
                                                   mode="byte").astype(int)
    shown = np.array([p.brush().color().getRgb()[:3] for p in w.scatter.points()])
    assert len(shown) == len(values)
    # which colour of the bar each point has (the table's colours are all different)
    steps = [int(np.flatnonzero((table == c).all(axis=1))[0]) for c in shown]
    where = (np.asarray(values, dtype=np.float64) - lo) / (hi - lo) * (POINT_COLOURS - 1)
    np.testing.assert_array_less(np.abs(np.array(steps) - where), 0.5 + 1e-3)


def test_weights_colour_is_residual_or_number(qtbot, state, gray, files):
    w = WeightsView(state)
    qtbot.addWidget(w)
    state.set_rank(3)
    _flush(qtbot, w)
    # reference: squared norm of c - B_3 B_3^T c, computed with numpy from the data
    data, _ = files
    c = data - data.mean(axis=1, keepdims=True)
    b3 = gray.basis[:, :3].astype(np.float64)
    expect = np.sum((c - b3 @ (b3.T @ c)) ** 2, axis=0)
    assert w.colour_bar.levels() == pytest.approx((expect.min(), expect.max()), rel=1e-4)
    _assert_point_colours(w, expect)
    assert "residual at rank 3" in w.colour_bar.getAxis("left").labelText
    assert "Colour: residual at rank 3" in w.colour_bar.toolTip()
    state.set_decomposition(gray.replace(residual=None, exact=False))
    _flush(qtbot, w)
    assert w.colour_bar.levels() == pytest.approx((1, N))
    _assert_point_colours(w, np.arange(1, N + 1))
    assert w.colour_bar.getAxis("left").labelText.startswith("image number")


def test_weights_click_point_and_bars(qtbot, state, gray):
    w = WeightsView(state)
    qtbot.addWidget(w)
    pts = w.scatter.points()
    w._on_points_clicked(w.scatter, [pts[7]])
    assert state.selected == 7
    np.testing.assert_allclose(w.bars.opts["height"], gray.weights[:, 7])
    np.testing.assert_array_equal(w.bars.opts["x"], np.arange(1, K + 1))
    assert w.seq_line.value() == 8  # image number 8 = index 7
    sx, sy = w.sel_mark.getData()
    assert (sx[0], sy[0]) == pytest.approx((gray.weights[0, 7], gray.weights[1, 7]))
    # the bar range holds 0 and every bar, with a margin of 20% of the span on both sides
    lo, hi = w.bars_plot.viewRange()[1]
    h = gray.weights[:, 7]
    span = max(h.max(), 0) - min(h.min(), 0)
    assert lo == pytest.approx(min(h.min(), 0) - 0.2 * span)
    assert hi == pytest.approx(max(h.max(), 0) + 0.2 * span)


def _box_mask(d, a, b, rect):
    x, y = d.weights[a], d.weights[b]
    return ((x >= rect.left()) & (x <= rect.right()) & (y >= rect.top()) & (y <= rect.bottom()))


def test_weights_box_select(qtbot, state, gray):
    w = WeightsView(state)
    qtbot.addWidget(w)
    x, y = gray.weights[0], gray.weights[1]
    rect = QRectF(QPointF(np.quantile(x, 0.2), np.quantile(y, 0.1)),
                  QPointF(np.quantile(x, 0.9), np.quantile(y, 0.8)))
    chosen = w.select_box(rect)
    expect = tuple(np.flatnonzero(_box_mask(gray, 0, 1, rect)))
    assert 0 < len(expect) < N
    assert chosen == expect and state.selection_set == expect
    assert state.selected in expect
    mx, _ = w.set_marks.getData()
    np.testing.assert_allclose(np.sort(mx), np.sort(x[list(expect)]))


class _FakeDrag:
    """Just enough of pyqtgraph's MouseDragEvent for ViewBox.mouseDragEvent."""

    def __init__(self, start, end, finish, shift=True):
        self._start, self._end, self._finish, self._shift = start, end, finish, shift
        self.accepted = False

    def button(self):
        return Qt.MouseButton.LeftButton

    def modifiers(self):
        return (Qt.KeyboardModifier.ShiftModifier if self._shift
                else Qt.KeyboardModifier.NoModifier)

    def buttonDownPos(self, *_):
        return self._start

    def pos(self):
        return self._end

    def isFinish(self):
        return self._finish

    def isStart(self):
        return False

    def accept(self):
        self.accepted = True


def test_weights_shift_drag_selects_box(qtbot, state, gray):
    w = WeightsView(state)
    qtbot.addWidget(w)
    w.resize(800, 500)
    w.show()
    qtbot.waitExposed(w)
    vb = w.plane_vb
    x, y = gray.weights[0], gray.weights[1]
    p0 = QPointF(float(np.quantile(x, 0.1)), float(np.quantile(y, 0.3)))
    p1 = QPointF(float(np.quantile(x, 0.7)), float(np.quantile(y, 0.95)))
    start, end = vb.mapFromView(p0), vb.mapFromView(p1)
    vb.mouseDragEvent(_FakeDrag(start, end, finish=False))
    assert vb._band.isVisible()
    ev = _FakeDrag(start, end, finish=True)
    vb.mouseDragEvent(ev)
    assert ev.accepted and not vb._band.isVisible()
    rect = QRectF(vb.mapToView(start), vb.mapToView(end)).normalized()
    expect = tuple(np.flatnonzero(_box_mask(gray, 0, 1, rect)))
    assert len(expect) > 0 and state.selection_set == expect


def test_weights_sequence_click_and_line(qtbot, state):
    w = WeightsView(state)
    qtbot.addWidget(w)
    w.select_nearest(5.4)  # nearest image number 5 -> index 4
    assert state.selected == 4
    w.select_nearest(1000)
    assert state.selected == N - 1
    sel = _Counter(state.selectedChanged)
    w.seq_line.setValue(12.2)
    w.seq_line.sigPositionChangeFinished.emit(w.seq_line)
    assert state.selected == 11 and w.seq_line.value() == 12
    assert sel.n == 1
    state.set_selected(20)
    assert w.seq_line.value() == 21 and sel.n == 2


# ===== image list ==============================================================================
def _image_in_row(view, row: int) -> int:
    """The image (0-based) whose number the list shows in its row ``row``."""
    return int(view.proxy.index(row, COL_NUMBER).data()) - 1


def test_image_list_rows_filter_and_residual(qtbot, state, gray, files):
    v = ImageListView(state)
    qtbot.addWidget(v)
    assert v.model.rowCount() == N and v.proxy.rowCount() == N
    v.filter.setText("OTHER")
    names = [Path(p).name for p in files[1]]
    expect = sorted(i for i, name in enumerate(names) if "other" in name.lower())
    assert v.proxy.rowCount() == len(expect) > 0
    assert sorted(_image_in_row(v, r) for r in range(v.proxy.rowCount())) == expect
    assert v.count.text() == f"{len(expect)} of {N} images, residual at rank {state.rank}"
    v.filter.clear()
    assert v.proxy.rowCount() == N
    state.set_rank(2)
    res = gray.residual_at_rank(2)
    assert v.model.data(v.model.index(5, COL_RESIDUAL)) == f"{res[5]:.4g}"
    # sorting by residual gives numpy's argsort order
    v.table.sortByColumn(COL_RESIDUAL, Qt.SortOrder.AscendingOrder)
    order = [_image_in_row(v, r) for r in range(N)]
    np.testing.assert_array_equal(order, np.argsort(res, kind="stable"))


def test_image_list_selection_both_ways(qtbot, state):
    v = ImageListView(state)
    qtbot.addWidget(v)
    v.resize(500, 400)
    v.show()
    qtbot.waitExposed(v)
    sel = _Counter(state.selectedChanged)
    sets = _Counter(state.selectionSetChanged)
    v.table.selectRow(v.proxy_row(9))
    assert state.selected == 9
    assert sel.n == 1
    state.set_selected(17)
    assert _image_in_row(v, v.table.currentIndex().row()) == 17
    assert [_image_in_row(v, i.row()) for i in v.table.selectionModel().selectedRows()] == [17]
    assert sel.n == 2 and sets.n == 0  # no echo back into the state
    # a filtered list still maps rows correctly
    v.filter.setText("frame_02")
    assert v.proxy_row(17) == -1  # filtered out: nothing is shown selected
    assert v.table.selectionModel().selectedRows() == []
    state.set_selected(22)
    assert _image_in_row(v, v.table.currentIndex().row()) == 22
    # several rows picked in the table become the selection set
    v.filter.clear()
    sm = v.table.selectionModel()
    flags = QItemSelectionModel.SelectionFlag.Select | QItemSelectionModel.SelectionFlag.Rows
    sm.select(v.proxy.index(v.proxy_row(3), 0), flags)
    assert state.selection_set == (3, 22)
    # a selection set from another view selects those rows
    state.set_selection_set((1, 2, 5))
    got = sorted(_image_in_row(v, i.row()) for i in sm.selectedRows())
    assert got == [1, 2, 5]


def test_image_list_thumbnails_from_files_and_fallback(qtbot, gray, files):
    data, paths = files
    missing = list(paths)
    missing[1] = str(Path(paths[1]).with_name("gone.png"))
    d = gray.replace(paths=tuple(missing))
    st = AppState()
    st.set_decomposition(d)
    v = ImageListView(st)
    qtbot.addWidget(v)
    v.resize(500, 400)
    v.show()
    qtbot.waitExposed(v)
    m = v.model

    def ready(row):
        return m.data(m.index(row, COL_FILE), Qt.ItemDataRole.DecorationRole) is not None

    qtbot.waitUntil(lambda: ready(0) and ready(1), timeout=5000)
    icon = m.data(m.index(0, COL_FILE), Qt.ItemDataRole.DecorationRole)
    assert icon.availableSizes()[0].toTuple() == (COLS, ROWS)  # small images are not enlarged
    img = v.maker.thumbnail((paths[0], 0)).image
    src = np.asarray(Image.open(paths[0]))
    assert img.pixelColor(3, 2).red() == src[2, 3]
    thumb = v.maker.thumbnail((missing[1], 0))
    assert thumb.source == "reconstruction"
    assert "reconstruction" in m.data(m.index(1, COL_FILE), Qt.ItemDataRole.ToolTipRole)
    recon = np.clip(d.reconstruct(1, st.rank).reshape(ROWS, COLS), 0, 1) * 255
    fb = thumb.image
    assert abs(fb.pixelColor(5, 4).red() - recon[4, 5]) <= 1
    # only rows on screen ask for thumbnails
    visible = v.table.viewport().height() // v.table.verticalHeader().defaultSectionSize() + 2
    assert len(v.maker.cache) + v.maker.pending() <= visible < N
    v.close()


# ===== bursts of partial decompositions ==========================================================
@pytest.mark.parametrize("cls", [BasisGallery, SpectrumView, WeightsView, ImageListView])
def test_burst_of_partials_is_coalesced(qtbot, files, cls, monkeypatch):
    data, paths = files
    partials = [_svd_decomposition(data[:, :10 + i % 20], (ROWS, COLS, 1), K, paths[:10 + i % 20],
                                   residual=False, exact=False) for i in range(50)]
    redraws = _count_redraws(monkeypatch, cls)
    st = AppState()
    view = cls(st)
    qtbot.addWidget(view)
    view.show()
    before = len(redraws)
    t0 = time.perf_counter()
    for d in partials:
        st.set_decomposition(d)
        QApplication.processEvents()  # the event loop runs between blocks, as in a real run
    elapsed_ms = 1000 * (time.perf_counter() - t0)
    _flush(qtbot, view)
    n = len(redraws) - before
    # at most one redraw per REDRAW_MS interval (throttled), plus the trailing one
    assert 1 <= n <= 2 + elapsed_ms / view.REDRAW_MS
    assert n <= 10, (n, elapsed_ms)
    # a burst with no event processing in between costs exactly one redraw
    before = len(redraws)
    for d in partials[::-1]:
        st.set_decomposition(d)
    _flush(qtbot, view)
    assert len(redraws) - before == 1
    last = partials[0]
    if cls is WeightsView:
        np.testing.assert_allclose(view.scatter.getData()[0], last.weights[0])
    elif cls is SpectrumView:
        np.testing.assert_allclose(view.singular_curve.yData, last.singular_values)
    elif cls is ImageListView:
        assert view.model.rowCount() == last.n_images
        view.close()
    else:
        assert view.model.rowCount() == last.rank + 1


def test_views_follow_rank_changes_and_clear(qtbot, state, gray):
    views = [cls(state) for cls in (BasisGallery, SpectrumView, WeightsView, ImageListView)]
    for v in views:
        qtbot.addWidget(v)
    g, sp, w, lv = views
    state.set_focus_mode(2)
    state.set_decomposition(gray.truncated(5))  # fewer modes: rows removed, focus kept
    for v in views:
        _flush(qtbot, v)
    assert g.model.rowCount() == 6 and g.view.currentIndex().row() == 3
    assert len(sp.singular_curve.yData) == 5
    assert w.combo_a.count() == 5
    np.testing.assert_allclose(w.bars.opts["height"], gray.weights[:5, state.selected])
    # the residual at rank r <= 5 of the truncated copy equals the original's at rank r
    assert 1 <= state.rank <= 5
    expected = gray.residual_at_rank(state.rank)[3]
    cell = lv.model.index(3, COL_RESIDUAL)
    assert lv.model.data(cell) == f"{expected:.4g}"                 # the text shown
    np.testing.assert_allclose(lv.model.data(cell, SORT_ROLE), expected)   # the value sorted by
    state.set_decomposition(None)
    for v in views:
        _flush(qtbot, v)
    assert g.model.rowCount() == 0 and lv.model.rowCount() == 0
    assert sp.singular_curve.yData is None or len(sp.singular_curve.yData) == 0
    assert len(w.scatter.getData()[0]) == 0 and len(w.sel_mark.getData()[0]) == 0
    assert w.combo_a.count() == 0 and len(w.bars.opts["height"]) == 0
    assert lv.count.text() == "0 images"
    lv.close()


def test_spectrum_summary_states_the_certificate(qtbot, state, gray):
    # the Singular values view says whether every mode is certified (the model's bounds)
    sp = SpectrumView(state)
    qtbot.addWidget(sp)
    k = gray.rank
    certified = gray.replace(exact=True, residual=np.zeros(gray.n_images),
                             singular_value_error=np.full(k, 1e-9))
    state.set_decomposition(certified)
    qtbot.waitUntil(lambda: "certified" in sp.summary.text(), timeout=2000)
    assert "exact: every singular value is certified" in sp.summary.toolTip()
    loose = certified.replace(singular_value_error=np.r_[np.full(k - 2, 1e-9), 1.0, 1.0])
    state.set_decomposition(loose)
    qtbot.waitUntil(lambda: "2 modes not converged" in sp.summary.text(), timeout=2000)
    assert f"modes {k - 1}-{k}" in sp.summary.toolTip()


def test_hovering_a_point_of_the_weights_plane_names_the_image(qtbot, state, gray):
    view = WeightsView(state)
    qtbot.addWidget(view)
    assert view.scatter.opts["hoverable"] and view.scatter.opts["tip"] == view.point_tip
    a, b = state.modes
    tip = view.point_tip(x=1.25, y=-0.5, data=3)
    assert tip.splitlines() == [f"Image 4: {os.path.basename(gray.paths[3])}",
                                f"weight on basis image {a + 1}: 1.25",
                                f"weight on basis image {b + 1}: -0.5"]
    assert view.point_tip(x=0.0, y=0.0, data=gray.n_images) == ""


def test_spectrum_suggests_the_default_rank_first(qtbot, state, gray):
    # one rule: the pane's first suggestion is core's default rank (the workbench's start)
    from modescope.core.review.rank import default_rank
    sp = SpectrumView(state)
    qtbot.addWidget(sp)
    rank, _reason = default_rank(gray)
    qtbot.waitUntil(lambda: sp.energy_label.text() != "energy rank: -", timeout=2000)
    assert sp.energy_label.text() == f"energy rank: {rank}"
