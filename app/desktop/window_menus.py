"""The main window's actions and menus, the keys that step through images and ranks, and Help
(the guide and the shortcut list of :mod:`~modescope.app.desktop.window_help`, About).

:class:`MenusMixin` is one part of :class:`~modescope.app.desktop.main_window.MainWindow`. Every
action is also added to the window itself, so its shortcut works whichever dock has the focus.
"""

from __future__ import annotations

from PySide6.QtCore import Qt, Slot
from PySide6.QtGui import QAction, QKeySequence
from PySide6.QtWidgets import QMessageBox

__all__ = ["MenusMixin", "CAUTIONS", "app_version"]

CAUTIONS = (
    "Images of people are personal data under local privacy law: analyse, keep and share "
    "them only as that law allows.",
    "Outlier flags are a screening aid for a person to review, not a verdict about an image "
    "or about anyone in it.",
)


def app_version() -> str:
    """Return the installed version of the ``modescope`` distribution ("unknown" if none)."""
    from importlib import metadata

    try:
        return metadata.version("modescope")
    except metadata.PackageNotFoundError:
        return "unknown"


class MenusMixin:
    """Actions, the menu bar, image and rank steps, About (a part of ``MainWindow``).

    Uses ``self.state``, ``self.ingest``, ``self.docks`` and ``self.views``, and the slots of the
    other parts (``choose_open``, ``start_analysis``, ``reset_layout`` …).
    """

    def _action(self, text: str, slot, shortcut=None, tip: str = "") -> QAction:
        """Return a new action of the window (its shortcut works in every dock)."""
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

    def _build_actions(self) -> None:
        action = self._action
        K = QKeySequence.StandardKey
        self.add_folder_action = action("Add &folder…", self.ingest.choose_folder, "Ctrl+D",
                                        "Add a folder of images to the sources")
        self.add_files_action = action("Add &files…", self.ingest.choose_files, "Ctrl+Shift+O",
                                       "Add image files to the sources")
        self.open_action = action("&Open analysis…", self.choose_open, K.Open,
                                  "Open a saved analysis (.npz)")
        self.save_action = action("&Save analysis…", self.choose_save, K.Save,
                                  "Save the current analysis (.npz)")
        self.export_action = action("&Export…", self.show_export_dialog, "Ctrl+E",
                                    "Write previews, basis images, tables or a compact model "
                                    "to a folder")
        self.check_action = action("Chec&k new images against this analysis…",
                                   self.views["checkedDock"].choose_and_check, None,
                                   "Score new images against the analysis shown (Phase II "
                                   "limits) without changing it")
        self.add_to_folder_action = action("From a &folder…", self.choose_folder_to_add, None,
                                           "Add the images of a folder to the analysis shown "
                                           "(an update: the new images stream in, then every "
                                           "image is scored again)")
        self.add_to_files_action = action("From &files…", self.choose_files_to_add, None,
                                          "Add image files to the analysis shown (an update)")
        self.locate_action = action("&Locate the sources…", self.choose_sources_folder, None,
                                    "The source files were moved: choose the folder where "
                                    "they are now")
        self.quit_action = action("&Quit", self.close, K.Quit)
        self.start_action = action("S&tart analysis", self._start_from_pane, "Ctrl+R",
                                   "Analyse the sources with the options shown")
        self.cancel_action = action("&Cancel analysis", self.cancel_analysis, "Esc",
                                    "Stop the analysis and keep the partial result")
        self.finish_action = action("&Finish the analysis", self.finish_analysis, None,
                                    "Complete the partial result shown: add the images not "
                                    "analysed yet and run the final passes")
        self.reset_layout_action = action("&Reset layout", self.reset_layout)
        self.prev_action = action("&Previous image", self.previous_image, ["PgUp", "Ctrl+Left"])
        self.next_action = action("&Next image", self.next_image, ["PgDown", "Ctrl+Right"])
        self.rank_up_action = action("Rank &up", self.rank_up, ["+", "=", "Ctrl+Up"],
                                     "Use one more basis image in the reconstruction")
        self.rank_down_action = action("Rank &down", self.rank_down, ["-", "Ctrl+Down"],
                                       "Use one basis image fewer in the reconstruction")
        self.about_action = action("&About Modescope", self.show_about)
        self.guide_action = action("&How to read this", self.show_guide, "F1",
                                   "What basis images, weights, the residual, the rank and the "
                                   "outlier limits mean")
        self.shortcuts_action = action("&Keyboard shortcuts", self.show_shortcuts, "Ctrl+/",
                                       "List every keyboard shortcut of the window")
        self.undo_marks_action = action("&Undo mark", self.undo_marks, "Ctrl+Z",
                                        "Take back the last change of review marks")
        self.redo_marks_action = action("&Redo mark", self.redo_marks, "Ctrl+Shift+Z",
                                        "Make again the last change of marks taken back")

    def _build_menus(self) -> None:
        bar = self.menuBar()
        file_menu = bar.addMenu("&File")
        file_menu.addAction(self.add_folder_action)
        file_menu.addAction(self.add_files_action)
        file_menu.addSeparator()
        file_menu.addAction(self.open_action)
        file_menu.addAction(self.save_action)
        file_menu.addAction(self.export_action)
        file_menu.addAction(self.check_action)
        self.add_images_menu = file_menu.addMenu("&Add images to this analysis")
        self.add_images_menu.setToolTipsVisible(True)
        self.add_images_menu.addAction(self.add_to_folder_action)
        self.add_images_menu.addAction(self.add_to_files_action)
        file_menu.addAction(self.locate_action)
        self.recent_menu = file_menu.addMenu("&Recent analyses")
        self.recent_menu.triggered.connect(self._on_recent)
        file_menu.addSeparator()
        file_menu.addAction(self.start_action)
        file_menu.addAction(self.cancel_action)
        file_menu.addAction(self.finish_action)
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
        self.review_menu.addAction(self.undo_marks_action)
        self.review_menu.addAction(self.redo_marks_action)
        for name in ("outliersDock", "duplicatesDock"):
            if not self.review_menu.isEmpty():
                self.review_menu.addSeparator()
            for a in self.views[name].review_actions():
                if a is None:
                    self.review_menu.addSeparator()
                else:
                    self.review_menu.addAction(a)
                    self.addAction(a)   # window-level shortcut (K, X, U)

        help_menu = bar.addMenu("&Help")
        help_menu.addAction(self.guide_action)
        help_menu.addAction(self.shortcuts_action)
        help_menu.addSeparator()
        help_menu.addAction(self.about_action)
        self._rebuild_recent_menu()

    # ----- undo and redo of marks ----------------------------------------------------------------
    @Slot()
    def undo_marks(self) -> None:
        """Take back the last change of review marks."""
        if self.state.undo_marks():
            self.statusBar().showMessage("Mark change undone.", 3000)

    @Slot()
    def redo_marks(self) -> None:
        """Make again the last change of review marks that was taken back."""
        if self.state.redo_marks():
            self.statusBar().showMessage("Mark change made again.", 3000)

    @Slot()
    def _update_undo_actions(self) -> None:
        self.undo_marks_action.setEnabled(self.state.can_undo)
        self.redo_marks_action.setEnabled(self.state.can_redo)

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
    def show_guide(self) -> None:
        """Show the short guide "How to read this" (made on first use)."""
        from modescope.app.desktop.window_help import GuideDialog

        if getattr(self, "guide_dialog", None) is None:
            self.guide_dialog = GuideDialog(self)
        self.guide_dialog.show()
        self.guide_dialog.raise_()

    @Slot()
    def show_shortcuts(self) -> None:
        """Show the keyboard shortcuts, read from the window's actions (made on first use)."""
        from modescope.app.desktop.window_help import ShortcutsDialog

        if getattr(self, "shortcuts_dialog", None) is None:
            self.shortcuts_dialog = ShortcutsDialog(self)
        self.shortcuts_dialog.refresh()
        self.shortcuts_dialog.show()
        self.shortcuts_dialog.raise_()

    @Slot()
    def show_about(self) -> None:
        """Show the version and the cautions."""
        box = QMessageBox(QMessageBox.Icon.Information, "About Modescope", self.about_text(),
                          QMessageBox.StandardButton.Ok, self)
        box.setTextFormat(Qt.TextFormat.RichText)
        self.message_box = box
        box.open()
