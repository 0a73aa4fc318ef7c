"""Throttled redraws shared by the workbench views.

During a run the state receives a new snapshot several times a second, and the rank or the modes
can change on every mouse move. A view that mixes in :class:`ThrottledRedraw` connects those
signals to :meth:`~ThrottledRedraw._schedule`; the bursts are merged into one call of the view's
``_redraw`` at most every ``REDRAW_MS`` milliseconds.
"""

from __future__ import annotations

import time

from PySide6.QtCore import QTimer

__all__ = ["ThrottledRedraw"]


class ThrottledRedraw:
    """Mixin for a QWidget with a ``_redraw()`` method (put it before QWidget in the bases).

    Call :meth:`_init_redraw_timer` once in ``__init__``, after the widget is built.
    """

    #: Least milliseconds between two redraws.
    REDRAW_MS = 100

    def _init_redraw_timer(self) -> None:
        self._timer = QTimer(self)
        self._timer.setSingleShot(True)
        self._timer.setInterval(self.REDRAW_MS)
        self._timer.timeout.connect(self._redraw)

    def _timed_redraw(self, draw) -> None:
        """Run ``draw()`` and stretch the interval to 3x its duration (100 ms to 1 s), so that a
        slow redraw (many points) leaves the GUI time to respond between two of them."""
        t0 = time.perf_counter()
        try:
            draw()
        finally:
            spent_ms = 1000.0 * (time.perf_counter() - t0)
            self._timer.setInterval(int(max(self.REDRAW_MS, min(1000.0, 3.0 * spent_ms))))

    def _schedule(self, *_) -> None:
        """Merge bursts of changes into one redraw (at most one per REDRAW_MS)."""
        if not self._timer.isActive():
            self._timer.start()
