"""Synced zoom and pan over the inspector's image, reconstruction and residual panes."""

from __future__ import annotations

import pytest
from PySide6.QtCore import QPoint, QPointF, QRectF, Qt
from PySide6.QtGui import QMouseEvent, QWheelEvent
from PySide6.QtWidgets import QApplication

from modescope.app.desktop.state import AppState
from modescope.app.desktop.views.image_panes import MAX_ZOOM, WHEEL_STEP, ImagePane, SharedView
from modescope.app.desktop.views.inspector import READING_NOTE, Inspector

ROWS, COLS = 20, 24           # the size of the gray_pngs images


@pytest.fixture
def shown(qtbot, gray_decomposition):
    state = AppState()
    view = Inspector(state)
    qtbot.addWidget(view)
    view.resize(900, 500)
    view.show()
    state.set_decomposition(gray_decomposition)
    state.set_selected(2)
    state.set_rank(2)
    qtbot.waitUntil(lambda: view.source_pane.note() != READING_NOTE, timeout=10000)
    return view, state


def _panes(view):
    return (view.source_pane, view.reconstruction_pane, view.residual_pane)


def _rect(r: QRectF) -> tuple[float, float, float, float]:
    return (r.x(), r.y(), r.width(), r.height())


def _wheel(pane, point: QPointF, notches: float) -> None:
    event = QWheelEvent(point, pane.mapToGlobal(point), QPoint(0, 0),
                        QPoint(0, int(round(120 * notches))), Qt.MouseButton.NoButton,
                        Qt.KeyboardModifier.NoModifier, Qt.ScrollPhase.NoScrollPhase, False)
    QApplication.sendEvent(pane, event)


def _mouse(pane, kind, point: QPointF, button, buttons) -> None:
    event = QMouseEvent(kind, point, pane.mapToGlobal(point), button, buttons,
                        Qt.KeyboardModifier.NoModifier)
    QApplication.sendEvent(pane, event)


def _widget_point(pane, ix: float, iy: float) -> QPointF:
    """The widget point where image point (ix, iy) is drawn."""
    rect, view = pane.image_rect(), pane.view_rect()
    return QPointF(rect.x() + (ix - view.x()) / view.width() * rect.width(),
                   rect.y() + (iy - view.y()) / view.height() * rect.height())


def _assert_same_everywhere(view, expected) -> None:
    assert _rect(view.view_window.view_rect()) == pytest.approx(expected)
    for pane in _panes(view):
        assert _rect(pane.view_rect()) == pytest.approx(expected), pane.title()


def test_starts_at_fit(shown):
    view, _ = shown
    _assert_same_everywhere(view, (0, 0, COLS, ROWS))
    assert view.view_window.zoom() == 1.0
    assert not view.fit_button.isEnabled()


def test_wheel_zooms_about_the_pointed_pixel_in_all_three_panes(shown):
    view, _ = shown
    pane = view.residual_pane
    ix, iy = 6.5, 4.5                    # the centre of pixel (row 4, column 6)
    point = _widget_point(pane, ix, iy)
    _wheel(pane, point, 2)               # two notches in
    zoom = WHEEL_STEP ** 2
    w, h = COLS / zoom, ROWS / zoom
    # the pointed image point stays under the mouse
    expected = (ix - ix / zoom, iy - iy / zoom, w, h)
    _assert_same_everywhere(view, expected)
    assert view.view_window.zoom() == pytest.approx(zoom)
    assert pane.pixel_at(point.x(), point.y()) == (4, 6)
    assert view.fit_button.isEnabled() and view.fit_button.text() == f"Fit ({zoom:.3g}×)"
    # a half notch out zooms by a fractional factor
    _wheel(view.source_pane, _widget_point(view.source_pane, ix, iy), -0.5)
    assert view.view_window.zoom() == pytest.approx(zoom / WHEEL_STEP ** 0.5)
    _assert_same_everywhere(view, _rect(view.source_pane.view_rect()))


def test_zoom_stays_between_fit_and_the_largest(shown):
    view, _ = shown
    pane = view.reconstruction_pane
    point = _widget_point(pane, 12, 10)
    _wheel(pane, point, 40)
    assert view.view_window.zoom() == pytest.approx(MAX_ZOOM)
    _assert_same_everywhere(view, _rect(pane.view_rect()))
    assert pane.view_rect().width() == pytest.approx(COLS / MAX_ZOOM)
    _wheel(pane, point, -80)
    assert view.view_window.zoom() == 1.0
    _assert_same_everywhere(view, (0, 0, COLS, ROWS))


def test_drag_pans_all_panes_and_stays_inside_the_image(shown):
    view, _ = shown
    pane = view.source_pane
    view.view_window.zoom_at(4.0, 12.0, 10.0)        # centred: (9, 7.5, 6, 5)
    _assert_same_everywhere(view, (9, 7.5, 6, 5))
    rect = pane.image_rect()
    per_pixel = rect.width() / 6                      # widget pixels per image pixel
    start = QPointF(rect.center())
    end = QPointF(start.x() + 2 * per_pixel, start.y() - 1 * per_pixel)
    left, none = Qt.MouseButton.LeftButton, Qt.MouseButton.NoButton
    _mouse(pane, QMouseEvent.Type.MouseButtonPress, start, left, left)
    _mouse(pane, QMouseEvent.Type.MouseMove, end, none, left)
    _mouse(pane, QMouseEvent.Type.MouseButtonRelease, end, left, none)
    # the picture follows the mouse: 2 pixels right and 1 up shows 2 further left, 1 lower
    _assert_same_everywhere(view, (7, 8.5, 6, 5))
    # a long drag stops at the image's corner
    _mouse(pane, QMouseEvent.Type.MouseButtonPress, start, left, left)
    _mouse(pane, QMouseEvent.Type.MouseMove, QPointF(start.x() + 50 * per_pixel,
                                                     start.y() + 50 * per_pixel), none, left)
    _mouse(pane, QMouseEvent.Type.MouseButtonRelease, start, left, none)
    _assert_same_everywhere(view, (0, 0, 6, 5))
    # moving without the button pans nothing
    _mouse(pane, QMouseEvent.Type.MouseMove, end, none, none)
    _assert_same_everywhere(view, (0, 0, 6, 5))


def test_double_click_and_fit_button_show_the_whole_image(shown):
    view, _ = shown
    view.view_window.zoom_at(3.0, 5.0, 5.0)
    pane = view.residual_pane
    point = QPointF(pane.image_rect().center())
    left = Qt.MouseButton.LeftButton
    _mouse(pane, QMouseEvent.Type.MouseButtonDblClick, point, left, left)
    _assert_same_everywhere(view, (0, 0, COLS, ROWS))
    view.view_window.zoom_at(3.0, 5.0, 5.0)
    assert view.fit_button.isEnabled()
    view.fit_button.click()
    _assert_same_everywhere(view, (0, 0, COLS, ROWS))
    assert not view.fit_button.isEnabled() and view.fit_button.text() == "Fit"


def test_pixel_readout_follows_zoom_and_pan(shown, gray_pngs):
    view, state = shown
    _, images = gray_pngs
    view.view_window.zoom_at(8.0, 0.0, 0.0)            # (0, 0, 3, 2.5)
    view.view_window.pan_by(10.0, 6.0)                 # (10, 6, 3, 2.5)
    _assert_same_everywhere(view, (10, 6, 3, 2.5))
    pane = view.reconstruction_pane
    rect = pane.image_rect()
    # the widget point a quarter across and four fifths down the drawn part
    x, y = rect.x() + 0.25 * rect.width(), rect.y() + 0.8 * rect.height()
    assert pane.pixel_at(x, y) == (int(6 + 0.8 * 2.5), int(10 + 0.25 * 3))   # (8, 10)
    # each drawn pixel is a large square now: its centre maps back to it in every pane
    for p in _panes(view):
        assert p.pixel_at(*_xy(_widget_point(p, 11.5, 7.5))) == (7, 11)
    point = _widget_point(pane, 12.2, 8.1)
    _mouse(pane, QMouseEvent.Type.MouseMove, point, Qt.MouseButton.NoButton,
           Qt.MouseButton.NoButton)
    value = float(images[2, 8, 12, 0])
    assert view.readout_label.text().startswith(f"Row 9, column 13: image {value:.3f},")
    assert pane.pixel_at(rect.x() - 1, rect.y()) == (-1, -1)


def _xy(point: QPointF) -> tuple[float, float]:
    return point.x(), point.y()


def test_zoom_kept_for_the_next_image_and_reset_for_a_new_size(shown, make_decomposition,
                                                                 gray_pngs):
    view, state = shown
    view.view_window.zoom_at(2.0, 0.0, 0.0)
    state.set_selected(3)
    _assert_same_everywhere(view, (0, 0, 12, 10))       # the same spot of the next image
    paths, images = gray_pngs
    smaller = make_decomposition(images[:, :10, :12], 3, paths,
                                 {"source_size": [10, 12], "color": "gray", "downscale": 1,
                                  "resize_mismatched": False})
    state.set_decomposition(smaller)
    assert _rect(view.view_window.view_rect()) == (0, 0, 12, 10)
    assert view.view_window.zoom() == 1.0


def test_shared_view_checks_its_input(qtbot):
    pane = ImagePane("x")
    qtbot.addWidget(pane)
    shared = SharedView([pane])
    with pytest.raises(TypeError, match="panes must be ImagePane"):
        SharedView([object()])
    with pytest.raises(ValueError, match="image size must not be negative"):
        shared.set_image_size(-1, 4)
    shared.set_image_size(8, 4)
    with pytest.raises(ValueError, match="factor must be a positive number"):
        shared.zoom_at(0.0, 1.0, 1.0)
    with pytest.raises(TypeError, match="rect must be a QRectF"):
        pane.set_view((0, 0, 1, 1))
    with pytest.raises(ValueError, match="positive width and height"):
        pane.set_view(QRectF(0, 0, 0, 1))
    shared.pan_by(3.0, 3.0)                              # at fit there is nothing to move
    assert _rect(shared.view_rect()) == (0, 0, 8, 4)
