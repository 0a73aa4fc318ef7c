"""The main window's status bar: the analysis summary, the size of the selection, the run's
progress and the memory in use.

:class:`StatusBarMixin` is one part of :class:`~modescope.app.desktop.main_window.MainWindow`;
it reads ``self.state`` and fills the status bar. The number formatting shared with the run
control (:func:`format_seconds`) and :func:`memory_in_use` live here too.
"""

from __future__ import annotations

import os
import sys

from PySide6.QtCore import QTimer, Slot
from PySide6.QtWidgets import QLabel, QProgressBar

from modescope.app.words import counted

__all__ = ["StatusBarMixin", "memory_in_use", "format_bytes", "format_seconds",
           "selection_text", "MEMORY_INTERVAL_MS"]

#: How often the memory figure in the status bar is refreshed.
MEMORY_INTERVAL_MS = 2000

#: Where Linux tells the pages this process holds (a module constant so tests can point it away).
_STATM = "/proc/self/statm"


def memory_in_use() -> int:
    """Return the memory this process uses, in bytes (0 when the platform cannot tell).

    The resident size from ``/proc/self/statm`` where it exists (Linux); otherwise the peak
    resident size from :mod:`resource` (imported here, not at module import: it does not exist
    on Windows); otherwise 0.

    Returns
    -------
    int
        Bytes, or 0 when neither source is available.
    """
    try:
        with open(_STATM, "rb") as f:
            resident_pages = int(f.read().split()[1])
        return resident_pages * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError, IndexError, AttributeError):
        pass                       # no /proc (macOS, Windows) or no os.sysconf (Windows)
    try:
        import resource
    except ImportError:            # Windows
        return 0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return int(peak if sys.platform == "darwin" else peak * 1024)   # bytes on macOS, KB else


def format_bytes(n: int) -> str:
    """Return ``n`` bytes as text with a unit ("512 B", "12 KB", "1.5 MB", "2.0 GB").

    Parameters
    ----------
    n : int
        A number of bytes (not negative).

    Returns
    -------
    str
    """
    value = float(n)
    for unit in ("B", "KB", "MB", "GB"):
        if value < 1024 or unit == "GB":
            return f"{value:.0f} {unit}" if unit in ("B", "KB") else f"{value:.1f} {unit}"
        value /= 1024
    return f"{value:.1f} GB"  # pragma: no cover


def format_seconds(seconds: float) -> str:
    """Return a duration as text ("42 s", "3 min 05 s", "1 h 02 min"); negative counts as 0.

    Parameters
    ----------
    seconds : float

    Returns
    -------
    str
    """
    seconds = max(0.0, float(seconds))
    if seconds < 60:
        return f"{seconds:.0f} s"
    minutes, sec = divmod(int(round(seconds)), 60)
    if minutes < 60:
        return f"{minutes} min {sec:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"


def selection_text(indices) -> str:
    """Return the size of a selection as status text ("3 images selected"; "" when empty).

    Parameters
    ----------
    indices : sequence of int
        The images picked together (the state's selection set).

    Returns
    -------
    str
    """
    n = len(indices)
    return f"{counted(n, 'image')} selected" if n else ""


class StatusBarMixin:
    """The status bar of the main window (a part of ``MainWindow``, not a widget of its own).

    Uses ``self.state``, ``self.runner`` (a result that is not final is "in progress" while a
    run goes on, a "partial result" otherwise) and ``self.statusBar()``; makes ``summary_label``,
    ``selection_label`` (the size of the selection, on every change of the state's selection
    set), ``progress_label``, ``progress_bar`` and ``memory_label``.
    """

    def _build_status_bar(self) -> None:
        sb = self.statusBar()
        self.summary_label = QLabel("", self)
        self.progress_label = QLabel("", self)
        self.progress_bar = QProgressBar(self)
        self.progress_bar.setMaximumWidth(220)
        self.progress_bar.setMinimumWidth(140)
        self.progress_bar.setTextVisible(True)
        self.progress_bar.hide()
        self.progress_label.hide()
        self.memory_label = QLabel("", self)
        self.memory_label.setToolTip("Memory this program uses now")
        self.selection_label = QLabel("", self)
        self.selection_label.setToolTip("How many images are selected together (a box in the "
                                        "weights plane, several rows of a list)")
        self.selection_label.hide()
        sb.addWidget(self.summary_label, 1)
        sb.addPermanentWidget(self.selection_label)
        sb.addPermanentWidget(self.progress_label)
        sb.addPermanentWidget(self.progress_bar)
        sb.addPermanentWidget(self.memory_label)
        self._memory_timer = QTimer(self)
        self._memory_timer.setInterval(MEMORY_INTERVAL_MS)
        self._memory_timer.timeout.connect(self._update_memory)
        self._memory_timer.start()
        self._update_memory()
        self.state.selectionSetChanged.connect(self._update_selection)
        self._update_selection(self.state.selection_set)

    @Slot(object)
    def _update_selection(self, indices) -> None:
        text = selection_text(indices)
        self.selection_label.setText(text)
        self.selection_label.setVisible(bool(text))

    @Slot()
    def _on_state_changed(self, *_args) -> None:
        self._update_status()

    def status_text(self) -> str:
        """Return the summary shown at the left of the status bar."""
        d = self.state.decomposition
        if d is None:
            return "No analysis"
        rows, cols, channels = (tuple(d.image_shape) + (1, 1, 1))[:3]
        r = min(self.state.rank, d.rank)   # the state clamps its rank after it tells of d
        parts = [counted(d.n_images, "image"), f"{rows} × {cols} pixels"
                 + (f" × {channels}" if channels > 1 else ""), f"rank {r} of {d.rank}"]
        if r >= 1:
            parts.append(f"{100.0 * float(d.cumulative_energy()[r - 1]):.1f} % of the "
                         f"variation at rank {r}")
        if not d.exact:
            running = getattr(self, "runner", None) is not None and self.runner.is_running()
            parts.append("in progress" if running else
                         "partial result (File > Finish the analysis completes it)")
        return " · ".join(parts)

    def _update_status(self) -> None:
        self.summary_label.setText(self.status_text())

    @Slot()
    def _update_memory(self) -> None:
        used = memory_in_use()
        self.memory_label.setText(f"Memory {format_bytes(used)}" if used > 0 else "")
        self.memory_label.setVisible(used > 0)
