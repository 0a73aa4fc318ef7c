"""The export dialog: write previews, basis images, tables and a compact model to a folder.

The dialog reads the current analysis, rank, selection and outlier level from
:class:`~modescope.app.desktop.state.AppState`, lets the user choose what to write and where, and hands
the work to :func:`modescope.core.output.export.plan_export` and
:func:`modescope.core.output.export.run_export`:

* every option change updates two lines computed by the core: the resolution the previews are
  written at, and the numbers a rank-k model stores, ``k (n + m + 1) + n`` against ``n m``
  (:func:`~modescope.core.output.export.compression_numbers`);
* "Export" first plans the whole export; a refusal (existing files, a folder holding source
  images, a folder that does not accept files) is shown in the dialog and nothing is written;
* the files are written by an :class:`ExportWorker` on its own QThread; the progress bar counts
  files, "Stop" ends the export after the current file (completed files are kept), and the
  report summary is shown at the end;
* closing the dialog during an export stops it and waits (at most :data:`CLOSE_TIMEOUT_MS`).

The destination folder is kept for the rest of the session and, once an export has started,
in the settings for the next session (a remembered folder that no longer exists is not offered);
the folder browser starts in the folder file dialogs last opened in.
"""

from __future__ import annotations

import logging
import os
import threading
from pathlib import Path
from typing import Any

from PySide6.QtCore import QCoreApplication, QObject, QThread, Qt, QUrl, Signal, Slot
from PySide6.QtGui import QCloseEvent, QDesktopServices
from PySide6.QtWidgets import (
    QButtonGroup,
    QCheckBox,
    QComboBox,
    QDialog,
    QFileDialog,
    QFormLayout,
    QGridLayout,
    QGroupBox,
    QHBoxLayout,
    QLabel,
    QLineEdit,
    QPlainTextEdit,
    QProgressBar,
    QPushButton,
    QRadioButton,
    QSpinBox,
    QVBoxLayout,
    QWidget,
)

from modescope.core.output.atomic import DestinationError
from modescope.core.decomposition import Decomposition
from modescope.core.errors import ModescopeError
from modescope.core.output.encode import FORMATS
from modescope.core.output.export import (ExportOptions, ExportPlan, ExportReport, plan_export,
                                          run_export)
from modescope.core.output.metrics import compression_numbers
from modescope.core.output.naming import select_images

from modescope.app.desktop.settings import Settings
from modescope.app.desktop.state import AppState, initial_rank

__all__ = ["ExportDialog", "ExportWorker", "PARTS", "CLOSE_TIMEOUT_MS", "export_error_message"]

_log = logging.getLogger(__name__)

#: Longest wait for the current file when the dialog (or the window) is closed mid-export.
CLOSE_TIMEOUT_MS = 10_000

#: The parts of an export as shown in the dialog: (core name, label, file names for rank k).
PARTS = (
    ("previews", "Previews (rank-k reconstructions)", lambda k, ext: f"<name>_r{k}{ext}"),
    ("basis", "Basis images and the mean image", lambda k, ext: "mean.png, basis_001.png …"),
    ("sheet", "Contact sheet of basis images", lambda k, ext: "basis_sheet.png"),
    ("weights", "Weights table", lambda k, ext: f"weights_r{k}.csv"),
    ("spectrum", "Singular values table", lambda k, ext: "spectrum.csv"),
    ("quality", "Reconstruction quality table", lambda k, ext: f"quality_r{k}.csv"),
    ("model", "Compact model", lambda k, ext: f"model_r{k}.npz"),
)
_DEFAULT_PARTS = ("previews", "basis", "weights", "spectrum")
_PER_IMAGE = ("previews", "weights", "quality")
_FORMAT_LABELS = (("png", "PNG (8-bit)"), ("jpg", "JPEG (8-bit)"),
                  ("webp", "WebP (8-bit)"), ("tiff", "TIFF (16-bit)"))

_MESSAGE_STYLE = {
    "error": "QLabel { background: #fbeae7; color: #6b1a10; border: 1px solid #e2b4ac;"
             " border-radius: 3px; padding: 6px; }",
    "done": "QLabel { background: #e8f2e6; color: #1f4a1a; border: 1px solid #b7d3b0;"
            " border-radius: 3px; padding: 6px; }",
    "info": "QLabel { background: #eef1f5; color: #22303f; border: 1px solid #c5cfdb;"
            " border-radius: 3px; padding: 6px; }",
}
_WARNING_STYLE = "QLabel { color: #8a4b00; }"

# The session's destination folder (shared by every dialog of this process).
_session_folder = ""


def export_error_message(exc: BaseException) -> str:
    """Return a message for the user about an export failure, without a traceback.

    Parameters
    ----------
    exc : BaseException
        What planning or writing raised.

    Returns
    -------
    str
    """
    if isinstance(exc, MemoryError):
        return "There is not enough memory for this export. Try fewer images or a lower rank."
    if isinstance(exc, (ModescopeError, TypeError, ValueError)):
        text = str(exc) or type(exc).__name__
        # the core speaks in parameter names; the dialog in the words of its controls
        text = text.replace("allow writing there explicitly (allow_source_folder=True)",
                            'tick "Allow writing into a folder that holds source images"')
        text = text.replace("export the model without float16",
                            'untick "Compact model in float16"')
        text = text[:1].upper() + text[1:]
        return text if text.endswith((".", "!", "?", ")")) else text + "."
    if isinstance(exc, OSError):
        where = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
        return f"A file could not be written{where}: {exc.strerror or exc}"
    text = str(exc).strip() or "no details"
    return f"The export stopped on an unexpected error ({type(exc).__name__}: {text})"


def _format_count(n: int) -> str:
    return f"{int(n):,}"


class ExportWorker(QObject):
    """Write the files of one :class:`~modescope.core.output.export.ExportPlan` (in its own thread).

    Parameters
    ----------
    plan : ExportPlan
        From :func:`~modescope.core.output.export.plan_export`.

    Signals
    -------
    progress(int, int)
        Files done and the total, once with 0 before the first file and after each file
        (emitted in the worker's thread).
    ended(object)
        The worker itself, once the export has ended whichever way; read :attr:`report` or
        :attr:`error`.
    """

    progress = Signal(int, int)
    ended = Signal(object)

    def __init__(self, plan: ExportPlan):
        super().__init__()
        if not isinstance(plan, ExportPlan):
            raise TypeError(f"plan must be an ExportPlan, got {type(plan).__name__}")
        self.plan = plan
        self.report: ExportReport | None = None
        self.error: str | None = None
        #: ``threading.get_ident()`` of the thread :meth:`run` ran in (None before).
        self.thread_ident: int | None = None
        self._cancel = threading.Event()
        self._done = threading.Event()

    def cancel(self) -> None:
        """Ask the export to stop before the next file (thread-safe)."""
        self._cancel.set()

    def is_cancel_requested(self) -> bool:
        """Return True once :meth:`cancel` has been called (thread-safe)."""
        return self._cancel.is_set()

    def is_done(self) -> bool:
        """Return True once the export has ended (thread-safe)."""
        return self._done.is_set()

    def _on_progress(self, done: int, total: int) -> None:
        self.progress.emit(int(done), int(total))

    @Slot()
    def run(self) -> None:
        """Run the export (in the worker's thread; blocks until it ends)."""
        self.thread_ident = threading.get_ident()
        try:
            self.report = run_export(self.plan, progress=self._on_progress,
                                     cancel=self._cancel.is_set)
        except Exception as exc:  # noqa: BLE001 - every failure becomes a message
            if not isinstance(exc, (ModescopeError, OSError, MemoryError)):
                _log.error("export failed", exc_info=exc)
            self.error = export_error_message(exc)
        finally:
            # hand the object back to the GUI thread so it is freed there, then stop the thread
            # from inside (the GUI thread may be blocked waiting for it)
            app = QCoreApplication.instance()
            here = QThread.currentThread()
            if app is not None and self.thread() is here and here is not app.thread():
                self.moveToThread(app.thread())
            self._done.set()
            self.ended.emit(self)
            if app is not None and here is not app.thread():
                here.quit()


class ExportDialog(QDialog):
    """Choose what to export and where, then write it with progress and a way to stop.

    Parameters
    ----------
    state : AppState
        The workbench state; the dialog exports ``state.decomposition``.
    settings : Settings, optional
        Gives the folder the folder browser starts in and remembers the destination of the
        last export started.
    parent : QWidget, optional

    Signals
    -------
    exportStarted(object)
        The :class:`ExportWorker` of a new export, emitted before its thread starts.
    exportFinished(object)
        The :class:`~modescope.core.output.export.ExportReport` of an export that ran (also when it
        was stopped).
    exportFailed(str)
        The message shown when planning refused or writing failed.
    """

    exportStarted = Signal(object)
    exportFinished = Signal(object)
    exportFailed = Signal(str)

    def __init__(self, state: AppState, settings: Settings | None = None,
                 parent: QWidget | None = None):
        super().__init__(parent)
        if not isinstance(state, AppState):
            raise TypeError(f"state must be an AppState, got {type(state).__name__}")
        if settings is not None and not isinstance(settings, Settings):
            raise TypeError(f"settings must be a Settings or None, got {type(settings).__name__}")
        self.setObjectName("exportDialog")
        self.setWindowTitle("Export")
        self.state = state
        self.settings = settings
        self.worker: ExportWorker | None = None     # the current or last worker
        self.last_plan: ExportPlan | None = None
        self.last_report: ExportReport | None = None
        self._thread: QThread | None = None
        self._running = False
        self._flag_cache: tuple | None = None
        self._sized = False
        self._build()
        self._wire()
        folder = _session_folder
        if not folder and settings is not None and os.path.isdir(settings.export_folder()):
            folder = settings.export_folder()
        self.set_folder(folder)
        self.sync_from_state(reset_rank=True)

    # ----- construction ------------------------------------------------------------------------
    def _build(self) -> None:
        outer = QVBoxLayout(self)
        self.analysis_label = QLabel("", self)
        self.analysis_label.setWordWrap(True)
        outer.addWidget(self.analysis_label)
        columns = QHBoxLayout()
        left, right = QVBoxLayout(), QVBoxLayout()
        columns.addLayout(left, 1)
        columns.addLayout(right, 1)
        outer.addLayout(columns)

        # what
        what_box = QGroupBox("What to write", self)
        grid = QGridLayout(what_box)
        self.what_boxes: dict[str, QCheckBox] = {}
        self._file_labels: dict[str, QLabel] = {}
        for row, (name, text, _files) in enumerate(PARTS):
            box = QCheckBox(text, what_box)
            box.setChecked(name in _DEFAULT_PARTS)
            files = QLabel("", what_box)
            files.setEnabled(False)      # drawn dimmer: a hint, not a control
            grid.addWidget(box, row, 0)
            grid.addWidget(files, row, 1)
            self.what_boxes[name] = box
            self._file_labels[name] = files
        grid.setColumnStretch(1, 1)
        left.addWidget(what_box)

        # options
        opt_box = QGroupBox("Options", self)
        form = QFormLayout(opt_box)
        rank_row = QHBoxLayout()
        self.rank_spin = QSpinBox(opt_box)
        self.rank_spin.setRange(1, 1)
        self.rank_of_label = QLabel("", opt_box)
        rank_row.addWidget(self.rank_spin)
        rank_row.addWidget(self.rank_of_label)
        rank_row.addStretch(1)
        form.addRow("Rank (basis images used):", rank_row)

        fmt_row = QHBoxLayout()
        self.format_combo = QComboBox(opt_box)
        for key, label in _FORMAT_LABELS:
            self.format_combo.addItem(label, key)
        self.quality_label = QLabel("Quality:", opt_box)
        self.quality_spin = QSpinBox(opt_box)
        self.quality_spin.setRange(1, 100)
        self.quality_spin.setValue(90)
        self.quality_spin.setToolTip("JPEG and WebP quality, 1 (smallest files) to 100 (best)")
        fmt_row.addWidget(self.format_combo)
        fmt_row.addSpacing(12)
        fmt_row.addWidget(self.quality_label)
        fmt_row.addWidget(self.quality_spin)
        fmt_row.addStretch(1)
        form.addRow("Preview format:", fmt_row)

        img_row = QVBoxLayout()
        img_row.setSpacing(2)
        self.images_all = QRadioButton("All images", opt_box)
        self.images_selected = QRadioButton("Selected images", opt_box)
        self.images_flagged = QRadioButton("Flagged as outliers", opt_box)
        self.images_group = QButtonGroup(self)
        for b in (self.images_all, self.images_selected, self.images_flagged):
            self.images_group.addButton(b)
            img_row.addWidget(b)
        self.images_all.setChecked(True)
        form.addRow("Images:", img_row)

        self.upsample_check = QCheckBox("Previews at the source size", opt_box)
        self.sheet_spin = QSpinBox(opt_box)
        self.sheet_spin.setRange(1, 1)
        self.sheet_spin.setValue(16)
        self.float16_check = QCheckBox("Compact model in float16 (half the size)", opt_box)
        sheet_row = QHBoxLayout()
        sheet_row.addWidget(self.sheet_spin)
        sheet_row.addStretch(1)
        form.addRow("", self.upsample_check)
        form.addRow("Contact sheet tiles:", sheet_row)
        form.addRow("", self.float16_check)
        right.addWidget(opt_box)
        right.addStretch(1)

        # destination
        dest_box = QGroupBox("Destination folder", self)
        dest = QVBoxLayout(dest_box)
        folder_row = QHBoxLayout()
        self.folder_edit = QLineEdit(dest_box)
        self.folder_edit.setPlaceholderText("Choose a folder (created if missing)")
        self.browse_button = QPushButton("Browse…", dest_box)
        folder_row.addWidget(self.folder_edit, 1)
        folder_row.addWidget(self.browse_button)
        dest.addLayout(folder_row)
        self.overwrite_check = QCheckBox("Replace files that already exist", dest_box)
        self.source_folder_check = QCheckBox(
            "Allow writing into a folder that holds source images", dest_box)
        self.source_folder_warning = QLabel(
            "The exported files will sit next to the source images. Make sure you can tell "
            "them apart; with replacing allowed too, a source file with the same name as an "
            "exported file would be replaced.", dest_box)
        self.source_folder_warning.setWordWrap(True)
        self.source_folder_warning.setStyleSheet(_WARNING_STYLE)
        self.source_folder_warning.setVisible(False)
        dest.addWidget(self.overwrite_check)
        dest.addWidget(self.source_folder_check)
        dest.addWidget(self.source_folder_warning)
        left.addWidget(dest_box)
        left.addStretch(1)

        # what it will be
        self.resolution_label = QLabel("", self)
        self.resolution_label.setWordWrap(True)
        self.compression_label = QLabel("", self)
        self.compression_label.setWordWrap(True)
        self.compression_label.setTextInteractionFlags(
            Qt.TextInteractionFlag.TextSelectableByMouse)
        outer.addWidget(self.resolution_label)
        outer.addWidget(self.compression_label)

        # messages, progress, report
        self.message_label = QLabel("", self)
        self.message_label.setWordWrap(True)
        self.message_label.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.message_label.setVisible(False)
        outer.addWidget(self.message_label)
        self.progress_bar = QProgressBar(self)
        self.progress_bar.setFormat("%v of %m files")
        self.progress_bar.setVisible(False)
        outer.addWidget(self.progress_bar)
        self.report_view = QPlainTextEdit(self)
        self.report_view.setReadOnly(True)
        self.report_view.setLineWrapMode(QPlainTextEdit.LineWrapMode.WidgetWidth)
        self.report_view.setMaximumHeight(120)
        self.report_view.setVisible(False)
        outer.addWidget(self.report_view)

        buttons = QHBoxLayout()
        self.open_folder_button = QPushButton("Show folder", self)
        self.open_folder_button.setVisible(False)
        self.export_button = QPushButton("Export", self)
        self.export_button.setDefault(True)
        self.cancel_button = QPushButton("Stop", self)
        self.cancel_button.setToolTip("Stop after the current file; completed files are kept")
        self.cancel_button.setEnabled(False)
        self.close_button = QPushButton("Close", self)
        self.close_button.setAutoDefault(False)
        buttons.addWidget(self.open_folder_button)
        buttons.addStretch(1)
        buttons.addWidget(self.export_button)
        buttons.addWidget(self.cancel_button)
        buttons.addWidget(self.close_button)
        outer.addLayout(buttons)
        self.setMinimumWidth(760)

    def _wire(self) -> None:
        for box in self.what_boxes.values():
            box.toggled.connect(self._on_option_changed)
        for w in (self.upsample_check, self.float16_check, self.overwrite_check,
                  self.source_folder_check):
            w.toggled.connect(self._on_option_changed)
        self.rank_spin.valueChanged.connect(self._on_option_changed)
        self.format_combo.currentIndexChanged.connect(self._on_option_changed)
        self.images_group.buttonToggled.connect(self._on_option_changed)
        self.folder_edit.textChanged.connect(self._on_folder_edited)
        self.browse_button.clicked.connect(self.choose_folder)
        self.export_button.clicked.connect(self.start_export)
        self.cancel_button.clicked.connect(self.cancel_export)
        self.close_button.clicked.connect(self.close)
        self.open_folder_button.clicked.connect(self._show_folder)
        self.state.decompositionChanged.connect(self._on_state_changed)
        self.state.selectedChanged.connect(self._on_state_changed)
        self.state.selectionSetChanged.connect(self._on_state_changed)
        self.state.levelChanged.connect(self._on_state_changed)

    # ----- reading the state -------------------------------------------------------------------
    @property
    def decomposition(self) -> Decomposition | None:
        """The analysis the dialog would export now."""
        return self.state.decomposition

    def sync_from_state(self, reset_rank: bool = False) -> None:
        """Bring the controls in line with the state (``reset_rank``: take ``state.rank``)."""
        d = self.decomposition
        k = 0 if d is None else d.rank
        with _Blocked(self.rank_spin, self.sheet_spin):
            self.rank_spin.setRange(1, max(k, 1))
            if reset_rank and k:
                r = self.state.rank if 1 <= self.state.rank <= k else initial_rank(d)
                self.rank_spin.setValue(max(1, min(k, r)))
            self.sheet_spin.setRange(1, max(k, 1))
            if reset_rank:
                self.sheet_spin.setValue(min(16, max(k, 1)))
        self.rank_of_label.setText(f"of {k}" if k else "")
        self._flag_cache = None
        self._update()

    @Slot()
    def _on_state_changed(self, *_args) -> None:
        if self._running:
            return
        self.sync_from_state(reset_rank=False)

    def selected_images(self) -> tuple[int, ...]:
        """Return the images "Selected images" stands for: the picked set, else the current one."""
        if self.state.selection_set:
            return tuple(self.state.selection_set)
        return (self.state.selected,) if self.state.selected >= 0 else ()

    def flagged_images(self) -> tuple[int, ...] | None:
        """Return the images flagged at the chosen rank and ``state.level`` (None: cannot tell).

        The flags are :func:`modescope.core.review.outliers.score_table`'s ``flag`` column (through
        :func:`modescope.core.output.export.select_images`); a streaming snapshot has no residuals and
        cannot be scored.
        """
        d = self.decomposition
        if d is None or d.residual is None or d.n_images < 2:
            return None
        key = (id(d), self.rank_spin.value(), self.state.level)
        if self._flag_cache is None or self._flag_cache[0] != key:
            try:
                idx = tuple(int(i) for i in select_images(d, "flagged",
                                                          rank=self.rank_spin.value(),
                                                          level=self.state.level))
            except (ModescopeError, ValueError):
                idx = None
            self._flag_cache = (key, idx)
        return self._flag_cache[1]

    # ----- options -----------------------------------------------------------------------------
    def chosen_parts(self) -> tuple[str, ...]:
        """Return the parts ticked, in the dialog's order."""
        return tuple(name for name, box in self.what_boxes.items() if box.isChecked())

    def image_format(self) -> str:
        """Return the preview format key ("png", "jpg", "webp" or "tiff")."""
        return str(self.format_combo.currentData())

    def set_image_format(self, key: str) -> None:
        """Choose the preview format by key."""
        i = self.format_combo.findData(key)
        if i < 0:
            raise ValueError(f"image format must be one of {', '.join(FORMATS)}, got {key!r}")
        self.format_combo.setCurrentIndex(i)

    def images_choice(self) -> str:
        """Return "all", "selected" or "flagged"."""
        if self.images_selected.isChecked():
            return "selected"
        if self.images_flagged.isChecked():
            return "flagged"
        return "all"

    def set_images_choice(self, choice: str) -> None:
        """Choose "all", "selected" or "flagged"."""
        buttons = {"all": self.images_all, "selected": self.images_selected,
                   "flagged": self.images_flagged}
        if choice not in buttons:
            raise ValueError(f"images must be all, selected or flagged, got {choice!r}")
        buttons[choice].setChecked(True)

    def folder(self) -> str:
        """Return the destination folder typed or chosen ("" when none)."""
        return self.folder_edit.text().strip()

    def set_folder(self, path) -> None:
        """Set the destination folder (kept for the rest of the session)."""
        self.folder_edit.setText(os.fspath(path) if path else "")

    def _upsample_possible(self) -> bool:
        d = self.decomposition
        if d is None:
            return False
        try:
            downscale = int(d.metadata.get("downscale", 1))
        except (TypeError, ValueError):
            return False
        size = d.metadata.get("source_size")
        return (downscale > 1 and isinstance(size, (list, tuple)) and len(size) == 2
                and all(isinstance(v, int) and v > 0 for v in size))

    def plan_options(self) -> dict[str, Any]:
        """Return the keyword options of :func:`~modescope.core.output.export.plan_export` shown now."""
        parts = self.chosen_parts()
        choice = self.images_choice()
        images: Any = "all"
        if choice == "selected":
            images = list(self.selected_images())
        elif choice == "flagged":
            images = "flagged"
        return dict(
            rank=int(self.rank_spin.value()), what=parts, image_format=self.image_format(),
            quality=int(self.quality_spin.value()), images=images, level=float(self.state.level),
            upsample=bool(self.upsample_check.isChecked() and self.upsample_check.isEnabled()),
            float16=bool(self.float16_check.isChecked() and self.float16_check.isEnabled()),
            sheet_count=int(self.sheet_spin.value()),
            overwrite=bool(self.overwrite_check.isChecked()),
            allow_source_folder=bool(self.source_folder_check.isChecked()))

    @Slot()
    def _on_option_changed(self, *_args) -> None:
        self._update()

    @Slot(str)
    def _on_folder_edited(self, text: str) -> None:
        global _session_folder
        _session_folder = text.strip()
        self._update()

    # ----- the live lines and the enabled state ----------------------------------------------
    def resolution_text(self) -> str:
        """Return the line saying at which resolution previews are written."""
        d = self.decomposition
        if d is None:
            return ""
        rows, cols = int(d.image_shape[0]), int(d.image_shape[1])
        if "previews" not in self.chosen_parts():
            return f"No previews are written (the analysis resolution is {rows} × {cols} pixels)."
        if self.upsample_check.isEnabled() and self.upsample_check.isChecked():
            src = d.metadata["source_size"]
            return (f"Previews are written at the source size, {int(src[0])} × {int(src[1])} "
                    f"pixels (enlarged from the analysis resolution, {rows} × {cols}).")
        text = f"Previews are written at the analysis resolution, {rows} × {cols} pixels"
        if self._upsample_possible():
            src = d.metadata["source_size"]
            text += f" (the sources are {int(src[0])} × {int(src[1])})"
        return text + "."

    def compression_text(self) -> str:
        """Return the line with the numbers a rank-k model stores against the data matrix."""
        d = self.decomposition
        if d is None or d.rank < 1:
            return ""
        k = int(self.rank_spin.value())
        n, m = d.n_pixels, d.n_images
        stored, full = compression_numbers(n, m, k)
        ratio = full / stored
        how = (f"{ratio:.3g} times fewer" if ratio >= 1 else f"{1 / ratio:.3g} times more")
        return (f"A rank-{k} model stores k(n+m+1)+n = {_format_count(stored)} numbers "
                f"(n = {_format_count(n)} values per image, m = {_format_count(m)} images) "
                f"against n·m = {_format_count(full)} for the images themselves: {how}.")

    def _describe_analysis(self, d: Decomposition | None) -> str:
        if d is None:
            return "There is no analysis to export. Analyse a folder or open a saved analysis."
        rows, cols, ch = (tuple(int(v) for v in d.image_shape) + (1, 1, 1))[:3]
        colour = "RGB" if ch == 3 else "gray"
        text = (f"{_format_count(d.n_images)} {colour} images of {rows} × {cols} pixels, "
                f"{d.rank} basis images.")
        if not d.exact:
            text += (" This is a partial result (the analysis is running or was stopped); "
                     "outlier flags are not available for it.")
        return text

    def _update(self) -> None:
        d = self.decomposition
        has = d is not None and d.rank >= 1
        running = self._running
        parts = self.chosen_parts()
        k = int(self.rank_spin.value())
        ext = FORMATS.get(self.image_format(), ".png")
        for name, _text, files in PARTS:
            label = files(k, ext)
            if name == "model" and self.float16_check.isChecked():
                label = f"model_r{k}_f16.npz"
            self._file_labels[name].setText(label)
        self.what_boxes["previews"].setText(f"Previews (rank-{k} reconstructions)")
        self.analysis_label.setText(self._describe_analysis(d))
        idle = has and not running

        for box in self.what_boxes.values():
            box.setEnabled(idle)
        self.rank_spin.setEnabled(idle)
        previews = "previews" in parts
        self.format_combo.setEnabled(idle and previews)
        self.quality_spin.setEnabled(idle and previews and self.image_format() in ("jpg", "webp"))
        self.quality_label.setEnabled(self.quality_spin.isEnabled())
        self.upsample_check.setEnabled(idle and previews and self._upsample_possible())
        if not self._upsample_possible():
            self.upsample_check.setText("Previews at the source size (analysis not downscaled)")
            self.upsample_check.setToolTip("")
        else:
            self.upsample_check.setText("Previews at the source size")
            self.upsample_check.setToolTip("Enlarge each preview to the size of its source "
                                           "(bicubic)")
        self.sheet_spin.setEnabled(idle and "sheet" in parts)
        self.float16_check.setEnabled(idle and "model" in parts)

        per_image = any(p in parts for p in _PER_IMAGE)
        n_all = d.n_images if d is not None else 0
        selected = self.selected_images() if d is not None else ()
        flagged = self.flagged_images() if d is not None else None
        self.images_all.setText(f"All images ({_format_count(n_all)})")
        self.images_selected.setText(
            f"Selected images ({len(selected)})" if selected else "Selected images (none)")
        if flagged is None:
            why = ("needs a finished analysis" if d is not None and d.residual is None
                   else "not available")
            self.images_flagged.setText(f"Flagged as outliers ({why})")
        else:
            pct = 100.0 * float(self.state.level)
            self.images_flagged.setText(
                f"Flagged as outliers ({len(flagged)} at {pct:g} %, rank {k})")
        self.images_all.setEnabled(idle and per_image)
        self.images_selected.setEnabled(idle and per_image and bool(selected))
        self.images_flagged.setEnabled(idle and per_image and flagged is not None)
        if (self.images_selected.isChecked() and not selected) or \
                (self.images_flagged.isChecked() and flagged is None):
            with _Blocked(self.images_group):
                self.images_all.setChecked(True)

        for w in (self.folder_edit, self.browse_button, self.overwrite_check,
                  self.source_folder_check):
            w.setEnabled(not running)
        self.source_folder_warning.setVisible(self.source_folder_check.isChecked())

        self.resolution_label.setText(self.resolution_text())
        self.compression_label.setText(self.compression_text())
        self.export_button.setEnabled(idle and bool(parts) and bool(self.folder()))
        if not parts:
            self.export_button.setToolTip("Tick at least one thing to write")
        elif not self.folder():
            self.export_button.setToolTip("Choose a destination folder")
        else:
            self.export_button.setToolTip("Check the destination, then write the files")
        self.cancel_button.setEnabled(running and self.worker is not None
                                      and not self.worker.is_cancel_requested())
        self.close_button.setText("Stop and close" if running else "Close")

    # ----- messages ----------------------------------------------------------------------------
    def message_text(self) -> str:
        """Return the message shown in the dialog ("" when none)."""
        return self.message_label.text()

    def _show_message(self, text: str, kind: str = "error") -> None:
        self.message_label.setStyleSheet(_MESSAGE_STYLE[kind])
        self.message_label.setText(text)
        self.message_label.setVisible(bool(text))

    # ----- the folder --------------------------------------------------------------------------
    @Slot()
    def choose_folder(self) -> None:
        """Ask for the destination folder."""
        start = self.folder() or (self.settings.last_dir() if self.settings is not None else "")
        if not start or not os.path.isdir(start):
            start = os.path.expanduser("~")
        path = QFileDialog.getExistingDirectory(self, "Export into folder", start)
        if path:
            self.set_folder(path)

    @Slot()
    def _show_folder(self) -> None:
        report = self.last_report
        if report is not None:
            QDesktopServices.openUrl(QUrl.fromLocalFile(str(report.folder)))

    # ----- exporting ---------------------------------------------------------------------------
    def is_running(self) -> bool:
        """Return True while an export is writing files."""
        return self._running

    def plan(self) -> ExportPlan:
        """Plan the export shown, without writing anything.

        Returns
        -------
        ExportPlan

        Raises
        ------
        ValueError, DestinationError
            When nothing can be exported or the destination refuses (the message says why).
        """
        d = self.decomposition
        if d is None or d.rank < 1:
            raise ValueError("there is no analysis to export")
        if not self.chosen_parts():
            raise ValueError("tick at least one thing to write")
        folder = self.folder()
        if not folder:
            raise ValueError("choose a destination folder first")
        options = self.plan_options()
        if options["images"] == []:
            raise ValueError("no image is selected; pick images in the workbench or choose "
                             "all images")
        path = Path(os.path.expanduser(folder))
        created = False
        if not path.exists():
            try:
                path.mkdir(parents=True)
            except OSError as exc:
                raise DestinationError(f"cannot create the folder {path}: "
                                       f"{exc.strerror or exc}", path=path) from exc
            created = True
        try:
            return plan_export(d, path, ExportOptions(**options))
        except BaseException:
            if created:
                try:
                    path.rmdir()
                except OSError:
                    pass
            raise

    @Slot()
    def start_export(self) -> bool:
        """Plan the export and, when the destination accepts it, write it in a worker thread.

        Returns
        -------
        bool
            True when the export started; False when it was refused (the reason is shown in the
            dialog and nothing was written).
        """
        if self._running:
            return False
        self.report_view.setVisible(False)
        self.open_folder_button.setVisible(False)
        try:
            plan = self.plan()
        except Exception as exc:  # noqa: BLE001 - every refusal becomes a message
            if not isinstance(exc, (ModescopeError, TypeError, ValueError, OSError,
                                    MemoryError)):
                _log.error("export planning failed", exc_info=exc)
            text = export_error_message(exc)
            self._show_message(text, "error")
            self.exportFailed.emit(text)
            return False
        self.last_plan = plan
        self.last_report = None
        if self.settings is not None:
            self.settings.set_export_folder(os.fspath(plan.folder))
        worker = ExportWorker(plan)
        thread = QThread()
        thread.setObjectName("modescope-export")
        worker.moveToThread(thread)
        thread.started.connect(worker.run)
        worker.progress.connect(self._on_progress)
        worker.ended.connect(self._on_worker_ended)
        self.worker = worker
        self._thread = thread
        self._running = True
        total = len(plan.items)
        self.progress_bar.setRange(0, max(total, 1))
        self.progress_bar.setValue(0)
        self.progress_bar.setVisible(True)
        self._show_message(f"Writing {total} files into {plan.folder}…", "info")
        self._update()
        self.exportStarted.emit(worker)
        thread.start()
        return True

    @Slot()
    def cancel_export(self) -> None:
        """Stop the export after the current file (completed files are kept)."""
        if self._running and self.worker is not None:
            self.worker.cancel()
            self._show_message("Stopping after the current file…", "info")
            self._update()

    @Slot(int, int)
    def _on_progress(self, done: int, total: int) -> None:
        if not self._running:
            return
        self.progress_bar.setRange(0, max(total, 1))
        self.progress_bar.setValue(min(done, max(total, 1)))

    @Slot(object)
    def _on_worker_ended(self, worker: ExportWorker) -> None:
        if worker is self.worker and self._running:
            self._collect(worker)

    def _collect(self, worker: ExportWorker) -> None:
        """Show how an export ended and free its thread (GUI thread)."""
        thread, self._thread = self._thread, None
        if thread is not None:
            thread.wait(CLOSE_TIMEOUT_MS)
            thread.deleteLater()
        self._running = False
        report = worker.report
        if report is not None:
            self.last_report = report
            self.progress_bar.setRange(0, max(len(report.written) + len(report.skipped), 1))
            self.progress_bar.setValue(len(report.written))
            if report.cancelled:
                self._show_message(
                    f"Stopped: {report.n_written} of {report.n_written + len(report.skipped)} "
                    f"files were written and are complete.", "info")
            else:
                self._show_message(f"Done: {report.n_written} files written into "
                                   f"{report.folder}.", "done")
            self.report_view.setPlainText(report.summary())
            self.report_view.setVisible(True)
            self.open_folder_button.setVisible(report.n_written > 0)
            self._update()
            self.exportFinished.emit(report)
        else:
            text = worker.error or "The export stopped for an unknown reason."
            self.progress_bar.setVisible(False)
            self._show_message(text, "error")
            self._update()
            self.exportFailed.emit(text)
        self.sync_from_state(reset_rank=False)

    def shutdown(self, timeout_ms: int = CLOSE_TIMEOUT_MS) -> bool:
        """Stop a running export after the current file and wait for it at most ``timeout_ms``.

        Returns
        -------
        bool
            True when no export is running any more.
        """
        worker, thread = self.worker, self._thread
        if not self._running or worker is None:
            return True
        worker.cancel()
        if thread is not None and not thread.wait(int(timeout_ms)):
            _log.warning("the export thread did not stop within %d ms", timeout_ms)
            self._show_message("Still finishing the current file; the export stops right "
                               "after it.", "info")
            return False
        self._collect(worker)
        return True

    def closeEvent(self, event: QCloseEvent) -> None:  # noqa: N802 - Qt name
        if self.shutdown():
            super().closeEvent(event)
        else:
            event.ignore()

    def reject(self) -> None:
        """Close (Esc): stop a running export first, waiting for the current file."""
        if self.shutdown():
            super().reject()

    def showEvent(self, event) -> None:  # noqa: N802 - Qt name
        super().showEvent(event)
        if not self._running:
            self.sync_from_state(reset_rank=False)
        if not self._sized:
            # a first show is limited to 2/3 of the screen width; take the width the
            # two columns need when the screen has room for it
            self._sized = True
            want = self.sizeHint()
            screen = self.screen()
            if screen is not None:
                room = screen.availableGeometry()
                want = want.boundedTo(room.size())
            self.resize(want.expandedTo(self.size()))


class _Blocked:
    """Block the signals of some QObjects inside a ``with`` block."""

    def __init__(self, *objects: QObject):
        self.objects = objects
        self.old: list[bool] = []

    def __enter__(self):
        self.old = [o.blockSignals(True) for o in self.objects]
        return self

    def __exit__(self, *exc):
        for o, old in zip(self.objects, self.old):
            o.blockSignals(old)
        return False
