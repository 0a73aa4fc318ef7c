"""Names and choice of exported images.

Preview file names are ``<stem>_r<k>.<ext>`` with ``<stem>`` the source file name without its
suffix; ``_p<page>`` (page numbered from 0, as stored) is added before ``_r<k>`` when the source
file contributes more than one image or its page is not 0. When two images would get the same
name (compared case-insensitively, as on Windows and macOS), e.g. equal stems in different
folders, each of them gets ``_i<index>`` added, ``index`` being its column in the model
(0-based). The rule is applied over all images of the model, so an image's name does not depend
on which images are chosen.
"""

from __future__ import annotations

from collections import Counter
from pathlib import PurePath
from typing import Sequence

import numpy as np

from modescope.core.decomposition import Decomposition
from modescope.core.output.encode import FORMATS
from modescope.core.validation import check_choice, check_instance, check_int

__all__ = ["base_names", "preview_names", "select_images"]


def base_names(decomposition: Decomposition) -> list[str]:
    """Return the name of every image of the model without rank and suffix.

    Parameters
    ----------
    decomposition : Decomposition

    Returns
    -------
    list of str, one per image column
        Unique case-insensitively (see the module docstring for the rule).

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition.
    """
    d = check_instance("decomposition", decomposition, Decomposition)
    m = d.n_images
    if not d.paths:
        width = len(str(max(m - 1, 0)))
        return [f"image_{i:0{width}d}" for i in range(m)]
    counts = Counter(d.paths)
    bases = []
    for i, p in enumerate(d.paths):
        stem = PurePath(str(p)).stem or f"image_{i}"
        page = int(d.pages[i])
        if counts[p] > 1 or page != 0:
            stem = f"{stem}_p{page}"
        bases.append(stem)
    return _resolve_collisions(bases)


def _resolve_collisions(bases: list[str]) -> list[str]:
    """Add ``_i<index>`` to every name shared case-insensitively, until none is shared."""
    m = len(bases)
    suffixed = [False] * m
    for _ in range(m + 1):
        folded = Counter(b.casefold() for b in bases)
        clash = [i for i in range(m) if folded[bases[i].casefold()] > 1 and not suffixed[i]]
        if not clash:
            break
        for i in clash:
            bases[i] = f"{bases[i]}_i{i}"
            suffixed[i] = True
    return bases


def preview_names(decomposition: Decomposition, indices: Sequence[int], rank: int,
                  image_format: str = "png") -> list[str]:
    """Return the preview file names of the given images (see the module docstring).

    Parameters
    ----------
    decomposition : Decomposition
    indices : sequence of int
        Image columns.
    rank : int
        k, written as ``_r<k>``.
    image_format : {"png", "jpg", "webp", "tiff"}

    Returns
    -------
    list of str
        Bare file names, unique case-insensitively.

    Raises
    ------
    TypeError, ValueError
        If an argument has the wrong type or value.
    """
    d = check_instance("decomposition", decomposition, Decomposition)
    ext = FORMATS[check_choice("image_format", image_format, FORMATS)]
    k = check_int("rank", rank, minimum=0)
    bases = base_names(d)
    return [f"{bases[int(i)]}_r{k}{ext}" for i in indices]


def select_images(decomposition: Decomposition, images="all", *, rank: int | None = None,
                  level: float = 0.99) -> np.ndarray:
    """Return the image columns chosen by ``images``.

    Parameters
    ----------
    decomposition : Decomposition
    images : "all", "flagged", sequence of int, or bool array of shape (n_images,)
        "flagged" takes the images flagged by
        :func:`modescope.core.review.outliers.score_table` at ``rank`` and ``level``. Integer
        indices are 0-based columns; duplicates are dropped, order kept.
    rank : int, optional
        Rank for "flagged" (default: the model's rank).
    level : float
        Confidence level for "flagged", in (0, 1).

    Returns
    -------
    ndarray of int64

    Raises
    ------
    TypeError
        If ``images`` is none of the accepted kinds.
    ValueError
        If ``images`` is an unknown word, a mask of the wrong length or holds indices out of
        range.
    """
    d = check_instance("decomposition", decomposition, Decomposition)
    m = d.n_images
    if isinstance(images, str):
        check_choice("images", images, ("all", "flagged"))
        if images == "all":
            return np.arange(m, dtype=np.int64)
        from modescope.core.review.outliers import score_table
        table = score_table(d, rank, level)
        return np.flatnonzero(np.asarray(table.flag, dtype=bool)).astype(np.int64)
    arr = np.asarray(images)
    if arr.dtype == np.bool_:
        if arr.shape != (m,):
            raise ValueError(f"images as a mask must have shape ({m},), got {arr.shape}")
        return np.flatnonzero(arr).astype(np.int64)
    if arr.ndim != 1 or (arr.size and not np.issubdtype(arr.dtype, np.integer)):
        raise TypeError(f"images must be 'all', 'flagged', a sequence of integer indices or a "
                        f"boolean mask; got {type(images).__name__} of dtype {arr.dtype}")
    arr = arr.astype(np.int64)
    bad = arr[(arr < 0) | (arr >= m)]
    if bad.size:
        raise ValueError(f"images must be indices 0..{m - 1}, got {bad[:5].tolist()}")
    _, first = np.unique(arr, return_index=True)
    return arr[np.sort(first)]
