"""Draggable lines that snap to whole numbers and write their value at most every few ms.

The Singular values pane's rank line and the Weights pane's image line behave alike: a drag moves
the line, the line snaps to the nearest whole number within the current bounds, and the value
reaches the state at most once per ``interval_ms`` while the drag lasts and at once when it ends
(slider drags are debounced, as the design asks). :class:`SnapDrag` holds that behaviour once;
the views give it their lines, a bounds getter and the function that writes the value.
"""

from __future__ import annotations

from typing import Callable, Sequence

import pyqtgraph as pg
from PySide6.QtCore import QObject, QTimer, Slot

__all__ = ["SnapDrag"]


class SnapDrag(QObject):
    """Snap one or more draggable lines to whole numbers and write the value, debounced.

    Every line shows the same value: dragging one moves the others. Moves made through
    :meth:`set_value` (the state speaking) never write back, so there is no echo.

    Parameters
    ----------
    lines : sequence of pyqtgraph.InfiniteLine
        The lines dragged together (at least one).
    bounds : callable () -> (int, int) or None
        The smallest and largest whole value allowed now; None when there is nothing to drag
        (no analysis), in which case a drag is ignored.
    write : callable (int) -> None
        Called with the snapped value at most every ``interval_ms`` during a drag, and once
        more when the drag ends.
    interval_ms : int, optional
        The shortest time between two writes during a drag (default 60).
    parent : QObject, optional

    Raises
    ------
    TypeError
        If ``lines`` holds something that is not an InfiniteLine, ``bounds`` or ``write`` is not
        callable, or ``interval_ms`` is not an int.
    ValueError
        If ``lines`` is empty or ``interval_ms`` is negative.
    """

    def __init__(self, lines: Sequence[pg.InfiniteLine],
                 bounds: Callable[[], tuple[int, int] | None], write: Callable[[int], None],
                 interval_ms: int = 60, parent: QObject | None = None):
        super().__init__(parent)
        lines = tuple(lines)
        if not lines:
            raise ValueError("lines must hold at least one line, got none")
        for line in lines:
            if not isinstance(line, pg.InfiniteLine):
                raise TypeError(f"lines must hold pyqtgraph InfiniteLine items, got "
                                f"{type(line).__name__}")
        for name, fn in (("bounds", bounds), ("write", write)):
            if not callable(fn):
                raise TypeError(f"{name} must be callable, got {type(fn).__name__}")
        if isinstance(interval_ms, bool) or not isinstance(interval_ms, int):
            raise TypeError(f"interval_ms must be an int, got {type(interval_ms).__name__}")
        if interval_ms < 0:
            raise ValueError(f"interval_ms must be 0 or more, got {interval_ms}")
        self.lines = lines
        self._bounds = bounds
        self._write = write
        self._moving = False
        self._pending: int | None = None
        self._timer = QTimer(self)
        self._timer.setSingleShot(True)
        self._timer.setInterval(interval_ms)
        self._timer.timeout.connect(self.flush)
        for line in lines:
            line.sigPositionChanged.connect(self._on_moved)
            line.sigPositionChangeFinished.connect(self._on_finished)

    @property
    def pending(self) -> int | None:
        """The value a drag has reached but not written yet (None when nothing waits)."""
        return self._pending

    def set_value(self, value: float) -> None:
        """Move every line to ``value`` without writing it (the state changed elsewhere).

        Parameters
        ----------
        value : float
            The position, in the plot's data units.
        """
        self._moving = True
        try:
            for line in self.lines:
                if line.value() != value:
                    line.setValue(value)
        finally:
            self._moving = False

    @Slot(object)
    def _on_moved(self, line) -> None:
        if self._moving:
            return
        allowed = self._bounds()
        if allowed is None:
            return
        lo, hi = allowed
        value = int(min(max(round(line.value()), lo), hi))
        self.set_value(value)  # snap every line to the whole number
        self._pending = value
        if not self._timer.isActive():
            self._timer.start()

    @Slot(object)
    def _on_finished(self, line) -> None:
        if self._moving:
            return
        self._on_moved(line)
        self._timer.stop()
        self.flush()

    @Slot()
    def flush(self) -> None:
        """Write the value a drag has reached, if any, now."""
        if self._pending is None:
            return
        value, self._pending = self._pending, None
        self._write(value)
