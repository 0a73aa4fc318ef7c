"""The outlier view and the review workflow: table, Q/T² plot, level, marks, exports, refit.

Reference values: the table is compared with ``core.outliers.score_table`` and, independently of
the project, with Q, T² and the limits recomputed here from numpy.linalg.svd (LAPACK) of the
images and scipy.stats (Hotelling's T² Beta limit of Tracy, Young and Mason 1992; Jackson and
Mudholkar's 1979 Q limit from the LAPACK eigenvalues).
"""

from __future__ import annotations

import csv
import os

import numpy as np
import pytest
from PySide6.QtCore import QItemSelectionModel, QPointF, Qt
from PySide6.QtWidgets import QFileDialog, QMessageBox
from scipy import stats

from modescope.app.desktop.main_window import MainWindow
from modescope.app.desktop.views.outliers import (CAUTION_TEXT, WAITING_TEXT, OutlierView,
                                                  stored_options_of)
from modescope.app.desktop.views.outliers_model import (COL_FILE, COL_MARK, COL_Q, COL_SCORE,
                                                        COL_T2, SORT_ROLE)
from modescope.app.desktop.settings import StoredOptions
from modescope.app.desktop.state import AppState
from modescope.core.output import model_file
from modescope.core.review import marks as review
from modescope.core.review.outliers import score_table

ROWS, COLS, N, K = 12, 16, 30, 6
BAD = (4, 17, 25)          # planted bad frames


def _images(seed: int = 5) -> np.ndarray:
    """(N, ROWS, COLS, 1) smooth patterns with random weights, noise, and three bad frames."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:ROWS, 0:COLS] / np.array([ROWS, COLS])[:, None, None]
    patterns = [np.sin(2 * np.pi * xx), np.cos(3 * np.pi * yy), xx * yy - 0.25]
    imgs = []
    for _ in range(N):
        w = rng.normal(size=3) * (0.2, 0.1, 0.05)
        imgs.append(0.5 + sum(a * p for a, p in zip(w, patterns))
                    + 0.01 * rng.normal(size=(ROWS, COLS)))
    imgs = np.stack(imgs)
    imgs[BAD[0], 3:8, 4:9] += 0.6           # a bright blob
    imgs[BAD[1]] = 0.3 * imgs[BAD[1]] + 0.6  # over-exposed, washed out
    imgs[BAD[2], :, ::2] = 0.0              # stripes
    return np.clip(imgs, 0, 1)[..., None].astype(np.float32)


@pytest.fixture
def images():
    return _images()


@pytest.fixture
def dec(make_decomposition, images, tmp_path):
    paths = []
    for i in range(N):
        p = tmp_path / f"frame_{i:02d}.png"
        p.write_bytes(b"")       # the view never reads the files; exports only list them
        paths.append(str(p))
    return make_decomposition(images, K, paths)


@pytest.fixture
def view(qtbot, state):
    v = OutlierView(state)
    qtbot.addWidget(v)
    v.resize(1100, 520)
    v.show()
    qtbot.waitExposed(v)
    return v


@pytest.fixture
def window(qtbot, ini_settings):
    """A main window, shut down at the end (its analysis thread must not outlive it)."""
    w = MainWindow(ini_settings, confirm_dialogs=False)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    yield w
    w.close()


class _Counter:
    def __init__(self, signal):
        self.n = 0
        signal.connect(self)

    def __call__(self, *args):
        self.n += 1


def _column(v: OutlierView, col: int) -> np.ndarray:
    return np.array([v.proxy.index(r, col).data(SORT_ROLE) for r in range(v.proxy.rowCount())])


def _reference(images: np.ndarray, r: int, level: float):
    """Q, T² and both limits at rank r from numpy.linalg.svd and scipy.stats."""
    x = images.reshape(N, -1).T.astype(np.float64)
    c = x - x.mean(axis=1, keepdims=True)
    u, s, _ = np.linalg.svd(c, full_matrices=False)
    w = u[:, :r].T @ c
    q = np.sum((c - u[:, :r] @ w) ** 2, axis=0)
    lam = s[:r] ** 2 / (N - 1)
    t2 = np.sum(w ** 2 / lam[:, None], axis=0)
    # Tracy, Young and Mason (1992): (n-1)^2/n * Beta_level(r/2, (n-r-1)/2)
    t2_limit = (N - 1) ** 2 / N * stats.beta.ppf(level, r / 2, (N - r - 1) / 2)
    # Jackson and Mudholkar (1979) from every LAPACK eigenvalue left out at rank r
    lam = s[r:] ** 2 / (N - 1)
    theta1, theta2, theta3 = (float(np.sum(lam ** i)) for i in (1, 2, 3))
    h0 = 1 - 2 * theta1 * theta3 / (3 * theta2 ** 2)
    q_limit = theta1 * (stats.norm.ppf(level) * np.sqrt(2 * theta2 * h0 ** 2) / theta1 + 1
                        + theta2 * h0 * (h0 - 1) / theta1 ** 2) ** (1 / h0)
    return q, t2, q_limit, t2_limit


# ===== table ===================================================================================
def test_table_rows_and_values_equal_score_table(view, state, dec, images):
    t = score_table(dec, state.rank, state.level)
    assert view.stack.currentWidget() is view.content
    np.testing.assert_array_equal(view.shown_images(), t.order)
    np.testing.assert_array_equal(_column(view, COL_SCORE), t.score[t.order])
    np.testing.assert_array_equal(_column(view, COL_Q), t.q[t.order])
    np.testing.assert_array_equal(_column(view, COL_T2), t.t2[t.order])
    # independent of the project: numpy SVD + scipy.stats
    q, t2, q_limit, t2_limit = _reference(images, state.rank, state.level)
    np.testing.assert_allclose(_column(view, COL_Q), q[t.order], rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(_column(view, COL_T2), t2[t.order], rtol=1e-6)
    # the SVD is truncated at K < N - 1: eigenvalues r+1..K known, the modes beyond K estimated
    # from the residuals; 1 % covers that estimate (0.1 % here)
    assert t.limits.q_method == "jackson-mudholkar-estimated-tail"
    assert view.scores.limits.q_limit == pytest.approx(q_limit, rel=0.01)
    assert view.scores.limits.t2_limit == pytest.approx(t2_limit, rel=1e-9)
    # the planted bad frames are the top of the table and flagged
    assert set(view.shown_images()[:3]) == set(BAD)
    top = view.proxy.index(0, 0)
    assert view.proxy.index(0, COL_SCORE).data() == f"{t.score[t.order[0]]:.3g}"
    assert view.proxy.index(0, COL_Q).data() == f"{t.q[t.order[0]]:.4g}"
    assert view.proxy.index(0, 5).data() != ""                       # beyond some limit
    assert top.data(Qt.ItemDataRole.BackgroundRole) is not None      # flagged rows tinted
    assert view.proxy.index(0, COL_FILE).data() == f"frame_{t.order[0]:02d}.png"
    # the limits in the column titles, the methods and the caution
    header = view.proxy.headerData(COL_Q, Qt.Orientation.Horizontal)
    assert header == f"Q\nlimit {t.limits.q_limit:.4g}"
    assert f"{t.limits.t2_limit:.4g}" in view.proxy.headerData(COL_T2, Qt.Orientation.Horizontal)
    assert "Q limit" in view.limits_label.text()
    assert "(Jackson-Mudholkar, tail estimated)" in view.limits_label.text()
    assert "(Beta)" in view.limits_label.text()
    assert t.limits.q_reason in view.limits_label.toolTip()
    assert "beyond 6, which the model does not hold" in view.limits_label.toolTip()
    assert view.caution.text() == CAUTION_TEXT and view.caution.isVisible()
    assert "not a verdict" in CAUTION_TEXT
    assert f"{t.n_flagged} flagged at rank {state.rank}" in view.summary.text()


def test_sorting_by_a_column_is_numpy_order(view, dec, state):
    t = score_table(dec, state.rank, state.level)
    view.table.sortByColumn(COL_T2, Qt.SortOrder.AscendingOrder)
    np.testing.assert_array_equal(view.shown_images(), np.argsort(t.t2, kind="stable"))
    view.table.sortByColumn(COL_Q, Qt.SortOrder.DescendingOrder)
    np.testing.assert_array_equal(view.shown_images(), np.argsort(-t.q, kind="stable"))
    view.table.sortByColumn(0, Qt.SortOrder.AscendingOrder)
    np.testing.assert_array_equal(view.shown_images(), np.arange(N))
    # the selection follows the sort
    state.set_selected(12)
    view.table.sortByColumn(COL_SCORE, Qt.SortOrder.DescendingOrder)
    assert view.image_at(view.table.currentIndex().row()) == 12
    rows = view.table.selectionModel().selectedRows()
    assert [view.image_at(i.row()) for i in rows] == [12]


def test_note_label_shows_the_limits_note(qtbot, make_decomposition, images):
    # a full decomposition (K = N - 1) leaves no residual variance: the note says why
    s = AppState()
    s.set_decomposition(make_decomposition(images, N - 1))
    s.set_rank(N - 1)
    v = OutlierView(s)
    qtbot.addWidget(v)
    v.show()
    v.flush()
    note = score_table(s.decomposition, N - 1, 0.99).limits.note
    assert note and note in v.note_label.text() and not v.note_label.isHidden()
    assert note in v.limits_label.toolTip()


# ===== plot ====================================================================================
def test_plot_points_and_limit_lines(view, dec, state):
    t = score_table(dec, state.rank, state.level)
    assert view.log_axes.isChecked()
    x, y = view.plot_values()
    np.testing.assert_allclose(x, t.t2, rtol=1e-12)
    np.testing.assert_allclose(y, t.q, rtol=1e-12)
    t2_at, q_at = view.limit_positions()
    assert t2_at == pytest.approx(t.limits.t2_limit, rel=1e-12)
    assert q_at == pytest.approx(t.limits.q_limit, rel=1e-12)
    assert view.q_line.isVisible() and view.t2_line.isVisible()
    assert view.q_line.angle == 0 and view.t2_line.angle == 90
    assert view.q_line.label.toPlainText() == f"Q limit {t.limits.q_limit:.4g}"
    assert view.t2_line.label.toPlainText() == f"T² limit {t.limits.t2_limit:.4g}"
    assert "Jackson-Mudholkar, tail estimated" in view.q_line.label.toolTip()
    assert "99 %" in view.q_line.label.toolTip()
    assert "Beta" in view.t2_line.label.toolTip()
    # linear axes: the raw values
    view.log_axes.setChecked(False)
    x, y = view.scatter.getData()
    np.testing.assert_array_equal(x, t.t2)
    np.testing.assert_array_equal(y, t.q)
    assert view.q_line.value() == t.limits.q_limit
    assert view.t2_line.value() == t.limits.t2_limit


def test_point_click_selects_image(qtbot, view, state):
    view.log_axes.setChecked(False)
    view.plot.getViewBox().autoRange(padding=0.1)
    qtbot.wait(50)
    i = BAD[1]
    x, y = view.scatter.getData()
    scene_pos = view.plot.getViewBox().mapViewToScene(QPointF(float(x[i]), float(y[i])))
    pos = view.plot_widget.mapFromScene(scene_pos)
    qtbot.mouseClick(view.plot_widget.viewport(), Qt.MouseButton.LeftButton, pos=pos)
    assert state.selected == i
    sx, sy = view.sel_mark.getData()
    assert (sx[0], sy[0]) == (x[i], y[i])
    assert view.image_at(view.table.currentIndex().row()) == i


# ===== recomputation ===========================================================================
def test_rank_and_level_changes_recompute(qtbot, view, state, dec, images):
    state.set_rank(2)
    qtbot.waitUntil(lambda: view.scores is not None and view.scores.rank == 2, timeout=2000)
    t = score_table(dec, 2, 0.99)
    np.testing.assert_array_equal(view.shown_images(), t.order)
    np.testing.assert_array_equal(_column(view, COL_Q), t.q[t.order])
    q, t2, *_ = _reference(images, 2, 0.99)
    np.testing.assert_allclose(view.plot_values()[1], q, rtol=1e-6, atol=1e-9)
    # the spin box writes the level; the limits follow
    assert view.level_spin.value() == 99.0
    view.level_spin.setValue(95.0)
    assert state.level == pytest.approx(0.95)
    qtbot.waitUntil(lambda: view.scores.level == pytest.approx(0.95), timeout=2000)
    t95 = score_table(dec, 2, 0.95)
    assert view.scores.limits.q_limit == pytest.approx(t95.limits.q_limit, rel=1e-12)
    assert view.limit_positions()[0] == pytest.approx(t95.limits.t2_limit, rel=1e-12)
    assert view.scores.n_flagged == t95.n_flagged >= t.n_flagged
    # the state's level reaches the spin box without an echo
    levels = _Counter(state.levelChanged)
    state.set_level(0.9)
    assert view.level_spin.value() == 90.0 and levels.n == 1


def test_burst_is_merged_into_one_recomputation(qtbot, view, state):
    # every recomputation puts new scores into the table model: one reset each
    resets = _Counter(view.model.modelReset)
    for r in (1, 2, 3, 4, 5, 3):
        state.set_rank(r)
    state.set_level(0.97)
    assert resets.n == 0                        # nothing yet: throttled
    qtbot.waitUntil(lambda: not view._timer.isActive(), timeout=2000)
    assert resets.n == 1
    assert (view.scores.rank, view.scores.level) == (3, 0.97)


def test_partial_decomposition_shows_waiting_note(qtbot, view, state, dec):
    state.set_decomposition(dec.replace(residual=None, exact=False))
    view.flush()
    assert view.stack.currentWidget() is view.waiting_label
    assert "scores appear when the analysis finishes" in view.waiting_label.text()
    assert view.waiting_label.text() == WAITING_TEXT
    assert view.scores is None and view.model.rowCount() == 0
    assert not view.exclude_action.isEnabled() and not view.refit_action.isEnabled()
    assert view.scatter.getData()[0].size == 0
    state.set_decomposition(dec)
    view.flush()
    assert view.stack.currentWidget() is view.content
    assert view.model.rowCount() == N


# ===== selection ===============================================================================
def test_row_click_selects_and_state_selects_row_without_echo(qtbot, view, state):
    sel = _Counter(state.selectedChanged)
    sets = _Counter(state.selectionSetChanged)
    row = 3
    image = view.image_at(row)
    rect = view.table.visualRect(view.proxy.index(row, COL_FILE))
    qtbot.mouseClick(view.table.viewport(), Qt.MouseButton.LeftButton, pos=rect.center())
    assert state.selected == image
    assert sel.n == 1
    state.set_selected(20)
    assert view.image_at(view.table.currentIndex().row()) == 20
    assert [view.image_at(i.row()) for i in view.table.selectionModel().selectedRows()] == [20]
    assert sel.n == 2 and sets.n == 0          # no echo back into the state
    # several rows -> the selection set
    sm = view.table.selectionModel()
    flags = QItemSelectionModel.SelectionFlag.Select | QItemSelectionModel.SelectionFlag.Rows
    sm.select(view.proxy.index(view.proxy_row(7), 0), flags)
    assert state.selection_set == (7, 20)
    # a selection set from another view selects those rows
    state.set_selection_set((1, 2, 5))
    assert sorted(view.image_at(i.row()) for i in sm.selectedRows()) == [1, 2, 5]
    sx, _ = view.set_marks_item.getData()
    assert sx.size == 3


# ===== review marks ============================================================================
def test_mark_buttons_set_marks_and_advance(qtbot, view, state):
    order = view.shown_images()
    state.set_selected(int(order[0]))
    qtbot.mouseClick(view.exclude_button, Qt.MouseButton.LeftButton)
    assert state.decomposition.marks[order[0]] == review.EXCLUDE
    assert state.selected == order[1]                       # moved to the next row
    qtbot.mouseClick(view.keep_button, Qt.MouseButton.LeftButton)
    assert state.decomposition.marks[order[1]] == review.KEEP
    assert view.proxy.index(1, COL_MARK).data() == "keep"
    assert view.proxy.index(0, COL_MARK).data() == "exclude"
    # a set of images at once
    state.set_selection_set(order[5:8])
    view.exclude_action.trigger()
    np.testing.assert_array_equal(state.decomposition.marks[order[5:8]], review.EXCLUDE)
    state.set_selected(int(order[6]))            # in the set: the set is still the target
    view.clear_action.trigger()
    np.testing.assert_array_equal(state.decomposition.marks[order[5:8]], review.NOT_REVIEWED)
    assert "1 excluded, 1 kept" in view.marks_label.text()
    expected = np.zeros(N, dtype=np.int8)
    expected[order[0]], expected[order[1]] = review.EXCLUDE, review.KEEP
    np.testing.assert_array_equal(state.decomposition.marks, expected)
    assert view.refit_action.isEnabled()


def test_keyboard_shortcuts_mark(qtbot, view, state):
    view.activateWindow()
    view.table.setFocus()
    state.set_selected(3)
    qtbot.keyClick(view.table, Qt.Key.Key_X)
    assert state.decomposition.marks[3] == review.EXCLUDE
    state.set_selected(3)
    qtbot.keyClick(view.table, Qt.Key.Key_U)
    assert state.decomposition.marks[3] == review.NOT_REVIEWED
    state.set_selected(3)
    qtbot.keyClick(view.table, Qt.Key.Key_K)
    assert state.decomposition.marks[3] == review.KEEP


def test_filter_modes(view, state, dec):
    t = score_table(dec, state.rank, state.level)
    state.set_marks([BAD[0], 9], review.EXCLUDE)
    state.set_marks([2], review.KEEP)
    combo = view.filter_combo
    combo.setCurrentIndex(combo.findData("flagged"))
    np.testing.assert_array_equal(view.shown_images(), t.order[t.flag[t.order]])
    combo.setCurrentIndex(combo.findData("excluded"))
    np.testing.assert_array_equal(view.shown_images(),
                                  [i for i in t.order if i in (BAD[0], 9)])
    combo.setCurrentIndex(combo.findData("not reviewed"))
    assert set(view.shown_images()) == set(range(N)) - {BAD[0], 9, 2}
    state.set_marks([5], review.KEEP)            # marks reach a filtered table at once
    assert 5 not in set(view.shown_images())
    combo.setCurrentIndex(combo.findData("all"))
    assert view.proxy.rowCount() == N


def test_marks_survive_save_and_load(view, state, tmp_path):
    state.set_marks([1, 4], review.EXCLUDE)
    state.set_marks([7], review.KEEP)
    path = model_file.save_model(tmp_path / "marked.npz", state.decomposition)
    loaded = model_file.load_model(path)
    np.testing.assert_array_equal(loaded.marks, state.decomposition.marks)
    assert review.excluded_indices(loaded).tolist() == [1, 4]


def test_marks_survive_window_save_and_open(qtbot, window, dec, tmp_path):
    w = window
    w.state.set_decomposition(dec)
    v = w.views["outliersDock"]
    v.flush()
    w.state.set_selected(6)
    w.activateWindow()
    qtbot.waitActive(w)
    w.inspector.setFocus()
    qtbot.keyClick(w.inspector, Qt.Key.Key_X)          # window-level shortcut, dock behind a tab
    assert w.state.decomposition.marks[6] == review.EXCLUDE
    w.state.set_selected(11)
    v.keep_action.trigger()
    saved = w.save_analysis(str(tmp_path / "reviewed.npz"))
    assert saved is not None
    w.state.set_decomposition(None)
    assert w.open_analysis(str(saved))
    marks = w.state.decomposition.marks
    assert marks[6] == review.EXCLUDE and marks[11] == review.KEEP
    assert np.count_nonzero(marks) == 2
    v.flush()
    assert v.proxy.index(v.proxy_row(6), COL_MARK).data() == "exclude"
    # the review actions are in the Review menu and their keys do not clash
    review_items = [a.text() for a in w.review_menu.actions() if a.text()]
    assert {"Keep", "Exclude", "Clear mark", "Refit without excluded…"} <= set(review_items)
    keys = [s.toString() for a in w.actions() for s in a.shortcuts() if not s.isEmpty()]
    assert len(keys) == len(set(keys)), keys
    assert {"K", "X", "U"} <= set(keys)


# ===== exports =================================================================================
def _answer(monkeypatch, yes: bool):
    asked = []

    def question(*args, **kwargs):
        asked.append(args[2] if len(args) > 2 else "")
        return QMessageBox.StandardButton.Yes if yes else QMessageBox.StandardButton.Cancel
    monkeypatch.setattr(QMessageBox, "question", staticmethod(question))
    return asked


def _save_as(monkeypatch, path):
    monkeypatch.setattr(QFileDialog, "getSaveFileName",
                        staticmethod(lambda *a, **k: (str(path), "")))


def test_export_csv_and_path_list(qtbot, view, state, dec, tmp_path, monkeypatch):
    t = score_table(dec, state.rank, state.level)
    state.set_marks([BAD[1], 3, 12], review.EXCLUDE)
    out = tmp_path / "out"
    out.mkdir()
    _save_as(monkeypatch, out / "excluded.csv")
    written = view.export_list("excluded", "csv")
    assert written == str(out / "excluded.csv")
    with open(written, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert tuple(rows[0].keys()) == review.CSV_COLUMNS
    order = [i for i in t.order if i in (BAD[1], 3, 12)]     # most unusual first
    assert [r["path"] for r in rows] == [dec.paths[i] for i in order]
    np.testing.assert_array_equal([float(r["q"]) for r in rows], t.q[order])
    np.testing.assert_array_equal([float(r["t2"]) for r in rows], t.t2[order])
    assert {float(r["q_limit"]) for r in rows} == {t.limits.q_limit}
    assert [int(r["mark"]) for r in rows] == [review.EXCLUDE] * 3
    # flagged, as a list of paths (no suffix given: .txt added)
    _save_as(monkeypatch, out / "flagged")
    written = view.export_list("flagged", "paths")
    lines = (out / "flagged.txt").read_text(encoding="utf-8").splitlines()
    assert lines == [dec.paths[i] for i in t.flagged_indices()]
    assert written == str(out / "flagged.txt")


def test_export_never_overwrites_silently(qtbot, view, state, tmp_path, monkeypatch):
    state.set_marks([2], review.EXCLUDE)
    target = tmp_path / "list.txt"
    target.write_text("keep me\n", encoding="utf-8")
    _save_as(monkeypatch, target)
    asked = _answer(monkeypatch, yes=False)
    assert view.export_list("excluded", "paths") is None
    assert target.read_text(encoding="utf-8") == "keep me\n"
    assert asked and str(target) in asked[0]
    _answer(monkeypatch, yes=True)
    assert view.export_list("excluded", "paths") == str(target)
    assert target.read_text(encoding="utf-8").splitlines() == [state.decomposition.paths[2]]


def test_export_error_names_the_file(qtbot, view, state, tmp_path, monkeypatch):
    state.set_marks([2], review.EXCLUDE)
    bad = tmp_path / "no_such_folder" / "excluded.csv"
    _save_as(monkeypatch, bad)
    assert view.export_list("excluded", "csv") is None
    assert view.message_box is not None and view.message_box.isVisible()
    assert str(bad) in view.message_box.text()
    view.message_box.close()
    assert not bad.exists()
    # nothing excluded: a message, no dialog
    state.set_marks([2], review.NOT_REVIEWED)
    monkeypatch.setattr(QFileDialog, "getSaveFileName",
                        staticmethod(lambda *a, **k: pytest.fail("no dialog expected")))
    assert view.export_list("excluded", "csv") is None
    assert "No image is excluded" in view.message_box.text()
    view.message_box.close()


# ===== refit ===================================================================================
def test_stored_options_of_metadata(dec):
    d = dec.replace(metadata={"options": {"rank": 7, "color": "rgb", "downscale": 2,
                                          "recursive": True, "resize_mismatched": True,
                                          "block_size": 32, "unknown": 1}})
    assert stored_options_of(d) == StoredOptions(rank=7, color="rgb", downscale=2,
                                                 recursive=True, resize_mismatched=True)
    assert stored_options_of(dec) == StoredOptions(rank=20)
    with pytest.raises(TypeError, match="options"):
        stored_options_of(dec.replace(metadata={"options": [1, 2]}))


def test_refit_request_lists_remaining_files(qtbot, view, state, dec, monkeypatch):
    assert not view.refit_action.isEnabled()                     # nothing excluded yet
    state.set_marks([0, 5, BAD[2]], review.EXCLUDE)
    assert view.refit_action.isEnabled()
    _answer(monkeypatch, yes=False)
    with qtbot.assertNotEmitted(view.refitRequested):
        assert view.refit() is False
    _answer(monkeypatch, yes=True)
    with qtbot.waitSignal(view.refitRequested, timeout=1000) as blocker:
        assert view.refit() is True
    images, options = blocker.args
    assert images == [(dec.paths[i], 0) for i in range(N) if i not in (0, 5, BAD[2])]
    assert options == StoredOptions()


TIMEOUT = 60000


def test_refit_without_excluded_runs_on_the_rest(qtbot, window, small_collection, monkeypatch):
    w = window
    with qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT):
        assert w.start_analysis([str(small_collection)], StoredOptions(rank=4))
    first = w.state.decomposition
    assert first.n_images == 40 and first.exact
    v = w.views["outliersDock"]
    v.flush()
    excluded = [int(i) for i in v.shown_images()[:3]]           # the top three by score
    w.state.set_selection_set(excluded)
    v.exclude_action.trigger()
    assert review.excluded_indices(w.state.decomposition).tolist() == sorted(excluded)
    remaining = {p for i, p in enumerate(first.paths) if i not in excluded}
    _answer(monkeypatch, yes=True)
    with qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT) as blocker:
        v.refit_action.trigger()
    new = blocker.args[0].decomposition
    assert new.n_images == 40 - 3
    assert set(new.paths) == remaining
    # a refit is a variant of the collection: the Sources list keeps the folder
    assert w.ingest.sources() == [os.path.abspath(str(small_collection))]
    assert w.state.decomposition is new
    assert new.metadata["options"]["rank"] == 4                  # same options as before
    v.flush()
    assert v.model.rowCount() == 37
    assert not np.any(new.marks)


def test_refit_leaves_out_single_pages_of_a_multi_page_file(qtbot, window, tmp_path,
                                                            monkeypatch):
    from PIL import Image
    from modescope.core import demo
    w = window
    folder = tmp_path / "mixed"
    demo.write_collection(folder, 12, size=(24, 32), seed=5, fmt="png")
    frames = [Image.fromarray(demo.render_frame(i, n_frames=12, size=(24, 32), seed=9))
              for i in range(4)]
    stack = folder / "zz_stack.tif"
    frames[0].save(stack, save_all=True, append_images=frames[1:])
    with qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT):
        assert w.start_analysis([str(folder)], StoredOptions(rank=3))
    first = w.state.decomposition
    assert first.n_images == 16
    pages = [i for i, p in enumerate(first.paths) if p.endswith("zz_stack.tif")]
    assert [int(first.pages[i]) for i in pages] == [0, 1, 2, 3]
    w.state.set_marks([pages[1], pages[2]], review.EXCLUDE)     # two pages of four
    _answer(monkeypatch, yes=True)
    v = w.views["outliersDock"]
    v.flush()                                    # scores of the finished analysis are shown
    with qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT) as blocker:
        assert v.refit() is True
    new = blocker.args[0].decomposition
    assert new.n_images == 14
    kept = [(p, int(g)) for p, g in zip(new.paths, new.pages) if p.endswith("zz_stack.tif")]
    assert [g for _, g in kept] == [0, 3]
    assert w.ingest.sources() == [os.path.abspath(str(folder))]
