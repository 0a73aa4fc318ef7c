"""The sources that describe an analysis: the folders or files of its images, for the Sources
pane when an analysis file is opened (so the pane describes the analysis shown)."""

from __future__ import annotations

import os
from typing import Sequence

__all__ = ["sources_of_paths"]


def sources_of_paths(paths: Sequence[str]) -> list[str]:
    """Return the sources (folders and files) that describe the images of an analysis.

    The files are grouped by folder, in the order they first appear. A folder is given whole
    when every image file directly in it (of the supported kinds) is one of ``paths``;
    otherwise its files are listed one by one, so the Sources pane never describes more than
    the analysis holds. Files that no longer exist are listed as they are (the pane reports
    them).

    Parameters
    ----------
    paths : sequence of str
        The image paths of an analysis (``Decomposition.paths``; repeats for pages are fine).

    Returns
    -------
    list of str
        Absolute folder and file paths.

    Raises
    ------
    TypeError
        If ``paths`` is a single string or holds something other than paths.
    """
    from modescope.core.sources.scan import SUPPORTED_SUFFIXES

    if isinstance(paths, (str, bytes)):
        raise TypeError("paths must be a sequence of paths, got a single string")
    folders: dict[str, list[str]] = {}
    for p in paths:
        if not isinstance(p, (str, os.PathLike)):
            raise TypeError(f"paths must hold paths, got {type(p).__name__}")
        full = os.path.abspath(os.fspath(p))
        folders.setdefault(os.path.dirname(full), [])
        if full not in folders[os.path.dirname(full)]:
            folders[os.path.dirname(full)].append(full)
    out: list[str] = []
    for folder, files in folders.items():
        try:
            present = {os.path.join(folder, e.name) for e in os.scandir(folder)
                       if e.is_file() and os.path.splitext(e.name)[1].lower()
                       in SUPPORTED_SUFFIXES}
        except OSError:
            present = None                 # the folder is gone or unreadable: list the files
        if present and present <= set(files):
            out.append(folder)
        else:
            out.extend(files)
    return out
