"""A window that shows one basis image (or the mean image) large, with its numbers."""

from __future__ import annotations

import numpy as np
from PySide6.QtCore import Qt
from PySide6.QtGui import QPixmap
from PySide6.QtWidgets import QDialog, QLabel, QScrollArea, QVBoxLayout, QWidget

from modescope.app.desktop.imaging import array_to_qimage
from modescope.core.decomposition import Decomposition
from modescope.core.output.images import basis_image_rgb, mean_image

__all__ = ["EnlargedImage", "enlarged_pixels"]

#: The enlarged image is scaled by a whole factor up to about this many pixels on its long side.
TARGET_SIDE = 640


def enlarged_pixels(decomposition: Decomposition, mode: int) -> tuple[np.ndarray, int]:
    """Return the pixels of basis image ``mode`` (-1: the mean) and the whole zoom factor.

    The colours are core's (the exported PNGs'); each pixel becomes a ``factor`` x ``factor``
    block (no smoothing, so single pixels stay visible).
    """
    if mode < 0:
        image = mean_image(decomposition)
        image = image[:, :, 0] if image.shape[2] == 1 else image
    else:
        image = basis_image_rgb(decomposition, mode)[0]
    factor = max(1, TARGET_SIDE // max(image.shape[:2]))
    if factor > 1:
        image = np.repeat(np.repeat(image, factor, axis=0), factor, axis=1)
    return image, factor


class EnlargedImage(QDialog):
    """Show basis image ``mode`` (-1: the mean) of ``decomposition`` large.

    Parameters
    ----------
    decomposition : Decomposition
    mode : int
        0-based basis image, or -1 for the mean image.
    parent : QWidget, optional
    """

    def __init__(self, decomposition: Decomposition, mode: int,
                 parent: QWidget | None = None):
        super().__init__(parent)
        pixels, factor = enlarged_pixels(decomposition, mode)
        rows, cols = decomposition.image_shape[:2]
        if mode < 0:
            title = "Mean image"
            caption = f"Mean image of {decomposition.n_images:,} images, {rows} × {cols} pixels"
        else:
            share = float(decomposition.energy_shares()[mode])
            title = f"Basis image {mode + 1}"
            caption = (f"Basis image {mode + 1}: singular value "
                       f"{decomposition.singular_values[mode]:.4g}, {100 * share:.2f} % of the "
                       f"energy; {rows} × {cols} pixels"
                       + (f", shown {factor}× larger" if factor > 1 else ""))
        self.setWindowTitle(f"Modescope — {title}")
        self.image = array_to_qimage(pixels)
        self.image_label = QLabel(self)
        self.image_label.setPixmap(QPixmap.fromImage(self.image))
        self.image_label.setAlignment(Qt.AlignmentFlag.AlignCenter)
        scroll = QScrollArea(self)
        scroll.setWidget(self.image_label)
        scroll.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.caption = QLabel(caption, self)
        self.caption.setWordWrap(True)
        layout = QVBoxLayout(self)
        layout.addWidget(scroll, 1)
        layout.addWidget(self.caption)
        self.resize(min(pixels.shape[1] + 60, 900), min(pixels.shape[0] + 100, 800))
