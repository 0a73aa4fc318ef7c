"""The inspector: one image next to its rank-r reconstruction and the residual.

The image shown is the state's selected image, re-read from its source file with the analysis
options (``pipeline.load_analysis_image``) in the background (the program's one pattern,
:mod:`~modescope.app.desktop.workers.background`) and cached while it stays selected; the panes
say it is being read until it arrives, and a read for an image no longer selected is dropped.
The reconstruction
and the pixel residual come from :class:`~modescope.core.review.reconstruct.LiveReconstruction`
(mean plus the first r basis images times the image's weights: no SVD is computed here; the
residual is ``image - reconstruction``), shown with the diverging colour map and a legend of its
value range; colour images show the mean over their channels. The image's residual at rank r in
words is :meth:`~modescope.core.decomposition.Decomposition.residual_at_rank`. When the source
file is missing or changed, a note says so and the reconstruction is still shown.

The rank slider writes ``state.set_rank`` through a short single-shot timer, so dragging it
repaints the reconstruction live without flooding the other views.
"""

from __future__ import annotations

from typing import Any, Callable

import numpy as np
from PySide6.QtCore import Qt, QTimer, Signal, Slot
from PySide6.QtWidgets import (
    QCheckBox,
    QHBoxLayout,
    QLabel,
    QPushButton,
    QSizePolicy,
    QSlider,
    QVBoxLayout,
    QWidget,
)

from modescope.core.errors import ModescopeError
from modescope.core.output.images import contrast_limits, stretch
from modescope.core.review.reconstruct import LiveReconstruction

from modescope.app.desktop.display import display_name
from modescope.app.desktop.imaging import (NO_VARIATION, array_to_qimage, signed_to_qimage,
                                           symmetric_limit)
from modescope.app.desktop.state import AppState
from modescope.app.desktop.views.image_panes import ColorLegend, ImagePane, PaneArea, SharedView
from modescope.app.desktop.workers.background import BackgroundRunner, plain_message

__all__ = ["ImagePane", "ColorLegend", "Inspector", "RANK_DEBOUNCE_MS"]

#: Delay between a slider move and the rank reaching the shared state.
RANK_DEBOUNCE_MS = 15

#: Shown under the panes while the mouse is on no image.
HOVER_HINT = "Point at a pixel to read the image, reconstruction and residual there."

#: Shown in the image pane while the source image is being read.
READING_NOTE = "Reading the image…"


def _default_loader(decomposition, index: int) -> np.ndarray:
    from modescope.core.engine import pipeline

    return pipeline.load_analysis_image(decomposition, index)


def _read_source(load: Callable[[Any, int], np.ndarray], decomposition, index: int,
                 key: tuple) -> tuple[tuple, np.ndarray]:
    """Read image ``index`` at analysis resolution and check its shape (a background job)."""
    image = np.asarray(load(decomposition, index), dtype=np.float32)
    if image.ndim == 2:
        image = image[:, :, None]
    if tuple(image.shape) != tuple(decomposition.image_shape):
        raise ModescopeError(f"{key[0]}: read with shape {image.shape}, the analysis expects "
                             f"{tuple(decomposition.image_shape)}")
    return key, image


def _describe_read_error(exc: BaseException) -> str:
    return f"Source image not available: {plain_message(exc, 'Reading the image')}"


class Inspector(QWidget):
    """The selected image, its rank-r reconstruction and the residual, with a rank slider.

    Parameters
    ----------
    state : AppState
        The shared state (read: decomposition, selected, rank; written: rank).
    parent : QWidget, optional
    load_image : callable(decomposition, index) -> ndarray, optional
        Reads an image at analysis resolution, shape (rows, cols, channels); called in a
        background thread. Default: ``pipeline.load_analysis_image``.

    Signals
    -------
    sourceReady(int)
        The selected image's source image (or the reason it is not available) has arrived and
        is shown; the image's index.

    Attributes
    ----------
    source_pane, reconstruction_pane, residual_pane : ImagePane
        The image, its reconstruction at the state's rank and the residual (image minus
        reconstruction) in the diverging colours, or a note saying why there is none.
    legend : ColorLegend
        The residual's value range.
    view_window : SharedView
        The part of the image the three panes show (wheel zooms about the pointed pixel, a
        left-button drag pans, a double-click or ``fit_button`` shows the whole image).
    """

    sourceReady = Signal(int)

    def __init__(self, state: AppState, parent: QWidget | None = None, *,
                 load_image: Callable[[Any, int], np.ndarray] | None = None):
        super().__init__(parent)
        if not isinstance(state, AppState):
            raise TypeError(f"state must be an AppState, got {type(state).__name__}")
        self._state = state
        self._load_image = load_image or _default_loader
        self._cache_key: tuple | None = None
        self._live = None           # LiveReconstruction of the selected image
        self._cache_value: np.ndarray | None = None
        self._source_qimage: tuple | None = None   # (source array, limits, its QImage)
        # what the panes show now, for the pixel readout: (source or None, reconstruction,
        # residual plane or None)
        self._shown: tuple | None = None
        self._running = False
        self._cache_error = ""
        self._reading = False       # the cached key's image is being read
        # two threads: a slow read of an image no longer selected does not hold up the next
        # (reads not yet started when superseded are skipped)
        self._reads = BackgroundRunner(self, threads=2, task="Reading the image",
                                       describe_error=_describe_read_error)
        self._reads.finished.connect(self._on_source_read)
        self._reads.failed.connect(self._on_source_failed)
        self._syncing = False
        self._build()
        self._rank_timer = QTimer(self)
        self._rank_timer.setSingleShot(True)
        self._rank_timer.setInterval(RANK_DEBOUNCE_MS)
        self._rank_timer.timeout.connect(self._push_rank)
        self._wire()
        self.refresh()

    # ----- construction ------------------------------------------------------------------------
    def _build(self) -> None:
        self.title_label = QLabel("No image selected", self)
        self.title_label.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.title_label.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Preferred)
        font = self.title_label.font()
        font.setBold(True)
        self.title_label.setFont(font)

        self.source_pane = ImagePane("Image", self)
        self.reconstruction_pane = ImagePane("Reconstruction", self)
        self.residual_pane = ImagePane("Residual", self)
        self.residual_pane.setToolTip("Image minus reconstruction (the mean over the colour "
                                      "channels for colour images)")
        self.legend = ColorLegend(self)
        self.legend.setToolTip("Residual values: teal where the image is darker than the "
                               "reconstruction, brick where it is brighter")
        self.energy_label = QLabel("", self)
        self.energy_label.setWordWrap(True)
        self.residual_label = QLabel("", self)
        self.residual_label.setWordWrap(True)
        info = QWidget(self)
        info_layout = QVBoxLayout(info)
        info_layout.setContentsMargins(0, 0, 0, 0)
        info_layout.addWidget(self.energy_label)
        info_layout.addWidget(self.residual_label)
        info_layout.addStretch(1)
        self.pane_area = PaneArea((self.source_pane, self.reconstruction_pane,
                                    self.residual_pane), self.legend, info, self)
        self.view_window = SharedView((self.source_pane, self.reconstruction_pane,
                                       self.residual_pane), self)
        for pane in (self.source_pane, self.reconstruction_pane, self.residual_pane):
            pane.setWhatsThis("Wheel: zoom about the pixel under the mouse; drag: move; "
                              "double-click: the whole image (the three panes together)")

        self.rank_slider = QSlider(Qt.Orientation.Horizontal, self)
        self.rank_slider.setRange(1, 1)
        self.rank_slider.setEnabled(False)
        self.rank_slider.setTracking(True)
        self.rank_slider.setToolTip("Number of basis images used in the reconstruction "
                                    "(keys + and −)")
        self.rank_label = QLabel("Rank –", self)
        self.rank_label.setMinimumWidth(self.fontMetrics().horizontalAdvance("Rank 9999 of 9999"))
        self.stretch_box = QCheckBox("Stretch contrast", self)
        self.stretch_box.setToolTip("Show the image and its reconstruction with the image's "
                                    "1 % and 99 % levels as black and white (for dark or bright "
                                    "images); the numbers are unchanged")
        self.fit_button = QPushButton("Fit", self)
        self.fit_button.setEnabled(False)
        self.fit_button.setMinimumWidth(self.fontMetrics().horizontalAdvance("Fit (00.0×)") + 24)
        self.fit_button.setToolTip("Show the whole image again (or double-click a pane); the "
                                   "mouse wheel over a pane zooms, dragging moves the view")
        slider_row = QHBoxLayout()
        slider_row.addWidget(self.rank_label)
        slider_row.addWidget(self.rank_slider, 1)
        slider_row.addWidget(self.stretch_box)
        slider_row.addWidget(self.fit_button)
        self.readout_label = QLabel(HOVER_HINT, self)
        self.readout_label.setToolTip("Values at the pixel under the mouse in any of the three "
                                      "panes (rows and columns counted from 1, values in "
                                      "0..1; colour images give red, green, blue)")
        self.readout_label.setSizePolicy(QSizePolicy.Policy.Ignored,
                                         QSizePolicy.Policy.Preferred)

        layout = QVBoxLayout(self)
        layout.setContentsMargins(8, 6, 8, 6)
        layout.addWidget(self.title_label)
        layout.addWidget(self.pane_area, 1)
        layout.addLayout(slider_row)
        layout.addWidget(self.readout_label)
        self.setFocusPolicy(Qt.FocusPolicy.StrongFocus)

    def _wire(self) -> None:
        self._state.decompositionChanged.connect(self._on_decomposition)
        self._state.selectedChanged.connect(self._on_selected)
        self._state.rankChanged.connect(self._on_rank)
        self.rank_slider.valueChanged.connect(self._on_slider)
        self.stretch_box.toggled.connect(self.refresh)
        self.fit_button.clicked.connect(self.view_window.fit)
        self.view_window.changed.connect(self._on_zoom)
        for pane in (self.source_pane, self.reconstruction_pane, self.residual_pane):
            pane.hovered.connect(self._on_hover)

    # ----- state -> view -----------------------------------------------------------------------
    @Slot(object)
    def _on_decomposition(self, _decomposition) -> None:
        self.refresh()

    @Slot(int)
    def _on_selected(self, _index: int) -> None:
        self.refresh()

    @Slot(int)
    def _on_rank(self, _rank: int) -> None:
        self.refresh()

    # ----- view -> state -----------------------------------------------------------------------
    @Slot(int)
    def _on_slider(self, value: int) -> None:
        if not self._syncing:
            d = self._state.decomposition
            k = 0 if d is None else d.rank
            self.rank_label.setText(f"Rank {value} of {k}")
            self._rank_timer.start()

    @Slot()
    def _push_rank(self) -> None:
        self._state.set_rank(self.rank_slider.value())

    @Slot(float)
    def _on_zoom(self, zoom: float) -> None:
        self.fit_button.setEnabled(zoom > 1.0)
        self.fit_button.setText("Fit" if zoom <= 1.0 else f"Fit ({zoom:.3g}×)")

    # ----- drawing -----------------------------------------------------------------------------
    def set_running(self, running: bool) -> None:
        """Say whether an analysis is running (the empty view then tells it is coming)."""
        running = bool(running)
        if running != self._running:
            self._running = running
            if self._state.decomposition is None:
                self.refresh()

    def _source(self, decomposition, index: int) -> tuple[np.ndarray | None, str]:
        """Return the cached source image of ``index``; start reading it when the selection
        changed (``(None, READING_NOTE)`` until it arrives)."""
        path = decomposition.paths[index] if decomposition.paths else ""
        page = int(decomposition.pages[index]) if decomposition.pages is not None else 0
        key = (path, page, tuple(decomposition.image_shape))
        if key != self._cache_key:
            self._reads.abandon()               # a read for another image is of no use now
            self._cache_key = key
            self._cache_value, self._cache_error = None, ""
            self._reading = bool(path)
            if not path:
                self._cache_error = "The analysis does not record the source file of this image."
            else:
                load = self._load_image
                self._reads.start(lambda ctx: _read_source(load, decomposition, index, key))
        if self._reading:
            return None, READING_NOTE
        return self._cache_value, self._cache_error

    @Slot(object)
    def _on_source_read(self, result: tuple) -> None:
        key, image = result
        if key != self._cache_key:              # the selection moved on meanwhile
            return
        self._reading = False
        self._cache_value, self._cache_error = image, ""
        self._source_arrived()

    @Slot(str)
    def _on_source_failed(self, message: str) -> None:
        if not self._reading:
            return
        self._reading = False
        self._cache_value, self._cache_error = None, message
        self._source_arrived()

    def _source_arrived(self) -> None:
        self.refresh()
        self.sourceReady.emit(int(self._state.selected))

    def shutdown(self, timeout_ms: int = 3000) -> bool:
        """Drop a read in progress and wait for it at most ``timeout_ms``; True when done."""
        self._reads.abandon()
        self._reading = False
        return self._reads.wait(timeout_ms)

    @Slot()
    def refresh(self) -> None:
        """Redraw from the state."""
        d = self._state.decomposition
        index = self._state.selected
        self._sync_slider(d)
        if d is None or index < 0 or index >= d.n_images or d.rank == 0:
            self._show_nothing(d)
            return
        rank = max(1, min(self._state.rank or d.rank, d.rank))
        self._show_title(d, index)
        live = self._live
        if live is None or live.decomposition is not d or live.index != index:
            live = self._live = LiveReconstruction(d, index)
        self._show_images(live, rank)
        rows, cols = (tuple(d.image_shape) + (1, 1))[:2]
        self.view_window.set_image_size(cols, rows)      # a new size shows the whole image
        self.pane_area.rearrange()
        self._show_texts(d, index, rank)

    def _show_nothing(self, d) -> None:
        """No image to show: say why (no analysis, no variation, nothing selected)."""
        self._shown = None
        self.view_window.set_image_size(0, 0)
        self.readout_label.setText(HOVER_HINT)
        if d is None:
            title = "Analysis starting…" if self._running else "No analysis yet"
        elif d.rank == 0 and d.n_images:
            title = NO_VARIATION
        else:
            title = "No image selected"
        self.title_label.setText(title)
        if d is not None:
            hint = ""
        elif self._running:
            hint = "Analysis running: the first results appear after the first block."
        else:
            hint = "Add images in the Sources pane and start an analysis."
        self.source_pane.set_image(None, hint)
        self.reconstruction_pane.set_image(None)
        self.residual_pane.set_image(None)
        self.reconstruction_pane.set_title("Reconstruction")
        self.legend.set_limit(None)
        self.energy_label.setText("")
        self.residual_label.setText("")

    def _show_title(self, d, index: int) -> None:
        path = d.paths[index] if d.paths else ""
        name = display_name(path) if path else f"image {index + 1}"
        page = int(d.pages[index])
        if page:
            name += f" (page {page})"
        status = ("" if d.exact else "  — analysis in progress" if self._running
                  else "  — partial result")
        self.title_label.setText(f"Image {index + 1:,} of {d.n_images:,}: {name}{status}")
        self.title_label.setToolTip(path)

    def _show_images(self, live: LiveReconstruction, rank: int) -> None:
        """The reconstruction at ``rank``, the source image and the residual (core's)."""
        # incremental: a slider step adds or removes only the modes in between
        self.reconstruction_pane.set_title(f"Reconstruction, rank {rank}")
        recon = live.image_at(rank)
        source, error = self._source(live.decomposition, live.index)
        # one display range for the image and its reconstruction, so they stay comparable
        limits = (contrast_limits(source if source is not None else recon)
                  if self.stretch_box.isChecked() else None)
        self.reconstruction_pane.set_image(array_to_qimage(
            recon if limits is None else stretch(recon, limits)))
        if source is None:
            self._shown = (None, recon, None)
            self.source_pane.set_image(None, error)
            self.residual_pane.set_image(None, "" if self._reading
                                         else "No residual without the source image.")
            self.legend.set_limit(None)
            return
        # the source does not change with the rank: convert it once per image and range
        if (self._source_qimage is None or self._source_qimage[0] is not source
                or self._source_qimage[1] != limits):
            shown = source if limits is None else stretch(source, limits)
            self._source_qimage = (source, limits, array_to_qimage(shown))
        self.source_pane.set_image(self._source_qimage[2])
        residual = live.residual_image(source, rank)
        plane = residual.mean(axis=2) if residual.shape[2] > 1 else residual[:, :, 0]
        self._shown = (source, recon, plane)
        limit = symmetric_limit(plane)
        self.residual_pane.set_image(signed_to_qimage(plane, limit))
        self.residual_pane.set_title("Residual" + (" (channel mean)"
                                                   if residual.shape[2] > 1 else ""))
        self.legend.set_limit(limit)

    @Slot(int, int)
    def _on_hover(self, row: int, col: int) -> None:
        """Write the values of the pixel under the mouse (the same in all three panes)."""
        shown = self._shown
        if row < 0 or shown is None:
            self.readout_label.setText(HOVER_HINT)
            return
        source, recon, plane = shown
        if row >= recon.shape[0] or col >= recon.shape[1]:
            self.readout_label.setText(HOVER_HINT)
            return

        def value(array) -> str:
            v = np.asarray(array[row, col], dtype=np.float64).ravel()
            return f"{v[0]:.3f}" if v.size == 1 else "(" + ", ".join(f"{x:.3f}" for x in v) + ")"

        parts = [f"Row {row + 1}, column {col + 1}:"]
        if source is not None:
            parts.append(f"image {value(source)},")
        parts.append(f"reconstruction {value(recon)}")
        if plane is not None:
            parts[-1] += ","
            parts.append(f"residual {plane[row, col]:+.3f}"
                         + (" (channel mean)" if recon.ndim == 3 and recon.shape[2] > 1 else ""))
        self.readout_label.setText(" ".join(parts))

    def _show_texts(self, d, index: int, rank: int) -> None:
        """The energy the first ``rank`` modes capture and this image's residual."""
        shares = d.cumulative_energy()
        self.energy_label.setText(
            f"The first {rank} basis image{'s' if rank != 1 else ''} capture "
            f"{100.0 * float(shares[rank - 1]):.1f} % of the collection's variation "
            f"(all {d.rank}: {100.0 * float(shares[-1]):.1f} %).")
        if d.residual is None:
            self.residual_label.setText("Residuals are computed when the analysis finishes.")
            return
        residual = d.residual_at_rank(rank, index=index)
        whole = d.residual_at_rank(0, index=index)      # the image's own centred energy
        pct = 100.0 * (residual / whole if whole > 0 else 0.0)
        pct_text = f"{pct:.1f}" if pct >= 0.1 or pct == 0 else f"{pct:.2g}"
        self.residual_label.setText(
            f"This image at rank {rank}: residual {residual:.4g} (squared norm), "
            f"{pct_text} % of its own variation.")

    def _sync_slider(self, d) -> None:
        self._syncing = True
        try:
            k = 0 if d is None else d.rank
            self.rank_slider.setEnabled(k > 0)
            self.rank_slider.setRange(1, max(1, k))
            if k and not self._rank_timer.isActive():
                self.rank_slider.setValue(max(1, min(self._state.rank or k, k)))
            self.rank_label.setText(f"Rank {self.rank_slider.value()} of {k}" if k else "Rank –")
        finally:
            self._syncing = False

    # ----- keys --------------------------------------------------------------------------------
    def keyPressEvent(self, event) -> None:  # noqa: N802 - Qt name
        key = event.key()
        if key in (Qt.Key.Key_Left, Qt.Key.Key_Right):
            d = self._state.decomposition
            if d is not None and d.n_images:
                step = -1 if key == Qt.Key.Key_Left else 1
                self._state.set_selected(max(0, min(d.n_images - 1,
                                                    self._state.selected + step)))
            event.accept()
        elif key in (Qt.Key.Key_Up, Qt.Key.Key_Down):
            if self._state.decomposition is not None:
                self._state.set_rank(self._state.rank + (1 if key == Qt.Key.Key_Up else -1))
            event.accept()
        else:
            super().keyPressEvent(event)
