"""The main window's files: opening and saving analyses, recent files, drops, the export dialog.

:class:`FilesMixin` is one part of :class:`~modescope.app.desktop.main_window.MainWindow`.
A saved analysis is a model file (:mod:`modescope.core.output.model_file`); folders and image
files opened or dropped become the sources of the Sources pane.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Sequence

from PySide6.QtCore import Slot
from PySide6.QtGui import QAction
from PySide6.QtWidgets import QFileDialog, QMessageBox

from modescope.core.errors import ModescopeError
from modescope.core.output import model_file
from modescope.core.output.atomic import refuse_sources
from modescope.core.sources.scan import SUPPORTED_SUFFIXES

from modescope.app.desktop.display import display_name, display_path
from modescope.app.desktop.views.sources import MODEL_FILE_FILTER

__all__ = ["FilesMixin", "sample_images_dir"]


def sample_images_dir() -> Path:
    """Return the bundled sample folder (it may be missing in some installations)."""
    import modescope.core

    return Path(modescope.core.__file__).resolve().parent.parent / "sample_images"


class FilesMixin:
    """Open, save, recent analyses, the question about unsaved marks, drag and drop, export
    (a part of ``MainWindow``).

    Uses ``self.state``, ``self.settings``, ``self.ingest``, ``self.runner``, ``self.docks``,
    ``self.recent_menu``, ``self.export_action``, ``self._show_error``,
    ``self._confirm_dialogs``, ``self._previous`` (dropped when a file is opened) and
    ``self.start_analysis``; keeps ``current_file`` (the analysis file shown, or None) and
    ``export_dialog`` (made on first use).
    """

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
        """Load a saved analysis and show it; False (with a message) when it cannot be read,
        or when the question about unsaved review marks is cancelled."""
        try:
            decomposition = model_file.load_model(path)
        except (ModescopeError, OSError) as exc:
            self._show_error("Cannot open the analysis", f"{path}: {exc}"
                             if os.fspath(path) not in str(exc) else str(exc))
            if not os.path.exists(path):
                self.settings.remove_recent_file(os.path.abspath(path))
                self._rebuild_recent_menu()
            return False
        if not self.confirm_discard_marks(f"Opening {display_name(path)}"):
            return False
        if self.runner.is_running():
            self.runner.abandon()
        self._previous = None
        self.current_file = os.path.abspath(path)
        self.state.set_decomposition(decomposition)
        self.settings.add_recent_file(path)
        self._rebuild_recent_menu()
        self.setWindowTitle(f"Modescope — {display_name(path)}")
        self.statusBar().showMessage(f"Opened {display_path(path)}", 5000)
        return True

    # ----- unsaved marks -------------------------------------------------------------------------
    def confirm_discard_marks(self, action: str) -> bool:
        """Ask before ``action`` throws away review marks that are not saved.

        A message box offers Save (the analysis is saved through :meth:`choose_save`), Discard
        and Cancel. Nothing is asked when the marks are saved, or when the window was made with
        ``confirm_dialogs=False`` (tests; the marks are then discarded).

        Parameters
        ----------
        action : str
            What is about to happen, as the start of a sentence ("Quitting", "A new analysis").

        Returns
        -------
        bool
            True when the action may go on (marks saved, nothing to lose, or Discard); False
            for Cancel, or when saving was cancelled or failed.
        """
        if not self.state.marks_modified or not self._confirm_dialogs:
            return True
        buttons = QMessageBox.StandardButton
        answer = QMessageBox.question(
            self, "Unsaved review marks",
            f"The review marks of this analysis are not saved. {action} throws them away."
            "\n\nSave the analysis with its marks first?",
            buttons.Save | buttons.Discard | buttons.Cancel, buttons.Save)
        if answer == buttons.Save:
            return self.choose_save() is not None
        return answer == buttons.Discard

    # ----- saving ------------------------------------------------------------------------------
    @Slot()
    def choose_save(self) -> Path | None:
        """Ask for a file name and save the current analysis.

        Returns
        -------
        Path or None
            The file written; None when cancelled or on failure (with a message).
        """
        if self.state.decomposition is None:
            self._show_error("Nothing to save", "There is no analysis to save yet.")
            return None
        start = self.current_file or os.path.join(self._dialog_dir(), "analysis.npz")
        path, _ = QFileDialog.getSaveFileName(self, "Save analysis", start, MODEL_FILE_FILTER)
        if not path:
            return None
        if not path.lower().endswith(".npz"):
            path += ".npz"
        self.ingest.set_dialog_dir(os.path.dirname(path))
        return self.save_analysis(path)

    def save_analysis(self, path: str) -> Path | None:
        """Save the current analysis, review marks included, to ``path`` (atomic); None (with
        a message) on failure. After a save the marks no longer count as unsaved."""
        d = self.state.decomposition
        if d is None:
            self._show_error("Nothing to save", "There is no analysis to save yet.")
            return None
        target = path if os.fspath(path).lower().endswith(".npz") else f"{path}.npz"
        try:
            refuse_sources(target, d.paths)    # save_model refuses too; this message is plainer
            written = model_file.save_model(path, d)
        except (ModescopeError, OSError) as exc:
            self._show_error("Cannot save the analysis", str(exc) if os.fspath(path) in str(exc)
                             else f"{path}: {exc}")
            return None
        if self.state.decomposition is d:
            self.state.marks_saved()
        self.current_file = os.fspath(written)
        self.settings.add_recent_file(os.fspath(written))
        self._rebuild_recent_menu()
        note = "" if d.exact else " (partial result)"
        self.statusBar().showMessage(f"Saved {display_path(written)}{note}", 5000)
        return Path(written)

    # ----- exporting ---------------------------------------------------------------------------
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

    # ----- recent files ------------------------------------------------------------------------
    def _rebuild_recent_menu(self) -> None:
        menu = self.recent_menu
        menu.clear()
        files = self.settings.recent_files()
        for path in files:
            a = menu.addAction(display_name(path))
            a.setData(path)
            a.setToolTip(display_path(path))
            a.setStatusTip(display_path(path))
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
