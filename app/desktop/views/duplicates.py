"""Near-duplicates: groups of images in which every pair is within the tolerance.

The user sets a tolerance (a fraction of the RMS centred image norm, default 0.01) and presses Find;
:func:`modescope.core.review.duplicates.find_duplicates` runs off the GUI thread and the groups are
listed in a tree (group -> images; a group shows its size and its largest distance), and the
current group is shown under it as thumbnails side by side, each with its difference from the
group's first image (:mod:`.duplicate_strip`). Clicking an image selects it everywhere; clicking a group (or "Select group") picks all its images
(``state.set_selection_set``). "Exclude all but first" marks every image of each group except the
first as excluded (after a confirmation), to trim redundant data from the next analysis.

Pairs are confirmed by an upper bound of their pixel distance or, when the bounds cannot decide,
on the images as the analysis read them (``load_image``); pairs that cannot be read are left out.
Images are numbered from 1 for display; ``state.selected`` stays 0-based.
"""

from __future__ import annotations


import numpy as np
from PySide6.QtCore import Qt, Signal, Slot
from PySide6.QtGui import QAction, QColor
from PySide6.QtWidgets import (QAbstractItemView, QDoubleSpinBox, QHBoxLayout, QHeaderView,
                               QLabel, QMessageBox, QPushButton, QToolButton, QTreeWidget,
                               QTreeWidgetItem, QVBoxLayout, QWidget)

from modescope.core.review import marks as review
from modescope.core.review.duplicates import DEFAULT_TOLERANCE, DuplicateReport, find_duplicates

from modescope.app.words import counted
from modescope.app.desktop.display import display_name
from modescope.app.desktop.state import AppState
from modescope.app.desktop.views.duplicate_strip import GroupStrip
from modescope.app.desktop.workers.background import BackgroundRunner, plain_message

__all__ = ["DuplicatesView", "DEFAULT_TOLERANCE", "SEARCH_RANK"]

#: Leading modes used by the tree search for candidate pairs (every mode confirms them; see
#: :func:`~modescope.core.review.duplicates.find_duplicates`). A few modes keep the k-d tree fast:
#: measured here, 10,000 images with 50 modes took 0.43 s with all modes and 0.10 s with 10.
SEARCH_RANK = 10

KIND_ROLE = Qt.ItemDataRole.UserRole + 1    # ("group", g) or ("image", i)
#: The mark column's words: core's names of the marks, blank for an image not reviewed.
_MARK_TEXT = {**review.MARK_NAMES, review.NOT_REVIEWED: ""}
_KEEP_FG = QColor(30, 120, 60)
_EXCLUDE_FG = QColor(190, 40, 40)

TOLERANCE_TIP = (
    "Tolerance, as a fraction of the RMS image norm (the root-mean-square length of the "
    "centred images): a group holds images whose pixel distance, for every pair, is at most "
    "this fraction of it. 0.01 = 1 % (the closest ordinary neighbouring frames of the sample "
    "set are 3.5 % apart); 0 finds exact copies only.")
CANDIDATE_NOTE = ("Every pair in a group is within the tolerance, measured on the images or by "
                  "an upper bound; pairs whose images could not be read are left out.")


def _default_loader(decomposition, index: int) -> np.ndarray:
    from modescope.core.engine import pipeline

    return pipeline.load_analysis_image(decomposition, index)


def _search_and_group(decomposition, tolerance: float, rank: int, load) -> DuplicateReport:
    """The work done off the GUI thread (only core, no Qt)."""
    return find_duplicates(decomposition, tolerance, rank,
                           read_image=lambda i: load(decomposition, i))


_TASK = "The near-duplicate search"


def _describe_error(exc: BaseException) -> str:
    if isinstance(exc, MemoryError):
        return "Near-duplicates could not be found: there is not enough memory."
    return f"Near-duplicates could not be found: {plain_message(exc, _TASK)}"


class DuplicatesView(QWidget):
    """Tolerance, Find, the tree of near-duplicate groups and the trimming action.

    Parameters
    ----------
    state : AppState
        Reads the decomposition, selection and marks; writes the selection and the marks.
    parent : QWidget, optional
    load_image : callable(decomposition, index) -> ndarray, optional
        The image as the analysis read it (default: decoded again from its source file); used
        to measure pairs the bounds cannot decide and for a thumbnail whose file cannot be read.

    Signals
    -------
    reportReady(object)
        The :class:`~modescope.core.review.duplicates.DuplicateReport` of the last Find.

    Attributes
    ----------
    report : DuplicateReport or None
        Groups of the current analysis (None before Find, or after the analysis changed).
    tolerance_spin : QDoubleSpinBox
    tree : QTreeWidget
        One top-level item per group, one child per image.
    strip : GroupStrip
        The current group's thumbnails side by side.
    find_action, select_group_action, exclude_action : QAction
    """

    reportReady = Signal(object)

    def __init__(self, state: AppState, parent: QWidget | None = None, load_image=None):
        super().__init__(parent)
        self._load_image = load_image or _default_loader
        if not isinstance(state, AppState):
            raise TypeError(f"state must be an AppState, got {type(state).__name__}")
        self.state = state
        self.report: DuplicateReport | None = None
        self.message_box: QMessageBox | None = None
        self._syncing = False
        self._search = BackgroundRunner(self, threads=1, task=_TASK,
                                        describe_error=_describe_error)
        self._job_decomposition = None      # what the running search looks at
        self._items: dict[int, QTreeWidgetItem] = {}

        # ----- actions ---------------------------------------------------------------------
        self.find_action = QAction("Find near-duplicates", self)
        self.find_action.setToolTip("Look for groups of near-duplicate images at the tolerance "
                                    "set")
        self.find_action.triggered.connect(self.find)
        self.select_group_action = QAction("Select group", self)
        self.select_group_action.setToolTip("Pick every image of the current group (the other "
                                            "views show them)")
        self.select_group_action.triggered.connect(self.select_current_group)
        self.exclude_action = QAction("Exclude all but first…", self)
        self.exclude_action.setToolTip("Mark every image of each group except the first as "
                                       "excluded from the next analysis (the files are not "
                                       "touched)")
        self.exclude_action.triggered.connect(self.exclude_all_but_first)
        for a in (self.find_action, self.select_group_action, self.exclude_action):
            a.setStatusTip(a.toolTip())

        # ----- widgets ---------------------------------------------------------------------
        self.tolerance_spin = QDoubleSpinBox(self)
        self.tolerance_spin.setRange(0.0, 1.0)
        self.tolerance_spin.setDecimals(3)
        self.tolerance_spin.setSingleStep(0.005)
        self.tolerance_spin.setValue(DEFAULT_TOLERANCE)
        self.tolerance_spin.setToolTip(TOLERANCE_TIP)
        tol_label = QLabel("Tolerance:", self)
        tol_label.setToolTip(TOLERANCE_TIP)
        self.find_button = QPushButton("Find", self)
        self.find_button.setToolTip(self.find_action.toolTip())
        self.find_button.clicked.connect(self.find)
        top = QHBoxLayout()
        top.addWidget(tol_label)
        top.addWidget(self.tolerance_spin)
        top.addWidget(self.find_button)
        top.addStretch(1)

        self.status = QLabel("", self)
        self.status.setWordWrap(True)
        self.tree = QTreeWidget(self)
        self.tree.setColumnCount(2)
        self.tree.setHeaderLabels(["group / image", "mark"])
        self.tree.headerItem().setToolTip(0, "Each group: its number of images and the largest "
                                             "distance between two of them, as a percentage "
                                             "of the RMS image norm. Under it, its images.")
        self.tree.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.tree.setUniformRowHeights(True)
        self.tree.setAlternatingRowColors(True)
        self.tree.setTextElideMode(Qt.TextElideMode.ElideLeft)
        hh = self.tree.header()
        hh.setStretchLastSection(False)
        hh.setSectionResizeMode(0, QHeaderView.ResizeMode.Stretch)
        hh.setSectionResizeMode(1, QHeaderView.ResizeMode.Interactive)
        hh.resizeSection(1, self.tree.fontMetrics().horizontalAdvance("exclude") + 12)
        self.tree.setIndentation(14)
        self.tree.setToolTip("Click an image to select it; click a group to pick all its "
                             "images.")

        self.select_group_button = QToolButton(self)
        self.select_group_button.setDefaultAction(self.select_group_action)
        self.exclude_button = QToolButton(self)
        self.exclude_button.setDefaultAction(self.exclude_action)
        bottom = QHBoxLayout()
        bottom.addWidget(self.select_group_button)
        bottom.addWidget(self.exclude_button)
        bottom.addStretch(1)
        self.note = QLabel(CANDIDATE_NOTE, self)
        self.note.setWordWrap(True)
        self.note.setStyleSheet("color: #555;")

        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        lay.addLayout(top)
        lay.addWidget(self.status)
        lay.addWidget(self.tree, 1)
        self.strip = GroupStrip(self._load_image, self)
        lay.addWidget(self.strip)
        lay.addLayout(bottom)
        lay.addWidget(self.note)

        # all connections in one place
        self._search.finished.connect(self._on_search_done)
        self._search.failed.connect(self._on_search_failed)
        state.decompositionChanged.connect(self._on_decomposition)
        state.marksChanged.connect(self._on_marks)
        state.selectedChanged.connect(self._on_state_selected)
        self.tree.currentItemChanged.connect(self._on_current_item)
        self.tree.itemClicked.connect(self._on_item_clicked)

        self._on_decomposition(state.decomposition)

    # ----- lifetime ----------------------------------------------------------------------------
    def is_running(self) -> bool:
        """True while a search is under way."""
        return self._search.is_running()

    def shutdown(self, timeout_ms: int = 5000) -> bool:
        """Drop a running search's result and wait for it at most ``timeout_ms``.

        Returns
        -------
        bool
            True when no search is left running.
        """
        self._search.abandon()
        self._job_decomposition = None
        self.strip.shutdown(timeout_ms)
        return self._search.wait(timeout_ms)

    def closeEvent(self, event) -> None:  # noqa: N802 - Qt name
        self.shutdown()
        super().closeEvent(event)

    def review_actions(self) -> list:
        """Return the actions for a menu (None stands for a separator)."""
        return [self.find_action, self.select_group_action, self.exclude_action]

    # ----- helpers ---------------------------------------------------------------------------
    def _ready(self) -> bool:
        d = self.state.decomposition
        return d is not None and d.residual is not None and d.n_images >= 2

    def _update_actions(self) -> None:
        ready = self._ready()
        running = self.is_running()
        self.find_action.setEnabled(ready and not running)
        self.find_button.setEnabled(ready and not running)
        self.tolerance_spin.setEnabled(ready)
        has_groups = self.report is not None and bool(self.report.groups)
        self.exclude_action.setEnabled(has_groups and not running)
        self.select_group_action.setEnabled(has_groups and self.tree.currentItem() is not None)

    def _warn(self, title: str, text: str) -> None:
        if self.message_box is not None:
            self.message_box.close()
        box = QMessageBox(QMessageBox.Icon.Information, title, text,
                          QMessageBox.StandardButton.Ok, self)
        self.message_box = box
        box.open()

    def confirm(self, title: str, text: str) -> bool:
        """Ask a yes/no question (QMessageBox.question); True for yes."""
        answer = QMessageBox.question(self, title, text, QMessageBox.StandardButton.Yes
                                      | QMessageBox.StandardButton.Cancel,
                                      QMessageBox.StandardButton.Cancel)
        return answer == QMessageBox.StandardButton.Yes

    def group_of_item(self, item: QTreeWidgetItem | None) -> int:
        """Return the group number (0-based) of a tree item; -1 for none."""
        if item is None:
            return -1
        kind = item.data(0, KIND_ROLE)
        if not kind:
            return -1
        if kind[0] == "image":
            item = item.parent()
            kind = item.data(0, KIND_ROLE) if item is not None else None
        return int(kind[1]) if kind else -1

    # ----- search ----------------------------------------------------------------------------
    @Slot()
    def find(self) -> bool:
        """Start looking for near-duplicates at the tolerance shown (off the GUI thread).

        Returns
        -------
        bool
            False when there is nothing to search (no finished analysis) or a search is running.
        """
        if not self._ready() or self.is_running():
            return False
        d = self.state.decomposition
        tolerance = float(self.tolerance_spin.value())
        rank = min(SEARCH_RANK, d.rank)
        self._job_decomposition = d
        load = self._load_image
        self._search.start(lambda ctx: _search_and_group(d, tolerance, rank, load))
        self.status.setText(f"Looking for near-duplicates among {d.n_images:,} images…")
        self._update_actions()
        return True

    @Slot(str)
    def _on_search_failed(self, message: str) -> None:
        self._job_decomposition = None
        self.status.setText(message)
        self._update_actions()

    @Slot(object)
    def _on_search_done(self, report: DuplicateReport) -> None:
        d, self._job_decomposition = self._job_decomposition, None
        current = self.state.decomposition
        if current is None or d is None or current.weights is not d.weights:
            self._update_actions()       # the analysis changed meanwhile: drop the result
            return
        self.report = report
        self._fill_tree()
        self._update_actions()
        self.reportReady.emit(report)

    def _fill_tree(self) -> None:
        rep = self.report
        d = self.state.decomposition
        self._syncing = True
        try:
            self.tree.clear()
            self.strip.clear()
            self._items = {}
            if rep is None or d is None:
                return
            marks = np.asarray(d.marks)
            top = []
            for g, group in enumerate(rep.groups):
                share = f"{100.0 * group.max_distance_fraction:.2f} %"
                item = QTreeWidgetItem([f"{g + 1}. {group.size} images, up to {share}", ""])
                item.setData(0, KIND_ROLE, ("group", g))
                item.setToolTip(0, f"{group.size} images; largest distance between two of them "
                                   f"{group.max_distance:.4g} ({share} of the RMS image norm)")
                for i, path, page in zip(group.indices, group.paths, group.pages):
                    name = display_name(path) if path else f"image {i + 1}"
                    if page:
                        name = f"{name} [page {page + 1}]"
                    child = QTreeWidgetItem([f"{i + 1}  {name}", ""])
                    child.setData(0, KIND_ROLE, ("image", int(i)))
                    child.setToolTip(0, f"image {i + 1}: {path or '(no file recorded)'}")
                    self._set_mark_text(child, int(marks[i]))
                    item.addChild(child)
                    self._items[int(i)] = child
                top.append(item)
            self.tree.addTopLevelItems(top)
            for item in top:
                item.setExpanded(True)
            self._update_status()
            self._select_item_of(self.state.selected)
            if self.tree.currentItem() is None and rep.groups:
                self.strip.show_group(d, rep.groups[0], rep.rms_norm)
        finally:
            self._syncing = False

    def _update_status(self) -> None:
        rep = self.report
        if rep is None:
            return
        if not rep.groups:
            self.status.setText(f"No near-duplicates at tolerance {rep.tolerance:g} "
                                f"({100 * rep.tolerance:g} % of the RMS image norm).")
            return
        spare = sum(g.size - 1 for g in rep.groups)
        self.status.setText(
            f"{len(rep.groups):,} group(s) holding {rep.n_duplicates:,} images at tolerance "
            f"{rep.tolerance:g} ({100 * rep.tolerance:g} % of the RMS image norm); keeping one "
            f"per group would leave out {spare:,}.")

    @staticmethod
    def _set_mark_text(item: QTreeWidgetItem, mark: int) -> None:
        item.setText(1, _MARK_TEXT.get(mark, ""))
        if mark == review.KEEP:
            item.setForeground(1, _KEEP_FG)
        elif mark == review.EXCLUDE:
            item.setForeground(1, _EXCLUDE_FG)

    # ----- state -> view ---------------------------------------------------------------------
    @Slot(object)
    def _on_decomposition(self, d) -> None:
        searched = self._job_decomposition
        if searched is not None and (d is None or d.weights is not searched.weights):
            self._search.abandon()           # its groups would be of another analysis
            self._job_decomposition = None
        old = self.report
        self.report = None
        if old is not None or self.tree.topLevelItemCount():
            self._fill_tree()
        if d is None:
            self.status.setText("No analysis yet.")
        elif d.residual is None:
            self.status.setText("Near-duplicates can be looked for when the analysis finishes.")
        else:
            self.status.setText(f"{counted(d.n_images, 'image')}. Set a tolerance and press Find.")
        self._update_actions()

    @Slot(object)
    def _on_marks(self, changed) -> None:
        d = self.state.decomposition
        if d is None:
            return
        for i in changed:
            item = self._items.get(int(i))
            if item is not None:
                self._set_mark_text(item, int(d.marks[int(i)]))

    @Slot(int)
    def _on_state_selected(self, index: int) -> None:
        if self._syncing:
            return
        self._syncing = True
        try:
            self._select_item_of(index)
        finally:
            self._syncing = False
        self._update_actions()

    def _select_item_of(self, index: int) -> None:
        item = self._items.get(int(index))
        if item is None:
            current = self.tree.currentItem()
            kind = current.data(0, KIND_ROLE) if current is not None else None
            if kind and kind[0] == "image":
                self.tree.setCurrentItem(None)
            return
        self.tree.setCurrentItem(item)
        self.tree.scrollToItem(item)

    # ----- view -> state -----------------------------------------------------------------------
    def _apply_item(self, item: QTreeWidgetItem | None) -> None:
        if item is None or self.report is None:
            return
        kind = item.data(0, KIND_ROLE)
        if not kind:
            return
        self._syncing = True
        try:
            if kind[0] == "image":
                self.state.set_selected(int(kind[1]))
            else:
                self.state.set_selection_set(self.report.groups[int(kind[1])].indices)
        finally:
            self._syncing = False

    def _show_strip(self, item) -> None:
        g = self.group_of_item(item)
        if g < 0 or self.report is None:
            self.strip.clear()
            return
        self.strip.show_group(self.state.decomposition, self.report.groups[g],
                              self.report.rms_norm)

    @Slot(object, object)
    def _on_current_item(self, current, _previous) -> None:
        if not self._syncing:
            self._apply_item(current)
        self._show_strip(current)
        self._update_actions()

    @Slot(object, int)
    def _on_item_clicked(self, item, _column) -> None:
        # a click on the item that is already current does not change it: apply it again
        if item is self.tree.currentItem():
            self._apply_item(item)

    @Slot()
    def select_current_group(self) -> tuple[int, ...]:
        """Pick every image of the current item's group (``state.set_selection_set``).

        Returns
        -------
        tuple of int
            The images picked; empty when no group is current.
        """
        g = self.group_of_item(self.tree.currentItem())
        if g < 0 or self.report is None:
            return ()
        indices = tuple(self.report.groups[g].indices)
        self.state.set_selection_set(indices)
        return indices

    def all_but_first(self) -> list[int]:
        """Return every image of each group except the first (lowest number), ascending."""
        if self.report is None:
            return []
        return sorted(i for g in self.report.groups for i in g.indices[1:])

    @Slot()
    def exclude_all_but_first(self) -> list[int]:
        """Ask, then mark every image of each group except the first as excluded.

        Returns
        -------
        list of int
            The images marked (empty when cancelled or when there is no group).
        """
        if self.report is None or not self.report.groups or self.state.decomposition is None:
            return []
        chosen = self.all_but_first()
        n_groups = len(self.report.groups)
        text = (f"Mark {len(chosen):,} images as excluded: every image of the {n_groups:,} "
                "group(s) except the first one?\n\nThey are left out when you refit "
                "(Review > Refit without excluded); the files are not moved or deleted, and "
                "the marks can be cleared again.")
        if not self.confirm("Exclude near-duplicates", text):
            return []
        self.state.set_marks(chosen, review.EXCLUDE)
        return chosen
