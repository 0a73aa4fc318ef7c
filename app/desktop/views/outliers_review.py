"""The outlier view's review workflow: marks, refit without excluded images, list exports.

:class:`ReviewActions` is mixed into :class:`~modescope.app.desktop.views.outliers.OutlierView`:
it owns the review actions (Keep K, Exclude X, Clear mark U, Refit, Export), writes marks through
``state.set_marks`` and asks before a refit or before replacing a file. Every mark and every
file written comes from :mod:`modescope.core.review.marks`; source images are never moved,
changed or deleted.
"""

from __future__ import annotations

import os

from PySide6.QtCore import Qt, Slot
from PySide6.QtGui import QAction, QKeySequence
from PySide6.QtWidgets import QFileDialog, QMessageBox

from modescope.core.decomposition import Decomposition
from modescope.core.errors import ModescopeError
from modescope.core.output.atomic import refuse_sources
from modescope.core.review import marks as review

from modescope.app.desktop.display import display_text
from modescope.app.desktop.settings import StoredOptions

__all__ = ["ReviewActions", "stored_options_of"]


def stored_options_of(decomposition: Decomposition) -> StoredOptions:
    """Return the sources pane's options of the analysis that made ``decomposition``.

    Reads ``decomposition.metadata["options"]`` (a dict of
    :class:`~modescope.core.engine.options.AnalysisOptions` fields, as the pipeline stores it); the
    defaults when it is absent.

    Raises
    ------
    TypeError, ValueError
        If the stored options are not a dict or hold values AnalysisOptions refuses.
    """
    from modescope.core.engine.pipeline import AnalysisOptions

    stored = (decomposition.metadata or {}).get("options")
    if stored is None:
        options = AnalysisOptions()
    elif not isinstance(stored, dict):
        raise TypeError("the analysis's metadata 'options' must be a dict of analysis "
                        f"options, got {type(stored).__name__}")
    else:
        options = AnalysisOptions.from_dict(stored)
    return StoredOptions(rank=int(options.rank), color=str(options.color),
                         downscale=int(options.downscale), recursive=bool(options.recursive),
                         resize_mismatched=bool(options.resize_mismatched))


class ReviewActions:
    """Mixin for the outlier view (put it before QWidget in the bases): the review actions.

    The host widget provides ``state`` (AppState), ``scores`` (the OutlierTable shown or None),
    ``proxy`` (the table's filter), ``proxy_row(image)``, ``image_at(row)``, ``_ready()`` (scores
    of the current decomposition are shown), ``_targets()`` (the images a mark applies to),
    ``export_button`` and the ``refitRequested(object, object)`` signal. Call
    :meth:`_build_actions` before building the buttons and :meth:`_wire_actions` from the
    host's ``_wire``.

    Attributes
    ----------
    keep_action, exclude_action, clear_action, refit_action : QAction
    export_actions : dict
        ``(which, kind) -> QAction`` for which in {"excluded", "flagged"} and kind in
        {"csv", "paths"}.
    message_box : QMessageBox or None
        The warning shown (non-blocking).
    """

    def _init_review(self) -> None:
        self.message_box: QMessageBox | None = None
        self._export_dir = ""

    # ----- construction ------------------------------------------------------------------------
    def _action(self, text: str, shortcut: str | None, tip: str) -> QAction:
        a = QAction(text, self)
        if shortcut:
            a.setShortcut(QKeySequence(shortcut))
            tip = f"{tip} ({shortcut})"
        a.setToolTip(tip)
        a.setStatusTip(tip)
        self.addAction(a)
        return a

    def _build_actions(self) -> None:
        self.keep_action = self._action("Keep", "K",
                                        "Mark the selected image(s) as reviewed and kept")
        self.exclude_action = self._action("Exclude", "X",
                                           "Mark the selected image(s) as excluded from the "
                                           "next analysis (the files are not touched)")
        self.clear_action = self._action("Clear mark", "U",
                                         "Mark the selected image(s) as not reviewed")
        self.refit_action = self._action("Refit without excluded…", None,
                                         "Analyse the collection again without the images "
                                         "marked excluded")
        self.clear_action.setIconText("Clear")
        self.refit_action.setIconText("Refit…")
        self.export_actions: dict[tuple[str, str], QAction] = {}
        for which in ("excluded", "flagged"):
            for kind, what in (("csv", "as CSV with scores…"),
                               ("paths", "as a list of file paths…")):
                self.export_actions[(which, kind)] = self._action(
                    f"Export {which} images {what}", None,
                    f"Write the {which} images {what.rstrip('…')} to a file")

    def _wire_actions(self) -> None:
        self.keep_action.triggered.connect(self.keep_selected)
        self.exclude_action.triggered.connect(self.exclude_selected)
        self.clear_action.triggered.connect(self.clear_selected)
        self.refit_action.triggered.connect(self.refit)
        for (which, kind), a in self.export_actions.items():
            a.triggered.connect(lambda _=False, w=which, k=kind: self.export_list(w, k))

    def review_actions(self) -> list:
        """Return the actions for a menu (None stands for a separator)."""
        return [self.keep_action, self.exclude_action, self.clear_action, None,
                self.refit_action, None, *self.export_actions.values()]

    def _update_actions(self) -> None:
        ready = self._ready()
        for a in (self.keep_action, self.exclude_action, self.clear_action):
            a.setEnabled(ready)
        d = self.state.decomposition
        has_excluded = ready and review.excluded_indices(d).size > 0
        self.refit_action.setEnabled(has_excluded and bool(d.paths))
        for (which, kind), a in self.export_actions.items():
            a.setEnabled(ready and (kind == "csv" or bool(d.paths)))
        self.export_button.setEnabled(ready)

    # ----- marks -------------------------------------------------------------------------------
    def mark_selected(self, mark: int) -> list[int]:
        """Give the selected image(s) review mark ``mark`` (0 not reviewed, 1 keep, 2 exclude).

        When a single image is marked, the next row of the table becomes the selected image, so
        a sorted list can be reviewed with the keyboard.

        Returns
        -------
        list of int
            The images marked.
        """
        if not self._ready():
            return []
        targets = self._targets()
        if not targets:
            return []
        nxt = -1
        if len(targets) == 1:
            row = self.proxy_row(targets[0])
            if 0 <= row < self.proxy.rowCount() - 1:
                nxt = self.image_at(row + 1)
        self.state.set_marks(targets, mark)
        if nxt >= 0:
            self.state.set_selection_set(())
            self.state.set_selected(nxt)
        return targets

    @Slot()
    def keep_selected(self) -> None:
        """Mark the selected image(s) as reviewed and kept."""
        self.mark_selected(review.KEEP)

    @Slot()
    def exclude_selected(self) -> None:
        """Mark the selected image(s) as excluded from the next analysis."""
        self.mark_selected(review.EXCLUDE)

    @Slot()
    def clear_selected(self) -> None:
        """Mark the selected image(s) as not reviewed."""
        self.mark_selected(review.NOT_REVIEWED)

    # ----- messages ----------------------------------------------------------------------------
    def confirm(self, title: str, text: str) -> bool:
        """Ask a yes/no question (QMessageBox.question); True for yes."""
        answer = QMessageBox.question(self, title, display_text(text),
                                      QMessageBox.StandardButton.Yes
                                      | QMessageBox.StandardButton.Cancel,
                                      QMessageBox.StandardButton.Cancel)
        return answer == QMessageBox.StandardButton.Yes

    def _warn(self, title: str, text: str) -> None:
        """Show a message without blocking (the box is kept in :attr:`message_box`)."""
        if self.message_box is not None:
            self.message_box.close()
        box = QMessageBox(QMessageBox.Icon.Warning, title, display_text(text),
                          QMessageBox.StandardButton.Ok, self)
        box.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.message_box = box
        box.open()

    # ----- refit -------------------------------------------------------------------------------
    @Slot()
    def refit(self) -> bool:
        """Ask, then emit :attr:`refitRequested` with the images not marked excluded.

        Returns
        -------
        bool
            True when the request was sent.
        """
        d = self.state.decomposition
        if d is None or not self._ready():
            return False
        excluded = review.excluded_indices(d)
        if excluded.size == 0:
            self._warn("Nothing excluded", "No image is marked excluded: mark images with "
                       "Exclude (X) first.")
            return False
        try:
            remaining = review.remaining_sources(d)
            options = stored_options_of(d)
        except (TypeError, ValueError) as exc:
            self._warn("Cannot refit", str(exc))
            return False
        text = (f"Analyse again the {len(remaining):,} images not marked excluded "
                f"({excluded.size:,} excluded), with the same options?\n\nThe new analysis "
                "replaces the current one and its marks: save the current one first (File > "
                "Save analysis) to keep them. The source images are not moved or deleted.")
        if not self.confirm("Refit without excluded images", text):
            return False
        self.refitRequested.emit(list(remaining), options)
        return True

    # ----- export ------------------------------------------------------------------------------
    def _start_dir(self) -> str:
        if self._export_dir and os.path.isdir(self._export_dir):
            return self._export_dir
        d = self.state.decomposition
        if d is not None and d.paths:
            folder = os.path.dirname(os.path.dirname(os.path.abspath(d.paths[0])))
            if os.path.isdir(folder):
                return folder
        return os.path.expanduser("~")

    def export_list(self, which: str, kind: str) -> str | None:
        """Ask for a file name and write the excluded or flagged images to it.

        Parameters
        ----------
        which : {"excluded", "flagged"}
        kind : {"csv", "paths"}
            A CSV with scores (:func:`modescope.core.review.marks.write_csv`) or one source path per
            line (:func:`modescope.core.review.marks.write_path_list`).

        Returns
        -------
        str or None
            The file written; None when cancelled or on failure (with a message naming the
            file).

        Raises
        ------
        ValueError
            If ``which`` or ``kind`` is not one of the choices above.
        """
        if which not in ("excluded", "flagged") or kind not in ("csv", "paths"):
            raise ValueError(f"which must be 'excluded' or 'flagged' and kind 'csv' or "
                             f"'paths', got {which!r}, {kind!r}")
        d, t = self.state.decomposition, self.scores
        if d is None or not self._ready():
            return None
        count = review.excluded_indices(d).size if which == "excluded" else t.n_flagged
        if count == 0:
            self._warn("Nothing to export", f"No image is {which} at present.")
            return None
        path, overwrite = self._ask_export_path(which, kind, count)
        if path is None:
            return None
        try:
            refuse_sources(path, d.paths)         # never a source image, whatever was answered
            if kind == "csv":
                written = review.write_csv(path, d, t, which, overwrite=overwrite)
            else:
                written = review.write_path_list(path, d, which, t, overwrite=overwrite)
        except (ModescopeError, OSError, ValueError, TypeError) as exc:
            message = str(exc)
            self._warn("Cannot write the list",
                       message if os.fspath(path) in message else f"{path}: {message}")
            return None
        self._export_dir = os.path.dirname(os.fspath(written))
        return os.fspath(written)

    def _ask_export_path(self, which: str, kind: str, count: int) -> tuple[str | None, bool]:
        """Ask for the file to write; return (path or None when cancelled, overwrite)."""
        suffix, file_filter = ((".csv", "CSV files (*.csv);;All files (*)") if kind == "csv"
                               else (".txt", "Text files (*.txt);;All files (*)"))
        start = os.path.join(self._start_dir(), f"{which}{suffix}")
        path, _ = QFileDialog.getSaveFileName(
            self, f"Export the {count} {which} image(s)", start, file_filter,
            options=QFileDialog.Option.DontConfirmOverwrite)
        if not path:
            return None, False
        if not os.path.splitext(path)[1]:
            path += suffix
        d = self.state.decomposition
        try:
            refuse_sources(path, d.paths if d is not None else ())
        except ModescopeError as exc:           # a source image: refused before any question
            self._warn("Cannot write the list", str(exc))
            return None, False
        if os.path.exists(path):
            if not self.confirm("Replace the file?", f"{path} already exists. Replace it?"):
                return None, False
            return path, True
        return path, False
