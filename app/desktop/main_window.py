"""The workbench's main window: docks around the inspector, menus, status bar, the worker.

Layout (fresh start)
--------------------
* centre: the inspector (image, reconstruction, residual, rank slider);
* left, full height: "Sources" (the ingest pane) and "Images" (the image list) as tabs;
* right of the inspector: "Basis images";
* bottom, under the inspector and the basis images: "Weights" and "Singular values", side by
  side in a window at least 1600 pixels wide, as tabs in a smaller one.

Every dock can be moved, closed (View menu) and put back (View > Reset layout); the layout, the
window geometry, the options, the folder file dialogs open in and the recent analysis files are
remembered through :class:`~modescope.app.desktop.settings.Settings`.

The window is assembled from its parts, one module each: the docks and their layout
(:mod:`~modescope.app.desktop.window_docks`), actions and menus
(:mod:`~modescope.app.desktop.window_menus`), opening and saving files
(:mod:`~modescope.app.desktop.window_files`), the run control
(:mod:`~modescope.app.desktop.window_run`) and the status bar
(:mod:`~modescope.app.desktop.window_status`). This module builds the window, wires the parts
together, shows errors and shuts everything down on close.
"""

from __future__ import annotations

from typing import Any, Callable

from PySide6.QtCore import QEvent, Qt
from PySide6.QtGui import QCloseEvent
from PySide6.QtWidgets import QDockWidget, QMainWindow, QMessageBox, QWidget

from modescope.app.desktop.display import display_text
from modescope.app.desktop.icon import app_icon
from modescope.app.desktop.settings import Settings
from modescope.app.desktop.state import AppState
from modescope.app.desktop.views.checked import CheckedView
from modescope.app.desktop.views.duplicates import DuplicatesView
from modescope.app.desktop.views.frequencies import FrequenciesView
from modescope.app.desktop.views.gallery import BasisGallery
from modescope.app.desktop.views.image_list import ImageListView
from modescope.app.desktop.views.inspector import Inspector
from modescope.app.desktop.views.outliers import OutlierView
from modescope.app.desktop.views.sources import IngestPane
from modescope.app.desktop.views.sources_of_model import sources_of_paths
from modescope.app.desktop.views.spectrum import SpectrumView
from modescope.app.desktop.views.weights import WeightsView
from modescope.app.desktop.window_docks import DockLayoutMixin
from modescope.app.desktop.window_files import FilesMixin, sample_images_dir
from modescope.app.desktop.window_help import fill_missing_tooltips
from modescope.app.desktop.window_menus import CAUTIONS, MenusMixin, app_version
from modescope.app.desktop.window_run import RunControlMixin
from modescope.app.desktop.window_sources import SourcesMixin
from modescope.app.desktop.window_status import StatusBarMixin, memory_in_use
from modescope.app.desktop.workers.analysis import AnalysisRunner

__all__ = ["MainWindow", "VIEW_SPECS", "sample_images_dir", "app_version", "CAUTIONS",
           "memory_in_use", "SHUTDOWN_TIMEOUT_MS"]

#: (object name, dock title, class) of the data views, each in a dock of its own.
VIEW_SPECS = (
    ("imagesDock", "Images", ImageListView),
    ("basisDock", "Basis images", BasisGallery),
    ("spectrumDock", "Singular values", SpectrumView),
    ("weightsDock", "Weights", WeightsView),
    ("outliersDock", "Outliers", OutlierView),
    ("duplicatesDock", "Near-duplicates", DuplicatesView),
    ("checkedDock", "Checked images", CheckedView),
    ("frequenciesDock", "Frequencies", FrequenciesView),
)

#: Longest wait for each worker (analysis, scan, views, export) when the window closes.
SHUTDOWN_TIMEOUT_MS = 5000


class MainWindow(RunControlMixin, SourcesMixin, FilesMixin, MenusMixin, DockLayoutMixin,
                 StatusBarMixin, QMainWindow):
    """The Modescope workbench.

    Parameters
    ----------
    settings : Settings, optional
        Where layout, options, the dialog folder and recent files are remembered (default:
        the user's store for "Modescope").
    analyze : callable, optional
        Stand-in for ``pipeline.analyze`` (tests).
    confirm_dialogs : bool, default True
        Show message boxes for errors and ask before unsaved review marks are thrown away;
        tests may turn them off (the title and text of errors then go to the status bar, and
        unsaved marks are discarded without a question).
    """

    def __init__(self, settings: Settings | None = None, *,
                 analyze: Callable[..., Any] | None = None, confirm_dialogs: bool = True,
                 parent: QWidget | None = None):
        super().__init__(parent)
        self.setObjectName("modescopeMainWindow")
        self.setWindowTitle("Modescope")
        self.setWindowIcon(app_icon())
        self.setAcceptDrops(True)
        self.settings = settings if settings is not None else Settings()
        self.state = AppState(self)
        self.runner = AnalysisRunner(self, analyze=analyze)
        self._confirm_dialogs = confirm_dialogs
        self.message_box: QMessageBox | None = None
        self.current_file: str | None = None
        self.export_dialog = None   # made on first use (modescope.app.desktop.dialogs.export)
        self._run_started = 0.0
        self._first_learn = False
        self._run_key = None        # (sources, options) of a run that scans for the pane
        self._bottom_split = False
        self._closing = False
        self._previous = None       # (state snapshot, file, title) shown before the current run
        self.guide_dialog = None       # the Help dialogs, made on first use
        self.shortcuts_dialog = None
        self._last_run = None       # (sources, options, only, partial result) of the last run
        self._installing = False    # True while a run's result is given to the state
        self._user_picked = False   # an image was selected during the current run

        self.inspector = Inspector(self.state, self)
        self.setCentralWidget(self.inspector)

        self.ingest = IngestPane(self, options=self.settings.options())
        self.ingest.set_dialog_dir(self.settings.last_dir())
        self.docks: dict[str, QDockWidget] = {}
        self.views: dict[str, QWidget] = {}
        self._add_dock("sourcesDock", "Sources", self.ingest)
        for name, title, view_class in VIEW_SPECS:
            view = view_class(self.state, self)
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
        fill_missing_tooltips(self)   # Qt's own dock, tab and table buttons

    def event(self, event: QEvent) -> bool:  # noqa: D102 - Qt name
        if event.type() == QEvent.Type.ChildPolished and isinstance(event.child(), QWidget):
            fill_missing_tooltips(event.child())   # a tab bar made when docks are tabbed
        return super().event(event)

    def _wire(self) -> None:
        self.ingest.startRequested.connect(self.start_analysis)
        self.ingest.cancelRequested.connect(self.cancel_analysis)
        self.runner.progress.connect(self._on_progress)
        self.runner.partial.connect(self._on_partial)
        self.runner.finished.connect(self._on_finished)
        self.runner.failed.connect(self._on_failed)
        self.runner.cancelled.connect(self._on_cancelled)
        self.runner.runningChanged.connect(self._on_running_changed)
        self.state.decompositionChanged.connect(self._update_export_action)
        self.state.decompositionChanged.connect(self._on_state_changed)
        self.state.decompositionChanged.connect(self._update_finish_action)
        self.state.decompositionChanged.connect(self._update_add_actions)
        self.runner.runningChanged.connect(self._update_add_actions)
        self.state.rankChanged.connect(self._on_state_changed)
        self.state.marksHistoryChanged.connect(self._update_undo_actions)
        self.state.selectedChanged.connect(self._note_pick)
        # ((path, page) pairs not excluded, StoredOptions)
        self.views["outliersDock"].refitRequested.connect(self._refit_from_view)
        self.views["checkedDock"].attach(self.views["weightsDock"],
                                         self.views["outliersDock"].plot_widget)
        self.cancel_action.setEnabled(False)
        self._update_finish_action()
        self._update_add_actions()
        self._update_export_action()
        self._update_undo_actions()

    def open_analysis(self, path: str) -> bool:
        """Open a saved analysis (see ``FilesMixin.open_analysis``) and make the Sources pane
        describe it: its folders or files (:func:`sources_of_paths`) and its options."""
        if not super().open_analysis(path):
            return False
        self._describe_sources(self.state.decomposition)
        self.check_sources_found()        # moved files: say so and offer to locate them
        return True

    def _describe_sources(self, d) -> None:
        """Show the sources and options of analysis ``d`` in the Sources pane."""
        from modescope.app.desktop.views.outliers_review import stored_options_of

        if d is None or not d.paths:
            return
        try:
            self.ingest.set_options(stored_options_of(d))
        except (TypeError, ValueError):
            pass                               # options unknown: the pane keeps its own
        self.ingest.set_sources(sources_of_paths(d.paths))

    def _show_error(self, title: str, text: str) -> None:
        text = display_text(text)           # a file name may hold bytes Qt cannot show
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

    # ----- closing -----------------------------------------------------------------------------
    def shutdown(self, timeout_ms: int = SHUTDOWN_TIMEOUT_MS) -> bool:
        """Cancel any run and stop the worker, scan and read threads (waiting at most
        ``timeout_ms`` for each).

        Returns
        -------
        bool
            True when every thread has stopped.
        """
        self._memory_timer.stop()
        ok_run = self.runner.shutdown(timeout_ms)
        ok_scan = self.ingest.shutdown(timeout_ms)
        ok_views = self.inspector.shutdown(timeout_ms)     # a source image being read
        ok_views = self.stop_locating(timeout_ms) and ok_views
        for view in self.views.values():
            stop = getattr(view, "shutdown", None)   # the views with threads of their own
            if callable(stop):
                ok_views = (stop() is not False) and ok_views
        if self.export_dialog is not None:
            ok_views = self.export_dialog.shutdown(timeout_ms) and ok_views
        return ok_run and ok_scan and ok_views

    def closeEvent(self, event: QCloseEvent) -> None:  # noqa: N802 - Qt name
        """Ask about unsaved review marks (Cancel keeps the window open), then shut down."""
        if not self._closing and not self.confirm_discard_marks("Quitting"):
            event.ignore()
            return
        self._closing = True
        if self.message_box is not None:
            self.message_box.close()
        self.save_settings()
        self.shutdown()
        super().closeEvent(event)
