"""Typed access to the workbench's remembered settings.

:class:`Settings` wraps a :class:`~PySide6.QtCore.QSettings` (organisation "Modescope",
application "Modescope" by default) and turns what comes back into the type each caller expects:
the INI backend hands every value back as a string, and a list of one element comes back as a
plain string, so nothing outside this module reads QSettings directly.

Keys
----
``options/rank``, ``options/color``, ``options/downscale``, ``options/recursive``,
``options/resize_mismatched``
    The analysis options last used in the sources pane.
``files/recent``
    Analysis files (``.npz``) opened or saved, most recent first.
``session/folders``, ``session/last``
    The sources (folders or image files) of the last run started on them, and which of the
    two was opened last: ``"file"`` (the first recent file) or ``"folders"``. A new start with
    no path reopens it (see :func:`modescope.app.desktop.launch.remembered_paths`); with
    neither key the program has never run, and the bundled sample is opened.
``dialogs/last_dir``
    The folder a file dialog opens in.
``window/geometry``, ``window/state``
    ``QMainWindow.saveGeometry()`` and ``saveState()``.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Any, Iterable

from PySide6.QtCore import QByteArray, QSettings

__all__ = ["Settings", "StoredOptions", "ORGANIZATION", "APPLICATION", "MAX_RECENT",
           "LAST_KINDS"]

ORGANIZATION = "Modescope"
APPLICATION = "Modescope"
MAX_RECENT = 10

_COLORS = ("gray", "rgb")
LAST_KINDS = ("file", "folders")


@dataclass(frozen=True)
class StoredOptions:
    """The analysis options the sources pane remembers.

    Attributes
    ----------
    rank : int
        Number of basis images to compute, at least 1.
    color : str
        "gray" or "rgb".
    downscale : int
        Integer downscale factor, at least 1.
    recursive : bool
        Look into subfolders.
    resize_mismatched : bool
        Keep images of another size (resized to the reference size).
    """

    rank: int = 20
    color: str = "gray"
    downscale: int = 1
    recursive: bool = False
    resize_mismatched: bool = False


def _to_bool(value: Any, default: bool) -> bool:
    if isinstance(value, bool):
        return value
    if isinstance(value, (int, float)):
        return bool(value)
    if isinstance(value, str):
        text = value.strip().lower()
        if text in ("true", "1", "yes", "on"):
            return True
        if text in ("false", "0", "no", "off", ""):
            return False
    return default


def _to_int(value: Any, default: int, minimum: int, maximum: int) -> int:
    if isinstance(value, bool):
        return default
    try:
        number = value if isinstance(value, int) else int(str(value).strip())
    except (TypeError, ValueError):
        return default
    return max(minimum, min(maximum, number))


def _to_str_list(value: Any) -> list[str]:
    if value is None:
        return []
    if isinstance(value, str):
        return [value] if value else []
    if isinstance(value, (list, tuple)):
        return [str(v) for v in value if v is not None and str(v)]
    return []


def _to_bytes(value: Any) -> QByteArray:
    if isinstance(value, QByteArray):
        return value
    if isinstance(value, (bytes, bytearray)):
        return QByteArray(bytes(value))
    return QByteArray()


class Settings:
    """Typed getters and setters over QSettings.

    Parameters
    ----------
    qsettings : QSettings, optional
        The store to use. Default: the user's native store for organisation "Modescope",
        application "Modescope". Tests pass ``QSettings(path, QSettings.IniFormat)``.

    Examples
    --------
    >>> s = Settings(QSettings("/tmp/m.ini", QSettings.IniFormat))    # doctest: +SKIP
    >>> s.set_options(StoredOptions(rank=8)); s.options().rank          # doctest: +SKIP
    8
    """

    def __init__(self, qsettings: QSettings | None = None):
        if qsettings is not None and not isinstance(qsettings, QSettings):
            raise TypeError(f"qsettings must be a QSettings or None, "
                            f"got {type(qsettings).__name__}")
        self._store = qsettings if qsettings is not None else QSettings(ORGANIZATION, APPLICATION)

    def sync(self) -> None:
        """Write pending changes to permanent storage."""
        self._store.sync()

    def clear(self) -> None:
        """Forget every setting."""
        self._store.clear()

    # ----- analysis options --------------------------------------------------------------------
    def options(self) -> StoredOptions:
        """Return the remembered analysis options (defaults for anything missing or damaged)."""
        d = StoredOptions()
        s = self._store
        color = str(s.value("options/color", d.color)).lower()
        return StoredOptions(
            rank=_to_int(s.value("options/rank", d.rank), d.rank, 1, 10_000),
            color=color if color in _COLORS else d.color,
            downscale=_to_int(s.value("options/downscale", d.downscale), d.downscale, 1, 64),
            recursive=_to_bool(s.value("options/recursive", d.recursive), d.recursive),
            resize_mismatched=_to_bool(s.value("options/resize_mismatched",
                                               d.resize_mismatched), d.resize_mismatched),
        )

    def set_options(self, options: StoredOptions) -> None:
        """Remember analysis options.

        Parameters
        ----------
        options : StoredOptions or any object with the same attributes
            (e.g. ``modescope.core.engine.options.AnalysisOptions``).
        """
        for name in ("rank", "color", "downscale", "recursive", "resize_mismatched"):
            if not hasattr(options, name):
                raise TypeError(f"options must have a {name!r} attribute, "
                                f"got {type(options).__name__}")
        color = str(options.color)
        if color not in _COLORS:
            raise ValueError(f"options.color must be one of {', '.join(_COLORS)}; got {color!r}")
        s = self._store
        s.setValue("options/rank", int(options.rank))
        s.setValue("options/color", color)
        s.setValue("options/downscale", int(options.downscale))
        s.setValue("options/recursive", bool(options.recursive))
        s.setValue("options/resize_mismatched", bool(options.resize_mismatched))

    # ----- files -------------------------------------------------------------------------------
    def recent_files(self) -> list[str]:
        """Return analysis files opened or saved, most recent first (at most MAX_RECENT)."""
        return _to_str_list(self._store.value("files/recent", []))[:MAX_RECENT]

    def set_recent_files(self, paths: Iterable[str]) -> None:
        """Replace the list of recent analysis files."""
        unique: list[str] = []
        for p in paths:
            p = os.fspath(p)
            if p and p not in unique:
                unique.append(p)
        self._store.setValue("files/recent", unique[:MAX_RECENT])

    def add_recent_file(self, path: str) -> list[str]:
        """Put ``path`` first in the recent files (absolute path) and return the new list.

        The file also becomes what was opened last (:meth:`last_opened` is ``"file"``).
        """
        path = os.path.abspath(os.fspath(path))
        files = [path] + [p for p in self.recent_files() if p != path]
        self.set_recent_files(files)
        self._store.setValue("session/last", "file")
        return self.recent_files()

    def remove_recent_file(self, path: str) -> list[str]:
        """Drop ``path`` from the recent files and return the new list."""
        self.set_recent_files(p for p in self.recent_files() if p != path)
        return self.recent_files()

    def last_folders(self) -> list[str]:
        """Return the sources of the last run started on folders or image files ([] when
        none)."""
        return _to_str_list(self._store.value("session/folders", []))

    def set_last_folders(self, paths: Iterable[str]) -> None:
        """Remember the sources a run starts on (absolute paths) as what was opened last.

        Parameters
        ----------
        paths : iterable of str or path-like
            Folders and/or image files; an empty iterable forgets them.

        Raises
        ------
        TypeError
            If ``paths`` is a single string or holds something that is not a path.
        """
        if isinstance(paths, (str, bytes)):
            raise TypeError(f"paths must be an iterable of paths, not a single string: "
                            f"{paths!r}")
        unique: list[str] = []
        for p in paths:
            if not isinstance(p, (str, os.PathLike)):
                raise TypeError(f"paths must hold str paths, got {type(p).__name__}")
            p = os.path.abspath(os.fspath(p))
            if p not in unique:
                unique.append(p)
        self._store.setValue("session/folders", unique)
        self._store.setValue("session/last", "folders" if unique else "")

    def last_opened(self) -> str:
        """Return what was opened last: ``"file"`` (the first of :meth:`recent_files`),
        ``"folders"`` (:meth:`last_folders`) or ``""`` when nothing is remembered."""
        value = self._store.value("session/last", "")
        return value if isinstance(value, str) and value in LAST_KINDS else ""

    def last_dir(self) -> str:
        """Return the folder file dialogs open in ("" when unknown)."""
        value = self._store.value("dialogs/last_dir", "")
        return value if isinstance(value, str) else ""

    def set_last_dir(self, path: str) -> None:
        """Remember the folder file dialogs open in."""
        self._store.setValue("dialogs/last_dir", os.fspath(path))

    def export_folder(self) -> str:
        """Return the folder the last export wrote into ("" when none)."""
        value = self._store.value("export/folder", "")
        return value if isinstance(value, str) else ""

    def set_export_folder(self, path: str) -> None:
        """Remember the folder an export writes into."""
        self._store.setValue("export/folder", os.fspath(path))

    # ----- window ------------------------------------------------------------------------------
    def window_geometry(self) -> QByteArray:
        """Return the saved ``QMainWindow.saveGeometry()`` (empty when none)."""
        return _to_bytes(self._store.value("window/geometry"))

    def set_window_geometry(self, data: QByteArray) -> None:
        """Remember ``QMainWindow.saveGeometry()``."""
        self._store.setValue("window/geometry", QByteArray(data))

    def window_state(self) -> QByteArray:
        """Return the saved ``QMainWindow.saveState()`` (empty when none)."""
        return _to_bytes(self._store.value("window/state"))

    def set_window_state(self, data: QByteArray) -> None:
        """Remember ``QMainWindow.saveState()``."""
        self._store.setValue("window/state", QByteArray(data))
