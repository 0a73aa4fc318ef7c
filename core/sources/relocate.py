"""Find the source files of an analysis again after they were moved to another folder.

An analysis records the absolute path of every image. When the collection is moved (another
disk, a renamed folder, a copy on another machine), the reconstruction, the residual and the
exports can no longer read the images. :func:`relocate_sources` takes the folder where the files
now are and re-bases every missing file:

1. by its path relative to the old folders: the longest trailing part of the old path (its
   folders below the old root, then fewer of them, down to the file name alone) that exists
   under the new folder;
2. else by its file name, anywhere below the new folder: among the files of that name that
   match, the one sharing the most trailing folder names with the old path (so choosing the
   folder above the moved one works too); none when two share the most.

Two old files never land on the same new file: when they would, neither is taken.

A candidate is taken only when it is the same collection: its header is read and the page the
analysis used must be there at the size the analysis read (``source_size`` in the metadata;
any size when the analysis resized mismatched images). Files still at their recorded place are
kept as they are. Nothing is written and no source is modified.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Callable

from modescope.core.decomposition import Decomposition
from modescope.core.errors import AnalysisCancelled, ModescopeError
from modescope.core.sources.frames import FrameRange
from modescope.core.sources.scan import Problem, _is_hidden, scan_sources
from modescope.core.sources.sequences import is_sequence

__all__ = ["Relocation", "missing_sources", "relocate_sources"]


@dataclass(frozen=True)
class Relocation:
    """What :func:`relocate_sources` found.

    Attributes
    ----------
    decomposition : Decomposition
        The analysis with the found files' new paths (every other field unchanged).
    moved : dict of str to str
        Old path -> new path of every file found at a new place.
    missing : tuple of str
        Old paths still not found (not under the folder, or no candidate matched).
    problems : tuple of Problem
        Candidates that were looked at and refused, each with the reason (another size, a page
        missing, a name found in several places).
    """

    decomposition: Decomposition
    moved: dict
    missing: tuple
    problems: tuple

    @property
    def n_images_moved(self) -> int:
        """Number of images (pages included) whose path changed."""
        return sum(1 for p in self.decomposition.paths if p in self.moved.values())


def missing_sources(decomposition: Decomposition) -> tuple[str, ...]:
    """Return the source files of ``decomposition`` that are not at their recorded path.

    Parameters
    ----------
    decomposition : Decomposition

    Returns
    -------
    tuple of str
        Distinct paths, in the analysis' order; empty when every file is in place (or the
        analysis records no paths).

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition.
    """
    _check_decomposition(decomposition)
    return tuple(p for p in dict.fromkeys(decomposition.paths) if not os.path.isfile(p))


def relocate_sources(decomposition: Decomposition, folder, *,
                     cancel: Callable[[], bool] | None = None) -> Relocation:
    """Re-base the missing source files of an analysis onto the folder they were moved to.

    Parameters
    ----------
    decomposition : Decomposition
        An analysis whose ``paths`` name its source files (for instance from
        :func:`modescope.core.output.model_file.load_model`).
    folder : str or os.PathLike
        The folder where the files are now (the moved collection's folder or one above it).
    cancel : callable, optional
        Returns True to stop; checked before each file. Raises ``AnalysisCancelled``.

    Returns
    -------
    Relocation
        The analysis with the new paths, which files moved, which are still missing, and why
        candidates were refused.

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition or ``folder`` is not a path.
    ValueError
        If ``folder`` is not an existing folder.
    ModescopeError
        If the analysis records no source files.
    AnalysisCancelled
        If ``cancel()`` returned True.

    Examples
    --------
    >>> found = relocate_sources(d, "/media/disk/tray")            # doctest: +SKIP
    >>> found.missing, len(found.moved)                           # doctest: +SKIP
    ((), 240)
    """
    _check_decomposition(decomposition)
    if not isinstance(folder, (str, os.PathLike)):
        raise TypeError(f"folder must be a str or path-like, got {type(folder).__name__}")
    folder = os.path.abspath(os.fspath(folder))
    if not os.path.isdir(folder):
        raise ValueError(f"folder must be an existing folder, got {folder!r} "
                         f"({'a file' if os.path.exists(folder) else 'not found'})")
    d = decomposition
    if not d.paths:
        raise ModescopeError("this analysis does not record its source files, so they cannot "
                             "be located")
    cancel = cancel or (lambda: False)
    pages = _pages_by_file(d)
    missing = [p for p in pages if not os.path.isfile(p)]
    root = _common_folder(list(pages))
    by_name: dict | None = None        # file name -> paths under the folder, made on first need
    moved, problems, still = {}, [], []
    for old in missing:
        if cancel():
            raise AnalysisCancelled("locating the sources was cancelled")
        found = _by_relative_path(old, root, folder, pages[old], d, problems)
        if found is None:
            if by_name is None:
                by_name = _files_by_name(folder, cancel)
            found = _by_name(old, by_name, pages[old], d, problems)
        if found is None:
            still.append(old)
        else:
            moved[old] = found
    _drop_shared(moved, still, problems)
    new_paths = tuple(moved.get(p, p) for p in d.paths)
    unique = tuple(dict.fromkeys(problems))     # a candidate met by both rules is told once
    return Relocation(d.replace(paths=new_paths), moved, tuple(still), unique)


def _check_decomposition(decomposition) -> None:
    if not isinstance(decomposition, Decomposition):
        raise TypeError(f"decomposition must be a Decomposition, got "
                        f"{type(decomposition).__name__}")


def _pages_by_file(d: Decomposition) -> dict[str, list[int]]:
    """Every distinct file of ``d`` (in order) with the pages the analysis used."""
    pages: dict[str, list[int]] = {}
    page_of = d.pages if d.pages is not None else [0] * len(d.paths)
    for p, g in zip(d.paths, page_of):
        pages.setdefault(p, []).append(int(g))
    return pages


def _common_folder(paths: list[str]) -> str:
    """The deepest folder holding every path ("" when there is none in common)."""
    folders = [os.path.dirname(p) for p in paths]
    if not folders:
        return ""
    try:
        return os.path.commonpath(folders)
    except ValueError:                  # mixed drives or relative and absolute paths
        return ""


def _by_relative_path(old: str, root: str, folder: str, pages: list[int], d: Decomposition,
                      problems: list[Problem]) -> str | None:
    """The first matching candidate among the trailing parts of ``old``, longest first."""
    rel = os.path.relpath(old, root) if root else os.path.basename(old)
    parts = [q for q in rel.split(os.sep) if q not in ("", os.curdir, os.pardir)]
    seen = set()
    for k in range(len(parts), 0, -1):
        candidate = os.path.join(folder, *parts[-k:])
        if candidate in seen or not os.path.isfile(candidate):
            continue
        seen.add(candidate)
        reason = _mismatch(candidate, pages, d)
        if reason is None:
            return candidate
        problems.append(Problem(candidate, f"not taken for {old}: {reason}"))
    return None


def _files_by_name(folder: str, cancel: Callable[[], bool]) -> dict[str, list[str]]:
    """File name -> every path with that name below ``folder`` (hidden folders skipped)."""
    names: dict[str, list[str]] = {}
    for here, dirs, files in os.walk(folder):
        if cancel():
            raise AnalysisCancelled("locating the sources was cancelled")
        dirs[:] = sorted(x for x in dirs if not _is_hidden(x))
        for name in sorted(files):
            names.setdefault(name, []).append(os.path.join(here, name))
    return names


def _by_name(old: str, by_name: dict[str, list[str]], pages: list[int], d: Decomposition,
             problems: list[Problem]) -> str | None:
    """The one file below the folder named like ``old`` that matches, else None."""
    candidates = by_name.get(os.path.basename(old), [])
    fitting = []
    for candidate in candidates:
        reason = _mismatch(candidate, pages, d)
        if reason is None:
            fitting.append(candidate)
        else:
            problems.append(Problem(candidate, f"not taken for {old}: {reason}"))
    if not fitting:
        return None
    scores = [_shared_tail(old, c) for c in fitting]
    best = max(scores)
    tied = [c for c, score in zip(fitting, scores) if score == best]
    if len(tied) == 1:
        return tied[0]
    problems.append(Problem(old, f"{len(tied)} files of this name match equally well (first "
                                 f"{tied[0]}, {tied[1]}); none taken, so that no image is "
                                 "swapped for another"))
    return None


def _shared_tail(a: str, b: str) -> int:
    """How many trailing parts (file name, then folders) paths ``a`` and ``b`` share."""
    pa, pb = a.split(os.sep)[::-1], b.split(os.sep)[::-1]
    n = 0
    while n < min(len(pa), len(pb)) and pa[n] == pb[n]:
        n += 1
    return n


def _drop_shared(moved: dict, still: list, problems: list[Problem]) -> None:
    """Refuse every new file claimed by more than one old file (in place)."""
    claims: dict[str, list[str]] = {}
    for old, new in moved.items():
        claims.setdefault(new, []).append(old)
    for new, olds in claims.items():
        if len(olds) > 1:
            for old in olds:
                del moved[old]
                still.append(old)
            problems.append(Problem(new, f"would stand for {len(olds)} files of the analysis "
                                         f"(first {olds[0]}, {olds[1]}); taken for none"))


def _mismatch(candidate: str, pages: list[int], d: Decomposition) -> str | None:
    """Why ``candidate`` is not the file the analysis read (None when its header fits)."""
    meta = d.metadata
    color = meta.get("color", "gray" if d.image_shape[2] == 1 else "rgb")
    frames = FrameRange(min(pages), max(pages) + 1) if is_sequence(candidate) else None
    try:
        found = scan_sources([candidate], color=color, resize_mismatched=True, frames=frames)
    except ModescopeError as exc:
        return f"cannot be read ({exc})"
    sizes = {r.page: tuple(r.size) for r in found.images}
    absent = [g for g in pages if g not in sizes]
    if absent:
        return (f"page {absent[0]} is not in it" if len(absent) == 1
                else f"{len(absent)} of its pages are not in it (first {absent[0]})")
    reference = meta.get("source_size")
    if reference is None or bool(meta.get("resize_mismatched", False)):
        return None
    reference = tuple(int(v) for v in reference)
    for g in pages:
        if sizes[g] != reference:
            rows, cols = sizes[g]
            return (f"size {rows}x{cols} differs from the analysis' "
                    f"{reference[0]}x{reference[1]}")
    return None
