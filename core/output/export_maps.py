"""Write the "where it differs" maps of checked images as files, atomically.

Files written into one folder (each through :mod:`modescope.core.output.atomic`):

* ``residual_<number>.png`` and ``residual_<number>.npy`` for each image asked for (the flagged
  ones by default): what the model at rank k cannot explain of the image
  (:func:`modescope.core.review.maps.residual_map`), the PNG in the diverging colours of basis
  images with the image's largest absolute value at both ends, the ``.npy`` as float32 values
  (rows, cols, channels) on the 0..1 scale of the images.
* ``t2_contributions.csv``: ``number, path, page, mode_1 .. mode_k`` (each mode's part of T^2).
* ``std_collection.png/.npy`` and ``std_unexplained_rank_<k>.png/.npy``: the per-pixel standard
  deviation maps (:func:`modescope.core.review.maps.pixel_spread`), the PNG gray from 0 (black)
  to the largest value of the collection map (white).
* ``maps.txt``: what each file is, the scale of every PNG, how the spread maps were made.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np

from modescope.core.decomposition import Decomposition
from modescope.core.output.atomic import atomic_write_bytes, check_folder_writable
from modescope.core.output.colormap import gray_to_rgb
from modescope.core.output.encode import png_bytes
from modescope.core.output.images import signed_image_rgb
from modescope.core.output.tables import csv_bytes, format_float
from modescope.core.review.check import CheckResult
from modescope.core.review.maps import (PixelSpread, pixel_spread, read_like_model,
                                        residual_map, t2_contributions)
from modescope.core.validation import check_bool, check_choice, check_instance

__all__ = ["write_check_maps"]


def _npy_bytes(array: np.ndarray) -> bytes:
    buf = io.BytesIO()
    np.save(buf, np.ascontiguousarray(array, dtype=np.float32), allow_pickle=False)
    return buf.getvalue()


def _gray_png(values: np.ndarray, high: float) -> bytes:
    gray = values[..., 0] if values.shape[2] == 1 else values.mean(axis=2)
    return png_bytes(gray_to_rgb(gray, 0.0, high if high > 0 else 1.0))


def write_check_maps(folder, decomposition: Decomposition, result: CheckResult, *,
                     which: str = "flagged", spread: PixelSpread | None = None,
                     overwrite: bool = False, protect=()) -> list[Path]:
    """Write residual maps, T^2 contributions and spread maps of checked images into a folder.

    Parameters
    ----------
    folder : str or os.PathLike
        An existing, writable folder.
    decomposition : Decomposition
        The model the images were checked against.
    result : CheckResult
        From :func:`modescope.core.review.check.check_images` (the images are read again from
        their files for their residual maps).
    which : {"flagged", "all"}
        Images whose residual maps are written (default the flagged ones).
    spread : PixelSpread, optional
        The spread maps to write; default ``pixel_spread(decomposition, result.rank)`` made
        from the model alone (see its note).
    overwrite : bool
        Replace files that exist (default False).
    protect : iterable of str or os.PathLike
        More files never replaced (the model file); the model's and the checked images'
        source files are always protected.

    Returns
    -------
    list of pathlib.Path
        The files written, in the order above.

    Raises
    ------
    TypeError, ValueError
        On wrong arguments.
    SourceError
        If a checked image cannot be read again.
    DestinationError
        If a file is refused or cannot be written.
    """
    check_instance("decomposition", decomposition, Decomposition)
    check_instance("result", result, CheckResult)
    check_choice("which", which, ("flagged", "all"))
    overwrite = check_bool("overwrite", overwrite)
    target = check_folder_writable(folder)
    k = result.rank
    spread = pixel_spread(decomposition, k) if spread is None else check_instance(
        "spread", spread, PixelSpread)
    guard = [*decomposition.paths, *(p for p in result.paths if p), *map(str, protect)]
    written: list[Path] = []

    def put(name: str, data: bytes) -> None:
        written.append(atomic_write_bytes(target / name, data, overwrite=overwrite,
                                          protect=guard))

    lines = [f"Maps of {result.n_images} checked image(s) at rank {k} of {decomposition.rank}.",
             ""]
    table = result.table
    chosen = [i for i in range(result.n_images) if which == "all" or table.flag[i]]
    for i in chosen:
        if not result.paths[i]:
            continue
        image = read_like_model(decomposition, result.paths[i], int(result.pages[i]),
                                resize_mismatched=True)
        resid = residual_map(decomposition, image, k)
        limit = float(np.max(np.abs(resid))) if resid.size else 0.0
        put(f"residual_{i + 1:04d}.png", png_bytes(signed_image_rgb(resid, limit)))
        put(f"residual_{i + 1:04d}.npy", _npy_bytes(resid))
        lines.append(f"residual_{i + 1:04d}: image {i + 1} ({result.paths[i]}), residual at "
                     f"rank {k}; PNG colours show -{limit:.4g} .. 0 .. +{limit:.4g}")
    parts = t2_contributions(decomposition, result.weights, k)
    header = ["number", "path", "page"] + [f"mode_{j + 1}" for j in range(k)]
    rows = [[i + 1, result.paths[i], int(result.pages[i]),
             *(format_float(v) for v in parts[:, i])] for i in range(result.n_images)]
    put("t2_contributions.csv", csv_bytes(header, rows))
    high = float(np.max(spread.collection)) if spread.collection.size else 0.0
    for name, values in (("std_collection", spread.collection),
                         (f"std_unexplained_rank_{spread.rank}", spread.unexplained)):
        put(f"{name}.png", _gray_png(values, high))
        put(f"{name}.npy", _npy_bytes(values))
    lines += ["", "t2_contributions.csv: each mode's part of Hotelling's T2 (they add up to T2).",
              f"std_collection and std_unexplained_rank_{spread.rank}: per-pixel standard "
              f"deviation of the model's images and of what rank {spread.rank} leaves "
              f"unexplained; PNG gray 0 (black) .. {high:.4g} (white); {spread.note}.",
              "", "A flag asks a person to look at the image; it is not a verdict on a part, a "
              "sample or a person."]
    put("maps.txt", ("\n".join(lines) + "\n").encode("utf-8"))
    return written
