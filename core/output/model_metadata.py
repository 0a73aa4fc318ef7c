"""Check the JSON metadata of a model file field by field.

The metadata is text a person can edit; every field the program reads later (options, source
size, colour, downscale, problems, refinement summary, ...) is checked once here, so a
hand-edited file ends in one message naming the field, what was expected and what was found,
never in an error deep inside a command. Fields may be missing (older files, other writers):
the readers then use their defaults. Unknown fields are kept and ignored.
"""

from __future__ import annotations

import numbers

__all__ = ["check_metadata"]


def _found(value) -> str:
    text = repr(value)
    if len(text) > 60:
        text = text[:57] + "..."
    return f"{type(value).__name__} {text}"


def _fail(field: str, expected: str, value) -> ValueError:
    return ValueError(f"metadata field {field!r} must be {expected}, found {_found(value)}")


def _is_int(value, minimum: int | None = None) -> bool:
    return (isinstance(value, numbers.Integral) and not isinstance(value, bool)
            and (minimum is None or value >= minimum))


def _is_number(value) -> bool:
    return isinstance(value, numbers.Real) and not isinstance(value, bool) and value == value


def _int(field: str, value, minimum: int = 0) -> None:
    if not _is_int(value, minimum):
        raise _fail(field, f"an integer of at least {minimum}", value)


def _text(field: str, value, none_ok: bool = False) -> None:
    if not (isinstance(value, str) or (none_ok and value is None)):
        raise _fail(field, "text" + (" or null" if none_ok else ""), value)


def _bool(field: str, value) -> None:
    if not isinstance(value, bool):
        raise _fail(field, "true or false", value)


def _dict(field: str, value) -> None:
    if not isinstance(value, dict):
        raise _fail(field, "a JSON object", value)


def _options(value) -> None:
    from modescope.core.engine.options import AnalysisOptions  # engine is imported on demand

    _dict("options", value)
    try:
        AnalysisOptions.from_dict(value)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"metadata field 'options' does not hold usable analysis options "
                         f"({exc})") from None


def _versions(value) -> None:
    _dict("versions", value)
    for key, item in value.items():
        _text(f"versions.{key}", item)


def _source_size(value) -> None:
    if not (isinstance(value, list) and len(value) == 2 and all(_is_int(v, 1) for v in value)):
        raise _fail("source_size", "[rows, cols], two positive integers", value)


def _problems(value) -> None:
    if not isinstance(value, list):
        raise _fail("problems", "a list of {path, page, reason} objects", value)
    for i, item in enumerate(value):
        field = f"problems[{i}]"
        if not isinstance(item, dict):
            raise _fail(field, "an object with path, page and reason", item)
        for key in ("path", "reason"):
            if key not in item:
                raise ValueError(f"metadata field {field!r} misses its {key!r}")
            _text(f"{field}.{key}", item[key])
        page = item.get("page")
        if page is not None and not _is_int(page, 0):
            raise _fail(f"{field}.page", "a page number of at least 0, or null", page)


def _refinement(value) -> None:
    _dict("refinement", value)
    for key in ("passes", "max_passes", "converged_modes"):
        if key in value:
            _int(f"refinement.{key}", value[key])
    for key in ("certified", "interrupted"):
        if key in value:
            _bool(f"refinement.{key}", value[key])
    if "tolerance" in value and not (_is_number(value["tolerance"])
                                     and 0 < value["tolerance"] < 1):
        raise _fail("refinement.tolerance", "a number between 0 and 1", value["tolerance"])
    unconverged = value.get("unconverged", [])
    if not (isinstance(unconverged, list) and all(_is_int(v, 1) for v in unconverged)):
        raise _fail("refinement.unconverged", "a list of mode numbers (1 or more)", unconverged)


def _updated_from(value) -> None:
    _dict("updated_from", value)
    if "images" in value:
        _int("updated_from.images", value["images"])
    if "created" in value:
        _text("updated_from.created", value["created"], none_ok=True)


def _frame_rate(value) -> None:
    if not (_is_number(value) and 0 < value < float("inf")):
        raise _fail("frame_rate", "a positive number of frames per second", value)


_CHECKS = {
    "created": lambda v: _text("created", v),
    "versions": _versions,
    "options": _options,
    "source_size": _source_size,
    "downscale": lambda v: _int("downscale", v, 1),
    "resize_mismatched": lambda v: _bool("resize_mismatched", v),
    "internal_directions": lambda v: _int("internal_directions", v),
    "stage": lambda v: _text("stage", v),
    "problems": _problems,
    "refinement": _refinement,
    "updated_from": _updated_from,
    "frame_rate": _frame_rate,
}


def check_metadata(meta: dict, channels: int, format_name: str, format_version: int) -> None:
    """Check every known field of a model's metadata.

    Parameters
    ----------
    meta : dict
        The metadata read from the file's JSON text.
    channels : int
        Channels of the analysed images (1 gray, 3 rgb), to check ``color`` against.
    format_name : str
        The format name this program writes (``format`` must equal it when present).
    format_version : int
        The newest format version this program reads.

    Raises
    ------
    ValueError
        If a field has the wrong type or value; the message names the field, what was expected
        and what was found.
    """
    if "format" in meta and meta["format"] != format_name:
        raise ValueError(f"metadata says format {meta['format']!r}, expected {format_name!r}")
    if "format_version" in meta:
        _int("format_version", meta["format_version"], 1)
        if meta["format_version"] > format_version:
            raise ValueError(f"written by a newer Modescope (format version "
                             f"{meta['format_version']}; this one reads {format_version})")
    for field, check in _CHECKS.items():
        if field in meta:
            check(meta[field])
    if "color" in meta:
        expected = {1: "gray", 3: "rgb"}.get(channels)
        if meta["color"] not in ("gray", "rgb"):
            raise _fail("color", "'gray' or 'rgb'", meta["color"])
        if expected is not None and meta["color"] != expected:
            raise ValueError(f"metadata field 'color' says {meta['color']!r} but the images "
                             f"have {channels} channel{'s' if channels != 1 else ''}")
