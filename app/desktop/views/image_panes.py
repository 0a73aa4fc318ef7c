"""The inspector's picture parts: an image pane, the residual legend and their layout.

:class:`ImagePane` paints one QImage scaled to fit with a caption and an optional note;
:class:`ColorLegend` is the strip of the diverging colour map with its value range;
:class:`PaneArea` lays three panes, the legend and the info text out so that the images are as
large as the area allows.
"""

from __future__ import annotations

from PySide6.QtCore import QRectF, QSize, Qt, Signal
from PySide6.QtGui import QColor, QImage, QPainter, QPalette
from PySide6.QtWidgets import QSizePolicy, QWidget

from modescope.app.desktop.imaging import colorbar_qimage

__all__ = ["ImagePane", "ColorLegend", "PaneArea"]


class ImagePane(QWidget):
    """Paint one QImage scaled to fit with its aspect ratio kept, or a note when there is none.

    Parameters
    ----------
    title : str
        Caption drawn above the image.
    parent : QWidget, optional
    """

    #: The pixel under the mouse as (row, column) of the image shown; (-1, -1) when none.
    hovered = Signal(int, int)

    def __init__(self, title: str = "", parent: QWidget | None = None):
        super().__init__(parent)
        self.setMouseTracking(True)
        self._title = title
        self._image = QImage()
        self._note = ""
        self.setMinimumSize(96, 96)
        self.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Expanding)

    def sizeHint(self) -> QSize:  # noqa: N802 - Qt name
        return QSize(220, 200)

    def title(self) -> str:
        """Return the caption."""
        return self._title

    def set_title(self, title: str) -> None:
        """Change the caption."""
        if title != self._title:
            self._title = title
            self.update()

    def image(self) -> QImage:
        """Return the image shown (a null QImage when none)."""
        return self._image

    def note(self) -> str:
        """Return the note shown instead of (or over) the image."""
        return self._note

    def set_image(self, image: QImage | None, note: str = "") -> None:
        """Show ``image`` (None for none) and an optional note."""
        if image is not None and image is self._image and note == self._note:
            return                      # the same picture: no repaint (rank steps keep the source)
        self._image = image if image is not None else QImage()
        self._note = note
        self.update()

    def image_rect(self) -> QRectF:
        """Return where the image is drawn, in widget coordinates."""
        fm = self.fontMetrics()
        top = fm.height() + 4
        area = QRectF(0, top, self.width(), max(1, self.height() - top))
        if self._image.isNull():
            return area
        iw, ih = self._image.width(), self._image.height()
        scale = min(area.width() / iw, area.height() / ih)
        w, h = iw * scale, ih * scale
        return QRectF(area.x() + (area.width() - w) / 2, area.y() + (area.height() - h) / 2, w, h)

    def pixel_at(self, x: float, y: float) -> tuple[int, int]:
        """Return the (row, column) of the image pixel at widget point (x, y); (-1, -1) outside."""
        rect = self.image_rect()
        if self._image.isNull() or not rect.contains(x, y) or rect.width() <= 0:
            return (-1, -1)
        col = int((x - rect.x()) / rect.width() * self._image.width())
        row = int((y - rect.y()) / rect.height() * self._image.height())
        return (min(row, self._image.height() - 1), min(col, self._image.width() - 1))

    def mouseMoveEvent(self, event) -> None:  # noqa: N802 - Qt name
        pos = event.position()
        self.hovered.emit(*self.pixel_at(pos.x(), pos.y()))
        super().mouseMoveEvent(event)

    def leaveEvent(self, event) -> None:  # noqa: N802 - Qt name
        self.hovered.emit(-1, -1)
        super().leaveEvent(event)

    def paintEvent(self, event) -> None:  # noqa: N802 - Qt name
        p = QPainter(self)
        try:
            pal = self.palette()
            fm = self.fontMetrics()
            p.setPen(pal.color(QPalette.ColorRole.WindowText))
            title = fm.elidedText(self._title, Qt.TextElideMode.ElideRight, self.width())
            p.drawText(QRectF(0, 0, self.width(), fm.height() + 2),
                       Qt.AlignmentFlag.AlignHCenter | Qt.AlignmentFlag.AlignTop, title)
            rect = self.image_rect()
            if not self._image.isNull():
                small = rect.width() < self._image.width()
                p.setRenderHint(QPainter.RenderHint.SmoothPixmapTransform, small)
                p.drawImage(rect, self._image)
            else:
                p.fillRect(rect, pal.color(QPalette.ColorRole.Base))
            if self._note:
                flags = (Qt.AlignmentFlag.AlignCenter | Qt.TextFlag.TextWordWrap)
                box = rect.adjusted(8, 8, -8, -8)
                if not self._image.isNull():
                    bound = p.boundingRect(box, flags, self._note).adjusted(-4, -2, 4, 2)
                    p.fillRect(bound, QColor(255, 255, 255, 210))
                    p.setPen(QColor(20, 20, 20))
                p.drawText(box, flags, self._note)
        finally:
            p.end()


class ColorLegend(QWidget):
    """A horizontal strip of the diverging map labelled ``-limit``, ``0`` and ``+limit``."""

    def __init__(self, parent: QWidget | None = None):
        super().__init__(parent)
        self._limit: float | None = None
        self._bar = colorbar_qimage(256, 1)
        self.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Fixed)
        self.setFixedHeight(self.fontMetrics().height() + 16)

    def limit(self) -> float | None:
        """Return the value at the right end (None when nothing is shown)."""
        return self._limit

    def set_limit(self, limit: float | None) -> None:
        """Show the range ``[-limit, +limit]`` (None hides the labels)."""
        self._limit = None if limit is None else float(limit)
        self.update()

    def labels(self) -> tuple[str, str, str]:
        """Return the three labels drawn (empty strings when no limit is set)."""
        if self._limit is None:
            return ("", "", "")
        return (f"−{self._limit:.3g}", "0", f"+{self._limit:.3g}")

    def paintEvent(self, event) -> None:  # noqa: N802 - Qt name
        p = QPainter(self)
        try:
            fm = self.fontMetrics()
            bar = QRectF(2, 2, max(1, self.width() - 4), 9)
            p.drawImage(bar, self._bar)
            p.setPen(self.palette().color(QPalette.ColorRole.WindowText))
            p.drawRect(bar)
            left, mid, right = self.labels()
            y = bar.bottom() + 2
            h = fm.height() + 2
            p.drawText(QRectF(0, y, self.width(), h), Qt.AlignmentFlag.AlignLeft, left)
            p.drawText(QRectF(0, y, self.width(), h), Qt.AlignmentFlag.AlignHCenter, mid)
            p.drawText(QRectF(0, y, self.width(), h), Qt.AlignmentFlag.AlignRight, right)
        finally:
            p.end()


class PaneArea(QWidget):
    """Lay out the three image panes, the legend and the info text to make images large.

    In a wide area the panes stand side by side (info text below); in a tall one they form a
    2 x 2 grid with the info text in the fourth cell. The arrangement that shows the images at
    the larger scale wins.
    """

    def __init__(self, panes: tuple[ImagePane, ImagePane, ImagePane], legend: QWidget,
                 info: QWidget, parent: QWidget | None = None):
        super().__init__(parent)
        self._panes = panes
        self._legend = legend
        self._info = info
        for w in (*panes, legend, info):
            w.setParent(self)
        self.columns = 3
        self.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Expanding)
        self.setMinimumSize(300, 200)

    def sizeHint(self) -> QSize:  # noqa: N802 - Qt name
        return QSize(660, 420)

    def _aspect(self) -> float:
        for pane in self._panes:
            img = pane.image()
            if not img.isNull():
                return img.height() / max(1, img.width())
        return 0.75

    def _image_scale(self, cell_w: float, cell_h: float, aspect: float) -> float:
        title = self.fontMetrics().height() + 4
        return min(cell_w, max(1.0, cell_h - title) / aspect)

    def resizeEvent(self, event) -> None:  # noqa: N802 - Qt name
        super().resizeEvent(event)
        self._arrange()

    def _arrange(self) -> None:
        w, h = self.width(), self.height()
        gap = 8
        legend_h = self._legend.minimumHeight()
        info_h = self._info.sizeHint().height()
        if self._info.hasHeightForWidth():
            info_h = max(info_h, self._info.heightForWidth(w))
        aspect = self._aspect()
        wide_cell_w = (w - 2 * gap) / 3
        wide_cell_h = h - legend_h - info_h - gap
        tall_cell_w = (w - gap) / 2
        tall_cell_h = (h - legend_h - gap) / 2
        wide = self._image_scale(wide_cell_w, wide_cell_h, aspect)
        tall = self._image_scale(tall_cell_w, tall_cell_h, aspect)
        src, rec, res = self._panes
        if wide >= tall:
            self.columns = 3
            cw, ch = int(wide_cell_w), int(max(40, wide_cell_h))
            for i, pane in enumerate(self._panes):
                pane.setGeometry(int(i * (wide_cell_w + gap)), 0, cw, ch)
            self._legend.setGeometry(int(2 * (wide_cell_w + gap)), ch, cw, legend_h)
            self._info.setGeometry(0, ch + legend_h + gap, w, max(0, h - ch - legend_h - gap))
        else:
            self.columns = 2
            cw, ch = int(tall_cell_w), int(max(40, tall_cell_h))
            src.setGeometry(0, 0, cw, ch)
            rec.setGeometry(int(tall_cell_w + gap), 0, cw, ch)
            res.setGeometry(0, ch + gap, cw, ch)
            self._legend.setGeometry(0, 2 * ch + gap, cw, legend_h)
            self._info.setGeometry(int(tall_cell_w + gap), ch + gap + self.fontMetrics().height(),
                                   cw, max(0, h - ch - gap))

    def rearrange(self) -> None:
        """Lay the panes out again (after the image aspect ratio changed)."""
        self._arrange()
