"""Review workflow: mark images as kept or excluded, list and export them, refit without them.

Marks live in ``decomposition.marks`` (int8, one per image) and are saved with the model file:

* ``0`` (:data:`NOT_REVIEWED`) not reviewed,
* ``1`` (:data:`KEEP`) reviewed and kept,
* ``2`` (:data:`EXCLUDE`) reviewed and excluded.

Functions that change marks return a new :class:`~modescope.core.decomposition.Decomposition`
(through ``Decomposition.replace``); the input is never modified. Exports are written
atomically (:func:`modescope.core.output.atomic.atomic_writer`: a temporary file in the same
folder, then :func:`os.replace`) and never replace an
existing file unless ``overwrite=True``. Source images are never moved, changed or deleted:
excluding an image only leaves it out of the next analysis.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path
from typing import Callable

import numpy as np

from modescope.core.validation import check_choice, check_instance, check_int
from modescope.core.output.atomic import atomic_writer
from modescope.core.output.tables import escape_undecodable
from modescope.core.decomposition import Decomposition
from modescope.core.errors import NoUsableImagesError
from modescope.core.review.outliers import OutlierTable

__all__ = [
    "NOT_REVIEWED", "KEEP", "EXCLUDE", "MARK_NAMES", "CSV_COLUMNS", "set_marks", "clear_marks",
    "excluded_indices", "kept_indices", "flagged_indices", "table_rows", "write_csv",
    "write_path_list", "remaining_sources", "refit_without_excluded",
]

NOT_REVIEWED = 0
KEEP = 1
EXCLUDE = 2
MARK_NAMES = {NOT_REVIEWED: "not reviewed", KEEP: "keep", EXCLUDE: "exclude"}
#: The outliers CSV's columns; ``method`` (added last, so the earlier columns keep their places)
#: names how the Q limit was computed (a key of ``core.review.qlimit.Q_METHOD_NAMES``).
CSV_COLUMNS = ("number", "path", "page", "score", "q", "q_limit", "t2", "t2_limit", "flag", "mark",
               "method")
_WHICH = ("flagged", "excluded", "all")


def _check_decomposition(decomposition) -> Decomposition:
    return check_instance("decomposition", decomposition, Decomposition)


def _check_indices(decomposition: Decomposition, indices) -> np.ndarray:
    n = decomposition.n_images
    if isinstance(indices, (str, bytes)):
        raise TypeError(f"indices must be integers, got {type(indices).__name__}")
    if isinstance(indices, (int, np.integer)) and not isinstance(indices, bool):
        indices = [indices]
    arr = np.asarray(list(indices) if not isinstance(indices, np.ndarray) else indices)
    if arr.size == 0:
        return np.zeros(0, dtype=np.intp)
    if arr.dtype == bool or not np.issubdtype(arr.dtype, np.integer):
        raise TypeError(f"indices must be integers, got an array of {arr.dtype}")
    arr = arr.ravel().astype(np.intp)
    bad = arr[(arr < 0) | (arr >= n)]
    if bad.size:
        raise ValueError(f"indices must lie in 0..{n - 1} for {n} images, got {int(bad[0])}")
    return arr


def set_marks(decomposition: Decomposition, indices, mark: int) -> Decomposition:
    """Return a copy of the decomposition with some images marked.

    Parameters
    ----------
    decomposition : Decomposition
    indices : int or iterable of int
        Image columns to mark.
    mark : int
        0 not reviewed, 1 keep, 2 exclude.

    Returns
    -------
    Decomposition
        New object with new ``marks``; the input is unchanged.

    Raises
    ------
    TypeError
        If an index or the mark is not an integer.
    ValueError
        If an index is out of range or the mark is not 0, 1 or 2.
    """
    d = _check_decomposition(decomposition)
    idx = _check_indices(d, indices)
    mark = check_int("mark", mark, minimum=NOT_REVIEWED, maximum=EXCLUDE)
    marks = np.array(d.marks, dtype=np.int8, copy=True)
    marks[idx] = mark
    return d.replace(marks=marks)


def clear_marks(decomposition: Decomposition) -> Decomposition:
    """Return a copy of the decomposition with every mark reset to 0 (not reviewed)."""
    d = _check_decomposition(decomposition)
    return d.replace(marks=np.zeros(d.n_images, dtype=np.int8))


def excluded_indices(decomposition: Decomposition) -> np.ndarray:
    """Return the columns of images marked excluded, ascending (shape (m,), int)."""
    d = _check_decomposition(decomposition)
    return np.flatnonzero(np.asarray(d.marks) == EXCLUDE)


def kept_indices(decomposition: Decomposition) -> np.ndarray:
    """Return the columns of images not marked excluded (marks 0 and 1), ascending."""
    d = _check_decomposition(decomposition)
    return np.flatnonzero(np.asarray(d.marks) != EXCLUDE)


def _check_table(decomposition: Decomposition, table) -> OutlierTable:
    if not isinstance(table, OutlierTable):
        raise TypeError(f"table must be an OutlierTable, got {type(table).__name__}")
    if table.n_images != decomposition.n_images:
        raise ValueError(f"table scores {table.n_images} images but the decomposition has "
                         f"{decomposition.n_images}; score this decomposition")
    return table


def flagged_indices(table: OutlierTable) -> np.ndarray:
    """Return the columns of flagged images, most unusual first."""
    if not isinstance(table, OutlierTable):
        raise TypeError(f"table must be an OutlierTable, got {type(table).__name__}")
    return table.flagged_indices()


def _selected(decomposition: Decomposition, table: OutlierTable | None, which: str
              ) -> np.ndarray:
    """Indices chosen by ``which``, most unusual first when a table is given."""
    which = check_choice("which", which, _WHICH)
    n = decomposition.n_images
    marks = np.asarray(decomposition.marks)
    if table is None:
        if which == "flagged":
            raise ValueError("which='flagged' needs an outlier table (table=None given)")
        order = np.arange(n)
    else:
        order = np.asarray(table.order)
    if which == "flagged":
        return order[np.asarray(table.flag)[order]]
    if which == "excluded":
        return order[marks[order] == EXCLUDE]
    return order


def table_rows(decomposition: Decomposition, table: OutlierTable, which: str = "all"
               ) -> list[dict]:
    """Return one dict per image with the CSV columns, most unusual first.

    Parameters
    ----------
    decomposition : Decomposition
    table : OutlierTable
        Scores of this decomposition's images.
    which : {"flagged", "excluded", "all"}
        Rows to include.

    Returns
    -------
    list of dict
        Keys :data:`CSV_COLUMNS` plus ``index`` (the 0-based column; ``number`` is
        ``index + 1``, the 1-based image number both front ends show); numbers as Python
        int/float/bool.
    """
    d = _check_decomposition(decomposition)
    t = _check_table(d, table)
    paths = tuple(d.paths) if d.paths else ("",) * d.n_images
    rows = []
    for i in _selected(d, t, which):
        i = int(i)
        rows.append({
            "index": i, "number": i + 1, "path": paths[i], "page": int(d.pages[i]),
            "score": float(t.score[i]), "q": float(t.q[i]), "q_limit": float(t.limits.q_limit),
            "t2": float(t.t2[i]), "t2_limit": float(t.limits.t2_limit),
            "flag": bool(t.flag[i]), "mark": int(d.marks[i]),
            "method": t.limits.q_method,
        })
    return rows


def _atomic_write(path, text: str, overwrite: bool, protect=()) -> Path:
    """Write text to a temporary file beside ``path`` and move it into place.

    ``protect`` (the analysis' source files) can never be the destination, whatever
    ``overwrite`` says.
    """
    if not isinstance(overwrite, bool):
        raise TypeError(f"overwrite must be True or False, got {type(overwrite).__name__}")
    with atomic_writer(path, "w", overwrite, encoding="utf-8", newline="", fsync=True,
                       protect=protect) as fh:
        fh.write(text)
    return Path(path)


def _number(value: float) -> str:
    return repr(float(value))


def write_csv(path, decomposition: Decomposition, table: OutlierTable, which: str = "flagged",
              *, overwrite: bool = False) -> Path:
    """Write the flagged, excluded or all images with their scores as CSV.

    The file is UTF-8 with a header row and the columns ``number, path, page, score, q, q_limit,
    t2, t2_limit, flag, mark, method`` (number: the image's 1-based number, its column + 1, as
    the workbench and the command line show it; flag 1/0, mark 0/1/2; method: how the Q limit
    was computed, a key of :data:`~modescope.core.review.qlimit.Q_METHOD_NAMES`; numbers written
    so they read back exactly), rows most unusual first.
    Bytes of a file name that are not valid UTF-8 are written as ``\\xNN``
    (:func:`~modescope.core.output.tables.escape_undecodable`).

    Parameters
    ----------
    path : str or path-like
        File to write.
    decomposition : Decomposition
    table : OutlierTable
        Scores of this decomposition's images (:func:`~modescope.core.review.outliers.score_table`).
    which : {"flagged", "excluded", "all"}
        Rows to write (default "flagged").
    overwrite : bool
        Replace an existing file (default False).

    Returns
    -------
    pathlib.Path
        The file written.

    Raises
    ------
    TypeError, ValueError
        On wrong arguments or a table of another decomposition.
    DestinationError
        If ``path`` exists and ``overwrite`` is False, its folder does not exist, or the file
        cannot be written (no partial or temporary file is left).
    """
    rows = table_rows(decomposition, table, which)
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    for row in rows:
        writer.writerow([row["number"], escape_undecodable(row["path"]), row["page"], _number(row["score"]),
                         _number(row["q"]), _number(row["q_limit"]), _number(row["t2"]),
                         _number(row["t2_limit"]), int(row["flag"]), row["mark"],
                         row["method"]])
    return _atomic_write(path, buf.getvalue(), overwrite, protect=decomposition.paths)


def write_path_list(path, decomposition: Decomposition, which: str = "excluded",
                    table: OutlierTable | None = None, *, overwrite: bool = False) -> Path:
    """Write the source files of the excluded or flagged images, one path per line.

    A multi-page file is listed once even when several of its pages are selected. Paths follow
    the table's order (most unusual first) when a table is given, column order otherwise.

    Parameters
    ----------
    path : str or path-like
        File to write (UTF-8, newline after every path; bytes of a name that are not valid
        UTF-8 written as ``\\xNN``, see :func:`~modescope.core.output.tables.escape_undecodable`).
    decomposition : Decomposition
        With ``paths``.
    which : {"excluded", "flagged", "all"}
        Images to list (default "excluded"); "flagged" needs ``table``.
    table : OutlierTable, optional
        Scores of this decomposition's images.
    overwrite : bool
        Replace an existing file (default False).

    Returns
    -------
    pathlib.Path

    Raises
    ------
    TypeError, ValueError
        On wrong arguments, a decomposition without paths, or "flagged" without a table.
    DestinationError
        If ``path`` exists and ``overwrite`` is False, its folder does not exist, or the file
        cannot be written (no partial or temporary file is left).
    """
    d = _check_decomposition(decomposition)
    if table is not None:
        _check_table(d, table)
    if not d.paths:
        raise ValueError("decomposition has no source paths to list")
    for p in d.paths:
        if "\n" in p or "\r" in p:
            raise ValueError(f"path {p!r} contains a line break and cannot be listed one per "
                             "line; write the CSV instead")
    seen: dict[str, None] = {}
    for i in _selected(d, table, which):
        seen.setdefault(d.paths[int(i)], None)
    text = "".join(f"{escape_undecodable(p)}\n" for p in seen)
    return _atomic_write(path, text, overwrite, protect=d.paths)


# ----- refit -------------------------------------------------------------------------------

def _options_from_metadata(decomposition: Decomposition):
    from modescope.core.engine.pipeline import AnalysisOptions

    stored = decomposition.metadata.get("options") if decomposition.metadata else None
    if stored is None:
        return AnalysisOptions()
    if not isinstance(stored, dict):
        raise ValueError("decomposition.metadata['options'] must be a dict of AnalysisOptions "
                         f"fields, got {type(stored).__name__}")
    return AnalysisOptions.from_dict(stored)


def remaining_sources(decomposition: Decomposition) -> list[tuple[str, int]]:
    """Return ``(path, page)`` of every image not marked excluded, in column order.

    Raises
    ------
    ValueError
        If the decomposition has no source paths.
    NoUsableImagesError
        If every image is excluded.
    """
    d = _check_decomposition(decomposition)
    if not d.paths:
        raise ValueError("decomposition has no source paths, so it cannot be refitted")
    keep = kept_indices(d)
    if keep.size == 0:
        raise NoUsableImagesError(f"all {d.n_images} images are marked excluded; nothing is "
                                  "left to analyse")
    return [(d.paths[int(i)], int(d.pages[int(i)])) for i in keep]


def refit_without_excluded(decomposition: Decomposition, options=None,
                           progress: Callable | None = None, cancel: Callable | None = None):
    """Analyse the collection again without the images marked excluded.

    Calls :func:`modescope.core.engine.pipeline.analyze` on the remaining images. When no file has
    only some of its pages excluded, the remaining files are passed as a list of paths; else
    the remaining (path, page) pairs are passed as ``only``, so the excluded pages are left
    out. The source files are only read.

    Parameters
    ----------
    decomposition : Decomposition
        With ``paths`` and ``marks``.
    options : AnalysisOptions, optional
        Defaults to the options stored in ``decomposition.metadata["options"]`` (a dict of
        AnalysisOptions fields; unknown keys are ignored), or AnalysisOptions() when absent.
    progress : callable, optional
        ``progress(Progress)``, passed to analyze.
    cancel : callable, optional
        ``cancel() -> bool``, passed to analyze.

    Returns
    -------
    AnalysisResult

    Raises
    ------
    TypeError
        If ``options`` is not AnalysisOptions or a callback is not callable.
    ValueError
        If the decomposition has no paths.
    NoUsableImagesError
        If every image is excluded.
    """
    from modescope.core.engine import pipeline

    d = _check_decomposition(decomposition)
    if options is None:
        options = _options_from_metadata(d)
    elif not isinstance(options, pipeline.AnalysisOptions):
        raise TypeError(f"options must be AnalysisOptions, got {type(options).__name__}")
    for name, fn in (("progress", progress), ("cancel", cancel)):
        if fn is not None and not callable(fn):
            raise TypeError(f"{name} must be callable or None, got {type(fn).__name__}")
    remaining = remaining_sources(d)
    kept_paths = list(dict.fromkeys(p for p, _ in remaining))
    excluded_files = {d.paths[int(i)] for i in excluded_indices(d)}
    # whole files are passed as paths; when a file has only some pages excluded, the analysis
    # is told which pages to keep
    only = remaining if excluded_files.intersection(kept_paths) else None
    return pipeline.analyze(kept_paths, options, progress=progress, cancel=cancel, only=only)
