"""The workbench's main window: docks around the inspector, menus, status bar, the worker.

Layout (fresh start)
--------------------
* centre: the inspector (image, reconstruction, residual, rank slider);
* left, full height: "Sources" (the ingest pane) and "Images" (the image list) as tabs;
* right of the inspector: "Basis images";
* bottom, under the inspector and the basis images: "Weights" and "Singular values", side by
  side in a window at least 1600 pixels wide, as tabs in a smaller one.

Every dock can be moved, closed (View menu) and put back (View > Reset layout); the layout, the
window geometry, the options, the last folders and the recent analysis files are remembered
through :class:`~modescope.app.desktop.settings.Settings`.

The four data views (``gallery``, ``spectrum``, ``weights_view``, ``image_list``) are imported
when the window is built; a view whose module is not in the installation is replaced by a note.
"""

from __future__ import annotations

import importlib
import os
import resource
import sys
import time
from pathlib import Path
from typing import Any, Callable, Sequence

from PySide6.QtCore import Qt, QTimer, Slot
from PySide6.QtGui import QAction, QCloseEvent, QKeySequence
from PySide6.QtWidgets import (
    QApplication,
    QDockWidget,
    QFileDialog,
    QLabel,
    QMainWindow,
    QMessageBox,
    QProgressBar,
    QWidget,
)

from modescope.core.errors import ModescopeError

from modescope.app.words import counted
from modescope.app.desktop.views.sources import MODEL_FILE_FILTER, IngestPane, make_analysis_options
from modescope.app.desktop.views.inspector import Inspector
from modescope.app.desktop.settings import Settings, StoredOptions
from modescope.app.desktop.state import AppState
from modescope.app.desktop.workers.analysis import AnalysisRunner

__all__ = ["MainWindow", "VIEW_SPECS", "sample_images_dir", "app_version", "CAUTIONS",
           "memory_in_use"]

#: (object name, dock title, module, class) of the data views.
VIEW_SPECS = (
    ("imagesDock", "Images", "modescope.app.desktop.views.image_list", "ImageListView"),
    ("basisDock", "Basis images", "modescope.app.desktop.views.gallery", "BasisGallery"),
    ("spectrumDock", "Singular values", "modescope.app.desktop.views.spectrum", "SpectrumView"),
    ("weightsDock", "Weights", "modescope.app.desktop.views.weights", "WeightsView"),
    ("outliersDock", "Outliers", "modescope.app.desktop.views.outliers", "OutlierView"),
    ("duplicatesDock", "Near-duplicates", "modescope.app.desktop.views.duplicates", "DuplicatesView"),
)

CAUTIONS = (
    "Images of people are personal data under local privacy law: analyse, keep and share "
    "them only as that law allows.",
    "Outlier flags are a screening aid for a person to review, not a verdict about an image "
    "or about anyone in it.",
)

_STAGES = {"scan": "Reading file headers", "learn": "Learning the basis",
           "score": "Scoring the images"}

DEFAULT_SIZE = (1280, 800)
#: Below this window width "Weights" and "Singular values" share the bottom area as tabs.
SPLIT_BOTTOM_WIDTH = 1600
SHUTDOWN_TIMEOUT_MS = 5000


def sample_images_dir() -> Path:
    """Return the bundled sample folder (it may be missing in some installations)."""
    import modescope.core

    return Path(modescope.core.__file__).resolve().parent.parent / "sample_images"


def app_version() -> str:
    """Return the installed version of the ``modescope`` distribution ("unknown" if none)."""
    from importlib import metadata

    try:
        return metadata.version("modescope")
    except metadata.PackageNotFoundError:
        return "unknown"


def memory_in_use() -> int:
    """Return the resident memory of this process in bytes (peak resident size as fallback)."""
    try:
        with open("/proc/self/statm", "rb") as f:
            resident_pages = int(f.read().split()[1])
        return resident_pages * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError, IndexError):
        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        return int(peak if sys.platform == "darwin" else peak * 1024)


def _format_bytes(n: int) -> str:
    value = float(n)
    for unit in ("B", "KB", "MB", "GB"):
        if value < 1024 or unit == "GB":
            return f"{value:.0f} {unit}" if unit in ("B", "KB") else f"{value:.1f} {unit}"
        value /= 1024
    return f"{value:.1f} GB"  # pragma: no cover


def _format_seconds(seconds: float) -> str:
    seconds = max(0.0, float(seconds))
    if seconds < 60:
        return f"{seconds:.0f} s"
    minutes, sec = divmod(int(round(seconds)), 60)
    if minutes < 60:
        return f"{minutes} min {sec:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"


class _MissingView(QLabel):
    """Stands in for a data view whose module is not installed."""

    def __init__(self, title: str, module: str, parent: QWidget | None = None):
        super().__init__(f"{title}: this view is not available in this installation "
                         f"({module} is missing).", parent)
        self.setWordWrap(True)
        self.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.setMargin(12)
        self.setEnabled(False)


def _make_view(module: str, class_name: str, title: str, state: AppState,
               parent: QWidget) -> QWidget:
    try:
        mod = importlib.import_module(module)
    except ModuleNotFoundError as exc:
        if exc.name != module:
            raise
        return _MissingView(title, module, parent)
    cls = getattr(mod, class_name, None)
    if cls is None:
        return _MissingView(title, f"{module}.{class_name}", parent)
    return cls(state, parent)


class MainWindow(QMainWindow):
    """The Modescope workbench.

    Parameters
    ----------
    settings : Settings, optional
        Where layout, options, folders and recent files are remembered (default: the user's
        store for "Modescope").
    analyze : callable, optional
        Stand-in for ``pipeline.analyze`` (tests).
    confirm_dialogs : bool, default True
        Show message boxes for errors; tests may turn them off (the text is still kept in
        :attr:`last_message`).
    """

    def __init__(self, settings: Settings | None = None, *,
                 analyze: Callable[..., Any] | None = None, confirm_dialogs: bool = True,
                 parent: QWidget | None = None):
        super().__init__(parent)
        self.setObjectName("modescopeMainWindow")
        self.setWindowTitle("Modescope")
        self.setAcceptDrops(True)
        self.settings = settings if settings is not None else Settings()
        self.state = AppState(self)
        self.runner = AnalysisRunner(self, analyze=analyze)
        self._confirm_dialogs = confirm_dialogs
        self.message_box: QMessageBox | None = None
        self.last_message = ""
        self.last_result = None
        self.current_file: str | None = None
        self._run_started = 0.0
        self._first_learn = False
        self._run_key = None        # (sources, options) of a run that scans for the pane
        self._closing = False

        self.inspector = Inspector(self.state, self)
        self.setCentralWidget(self.inspector)

        self.ingest = IngestPane(self, options=self.settings.options())
        self.ingest.set_dialog_dir(self.settings.last_dir())
        self.docks: dict[str, QDockWidget] = {}
        self.views: dict[str, QWidget] = {}
        self._add_dock("sourcesDock", "Sources", self.ingest)
        for name, title, module, cls in VIEW_SPECS:
            view = _make_view(module, cls, title, self.state, self)
            self.views[name] = view
            self._add_dock(name, title, view)

        self._build_actions()
        self._build_menus()
        self._build_status_bar()
        self._wire()
        self._place_docks()
        self._default_state = self.saveState()
        self._restore_window()
        self._update_status()

    # ----- construction ------------------------------------------------------------------------
    def _add_dock(self, name: str, title: str, widget: QWidget) -> QDockWidget:
        dock = QDockWidget(title, self)
        dock.setObjectName(name)
        dock.setWidget(widget)
        dock.setFeatures(QDockWidget.DockWidgetFeature.DockWidgetMovable
                         | QDockWidget.DockWidgetFeature.DockWidgetClosable
                         | QDockWidget.DockWidgetFeature.DockWidgetFloatable)
        self.docks[name] = dock
        return dock

    def _place_docks(self) -> None:
        d = self.docks
        self.setCorner(Qt.Corner.TopLeftCorner, Qt.DockWidgetArea.LeftDockWidgetArea)
        self.setCorner(Qt.Corner.BottomLeftCorner, Qt.DockWidgetArea.LeftDockWidgetArea)
        self.setCorner(Qt.Corner.TopRightCorner, Qt.DockWidgetArea.RightDockWidgetArea)
        self.setCorner(Qt.Corner.BottomRightCorner, Qt.DockWidgetArea.BottomDockWidgetArea)
        for dock in d.values():
            dock.setFloating(False)
            dock.show()
        tabs = (("outliersDock", "weightsDock"), ("duplicatesDock", "imagesDock"))
        for name, _beside in tabs:   # out of the way, so no row of docks wider than the window
            self.removeDockWidget(d[name])
        self.addDockWidget(Qt.DockWidgetArea.LeftDockWidgetArea, d["sourcesDock"])
        self.addDockWidget(Qt.DockWidgetArea.LeftDockWidgetArea, d["imagesDock"])
        self.tabifyDockWidget(d["sourcesDock"], d["imagesDock"])
        self.addDockWidget(Qt.DockWidgetArea.RightDockWidgetArea, d["basisDock"])
        self.addDockWidget(Qt.DockWidgetArea.BottomDockWidgetArea, d["weightsDock"])
        self.addDockWidget(Qt.DockWidgetArea.BottomDockWidgetArea, d["spectrumDock"])
        width = max(self.width(), DEFAULT_SIZE[0])
        self._bottom_split = width >= SPLIT_BOTTOM_WIDTH
        if self._bottom_split:
            self.splitDockWidget(d["weightsDock"], d["spectrumDock"], Qt.Orientation.Horizontal)
        else:
            self.tabifyDockWidget(d["weightsDock"], d["spectrumDock"])
        for name, beside in tabs:
            self.tabifyDockWidget(d[beside], d[name])
            d[name].show()
        d["weightsDock"].raise_()
        d["sourcesDock"].raise_()
        self._size_docks(width, max(self.height(), DEFAULT_SIZE[1]))

    def _size_docks(self, width: int, height: int) -> None:
        d = self.docks
        left = max(290, int(width * 0.23))
        right = max(300, int(width * 0.27))
        self.resizeDocks([d["sourcesDock"], d["basisDock"]], [left, right],
                         Qt.Orientation.Horizontal)
        if getattr(self, "_bottom_split", False):
            bottom = width - left
            self.resizeDocks([d["weightsDock"], d["spectrumDock"]],
                             [int(bottom * 0.5), int(bottom * 0.5)], Qt.Orientation.Horizontal)
        self.resizeDocks([d["weightsDock"]], [max(220, int(height * 0.36))],
                         Qt.Orientation.Vertical)

    def _build_actions(self) -> None:
        def action(text: str, slot, shortcut=None, tip: str = "") -> QAction:
            a = QAction(text, self)
            if shortcut is not None:
                if isinstance(shortcut, (list, tuple)):
                    a.setShortcuts([QKeySequence(s) for s in shortcut])
                else:
                    a.setShortcut(QKeySequence(shortcut))
            if tip:
                a.setStatusTip(tip)
            a.triggered.connect(slot)
            self.addAction(a)   # window-level shortcut
            return a

        K = QKeySequence.StandardKey
        self.add_folder_action = action("Add &folder…", self.ingest.choose_folder, "Ctrl+D",
                                        "Add a folder of images to the sources")
        self.add_files_action = action("Add &files…", self.ingest.choose_files, "Ctrl+Shift+O",
                                       "Add image files to the sources")
        self.open_action = action("&Open analysis…", self.choose_open, K.Open,
                                  "Open a saved analysis (.npz)")
        self.save_action = action("&Save analysis…", self.choose_save, K.Save,
                                  "Save the current analysis (.npz)")
        self.export_dialog = None   # made on first use (modescope.app.desktop.dialogs.export)
        self.export_action = action("&Export…", self.show_export_dialog, "Ctrl+E",
                                    "Write previews, basis images, tables or a compact model "
                                    "to a folder")
        self.state.decompositionChanged.connect(self._update_export_action)
        self._update_export_action()
        self.quit_action = action("&Quit", self.close, K.Quit)
        self.start_action = action("S&tart analysis", self._start_from_pane, "Ctrl+R",
                                   "Analyse the sources with the options shown")
        self.cancel_action = action("&Cancel analysis", self.cancel_analysis, "Esc",
                                    "Stop the analysis and keep the partial result")
        self.reset_layout_action = action("&Reset layout", self.reset_layout)
        self.prev_action = action("&Previous image", self.previous_image, ["PgUp", "Ctrl+Left"])
        self.next_action = action("&Next image", self.next_image, ["PgDown", "Ctrl+Right"])
        self.rank_up_action = action("Rank &up", self.rank_up, ["+", "=", "Ctrl+Up"],
                                     "Use one more basis image in the reconstruction")
        self.rank_down_action = action("Rank &down", self.rank_down, ["-", "Ctrl+Down"],
                                       "Use one basis image fewer in the reconstruction")
        self.about_action = action("&About Modescope", self.show_about)

    def _build_menus(self) -> None:
        bar = self.menuBar()
        file_menu = bar.addMenu("&File")
        file_menu.addAction(self.add_folder_action)
        file_menu.addAction(self.add_files_action)
        file_menu.addSeparator()
        file_menu.addAction(self.open_action)
        file_menu.addAction(self.save_action)
        file_menu.addAction(self.export_action)
        self.recent_menu = file_menu.addMenu("&Recent analyses")
        self.recent_menu.triggered.connect(self._on_recent)
        file_menu.addSeparator()
        file_menu.addAction(self.start_action)
        file_menu.addAction(self.cancel_action)
        file_menu.addSeparator()
        file_menu.addAction(self.quit_action)

        view_menu = bar.addMenu("&View")
        for dock in self.docks.values():
            view_menu.addAction(dock.toggleViewAction())
        view_menu.addSeparator()
        view_menu.addAction(self.prev_action)
        view_menu.addAction(self.next_action)
        view_menu.addAction(self.rank_up_action)
        view_menu.addAction(self.rank_down_action)
        view_menu.addSeparator()
        view_menu.addAction(self.reset_layout_action)

        # marks, refit, lists, duplicates: the review work has its own menu
        self.review_menu = bar.addMenu("&Review")
        for name in ("outliersDock", "duplicatesDock"):
            actions = getattr(self.views.get(name), "review_actions", None)
            if callable(actions):
                if not self.review_menu.isEmpty():
                    self.review_menu.addSeparator()
                for a in actions():
                    if a is None:
                        self.review_menu.addSeparator()
                    else:
                        self.review_menu.addAction(a)
                        self.addAction(a)   # window-level shortcut (K, X, U)
        self.review_menu.setEnabled(not self.review_menu.isEmpty())

        help_menu = bar.addMenu("&Help")
        help_menu.addAction(self.about_action)
        self._rebuild_recent_menu()

    def _build_status_bar(self) -> None:
        sb = self.statusBar()
        self.summary_label = QLabel("", self)
        self.progress_label = QLabel("", self)
        self.progress_bar = QProgressBar(self)
        self.progress_bar.setMaximumWidth(220)
        self.progress_bar.setMinimumWidth(140)
        self.progress_bar.setTextVisible(True)
        self.progress_bar.hide()
        self.progress_label.hide()
        self.memory_label = QLabel("", self)
        self.memory_label.setToolTip("Memory this program uses now")
        sb.addWidget(self.summary_label, 1)
        sb.addPermanentWidget(self.progress_label)
        sb.addPermanentWidget(self.progress_bar)
        sb.addPermanentWidget(self.memory_label)
        self._memory_timer = QTimer(self)
        self._memory_timer.setInterval(2000)
        self._memory_timer.timeout.connect(self._update_memory)
        self._memory_timer.start()
        self._update_memory()

    def _wire(self) -> None:
        self.ingest.startRequested.connect(self.start_analysis)
        self.ingest.cancelRequested.connect(self.cancel_analysis)
        self.runner.progress.connect(self._on_progress)
        self.runner.partial.connect(self._on_partial)
        self.runner.finished.connect(self._on_finished)
        self.runner.failed.connect(self._on_failed)
        self.runner.cancelled.connect(self._on_cancelled)
        self.runner.runningChanged.connect(self._on_running_changed)
        self.state.decompositionChanged.connect(self._on_state_changed)
        self.state.rankChanged.connect(self._on_state_changed)
        refit = getattr(self.views.get("outliersDock"), "refitRequested", None)
        if refit is not None:
            refit.connect(self.refit_analysis)   # ((path, page) not excluded, StoredOptions)
        self.cancel_action.setEnabled(False)

    def _restore_window(self) -> None:
        geometry = self.settings.window_geometry()
        restored = not geometry.isEmpty() and self.restoreGeometry(geometry)
        if not restored:
            screen = QApplication.primaryScreen()
            w, h = DEFAULT_SIZE
            if screen is not None:
                avail = screen.availableGeometry()
                w, h = min(w, avail.width()), min(h, avail.height())
            self.resize(w, h)
            self._size_docks(w, h)
        state = self.settings.window_state()
        if not state.isEmpty():
            self.restoreState(state)

    def save_settings(self) -> None:
        """Remember layout, geometry, options and the dialog folder."""
        self.settings.set_window_geometry(self.saveGeometry())
        self.settings.set_window_state(self.saveState())
        self.settings.set_options(self.ingest.options())
        if self.ingest.dialog_dir():
            self.settings.set_last_dir(self.ingest.dialog_dir())
        self.settings.sync()

    @Slot()
    def reset_layout(self) -> None:
        """Put every dock back where a fresh start has it."""
        self.restoreState(self._default_state)
        self._place_docks()
        self._size_docks(self.width(), self.height())

    # ----- opening -----------------------------------------------------------------------------
    def open_paths(self, paths: Sequence[str], *, start: bool = True) -> None:
        """Open what was given on the command line.

        A ``.npz`` file is opened as a saved analysis (the first one only); folders and other
        files become the sources and, when ``start`` is True and no analysis file was given,
        are analysed at once.
        """
        models = [p for p in paths if str(p).lower().endswith(".npz") and os.path.isfile(p)]
        others = [os.fspath(p) for p in paths if p not in models]
        if others:
            self.ingest.set_sources(others)
        if models:
            self.open_analysis(models[0])
        elif others and start:
            self.start_analysis(self.ingest.sources(), self.ingest.options())

    def open_sample(self) -> bool:
        """Open and analyse the bundled sample images; False (with a hint) when absent."""
        from modescope.core.sources.scan import SUPPORTED_SUFFIXES

        folder = sample_images_dir()
        if folder.is_dir() and any(p.suffix.lower() in SUPPORTED_SUFFIXES
                                   for p in folder.iterdir()):
            self.open_paths([str(folder)])
            return True
        self.statusBar().showMessage(
            "Add a folder of aligned images (File > Add folder) or drop one on the window.")
        return False

    @Slot()
    def choose_open(self) -> None:
        """Ask for an analysis file and open it."""
        path, _ = QFileDialog.getOpenFileName(self, "Open analysis", self._dialog_dir(),
                                              MODEL_FILE_FILTER)
        if path:
            self.ingest.set_dialog_dir(os.path.dirname(path))
            self.open_analysis(path)

    def open_analysis(self, path: str) -> bool:
        """Load a saved analysis and show it; False (with a message) when it cannot be read."""
        from modescope.core.output import model_file

        if self.runner.is_running():
            self.runner.abandon()
        try:
            decomposition = model_file.load_model(path)
        except (ModescopeError, OSError) as exc:
            self._show_error("Cannot open the analysis", f"{path}: {exc}"
                             if os.fspath(path) not in str(exc) else str(exc))
            if not os.path.exists(path):
                self.settings.remove_recent_file(os.path.abspath(path))
                self._rebuild_recent_menu()
            return False
        self.current_file = os.path.abspath(path)
        self.state.set_decomposition(decomposition)
        self.settings.add_recent_file(path)
        self._rebuild_recent_menu()
        self.setWindowTitle(f"Modescope — {os.path.basename(path)}")
        self.statusBar().showMessage(f"Opened {path}", 5000)
        return True

    @Slot()
    def choose_save(self) -> None:
        """Ask for a file name and save the current analysis."""
        if self.state.decomposition is None:
            self._show_error("Nothing to save", "There is no analysis to save yet.")
            return
        start = self.current_file or os.path.join(self._dialog_dir(), "analysis.npz")
        path, _ = QFileDialog.getSaveFileName(self, "Save analysis", start, MODEL_FILE_FILTER)
        if path:
            if not path.lower().endswith(".npz"):
                path += ".npz"
            self.ingest.set_dialog_dir(os.path.dirname(path))
            self.save_analysis(path)

    def save_analysis(self, path: str) -> Path | None:
        """Save the current analysis to ``path`` (atomic); None (with a message) on failure."""
        from modescope.core.output import model_file

        d = self.state.decomposition
        if d is None:
            self._show_error("Nothing to save", "There is no analysis to save yet.")
            return None
        try:
            written = model_file.save_model(path, d)
        except (ModescopeError, OSError) as exc:
            self._show_error("Cannot save the analysis", f"{path}: {exc}")
            return None
        self.current_file = os.fspath(written)
        self.settings.add_recent_file(os.fspath(written))
        self._rebuild_recent_menu()
        note = "" if d.exact else " (partial result)"
        self.statusBar().showMessage(f"Saved {written}{note}", 5000)
        return Path(written)

    @Slot()
    def _update_export_action(self, *_args) -> None:
        d = self.state.decomposition
        self.export_action.setEnabled(d is not None and d.rank >= 1)

    @Slot()
    def show_export_dialog(self) -> None:
        """Open the export dialog for the current analysis (kept for the session)."""
        from modescope.app.desktop.dialogs.export import ExportDialog

        if self.state.decomposition is None:
            return
        if self.export_dialog is None:
            self.export_dialog = ExportDialog(self.state, self.settings, self)
        if not self.export_dialog.is_running():
            self.export_dialog.sync_from_state(reset_rank=True)
        self.export_dialog.show()
        self.export_dialog.raise_()
        self.export_dialog.activateWindow()

    def _rebuild_recent_menu(self) -> None:
        menu = self.recent_menu
        menu.clear()
        files = self.settings.recent_files()
        for path in files:
            a = menu.addAction(os.path.basename(path))
            a.setData(path)
            a.setToolTip(path)
            a.setStatusTip(path)
        menu.setEnabled(bool(files))

    @Slot(QAction)
    def _on_recent(self, action: QAction) -> None:
        path = action.data()
        if path:
            self.open_analysis(str(path))

    def _dialog_dir(self) -> str:
        return self.ingest.dialog_dir() or os.path.expanduser("~")

    # ----- drag and drop on the window -----------------------------------------------------------
    def dragEnterEvent(self, event) -> None:  # noqa: N802 - Qt name
        if event.mimeData().hasUrls():
            event.acceptProposedAction()
        else:
            event.ignore()

    def dropEvent(self, event) -> None:  # noqa: N802 - Qt name
        paths = [u.toLocalFile() for u in event.mimeData().urls() if u.isLocalFile()]
        models = [p for p in paths if p.lower().endswith(".npz")]
        others = [p for p in paths if p not in models]
        if others:
            self.ingest.add_sources(others)
            self.docks["sourcesDock"].raise_()
        if models:
            self.open_analysis(models[0])
        event.acceptProposedAction()

    # ----- running -----------------------------------------------------------------------------
    @Slot()
    def _start_from_pane(self) -> None:
        if self.ingest.sources() and not self.runner.is_running():
            self.start_analysis(self.ingest.sources(), self.ingest.options())

    @Slot(object, object)
    def start_analysis(self, sources: Sequence[str], options: StoredOptions) -> bool:
        """Analyse ``sources`` with ``options`` in the worker thread.

        Returns
        -------
        bool
            False (with a message) when the options are not valid.
        """
        sources = [os.fspath(s) for s in sources]
        analysis_options = self._checked_options(bool(sources), options,
                                                 "Add a folder or image files first.")
        if analysis_options is None:
            return False
        if [os.path.abspath(s) for s in sources] != self.ingest.sources():
            self.ingest.set_sources(sources)
        self.settings.set_last_folders(sources)
        self.settings.set_options(options)
        # reuse the pane's finished scan of the same sources and options; otherwise stop the
        # pane's scan so the two do not compete, and let the run's scan fill the pane later
        scanned = self.ingest.scanned_for(sources, options)
        if scanned is None:
            self.ingest.stop_scan(run_scans=True)
        names = ", ".join(os.path.basename(s.rstrip(os.sep)) or s for s in sources[:2])
        more = f" and {len(sources) - 2} more" if len(sources) > 2 else ""
        self._begin_run(scanned if scanned is not None else sources, analysis_options,
                        f"Modescope — {names}{more}", run_key=(list(sources), options))
        return True

    def refit_analysis(self, images: Sequence, options: StoredOptions) -> bool:
        """Analyse again only ``images`` ((path, page) pairs), for instance the images of
        the current analysis not marked excluded.

        The Sources pane and the remembered folders are left as they are: a refit is a
        variant of the current collection, not a new one. Pages of multi-page files that are
        not listed are left out.

        Returns
        -------
        bool
            False (with a message) when there is nothing to analyse or the options are not
            valid.
        """
        pairs = [(os.fspath(p), int(g)) for p, g in images]
        analysis_options = self._checked_options(bool(pairs), options,
                                                 "Every image is marked excluded.")
        if analysis_options is None:
            return False
        files = list(dict.fromkeys(p for p, _ in pairs))
        self.ingest.stop_scan()
        self._begin_run(files, analysis_options,
                        f"Modescope — refit of {counted(len(pairs), 'image')}", only=pairs)
        return True

    def _checked_options(self, anything: bool, options: StoredOptions, empty_hint: str):
        """Return the AnalysisOptions of ``options``, or None after a message (nothing to
        analyse, or options not valid)."""
        if not anything:
            self._show_error("Nothing to analyse", empty_hint)
            return None
        try:
            return make_analysis_options(options)
        except (TypeError, ValueError) as exc:
            self._show_error("Options not valid", str(exc))
            return None

    def _begin_run(self, sources, analysis_options, title: str, run_key=None,
                   only=None) -> None:
        self.current_file = None
        self.last_result = None
        self.state.set_decomposition(None)
        self._run_started = time.monotonic()
        self._run_key = run_key
        self._first_learn = True
        self.runner.start(sources, analysis_options, only=only)
        self.setWindowTitle(title)
        self.progress_bar.setRange(0, 0)
        self.progress_label.setText("Starting…")
        self.progress_bar.show()
        self.progress_label.show()

    @Slot()
    def cancel_analysis(self) -> None:
        """Stop the analysis at the next block; the partial result stays."""
        if self.runner.is_running():
            self.runner.cancel()
            self.progress_label.setText("Stopping…")

    @Slot(bool)
    def _on_running_changed(self, running: bool) -> None:
        self.ingest.set_running(running)
        self.inspector.set_running(running)
        self.cancel_action.setEnabled(running)
        self.start_action.setEnabled(not running)
        if not running:
            self.progress_bar.hide()
            self.progress_label.hide()

    @Slot(object)
    def _on_progress(self, p) -> None:
        total = max(int(getattr(p, "total", 0)), 0)
        done = max(int(getattr(p, "done", 0)), 0)
        stage = _STAGES.get(getattr(p, "stage", ""), str(getattr(p, "stage", "")))
        if self._run_key is not None:
            if getattr(p, "stage", "") == "scan":
                self.ingest.show_run_scan(done, total)
            elif getattr(p, "stage", "") == "learn" and self._first_learn:
                self._first_learn = False           # the run's own scan is over
                self.ingest.show_run_found(total)
        if total:
            self.progress_bar.setRange(0, total)
            self.progress_bar.setValue(min(done, total))
        else:
            self.progress_bar.setRange(0, 0)
        parts = [f"{stage}: {done:,} of {total:,}"]
        rate = float(getattr(p, "rate", 0.0) or 0.0)
        if rate > 0:
            parts.append(f"{rate:,.0f} images/s")
        left = getattr(p, "seconds_left", None)
        if left is not None:
            parts.append(f"about {_format_seconds(left)} left")
        self.progress_label.setText(" · ".join(parts))

    @Slot(object)
    def _on_partial(self, decomposition) -> None:
        self.state.set_decomposition(decomposition)

    @Slot(object)
    def _on_finished(self, result) -> None:
        self.last_result = result
        key = self._run_key
        if key is not None and self.ingest.scanned_for(*key) is None:
            self.ingest.adopt(result.source_set, *key)
        if result.decomposition is not None:
            self.state.set_decomposition(result.decomposition)
        self.ingest.set_problems(result.problems)
        seconds = time.monotonic() - self._run_started
        n = result.decomposition.n_images if result.decomposition is not None else 0
        skipped = len(result.problems)
        self.statusBar().showMessage(
            f"Analysis finished: {counted(n, 'image')} in {_format_seconds(seconds)}"
            + (f", {skipped} skipped (see Sources)" if skipped else ""), 10000)

    @Slot(object)
    def _on_cancelled(self, result) -> None:
        self.last_result = result
        d = None if result is None else result.decomposition
        key = self._run_key
        if key is not None and self.ingest.scanned_for(*key) is None:
            if result is not None and result.source_set.n_images:
                self.ingest.adopt(result.source_set, *key)   # the scan itself was complete
            else:
                self.ingest.run_scan_ended()
        if result is not None:
            self.ingest.set_problems(result.problems)
        if d is not None:
            self.state.set_decomposition(d)
            self.statusBar().showMessage(
                f"Analysis cancelled: the partial result from {counted(d.n_images, 'image')} "
                "is kept (it can be saved).", 10000)
        else:
            self.statusBar().showMessage("Analysis cancelled before any image was analysed.",
                                         10000)

    @Slot(str)
    def _on_failed(self, message: str) -> None:
        self.last_result = None
        key = self._run_key
        if key is not None and self.ingest.scanned_for(*key) is None:
            self.ingest.run_scan_ended(f"Not analysed: {message}")
        self.statusBar().showMessage("The analysis failed.", 10000)
        self._show_error("The analysis failed", message)

    def _show_error(self, title: str, text: str) -> None:
        self.last_message = text
        if self._closing:
            return
        if not self._confirm_dialogs:
            self.statusBar().showMessage(f"{title}: {text}", 10000)
            return
        if self.message_box is not None:
            self.message_box.close()
        box = QMessageBox(QMessageBox.Icon.Warning, title, text, QMessageBox.StandardButton.Ok,
                          self)
        box.setAttribute(Qt.WidgetAttribute.WA_DeleteOnClose, False)
        box.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.message_box = box
        box.open()

    # ----- keys --------------------------------------------------------------------------------
    def _step_image(self, step: int) -> None:
        d = self.state.decomposition
        if d is None or d.n_images == 0:
            return
        current = self.state.selected
        target = 0 if current < 0 else max(0, min(d.n_images - 1, current + step))
        self.state.set_selected(target)

    @Slot()
    def previous_image(self) -> None:
        """Select the image before the current one."""
        self._step_image(-1)

    @Slot()
    def next_image(self) -> None:
        """Select the image after the current one."""
        self._step_image(1)

    @Slot()
    def rank_up(self) -> None:
        """Use one more basis image."""
        if self.state.decomposition is not None:
            self.state.set_rank(self.state.rank + 1)

    @Slot()
    def rank_down(self) -> None:
        """Use one basis image fewer."""
        if self.state.decomposition is not None:
            self.state.set_rank(self.state.rank - 1)

    # ----- status ------------------------------------------------------------------------------
    @Slot()
    def _on_state_changed(self, *_args) -> None:
        self._update_status()

    def status_text(self) -> str:
        """Return the summary shown at the left of the status bar."""
        d = self.state.decomposition
        if d is None:
            return "No analysis"
        rows, cols, channels = (tuple(d.image_shape) + (1, 1, 1))[:3]
        r = self.state.rank
        parts = [counted(d.n_images, "image"), f"{rows} × {cols} pixels"
                 + (f" × {channels}" if channels > 1 else ""), f"rank {r} of {d.rank}"]
        if r >= 1:
            parts.append(f"{100.0 * float(d.cumulative_energy()[r - 1]):.1f} % of the "
                         f"variation at rank {r}")
        if not d.exact:
            parts.append("in progress")
        return " · ".join(parts)

    def _update_status(self) -> None:
        self.summary_label.setText(self.status_text())

    @Slot()
    def _update_memory(self) -> None:
        self.memory_label.setText(f"Memory {_format_bytes(memory_in_use())}")

    # ----- help --------------------------------------------------------------------------------
    def about_text(self) -> str:
        """Return the text of the About box (version and cautions)."""
        cautions = "".join(f"<li>{c}</li>" for c in CAUTIONS)
        return (f"<h3>Modescope {app_version()}</h3>"
                "<p>Finds the few patterns that explain a collection of aligned images "
                "(a mean-centred truncated SVD computed while the images stream in), and shows "
                "basis images, weights, reconstructions and residuals.</p>"
                f"<p><b>Please note</b></p><ul>{cautions}</ul>")

    @Slot()
    def show_about(self) -> None:
        """Show the version and the cautions."""
        box = QMessageBox(QMessageBox.Icon.Information, "About Modescope", self.about_text(),
                          QMessageBox.StandardButton.Ok, self)
        box.setTextFormat(Qt.TextFormat.RichText)
        self.message_box = box
        box.open()

    # ----- closing -----------------------------------------------------------------------------
    def shutdown(self, timeout_ms: int = SHUTDOWN_TIMEOUT_MS) -> bool:
        """Cancel any run and stop the worker and scan threads (waiting at most ``timeout_ms``).

        Returns
        -------
        bool
            True when every thread has stopped.
        """
        self._memory_timer.stop()
        ok_run = self.runner.shutdown(timeout_ms)
        ok_scan = self.ingest.shutdown(timeout_ms)
        ok_views = True
        for view in self.views.values():
            stop = getattr(view, "shutdown", None)
            if callable(stop):
                ok_views = (stop() is not False) and ok_views
        if self.export_dialog is not None:
            ok_views = self.export_dialog.shutdown(timeout_ms) and ok_views
        return ok_run and ok_scan and ok_views

    def closeEvent(self, event: QCloseEvent) -> None:  # noqa: N802 - Qt name
        self._closing = True
        if self.message_box is not None:
            self.message_box.close()
        self.save_settings()
        self.shutdown()
        super().closeEvent(event)
