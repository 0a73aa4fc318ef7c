"""Error classes of Modescope's core.

Every error raised for unreadable or inconsistent input is a :class:`ModescopeError`, which
subclasses :class:`ValueError` so that callers that only know the standard library can still
catch it. Wrong argument types raise :class:`TypeError`, wrong argument values raise
:class:`ValueError`.
"""

from __future__ import annotations


class ModescopeError(ValueError):
    """Base class for unreadable or inconsistent input found by Modescope."""


class SourceError(ModescopeError):
    """An image source (file or folder) cannot be used."""


class NoUsableImagesError(SourceError):
    """The sources given hold no image that can be analysed."""


class ModelFileError(ModescopeError):
    """A model file is damaged, foreign or inconsistent."""


class AnalysisCancelled(Exception):
    """Raised inside a long routine when its cancel check answered True.

    Long routines catch it themselves and hand back a partial result; it only escapes from
    helpers that have nothing partial to return.
    """
