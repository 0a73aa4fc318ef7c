"""Looking closely in the inspector: contrast stretch and the pixel readout."""

from __future__ import annotations

import numpy as np
import pytest
from PySide6.QtCore import QPointF, Qt
from PySide6.QtGui import QMouseEvent
from PySide6.QtWidgets import QApplication

from modescope.app.desktop.state import AppState
from modescope.app.desktop.views.inspector import HOVER_HINT, READING_NOTE, Inspector
from modescope.core.output.images import contrast_limits, stretch
from modescope.core.output.metrics import quantize


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


def _pixels(img) -> np.ndarray:
    arr = np.frombuffer(img.constBits(), dtype=np.uint8, count=img.sizeInBytes())
    return arr.reshape(img.height(), img.bytesPerLine())[:, :img.width()].copy()


def test_core_contrast_rule():
    # the 1% and 99% quantiles of the values (numpy.quantile), mapped to 0 and 1
    values = np.linspace(0.2, 0.4, 1001)
    lo, hi = contrast_limits(values)
    assert (lo, hi) == pytest.approx(tuple(np.quantile(values, [0.01, 0.99])))
    out = stretch(values, (lo, hi))
    assert out.min() == 0.0 and out.max() == 1.0
    assert contrast_limits(np.full(10, 0.5)) == pytest.approx((0.5 - 0.5 / 255, 0.5 + 0.5 / 255))
    with pytest.raises(ValueError, match="low must be below high"):
        contrast_limits(values, 0.9, 0.1)


def test_stretch_spreads_a_dark_image_and_keeps_both_panes_comparable(shown, gray_pngs):
    view, state = shown
    _, images = gray_pngs
    source = images[2, :, :, 0]
    plain = _pixels(view.source_pane.image())
    np.testing.assert_array_equal(plain, quantize(source))
    view.stretch_box.setChecked(True)
    stretched = _pixels(view.source_pane.image())
    limits = contrast_limits(source)
    np.testing.assert_array_equal(stretched, quantize(stretch(source, limits)))
    assert int(stretched.max()) - int(stretched.min()) > int(plain.max()) - int(plain.min())
    # the reconstruction uses the image's range (comparable panes)
    recon = state.decomposition.reconstruct(2, 2).reshape(source.shape)
    np.testing.assert_array_equal(_pixels(view.reconstruction_pane.image()),
                                  quantize(stretch(recon, limits)))
    view.stretch_box.setChecked(False)
    np.testing.assert_array_equal(_pixels(view.source_pane.image()), plain)


def test_pixel_readout_names_image_reconstruction_and_residual(shown, gray_pngs, qtbot):
    view, state = shown
    _, images = gray_pngs
    pane = view.reconstruction_pane
    rect = pane.image_rect()
    row, col = 5, 7
    h, w = pane.image().height(), pane.image().width()
    point = QPointF(rect.x() + (col + 0.5) * rect.width() / w,
                    rect.y() + (row + 0.5) * rect.height() / h)
    assert pane.pixel_at(point.x(), point.y()) == (row, col)
    event = QMouseEvent(QMouseEvent.Type.MouseMove, point, pane.mapToGlobal(point),
                        Qt.MouseButton.NoButton, Qt.MouseButton.NoButton,
                        Qt.KeyboardModifier.NoModifier)
    QApplication.sendEvent(pane, event)
    text = view.readout_label.text()
    d = state.decomposition
    recon = float(d.reconstruct(2, 2).reshape(images.shape[1:3])[row, col])
    value = float(images[2, row, col, 0])
    assert text == (f"Row {row + 1}, column {col + 1}: image {value:.3f}, reconstruction "
                    f"{recon:.3f}, residual {value - recon:+.3f}")
    pane.hovered.emit(-1, -1)
    assert view.readout_label.text() == HOVER_HINT
