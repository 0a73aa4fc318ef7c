"""The sources pane: choose what to analyse and how, see what was found, start and cancel.

The list of sources takes folders and files from the two buttons or by drag and drop. Whenever
the sources or the options that change what is found (colour, subfolders, resizing) change, the
collection is scanned again (file headers only) on a background thread; the summary line says how
many images were found, their size and file modes, and the table lists every skipped file with
its reason. The pane never starts an analysis itself: it emits :attr:`IngestPane.startRequested`
and :attr:`IngestPane.cancelRequested` and the main window runs the worker.
"""

from __future__ import annotations

import os
from collections import Counter
from typing import Any, Callable, Iterable, Sequence

from PySide6.QtCore import QTimer, Qt, Signal, Slot
from PySide6.QtWidgets import (
    QAbstractItemView,
    QCheckBox,
    QComboBox,
    QFileDialog,
    QFormLayout,
    QGroupBox,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QListWidget,
    QListWidgetItem,
    QPushButton,
    QSizePolicy,
    QSpinBox,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
    QWidget,
)

from modescope.app.words import counted
from modescope.app.desktop.display import display_name, display_path, display_text
from modescope.app.desktop.settings import StoredOptions
from modescope.app.desktop.workers.background import BackgroundRunner

__all__ = ["IngestPane", "make_analysis_options", "scan_collection", "describe_source_set",
           "IMAGE_FILE_FILTER", "MODEL_FILE_FILTER"]

IMAGE_FILE_FILTER = ("Images (*.png *.jpg *.jpeg *.tif *.tiff *.bmp *.webp);;"
                     "Videos and frame stacks (*.mp4 *.m4v *.mov *.avi *.mkv *.webm *.npy *.h5 *.hdf5);;"
                     "All files (*)")
MODEL_FILE_FILTER = "Modescope analysis (*.npz);;All files (*)"
#: Start of the reason of a file that was used but drew a warning (a row of the skipped table).
NOTE_PREFIX = "Used, with a note: "
#: Item data role holding a row's kind in the skipped table: "skipped" or "note".
KIND_ROLE = Qt.ItemDataRole.UserRole + 1


def make_analysis_options(stored: StoredOptions, **extra: Any):
    """Return a ``pipeline.AnalysisOptions`` built from the pane's options.

    Parameters
    ----------
    stored : StoredOptions
        Rank, colour, downscale, subfolders, resizing.
    **extra
        Further ``AnalysisOptions`` fields (block_size, workers, ...).
    """
    from modescope.core.engine import pipeline

    return pipeline.AnalysisOptions(rank=int(stored.rank), color=str(stored.color),
                                    downscale=int(stored.downscale),
                                    recursive=bool(stored.recursive),
                                    resize_mismatched=bool(stored.resize_mismatched), **extra)


def scan_collection(sources: Sequence[str], stored: StoredOptions,
                    cancel: Callable[[], bool] | None = None):
    """Scan ``sources`` with the pane's options and return a SourceSet.

    Parameters
    ----------
    sources : sequence of str
        Folders and files.
    stored : StoredOptions
        Colour, subfolders and resizing are used.
    cancel : callable() -> bool, optional
        Checked before each file (``pipeline.scan``); True stops the scan.

    Returns
    -------
    SourceSet

    Raises
    ------
    NoUsableImagesError
        If nothing usable was found.
    AnalysisCancelled
        If ``cancel()`` returned True.
    """
    from modescope.core.engine import pipeline

    return pipeline.scan(list(sources), make_analysis_options(stored), cancel=cancel)


def describe_source_set(source_set, downscale: int = 1) -> str:
    """Return one line saying how many images were found, their size and file modes.

    Parameters
    ----------
    source_set : SourceSet
    downscale : int
        The downscale factor chosen (the analysed size is shown when it is above 1).
    """
    n = source_set.n_images
    rows, cols = source_set.reference_size
    modes = Counter(ref.mode for ref in source_set.images)
    mode_text = ", ".join(f"{m}" if c == n else f"{m} ({c})" for m, c in modes.most_common(3))
    if len(modes) > 3:
        mode_text += ", ..."
    analysed = "colour" if source_set.color == "rgb" else "gray"
    text = (f"{n} image{'s' if n != 1 else ''} of {rows} × {cols} pixels "
            f"(file mode {mode_text}), analysed in {analysed}")
    if downscale > 1:
        text += f" at {rows // downscale} × {cols // downscale}"
    skipped = len(source_set.problems)
    if skipped:
        text += f"; {skipped} skipped"
    return text


class IngestPane(QWidget):
    """Sources, options, scan summary, skipped files, Start and Cancel.

    Parameters
    ----------
    parent : QWidget, optional
    options : StoredOptions, optional
        Options shown at first.

    Signals
    -------
    startRequested(object, object)
        The sources (list of str) and the options (StoredOptions) when Start is pressed.
    cancelRequested()
        Cancel was pressed.
    sourcesChanged(object)
        The list of sources changed.
    scanFinished(object)
        A scan ended: the SourceSet, or None when nothing usable was found.
    """

    startRequested = Signal(object, object)
    cancelRequested = Signal()
    sourcesChanged = Signal(object)
    scanFinished = Signal(object)

    def __init__(self, parent: QWidget | None = None, *, options: StoredOptions | None = None):
        super().__init__(parent)
        self.setAcceptDrops(True)
        self._running = False
        self._dialog_dir = ""
        # one scan at a time; a newer scan (or stop_scan) cancels the older one and its result
        # is never forwarded
        self._scans = BackgroundRunner(self, threads=1, task="The scan")
        self._scans.finished.connect(self._on_scan_done)
        self._scans.failed.connect(self._on_scan_error)
        self.source_set = None
        self._scanned_key = None     # (sources, options) the current source_set was made for
        self._pending_key = None
        self._scan_timer = QTimer(self)
        self._scan_timer.setSingleShot(True)
        self._scan_timer.setInterval(120)
        self._scan_timer.timeout.connect(self.rescan)
        self._build()
        self.set_options(options or StoredOptions())
        self._wire()
        self._update_buttons()

    # ----- construction ------------------------------------------------------------------------
    def _build(self) -> None:
        sources_box = QGroupBox("Image sources", self)
        self.source_list = QListWidget(sources_box)
        self.source_list.setSelectionMode(QAbstractItemView.SelectionMode.ExtendedSelection)
        self.source_list.setToolTip("Folders and image files to analyse. Drop them here.")
        self.source_list.setMinimumHeight(60)
        self.source_list.setAcceptDrops(False)   # the pane takes the drops
        self.add_folder_button = QPushButton("Add folder…", sources_box)
        self.add_files_button = QPushButton("Add files…", sources_box)
        self.add_folder_button.setToolTip("Add a folder of images to the sources (Ctrl+D)")
        self.add_files_button.setToolTip("Add image files to the sources (Ctrl+Shift+O)")
        self.remove_button = QPushButton("Remove", sources_box)
        self.remove_button.setToolTip("Remove the selected sources")
        buttons = QHBoxLayout()
        buttons.addWidget(self.add_folder_button)
        buttons.addWidget(self.add_files_button)
        buttons.addWidget(self.remove_button)
        self.summary_label = QLabel("Add a folder of aligned images, or drop one here.",
                                    sources_box)
        self.summary_label.setWordWrap(True)
        self.summary_label.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        lay = QVBoxLayout(sources_box)
        lay.addWidget(self.source_list, 1)
        lay.addLayout(buttons)
        lay.addWidget(self.summary_label)

        options_box = QGroupBox("Analysis options", self)
        self.rank_spin = QSpinBox(options_box)
        self.rank_spin.setRange(1, 1000)
        self.rank_spin.setToolTip("How many basis images (singular vectors) to compute")
        self.color_combo = QComboBox(options_box)
        self.color_combo.addItem("Gray (one channel)", "gray")
        self.color_combo.addItem("RGB (three channels)", "rgb")
        self.color_combo.setToolTip("Analyse the images as gray values (one channel) or as "
                                    "colour (three channels, three times the memory)")
        self.downscale_spin = QSpinBox(options_box)
        self.downscale_spin.setRange(1, 32)
        self.downscale_spin.setPrefix("1/")
        self.downscale_spin.setToolTip("Average blocks of f × f pixels before the analysis")
        self.recursive_check = QCheckBox("Include subfolders", options_box)
        self.recursive_check.setToolTip("Also look for images in the folders inside each "
                                        "source folder")
        self.resize_check = QCheckBox("Resize images of another size", options_box)
        self.resize_check.setToolTip("Otherwise images whose size differs from the most common "
                                     "size are skipped")
        form = QFormLayout(options_box)
        form.setFieldGrowthPolicy(QFormLayout.FieldGrowthPolicy.AllNonFixedFieldsGrow)
        form.addRow("Basis images:", self.rank_spin)
        form.addRow("Channels:", self.color_combo)
        form.addRow("Downscale:", self.downscale_spin)
        form.addRow(self.recursive_check)
        form.addRow(self.resize_check)

        problems_box = self.problems_box = QGroupBox("Skipped files", self)
        self.problem_table = QTableWidget(0, 2, problems_box)
        self.problem_table.setHorizontalHeaderLabels(["File", "Reason"])
        self.problem_table.verticalHeader().setVisible(False)
        self.problem_table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.problem_table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.problem_table.setWordWrap(False)
        header = self.problem_table.horizontalHeader()
        header.setSectionResizeMode(0, QHeaderView.ResizeMode.Interactive)
        header.setStretchLastSection(True)
        header.resizeSection(0, 140)
        self.problem_table.setMinimumHeight(50)
        play = QVBoxLayout(problems_box)
        play.addWidget(self.problem_table)

        self.start_button = QPushButton("Start analysis", self)
        self.start_button.setDefault(True)
        self.start_button.setToolTip("Analyse the sources with the options shown (Ctrl+R)")
        self.cancel_button = QPushButton("Cancel", self)
        self.cancel_button.setToolTip("Stop the analysis and keep the partial result (Esc)")
        run_row = QHBoxLayout()
        run_row.addWidget(self.start_button, 2)
        run_row.addWidget(self.cancel_button, 1)

        layout = QVBoxLayout(self)
        layout.setContentsMargins(6, 6, 6, 6)
        layout.addWidget(sources_box, 3)
        layout.addWidget(options_box, 0)
        layout.addWidget(problems_box, 2)
        layout.addLayout(run_row)
        self.setSizePolicy(QSizePolicy.Policy.Preferred, QSizePolicy.Policy.Expanding)

    def _wire(self) -> None:
        self.add_folder_button.clicked.connect(self.choose_folder)
        self.add_files_button.clicked.connect(self.choose_files)
        self.remove_button.clicked.connect(self.remove_selected)
        self.source_list.itemSelectionChanged.connect(self._update_buttons)
        self.start_button.clicked.connect(self._on_start)
        self.cancel_button.clicked.connect(self.cancelRequested)
        self.color_combo.currentIndexChanged.connect(self._schedule_scan)
        self.recursive_check.toggled.connect(self._schedule_scan)
        self.resize_check.toggled.connect(self._schedule_scan)
        self.downscale_spin.valueChanged.connect(self._refresh_summary)

    # ----- options -----------------------------------------------------------------------------
    def options(self) -> StoredOptions:
        """Return the options shown."""
        return StoredOptions(rank=self.rank_spin.value(),
                             color=str(self.color_combo.currentData()),
                             downscale=self.downscale_spin.value(),
                             recursive=self.recursive_check.isChecked(),
                             resize_mismatched=self.resize_check.isChecked())

    def set_options(self, options: StoredOptions) -> None:
        """Show ``options``."""
        self.rank_spin.setValue(int(options.rank))
        index = self.color_combo.findData(options.color)
        self.color_combo.setCurrentIndex(max(index, 0))
        self.downscale_spin.setValue(int(options.downscale))
        self.recursive_check.setChecked(bool(options.recursive))
        self.resize_check.setChecked(bool(options.resize_mismatched))

    def set_dialog_dir(self, path: str) -> None:
        """Set the folder the file dialogs open in."""
        self._dialog_dir = path or ""

    def dialog_dir(self) -> str:
        """Return the folder the file dialogs open in."""
        return self._dialog_dir

    # ----- sources -----------------------------------------------------------------------------
    def sources(self) -> list[str]:
        """Return the sources listed, in order."""
        # kept as bytes: a Qt string would drop the bytes of a name that are not valid UTF-8
        return [os.fsdecode(self.source_list.item(i).data(Qt.ItemDataRole.UserRole))
                for i in range(self.source_list.count())]

    def set_sources(self, paths: Iterable[str]) -> None:
        """Replace the sources listed (duplicates dropped) and scan them."""
        self.source_list.clear()
        self._add(paths)
        if not self.sources():
            self._schedule_scan()

    def add_sources(self, paths: Iterable[str]) -> int:
        """Add folders or files (absolute paths; duplicates ignored); return how many were new."""
        return self._add(paths)

    def _add(self, paths: Iterable[str]) -> int:
        present = set(self.sources())
        added = 0
        for p in paths:
            p = os.path.abspath(os.fspath(p))
            if p in present:
                continue
            present.add(p)
            label = display_path(p) + (os.sep if os.path.isdir(p) else "")
            item = QListWidgetItem(label)
            item.setData(Qt.ItemDataRole.UserRole, os.fsencode(p))
            item.setToolTip(display_path(p))
            self.source_list.addItem(item)
            added += 1
        if added:
            self._sources_changed()
        return added

    def remove_selected(self) -> None:
        """Remove the selected sources."""
        rows = sorted({self.source_list.row(it) for it in self.source_list.selectedItems()},
                      reverse=True)
        for row in rows:
            self.source_list.takeItem(row)
        if rows:
            self._sources_changed()

    def _sources_changed(self) -> None:
        self._update_buttons()
        self.sourcesChanged.emit(self.sources())
        self._schedule_scan()

    @Slot()
    def choose_folder(self) -> None:
        """Ask for a folder and add it."""
        folder = QFileDialog.getExistingDirectory(self, "Add a folder of images",
                                                  self._dialog_dir)
        if folder:
            self._dialog_dir = folder
            self.add_sources([folder])

    @Slot()
    def choose_files(self) -> None:
        """Ask for image files and add them."""
        files, _ = QFileDialog.getOpenFileNames(self, "Add image files", self._dialog_dir,
                                                IMAGE_FILE_FILTER)
        if files:
            self._dialog_dir = os.path.dirname(files[0])
            self.add_sources(files)

    # drag and drop
    def dragEnterEvent(self, event) -> None:  # noqa: N802 - Qt name
        if event.mimeData().hasUrls() and any(u.isLocalFile() for u in event.mimeData().urls()):
            event.acceptProposedAction()
        else:
            event.ignore()

    def dragMoveEvent(self, event) -> None:  # noqa: N802 - Qt name
        self.dragEnterEvent(event)

    def dropEvent(self, event) -> None:  # noqa: N802 - Qt name
        paths = [u.toLocalFile() for u in event.mimeData().urls() if u.isLocalFile()]
        if paths:
            self.add_sources(paths)
            event.acceptProposedAction()
        else:
            event.ignore()

    # ----- scanning ----------------------------------------------------------------------------
    @Slot()
    def _schedule_scan(self, *_args) -> None:
        self._scan_timer.start()

    @Slot()
    def rescan(self) -> None:
        """Scan the sources now, in the background (an older scan is stopped, its result
        dropped)."""
        self._scan_timer.stop()
        self._scans.abandon()
        sources = self.sources()
        if not sources:
            self.source_set = None
            self.summary_label.setText("Add a folder of aligned images, or drop one here.")
            self.set_problems(())
            self._update_buttons()
            return
        self.summary_label.setText("Looking at the files…")
        stored = self.options()
        self._pending_key = (tuple(sources), stored)
        self._scans.start(lambda ctx: scan_collection(sources, stored, cancel=ctx.cancelled))

    def scanned_for(self, sources, options):
        """Return the finished scan of exactly these sources and options, or None."""
        key = (tuple(os.path.abspath(os.fspath(s)) for s in sources), options)
        if self.source_set is not None and self._scanned_key is not None and \
                (tuple(os.path.abspath(s) for s in self._scanned_key[0]),
                 self._scanned_key[1]) == key:
            return self.source_set
        return None

    def stop_scan(self, run_scans: bool = False) -> None:
        """Drop a pending or running scan.

        Parameters
        ----------
        run_scans : bool, default False
            True when an analysis scans the sources itself: the summary says so (instead of an
            empty pane's invitation) until :meth:`adopt` shows the run's scan.
        """
        self._scan_timer.stop()
        self._scans.abandon()
        if run_scans:
            self.source_set = None
            self._scanned_key = None
            self.summary_label.setText("The analysis is reading the files…")

    def show_run_scan(self, done: int, total: int) -> None:
        """Show the progress of the scan an analysis makes for itself."""
        if self.source_set is None:
            self.summary_label.setText(f"The analysis is reading the files: {int(done):,} of "
                                       f"{int(total):,} looked at…")

    def show_run_found(self, total: int) -> None:
        """The analysis finished its own scan and analyses ``total`` images."""
        if self.source_set is None:
            self.summary_label.setText(f"The analysis found {counted(total, 'usable image')}; "
                                       "sizes and skipped files show here when it ends.")

    def run_scan_ended(self, message: str = "") -> None:
        """An analysis that scanned for itself ended without a scan to show."""
        if self.source_set is None:
            self.summary_label.setText(message or "Not scanned: the analysis stopped before "
                                                  "it had read every file. Start it again.")

    def adopt(self, source_set, sources, options) -> None:
        """Show a scan made elsewhere (by an analysis run) as this pane's result."""
        if source_set is None or not source_set.n_images:
            return
        self.source_set = source_set
        self._scanned_key = (tuple(os.path.abspath(os.fspath(s)) for s in sources), options)
        self._refresh_summary()
        self._update_buttons()

    @Slot(object)
    def _on_scan_done(self, source_set) -> None:
        self.source_set = source_set
        self._scanned_key = self._pending_key
        self._refresh_summary()
        self.set_problems(source_set.problems, source_set.notes)
        self._update_buttons()
        self.scanFinished.emit(source_set)

    @Slot(str)
    def _on_scan_error(self, message: str) -> None:
        self.source_set = None
        self.summary_label.setText(f"No usable image: {message}")
        self.set_problems(())
        self._update_buttons()
        self.scanFinished.emit(None)

    @Slot()
    def _refresh_summary(self, *_args) -> None:
        if self.source_set is not None:
            self.summary_label.setText(describe_source_set(self.source_set,
                                                           self.downscale_spin.value()))

    def set_problems(self, problems: Sequence[Any], notes: Sequence[Any] = ()) -> None:
        """List skipped files, then files used with a note.

        Parameters
        ----------
        problems : sequence of Problem
            Skipped files or pages (``path``, ``reason``, ``page``).
        notes : sequence of Problem, optional
            Files that were used but drew a warning (``SourceSet.notes``): listed after the
            skipped ones in italics, their reason starting with :data:`NOTE_PREFIX`, their
            :data:`KIND_ROLE` "note" (skipped rows have "skipped").
        """
        table = self.problem_table
        table.setRowCount(0)
        rows = [("skipped", p) for p in problems] + [("note", n) for n in notes]
        table.setRowCount(len(rows))
        for row, (kind, problem) in enumerate(rows):
            page = getattr(problem, "page", None)
            path = getattr(problem, "path", problem)
            name = display_name(path)
            if page is not None:
                name += f" (page {page})"
            file_item = QTableWidgetItem(name)
            file_item.setToolTip(display_path(path))
            reason = display_text(str(getattr(problem, "reason", "")))
            if kind == "note":
                reason = NOTE_PREFIX + reason
            reason_item = QTableWidgetItem(reason)
            reason_item.setToolTip(reason)
            for col, item in enumerate((file_item, reason_item)):
                item.setData(KIND_ROLE, kind)
                if kind == "note":
                    font = item.font()
                    font.setItalic(True)
                    item.setFont(font)
                table.setItem(row, col, item)
        self.problems_box.setTitle("Skipped files and notes" if notes else "Skipped files")

    def shutdown(self, timeout_ms: int = 3000) -> bool:
        """Stop any scan and wait for it at most ``timeout_ms``; return True when it stopped."""
        self._scan_timer.stop()
        self._scans.abandon()
        return self._scans.wait(timeout_ms)

    # ----- running -----------------------------------------------------------------------------
    def set_running(self, running: bool) -> None:
        """Show whether an analysis is running (Start and the options are disabled then)."""
        self._running = bool(running)
        self._update_buttons()

    def is_running(self) -> bool:
        """Return True while the main window reports a run."""
        return self._running

    @Slot()
    def _on_start(self) -> None:
        sources = self.sources()
        if sources and not self._running:
            self.startRequested.emit(sources, self.options())

    @Slot()
    def _update_buttons(self) -> None:
        has_sources = self.source_list.count() > 0
        self.start_button.setEnabled(has_sources and not self._running)
        self.cancel_button.setEnabled(self._running)
        self.remove_button.setEnabled(bool(self.source_list.selectedItems()) and not self._running)
        for w in (self.rank_spin, self.color_combo, self.downscale_spin, self.recursive_check,
                  self.resize_check, self.add_folder_button, self.add_files_button):
            w.setEnabled(not self._running)
