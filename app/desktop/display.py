"""File names as text the workbench can show.

A file name on a POSIX disk is a string of bytes; Python gives the bytes that are not valid UTF-8
to a ``str`` as lone surrogates (``surrogateescape``), which Qt cannot hold: a label silently
drops them, so ``caf\\xe9.png`` would show as ``caf.png``. Every view shows paths through
:func:`display_path` or :func:`display_name`, which write such bytes as ``\\xNN`` (the same
spelling as the CSV files and the terminal).
"""

from __future__ import annotations

import os

__all__ = ["display_name", "display_path", "display_text"]


def display_text(text: str) -> str:
    """Return ``text`` with the bytes Python could not decode written as ``\\xNN``.

    Parameters
    ----------
    text : str
        Any text that may hold a file name (a message, a title).

    Returns
    -------
    str
        Text without lone surrogates; valid UTF-8 text is returned unchanged.

    Raises
    ------
    TypeError
        If ``text`` is not a str.
    """
    if not isinstance(text, str):
        raise TypeError(f"text must be a str, got {type(text).__name__}")
    try:
        raw = text.encode("utf-8", "surrogateescape")
    except UnicodeEncodeError:      # a surrogate outside the escaped-byte range
        raw = text.encode("utf-8", "surrogatepass")
    return raw.decode("utf-8", "backslashreplace")


def display_path(path) -> str:
    """Return a path as text Qt can show (bytes that are not valid UTF-8 as ``\\xNN``).

    Parameters
    ----------
    path : str, bytes or os.PathLike
        A file or folder name, as the file system gave it.

    Returns
    -------
    str

    Raises
    ------
    TypeError
        If ``path`` is not a path.
    """
    if not isinstance(path, (str, bytes, os.PathLike)):
        raise TypeError(f"path must be a str, bytes or path-like, got {type(path).__name__}")
    path = os.fspath(path)
    if isinstance(path, bytes):
        return path.decode("utf-8", "backslashreplace")
    return display_text(path)


def display_name(path) -> str:
    """Return the last part of a path (a file name) as text Qt can show.

    A path ending in a separator gives its last folder's name; an empty result falls back to
    the whole path.

    Parameters
    ----------
    path : str, bytes or os.PathLike

    Returns
    -------
    str

    Raises
    ------
    TypeError
        If ``path`` is not a path.
    """
    text = display_path(path)
    return os.path.basename(text.rstrip(os.sep)) or text
