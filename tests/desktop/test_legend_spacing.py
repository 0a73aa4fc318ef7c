"""The residual's colour legend keeps a gap below the residual image in every arrangement."""

from __future__ import annotations

import pytest
from PySide6.QtGui import QImage
from PySide6.QtWidgets import QLabel

from modescope.app.desktop.views.image_panes import ColorLegend, ImagePane, PaneArea


@pytest.mark.parametrize("size, columns", [((1200, 380), 3), ((660, 640), 2),
                                           ((760, 470), 2)])
def test_legend_stands_clear_of_the_residual_image(qtbot, size, columns):
    panes = tuple(ImagePane(t) for t in ("Image", "Reconstruction", "Residual"))
    image = QImage(128, 96, QImage.Format.Format_Grayscale8)
    image.fill(128)
    for pane in panes:
        pane.set_image(image)
    legend = ColorLegend()
    area = PaneArea(panes, legend, QLabel("info"))
    qtbot.addWidget(area)
    area.resize(*size)
    area.show()
    qtbot.waitExposed(area)
    area.rearrange()
    assert area.columns == columns
    residual = panes[2]
    image_bottom = residual.y() + residual.image_rect().bottom()
    pane_bottom = residual.geometry().y() + residual.height()
    assert image_bottom <= pane_bottom
    # the legend starts LEGEND_GAP pixels below the residual pane (6 px)
    assert legend.y() - pane_bottom == PaneArea.LEGEND_GAP == 6
    assert legend.height() == legend.minimumHeight()
    assert legend.y() + legend.height() <= area.height()
