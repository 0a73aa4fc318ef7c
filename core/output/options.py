"""The options of an export, checked once when they are made."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from modescope.core.output.encode import FORMATS
from modescope.core.validation import (check_bool, check_callable, check_choice, check_float,
                                       check_int)

__all__ = ["WHAT_CHOICES", "ExportOptions"]

#: Parts of an export, in the order they are written.
WHAT_CHOICES = ("spectrum", "weights", "model", "basis", "sheet", "previews", "quality")


def _parse_what(what) -> tuple[str, ...]:
    if isinstance(what, str):
        parts = [p.strip() for p in what.split(",") if p.strip()]
    else:
        try:
            parts = list(what)
        except TypeError:
            raise TypeError(f"what must be a comma-separated string or a sequence of names, got "
                            f"{type(what).__name__}") from None
    if not parts:
        raise ValueError(f"what must name at least one of {', '.join(WHAT_CHOICES)}")
    for p in parts:
        check_choice("what", p, WHAT_CHOICES)
    return tuple(w for w in WHAT_CHOICES if w in parts)


def _parse_images(images) -> str | tuple:
    """Return "all", "flagged", a tuple of int indices or a tuple of bools (a mask)."""
    if isinstance(images, str):
        return check_choice("images", images, ("all", "flagged"))
    try:
        arr = np.asarray(images)
    except (TypeError, ValueError):
        arr = np.asarray(None, dtype=object)
    if arr.ndim == 1 and arr.size == 0:
        return ()
    if arr.ndim == 1 and arr.dtype == np.bool_:
        return tuple(bool(v) for v in arr)
    if arr.ndim == 1 and np.issubdtype(arr.dtype, np.integer):
        return tuple(int(v) for v in arr)
    raise TypeError(f"images must be 'all', 'flagged', a sequence of integer indices or a "
                    f"boolean mask; got {type(images).__name__} of dtype {arr.dtype}")


@dataclass(frozen=True)
class ExportOptions:
    """What an export writes and how; every field is checked when the options are made.

    Attributes
    ----------
    rank : int
        k, at least 1 (at most the model's rank, checked by
        :func:`~modescope.core.output.export.plan_export`).
    what : str or sequence of str
        Parts from :data:`WHAT_CHOICES` (a comma-separated string is accepted); stored as a
        tuple in :data:`WHAT_CHOICES` order.
    image_format : {"png", "jpg", "webp", "tiff"}
        Preview format.
    quality : int
        1..100, JPEG and WebP quality.
    images : "all", "flagged", sequence of int or bool mask
        Images for previews, the weights table and the quality table (see
        :func:`~modescope.core.output.naming.select_images`); a sequence is stored as a tuple.
    level : float
        Confidence level of "flagged", in (0, 1).
    upsample : bool
        Write previews at the source size recorded in ``metadata["source_size"]``.
    float16 : bool
        Store mean, basis and weights of the compact model as float16.
    sheet_count : int
        Tiles on the contact sheet, at least 1 (at most k are drawn).
    overwrite : bool
        Allow replacing existing files.
    allow_source_folder : bool
        Allow writing into a folder that holds source images.
    loader : callable, optional
        ``loader(decomposition, index)`` returning the source image at analysis resolution,
        shape ``image_shape``, for the quality table; default
        :func:`modescope.core.engine.pipeline.load_analysis_image`.

    Raises
    ------
    TypeError, ValueError
        For a wrong field (the message names the option).

    Examples
    --------
    >>> ExportOptions(rank=5, what="previews,spectrum").what
    ('spectrum', 'previews')
    """

    rank: int
    what: Any = WHAT_CHOICES
    image_format: str = "png"
    quality: int = 90
    images: Any = "all"
    level: float = 0.99
    upsample: bool = False
    float16: bool = False
    sheet_count: int = 16
    overwrite: bool = False
    allow_source_folder: bool = False
    loader: Callable | None = None

    def __post_init__(self) -> None:
        checked = {
            "rank": check_int("rank", self.rank, minimum=1),
            "what": _parse_what(self.what),
            "image_format": check_choice("image_format", self.image_format, FORMATS),
            "quality": check_int("quality", self.quality, minimum=1, maximum=100),
            "images": _parse_images(self.images),
            "level": check_float("level", self.level, low=0.0, high=1.0, low_open=True,
                                 high_open=True),
            "sheet_count": check_int("sheet_count", self.sheet_count, minimum=1),
            "loader": check_callable("loader", self.loader),
        }
        for name in ("upsample", "float16", "overwrite", "allow_source_folder"):
            checked[name] = check_bool(name, getattr(self, name))
        for name, value in checked.items():
            object.__setattr__(self, name, value)
