"""Wording shared by both front ends (the command line and the desktop program)."""

from __future__ import annotations

__all__ = ["counted"]


def counted(n: int, noun: str, plural: str | None = None) -> str:
    """Return a count with thousands separators and the noun in the number it needs.

    Parameters
    ----------
    n : int
        How many.
    noun : str
        The noun in the singular.
    plural : str, optional
        The plural when it is not ``noun + "s"``.

    Examples
    --------
    >>> counted(1, "image"), counted(2345, "image"), counted(2, "pass", "passes")
    ('1 image', '2,345 images', '2 passes')
    """
    n = int(n)
    return f"{n:,} {noun if n == 1 else (plural or noun + 's')}"
