"""The near-duplicates view: planted copies are listed, selection, trimming, partial results.

Reference: the groups expected are the connected components of the pairs of images whose pixel
distance (scipy.spatial.distance.pdist on the raw images) is within the tolerance of the RMS
centred image norm, computed here independently of the project.
"""

from __future__ import annotations

import numpy as np
import pytest
from PySide6.QtCore import Qt
from PySide6.QtWidgets import QMessageBox
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial.distance import pdist, squareform

from modescope.app.desktop.views.duplicates import (DEFAULT_TOLERANCE, KIND_ROLE, TOLERANCE_TIP,
                                           DuplicatesView)
from modescope.core.review import marks as review

N, K = 16, 6
COPIES = {7: 2, 11: 2, 13: 5}          # image -> the image it copies


def _images() -> np.ndarray:
    rng = np.random.default_rng(21)
    imgs = rng.random((N, 10, 12, 1)).astype(np.float32)
    for copy, original in COPIES.items():
        imgs[copy] = imgs[original]
    imgs[14] = np.clip(imgs[3] + 0.002, 0, 1)        # nearly a copy of image 3
    return imgs


@pytest.fixture
def images():
    return _images()


@pytest.fixture
def dec(make_decomposition, images):
    return make_decomposition(images, K, [f"/data/tray/frame_{i:02d}.png" for i in range(N)])


@pytest.fixture
def view(qtbot, state, images):
    # the images as the analysis read them (the paths are invented, so no file is read)
    v = DuplicatesView(state, load_image=lambda decomposition, i: images[i])
    qtbot.addWidget(v)
    v.resize(420, 500)
    v.show()
    qtbot.waitExposed(v)
    yield v
    v.shutdown()


def _groups(view):
    """The group rows of the tree, top to bottom."""
    return [view.tree.topLevelItem(i) for i in range(view.tree.topLevelItemCount())]


def _find(qtbot, view, tolerance=None):
    if tolerance is not None:
        view.tolerance_spin.setValue(tolerance)
    with qtbot.waitSignal(view.reportReady, timeout=10000) as blocker:
        assert view.find()
    return blocker.args[0]


def _pixel_groups(images: np.ndarray, tolerance: float) -> list[tuple[int, ...]]:
    """Groups of images within tolerance * RMS centred norm in pixel distance (scipy)."""
    x = images.reshape(len(images), -1).astype(np.float64)
    c = x - x.mean(axis=0)
    rms = np.sqrt(np.sum(c ** 2) / len(images))
    dist = squareform(pdist(x))
    i, j = np.nonzero(np.triu(dist <= (tolerance + 1e-6) * rms, k=1))
    graph = coo_matrix((np.ones(i.size), (i, j)), shape=(len(images),) * 2)
    _, labels = connected_components(graph, directed=False)
    groups = [tuple(np.flatnonzero(labels == lab).tolist()) for lab in np.unique(labels)]
    return sorted((g for g in groups if len(g) > 1), key=lambda g: (-len(g), g[0]))


def _tree_groups(view) -> list[tuple[int, ...]]:
    out = []
    for item in _groups(view):
        out.append(tuple(item.child(k).data(0, KIND_ROLE)[1] for k in range(item.childCount())))
    return out


def test_planted_duplicates_are_listed(qtbot, view, images):
    assert view.tolerance_spin.value() == DEFAULT_TOLERANCE == 0.01
    assert "fraction of the RMS image norm" in view.tolerance_spin.toolTip() == TOLERANCE_TIP
    report = _find(qtbot, view)
    expected = _pixel_groups(images, DEFAULT_TOLERANCE)
    assert expected == [(2, 7, 11), (3, 14), (5, 13)]        # the planted copies
    assert [g.indices for g in report.groups] == expected
    assert _tree_groups(view) == expected
    x = images.reshape(N, -1).astype(np.float64)
    limit = (DEFAULT_TOLERANCE + 1e-6) * report.rms_norm
    for g in report.groups:                                   # every pair within (numpy)
        assert all(np.linalg.norm(x[i] - x[j]) <= limit for i in g.indices for j in g.indices)
    first = _groups(view)[0]
    share = f"{100 * report.groups[0].max_distance_fraction:.2f} %"
    assert first.text(0) == f"1. 3 images, up to {share}"
    second = _groups(view)[1]
    assert second.text(0).endswith(f"{100 * report.groups[1].max_distance_fraction:.2f} %")
    assert first.child(1).text(0) == "8  frame_07.png"
    # exact copies are at distance 0; the near copy is within the tolerance but not 0
    assert report.groups[0].max_distance_fraction == pytest.approx(0.0, abs=1e-6)
    assert 0 < report.groups[1].max_distance_fraction <= DEFAULT_TOLERANCE
    assert "3 group(s) holding 7 images" in view.status.text()
    # at tolerance 0 only the exact copies remain
    report = _find(qtbot, view, 0.0)
    assert [g.indices for g in report.groups] == _pixel_groups(images, 0.0) == [(2, 7, 11),
                                                                              (5, 13)]


def test_clicks_select_images_and_groups(qtbot, view, state):
    _find(qtbot, view)
    group = _groups(view)[0]
    child = group.child(2)                                     # image 11
    rect = view.tree.visualItemRect(child)
    qtbot.mouseClick(view.tree.viewport(), Qt.MouseButton.LeftButton, pos=rect.center())
    assert state.selected == 11
    assert view.select_group_action.isEnabled()
    assert view.select_current_group() == (2, 7, 11)
    assert state.selection_set == (2, 7, 11)
    # clicking a group picks its images
    second = _groups(view)[2]
    qtbot.mouseClick(view.tree.viewport(), Qt.MouseButton.LeftButton,
                     pos=view.tree.visualItemRect(second).center())
    assert state.selection_set == (5, 13)
    assert state.selected == 5


def test_state_selection_moves_the_tree_without_echo(qtbot, view, state):
    _find(qtbot, view)
    changes = []
    state.selectedChanged.connect(changes.append)
    sets = []
    state.selectionSetChanged.connect(sets.append)
    state.set_selected(13)
    item = view.tree.currentItem()
    assert item.data(0, KIND_ROLE) == ("image", 13)
    assert changes == [13] and sets == []
    state.set_selected(0)                                      # in no group
    assert view.tree.currentItem() is None
    assert changes == [13, 0] and sets == []


def test_exclude_all_but_first(qtbot, view, state, monkeypatch):
    _find(qtbot, view)
    answers = [QMessageBox.StandardButton.Cancel]
    monkeypatch.setattr(QMessageBox, "question",
                        staticmethod(lambda *a, **k: answers[0]))
    assert view.exclude_all_but_first() == []
    assert not np.any(state.decomposition.marks)
    answers[0] = QMessageBox.StandardButton.Yes
    marked = view.exclude_all_but_first()
    assert marked == [7, 11, 13, 14]
    expected = np.zeros(N, dtype=np.int8)
    expected[[7, 11, 13, 14]] = review.EXCLUDE
    np.testing.assert_array_equal(state.decomposition.marks, expected)
    # the tree shows the marks; the groups stay
    first = _groups(view)[0]
    assert [first.child(k).text(1) for k in range(3)] == ["", "exclude", "exclude"]
    assert view.report is not None and len(view.report.groups) == 3


def test_partial_result_waits_and_new_analysis_clears(qtbot, view, state, dec):
    _find(qtbot, view)
    assert view.tree.topLevelItemCount() == 3
    state.set_decomposition(dec.replace(residual=None, exact=False))
    assert view.tree.topLevelItemCount() == 0 and view.report is None
    assert "when the analysis finishes" in view.status.text()
    assert not view.find_button.isEnabled() and view.find() is False
    state.set_decomposition(dec)
    assert view.find_button.isEnabled()
    assert "press Find" in view.status.text()


def test_result_of_a_replaced_analysis_is_dropped(qtbot, view, state, dec, make_decomposition):
    other = make_decomposition(np.random.default_rng(2).random((N, 10, 12, 1)), K)
    reports = []
    view.reportReady.connect(reports.append)
    assert view.find()
    assert view.is_running() and not view.find_button.isEnabled()
    state.set_decomposition(other)          # before the search result arrives
    assert not view.is_running()            # the old search no longer counts
    assert view.shutdown() is True          # and has ended in its thread
    qtbot.wait(50)                          # its queued result, if any, is dropped
    assert reports == []
    assert view.report is None and view.tree.topLevelItemCount() == 0
    # a search of the new analysis works
    report = _find(qtbot, view)
    assert view.report is report and reports == [report]


def test_search_failure_is_a_message(qtbot, view, monkeypatch):
    import modescope.app.desktop.views.duplicates as dup

    def broken(decomposition, tolerance, rank, **options):
        raise MemoryError()

    monkeypatch.setattr(dup, "find_duplicates", broken)
    with qtbot.waitSignal(view._search.failed, timeout=10000):
        assert view.find()
    assert view.status.text() == ("Near-duplicates could not be found: there is not enough "
                                  "memory.")
    assert view.report is None and view.find_button.isEnabled()


def test_search_runs_off_the_gui_thread(qtbot, view, monkeypatch):
    import threading

    import modescope.app.desktop.views.duplicates as dup

    where = []
    real = dup.find_duplicates

    def recording(*args, **options):
        where.append(threading.current_thread() is threading.main_thread())
        return real(*args, **options)

    monkeypatch.setattr(dup, "find_duplicates", recording)
    _find(qtbot, view)
    assert where == [False]


def test_group_strip_shows_thumbnails_and_differences(qtbot, view, state, images):
    report = _find(qtbot, view)
    # before any image is picked the strip shows the first group
    assert [t.index for t in view.strip.tiles] == [2, 7, 11]
    assert [t.caption.text() for t in view.strip.tiles] == ["image 3\nfirst",
                                                            "image 8\nΔ 0.00 %",
                                                            "image 12\nΔ 0.00 %"]
    state.set_selected(14)                                     # the near copy of image 3
    tiles = view.strip.tiles
    assert [t.index for t in tiles] == [3, 14]
    x = images.reshape(N, -1).astype(np.float64)
    true = np.linalg.norm(x[14] - x[3]) / report.rms_norm     # numpy
    shown = float(tiles[1].caption.text().split()[-2])
    assert shown == pytest.approx(100 * true, abs=0.006)
    assert "image 15: /data/tray/frame_14.png" in tiles[1].toolTip()
    # the files do not exist: the pictures come from the images as the analysis read them
    qtbot.waitUntil(lambda: all(t.picture.pixmap() is not None
                                and not t.picture.pixmap().isNull() for t in tiles),
                    timeout=10000)
    size = tiles[0].picture.pixmap().size()                    # 12 x 10 enlarged to fit 96
    assert (size.width(), size.height()) == (96, 80)
    state.set_selected(0)                                      # in no group
    assert view.strip.tiles == []


def test_pairs_left_out_when_images_cannot_be_read(qtbot, state, dec):
    from modescope.core.errors import ModescopeError

    def unreadable(decomposition, i):
        raise ModescopeError(f"image {i}: missing")
    v = DuplicatesView(state, load_image=unreadable)
    qtbot.addWidget(v)
    try:
        with qtbot.waitSignal(v.reportReady, timeout=10000) as blocker:
            assert v.find()
        report = blocker.args[0]
        # the truncated model's residuals leave every planted pair undecided
        assert report.groups == () and report.n_unsure >= 4
    finally:
        v.shutdown()
