"""Wording shared by both front ends (the command line and the desktop program)."""

from __future__ import annotations

__all__ = ["counted", "unexplained"]


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


def unexplained(share: float) -> str:
    """Return the share of a fit left unexplained (0..1) as a short percentage.

    Examples
    --------
    >>> unexplained(0.0123), unexplained(2e-7)
    ('1.2 %', 'less than 0.01 %')
    """
    share = float(share)
    return "less than 0.01 %" if share < 1e-4 else f"{100 * share:.2g} %"
