"""Start the Modescope workbench.

``python -m modescope.app.desktop.launch [PATH ...]`` (or ``modescope`` with no subcommand)
opens the main window. With no path the bundled ``sample_images/`` folder is analysed; folders
and image files given are analysed; a saved analysis (``.npz``) is opened.
"""

from __future__ import annotations

import os
import sys
from typing import Sequence

__all__ = ["run_gui", "main"]


def run_gui(paths: Sequence[str]) -> int:
    """Open the main window on ``paths`` and run the Qt event loop until it closes.

    Parameters
    ----------
    paths : sequence of str
        Folders, image files and/or one ``.npz`` analysis file; empty for the sample images.

    Returns
    -------
    int
        The exit code of the event loop (0 on a normal close).

    Raises
    ------
    TypeError
        If ``paths`` is not a sequence of str.
    """
    if isinstance(paths, (str, bytes)) or not all(isinstance(p, (str, os.PathLike))
                                                  for p in paths):
        raise TypeError(f"paths must be a sequence of str paths, got {paths!r}")
    from PySide6.QtCore import QTimer
    from PySide6.QtWidgets import QApplication

    from modescope.app.desktop.main_window import MainWindow

    app = QApplication.instance()
    if app is None:
        app = QApplication([sys.argv[0] if sys.argv else "modescope"])
    app.setOrganizationName("Modescope")
    app.setApplicationName("Modescope")
    app.setApplicationDisplayName("Modescope")

    window = MainWindow()
    window.show()
    wanted = [os.fspath(p) for p in paths]

    def begin() -> None:
        if wanted:
            window.open_paths(wanted)
        else:
            window.open_sample()

    QTimer.singleShot(0, begin)
    code = int(app.exec())
    window.shutdown()
    return code


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point for ``python -m modescope.app.desktop.launch``."""
    args = list(sys.argv[1:] if argv is None else argv)
    if any(a in ("-h", "--help") for a in args):
        print("usage: python -m modescope.app.desktop.launch [PATH ...]\n\n"
              "Open the Modescope workbench on folders or image files, or on a saved\n"
              "analysis (.npz). With no path the bundled sample images are analysed.")
        return 0
    return run_gui(args)


if __name__ == "__main__":
    sys.exit(main())
