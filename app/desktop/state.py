"""The one owner of the workbench's state.

Every view reads the current analysis, the selected image(s), the rank and the pair of modes from
:class:`AppState` and writes selections back to it, never to another view. Setters emit their
signal only when the value really changes, so a view that sets a value in response to the same
signal does not start a loop.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Iterable

import numpy as np
from PySide6.QtCore import QObject, Signal

from modescope.core.decomposition import Decomposition


def initial_rank(decomposition: Decomposition) -> int:
    """Return the rank a fresh view starts at: the one default rank of every front end,
    :func:`modescope.core.review.rank.default_rank` (the smallest rank capturing 95% of the
    energy, all k kept modes when they capture less, 0 without modes)."""
    from modescope.core.review.rank import default_rank
    return default_rank(decomposition).rank


#: Most mark changes kept for undo (older ones are forgotten first).
UNDO_LIMIT = 1000


@dataclass(frozen=True)
class _MarkStep:
    """One change of review marks: the images, their marks before and their mark after."""

    indices: np.ndarray     # (m,) int64, sorted
    before: np.ndarray      # (m,) int8
    after: int


@dataclass(frozen=True)
class ReviewSnapshot:
    """What :meth:`AppState.snapshot` keeps: the analysis, its marks as last saved (or
    opened) and the undo and redo steps, so that :meth:`AppState.restore` can put them back."""

    decomposition: Decomposition | None
    saved_marks: np.ndarray | None
    undo: tuple
    redo: tuple


class AppState(QObject):
    """Shared state of the workbench.

    Signals
    -------
    decompositionChanged(object)
        A new Decomposition (or None). Emitted for every partial snapshot during a run too; check
        ``decomposition.exact`` to tell a final result from a streaming snapshot.
    selectedChanged(int)
        The current image index (-1 when none).
    selectionSetChanged(object)
        A tuple of image indices picked together (box select, table multi-select).
    rankChanged(int)
        The rank r used for reconstructions and scores, 1..k.
    modesChanged(int, int)
        The pair of modes (0-based) shown in the weights plane.
    focusModeChanged(int)
        The mode picked in the basis gallery (0-based; -1 for the mean image).
    marksChanged(object)
        A tuple of image indices whose review mark changed (the decomposition's ``marks`` array
        was replaced; ``decompositionChanged`` is not emitted for this).
    levelChanged(float)
        The confidence level of the outlier control limits (default 0.99).
    marksHistoryChanged()
        Whether marks can be undone or redone, or whether they differ from the saved ones, may
        have changed (see :attr:`can_undo`, :attr:`can_redo`, :attr:`marks_modified`).

    Review marks have a history: every :meth:`set_marks` that changes something is one step
    that :meth:`undo_marks` takes back and :meth:`redo_marks` makes again (a new analysis
    starts a new history). :attr:`marks_modified` tells whether the marks differ from the
    ones the analysis had when it was installed or last saved (:meth:`marks_saved`).
    """

    decompositionChanged = Signal(object)
    selectedChanged = Signal(int)
    selectionSetChanged = Signal(object)
    rankChanged = Signal(int)
    modesChanged = Signal(int, int)
    focusModeChanged = Signal(int)
    marksChanged = Signal(object)
    levelChanged = Signal(float)
    marksHistoryChanged = Signal()

    def __init__(self, parent: QObject | None = None):
        super().__init__(parent)
        self._decomposition: Decomposition | None = None
        self._selected = -1
        self._selection_set: tuple[int, ...] = ()
        self._rank = 0
        self._modes = (0, 1)
        self._focus_mode = 0
        self._level = 0.99
        self._rank_chosen = False    # True once the user (a view) set the rank
        self._saved_marks: np.ndarray | None = None
        self._undo: list[_MarkStep] = []
        self._redo: list[_MarkStep] = []

    # ----- getters ---------------------------------------------------------------------------
    @property
    def decomposition(self) -> Decomposition | None:
        return self._decomposition

    @property
    def selected(self) -> int:
        return self._selected

    @property
    def selection_set(self) -> tuple[int, ...]:
        return self._selection_set

    @property
    def rank(self) -> int:
        return self._rank

    @property
    def modes(self) -> tuple[int, int]:
        return self._modes

    @property
    def focus_mode(self) -> int:
        return self._focus_mode

    @property
    def level(self) -> float:
        return self._level

    @property
    def marks_modified(self) -> bool:
        """True when the review marks differ from the ones last saved (or opened)."""
        d = self._decomposition
        if d is None:
            return False
        saved = self._saved_marks
        return saved is None or not np.array_equal(np.asarray(d.marks), saved)

    @property
    def can_undo(self) -> bool:
        """True when a change of marks can be taken back."""
        return bool(self._undo)

    @property
    def can_redo(self) -> bool:
        """True when a change of marks that was taken back can be made again."""
        return bool(self._redo)

    # ----- setters ---------------------------------------------------------------------------
    def set_decomposition(self, decomposition: Decomposition | None) -> None:
        """Install a new analysis (partial or final) and clamp the other values to it.

        Its marks count as saved and the undo history starts afresh.

        Raises
        ------
        TypeError
            If ``decomposition`` is neither a Decomposition nor None.
        """
        if decomposition is not None and not isinstance(decomposition, Decomposition):
            raise TypeError(f"decomposition must be a Decomposition or None, "
                            f"got {type(decomposition).__name__}")
        self._decomposition = decomposition
        self._saved_marks = (None if decomposition is None
                             else np.array(decomposition.marks, dtype=np.int8))
        self._undo, self._redo = [], []
        k = 0 if decomposition is None else decomposition.rank
        n = 0 if decomposition is None else decomposition.n_images
        self.decompositionChanged.emit(decomposition)
        # clamp dependent values (each setter emits only on change)
        if k == 0:
            self._rank_chosen = False
            self._set_rank_raw(0)
        elif self._rank == 0 or (decomposition.exact and not self._rank_chosen):
            # a fresh start, or the final result of a run whose rank nobody has moved yet
            self._set_rank_raw(initial_rank(decomposition))
        elif self._rank > k:
            self._set_rank_raw(k)
        a, b = self._modes
        if k >= 2 and (a >= k or b >= k):
            self.set_modes(0, 1)
        if self._selected >= n:
            self.set_selected(n - 1 if n else -1)
        elif self._selected < 0 and n:
            self.set_selected(0)
        if any(i >= n for i in self._selection_set):
            self.set_selection_set(i for i in self._selection_set if i < n)
        if self._focus_mode >= k:
            self.set_focus_mode(0 if k else -1)
        self.marksHistoryChanged.emit()

    def set_selected(self, index: int) -> None:
        """Select image ``index`` (-1 for none)."""
        index = int(index)
        n = 0 if self._decomposition is None else self._decomposition.n_images
        if index < -1 or index >= max(n, 0) and index != -1:
            raise ValueError(f"image index must be in -1..{n - 1}, got {index}")
        if index != self._selected:
            self._selected = index
            self.selectedChanged.emit(index)

    def select_from_view(self, images: Iterable[int], current: int) -> None:
        """Take a view's selection: ``images`` selected (0-based) and its ``current`` one.

        The selected image is ``current`` when it is part of the selection (or nothing is
        selected), else the first selected image; several images also become the selection
        set (one image or none clears it). Views call this instead of each deciding the rule.
        """
        images = sorted({int(i) for i in images})
        current = int(current)
        if current < 0 and images:
            current = images[0]
        if current >= 0 and (not images or current in images):
            self.set_selected(current)
        elif images:
            self.set_selected(images[0])
        self.set_selection_set(images if len(images) > 1 else ())

    def set_selection_set(self, indices: Iterable[int]) -> None:
        """Pick several images at once (the first becomes the selected image)."""
        new = tuple(sorted({int(i) for i in indices}))
        if new != self._selection_set:
            self._selection_set = new
            self.selectionSetChanged.emit(new)
        if new and self._selected not in new:
            self.set_selected(new[0])

    def _set_rank_raw(self, rank: int) -> None:
        if rank != self._rank:
            self._rank = rank
            self.rankChanged.emit(rank)

    def set_rank(self, rank: int) -> None:
        """Set the rank r, clamped to 1..k."""
        k = 0 if self._decomposition is None else self._decomposition.rank
        rank = max(1, min(int(rank), k)) if k else 0
        self._rank_chosen = bool(k)
        self._set_rank_raw(rank)

    def set_modes(self, a: int, b: int) -> None:
        """Show modes ``a`` and ``b`` (0-based) in the weights plane."""
        new = (int(a), int(b))
        if new != self._modes:
            self._modes = new
            self.modesChanged.emit(*new)

    def set_marks(self, indices: Iterable[int], mark: int) -> None:
        """Set the review mark (0 not reviewed, 1 keep, 2 exclude) of some images."""
        d = self._decomposition
        if d is None:
            raise ValueError("there is no analysis to mark images in")
        mark = int(mark)
        if mark not in (0, 1, 2):
            raise ValueError(f"mark must be 0 (not reviewed), 1 (keep) or 2 (exclude), got {mark}")
        idx = sorted({int(i) for i in indices})
        if any(i < 0 or i >= d.n_images for i in idx):
            raise ValueError(f"image indices must be in 0..{d.n_images - 1}")
        changed = np.asarray([i for i in idx if d.marks[i] != mark], dtype=np.int64)
        if not changed.size:
            return
        step = _MarkStep(changed, np.asarray(d.marks, dtype=np.int8)[changed].copy(), mark)
        self._undo.append(step)
        del self._undo[:-UNDO_LIMIT]
        self._redo.clear()
        self._apply(changed, np.full(changed.size, mark, dtype=np.int8))

    def _apply(self, indices: np.ndarray, values: np.ndarray) -> None:
        d = self._decomposition
        marks = np.array(d.marks, dtype=np.int8)
        marks[indices] = values
        self._decomposition = d.replace(marks=marks)
        self.marksChanged.emit(tuple(int(i) for i in indices))
        self.marksHistoryChanged.emit()

    def undo_marks(self) -> bool:
        """Take back the last change of review marks.

        Returns
        -------
        bool
            False when there was nothing to undo.
        """
        if not self._undo or self._decomposition is None:
            return False
        step = self._undo.pop()
        self._redo.append(step)
        self._apply(step.indices, step.before)
        return True

    def redo_marks(self) -> bool:
        """Make again the last change of review marks that was taken back.

        Returns
        -------
        bool
            False when there was nothing to redo.
        """
        if not self._redo or self._decomposition is None:
            return False
        step = self._redo.pop()
        self._undo.append(step)
        self._apply(step.indices, np.full(step.indices.size, step.after, dtype=np.int8))
        return True

    def marks_saved(self) -> None:
        """Record that the current marks are in a file (:attr:`marks_modified` becomes False;
        the undo history stays)."""
        d = self._decomposition
        self._saved_marks = None if d is None else np.array(d.marks, dtype=np.int8)
        self.marksHistoryChanged.emit()

    def snapshot(self) -> ReviewSnapshot:
        """Return the analysis with its saved marks and its undo history (for :meth:`restore`)."""
        saved = None if self._saved_marks is None else self._saved_marks.copy()
        return ReviewSnapshot(self._decomposition, saved, tuple(self._undo), tuple(self._redo))

    def restore(self, snapshot: ReviewSnapshot) -> None:
        """Put back an analysis kept by :meth:`snapshot`, its saved marks and its history.

        Raises
        ------
        TypeError
            If ``snapshot`` is not a ReviewSnapshot.
        """
        if not isinstance(snapshot, ReviewSnapshot):
            raise TypeError(f"snapshot must be a ReviewSnapshot, got {type(snapshot).__name__}")
        self.set_decomposition(snapshot.decomposition)
        self._saved_marks = snapshot.saved_marks
        self._undo, self._redo = list(snapshot.undo), list(snapshot.redo)
        self.marksHistoryChanged.emit()

    def set_level(self, level: float) -> None:
        """Set the confidence level of the outlier limits, 0.5 <= level < 1."""
        level = float(level)
        if not 0.5 <= level < 1.0:
            raise ValueError(f"level must be in [0.5, 1), got {level}")
        if level != self._level:
            self._level = level
            self.levelChanged.emit(level)

    def set_focus_mode(self, mode: int) -> None:
        """Pick mode ``mode`` (0-based, -1 for the mean image)."""
        mode = int(mode)
        if mode != self._focus_mode:
            self._focus_mode = mode
            self.focusModeChanged.emit(mode)
