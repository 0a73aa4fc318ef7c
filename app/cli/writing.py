"""Checks every verb makes before it writes a file: never over a source, never over an existing
file without ``--overwrite``; messages name the command-line options.

The rule itself lives in core (:func:`modescope.core.output.atomic.refuse_sources`); this module
only words it for the command line.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

from modescope.core.output.atomic import DestinationError, refuse_sources

__all__ = ["check_output", "model_name", "same_file"]


def model_name(path) -> Path:
    """Return the model file name that is written for ``path`` (``.npz`` added when missing)."""
    path = Path(path)
    return path if path.suffix.lower() == ".npz" else path.with_name(path.name + ".npz")


def same_file(a, b) -> bool:
    """Return True if ``a`` and ``b`` name the same file (same name, or both exist and are one)."""
    if os.path.normcase(os.path.abspath(a)) == os.path.normcase(os.path.abspath(b)):
        return True
    try:
        return os.path.samefile(a, b)
    except (OSError, ValueError):
        return False


def _say(command: str, message: str) -> None:
    print(f"modescope {command}: error: {message}", file=sys.stderr)


def check_output(command: str, option: str, target, *, overwrite: bool, sources=(),
                 inputs=()) -> bool:
    """Check a file a verb is about to write; print why it is refused.

    Parameters
    ----------
    command : str
        The verb, e.g. "analyze".
    option : str
        The option that named the file, e.g. "-o" or "--csv".
    target : str or os.PathLike
        The file to write.
    overwrite : bool
        Whether ``--overwrite`` was given.
    sources : iterable of str or os.PathLike
        Source images (of the analysis or named on the command line): never replaced.
    inputs : iterable of str or os.PathLike
        Other files the command reads (a model file): never replaced.

    Returns
    -------
    bool
        True when the file may be written; False after the refusal was printed on stderr.
    """
    try:
        refuse_sources(target, sources)
        refuse_sources(target, inputs, what="the model file this command reads")
    except DestinationError as exc:
        _say(command, f"{exc} (named by {option})")
        return False
    if Path(target).is_dir():
        _say(command, f"{option} {target}: is a folder; give a file name such as "
                      f"{Path(target) / 'out'}")
        return False
    if os.path.lexists(target) and not overwrite:
        _say(command, f"{option} {target}: the file already exists; pass --overwrite to "
                      f"replace it or choose another name")
        return False
    return True
