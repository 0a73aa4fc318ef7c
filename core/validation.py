"""Small shared validation helpers: each message names the parameter, what was expected and
what was found."""

from __future__ import annotations

import numbers
import os
from pathlib import Path
from typing import Any, Iterable

import numpy as np


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


def check_bool(name: str, value: Any) -> bool:
    """Return ``value`` as a bool if it is True or False (numpy bools too), or raise TypeError
    naming ``name``."""
    if not isinstance(value, (bool, np.bool_)):
        raise TypeError(f"{name} must be True or False, got {type(value).__name__} {value!r}")
    return bool(value)


def check_callable(name: str, value: Any) -> Any:
    """Return ``value`` if it is callable or None, or raise TypeError naming ``name``."""
    if value is not None and not callable(value):
        raise TypeError(f"{name} must be a callable or None, got {type(value).__name__}")
    return value


def check_instance(name: str, value: Any, cls: type) -> Any:
    """Return ``value`` if it is an instance of ``cls``, or raise TypeError naming ``name``."""
    if not isinstance(value, cls):
        article = "an" if cls.__name__[:1].lower() in "aeiou" else "a"
        raise TypeError(f"{name} must be {article} {cls.__name__}, got {type(value).__name__}")
    return value


def check_path(name: str, value: Any) -> Path:
    """Return ``value`` (a non-empty str or os.PathLike path) as a Path, or raise naming ``name``.

    Raises
    ------
    TypeError
        If ``value`` is not a str or os.PathLike path (bytes paths are refused).
    ValueError
        If ``value`` is an empty string.
    """
    text = os.fspath(value) if isinstance(value, (str, os.PathLike)) else None
    if not isinstance(text, str):
        raise TypeError(f"{name} must be a path (str or os.PathLike), got "
                        f"{type(value).__name__} {value!r}")
    if not text:
        raise ValueError(f"{name} must be a non-empty path, got an empty string")
    return Path(text)
