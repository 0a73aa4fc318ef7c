"""The export dialog: write previews, basis images, tables and a compact model to a folder.

The dialog reads the current analysis, rank, selection and outlier level from
:class:`~modescope.app.desktop.state.AppState`, lets the user choose what to write and where, and
hands the work to :func:`modescope.core.output.export.plan_export` and
:func:`modescope.core.output.export.run_export`:

* every option change updates two lines computed by the core: the resolution the previews are
  written at, and the numbers a rank-k model stores, ``k (n + m + 1) + n`` against ``n m``
  (:func:`~modescope.core.output.metrics.compression_numbers`);
* "Export" first plans the whole export; a refusal (existing files, a folder holding source
  images, a folder that does not accept files) is shown in the dialog and nothing is written;
* the files are written by an :class:`~modescope.app.desktop.dialogs.export_job.ExportJob` in
  the dialog's :class:`~modescope.app.desktop.workers.background.BackgroundRunner`; the progress
  bar counts files, "Stop" ends the export after the current file (completed files are kept),
  and the report summary is shown at the end;
* closing the dialog during an export stops it and waits (at most :data:`CLOSE_TIMEOUT_MS`).

The destination folder is kept for the rest of the session and, once an export has started,
in the settings for the next session (a remembered folder that no longer exists is not offered);
the folder browser starts in the folder file dialogs last opened in.

The dialog is made of parts: the controls and their wiring
(:mod:`~modescope.app.desktop.dialogs.export_form`), what the controls say
(:mod:`~modescope.app.desktop.dialogs.export_choices`) and the background job
(:mod:`~modescope.app.desktop.dialogs.export_job`); this module plans, starts, stops and
collects an export.
"""

from __future__ import annotations

import logging
import os
from pathlib import Path
from typing import Any

from PySide6.QtCore import QCoreApplication, QEvent, QSignalBlocker, QUrl, Signal, Slot
from PySide6.QtGui import QCloseEvent, QDesktopServices
from PySide6.QtWidgets import QDialog, QFileDialog, QWidget

from modescope.core.output.atomic import DestinationError
from modescope.core.output.export import ExportOptions, ExportPlan, ExportReport, plan_export

from modescope.app.desktop.dialogs.export_choices import ExportChoicesMixin
from modescope.app.desktop.dialogs.export_form import PARTS, ExportFormMixin
from modescope.app.desktop.dialogs.export_job import EXPORT_TASK, ExportJob, export_error_message
from modescope.app.desktop.settings import Settings
from modescope.app.desktop.state import AppState, initial_rank
from modescope.app.desktop.workers.background import EXPECTED_ERRORS, BackgroundRunner

__all__ = ["ExportDialog", "ExportJob", "PARTS", "CLOSE_TIMEOUT_MS", "export_error_message"]

_log = logging.getLogger(__name__)

#: Longest wait for the current file when the dialog (or the window) is closed mid-export.
CLOSE_TIMEOUT_MS = 10_000

# The session's destination folder (shared by every dialog of this process).
_session_folder = ""


class ExportDialog(ExportFormMixin, ExportChoicesMixin, QDialog):
    """Choose what to export and where, then write it with progress and a way to stop.

    Parameters
    ----------
    state : AppState
        The workbench state; the dialog exports ``state.decomposition``.
    settings : Settings, optional
        Gives the folder the folder browser starts in and remembers the destination of the
        last export started.
    parent : QWidget, optional

    Raises
    ------
    TypeError
        If ``state`` is not an AppState or ``settings`` not a Settings.

    Signals
    -------
    exportStarted(object)
        The :class:`~modescope.app.desktop.dialogs.export_job.ExportJob` of a new export,
        emitted before it is handed to the thread pool.
    exportFinished(object)
        The :class:`~modescope.core.output.report.ExportReport` of an export that ran (also
        when it was stopped).
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
        self.worker: ExportJob | None = None     # the job of the current or last export
        self.last_report: ExportReport | None = None
        self.runner = BackgroundRunner(self, task=EXPORT_TASK,
                                       describe_error=export_error_message)
        self._running = False
        self._flag_cache: tuple | None = None
        self._sized = False
        self._build()
        self._wire()
        self.runner.progress.connect(self._on_progress)
        self.runner.finished.connect(self._on_job_ended)
        self.runner.cancelled.connect(self._on_job_ended)
        self.runner.failed.connect(self._on_job_failed)
        folder = _session_folder
        if not folder and settings is not None and os.path.isdir(settings.export_folder()):
            folder = settings.export_folder()
        self.set_folder(folder)
        self.sync_from_state(reset_rank=True)

    # ----- following the state -----------------------------------------------------------------
    def sync_from_state(self, reset_rank: bool = False) -> None:
        """Bring the controls in line with the state (``reset_rank``: take ``state.rank``)."""
        d = self.decomposition
        k = 0 if d is None else d.rank
        with QSignalBlocker(self.rank_spin), QSignalBlocker(self.sheet_spin):
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

    @Slot()
    def _on_option_changed(self, *_args) -> None:
        self._update()

    @Slot(str)
    def _on_folder_edited(self, text: str) -> None:
        global _session_folder
        _session_folder = text.strip()
        self._update()

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

    # ----- planning ----------------------------------------------------------------------------
    def plan_options(self) -> dict[str, Any]:
        """Return the keyword options of :class:`~modescope.core.output.options.ExportOptions`
        shown now."""
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

    # ----- exporting ---------------------------------------------------------------------------
    def is_running(self) -> bool:
        """Return True while an export is writing files."""
        return self._running

    @Slot()
    def start_export(self) -> bool:
        """Plan the export and, when the destination accepts it, write it in the background.

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
            if not isinstance(exc, (*EXPECTED_ERRORS, TypeError, ValueError)):
                _log.error("export planning failed", exc_info=exc)
            text = export_error_message(exc)
            self._show_message(text, "error")
            self.exportFailed.emit(text)
            return False
        self.last_report = None
        if self.settings is not None:
            self.settings.set_export_folder(os.fspath(plan.folder))
        job = ExportJob(plan)
        self.worker = job
        self._running = True
        total = len(plan.items)
        self.progress_bar.setRange(0, max(total, 1))
        self.progress_bar.setValue(0)
        self.progress_bar.setVisible(True)
        self._show_message(f"Writing {total} files into {plan.folder}…", "info")
        self._update()
        self.exportStarted.emit(job)
        self.runner.submit(job)
        return True

    @Slot()
    def cancel_export(self) -> None:
        """Stop the export after the current file (completed files are kept)."""
        if self._running and self.worker is not None:
            self.worker.cancel()
            self._show_message("Stopping after the current file…", "info")
            self._update()

    @Slot(object)
    def _on_progress(self, counts: tuple[int, int]) -> None:
        if not self._running:
            return
        done, total = counts
        self.progress_bar.setRange(0, max(total, 1))
        self.progress_bar.setValue(min(done, max(total, 1)))

    @Slot(object)
    def _on_job_ended(self, report: ExportReport | None) -> None:
        """Show how an export ended that ran (to the end or until stopped) or never began."""
        if not self._running:
            return
        self._running = False
        if report is None:           # stopped before it began: nothing was written
            total = len(self.worker.plan.items)
            self.progress_bar.setRange(0, max(total, 1))
            self.progress_bar.setValue(0)
            self._show_message(f"Stopped: 0 of {total} files were written and are complete.",
                               "info")
            self._update()
            self.sync_from_state(reset_rank=False)
            return
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
        self.sync_from_state(reset_rank=False)

    @Slot(str)
    def _on_job_failed(self, message: str) -> None:
        if not self._running:
            return
        self._running = False
        self.progress_bar.setVisible(False)
        self._show_message(message, "error")
        self._update()
        self.exportFailed.emit(message)
        self.sync_from_state(reset_rank=False)

    def shutdown(self, timeout_ms: int = CLOSE_TIMEOUT_MS) -> bool:
        """Stop a running export after the current file and wait for it at most ``timeout_ms``.

        Returns
        -------
        bool
            True when no export is running any more.
        """
        if not self._running or self.worker is None:
            return True
        self.worker.cancel()
        if not self.runner.wait(int(timeout_ms)):
            _log.warning("the export did not stop within %d ms", timeout_ms)
            self._show_message("Still finishing the current file; the export stops right "
                               "after it.", "info")
            return False
        # the job's ending signal is queued for the runner: deliver it now, not after closing
        QCoreApplication.sendPostedEvents(self.runner, QEvent.Type.MetaCall)
        return not self._running

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
