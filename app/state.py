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
    """

    decompositionChanged = Signal(object)
    selectedChanged = Signal(int)
    selectionSetChanged = Signal(object)
    rankChanged = Signal(int)
    modesChanged = Signal(int, int)
    focusModeChanged = Signal(int)

    def __init__(self, parent: QObject | None = None):
        super().__init__(parent)
        self._decomposition: Decomposition | None = None
        self._selected = -1
        self._selection_set: tuple[int, ...] = ()
        self._rank = 0
        self._modes = (0, 1)
        self._focus_mode = 0

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
            self._set_rank_raw(0)
        elif self._rank == 0 or self._rank > k:
            self._set_rank_raw(min(k, max(1, self._rank or k)))
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
        self._set_rank_raw(rank)

    def set_modes(self, a: int, b: int) -> None:
        """Show modes ``a`` and ``b`` (0-based) in the weights plane."""
        new = (int(a), int(b))
        if new != self._modes:
            self._modes = new
            self.modesChanged.emit(*new)

    def set_focus_mode(self, mode: int) -> None:
        """Pick mode ``mode`` (0-based, -1 for the mean image)."""
        mode = int(mode)
        if mode != self._focus_mode:
            self._focus_mode = mode
            self.focusModeChanged.emit(mode)
