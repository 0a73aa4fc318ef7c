"""Export an analysis: rank-k previews, basis images, a contact sheet, CSV tables and a compact
model file.

The work is split by job: :mod:`~modescope.core.output.options` (what to write, checked once),
:mod:`~modescope.core.output.plan` (the files and the destination checks),
:mod:`~modescope.core.output.images`, :mod:`~modescope.core.output.encode`,
:mod:`~modescope.core.output.sheet` and :mod:`~modescope.core.output.tables` (the content of
each file), :mod:`~modescope.core.output.naming` (file names and chosen images),
:mod:`~modescope.core.output.metrics` and :mod:`~modescope.core.output.report` (the numbers
reported). This module ties them together: :func:`plan_export`, :func:`run_export` and the
one-call :func:`export`.

What is written (``what`` choices)
----------------------------------
``previews``
    The rank-k reconstruction ``mean + basis[:, :k] @ weights[:k, i]`` of each chosen image,
    clipped to [0, 1] and quantised (8-bit: ``rint(x * 255)``; 16-bit: ``rint(x * 65535)``;
    ``rint`` rounds to the nearest level, ties to even). Formats: PNG (8-bit), JPEG (8-bit,
    ``quality``), WebP (8-bit, lossy, ``quality``) and TIFF (16-bit, uncompressed). Gray images are
    written as single-channel files, RGB as RGB; WebP cannot hold one channel, so gray WebP
    previews are stored with three equal channels. Resolution: the analysis resolution (after any
    downscale); with ``upsample=True`` the reconstruction is resized, before clipping, to the
    source size ``decomposition.metadata["source_size"] = [rows, cols]`` with Pillow's bicubic
    filter applied to each channel in floating point. File names follow
    :mod:`~modescope.core.output.naming`: ``<stem>[_p<page>][_i<index>]_r<k>.<ext>``.
``basis``
    ``mean.png`` (gray or RGB, 8-bit) and ``basis_001.png`` ... ``basis_<k>.png`` (numbered from
    1, matching the ``w1..wk`` columns), at analysis resolution. Gray basis images use the
    diverging map of :mod:`modescope.core.output.colormap` with a per-image limit equal to the
    largest absolute value of that basis image (-limit teal, 0 off-white, +limit brick). RGB
    basis images are shown per channel as ``0.5 + value / (2 * limit)`` (mid-gray is zero),
    limit the largest absolute value over the three channels of that basis image. The limits
    are in :attr:`ExportReport.basis_limits`.
``sheet``
    ``basis_sheet.png``: the first ``sheet_count`` basis images as tiles, each with its number
    and energy share written under it.
``weights``
    ``weights_r<k>.csv``: ``path, page, w1..wk`` for each chosen image.
``spectrum``
    ``spectrum.csv``: ``index, singular_value, energy_share, cumulative_share`` for every mode
    stored in the model (index from 1).
``quality``
    ``quality_r<k>.csv``: ``path, page, relative_error, psnr_db, note`` for each chosen image:
    the clipped rank-k preview (floating point, before quantisation, at analysis resolution)
    against the source re-read at analysis resolution
    (:func:`modescope.core.engine.pipeline.load_analysis_image`). ``relative_error = ||x - x_k|| /
    ||x||``; ``psnr_db = 10 log10(1 / MSE)`` with peak 1.0 and the MSE over every pixel value,
    written ``inf`` when the MSE is 0. A source that cannot be read leaves the numbers empty and
    says why in ``note``.
``model``
    ``model_r<k>.npz`` (``model_r<k>_f16.npz`` with ``float16=True``): the model truncated to
    rank k, written with :func:`modescope.core.output.model_file.save_model`, optionally storing
    mean, basis and weights as float16.

CSV files have a header row, are written with the :mod:`csv` module (comma separated, UTF-8,
``\\r\\n`` line ends) and floats are written in Python's shortest round-trip form.

Compression ratios (always in the report)
-----------------------------------------
With ``n`` values per image (pixels x channels at analysis resolution) and ``m`` images, the
rank-k model stores ``k (n + m + 1) + n`` numbers (basis k n, weights k m, singular values k,
mean n) against ``n m`` for the data matrix. When the model file is written, its size on disk is
compared with the total size of the source files (each file counted once; missing files are
listed and left out of the total).

Safety
------
Every file goes to a temporary name in the destination folder and is renamed when complete
(:mod:`modescope.core.output.atomic`). All target names are checked before anything is written:
an existing file is refused unless ``overwrite=True``, and a folder that holds any source image
is refused unless ``allow_source_folder=True``; the folder is also checked to accept a new file.
A full or read-only destination raises :class:`~modescope.core.output.atomic.DestinationError`
(its ``written`` attribute lists the files completed before), leaving no partial or temporary
file. ``cancel()`` is checked before each file (and between images while the quality table is
computed); a cancelled export keeps the complete files and says how many were written.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from modescope.core.decomposition import Decomposition
from modescope.core.errors import ModelFileError
from modescope.core.output.atomic import (DestinationError, atomic_write_bytes,
                                          check_folder_writable)
from modescope.core.output.colormap import describe_mapping
from modescope.core.output.encode import encode_image, png_bytes
from modescope.core.output.images import basis_image_rgb, mean_image, preview_image
from modescope.core.output.metrics import compression_numbers, source_file_bytes
from modescope.core.output.naming import select_images
from modescope.core.output.options import WHAT_CHOICES, ExportOptions
from modescope.core.output.plan import (ExportPlan, PlanItem, check_float16, check_folder,
                                        check_targets, plan_items, planning_notes)
from modescope.core.output.report import ExportReport
from modescope.core.output.sheet import contact_sheet
from modescope.core.output.tables import quality_bytes, spectrum_bytes, weights_bytes
from modescope.core.validation import check_callable, check_instance, check_int, check_path

__all__ = ["WHAT_CHOICES", "ExportOptions", "ExportPlan", "ExportReport", "plan_export",
           "run_export", "export"]


def _default_loader(decomposition, index):
    from modescope.core.engine.pipeline import load_analysis_image
    return load_analysis_image(decomposition, index)


# ----------------------------------------------------------------------------------------------
# planning
# ----------------------------------------------------------------------------------------------
def plan_export(decomposition: Decomposition, folder, options: ExportOptions) -> ExportPlan:
    """Decide every file of an export and check the destination, without writing anything.

    Parameters
    ----------
    decomposition : Decomposition
        With at least one basis image.
    folder : str or os.PathLike
        Existing destination folder.
    options : ExportOptions
        What to write; ``options.rank`` must be at most ``decomposition.rank``.

    Returns
    -------
    ExportPlan

    Raises
    ------
    TypeError, ValueError
        For wrong arguments (message names the parameter or option).
    DestinationError
        If the folder is missing, not writable, holds source images (without
        ``allow_source_folder``) or already holds a planned file (without ``overwrite``).

    Examples
    --------
    >>> plan = plan_export(d, "out", ExportOptions(rank=5, what="previews"))  # doctest: +SKIP
    >>> plan.files[:2]                                                        # doctest: +SKIP
    """
    d = check_instance("decomposition", decomposition, Decomposition)
    options = check_instance("options", options, ExportOptions)
    folder = check_path("folder", folder)
    if d.rank < 1:
        raise ValueError("decomposition has no basis images; nothing to export")
    k = check_int("rank", options.rank, minimum=1, maximum=d.rank)
    indices = _chosen_images(d, options)
    notes = planning_notes(d, options, indices.size)
    check_float16(d, options)
    check_folder(d, folder, options.allow_source_folder)
    plan = ExportPlan(
        decomposition=d, folder=folder, rank=k, what=options.what,
        image_format=options.image_format, quality=options.quality, indices=indices,
        upsample=options.upsample, float16=options.float16,
        sheet_count=min(options.sheet_count, k), overwrite=options.overwrite,
        loader=options.loader or _default_loader,
        items=plan_items(d, folder, options, indices), notes=tuple(notes))
    check_targets(plan)
    check_folder_writable(folder)
    return plan


def _chosen_images(d: Decomposition, options: ExportOptions) -> np.ndarray:
    """Image columns for the per-image parts (none when no such part is asked)."""
    if not {"previews", "weights", "quality"} & set(options.what):
        return np.arange(0, dtype=np.int64)
    return select_images(d, options.images, rank=options.rank, level=options.level)


# ----------------------------------------------------------------------------------------------
# writing
# ----------------------------------------------------------------------------------------------
@dataclass
class _Run:
    """What a run has done so far."""

    written: list = field(default_factory=list)
    unread: list = field(default_factory=list)       # sources not read or missing
    limits: list = field(default_factory=list)       # limit of each basis image written
    model_bytes: int | None = None
    quality_unread: int = 0
    cancelled: bool = False


def _item_bytes(plan: ExportPlan, item: PlanItem, run: _Run, cancel) -> bytes | None:
    """Return the content of one planned file (None when cancelled inside the quality table)."""
    d, k = plan.decomposition, plan.rank
    if item.kind == "spectrum":
        return spectrum_bytes(d)
    if item.kind == "weights":
        return weights_bytes(d, k, plan.indices)
    if item.kind == "quality":
        data, unread = quality_bytes(d, k, plan.indices, plan.loader, cancel)
        run.unread.extend(unread)
        if data is not None:
            run.quality_unread = len(unread)
        return data
    if item.kind == "mean":
        return png_bytes(mean_image(d))
    if item.kind == "basis":
        rgb, limit = basis_image_rgb(d, item.index)
        run.limits.append(limit)
        return png_bytes(rgb)
    if item.kind == "sheet":
        return png_bytes(np.asarray(contact_sheet(d, plan.sheet_count).image))
    img = preview_image(d, item.index, k, upsample=plan.upsample)
    return encode_image(img, plan.image_format, plan.quality)


def _write_model(plan: ExportPlan, path: Path) -> int:
    from modescope.core.output.model_file import save_model
    model = plan.decomposition.truncated(plan.rank)
    try:
        written = save_model(path, model, overwrite=plan.overwrite,
                             dtype=np.float16 if plan.float16 else None)
    except ModelFileError as exc:
        raise DestinationError(f"cannot write the model file {path}: {exc}",
                               path=path) from exc
    return os.path.getsize(written)


def _write_item(plan: ExportPlan, item: PlanItem, run: _Run, cancel) -> bool:
    """Write one planned file; return False when cancelled before it was written."""
    if item.kind == "model":
        run.model_bytes = _write_model(plan, item.path)
        return True
    data = _item_bytes(plan, item, run, cancel)
    if data is None:
        return False
    atomic_write_bytes(item.path, data, overwrite=plan.overwrite)
    return True


def _closing_notes(plan: ExportPlan, run: _Run) -> tuple[list[str], int | None]:
    """Return the notes after a run and the source byte count (None when not measured)."""
    d = plan.decomposition
    notes = list(plan.notes)
    if run.limits:
        mapping = ("RGB basis images are shown per channel as 0.5 + value/(2*limit), "
                   "mid-gray = 0" if d.image_shape[2] == 3 else
                   "gray basis images use the diverging map; for basis 1: "
                   + describe_mapping(run.limits[0]))
        notes.append(f"basis images: limit = largest absolute value of each basis image "
                     f"(basis 1: {run.limits[0]:.4g}); {mapping}")
    source_bytes = None
    if run.model_bytes is not None:
        total_src, gone, distinct = source_file_bytes(d.paths)
        source_bytes = total_src if len(gone) < distinct else None
        run.unread.extend(g for g in gone if g not in run.unread)
        if gone:
            notes.append(f"{len(gone)} of {distinct} source files are missing; the source "
                         f"byte count covers the other {distinct - len(gone)}")
    if run.quality_unread:
        notes.append(f"quality table: {run.quality_unread} source(s) could not be read; their "
                     f"rows say why in the note column")
    if run.cancelled:
        notes.append(f"cancelled: {len(run.written)} of {len(plan.items)} files written; they "
                     f"are complete")
    return notes, source_bytes


def _report(plan: ExportPlan, run: _Run) -> ExportReport:
    d, k = plan.decomposition, plan.rank
    notes, source_bytes = _closing_notes(plan, run)
    stored, full = compression_numbers(d.n_pixels, d.n_images, k)
    return ExportReport(
        folder=plan.folder, written=tuple(run.written), skipped=plan.files[len(run.written):],
        cancelled=run.cancelled, rank=k, n_values=d.n_pixels, n_images=d.n_images,
        stored_numbers=stored, full_numbers=full, model_bytes=run.model_bytes,
        source_bytes=source_bytes, missing_sources=tuple(dict.fromkeys(run.unread)),
        basis_limits=tuple(run.limits), notes=tuple(notes))


def run_export(plan: ExportPlan, *, progress: Callable[[int, int], None] | None = None,
               cancel: Callable[[], bool] | None = None) -> ExportReport:
    """Write the files of a plan.

    Parameters
    ----------
    plan : ExportPlan
        From :func:`plan_export`.
    progress : callable, optional
        ``progress(done, total)`` with file counts: once with 0 before the first file and after
        each file.
    cancel : callable, optional
        Returns True to stop; checked before each file (and between images while computing the
        quality table). Completed files are kept.

    Returns
    -------
    ExportReport

    Raises
    ------
    TypeError
        If ``plan`` is not an ExportPlan or ``progress`` / ``cancel`` is not callable.
    DestinationError
        If a planned file now exists (without overwrite), or a file cannot be written (disk
        full, read-only); ``error.written`` lists the files completed before. No partial or
        temporary file is left.
    """
    check_instance("plan", plan, ExportPlan)
    check_callable("progress", progress)
    check_callable("cancel", cancel)
    check_targets(plan)
    total = len(plan.items)
    run = _Run()
    if progress is not None:
        progress(0, total)
    for item in plan.items:
        if cancel is not None and cancel():
            run.cancelled = True
            break
        try:
            done = _write_item(plan, item, run, cancel)
        except DestinationError as exc:
            raise DestinationError(
                f"{exc}; {len(run.written)} of {total} files were written before this failure "
                f"and are complete", path=exc.path, written=run.written) from exc
        if not done:
            run.cancelled = True
            break
        run.written.append(item.path)
        if progress is not None:
            progress(len(run.written), total)
    return _report(plan, run)


def export(decomposition: Decomposition, folder, *, rank: int,
           progress: Callable[[int, int], None] | None = None,
           cancel: Callable[[], bool] | None = None, **options) -> ExportReport:
    """Plan and write an export in one call.

    Parameters
    ----------
    decomposition : Decomposition
    folder : str or os.PathLike
    rank : int
    progress, cancel : callable, optional
        As :func:`run_export`.
    **options
        The other fields of :class:`ExportOptions` (what, image_format, quality, images, level,
        upsample, float16, sheet_count, overwrite, allow_source_folder, loader).

    Returns
    -------
    ExportReport

    Raises
    ------
    TypeError, ValueError, DestinationError
        As :class:`ExportOptions`, :func:`plan_export` and :func:`run_export`.

    Examples
    --------
    >>> report = export(d, "out", rank=5, what="previews,spectrum")   # doctest: +SKIP
    >>> report.n_written                                              # doctest: +SKIP
    """
    plan = plan_export(decomposition, folder, ExportOptions(rank=rank, **options))
    return run_export(plan, progress=progress, cancel=cancel)
