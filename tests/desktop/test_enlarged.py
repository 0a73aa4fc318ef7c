"""Double-click a basis image to see it large (colours as in the exported PNGs)."""

from __future__ import annotations

import numpy as np

import pytest

from modescope.app.desktop.dialogs.enlarged import TARGET_SIDE, enlarged_pixels
from modescope.app.desktop.state import AppState
from modescope.app.desktop.views.gallery import BasisGallery
from modescope.core.output.images import basis_image_rgb


@pytest.fixture
def gray(gray_decomposition):
    return gray_decomposition


@pytest.fixture
def state(gray):
    s = AppState()
    s.set_decomposition(gray)
    return s


def _pixels(img) -> np.ndarray:
    arr = np.frombuffer(img.constBits(), dtype=np.uint8, count=img.sizeInBytes())
    channels = 3 if img.format() == img.Format.Format_RGB888 else 1
    arr = arr.reshape(img.height(), img.bytesPerLine())[:, :img.width() * channels]
    return arr.reshape(img.height(), img.width(), channels) if channels == 3 else arr


def test_double_click_opens_the_basis_image_large(qtbot, state, gray):
    gallery = BasisGallery(state)
    qtbot.addWidget(gallery)
    gallery.show()
    qtbot.waitUntil(lambda: gallery.model.rowCount() > 2, timeout=3000)
    index = gallery.model.index(2)                      # row 2 = basis image 2
    gallery.view.doubleClicked.emit(index)
    windows = [w for w in gallery.children() if w.__class__.__name__ == "EnlargedImage"]
    assert len(windows) == 1
    window = windows[0]
    qtbot.addWidget(window)
    assert window.windowTitle().endswith("Basis image 2")
    assert "singular value" in window.caption.text()
    shown = _pixels(window.image)
    pixmap = window.image_label.pixmap()
    assert (pixmap.height(), pixmap.width()) == shown.shape[:2]
    expected, factor = enlarged_pixels(gray, 1)
    assert factor == max(1, TARGET_SIDE // max(gray.image_shape[:2]))
    # every block of factor x factor screen pixels is one pixel of the exported basis PNG
    np.testing.assert_array_equal(shown[::factor, ::factor], basis_image_rgb(gray, 1)[0])
    window.close()
