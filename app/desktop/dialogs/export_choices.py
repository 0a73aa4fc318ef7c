"""What the export dialog's controls say: the choices read from them, the live lines, the
enabled state and the message line.

:class:`ExportChoicesMixin` is one part of
:class:`~modescope.app.desktop.dialogs.export.ExportDialog`. The numbers on the live lines come
from the core (:func:`~modescope.core.output.metrics.compression_numbers`,
:func:`~modescope.core.output.naming.select_images`).
"""

from __future__ import annotations

import os

from PySide6.QtCore import QSignalBlocker

from modescope.core.decomposition import Decomposition
from modescope.core.errors import ModescopeError
from modescope.core.output.encode import FORMATS
from modescope.core.output.images import source_size
from modescope.core.output.metrics import compression_numbers
from modescope.core.output.naming import select_images

from modescope.app.desktop.display import display_text
from modescope.app.desktop.dialogs.export_form import MESSAGE_STYLE, PARTS, PER_IMAGE_PARTS

__all__ = ["ExportChoicesMixin"]


def _format_count(n: int) -> str:
    return f"{int(n):,}"


class ExportChoicesMixin:
    """Read and set the export dialog's choices and keep its controls in step (a part of
    ``ExportDialog``).

    Uses ``self.state``, the controls made by ``ExportFormMixin``, ``self.is_running()`` and
    ``self.worker``; caches the flagged images in ``self._flag_cache``.
    """

    # ----- reading the state -------------------------------------------------------------------
    @property
    def decomposition(self) -> Decomposition | None:
        """The analysis the dialog would export now."""
        return self.state.decomposition

    def selected_images(self) -> tuple[int, ...]:
        """Return the images "Selected images" stands for: the picked set, else the current one."""
        if self.state.selection_set:
            return tuple(self.state.selection_set)
        return (self.state.selected,) if self.state.selected >= 0 else ()

    def flagged_images(self) -> tuple[int, ...] | None:
        """Return the images flagged at the chosen rank and ``state.level`` (None: cannot tell).

        The flags are :func:`modescope.core.review.outliers.score_table`'s ``flag`` column
        (through :func:`modescope.core.output.naming.select_images`); a streaming snapshot has
        no residuals and cannot be scored.
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

    def images_choice(self) -> str:
        """Return "all", "selected" or "flagged"."""
        if self.images_selected.isChecked():
            return "selected"
        if self.images_flagged.isChecked():
            return "flagged"
        return "all"

    def folder(self) -> str:
        """Return the destination folder typed or chosen ("" when none)."""
        return self.folder_edit.text().strip()

    def set_folder(self, path) -> None:
        """Set the destination folder (kept for the rest of the session)."""
        self.folder_edit.setText(os.fspath(path) if path else "")

    def _upsample_size(self) -> tuple[int, int] | None:
        """The source size previews can be enlarged to: the analysis was downscaled and records
        the size (core's :func:`~modescope.core.output.images.source_size`); None otherwise."""
        d = self.decomposition
        if d is None:
            return None
        try:
            if int(d.metadata.get("downscale", 1)) <= 1:
                return None
            return source_size(d)
        except (TypeError, ValueError):
            return None

    def _upsample_possible(self) -> bool:
        return self._upsample_size() is not None

    # ----- the live lines ----------------------------------------------------------------------
    def resolution_text(self) -> str:
        """Return the line saying at which resolution previews are written."""
        d = self.decomposition
        if d is None:
            return ""
        rows, cols = int(d.image_shape[0]), int(d.image_shape[1])
        if "previews" not in self.chosen_parts():
            return f"No previews are written (the analysis resolution is {rows} × {cols} pixels)."
        if self.upsample_check.isEnabled() and self.upsample_check.isChecked():
            src = self._upsample_size()
            return (f"Previews are written at the source size, {int(src[0])} × {int(src[1])} "
                    f"pixels (enlarged from the analysis resolution, {rows} × {cols}).")
        text = f"Previews are written at the analysis resolution, {rows} × {cols} pixels"
        src = self._upsample_size()
        if src is not None:
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

    # ----- the enabled state -------------------------------------------------------------------
    def _update(self) -> None:
        d = self.decomposition
        idle = d is not None and d.rank >= 1 and not self.is_running()
        parts = self.chosen_parts()
        self._update_part_labels(d)
        self._update_options(idle, parts)
        self._update_images_choice(d, idle, parts)
        self._update_destination_and_buttons(idle, parts)

    def _update_part_labels(self, d: Decomposition | None) -> None:
        k = int(self.rank_spin.value())
        ext = FORMATS.get(self.image_format(), ".png")
        for name, _text, files in PARTS:
            label = files(k, ext)
            if name == "model" and self.float16_check.isChecked():
                label = f"model_r{k}_f16.npz"
            self._file_labels[name].setText(label)
        self.what_boxes["previews"].setText(f"Previews (rank-{k} reconstructions)")
        self.analysis_label.setText(self._describe_analysis(d))

    def _update_options(self, idle: bool, parts: tuple[str, ...]) -> None:
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

    def _update_images_choice(self, d: Decomposition | None, idle: bool,
                              parts: tuple[str, ...]) -> None:
        per_image = any(p in parts for p in PER_IMAGE_PARTS)
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
                f"Flagged as outliers ({len(flagged)} at {pct:g} %, rank "
                f"{int(self.rank_spin.value())})")
        self.images_all.setEnabled(idle and per_image)
        self.images_selected.setEnabled(idle and per_image and bool(selected))
        self.images_flagged.setEnabled(idle and per_image and flagged is not None)
        if (self.images_selected.isChecked() and not selected) or \
                (self.images_flagged.isChecked() and flagged is None):
            with QSignalBlocker(self.images_group):
                self.images_all.setChecked(True)

    def _update_destination_and_buttons(self, idle: bool, parts: tuple[str, ...]) -> None:
        running = self.is_running()
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

    # ----- the message line --------------------------------------------------------------------
    def _show_message(self, text: str, kind: str = "error") -> None:
        self.message_label.setStyleSheet(MESSAGE_STYLE[kind])
        self.message_label.setText(display_text(text))   # a file name may hold odd bytes
        self.message_label.setVisible(bool(text))
