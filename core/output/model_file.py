"""The model file: one ``.npz`` (numpy's open zip-of-arrays format) holding an analysis.

Entries (all plain arrays; the file is always read with ``allow_pickle=False``):

==================  ==========================  ==========================================
name                shape                       meaning
==================  ==========================  ==========================================
mean                (pixels,) float32/16        mean image, raveled (rows, cols, channels)
basis               (pixels, k) float32/16      orthonormal basis images as columns
singular_values     (k,) float64                descending, non-negative
weights             (k, images) float64/32/16   coordinates of every image
residual            (images,) float64           squared residual norm outside the k modes
singular_value_error (k,) float64               certified bound of each singular value's error
total_energy        () float64                  squared Frobenius norm of the centred data
image_shape         (3,) int64                  rows, cols, channels
paths               (images,) unicode           source file of each image
pages               (images,) int32             page within a multi-page file
marks               (images,) int8              0 not reviewed, 1 keep, 2 exclude
exact               () bool                     True after the exact scoring pass
metadata            () unicode                  JSON text: options, versions, date, problems
==================  ==========================  ==========================================

``residual`` and ``singular_value_error`` are stored as empty arrays for a streaming snapshot
that has none (files written before the certificate existed have no ``singular_value_error``).
"""

from __future__ import annotations

import json
import zipfile
from pathlib import Path

import numpy as np

from modescope.core.decomposition import Decomposition
from modescope.core.errors import ModelFileError
from modescope.core.output.atomic import DestinationError, atomic_writer
from modescope.core.validation import check_instance

__all__ = ["save_model", "load_model", "FORMAT_NAME", "FORMAT_VERSION"]

FORMAT_NAME = "modescope-model"
FORMAT_VERSION = 1
_REQUIRED = ("mean", "basis", "singular_values", "weights", "total_energy", "image_shape",
             "paths", "metadata")
_FLOATS = (np.float16, np.float32, np.float64)


def save_model(path, decomposition: Decomposition, *, overwrite: bool = True,
               dtype=None) -> Path:
    """Write an analysis to ``path`` atomically (temporary file in the same folder, flushed to
    the disk, then renamed; see :mod:`modescope.core.output.atomic`).

    Parameters
    ----------
    path : str or path
        Destination; ``.npz`` is appended when missing.
    decomposition : Decomposition
    overwrite : bool, optional
        Replace an existing file (default True). When False an existing file raises.
    dtype : {None, numpy.float16, numpy.float32}, optional
        Storage type of ``mean``, ``basis`` and ``weights`` (default: as they are). float16
        makes a compact file; values are read back as float32.

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition.
    ModelFileError
        If the destination exists (with ``overwrite=False``) or cannot be written.
    """
    check_instance("decomposition", decomposition, Decomposition)
    path = Path(path)
    if path.suffix.lower() != ".npz":
        path = path.with_name(path.name + ".npz")
    if path.exists() and not overwrite:
        raise ModelFileError(f"{path}: already exists (choose another name or allow overwrite)")
    if dtype is not None and np.dtype(dtype) not in (np.dtype(np.float16), np.dtype(np.float32)):
        raise ValueError(f"dtype must be float16 or float32, got {np.dtype(dtype)}")
    d = decomposition
    cast = (lambda a: a) if dtype is None else (lambda a: np.asarray(a).astype(dtype))
    meta = dict(d.metadata)
    meta.setdefault("format", FORMAT_NAME)
    meta.setdefault("format_version", FORMAT_VERSION)
    arrays = {
        "mean": cast(d.mean),
        "basis": cast(d.basis),
        "singular_values": np.asarray(d.singular_values, dtype=np.float64),
        "weights": cast(d.weights),
        "residual": (np.zeros(0) if d.residual is None
                     else np.asarray(d.residual, dtype=np.float64)),
        "singular_value_error": (np.zeros(0) if d.singular_value_error is None
                                 else np.asarray(d.singular_value_error, dtype=np.float64)),
        "total_energy": np.float64(d.total_energy),
        "image_shape": np.asarray(d.image_shape, dtype=np.int64),
        "paths": np.asarray([str(p) for p in d.paths], dtype=str).reshape(len(d.paths)),
        "pages": np.asarray(d.pages, dtype=np.int32),
        "marks": np.asarray(d.marks, dtype=np.int8),
        "exact": np.bool_(d.exact),
        "metadata": np.asarray(json.dumps(meta, sort_keys=True)),
    }
    folder = path.parent if str(path.parent) else Path(".")
    try:
        with atomic_writer(path, "wb", overwrite, fsync=True, protect=d.paths) as fh:
            np.savez(fh, **arrays)
    except DestinationError as exc:
        raise ModelFileError(f"{path}: cannot write into {folder} ({exc})") from exc
    return path


def _bad(path, what: str) -> ModelFileError:
    return ModelFileError(f"{path}: not a usable Modescope model file: {what}")


def load_model(path) -> Decomposition:
    """Read an analysis written by :func:`save_model`, checking every entry.

    Parameters
    ----------
    path : str or path

    Returns
    -------
    Decomposition
        float16 entries are returned as float32.

    Raises
    ------
    ModelFileError
        If the file is missing, not a zip/npz, holds pickled objects, misses an entry, or holds
        entries of the wrong shape, type or with non-finite values. The message names the file
        and the entry.
    """
    path = Path(path)
    if not path.exists():
        raise ModelFileError(f"{path}: no such file")
    if path.is_dir():
        raise ModelFileError(f"{path}: is a folder, not a model file")
    try:
        with open(path, "rb") as fh, np.load(fh, allow_pickle=False) as npz:
            names = set(npz.files)
            missing = [n for n in _REQUIRED if n not in names]
            if missing:
                raise _bad(path, f"missing entries {', '.join(missing)}")
            data = {}
            for name in names:
                try:
                    data[name] = npz[name]
                    if not isinstance(data[name], np.ndarray):
                        raise _bad(path, f"entry {name!r} is not a numpy array")
                except ValueError as exc:
                    raise _bad(path, f"entry {name!r} cannot be read without pickle "
                                     f"({exc})") from None
    except ModelFileError:
        raise
    except (zipfile.BadZipFile, OSError, EOFError, ValueError) as exc:
        raise _bad(path, f"damaged or not an .npz file ({exc})") from None

    def floats(name, ndim):
        a = data[name]
        if a.dtype not in _FLOATS:
            raise _bad(path, f"entry {name!r} must hold floats, found {a.dtype}")
        if a.ndim != ndim:
            raise _bad(path, f"entry {name!r} must have {ndim} dimensions, found shape {a.shape}")
        if not np.all(np.isfinite(a)):
            raise _bad(path, f"entry {name!r} holds NaN or infinite values")
        return a.astype(np.float32) if a.dtype == np.float16 else a

    try:
        meta_text = str(data["metadata"][()])
        meta = json.loads(meta_text)
        if not isinstance(meta, dict):
            raise ValueError("not a JSON object")
    except (ValueError, TypeError, IndexError) as exc:
        raise _bad(path, f"entry 'metadata' is not JSON text ({exc})") from None
    if meta.get("format", FORMAT_NAME) != FORMAT_NAME:
        raise _bad(path, f"metadata says format {meta.get('format')!r}")
    if int(meta.get("format_version", FORMAT_VERSION)) > FORMAT_VERSION:
        raise _bad(path, f"written by a newer Modescope (format version "
                         f"{meta.get('format_version')}; this one reads {FORMAT_VERSION})")
    shape = data["image_shape"]
    if shape.shape != (3,) or not np.issubdtype(shape.dtype, np.integer) or np.any(shape < 1):
        raise _bad(path, f"entry 'image_shape' must be 3 positive integers, found {shape!r}")
    image_shape = tuple(int(v) for v in shape)
    mean = floats("mean", 1).astype(np.float32)
    basis = np.asfortranarray(floats("basis", 2).astype(np.float32))
    sv = floats("singular_values", 1).astype(np.float64)
    weights = floats("weights", 2).astype(np.float64)
    te = data["total_energy"]
    if te.shape != () or te.dtype not in _FLOATS or not np.isfinite(te) or te < 0:
        raise _bad(path, f"entry 'total_energy' must be one non-negative number, found {te!r}")
    paths = data["paths"]
    if paths.dtype.kind != "U" or paths.ndim != 1:
        raise _bad(path, f"entry 'paths' must be a list of text, found dtype {paths.dtype}")
    n = weights.shape[1] if weights.ndim == 2 else -1
    residual = None
    if "residual" in data and data["residual"].size:
        residual = floats("residual", 1).astype(np.float64)
    sv_error = None
    if "singular_value_error" in data and data["singular_value_error"].size:
        sv_error = floats("singular_value_error", 1).astype(np.float64)
        if sv_error.shape != sv.shape or np.any(sv_error < 0):
            raise _bad(path, f"entry 'singular_value_error' must be {sv.size} non-negative "
                             f"numbers, found shape {sv_error.shape}")
    pages = data.get("pages")
    if pages is not None and (not np.issubdtype(pages.dtype, np.integer) or pages.shape != (n,)):
        raise _bad(path, f"entry 'pages' must be {n} integers, found {pages.dtype} {pages.shape}")
    marks = data.get("marks")
    if marks is not None and (not np.issubdtype(marks.dtype, np.integer) or marks.shape != (n,)
                              or np.any((marks < 0) | (marks > 2))):
        raise _bad(path, f"entry 'marks' must be {n} integers 0, 1 or 2")
    if np.any(sv < 0) or np.any(np.diff(sv) > 1e-6 * (sv[0] if sv.size else 1)):
        raise _bad(path, "entry 'singular_values' must be non-negative and descending")
    exact = bool(data["exact"][()]) if "exact" in data else residual is not None
    try:
        return Decomposition(
            mean=mean, basis=basis, singular_values=sv, weights=weights,
            total_energy=float(te), image_shape=image_shape, paths=tuple(str(p) for p in paths),
            pages=None if pages is None else pages.astype(np.int32),
            residual=residual, exact=exact,
            marks=None if marks is None else marks.astype(np.int8), metadata=meta,
            singular_value_error=sv_error)
    except ValueError as exc:
        raise _bad(path, f"entries do not fit together ({exc})") from None
