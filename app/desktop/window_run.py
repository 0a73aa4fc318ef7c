"""The main window's run control: start, refit and cancel an analysis, and show how it goes.

:class:`RunControlMixin` is one part of :class:`~modescope.app.desktop.main_window.MainWindow`.
The analysis itself runs in the :class:`~modescope.app.desktop.workers.analysis.AnalysisRunner`
(``self.runner``); this part starts it, turns its signals into the progress line, the state's
decomposition and status messages, and keeps the Sources pane in step with a run that scans the
files itself.
"""

from __future__ import annotations

import os
import time
from typing import Sequence

from PySide6.QtCore import Slot

from modescope.app.words import counted
from modescope.app.desktop.display import display_name
from modescope.app.desktop.settings import StoredOptions
from modescope.app.desktop.views.sources import make_analysis_options
from modescope.app.desktop.window_status import format_seconds

__all__ = ["RunControlMixin", "STAGES", "finishing"]

#: The words of the progress line for the stages of ``pipeline.Progress``.
STAGES = {"scan": "Reading file headers", "learn": "Learning the basis",
          "score": "Scoring the images"}


def finishing(partial):
    """Return a stand-in for ``pipeline.analyze`` that completes the partial result ``partial``.

    The returned callable takes the arguments the analysis worker gives ``pipeline.analyze``.
    It runs :func:`modescope.core.engine.pipeline.update_analysis` on ``partial``: the images of
    the sources not learned yet stream in, then the final passes run over every image (the old
    ones read again from their files). When every image found was learned before the stop (the
    run was stopped during its final passes) there is nothing to add, and the whole analysis
    runs again (:func:`~modescope.core.engine.pipeline.analyze`); so does a refit (``only``),
    which the update cannot restrict to its listed pages.

    Parameters
    ----------
    partial : Decomposition
        The partial result kept after a cancel (or opened from a file).

    Returns
    -------
    callable
        ``run(sources, options, *, progress=None, cancel=None, on_partial=None, only=None)``.
    """
    from modescope.core.decomposition import Decomposition

    if not isinstance(partial, Decomposition):
        raise TypeError(f"partial must be a Decomposition, got {type(partial).__name__}")

    def run(sources, options, *, progress=None, cancel=None, on_partial=None, only=None):
        from modescope.core.engine import pipeline
        from modescope.core.errors import NoUsableImagesError

        kw = dict(progress=progress, cancel=cancel, on_partial=on_partial)
        if only is None:
            try:
                return pipeline.update_analysis(partial, sources, options, **kw)
            except NoUsableImagesError:
                pass                       # every image was learned: run the passes again
        extra = {} if only is None else {"only": only}
        return pipeline.analyze(sources, options, **kw, **extra)

    return run


class RunControlMixin:
    """Start, refit, cancel and follow an analysis (a part of ``MainWindow``).

    Uses ``self.state``, ``self.settings``, ``self.ingest``, ``self.inspector``, ``self.runner``,
    ``self.progress_bar``, ``self.progress_label``, ``self.start_action``,
    ``self.cancel_action`` and ``self._show_error``; keeps the start time of the run, whether
    its learning stage has begun, the (sources, options) of a run that scans for the pane,
    ``_last_run``: (sources, options, only, the partial result it left) for "Finish the
    analysis", and ``_previous``: what was shown before the run (the state's snapshot, the file and the
    window title), shown again when the run fails or stops before its first image.
    """

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
            False (with a message) when the options are not valid, or when the question about
            unsaved review marks is cancelled.
        """
        sources = [os.fspath(s) for s in sources]
        analysis_options = self._checked_options(bool(sources), options,
                                                 "Add a folder or image files first.")
        if analysis_options is None:
            return False
        if not self.confirm_discard_marks("A new analysis"):
            return False
        if [os.path.abspath(s) for s in sources] != self.ingest.sources():
            self.ingest.set_sources(sources)
        self.settings.set_options(options)
        self.settings.set_last_folders(sources)     # what a start with no path reopens
        # reuse the pane's finished scan of the same sources and options; otherwise stop the
        # pane's scan so the two do not compete, and let the run's scan fill the pane later
        scanned = self.ingest.scanned_for(sources, options)
        if scanned is None:
            self.ingest.stop_scan(run_scans=True)
        names = ", ".join(display_name(s) for s in sources[:2])
        more = f" and {len(sources) - 2} more" if len(sources) > 2 else ""
        self._begin_run(scanned if scanned is not None else sources, analysis_options,
                        f"Modescope — {names}{more}", run_key=(list(sources), options))
        return True

    def refit_analysis(self, images: Sequence, options: StoredOptions, *,
                       asked: bool = False) -> bool:
        """Analyse again only ``images`` ((path, page) pairs), for instance the images of
        the current analysis not marked excluded.

        The Sources pane is left as it is: a refit is a variant of the current collection,
        not a new one. Pages of multi-page files that are
        not listed are left out. Unsaved review marks are asked about first, unless
        ``asked`` says the person already agreed that the refit replaces them (the
        Outliers view's Refit asks once, with the way to keep them).

        Returns
        -------
        bool
            False (with a message) when there is nothing to analyse or the options are not
            valid, or when the question about unsaved review marks is cancelled.
        """
        pairs = [(os.fspath(p), int(g)) for p, g in images]
        analysis_options = self._checked_options(bool(pairs), options,
                                                 "Every image is marked excluded.")
        if analysis_options is None:
            return False
        if not asked and not self.confirm_discard_marks("The refit"):
            return False
        files = list(dict.fromkeys(p for p, _ in pairs))
        self.ingest.stop_scan()
        self._begin_run(files, analysis_options,
                        f"Modescope — refit of {counted(len(pairs), 'image')}", only=pairs)
        return True

    @Slot(object, object)
    def _refit_from_view(self, images: Sequence, options: StoredOptions) -> bool:
        """The Outliers view's Refit, already confirmed there: do not ask a second time."""
        return self.refit_analysis(images, options, asked=True)

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
        if not self.runner.is_running() or self._previous is None:
            # what is shown now comes back if the run fails or stops before any image
            self._previous = (self.state.snapshot(), self.current_file, self.windowTitle())
        self.current_file = None
        self._install(None)
        self._user_picked = False
        paths = list(run_key[0]) if run_key is not None else list(sources)
        self._last_run = (paths, analysis_options, only, None)   # for "Finish the analysis"
        self._run_started = time.monotonic()
        self._run_key = run_key
        self._first_learn = True
        self.runner.start(sources, analysis_options, only=only)
        self.setWindowTitle(title)
        self.progress_bar.setRange(0, 0)
        self.progress_label.setText("Starting…")
        self.progress_bar.show()
        self.progress_label.show()

    def can_finish(self) -> bool:
        """True when a partial result is shown, no run goes on, and its sources are known."""
        d = self.state.decomposition
        return (d is not None and not d.exact and not self.runner.is_running()
                and self._finish_sources(d) is not None)

    def _finish_sources(self, d):
        """(sources, AnalysisOptions, only) to finish ``d`` with, or None."""
        last = getattr(self, "_last_run", None)
        if last is not None and last[3] is d:
            return last[:3]
        if d.paths and "options" in d.metadata:      # a partial result opened from a file
            from modescope.core.engine.options import AnalysisOptions
            try:
                options = AnalysisOptions.from_dict(d.metadata["options"])
            except (TypeError, ValueError):
                return None
            files = list(dict.fromkeys(d.paths))
            pages = [(p, int(g)) for p, g in zip(d.paths, d.pages)]
            return files, options, pages
        return None

    @Slot()
    def finish_analysis(self) -> bool:
        """Complete the partial result shown (see :func:`finishing`) in the worker thread.

        Returns
        -------
        bool
            False (with a message in the status bar) when there is nothing to finish.
        """
        d = self.state.decomposition
        if not self.can_finish():
            self.statusBar().showMessage("There is no partial result to finish.", 5000)
            return False
        sources, options, only = self._finish_sources(d)
        title = self.windowTitle().replace(" (partial result)", "")
        runner = self.runner
        saved, runner._analyze = runner._analyze, finishing(d)   # this run only
        try:
            self._begin_run(sources, options, title, only=only)
        finally:
            runner._analyze = saved
        self.progress_label.setText("Finishing the analysis…")
        return True

    @Slot()
    def _update_finish_action(self, *_args) -> None:
        self.finish_action.setEnabled(self.can_finish())

    @Slot()
    def cancel_analysis(self) -> None:
        """Stop the analysis at the next block; the partial result stays."""
        if self.runner.is_running():
            self.runner.cancel()
            self.progress_label.setText("Stopping…")

    # ----- what the runner reports -------------------------------------------------------------
    @Slot(bool)
    def _on_running_changed(self, running: bool) -> None:
        self.ingest.set_running(running)
        self.inspector.set_running(running)
        self.cancel_action.setEnabled(running)
        self.start_action.setEnabled(not running)
        if not running:
            self.progress_bar.hide()
            self.progress_label.hide()
            if self.state.decomposition is not None:
                self.inspector.refresh()       # its title: "in progress" becomes "partial"
        self._update_status()
        self._update_finish_action()

    @Slot(object)
    def _on_progress(self, p) -> None:
        total = max(int(getattr(p, "total", 0)), 0)
        done = max(int(getattr(p, "done", 0)), 0)
        stage = STAGES.get(getattr(p, "stage", ""), str(getattr(p, "stage", "")))
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
            parts.append(f"about {format_seconds(left)} left")
        self.progress_label.setText(" · ".join(parts))

    def _install(self, decomposition) -> None:
        """Give the state ``decomposition``; the selection it clamps is not a user's pick."""
        self._installing = True
        try:
            self.state.set_decomposition(decomposition)
        finally:
            self._installing = False

    @Slot(int)
    def _note_pick(self, _index: int) -> None:
        """Remember that an image was selected during the run other than by the run itself."""
        if not getattr(self, "_installing", False):
            self._user_picked = True

    @Slot(object)
    def _on_partial(self, decomposition) -> None:
        self._install(decomposition)

    def _restore_previous(self) -> None:
        """Show again the analysis (its marks, history, file and title) shown before the run."""
        previous, self._previous = self._previous, None
        if previous is not None:
            snapshot, self.current_file, title = previous
            self.state.restore(snapshot)
            self.setWindowTitle(title)

    @Slot(object)
    def _on_finished(self, result) -> None:
        self._previous = None
        key = self._run_key
        if key is not None and self.ingest.scanned_for(*key) is None:
            self.ingest.adopt(result.source_set, *key)
        if result.decomposition is not None:
            self._install(result.decomposition)
            if not getattr(self, "_user_picked", False):
                # nobody picked an image during the run: start the review at the worst one
                self.views["outliersDock"].select_worst()
        self.ingest.set_problems(result.problems, result.source_set.notes)
        seconds = time.monotonic() - self._run_started
        n = result.decomposition.n_images if result.decomposition is not None else 0
        skipped = len(result.problems)
        self.statusBar().showMessage(
            f"Analysis finished: {counted(n, 'image')} in {format_seconds(seconds)}"
            + (f", {skipped} skipped (see Sources)" if skipped else ""), 10000)
        self._finish_adding(result)         # images added to an analysis: say so, offer saving

    @Slot(object)
    def _on_cancelled(self, result) -> None:
        d = None if result is None else result.decomposition
        key = self._run_key
        if key is not None and self.ingest.scanned_for(*key) is None:
            if result is not None and result.source_set.n_images:
                self.ingest.adopt(result.source_set, *key)   # the scan itself was complete
            else:
                self.ingest.run_scan_ended()
        if result is not None:
            self.ingest.set_problems(result.problems, result.source_set.notes)
        if d is not None:
            self._previous = None
            if self._last_run is not None:
                self._last_run = self._last_run[:3] + (d,)    # what finishing it starts from
            self._install(d)
            title = self.windowTitle()
            if not title.endswith(" (partial result)"):
                self.setWindowTitle(f"{title} (partial result)")
            self.statusBar().showMessage(
                f"Analysis cancelled: the partial result from {counted(d.n_images, 'image')} "
                "is kept (it can be saved; File > Finish the analysis completes it).", 10000)
            self._update_status()
            self._update_finish_action()
        else:
            self._restore_previous()
            self.statusBar().showMessage("Analysis cancelled before any image was analysed.",
                                         10000)

    @Slot(str)
    def _on_failed(self, message: str) -> None:
        key = self._run_key
        if key is not None and self.ingest.scanned_for(*key) is None:
            self.ingest.run_scan_ended(f"Not analysed: {message}")
        self._restore_previous()
        self.statusBar().showMessage("The analysis failed.", 10000)
        self._show_error("The analysis failed", message)
