"""The plan of an export: every file it will write, decided and checked before any is touched.

:func:`~modescope.core.output.export.plan_export` builds an :class:`ExportPlan` from the steps
here: the notes stated to the user, the list of files, and the checks of the destination.
"""

from __future__ import annotations

import os
from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np

from modescope.core.decomposition import Decomposition
from modescope.core.output.atomic import DestinationError, refuse_sources
from modescope.core.output.images import source_size
from modescope.core.output.naming import preview_names
from modescope.core.output.options import ExportOptions

__all__ = ["ExportPlan", "PlanItem", "plan_items", "planning_notes", "check_float16",
           "check_folder", "check_targets"]

#: Largest finite float16.
_FLOAT16_MAX = 65504.0


@dataclass(frozen=True)
class PlanItem:
    """One file of an export.

    Attributes
    ----------
    kind : str
        One of :data:`~modescope.core.output.options.WHAT_CHOICES`, or ``"mean"``.
    path : pathlib.Path
    index : int
        Image column (previews) or basis number (0-based); -1 otherwise.
    """

    kind: str
    path: Path
    index: int = -1


@dataclass(frozen=True)
class ExportPlan:
    """Everything an export will write, decided before any file is touched.

    Attributes
    ----------
    decomposition : Decomposition
    folder : pathlib.Path
    rank : int
    what : tuple of str
        Parts chosen, in :data:`~modescope.core.output.options.WHAT_CHOICES` order.
    image_format : str
    quality : int
    indices : ndarray of int
        Chosen image columns.
    upsample : bool
    float16 : bool
    sheet_count : int
        Tiles on the contact sheet (at most ``rank``).
    overwrite : bool
    loader : callable
        ``loader(decomposition, index) -> (rows, cols, channels) float`` for the quality table.
    items : tuple of PlanItem
        The files to write, in order.
    notes : tuple of str
        Statements gathered while planning (resolution, mappings, empty selections).
    """

    decomposition: Decomposition
    folder: Path
    rank: int
    what: tuple
    image_format: str
    quality: int
    indices: np.ndarray
    upsample: bool
    float16: bool
    sheet_count: int
    overwrite: bool
    loader: Callable
    items: tuple
    notes: tuple

    @property
    def files(self) -> tuple[Path, ...]:
        """Paths of every file the export will write, in order."""
        return tuple(item.path for item in self.items)

    def existing(self) -> tuple[Path, ...]:
        """Return the planned files that already exist now."""
        return tuple(p for p in self.files if os.path.lexists(p))


def planning_notes(d: Decomposition, options: ExportOptions, n_chosen: int) -> list[str]:
    """Return the statements an export makes about its choices (resolution, empty selection).

    Parameters
    ----------
    d : Decomposition
    options : ExportOptions
    n_chosen : int
        Number of images chosen for the per-image parts.

    Returns
    -------
    list of str

    Raises
    ------
    ValueError
        If upsampled previews are asked and the model records no source size.
    """
    notes = []
    parts = options.what
    if {"previews", "weights", "quality"} & set(parts) and n_chosen == 0:
        notes.append("no image was chosen (for example none is flagged): no previews, and "
                     "tables with a header only")
    if "previews" not in parts:
        return notes
    rows, cols = d.image_shape[0], d.image_shape[1]
    if options.upsample:
        size = source_size(d)
        notes.append(f"previews written at the source size {size[0]}x{size[1]} (bicubic "
                     f"upsampling of the {rows}x{cols} reconstruction, then clipped to [0, 1])")
    else:
        notes.append(f"previews written at the analysis resolution {rows}x{cols}"
                     + (" (the analysis was downscaled; use upsample for the source size)"
                        if int(d.metadata.get("downscale", 1)) > 1 else ""))
    if options.image_format == "webp" and d.image_shape[2] == 1:
        notes.append("WebP holds no single-channel images: gray previews are stored with "
                     "three equal channels")
    return notes


def check_float16(d: Decomposition, options: ExportOptions) -> None:
    """Refuse a float16 model whose weights float16 cannot hold.

    Raises
    ------
    ValueError
        If ``options.float16`` is set for a model part and a weight exceeds 65504.
    """
    if not (options.float16 and "model" in options.what) or not d.weights.size:
        return
    big = float(np.max(np.abs(d.weights[:options.rank])))
    if big > _FLOAT16_MAX:
        raise ValueError(f"float16 cannot hold weights up to {big:.4g} (largest float16 "
                         f"is 65504); export the model without float16")


def _source_folders(d: Decomposition) -> set[str]:
    return {os.path.normcase(os.path.realpath(os.path.dirname(os.path.abspath(str(p)))))
            for p in d.paths}


def check_folder(d: Decomposition, folder: Path, allow_source_folder: bool) -> None:
    """Check that ``folder`` exists and, unless allowed, holds no source image of ``d``.

    Raises
    ------
    DestinationError
        If the folder is missing, not a folder, or holds source images.
    """
    if not folder.is_dir():
        raise DestinationError(f"the destination folder {folder} does not exist or is not a "
                               f"folder", path=folder)
    here = os.path.normcase(os.path.realpath(folder))
    if d.paths and here in _source_folders(d) and not allow_source_folder:
        raise DestinationError(
            f"the destination folder {folder} holds source images of this analysis; choose "
            f"another folder or allow writing there explicitly (allow_source_folder=True)",
            path=folder)


def _part_items(d: Decomposition, folder: Path, part: str, options: ExportOptions,
                indices: np.ndarray) -> list[PlanItem]:
    k = options.rank
    if part == "spectrum":
        return [PlanItem("spectrum", folder / "spectrum.csv")]
    if part == "weights":
        return [PlanItem("weights", folder / f"weights_r{k}.csv")]
    if part == "model":
        name = f"model_r{k}_f16.npz" if options.float16 else f"model_r{k}.npz"
        return [PlanItem("model", folder / name)]
    if part == "basis":
        width = max(3, len(str(k)))
        return [PlanItem("mean", folder / "mean.png")] + [
            PlanItem("basis", folder / f"basis_{j + 1:0{width}d}.png", j) for j in range(k)]
    if part == "sheet":
        return [PlanItem("sheet", folder / "basis_sheet.png")]
    if part == "previews":
        names = preview_names(d, indices, k, options.image_format)
        return [PlanItem("previews", folder / name, int(i)) for name, i in zip(names, indices)]
    return [PlanItem("quality", folder / f"quality_r{k}.csv")]


def plan_items(d: Decomposition, folder: Path, options: ExportOptions,
               indices: np.ndarray) -> tuple[PlanItem, ...]:
    """Return the files of an export in the order they are written.

    Parameters
    ----------
    d : Decomposition
    folder : pathlib.Path
    options : ExportOptions
        Its ``rank`` already checked against ``d``.
    indices : ndarray of int
        Chosen image columns.

    Returns
    -------
    tuple of PlanItem
    """
    items = [item for part in options.what
             for item in _part_items(d, folder, part, options, indices)]
    folded = Counter(item.path.name.casefold() for item in items)
    dup = [n for n, c in folded.items() if c > 1]
    if dup:  # pragma: no cover - the naming rules make this impossible
        raise ValueError(f"export would write two files named {dup[0]!r}")
    return tuple(items)


def check_targets(plan: ExportPlan) -> None:
    """Refuse a plan whose files are source images, exist (without overwrite) or are folders.

    A planned file that is a source image of the analysis (same name, or the same file reached
    through a link) is refused whatever ``overwrite`` and ``allow_source_folder`` say.

    Raises
    ------
    DestinationError
        Naming the files taken; nothing is written.
    """
    refuse_sources(plan.files, plan.decomposition.paths)
    if plan.overwrite:
        taken = [p for p in plan.files if p.is_dir()]
        if taken:
            raise DestinationError(f"{taken[0]} is a folder; it cannot be replaced by a file",
                                   path=taken[0])
        return
    taken = plan.existing()
    if taken:
        shown = ", ".join(p.name for p in taken[:5])
        more = f" and {len(taken) - 5} more" if len(taken) > 5 else ""
        raise DestinationError(
            f"{len(taken)} of the {len(plan.items)} files to export already exist in "
            f"{plan.folder} ({shown}{more}); nothing was written. Choose another folder or "
            f"allow overwriting", path=taken[0])
