"""Start the Modescope workbench.

``python -m modescope.app.desktop.launch [PATH ...]`` (or ``modescope`` with no subcommand)
opens the main window. Folders and image files given are analysed; a saved analysis (``.npz``)
is opened. With no path the program reopens what it showed last (:func:`remembered_paths`): the
last analysis file opened or saved, or the folders of the last run, whichever came last, the
other when that one is gone; the bundled ``sample_images/`` folder only on the first start,
when nothing is remembered.
"""

from __future__ import annotations

import os
import sys
from typing import Sequence

__all__ = ["run_gui", "main", "remembered_paths", "start_window", "NOTHING_LEFT"]

NOTHING_LEFT = ("The last analysis file and folders are gone. Add a folder of aligned images "
                "(File > Add folder) or drop one on the window.")


def remembered_paths(settings) -> list[str] | None:
    """Return what a start with no path reopens.

    Parameters
    ----------
    settings : modescope.app.desktop.settings.Settings

    Returns
    -------
    list of str or None
        None on a first start (no analysis file and no folders remembered). Otherwise the
        last thing opened that still exists: ``[file]`` for the last analysis file opened or
        saved, or the last run's folders and image files (those still there), whichever was
        opened last, the other one when it is gone; ``[]`` when both are gone.

    Raises
    ------
    TypeError
        If ``settings`` is not a Settings.
    """
    from modescope.app.desktop.settings import Settings

    if not isinstance(settings, Settings):
        raise TypeError(f"settings must be a Settings, got {type(settings).__name__}")
    files, folders = settings.recent_files(), settings.last_folders()
    if not files and not folders:
        return None
    file_choice = [files[0]] if files and os.path.isfile(files[0]) else []
    folder_choice = [p for p in folders if os.path.exists(p)]
    if settings.last_opened() == "folders":
        return folder_choice or file_choice
    return file_choice or folder_choice


def start_window(window, paths: Sequence[str]) -> str:
    """Open what a start shows in ``window`` (a MainWindow) and say what it was.

    Parameters
    ----------
    window : MainWindow
        Its ``settings`` decide what a start with no path reopens.
    paths : sequence of str
        What the command line gave; empty to reopen the last analysis or folders.

    Returns
    -------
    str
        ``"given"`` (``paths`` opened), ``"remembered"`` (the last analysis file or folders),
        ``"sample"`` (first start: the bundled sample) or ``"nothing"`` (what was remembered
        is gone; the status bar says so).
    """
    wanted = [os.fspath(p) for p in paths]
    if wanted:
        window.open_paths(wanted)
        return "given"
    remembered = remembered_paths(window.settings)
    if remembered is None:
        window.open_sample()
        return "sample"
    if remembered:
        window.open_paths(remembered)
        return "remembered"
    window.statusBar().showMessage(NOTHING_LEFT)
    return "nothing"


def run_gui(paths: Sequence[str], settings=None) -> int:
    """Open the main window on ``paths`` and run the Qt event loop until it closes.

    Parameters
    ----------
    paths : sequence of str
        Folders, image files and/or one ``.npz`` analysis file; empty to reopen the last
        analysis file or folders (the sample images on the first start).
    settings : Settings, optional
        The remembered settings (default: the user's own store).

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

    window = MainWindow(settings)
    window.show()
    wanted = [os.fspath(p) for p in paths]
    QTimer.singleShot(0, lambda: start_window(window, wanted))
    code = int(app.exec())
    window.shutdown()
    return code


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point for ``python -m modescope.app.desktop.launch``."""
    args = list(sys.argv[1:] if argv is None else argv)
    if any(a in ("-h", "--help") for a in args):
        print("usage: python -m modescope.app.desktop.launch [PATH ...]\n\n"
              "Open the Modescope workbench on folders or image files, or on a saved\n"
              "analysis (.npz). With no path the last analysis file or folders are\n"
              "opened again (the bundled sample images on the first start).")
        return 0
    return run_gui(args)


if __name__ == "__main__":
    sys.exit(main())
