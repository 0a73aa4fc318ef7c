"""Outliers: every image's Q and T² against their control limits, and the review marks.

* A table of every image sorted by score (``max(Q / Q limit, T² / T² limit)``), with Q, T², the
  limits in the column titles, which limit an image is beyond, and its review mark. It is a
  :class:`OutlierTableModel` (sorted with numpy, no per-row widgets) behind a filter proxy
  (all / flagged / excluded / not reviewed), so 10,000 rows scroll smoothly.
* Q against T² (log axes by default) with both limits drawn as labelled lines; a click on a point
  selects that image.
* A confidence-level spin box (``state.set_level``, default 99 %); the scores use ``state.rank``
  and are recomputed, merged into one redraw per ``REDRAW_MS``, when the rank, the level or the
  analysis changes. A snapshot during a run has no residuals: a note says the scores appear when
  the analysis finishes.
* Review: mark the selected image(s) keep (K), exclude (X) or not reviewed (U) through
  ``state.set_marks``; refit without the excluded images (:attr:`OutlierView.refitRequested`);
  export the excluded or flagged images as CSV or as a list of paths. Source images are never
  moved, changed or deleted.
* A new analysis opens at the top of the ranked list: when the scores of an analysis not scored
  before appear, the table scrolls to its first row (the highest score), whatever image is
  selected. :meth:`OutlierView.select_worst` selects that image; the main window calls it when
  a run finishes and the user has not picked an image during the run (a pick made during the
  run is kept: it stays selected, highlighted where it falls in the list).

Every number comes from :func:`modescope.core.review.outliers.score_table` and
:mod:`modescope.core.review.marks`. Images are numbered from 1 for display; ``state.selected`` stays
0-based. The parts live beside this module: ``outliers_model`` (table model and filter),
``outliers_table`` (the table widget), ``outliers_plot`` (Q against T²) and ``outliers_review``
(review actions, refit, list exports); this module assembles them and wires them to the state.
"""

from __future__ import annotations

import numpy as np
from PySide6.QtCore import QSignalBlocker, Qt, Signal, Slot
from PySide6.QtGui import QAction, QFont
from PySide6.QtWidgets import (QCheckBox, QComboBox, QDoubleSpinBox, QHBoxLayout, QLabel, QMenu,
                               QSizePolicy, QSplitter, QStackedWidget, QToolButton, QVBoxLayout,
                               QWidget)

from modescope.core.review import marks as review
from modescope.core.review.outliers import OutlierTable, score_table

from modescope.app.desktop.redraw import ThrottledRedraw
from modescope.app.desktop.state import AppState
from modescope.app.desktop.views.outliers_model import (FILTERS, N_COLUMNS, OutlierFilterProxy,
                                                        OutlierTableModel, describe_limits)
from modescope.app.desktop.views.outliers_plot import OutlierPlot
from modescope.app.desktop.views.outliers_table import OutlierTableView
from modescope.app.desktop.views.outliers_review import ReviewActions, stored_options_of

__all__ = ["OutlierView", "OutlierTableModel", "OutlierFilterProxy", "OutlierPlot", "FILTERS",
           "stored_options_of", "WAITING_TEXT", "CAUTION_TEXT"]

WAITING_TEXT = ("Outlier scores appear when the analysis finishes (they need every image's "
                "residual, which the final scoring pass computes).")
CAUTION_TEXT = ("Flags are a screening aid for a person to review, not a verdict about an "
                "image.")


def _cut_long_text(label: QLabel) -> None:
    """Let a long text be cut rather than widen the dock (the tooltip has it whole)."""
    label.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Preferred)
    label.setMinimumWidth(40)


class OutlierView(ReviewActions, ThrottledRedraw, QWidget):
    """Outlier table, Q against T² plot, confidence level and review actions.

    Parameters
    ----------
    state : AppState
        Reads the decomposition, rank, level, selection and marks; writes the level, the
        selection and the marks.
    parent : QWidget, optional

    Signals
    -------
    refitRequested(object, object)
        ``(images, options)``: the images not marked excluded as ``(path, page)`` pairs in
        column order, and the :class:`~modescope.app.desktop.settings.StoredOptions` of the
        analysis, for the main window to start a new analysis of them.

    Attributes
    ----------
    scores : OutlierTable or None
        The scores shown (``score_table(state.decomposition, state.rank, state.level)``).
    model, proxy, table
        The table of images.
    plot_widget : OutlierPlot
        Q against T²; ``plot``, ``scatter``, ``sel_mark``, ``set_marks_item``, ``q_line`` and
        ``t2_line`` are its parts (see :class:`OutlierPlot`).
    keep_action, exclude_action, clear_action, refit_action : QAction
    export_actions : dict
        ``(which, kind) -> QAction`` for which in {"excluded", "flagged"} and kind in
        {"csv", "paths"}.
    """

    refitRequested = Signal(object, object)

    def __init__(self, state: AppState, parent: QWidget | None = None):
        super().__init__(parent)
        if not isinstance(state, AppState):
            raise TypeError(f"state must be an AppState, got {type(state).__name__}")
        self.state = state
        self.scores: OutlierTable | None = None
        self._syncing = False
        self._shown: set[int] = set()
        self._split_set = False     # True once sized (or moved by the user)
        self._scored_for = None     # the analysis whose scores were last shown
        self._init_review()

        self._build_actions()
        top = self._build_controls()
        self._build_notes()
        self._build_table()
        self._build_plot()
        buttons = self._build_review_buttons()
        self._build_layout(top, buttons)
        self._init_redraw_timer()
        self._wire()
        self._redraw()

    # ----- construction ------------------------------------------------------------------------
    def _build_controls(self) -> QHBoxLayout:
        """The level, the table filter, the log-axes switch and the summaries above them."""
        self.level_spin = QDoubleSpinBox(self)
        self.level_spin.setRange(50.0, 99.99)
        self.level_spin.setDecimals(2)
        self.level_spin.setSingleStep(0.5)
        self.level_spin.setSuffix(" %")
        self.level_spin.setKeyboardTracking(False)
        self.level_spin.setValue(100.0 * self.state.level)
        self.level_spin.setToolTip(
            "Confidence level of the Q and T² limits: about (100 - level) % of ordinary images "
            "lie beyond each limit by chance (99 % = about 1 in 100).")
        self.filter_combo = QComboBox(self)
        for key, label in FILTERS:
            self.filter_combo.addItem(label, key)
        self.filter_combo.setToolTip("Which images the table shows.")
        self.log_axes = QCheckBox("log axes", self)
        self.log_axes.setChecked(True)
        self.log_axes.setToolTip("Draw Q and T² on logarithmic axes (values of 0 are drawn at "
                                 "the bottom or left edge).")
        self.summary = QLabel("", self)
        _cut_long_text(self.summary)
        self.marks_label = QLabel("", self)
        self.marks_label.setStyleSheet("color: #444;")
        top = QHBoxLayout()
        top.addWidget(QLabel("Level:", self))
        top.addWidget(self.level_spin)
        top.addSpacing(10)
        top.addWidget(QLabel("Show:", self))
        top.addWidget(self.filter_combo)
        top.addSpacing(10)
        top.addWidget(self.summary, 1)
        top.addWidget(self.marks_label)
        return top

    def _build_notes(self) -> None:
        """The limits line above the plot, the note on the limits and the caution."""
        self.limits_label = QLabel("", self)
        self.limits_label.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        _cut_long_text(self.limits_label)
        self.note_label = QLabel("", self)
        self.note_label.setWordWrap(True)
        self.note_label.setStyleSheet("color: #8a4b00;")
        self.note_label.hide()
        self.caution = QLabel(CAUTION_TEXT, self)
        font = QFont(self.caution.font())
        font.setItalic(True)
        self.caution.setFont(font)
        self.caution.setStyleSheet("color: #555;")

    def _build_table(self) -> None:
        """The table of images behind its filter, sorted by score."""
        self.model = OutlierTableModel(self)
        self.proxy = OutlierFilterProxy(self)
        self.table = OutlierTableView(self.model, self.proxy, self)

    def _build_plot(self) -> None:
        """Q against T² (its parts are kept as attributes of the view too)."""
        self.plot_widget = OutlierPlot(self, names=self.model.name)
        self.plot = self.plot_widget.plot_item
        self.scatter = self.plot_widget.scatter
        self.sel_mark = self.plot_widget.sel_mark
        self.set_marks_item = self.plot_widget.set_marks_item
        self.q_line = self.plot_widget.q_line
        self.t2_line = self.plot_widget.t2_line

    def _build_review_buttons(self) -> QHBoxLayout:
        """Mark, refit and export buttons under the table (they show the review actions)."""
        def button(action: QAction) -> QToolButton:
            b = QToolButton(self)
            b.setDefaultAction(action)
            b.setToolButtonStyle(Qt.ToolButtonStyle.ToolButtonTextOnly)
            return b

        self.keep_button = button(self.keep_action)
        self.exclude_button = button(self.exclude_action)
        self.clear_button = button(self.clear_action)
        self.refit_button = button(self.refit_action)
        self.export_menu = QMenu(self)
        self.export_menu.addActions(list(self.export_actions.values()))
        self.export_button = QToolButton(self)
        self.export_button.setText("Export list")
        self.export_button.setToolTip("Write the excluded or flagged images to a CSV file or a "
                                      "plain list of paths.")
        self.export_button.setMenu(self.export_menu)
        self.export_button.setPopupMode(QToolButton.ToolButtonPopupMode.InstantPopup)
        buttons = QHBoxLayout()
        buttons.addWidget(QLabel("Mark:", self))
        for b in (self.keep_button, self.exclude_button, self.clear_button):
            buttons.addWidget(b)
        buttons.addStretch(1)
        buttons.addWidget(self.refit_button)
        buttons.addWidget(self.export_button)
        return buttons

    def _build_layout(self, top: QHBoxLayout, buttons: QHBoxLayout) -> None:
        """Table and buttons left, plot right, in a splitter; a waiting page in front."""
        left = QWidget(self)
        left_lay = QVBoxLayout(left)
        left_lay.setContentsMargins(0, 0, 0, 0)
        left_lay.addWidget(self.table, 1)
        left_lay.addLayout(buttons)
        right = QWidget(self)
        right_lay = QVBoxLayout(right)
        right_lay.setContentsMargins(0, 0, 0, 0)
        plot_top = QHBoxLayout()
        plot_top.addWidget(self.limits_label, 1)
        plot_top.addWidget(self.log_axes)
        right_lay.addLayout(plot_top)
        right_lay.addWidget(self.plot_widget, 1)
        self.splitter = QSplitter(Qt.Orientation.Horizontal, self)
        self.splitter.addWidget(left)
        self.splitter.addWidget(right)
        self.splitter.setStretchFactor(0, 3)
        self.splitter.setStretchFactor(1, 2)
        self.splitter.setChildrenCollapsible(False)

        content = QWidget(self)
        c_lay = QVBoxLayout(content)
        c_lay.setContentsMargins(0, 0, 0, 0)
        c_lay.addLayout(top)
        c_lay.addWidget(self.splitter, 1)
        c_lay.addWidget(self.note_label)
        c_lay.addWidget(self.caution)
        self.content = content

        self.waiting_label = QLabel(WAITING_TEXT, self)
        self.waiting_label.setWordWrap(True)
        self.waiting_label.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.waiting_label.setMargin(16)
        self.stack = QStackedWidget(self)
        self.stack.addWidget(self.waiting_label)
        self.stack.addWidget(content)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        lay.addWidget(self.stack)

    def _wire(self) -> None:
        """Every connection of the view, in one place."""
        s = self.state
        s.decompositionChanged.connect(self._schedule)
        s.rankChanged.connect(self._schedule)
        s.levelChanged.connect(self._on_level)
        s.marksChanged.connect(self._on_marks)
        s.selectedChanged.connect(self._on_state_selected)
        s.selectionSetChanged.connect(self._on_state_selection_set)
        self.level_spin.valueChanged.connect(self._on_level_spin)
        self.filter_combo.currentIndexChanged.connect(self._on_filter)
        self.log_axes.toggled.connect(self.plot_widget.set_log)
        sm = self.table.selectionModel()
        sm.selectionChanged.connect(self._on_view_selection)
        sm.currentRowChanged.connect(self._on_view_selection)
        self.plot_widget.imageClicked.connect(self.state.set_selected)
        self.splitter.splitterMoved.connect(self._on_splitter_moved)
        self._wire_actions()

    def resizeEvent(self, event) -> None:  # noqa: N802 - Qt name
        super().resizeEvent(event)
        width = self.width() - 8 - self.splitter.handleWidth()   # less the margins
        if not self._split_set and width > 200:
            # table and plot share the width 60:40 until the user moves the divider
            self.splitter.setSizes([int(width * 0.6), width - int(width * 0.6)])

    @Slot(int, int)
    def _on_splitter_moved(self, *_):
        self._split_set = True

    # ----- helpers -----------------------------------------------------------------------------
    def proxy_row(self, image: int) -> int:
        """Return the shown row of image ``image`` (-1 when filtered out or absent)."""
        return self.table.proxy_row(image)

    def image_at(self, proxy_row: int) -> int:
        """Return the image index shown in row ``proxy_row``."""
        return self.table.image_at(proxy_row)

    def shown_images(self) -> np.ndarray:
        """Return the image indices of the rows shown, top to bottom."""
        return self.table.shown_images()

    def plot_values(self) -> tuple[np.ndarray, np.ndarray]:
        """Return (T², Q) of the plotted points, in image order, in data units (not log)."""
        return self.plot_widget.plot_values()

    def limit_positions(self) -> tuple[float, float]:
        """Return (T² limit, Q limit) where the lines are drawn, in data units (not log)."""
        return self.plot_widget.limit_positions()

    def select_worst(self) -> int:
        """Show the top of the ranked list and select the image with the highest score.

        Pending scores are computed first. The selection goes to the state
        (``state.set_selected``), so every view follows.

        Returns
        -------
        int
            The image selected (0-based), or -1 when there are no scores (no analysis, or a
            partial one) and nothing was changed.
        """
        self.flush()
        if not self._ready() or self.scores.n_images == 0:
            return -1
        worst = int(self.scores.order[0])
        self.state.set_selection_set(())
        self.state.set_selected(worst)
        self.table.show_top()
        return worst

    def _ready(self) -> bool:
        d = self.state.decomposition
        return self.scores is not None and d is not None and d.n_images == self.scores.n_images

    def _targets(self) -> list[int]:
        """The images a mark applies to: the picked set when the selected image is in it."""
        chosen = self.state.selection_set
        cur = self.state.selected
        if len(chosen) > 1 and (cur in chosen or cur < 0):
            return list(chosen)
        return [cur] if cur >= 0 else []

    # ----- state -> view -----------------------------------------------------------------------
    def flush(self) -> None:
        """Recompute now if a recomputation is pending (tests, screenshots)."""
        if self._timer.isActive():
            self._timer.stop()
            self._redraw()

    @Slot()
    def _redraw(self) -> None:
        self._timed_redraw(self._recompute)

    def _show_waiting(self, text: str) -> None:
        self.scores = None
        self._syncing = True
        try:
            self.model.set_scores(None, None)
            self.proxy.refilter()
        finally:
            self._syncing = False
        self.waiting_label.setText(text)
        self.stack.setCurrentWidget(self.waiting_label)
        self.plot_widget.show_scores(None, self.model.marks)
        self._update_actions()

    def _recompute(self) -> None:
        d = self.state.decomposition
        if d is None:
            self._show_waiting("No analysis yet. " + WAITING_TEXT)
            return
        if d.residual is None:
            self._show_waiting(WAITING_TEXT)
            return
        try:
            table = score_table(d, min(max(self.state.rank, 0), d.rank), self.state.level)
        except (TypeError, ValueError) as exc:
            self._show_waiting(f"No outlier scores for this analysis: {exc}")
            return
        self.scores = table
        fresh, self._scored_for = d is not self._scored_for, d
        self._syncing = True
        try:
            self.model.set_scores(d, table)
            self.proxy.refilter()
            self._apply_state_selection()
        finally:
            self._syncing = False
        self.stack.setCurrentWidget(self.content)
        if fresh:
            self.table.show_top()       # a new analysis opens at the highest score
        self._update_labels()
        self._update_plot_selection()
        self.plot_widget.show_scores(table, self.model.marks)
        self._update_actions()

    def _update_labels(self) -> None:
        t = self.scores
        d = self.state.decomposition
        if t is None or d is None:
            return
        lim = t.limits
        self.summary.setText(f"{t.n_images:,} images · {t.n_flagged:,} flagged at rank "
                             f"{t.rank} ({100 * lim.level:g} % level)")
        self.summary.setToolTip(self.summary.text())
        text, tip = describe_limits(lim)
        self.limits_label.setText(text)
        self.limits_label.setToolTip(f"{text}\n\n{tip}")
        self.note_label.setText(f"Note: {lim.note}." if lim.note else "")
        self.note_label.setVisible(bool(lim.note))
        self.model.headerDataChanged.emit(Qt.Orientation.Horizontal, 0, N_COLUMNS - 1)
        self._update_marks_label()

    def _update_marks_label(self) -> None:
        d = self.state.decomposition
        if d is None or not self._ready():
            self.marks_label.setText("")
            return
        marks = np.asarray(d.marks)
        n_ex = int(np.count_nonzero(marks == review.EXCLUDE))
        n_keep = int(np.count_nonzero(marks == review.KEEP))
        n_open = int(np.count_nonzero(marks == review.NOT_REVIEWED))
        self.marks_label.setText(f"{n_ex} excluded, {n_keep} kept, {n_open} not reviewed")
        self.marks_label.setToolTip(self.marks_label.text())

    def _update_plot_selection(self) -> None:
        self.plot_widget.show_selection(self.state.selected, self.state.selection_set)

    @Slot(float)
    def _on_level(self, level: float) -> None:
        with QSignalBlocker(self.level_spin):
            self.level_spin.setValue(100.0 * level)
        self._schedule()

    @Slot(object)
    def _on_marks(self, _changed) -> None:
        d = self.state.decomposition
        if d is None or not self._ready():
            return
        self._syncing = True
        try:
            self.model.set_marks(d)
            if self.proxy.mode in ("excluded", "not reviewed"):
                self.proxy.refilter()
            self._apply_state_selection()
        finally:
            self._syncing = False
        self.plot_widget.set_marks(self.model.marks)
        self._update_marks_label()
        self._update_actions()

    @Slot(int)
    def _on_state_selected(self, index: int) -> None:
        if self._syncing:
            return
        self._syncing = True
        try:
            chosen = self.state.selection_set
            if len(chosen) > 1 and index in chosen and self._shown == set(chosen):
                self.table.move_current(index)
            else:
                self._apply_state_selection()
        finally:
            self._syncing = False
        self._update_plot_selection()

    @Slot(object)
    def _on_state_selection_set(self, _indices) -> None:
        if self._syncing:
            return
        self._syncing = True
        try:
            self._apply_state_selection()
        finally:
            self._syncing = False
        self._update_plot_selection()

    def _apply_state_selection(self) -> None:
        """Make the table show state.selected (current row) and state.selection_set."""
        rows = set(self.state.selection_set)
        cur = self.state.selected
        if cur >= 0:
            rows.add(cur)
        self._shown = rows
        self.table.select_images(rows, cur)

    # ----- view -> state -----------------------------------------------------------------------
    @Slot(float)
    def _on_level_spin(self, value: float) -> None:
        self.state.set_level(round(float(value), 4) / 100.0)

    @Slot(int)
    def _on_filter(self, _index: int) -> None:
        self._syncing = True
        try:
            self.proxy.set_mode(str(self.filter_combo.currentData()))
            self._apply_state_selection()
        finally:
            self._syncing = False

    @Slot()
    def _on_view_selection(self, *_) -> None:
        if self._syncing:
            return
        images, cur = self.table.selected_images()
        self._syncing = True
        try:
            self.state.select_from_view(images, cur)
        finally:
            self._syncing = False
        self._update_plot_selection()
