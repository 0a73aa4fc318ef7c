"""The main window's changes to the sources of an open analysis: add images, locate moved files.

:class:`SourcesMixin` is one part of :class:`~modescope.app.desktop.main_window.MainWindow`.

* **Add images to this analysis** (File menu, from a folder or from files): the new images
  stream into the analysis shown through
  :func:`modescope.core.engine.pipeline.update_analysis`, in the analysis worker (progress,
  Cancel, and File > Finish the analysis after a cancel, like any run). The updated analysis is
  shown, the Sources pane lists all of its folders, the title says it is not saved, and the
  window offers to save it.
* **Locate the sources**: when the files of an analysis are not at their recorded paths (the
  collection was moved), the window says so and offers to choose the folder where they are
  now; :func:`modescope.core.sources.relocate.relocate_sources` re-bases them (checked by their
  headers) in the background, and the reconstruction, the residual and the exports read them
  from there.
"""

from __future__ import annotations

import os
from typing import Sequence

from PySide6.QtCore import Slot
from PySide6.QtWidgets import QFileDialog, QMessageBox

from modescope.app.desktop.display import display_name, display_path
from modescope.app.desktop.workers.background import BackgroundRunner
from modescope.app.words import counted

__all__ = ["SourcesMixin", "adding", "update_options"]


def update_options(decomposition):
    """Return the ``AnalysisOptions`` to add images to ``decomposition`` with.

    The options stored in the analysis, rank included: the rank asked for when it was made
    (the default rank rule's when none is stored), not the rank of a partial result, which
    may be smaller because few images had been read when it stopped.

    Parameters
    ----------
    decomposition : Decomposition

    Returns
    -------
    AnalysisOptions

    Raises
    ------
    TypeError, ValueError
        If the stored options are not a dict or hold values AnalysisOptions refuses.
    """
    from modescope.core.engine.options import stored_options

    return stored_options(decomposition)


def adding(decomposition):
    """Return a stand-in for ``pipeline.analyze`` that adds the sources to ``decomposition``.

    Parameters
    ----------
    decomposition : Decomposition
        The analysis shown.

    Returns
    -------
    callable
        ``run(sources, options, *, progress=None, cancel=None, on_partial=None, only=None)``,
        which runs :func:`modescope.core.engine.pipeline.update_analysis`.

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition.
    """
    from modescope.core.decomposition import Decomposition

    if not isinstance(decomposition, Decomposition):
        raise TypeError(f"decomposition must be a Decomposition, got "
                        f"{type(decomposition).__name__}")

    def run(sources, options, *, progress=None, cancel=None, on_partial=None, only=None):
        from modescope.core.engine import pipeline

        return pipeline.update_analysis(decomposition, sources, options, progress=progress,
                                        cancel=cancel, on_partial=on_partial)

    return run


class SourcesMixin:
    """Add images to the analysis shown; locate its moved source files (a part of
    ``MainWindow``).

    Uses ``self.state``, ``self.runner``, ``self.ingest``, ``self.current_file``,
    ``self._begin_run``, ``self._describe_sources``, ``self._show_error``,
    ``self._confirm_dialogs``, ``self.choose_save`` and the actions ``add_images_menu`` and
    ``locate_action``; keeps ``_adding`` (the worker of an add run and the analysis it started
    from) and ``_locator`` (the background runner of the search, made on first use).
    """

    # ----- adding images -----------------------------------------------------------------------
    def can_add_images(self) -> bool:
        """True when an analysis that records its files is shown and no run goes on."""
        d = self.state.decomposition
        return d is not None and bool(d.paths) and not self.runner.is_running()

    @Slot()
    def choose_folder_to_add(self) -> None:
        """Ask for a folder and add its images to the analysis shown."""
        folder = QFileDialog.getExistingDirectory(self, "Add the images of a folder to this "
                                                  "analysis", self._dialog_dir())
        if folder:
            self.ingest.set_dialog_dir(folder)
            self.add_images([folder])

    @Slot()
    def choose_files_to_add(self) -> None:
        """Ask for image files and add them to the analysis shown."""
        from modescope.app.desktop.views.sources import IMAGE_FILE_FILTER

        files, _ = QFileDialog.getOpenFileNames(self, "Add image files to this analysis",
                                                self._dialog_dir(), IMAGE_FILE_FILTER)
        if files:
            self.ingest.set_dialog_dir(os.path.dirname(files[0]))
            self.add_images(files)

    def add_images(self, sources: Sequence[str]) -> bool:
        """Add the images of ``sources`` (folders and files) to the analysis shown.

        Runs in the analysis worker; the updated analysis replaces the one shown when it is
        done (files already in the analysis are skipped; see
        :func:`~modescope.core.engine.pipeline.update_analysis`).

        Parameters
        ----------
        sources : sequence of str
            Folders and image files.

        Returns
        -------
        bool
            False (with a message) when there is no analysis to add to, a run goes on, or the
            analysis' options cannot be read.
        """
        sources = [os.fspath(s) for s in sources]
        if not sources:
            return False
        if not self.can_add_images():
            self._show_error("Cannot add images", "Open or finish an analysis that records "
                             "its source files first (and wait for a run to end).")
            return False
        d = self.state.decomposition
        try:
            options = update_options(d)
        except (TypeError, ValueError) as exc:
            self._show_error("Cannot add images", f"The analysis' options cannot be read: {exc}")
            return False
        base = self.windowTitle().replace(" (partial result)", "").split(" + ")[0]
        runner = self.runner
        saved, runner._analyze = runner._analyze, adding(d)     # this run only
        try:
            self._begin_run(sources, options, f"{base} + new images (not saved)")
        finally:
            runner._analyze = saved
        self._adding = (runner.worker, d)
        self.progress_label.setText("Adding images…")
        return True

    def _finish_adding(self, result) -> bool:
        """After a run: when it added images, describe the result and offer to save it.

        Returns
        -------
        bool
            True when the run that ended was an add run.
        """
        adding_run = getattr(self, "_adding", None)
        if adding_run is None or adding_run[0] is not self.runner.worker:
            return False
        self._adding = None
        d = result.decomposition
        if d is None:
            return True
        old = adding_run[1]
        known = set(zip(old.paths, old.pages.tolist()))
        added = sum(1 for key in zip(d.paths, d.pages.tolist()) if key not in known)
        left_out = old.n_images - (d.n_images - added)
        self._describe_sources(d)
        self.statusBar().showMessage(
            f"Added {counted(added, 'image')} to {counted(old.n_images, 'image')}: the "
            f"analysis now holds {counted(d.n_images, 'image')}"
            + (f" ({left_out} old could not be read again and were left out; see Sources)"
               if left_out else "") + " (not saved yet)", 15000)
        self._offer("Save the updated analysis?",
                    f"The analysis now holds {counted(d.n_images, 'image')}, "
                    f"{counted(added, 'image')} added. The file it was opened from is "
                    "unchanged.\n\nSave the updated analysis now?", "Save…", self.choose_save)
        return True

    def _offer(self, title: str, text: str, button: str, then) -> None:
        """Ask (without blocking) whether to do ``then``; nothing is asked in tests that turned
        the dialogs off (``confirm_dialogs=False``)."""
        if not self._confirm_dialogs or getattr(self, "_closing", False):
            return
        old = getattr(self, "sources_box", None)
        if old is not None:
            old.close()
        box = QMessageBox(QMessageBox.Icon.Question, title, text,
                          QMessageBox.StandardButton.Cancel, self)
        yes = box.addButton(button, QMessageBox.ButtonRole.AcceptRole)
        box.setDefaultButton(yes)
        box.buttonClicked.connect(lambda clicked: then() if clicked is yes else None)
        self.sources_box = box
        box.open()

    @Slot()
    def _update_add_actions(self, *_args) -> None:
        self.add_images_menu.setEnabled(self.can_add_images())
        d = self.state.decomposition
        self.locate_action.setEnabled(d is not None and bool(d.paths)
                                      and not self.runner.is_running())

    # ----- locating moved sources ----------------------------------------------------------------
    def check_sources_found(self) -> int:
        """Say so, and offer to locate them, when the files of the analysis shown are missing.

        Returns
        -------
        int
            The number of distinct source files not at their recorded path.
        """
        from modescope.core.sources.relocate import missing_sources

        d = self.state.decomposition
        if d is None or not d.paths:
            return 0
        missing = missing_sources(d)
        if not missing:
            return 0
        total = len(dict.fromkeys(d.paths))
        text = (f"{counted(len(missing), 'source file')} of {total:,} "
                f"{'is' if len(missing) == 1 else 'are'} not where the analysis recorded "
                f"{'it' if len(missing) == 1 else 'them'} (first: {display_path(missing[0])}). "
                "The weights and scores are all there; the image, reconstruction, residual and "
                "exports need the files.")
        # the status bar holds the short form (the question below has the whole text)
        self.statusBar().showMessage(
            f"{counted(len(missing), 'source file')} of {total:,} not found where the analysis "
            "recorded them: File > Locate the sources finds moved files.", 20000)
        self._offer("Source files not found",
                    text + "\n\nWere they moved? Choose the folder where they are now.",
                    "Locate the sources…", self.choose_sources_folder)
        return len(missing)

    @Slot()
    def choose_sources_folder(self) -> None:
        """Ask for the folder the source files were moved to and locate them there."""
        d = self.state.decomposition
        if d is None or not d.paths:
            return
        folder = QFileDialog.getExistingDirectory(self, "Locate the sources: the folder where "
                                                  "the images are now", self._dialog_dir())
        if folder:
            self.ingest.set_dialog_dir(folder)
            self.locate_sources(folder)

    def locate_sources(self, folder: str) -> bool:
        """Look for the missing source files of the analysis shown in ``folder`` (background).

        When the search ends, the analysis shown takes the new paths (review marks and their
        history kept) and the status bar says how many files were found and how many are
        still missing.

        Parameters
        ----------
        folder : str
            The folder where the files are now (or one above it).

        Returns
        -------
        bool
            False when there is no analysis with recorded files, or a search already runs.
        """
        from modescope.core.sources.relocate import relocate_sources

        d = self.state.decomposition
        if d is None or not d.paths:
            return False
        if getattr(self, "_locator", None) is None:
            self._locator = BackgroundRunner(self, task="Locating the sources")
            self._locator.finished.connect(self._on_located)
            self._locator.failed.connect(
                lambda message: self._show_error("Cannot locate the sources", message))
        if self._locator.is_running():
            return False
        folder = os.fspath(folder)
        self.statusBar().showMessage(f"Looking for the source files in "
                                     f"{display_path(folder)}…")
        self._locating = d
        self._locator.start(lambda ctx: relocate_sources(d, folder, cancel=ctx.cancelled))
        return True

    @Slot(object)
    def _on_located(self, found) -> None:
        searched, self._locating = getattr(self, "_locating", None), None
        current = self.state.decomposition
        if current is None or searched is None or current.paths != searched.paths:
            return                       # another analysis is shown now: nothing to re-point
        if not found.moved:
            why = f" ({found.problems[0]})" if found.problems else ""
            self.statusBar().showMessage(
                f"No missing source file was found there; "
                f"{counted(len(found.missing), 'file')} still missing{why}.", 20000)
            return
        snapshot = self.state.snapshot()
        # the marks shown now (perhaps not saved) stay, with their undo history
        moved = current.replace(paths=tuple(found.moved.get(p, p) for p in current.paths))
        self.state.restore(type(snapshot)(moved, snapshot.saved_marks, snapshot.undo,
                                          snapshot.redo))
        self._describe_sources(moved)
        self.inspector.refresh()
        still = (f"; {counted(len(found.missing), 'file')} still missing"
                 if found.missing else "")
        title = self.windowTitle()
        if "(sources moved, not saved)" not in title:
            self.setWindowTitle(f"{title} (sources moved, not saved)")
        self.statusBar().showMessage(
            f"Found {counted(len(found.moved), 'source file')} in "
            f"{display_name(os.path.commonpath(list(found.moved.values())))}{still}. Save the "
            "analysis to keep the new places.", 20000)

    def stop_locating(self, timeout_ms: int = 3000) -> bool:
        """Cancel a search for moved sources and wait at most ``timeout_ms`` for it."""
        locator = getattr(self, "_locator", None)
        return True if locator is None else locator.shutdown(timeout_ms)
