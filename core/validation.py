"""Small shared validation helpers: each message names the parameter, what was expected and
what was found."""

from __future__ import annotations

import numbers
from typing import Any, Iterable


def check_int(name: str, value: Any, *, minimum: int | None = None,
              maximum: int | None = None) -> int:
    """Return ``value`` as an int, or raise TypeError/ValueError naming ``name``."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise TypeError(f"{name} must be an integer, got {type(value).__name__} {value!r}")
    value = int(value)
    if minimum is not None and value < minimum:
        raise ValueError(f"{name} must be at least {minimum}, got {value}")
    if maximum is not None and value > maximum:
        raise ValueError(f"{name} must be at most {maximum}, got {value}")
    return value


def check_float(name: str, value: Any, *, low: float | None = None, high: float | None = None,
                low_open: bool = False, high_open: bool = False) -> float:
    """Return ``value`` as a float in the stated range, or raise naming ``name``."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a number, got {type(value).__name__} {value!r}")
    value = float(value)
    if value != value:
        raise ValueError(f"{name} must be a number, got NaN")
    if low is not None and (value < low or (low_open and value == low)):
        raise ValueError(f"{name} must be {'>' if low_open else '>='} {low}, got {value}")
    if high is not None and (value > high or (high_open and value == high)):
        raise ValueError(f"{name} must be {'<' if high_open else '<='} {high}, got {value}")
    return value


def check_choice(name: str, value: Any, choices: Iterable[str]) -> str:
    """Return ``value`` if it is one of ``choices``, or raise naming ``name``."""
    choices = tuple(choices)
    if not isinstance(value, str):
        raise TypeError(f"{name} must be one of {', '.join(choices)}; got {type(value).__name__}")
    if value not in choices:
        raise ValueError(f"{name} must be one of {', '.join(choices)}; got {value!r}")
    return value
