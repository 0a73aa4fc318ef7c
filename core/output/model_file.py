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
from pathlib import Path

import numpy as np

from modescope.core.decomposition import Decomposition
from modescope.core.errors import ModelFileError
from modescope.core.output import model_zip
from modescope.core.output.atomic import DestinationError, atomic_writer
from modescope.core.output.model_metadata import check_metadata
from modescope.core.output.model_zip import describe, unusable
from modescope.core.validation import check_instance, check_path

__all__ = ["save_model", "load_model", "FORMAT_NAME", "FORMAT_VERSION"]

FORMAT_NAME = "modescope-model"
FORMAT_VERSION = 1
_REQUIRED = ("mean", "basis", "singular_values", "weights", "total_energy", "image_shape",
             "paths", "metadata")
_OPTIONAL = ("residual", "singular_value_error", "pages", "marks", "exact")
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


def load_model(path) -> Decomposition:
    """Read an analysis written by :func:`save_model`, checking every entry before using it.

    The file is checked before anything is allocated (see :mod:`modescope.core.output.model_zip`):
    it must be a regular file (a pipe is never opened), every array header must declare
    exactly the bytes its member holds, the entries must fit together and the whole must fit in
    memory; the data is then read without pickle, and every entry and metadata field is checked
    (see :mod:`modescope.core.output.model_metadata`).

    Parameters
    ----------
    path : str or os.PathLike

    Returns
    -------
    Decomposition
        float16 entries are returned as float32.

    Raises
    ------
    TypeError
        If ``path`` is not a str or os.PathLike path.
    ModelFileError
        If the file is missing, not a regular file, not a zip/npz, holds pickled objects,
        declares arrays larger than it holds or than memory allows, misses an entry, holds
        entries of the wrong shape, type or with non-finite values, or metadata fields of the
        wrong type. The message names the file and the entry or field.
    """
    path = check_path("path", path)
    file_size = model_zip.stat_regular(path)
    try:
        with model_zip.open_zip(path) as zf:
            entries = model_zip.read_headers(path, zf, _REQUIRED + _OPTIONAL)
            missing = [n for n in _REQUIRED if n not in entries]
            if missing:
                raise unusable(path, f"missing entries {', '.join(missing)}")
            model_zip.check_totals(path, entries, file_size)
            _check_shapes(path, entries)
            data = model_zip.read_arrays(path, zf, entries)
        return _decomposition(path, data)
    except ModelFileError:
        raise
    except MemoryError:
        raise unusable(path, "not enough memory to read it") from None
    except Exception as exc:  # noqa: BLE001 - one clear message for any damage not foreseen
        raise unusable(path, f"damaged ({type(exc).__name__}: {describe(exc)})") from None


def _check_shapes(path, entries: dict) -> None:
    """Refuse entries whose declared shapes do not fit each other (headers only, no data)."""
    for name, ndim in (("mean", 1), ("basis", 2), ("singular_values", 1), ("weights", 2)):
        shape = entries[name].shape
        if len(shape) != ndim:
            raise unusable(path, f"entry {name!r} must have {ndim} dimension"
                                 f"{'s' if ndim > 1 else ''}, found shape {shape}")
    p, k = entries["mean"].shape[0], entries["singular_values"].shape[0]
    n = entries["weights"].shape[1]
    expected = {"basis": [(p, k)], "weights": [(k, n)], "paths": [(n,), (0,)],
                "pages": [(n,)], "marks": [(n,)], "residual": [(n,), (0,)],
                "singular_value_error": [(k,), (0,)], "image_shape": [(3,)],
                "total_energy": [()], "exact": [()], "metadata": [()]}
    for name, shapes in expected.items():
        if name in entries and entries[name].shape not in shapes:
            raise unusable(path, f"entries do not fit together ({name} must have shape "
                                 f"{' or '.join(str(s) for s in shapes)}, found "
                                 f"{entries[name].shape})")


def _floats(path, data: dict, name: str) -> np.ndarray:
    a = data[name]
    if a.dtype not in _FLOATS:
        raise unusable(path, f"entry {name!r} must hold floats, found {a.dtype}")
    if not np.all(np.isfinite(a)):
        raise unusable(path, f"entry {name!r} holds NaN or infinite values")
    return a.astype(np.float32) if a.dtype == np.float16 else a


def _metadata(path, data: dict, channels: int) -> dict:
    """Return the metadata entry parsed and checked field by field."""
    text = data["metadata"]
    if text.dtype.kind != "U":
        raise unusable(path, f"entry 'metadata' must be JSON text, found {text.dtype}")
    try:
        meta = json.loads(str(text[()]))
    except (ValueError, RecursionError) as exc:
        raise unusable(path, f"entry 'metadata' is not JSON text ({exc})") from None
    if not isinstance(meta, dict):
        raise unusable(path, f"entry 'metadata' is not JSON text (not a JSON object: found "
                             f"{type(meta).__name__})")
    try:
        check_metadata(meta, channels, FORMAT_NAME, FORMAT_VERSION)
    except ValueError as exc:
        raise unusable(path, str(exc)) from None
    return meta


def _integers(path, data: dict, name: str, n: int, low: int, high: int):
    a = data.get(name)
    if a is None:
        return None
    if not np.issubdtype(a.dtype, np.integer) or a.shape != (n,):
        raise unusable(path, f"entry {name!r} must be {n} integers, found {a.dtype} {a.shape}")
    if a.size and (a.min() < low or a.max() > high):
        raise unusable(path, f"entry {name!r} must hold integers from {low} to {high}, found "
                             f"{a.min()} to {a.max()}")
    return a


def _image_shape(path, data: dict) -> tuple:
    shape = data["image_shape"]
    if shape.shape != (3,) or not np.issubdtype(shape.dtype, np.integer) or np.any(shape < 1):
        raise unusable(path, f"entry 'image_shape' must be 3 positive integers, found {shape!r}")
    return tuple(int(v) for v in shape)


def _decomposition(path, data: dict) -> Decomposition:
    """Return the Decomposition of the arrays read, checking every entry's type and values."""
    image_shape = _image_shape(path, data)
    meta = _metadata(path, data, image_shape[2])
    mean = _floats(path, data, "mean").astype(np.float32)
    basis = np.asfortranarray(_floats(path, data, "basis").astype(np.float32))
    sv = _floats(path, data, "singular_values").astype(np.float64)
    weights = _floats(path, data, "weights").astype(np.float64)
    te = data["total_energy"]
    if te.dtype not in _FLOATS or not np.isfinite(te) or te < 0:
        raise unusable(path, f"entry 'total_energy' must be one non-negative number, found "
                             f"{te!r}")
    paths = data["paths"]
    if paths.dtype.kind != "U":
        raise unusable(path, f"entry 'paths' must be a list of text, found dtype {paths.dtype}")
    n = weights.shape[1]
    residual = None
    if "residual" in data and data["residual"].size:
        residual = _floats(path, data, "residual").astype(np.float64)
    sv_error = None
    if "singular_value_error" in data and data["singular_value_error"].size:
        sv_error = _floats(path, data, "singular_value_error").astype(np.float64)
        if np.any(sv_error < 0):
            raise unusable(path, f"entry 'singular_value_error' must be {sv.size} non-negative "
                                 f"numbers")
    pages = _integers(path, data, "pages", n, 0, np.iinfo(np.int32).max)
    marks = _integers(path, data, "marks", n, 0, 2)
    if np.any(sv < 0) or np.any(np.diff(sv) > 1e-6 * (sv[0] if sv.size else 1)):
        raise unusable(path, "entry 'singular_values' must be non-negative and descending")
    exact = residual is not None
    if "exact" in data:
        if data["exact"].dtype != np.bool_:
            raise unusable(path, f"entry 'exact' must be True or False, found "
                                 f"{data['exact'].dtype}")
        exact = bool(data["exact"][()])
    try:
        return Decomposition(
            mean=mean, basis=basis, singular_values=sv, weights=weights,
            total_energy=float(te), image_shape=image_shape, paths=tuple(str(p) for p in paths),
            pages=None if pages is None else pages.astype(np.int32),
            residual=residual, exact=exact,
            marks=None if marks is None else marks.astype(np.int8), metadata=meta,
            singular_value_error=sv_error)
    except ValueError as exc:
        raise unusable(path, f"entries do not fit together ({exc})") from None
