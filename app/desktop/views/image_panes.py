"""The inspector's picture parts: an image pane, the shared view window, the legend, the layout.

:class:`ImagePane` paints a part of one QImage (its view window, the whole image by default)
scaled to fit with a caption and an optional note, and reports wheel turns, drags and
double-clicks; :class:`SharedView` owns the one view window of several panes (zoom about a
point, pan, fit) so they always show the same part of their images; :class:`ColorLegend` is
the strip of the diverging colour map with its value range; :class:`PaneArea` lays three panes,
the legend and the info text out so that the images are as large as the area allows.
"""

from __future__ import annotations

from PySide6.QtCore import QObject, QPointF, QRectF, QSize, Qt, Signal
from PySide6.QtGui import QColor, QImage, QPainter, QPalette
from PySide6.QtWidgets import QSizePolicy, QWidget

from modescope.app.desktop.imaging import colorbar_qimage

__all__ = ["ImagePane", "SharedView", "ColorLegend", "PaneArea", "MAX_ZOOM", "WHEEL_STEP"]

#: The largest zoom, relative to the whole image fitted to the pane.
MAX_ZOOM = 32.0

#: The zoom factor of one wheel notch (120 eighths of a degree); partial notches zoom less.
WHEEL_STEP = 1.25


class ImagePane(QWidget):
    """Paint a part of one QImage scaled to fit with its aspect ratio kept, or a note.

    The part shown is the view window (:meth:`set_view`, in image pixels; the whole image by
    default). The pane does not change its window itself: it reports a wheel turn
    (``zoomRequested``), a drag with the left button (``panRequested``) and a double-click
    (``fitRequested``) to the one who owns the window (:class:`SharedView`).

    Parameters
    ----------
    title : str
        Caption drawn above the image.
    parent : QWidget, optional
    """

    #: The pixel under the mouse as (row, column) of the image shown; (-1, -1) when none.
    hovered = Signal(int, int)
    #: A wheel turn: (factor, x, y) with x, y the image point under the mouse (in pixels,
    #: fractional); factor > 1 zooms in.
    zoomRequested = Signal(float, float, float)
    #: A drag: move the view window by (dx, dy) image pixels.
    panRequested = Signal(float, float)
    #: A double-click: show the whole image again.
    fitRequested = Signal()

    def __init__(self, title: str = "", parent: QWidget | None = None):
        super().__init__(parent)
        self.setMouseTracking(True)
        self._title = title
        self._image = QImage()
        self._note = ""
        self._view: QRectF | None = None     # None: the whole image
        self._drag: QPointF | None = None    # the last mouse point of a drag in progress
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

    def view_rect(self) -> QRectF:
        """Return the part of the image shown, in image pixels (x, y, width, height).

        The whole image when no window is set (an empty rectangle when there is no image).
        """
        if self._view is not None:
            return QRectF(self._view)
        return QRectF(0, 0, self._image.width(), self._image.height())

    def set_view(self, rect: QRectF | None) -> None:
        """Show the part ``rect`` of the image (image pixels); None shows the whole image.

        Parameters
        ----------
        rect : QRectF or None
            The window, with a positive width and height.

        Raises
        ------
        TypeError
            When ``rect`` is neither a QRectF nor None.
        ValueError
            When ``rect`` has no area.
        """
        if rect is not None and not isinstance(rect, QRectF):
            raise TypeError(f"rect must be a QRectF or None, got {type(rect).__name__}")
        if rect is not None and (rect.width() <= 0 or rect.height() <= 0):
            raise ValueError(f"rect must have a positive width and height, got "
                             f"{rect.width()} x {rect.height()}")
        new = None if rect is None else QRectF(rect)
        if new != self._view:
            self._view = new
            self.update()

    def image_rect(self) -> QRectF:
        """Return where the image (its view window) is drawn, in widget coordinates."""
        fm = self.fontMetrics()
        top = fm.height() + 4
        area = QRectF(0, top, self.width(), max(1, self.height() - top))
        view = self.view_rect()
        if self._image.isNull() or view.width() <= 0 or view.height() <= 0:
            return area
        iw, ih = view.width(), view.height()
        scale = min(area.width() / iw, area.height() / ih)
        w, h = iw * scale, ih * scale
        return QRectF(area.x() + (area.width() - w) / 2, area.y() + (area.height() - h) / 2, w, h)

    def image_point(self, x: float, y: float) -> QPointF | None:
        """Return the image point (fractional pixels) at widget point (x, y); None outside."""
        rect = self.image_rect()
        if self._image.isNull() or not rect.contains(x, y) or rect.width() <= 0:
            return None
        view = self.view_rect()
        return QPointF(view.x() + (x - rect.x()) / rect.width() * view.width(),
                       view.y() + (y - rect.y()) / rect.height() * view.height())

    def pixel_at(self, x: float, y: float) -> tuple[int, int]:
        """Return the (row, column) of the image pixel at widget point (x, y); (-1, -1) outside.

        Follows the view window: zoomed in, a widget point maps to the pixel drawn there.
        """
        point = self.image_point(x, y)
        if point is None:
            return (-1, -1)
        row = max(0, min(int(point.y()), self._image.height() - 1))
        col = max(0, min(int(point.x()), self._image.width() - 1))
        return (row, col)

    def mousePressEvent(self, event) -> None:  # noqa: N802 - Qt name
        if event.button() == Qt.MouseButton.LeftButton and not self._image.isNull():
            self._drag = event.position()
            self.setCursor(Qt.CursorShape.ClosedHandCursor)
            event.accept()
            return
        super().mousePressEvent(event)

    def mouseMoveEvent(self, event) -> None:  # noqa: N802 - Qt name
        pos = event.position()
        if self._drag is not None and event.buttons() & Qt.MouseButton.LeftButton:
            rect, view = self.image_rect(), self.view_rect()
            if rect.width() > 0 and rect.height() > 0:
                dx = (pos.x() - self._drag.x()) * view.width() / rect.width()
                dy = (pos.y() - self._drag.y()) * view.height() / rect.height()
                if dx or dy:
                    self.panRequested.emit(-dx, -dy)    # the picture follows the mouse
            self._drag = pos
        self.hovered.emit(*self.pixel_at(pos.x(), pos.y()))
        super().mouseMoveEvent(event)

    def mouseReleaseEvent(self, event) -> None:  # noqa: N802 - Qt name
        if event.button() == Qt.MouseButton.LeftButton and self._drag is not None:
            self._drag = None
            self.unsetCursor()
            event.accept()
            return
        super().mouseReleaseEvent(event)

    def mouseDoubleClickEvent(self, event) -> None:  # noqa: N802 - Qt name
        if event.button() == Qt.MouseButton.LeftButton:
            self.fitRequested.emit()
            event.accept()
            return
        super().mouseDoubleClickEvent(event)

    def wheelEvent(self, event) -> None:  # noqa: N802 - Qt name
        steps = event.angleDelta().y() / 120.0
        rect = self.image_rect()
        if self._image.isNull() or steps == 0 or rect.width() <= 0:
            super().wheelEvent(event)
            return
        pos = event.position()
        # a point beside the picture zooms about the nearest edge point
        x = min(max(pos.x(), rect.left()), rect.right())
        y = min(max(pos.y(), rect.top()), rect.bottom())
        view = self.view_rect()
        ix = view.x() + (x - rect.x()) / rect.width() * view.width()
        iy = view.y() + (y - rect.y()) / rect.height() * view.height()
        self.zoomRequested.emit(WHEEL_STEP ** steps, ix, iy)
        event.accept()

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
                view = self.view_rect()
                # smooth only when shrinking; enlarged, every image pixel is a sharp square
                p.setRenderHint(QPainter.RenderHint.SmoothPixmapTransform,
                                rect.width() < view.width())
                p.drawImage(rect, self._image, view)
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


class SharedView(QObject):
    """The one view window of several image panes of the same size: zoom, pan and fit.

    The window is a rectangle in image pixels with the image's aspect ratio, inside the image;
    zoom is the image width over the window width (1 shows the whole image, at most
    :data:`MAX_ZOOM`). Every pane's wheel turn, drag and double-click changes it, and every
    pane is told the new window, so all show the same part.

    Parameters
    ----------
    panes : sequence of ImagePane
        The panes that share the window.
    parent : QObject, optional

    Signals
    -------
    changed(float)
        The window changed; the new zoom.
    """

    changed = Signal(float)

    def __init__(self, panes, parent: QObject | None = None):
        super().__init__(parent)
        self._panes = tuple(panes)
        for pane in self._panes:
            if not isinstance(pane, ImagePane):
                raise TypeError(f"panes must be ImagePane widgets, got {type(pane).__name__}")
            pane.zoomRequested.connect(self.zoom_at)
            pane.panRequested.connect(self.pan_by)
            pane.fitRequested.connect(self.fit)
        self._size = (0, 0)         # image (width, height)
        self._view: QRectF | None = None

    def image_size(self) -> tuple[int, int]:
        """Return the (width, height) of the images shown, in pixels ((0, 0) when none)."""
        return self._size

    def set_image_size(self, width: int, height: int) -> None:
        """Say the size of the images shown; a new size shows the whole image again.

        Parameters
        ----------
        width, height : int
            In pixels, not negative (0 when no image is shown).

        Raises
        ------
        ValueError
            When a size is negative.
        """
        if width < 0 or height < 0:
            raise ValueError(f"image size must not be negative, got {width} x {height}")
        size = (int(width), int(height))
        if size != self._size:
            self._size = size
            self.fit()

    def view_rect(self) -> QRectF:
        """Return the part of the images shown, in image pixels (the whole image at fit)."""
        if self._view is not None:
            return QRectF(self._view)
        return QRectF(0, 0, *self._size)

    def zoom(self) -> float:
        """Return the image width over the window width (1.0 when the whole image shows)."""
        view = self.view_rect()
        return self._size[0] / view.width() if view.width() > 0 else 1.0

    def fit(self) -> None:
        """Show the whole image."""
        self._set(None)

    def zoom_at(self, factor: float, x: float, y: float) -> None:
        """Zoom by ``factor`` keeping image point (x, y) where it is (factor > 1 zooms in).

        The zoom stays between 1 (the whole image) and :data:`MAX_ZOOM`.

        Parameters
        ----------
        factor : float
            Positive; whole or fractional.
        x, y : float
            The fixed image point, in pixels.

        Raises
        ------
        ValueError
            When ``factor`` is not a positive number.
        """
        if not factor > 0:
            raise ValueError(f"factor must be a positive number, got {factor}")
        iw, ih = self._size
        if iw <= 0 or ih <= 0:
            return
        zoom = min(MAX_ZOOM, max(1.0, self.zoom() * factor))
        if zoom == 1.0:
            self._set(None)
            return
        view = self.view_rect()
        w, h = iw / zoom, ih / zoom
        left = x - (x - view.x()) * w / view.width()
        top = y - (y - view.y()) * h / view.height()
        self._set(QRectF(left, top, w, h))

    def pan_by(self, dx: float, dy: float) -> None:
        """Move the window by (dx, dy) image pixels (it stays inside the image)."""
        if self._view is None:
            return
        self._set(self._view.translated(dx, dy))

    def _set(self, view: QRectF | None) -> None:
        iw, ih = self._size
        if view is not None:
            view = QRectF(min(max(view.x(), 0.0), iw - view.width()),
                          min(max(view.y(), 0.0), ih - view.height()),
                          view.width(), view.height())
        if (view is None) == (self._view is None) and (view is None or view == self._view):
            return
        self._view = view
        for pane in self._panes:
            pane.set_view(view)
        self.changed.emit(self.zoom())


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
    the larger scale wins. The legend sits :attr:`LEGEND_GAP` pixels below the residual pane, so
    an image that fills its pane never touches the colour bar.
    """

    #: Pixels between the bottom of the residual pane and its colour legend.
    LEGEND_GAP = 6

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
        # the legend's own height plus the space above it
        legend_h = self._legend.minimumHeight() + self.LEGEND_GAP
        top = self.LEGEND_GAP
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
            self._legend.setGeometry(int(2 * (wide_cell_w + gap)), ch + top, cw, legend_h - top)
            self._info.setGeometry(0, ch + legend_h + gap, w, max(0, h - ch - legend_h - gap))
        else:
            self.columns = 2
            cw, ch = int(tall_cell_w), int(max(40, tall_cell_h))
            src.setGeometry(0, 0, cw, ch)
            rec.setGeometry(int(tall_cell_w + gap), 0, cw, ch)
            res.setGeometry(0, ch + gap, cw, ch)
            self._legend.setGeometry(0, 2 * ch + gap + top, cw, legend_h - top)
            self._info.setGeometry(int(tall_cell_w + gap), ch + gap + self.fontMetrics().height(),
                                   cw, max(0, h - ch - gap))

    def rearrange(self) -> None:
        """Lay the panes out again (after the image aspect ratio changed)."""
        self._arrange()
