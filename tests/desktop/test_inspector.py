"""The inspector: image, rank-r reconstruction, residual, rank slider, missing sources."""

from __future__ import annotations

import threading

import numpy as np
import pytest
from PySide6.QtCore import Qt

from modescope.app.desktop.imaging import array_to_qimage
from modescope.app.desktop.views.inspector import READING_NOTE, Inspector, RANK_DEBOUNCE_MS
from modescope.app.desktop.state import AppState
from modescope.core.engine import pipeline
from modescope.core.output.colormap import CENTRE_INDEX, DIVERGING_LUT
from modescope.core.output.metrics import quantize


@pytest.fixture
def state(qtbot):
    return AppState()


@pytest.fixture
def inspector(qtbot, state):
    view = Inspector(state)
    qtbot.addWidget(view)
    view.resize(900, 500)
    view.show()
    return view


def _settled(qtbot, view) -> None:
    """Wait until the image pane no longer says the selected image is being read."""
    qtbot.waitUntil(lambda: view.source_pane.note() != READING_NOTE, timeout=10000)


def _qimage_array(img) -> np.ndarray:
    """The pixels of a Grayscale8 QImage as (rows, cols) uint8, or of an RGB888 one as
    (rows, cols, 3)."""
    channels = 3 if img.format() == img.Format.Format_RGB888 else 1
    ptr = img.constBits()
    arr = np.frombuffer(ptr, dtype=np.uint8, count=img.sizeInBytes())
    arr = arr.reshape(img.height(), img.bytesPerLine())[:, :img.width() * channels].copy()
    return arr.reshape(img.height(), img.width(), channels) if channels == 3 else arr


def _assert_shows_gray(image, expected, atol) -> None:
    """``image`` (a pane's Grayscale8 QImage) shows ``expected`` (rows, cols) in [0, 1]:
    each 8-bit level is the rounding of a value within ``atol`` of the expected one."""
    shown = _qimage_array(image).astype(np.float64)
    target = np.clip(np.asarray(expected, dtype=np.float64) * 255.0, 0.0, 255.0)
    assert shown.shape == target.shape
    np.testing.assert_array_less(np.abs(shown - target), 0.5 + 255.0 * atol + 1e-9)


def _assert_shows_residual(image, residual, limit) -> None:
    """``image`` (the residual pane's QImage) shows ``residual`` (rows, cols) in the diverging
    colours with ``limit`` at both ends: each pixel is the table row of its value or a
    neighbour (float32 rounding may move a value across half a row)."""
    rows = (CENTRE_INDEX + np.rint(np.clip(residual / limit, -1, 1) * 127)).astype(int)
    shown = _qimage_array(image).astype(int)
    near = [np.abs(shown - DIVERGING_LUT[np.clip(rows + step, 0, 255)].astype(int)).max(axis=2)
            == 0 for step in (-1, 0, 1)]
    assert np.all(near[0] | near[1] | near[2])
    assert np.mean(near[1]) > 0.9                   # and nearly always the row itself


def test_empty_state_shows_hint(inspector):
    assert inspector.reconstruction_pane.image().isNull()
    assert "start an analysis" in inspector.source_pane.note()
    assert not inspector.rank_slider.isEnabled()


@pytest.mark.parametrize("index, rank", [(0, 1), (3, 2), (7, 5)])
def test_reconstruction_equals_core(qtbot, inspector, state, gray_decomposition, gray_pngs,
                                    index, rank):
    d = gray_decomposition
    state.set_decomposition(d)
    state.set_selected(index)
    state.set_rank(rank)
    _settled(qtbot, inspector)
    expected = d.reconstruct(index, rank).reshape(20, 24)
    # the pane shows the reconstruction in gray, clipped to [0, 1] and rounded to 8 bits; the
    # inspector updates incrementally (core.reconstruct): equal to float32 rounding
    _assert_shows_gray(inspector.reconstruction_pane.image(), expected, atol=1e-6)
    # and the same through the reference of the test matrix: mean + U_r (S V^T)_r (LAPACK SVD)
    _, images = gray_pngs
    x = images.reshape(8, -1).T.astype(np.float64)
    mean = x.mean(axis=1)
    u, s, vt = np.linalg.svd(x - mean[:, None], full_matrices=False)
    ref = mean + u[:, :rank] @ (s[:rank] * vt[:rank, index])
    _assert_shows_gray(inspector.reconstruction_pane.image(), ref.reshape(20, 24), atol=2e-5)
    # the source is the PNG content read by Pillow (gray_pngs): the very same 8-bit levels
    np.testing.assert_array_equal(_qimage_array(inspector.source_pane.image()),
                                  np.rint(images[index, :, :, 0] * 255))
    # the residual is their difference, at both ends of the legend its largest magnitude
    residual = images[index, :, :, 0] - expected
    limit = inspector.legend.limit()
    assert limit == pytest.approx(float(np.max(np.abs(residual))), abs=1e-6)
    _assert_shows_residual(inspector.residual_pane.image(), residual, limit)


def test_slider_repaints_without_new_svd(qtbot, inspector, state, gray_decomposition,
                                         monkeypatch):
    d = gray_decomposition
    state.set_decomposition(d)
    state.set_selected(2)
    state.set_rank(5)
    calls = []

    def forbidden(*args, **kwargs):
        calls.append(args)
        raise AssertionError("no SVD may be computed when the rank changes")

    monkeypatch.setattr(pipeline, "analyze", forbidden)
    monkeypatch.setattr(np.linalg, "svd", forbidden)
    import scipy.linalg
    import scipy.sparse.linalg
    monkeypatch.setattr(scipy.linalg, "svd", forbidden)
    monkeypatch.setattr(scipy.sparse.linalg, "svds", forbidden)
    before_image = inspector.reconstruction_pane.image().copy()
    paints = []
    monkeypatch.setattr(inspector, "refresh", lambda f=inspector.refresh: paints.append(1) or f())
    inspector.rank_slider.setValue(2)
    assert state.rank == 5                    # debounced: not yet
    qtbot.waitUntil(lambda: state.rank == 2, timeout=2000)
    assert not calls
    assert paints                             # the view was redrawn
    assert inspector.reconstruction_pane.image() != before_image
    _assert_shows_gray(inspector.reconstruction_pane.image(), d.reconstruct(2, 2).reshape(20, 24),
                       atol=1e-6)
    assert "rank 2" in inspector.reconstruction_pane.title()


def test_slider_drag_is_debounced(qtbot, inspector, state, gray_decomposition):
    state.set_decomposition(gray_decomposition)
    state.set_rank(5)
    seen = []
    state.rankChanged.connect(seen.append)
    for value in (4, 3, 2, 1):                 # quicker than the debounce interval
        inspector.rank_slider.setValue(value)
    qtbot.wait(RANK_DEBOUNCE_MS * 6)
    assert seen == [1]
    assert inspector.rank_label.text() == "Rank 1 of 5"


def test_state_rank_moves_slider(inspector, state, gray_decomposition):
    state.set_decomposition(gray_decomposition)
    state.set_rank(3)
    assert inspector.rank_slider.value() == 3
    assert inspector.rank_slider.maximum() == gray_decomposition.rank


def test_energy_and_residual_text(inspector, state, gray_decomposition):
    d = gray_decomposition
    state.set_decomposition(d)
    state.set_selected(4)
    state.set_rank(2)
    # energy share from the reference SVD values: (s1^2 + s2^2) / ||C||_F^2
    s = d.singular_values
    share = (s[0] ** 2 + s[1] ** 2) / d.total_energy
    assert f"{100 * share:.1f} %" in inspector.energy_label.text()
    res = d.residual_at_rank(2)[4]
    assert f"{res:.4g}" in inspector.residual_label.text()


def test_residual_legend_shows_range(qtbot, inspector, state, gray_decomposition):
    state.set_decomposition(gray_decomposition)
    state.set_selected(1)
    state.set_rank(1)
    _settled(qtbot, inspector)
    d = gray_decomposition
    # reference: the file's pixels minus core's rank-1 reconstruction
    residual = (pipeline.load_analysis_image(d, 1)[:, :, 0]
                - d.reconstruct(1, 1).reshape(20, 24))
    limit = float(np.max(np.abs(residual)))
    assert inspector.legend.limit() == pytest.approx(limit, abs=1e-6)
    limit = inspector.legend.limit()
    left, mid, right = inspector.legend.labels()
    assert right == f"+{limit:.3g}" and mid == "0" and left.endswith(f"{limit:.3g}")
    _assert_shows_residual(inspector.residual_pane.image(), residual, limit)


def test_missing_source_still_shows_reconstruction(qtbot, inspector, state,
                                                   gray_decomposition, tmp_path):
    d = gray_decomposition
    moved = list(d.paths)
    moved[0] = str(tmp_path / "gone" / "img_00.png")
    state.set_decomposition(d.replace(paths=tuple(moved)))
    state.set_selected(0)
    _settled(qtbot, inspector)
    assert inspector.source_pane.image().isNull()
    note = inspector.source_pane.note()
    assert "missing" in note and "img_00.png" in note
    assert not inspector.reconstruction_pane.image().isNull()
    assert inspector.residual_pane.image().isNull()
    assert inspector.residual_pane.note() == "No residual without the source image."
    assert inspector.legend.limit() is None


def test_source_cached_while_selected(qtbot, state, gray_decomposition):
    calls = []

    def loader(decomposition, index):
        calls.append(index)
        return pipeline.load_analysis_image(decomposition, index)

    view = Inspector(state, load_image=loader)
    qtbot.addWidget(view)
    state.set_decomposition(gray_decomposition)
    state.set_selected(3)
    _settled(qtbot, view)
    for r in (1, 2, 3, 4):
        state.set_rank(r)
    state.set_decomposition(gray_decomposition.replace())   # e.g. a new snapshot, same image
    _settled(qtbot, view)
    assert calls.count(3) == 1
    state.set_selected(4)
    _settled(qtbot, view)
    assert calls.count(4) == 1


def test_arrow_keys_step_image_and_rank(qtbot, inspector, state, gray_decomposition):
    state.set_decomposition(gray_decomposition)
    state.set_selected(2)
    state.set_rank(3)
    inspector.setFocus()
    qtbot.keyClick(inspector, Qt.Key.Key_Right)
    assert state.selected == 3
    qtbot.keyClick(inspector, Qt.Key.Key_Left)
    qtbot.keyClick(inspector, Qt.Key.Key_Left)
    assert state.selected == 1
    qtbot.keyClick(inspector, Qt.Key.Key_Up)
    assert state.rank == 4
    qtbot.keyClick(inspector, Qt.Key.Key_Down)
    qtbot.keyClick(inspector, Qt.Key.Key_Down)
    assert state.rank == 2


def test_rgb_images_in_colour(qtbot, state, tmp_path, make_decomposition):
    from PIL import Image

    rng = np.random.default_rng(5)
    imgs = rng.integers(0, 256, size=(6, 10, 12, 3), dtype=np.uint8)
    paths = []
    for i, im in enumerate(imgs):
        p = tmp_path / f"c{i}.png"
        Image.fromarray(im).save(p)
        paths.append(str(p))
    meta = {"source_size": [10, 12], "color": "rgb", "downscale": 1}
    d = make_decomposition(imgs.astype(np.float32) / 255.0, 3, paths, meta)
    view = Inspector(state)
    qtbot.addWidget(view)
    state.set_decomposition(d)
    state.set_selected(5)
    _settled(qtbot, view)
    assert view.source_pane.image() == array_to_qimage(imgs[5])
    assert "channel mean" in view.residual_pane.title()


def test_to_uint8_rounds_clips_and_handles_non_finite_values():
    from modescope.app.desktop.imaging import to_uint8
    rng = np.random.default_rng(2)
    x = rng.random((7, 9, 3)) * 1.4 - 0.2                      # float64, some out of [0, 1]
    x[0, :5, 0] = (np.arange(5) + 0.5) / 255                  # halfway between two levels
    # reference: round-half-even of 255 x, clipped (written out independently) ...
    expected = np.clip(np.round(x * 255), 0, 255).astype(np.uint8)
    # ... which is core's rule for the exported files
    np.testing.assert_array_equal(quantize(x, 8), expected)
    out = to_uint8(x)
    assert out.dtype == np.uint8 and out.flags.c_contiguous
    np.testing.assert_array_equal(out, expected)
    np.testing.assert_array_equal(to_uint8(x[:, ::2]), expected[:, ::2])      # strided input
    bad = np.array([[np.nan, np.inf, -np.inf, 0.5]], dtype=np.float32)
    np.testing.assert_array_equal(to_uint8(bad), [[0, 255, 0, 128]])
    np.testing.assert_array_equal(to_uint8(np.array([[True, False]])), [[255, 0]])
    u = rng.integers(0, 256, (4, 4), dtype=np.uint8)
    assert to_uint8(u) is not None and np.array_equal(to_uint8(u), u)


def test_empty_inspector_tells_when_an_analysis_is_running(qtbot):
    state = AppState()
    ins = Inspector(state)
    qtbot.addWidget(ins)
    assert ins.source_pane.note().startswith("Add images in the Sources pane")
    ins.set_running(True)
    assert ins.source_pane.note().startswith("Analysis running")
    assert ins.title_label.text() == "Analysis starting…"
    ins.set_running(False)
    assert ins.source_pane.note().startswith("Add images in the Sources pane")


def test_source_is_read_off_the_gui_thread_and_shown_when_it_arrives(qtbot, state,
                                                                     gray_decomposition):
    gate = threading.Event()
    where = []

    def loader(decomposition, index):
        where.append(threading.current_thread() is threading.main_thread())
        gate.wait(5)
        return pipeline.load_analysis_image(decomposition, index)

    view = Inspector(state, load_image=loader)
    qtbot.addWidget(view)
    state.set_decomposition(gray_decomposition)
    state.set_selected(2)
    # the GUI thread did not wait: the reconstruction is shown, the image is being read
    assert view.source_pane.image().isNull()
    assert view.source_pane.note() == READING_NOTE
    assert not view.reconstruction_pane.image().isNull()
    with qtbot.waitSignal(view.sourceReady, timeout=10000) as blocker:
        gate.set()
    assert blocker.args == [2]
    assert where and not any(where)
    assert view.source_pane.image() == array_to_qimage(
        pipeline.load_analysis_image(gray_decomposition, 2))
    assert view.source_pane.note() == "" and not view.residual_pane.image().isNull()
    assert view.shutdown(5000)


def test_read_of_a_superseded_selection_is_ignored(qtbot, state, gray_decomposition):
    gates = {i: threading.Event() for i in range(8)}
    started = {i: threading.Event() for i in range(8)}
    gates[0].set()                         # the first image selected is read at once

    def loader(decomposition, index):
        started[index].set()
        gates[index].wait(5)
        return np.full(decomposition.image_shape, index / 10.0, dtype=np.float32)

    view = Inspector(state, load_image=loader)
    qtbot.addWidget(view)
    ready = []
    view.sourceReady.connect(ready.append)
    state.set_decomposition(gray_decomposition)
    state.set_selected(3)
    assert started[3].wait(5)              # image 3 is being read ...
    state.set_selected(4)                  # ... when the user moves on to image 4
    gates[4].set()
    qtbot.waitUntil(lambda: ready == [4], timeout=10000)
    np.testing.assert_array_equal(_qimage_array(view.source_pane.image()),
                                  np.full((20, 24), 102))          # 0.4 of 255: image 4's
    gates[3].set()                         # the late read of image 3 arrives: dropped
    assert view.shutdown(5000)
    qtbot.wait(30)
    assert ready == [4]
    np.testing.assert_array_equal(_qimage_array(view.source_pane.image()),
                                  np.full((20, 24), 102))          # 0.4 of 255: image 4's
    assert "Image 5 of" in view.title_label.text()


def test_read_failure_is_a_message(qtbot, state, gray_decomposition):
    def loader(decomposition, index):
        raise OSError(5, "Input/output error", "/mnt/lost/img.png")

    view = Inspector(state, load_image=loader)
    qtbot.addWidget(view)
    state.set_decomposition(gray_decomposition)
    state.set_selected(1)
    _settled(qtbot, view)
    assert view.source_pane.note() == ("Source image not available: A file could not be read "
                                       "(/mnt/lost/img.png): Input/output error")
    assert view.source_pane.image().isNull()
    assert view.residual_pane.note() == "No residual without the source image."
