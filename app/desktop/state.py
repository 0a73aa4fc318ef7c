"""The one owner of the workbench's state.

Every view reads the current analysis, the selected image(s), the rank and the pair of modes from
:class:`AppState` and writes selections back to it, never to another view. Setters emit their
signal only when the value really changes, so a view that sets a value in response to the same
signal does not start a loop.
"""

from __future__ import annotations

from typing import Iterable

from PySide6.QtCore import QObject, Signal

from modescope.core.decomposition import Decomposition


def initial_rank(decomposition: Decomposition) -> int:
    """Return the rank a fresh view starts at: the smallest rank capturing 95% of the energy
    (a common-practice choice with no source), at least 1; k when the k kept modes capture
    less (a default only: nothing claims that k reaches 95%)."""
    from modescope.core.review.rank import energy_rank
    k = decomposition.rank
    if k == 0:
        return 0
    try:
        found = energy_rank(decomposition, 0.95).rank
    except ValueError:
        return k
    return k if found is None else max(1, min(k, found))


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
    """

    decompositionChanged = Signal(object)
    selectedChanged = Signal(int)
    selectionSetChanged = Signal(object)
    rankChanged = Signal(int)
    modesChanged = Signal(int, int)
    focusModeChanged = Signal(int)
    marksChanged = Signal(object)
    levelChanged = Signal(float)

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

    # ----- setters ---------------------------------------------------------------------------
    def set_decomposition(self, decomposition: Decomposition | None) -> None:
        """Install a new analysis (partial or final) and clamp the other values to it."""
        if decomposition is not None and not isinstance(decomposition, Decomposition):
            raise TypeError(f"decomposition must be a Decomposition or None, "
                            f"got {type(decomposition).__name__}")
        self._decomposition = decomposition
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

    def set_selected(self, index: int) -> None:
        """Select image ``index`` (-1 for none)."""
        index = int(index)
        n = 0 if self._decomposition is None else self._decomposition.n_images
        if index < -1 or index >= max(n, 0) and index != -1:
            raise ValueError(f"image index must be in -1..{n - 1}, got {index}")
        if index != self._selected:
            self._selected = index
            self.selectedChanged.emit(index)

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
        marks = d.marks.copy()
        changed = tuple(i for i in idx if marks[i] != mark)
        if not changed:
            return
        marks[list(changed)] = mark
        self._decomposition = d.replace(marks=marks)
        self.marksChanged.emit(changed)

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
