"""Parts of the "Checked images" view: the holder of the images checked against the analysis,
and the chooser of the folders and files to check.

:class:`CheckedImages` holds what core computed (:class:`~modescope.core.review.check.CheckResult`)
for the analysis it was checked against, and scores it again at the state's rank and level
(no file is read again: the weights along every mode and the residual outside all of them are
kept). The views that draw the checked images (the table, the weights plane, the Q-against-T²
plot) read it and listen to its ``changed`` signal; none of them writes to another.
"""

from __future__ import annotations

import os

import numpy as np

from PySide6.QtCore import QObject, Signal
from PySide6.QtWidgets import (QDialog, QDialogButtonBox, QFileDialog, QHBoxLayout, QLabel,
                               QListWidget, QPushButton, QVBoxLayout, QWidget)

from modescope.core.decomposition import Decomposition
from modescope.core.review.check import CheckResult
from modescope.core.review.outliers import score_new

__all__ = ["CheckedImages", "CheckSourcesDialog"]


class CheckedImages(QObject):
    """The images checked against the current analysis, scored at the state's rank and level.

    Signals
    -------
    changed(object)
        The CheckResult now shown (None when there is none).
    selectedChanged(int)
        The checked image selected (0-based in the order checked; -1 for none).
    """

    changed = Signal(object)
    selectedChanged = Signal(int)

    def __init__(self, parent: QObject | None = None):
        super().__init__(parent)
        self._result: CheckResult | None = None
        self._model: Decomposition | None = None
        self._selected = -1

    @property
    def result(self) -> CheckResult | None:
        """The checked images as last scored, or None."""
        return self._result

    @property
    def model(self) -> Decomposition | None:
        """The analysis the images were checked against."""
        return self._model

    @property
    def selected(self) -> int:
        """The selected checked image (0-based), -1 for none."""
        return self._selected

    def set_result(self, model: Decomposition, result: CheckResult) -> None:
        """Show ``result``, the images checked against ``model``."""
        if not isinstance(model, Decomposition) or not isinstance(result, CheckResult):
            raise TypeError("set_result needs a Decomposition and a CheckResult, got "
                            f"{type(model).__name__} and {type(result).__name__}")
        self._model, self._result = model, result
        self.changed.emit(result)
        # the most unusual image first, as the table lists them
        self.set_selected(int(np.argmax(result.table.score)) if result.n_images else -1)

    def clear(self) -> None:
        """Forget the checked images."""
        if self._result is None and self._model is None:
            return
        self._model, self._result = None, None
        self.changed.emit(None)
        self.set_selected(-1)

    def set_selected(self, index: int) -> None:
        """Select checked image ``index`` (-1 for none); emits only on change."""
        n = 0 if self._result is None else self._result.n_images
        index = int(index) if 0 <= int(index) < n else -1
        if index != self._selected:
            self._selected = index
            self.selectedChanged.emit(index)

    def follow(self, decomposition: Decomposition | None, rank: int, level: float) -> None:
        """Keep the checked images in step with the state: forget them for another analysis,
        score them again at a new rank or level (marks alone do not change the model)."""
        r = self._result
        if r is None:
            return
        same = (decomposition is not None and self._model is not None
                and decomposition.basis is self._model.basis
                and decomposition.n_images == self._model.n_images)
        if not same:
            self.clear()
            return
        if not 0 <= rank <= decomposition.rank or (r.rank == rank and r.level == level):
            return
        table = score_new(decomposition, r.weights, r.residual, rank=rank, level=level)
        self._result = CheckResult(table=table, weights=r.weights, residual=r.residual,
                                   paths=r.paths, pages=r.pages, problems=r.problems,
                                   cancelled=r.cancelled)
        self.changed.emit(self._result)


class CheckSourcesDialog(QDialog):
    """Choose the folders and image files to check against the analysis.

    Parameters
    ----------
    parent : QWidget, optional
    start_dir : str
        Where the file dialogs open.
    """

    def __init__(self, parent: QWidget | None = None, start_dir: str = ""):
        super().__init__(parent)
        self.setWindowTitle("Check new images against this analysis")
        self._dir = start_dir or os.path.expanduser("~")
        self.list = QListWidget(self)
        self.list.setToolTip("The folders and files whose images will be checked")
        add_folder = QPushButton("Add folder…", self)
        add_folder.setToolTip("Add a folder of new images")
        add_folder.clicked.connect(self._choose_folder)
        add_files = QPushButton("Add files…", self)
        add_files.setToolTip("Add new image files")
        add_files.clicked.connect(self._choose_files)
        remove = QPushButton("Remove", self)
        remove.setToolTip("Take the selected entry off the list")
        remove.clicked.connect(lambda: self.list.takeItem(self.list.currentRow()))
        self.buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Ok
                                        | QDialogButtonBox.StandardButton.Cancel, self)
        self.buttons.button(QDialogButtonBox.StandardButton.Ok).setText("Check")
        self.buttons.accepted.connect(self.accept)
        self.buttons.rejected.connect(self.reject)
        row = QHBoxLayout()
        for b in (add_folder, add_files, remove):
            row.addWidget(b)
        row.addStretch(1)
        layout = QVBoxLayout(self)
        layout.addWidget(QLabel("The images are read with the analysis' own colour, size and "
                                "downscale; the analysis is not changed.", self))
        layout.addWidget(self.list)
        layout.addLayout(row)
        layout.addWidget(self.buttons)

    def add_sources(self, paths) -> None:
        """Add folders or files to the list (each once)."""
        present = set(self.sources())
        for p in paths:
            p = os.path.abspath(os.fspath(p))
            if p not in present:
                self.list.addItem(p)
                present.add(p)

    def sources(self) -> list[str]:
        """Return the folders and files listed."""
        return [self.list.item(i).text() for i in range(self.list.count())]

    def _choose_folder(self) -> None:
        folder = QFileDialog.getExistingDirectory(self, "Add a folder of new images", self._dir)
        if folder:
            self._dir = folder
            self.add_sources([folder])

    def _choose_files(self) -> None:
        files, _ = QFileDialog.getOpenFileNames(
            self, "Add new image files", self._dir,
            "Images (*.png *.jpg *.jpeg *.tif *.tiff *.bmp *.webp);;All files (*)")
        if files:
            self._dir = os.path.dirname(files[0])
            self.add_sources(files)
