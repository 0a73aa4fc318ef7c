"""The program's icon and desktop identity.

The icon is our own drawing, ``resources/modescope.svg`` beside this module (shipped in the
wheel as package data and copied into the PyInstaller bundle): three stacked image tiles, the
front one holding a spectrum of falling bars. ``APP_ID`` is the name of the freedesktop entry
and the AppStream metadata in ``packaging/`` (``APP_ID.desktop``, ``APP_ID.metainfo.xml``);
the desktop program gives it to Qt so that a desktop matches the window to its launcher.
"""

from __future__ import annotations

from pathlib import Path

__all__ = ["APP_ID", "icon_path", "app_icon"]

#: Reverse-DNS id of the program: the .desktop file's name, the icon name it asks for, the
#: AppStream component id and Qt's desktop file name.
APP_ID = "org.modescope.Modescope"


def icon_path() -> Path:
    """Return the path of the program's SVG icon.

    Returns
    -------
    pathlib.Path
        ``resources/modescope.svg`` beside this module (it exists in a checkout, an installed
        wheel and the bundle).
    """
    return Path(__file__).resolve().parent / "resources" / "modescope.svg"


def app_icon():
    """Return the program's icon as a ``QIcon`` (a null icon when the file is missing).

    Returns
    -------
    PySide6.QtGui.QIcon
        Made from :func:`icon_path`; Qt draws it at any size through its SVG image plugin.
    """
    from PySide6.QtGui import QIcon

    path = icon_path()
    return QIcon(str(path)) if path.is_file() else QIcon()
