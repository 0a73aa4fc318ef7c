"""Find the images of a collection and check that they can be analysed together.

:func:`scan_sources` turns a list of folders and files into a :class:`SourceSet`: the usable
images in natural sort order, the reference size every image is analysed at, and a list of
:class:`Problem` entries for everything that was skipped, each with a reason a user can act on.

Only file headers are read during the scan (Pillow opens files lazily), so a scan of ten
thousand files takes seconds. The pixels are decoded later by :mod:`modescope.core.sources.decode`.

Rules
-----
* A folder contributes the files directly inside it (every file below it with
  ``recursive=True``) whose suffix is one of :data:`SUPPORTED_SUFFIXES`, compared
  case-insensitively. Hidden files and folders (name starting with ".") below a folder given
  are skipped silently, and so are files of other types (README.md, thumbs.db, ...).
  An entry with a supported suffix that is not a regular file is a problem naming what it is:
  a symbolic link to a missing file or one that loops, a named pipe (FIFO, never opened), a
  socket or a device. Folders are not problems (``recursive=True`` enters them).
* A file given explicitly is taken whatever its suffix, as long as Pillow can open it.
* Pillow's warnings (a very large image, damaged EXIF metadata) are never printed: on a file
  that is used they become :attr:`SourceSet.notes`, on a file that is refused they are part of
  its problem.
* The same file reached twice (given twice, or through two folders) is kept once, at its first
  occurrence.
* Inside a folder the files are ordered by :func:`natural_key` over their path relative to the
  folder ("frame_2" before "frame_10", case-insensitive); the order of the sources given is kept.
* Every page of a multi-page TIFF is one image (pages are numbered from 0). Other image formats
  contribute their first frame only.
* Videos, NumPy ``.npy`` stacks and HDF5 files holding one stack (:data:`SEQUENCE_SUFFIXES`,
  found in folders like images)
  contribute one image per frame, the page being the frame number from 0 in time order; the
  ``frames`` range of :func:`scan_sources` selects which (see
  :mod:`modescope.core.sources.frames`, :mod:`.video` and :mod:`.arrays`). A video or stack
  that cannot be used is a problem with a plain reason, as a damaged image is.
* Sizes are ``(rows, cols)`` after the EXIF orientation of the file is applied (orientations 5-8
  swap rows and cols), which is how an image viewer shows them. For TIFF files Pillow itself
  reports the oriented size and applies the Orientation tag while decoding. The orientation is
  read by :func:`modescope.core.sources.headers.orientation`, the same reading the decoder
  uses (it also finds a PNG ``eXIf`` chunk that follows the image data).
* The reference size is the most common size (ties: the size found first in sort order). Images
  of another size are skipped with a problem, or kept when ``resize_mismatched=True`` (the
  reader then resizes them to the reference size).
* Pillow modes accepted: 1, L, LA, P, PA, RGB, RGBA, RGBX, I;16 (and I;16B, I;16L, I;16N), I, F,
  CMYK, YCbCr. Any other mode is a problem. Note that Pillow reads 16-bit-per-channel colour
  files (48-bit RGB PNG or TIFF) as 8-bit RGB; 16-bit gray files keep their 16 bits.
"""

from __future__ import annotations

import gc
import os
import re
import sys
from collections import Counter
from dataclasses import dataclass
from typing import Callable, Iterable

from modescope.core.sources.headers import (not_regular_reason, read_headers, short_message,
                                            warning_capture)

from modescope.core.sources.frames import FrameRange
from modescope.core.sources.sequences import (SEQUENCE_SUFFIXES, SequenceError, is_sequence,
                                              probe_sequence)
from modescope.core.validation import check_bool, check_callable, check_choice
from modescope.core.errors import AnalysisCancelled, NoUsableImagesError

__all__ = [
    "Problem",
    "ImageRef",
    "SourceSet",
    "SUPPORTED_SUFFIXES",
    "SEQUENCE_SUFFIXES",
    "SUPPORTED_MODES",
    "scan_sources",
    "natural_key",
]

SUPPORTED_SUFFIXES = (".png", ".jpg", ".jpeg", ".tif", ".tiff", ".bmp", ".webp")

#: Pillow modes the reader can decode.
SUPPORTED_MODES = ("1", "L", "LA", "P", "PA", "RGB", "RGBA", "RGBX", "I;16", "I;16B", "I;16L",
                   "I;16N", "I", "F", "CMYK", "YCbCr")

_COLORS = ("gray", "rgb")
_MAX_PROBLEMS_IN_MESSAGE = 5


@dataclass(frozen=True, slots=True)
class Problem:
    """A file, or one page of a file, that was skipped, and why.

    Attributes
    ----------
    path : str
        The file (or folder) concerned.
    reason : str
        A sentence a user understands, e.g. "size 64x80 differs from the reference 96x128
        (skipped; use --resize-mismatched to include it)".
    page : int or None
        Page of a multi-page file (numbered from 0), None when the whole file is concerned.
    """

    path: str
    reason: str
    page: int | None = None

    def __str__(self) -> str:
        where = self.path if self.page is None else f"{self.path} (page {self.page})"
        return f"{where}: {self.reason}"


@dataclass(frozen=True, slots=True)
class ImageRef:
    """One image of a collection, as found by the scan (no pixels).

    Attributes
    ----------
    path : str
        Absolute path of the file.
    page : int
        Page of a multi-page TIFF, numbered from 0 (0 for every other file).
    size : tuple of int
        ``(rows, cols)`` after the EXIF orientation is applied.
    mode : str
        Pillow mode of the file, e.g. "L", "RGB", "I;16", "F", "RGBA".
    noted : bool
        True when Pillow warned while the scan read the header (the notes are in
        :attr:`SourceSet.notes`): only then does the decoder capture Pillow's warnings again
        (the capture holds a lock that would otherwise make the decoding threads take turns).
    """

    path: str
    page: int = 0
    size: tuple[int, int] = (0, 0)
    mode: str = ""
    noted: bool = False


@dataclass(frozen=True)
class SourceSet:
    """The validated image collection handed to the reader.

    Attributes
    ----------
    images : tuple of ImageRef
        Usable images, in natural sort order (source order kept between sources).
    reference_size : tuple of int
        ``(rows, cols)`` every image is analysed at: the most common size.
    color : str
        "gray" or "rgb".
    resize_mismatched : bool
        True when images of another size are kept and resized by the reader.
    problems : tuple of Problem
        Every skipped file or page with its reason.
    notes : tuple of Problem
        Files that are used but drew a warning from Pillow (a very large image, damaged EXIF
        metadata), each with a sentence; empty by default.
    frame_rate : float or None
        Frames per second stated by the video files of the set (None when there is none, or
        when they disagree; see :mod:`modescope.core.sources.video`).
    frame_step : int
        Frames of each video or array file between two of its images in the set (the step of
        the frame range applied by the scan; 1 when none was applied or the set holds no such
        file).
    """

    images: tuple[ImageRef, ...]
    reference_size: tuple[int, int]
    color: str
    resize_mismatched: bool
    problems: tuple[Problem, ...]
    notes: tuple[Problem, ...] = ()
    frame_rate: float | None = None
    frame_step: int = 1

    @property
    def n_images(self) -> int:
        """Number of usable images."""
        return len(self.images)

    @property
    def channels(self) -> int:
        """1 for gray, 3 for rgb."""
        return 3 if self.color == "rgb" else 1

    @property
    def image_shape(self) -> tuple[int, int, int]:
        """``(rows, cols, channels)`` at source resolution."""
        return (self.reference_size[0], self.reference_size[1], self.channels)


_NATURAL_SPLIT = re.compile(r"([0-9]+)")


def natural_key(name: str) -> tuple:
    """Return a sort key that orders runs of digits by their value, ignoring case.

    Parameters
    ----------
    name : str
        A file name or one component of a path.

    Returns
    -------
    tuple
        Compare keys with ``<``: "frame_2" sorts before "frame_10", "B" after "a". Names that
        differ only in case or leading zeros are ordered by the name itself, so the order is
        total and repeatable.

    Raises
    ------
    TypeError
        If ``name`` is not a str.

    Examples
    --------
    >>> sorted(["frame_10.png", "Frame_2.png", "frame_1.png"], key=natural_key)
    ['frame_1.png', 'Frame_2.png', 'frame_10.png']
    """
    if not isinstance(name, str):
        raise TypeError(f"name must be a str, got {type(name).__name__} {name!r}")
    parts = []
    for i, chunk in enumerate(_NATURAL_SPLIT.split(name)):
        if i % 2:  # a run of digits
            parts.append((1, int(chunk), ""))
        elif chunk:
            parts.append((0, 0, chunk.casefold()))
    return (tuple(parts), name)


def _path_key(relative: str) -> tuple:
    """Natural key over every component of a relative path."""
    return tuple(natural_key(part) for part in re.split(r"[\\/]", relative))


def _as_source_list(sources) -> list[str]:
    if isinstance(sources, (str, os.PathLike)):
        sources = [sources]
    elif isinstance(sources, bytes) or not isinstance(sources, Iterable):
        raise TypeError("sources must be a folder or file path, or a sequence of them; got "
                        f"{type(sources).__name__}")
    result = []
    for i, item in enumerate(sources):
        if not isinstance(item, (str, os.PathLike)):
            raise TypeError(f"sources[{i}] must be a str or path, got {type(item).__name__} "
                            f"{item!r}")
        item = os.fspath(item)
        if not isinstance(item, str):
            raise TypeError(f"sources[{i}] must be a str path, got bytes {item!r}")
        if item == "":
            raise ValueError(f"sources[{i}] is an empty string; expected a folder or file path")
        result.append(item)
    if not result:
        raise ValueError("sources must name at least one folder or file")
    return result


def _is_hidden(name: str) -> bool:
    return name.startswith(".")


def _has_supported_suffix(name: str) -> bool:
    suffix = os.path.splitext(name)[1].lower()
    return suffix in SUPPORTED_SUFFIXES or suffix in SEQUENCE_SUFFIXES


def _report_irregular(path: str, problems: list[Problem]) -> None:
    """Add a problem for an entry of a folder that is neither a regular file nor a folder."""
    reason = not_regular_reason(path)
    if reason:
        problems.append(Problem(path, reason))


def _list_folder(folder: str, recursive: bool,
                 problems: list[Problem]) -> list[tuple[str, bool]]:
    """Return ``(path, is_link)`` of the supported files of ``folder`` in natural order.

    ``folder`` is absolute and normalised, so the paths are too (no copy per file: per-file
    bookkeeping is what grows with a collection).
    """
    # the sort keys are made only when sorting, after every kept path exists: they are freed
    # together then, instead of leaving memory in pieces between the paths that stay
    found: list[tuple[str, bool]] = []
    if recursive:
        def on_error(err: OSError) -> None:
            problems.append(Problem(err.filename or folder,
                                    f"folder cannot be read ({err.strerror or err})"))

        for dirpath, dirnames, filenames in os.walk(folder, onerror=on_error):
            dirnames[:] = [d for d in dirnames if not _is_hidden(d)]
            for fname in filenames:
                if _is_hidden(fname) or not _has_supported_suffix(fname):
                    continue
                full = os.path.join(dirpath, fname)
                if not os.path.isfile(full):
                    _report_irregular(full, problems)
                    continue
                found.append((full, os.path.islink(full)))
    else:
        try:
            with os.scandir(folder) as it:
                for entry in it:
                    if _is_hidden(entry.name) or not _has_supported_suffix(entry.name):
                        continue
                    try:
                        if not entry.is_file():
                            _report_irregular(entry.path, problems)
                            continue
                        is_link = entry.is_symlink()
                    except OSError as err:
                        problems.append(Problem(entry.path, not_regular_reason(entry.path)
                                                or f"cannot be read ({err.strerror or err})"))
                        continue
                    found.append((entry.path, is_link))
        except OSError as err:
            problems.append(Problem(folder, f"folder cannot be read ({err.strerror or err})"))
            return []
    start = len(folder.rstrip("/\\")) + 1
    found.sort(key=lambda item: _path_key(item[0][start:]))
    return found


def _probe_sequence(path: str, problems: list[Problem], sizes: dict,
                    frames: FrameRange | None, rates: dict | None) -> list[ImageRef]:
    """Return one ImageRef per selected frame of a video or array stack (see _probe)."""
    try:
        numbers, mode, rows, cols, rate = probe_sequence(path, frames)
    except SequenceError as exc:
        problems.append(Problem(path, exc.reason))
        return []
    if rates is not None:
        rates[path] = rate
    size = sizes.setdefault((rows, cols), (rows, cols))
    mode = sys.intern(mode)
    return [ImageRef(path=path, page=n, size=size, mode=mode) for n in numbers]


def _probe(path: str, problems: list[Problem], sizes: dict | None = None,
           notes: list[Problem] | None = None, caught: list | None = None,
           frames: FrameRange | None = None, rates: dict | None = None) -> list[ImageRef]:
    """Open ``path`` (header only) and return one ImageRef per usable page.

    ``sizes`` shares one tuple per distinct size among the refs of a scan (a large collection
    holds one size many times over: per-image bookkeeping is what grows with the collection).
    Pillow's warnings on a file that is kept go to ``notes``; on a file that is refused they
    are part of its problem.
    """
    if is_sequence(path):
        return _probe_sequence(path, problems, {} if sizes is None else sizes, frames, rates)
    said: list[str] = []
    try:
        pages = read_headers(path, said, SUPPORTED_MODES, caught)
    except MemoryError:
        raise
    except Exception as exc:  # noqa: BLE001 - Pillow plugins raise many types on bad files
        reason = f"not an image Modescope can read ({short_message(exc, path)})"
        problems.append(Problem(path, "; ".join([reason] + said)))
        return []
    if said and notes is not None:
        notes.extend(Problem(path, sentence) for sentence in said)
    sizes = {} if sizes is None else sizes
    refs: list[ImageRef] = []
    for page, mode, rows, cols in pages:
        page_label = page if len(pages) > 1 else None
        if mode not in SUPPORTED_MODES:
            problems.append(Problem(
                path, f"image mode {mode!r} is not supported (supported: "
                      f"{', '.join(SUPPORTED_MODES)})", page_label))
            continue
        if rows < 1 or cols < 1:
            problems.append(Problem(path, f"image has no pixels (size {rows}x{cols})",
                                    page_label))
            continue
        size = sizes.setdefault((rows, cols), (rows, cols))
        refs.append(ImageRef(path=path, page=page, size=size, mode=sys.intern(mode),
                             noted=bool(said)))
    return refs


def scan_sources(sources, *, recursive: bool = False, color: str = "gray",
                 resize_mismatched: bool = False, frames: FrameRange | None = None,
                 progress: Callable[[int, int], None] | None = None,
                 cancel: Callable[[], bool] | None = None,
                 found: list | None = None) -> SourceSet:
    """Find the images in folders and files and check that they can be analysed together.

    Parameters
    ----------
    sources : str, os.PathLike or sequence of them
        Folders and files, in the order wanted.
    recursive : bool, default False
        Take the supported files of every folder below a folder given (hidden folders skipped).
    color : {"gray", "rgb"}, default "gray"
        How the reader will decode the images: one luma channel or three colour channels.
    resize_mismatched : bool, default False
        Keep images whose size differs from the reference size (the reader resizes them)
        instead of skipping them with a problem.
    frames : FrameRange, optional
        Frames taken from each video or array stack (numbered from 0, ``stop`` excluded);
        None takes every frame. Image files and TIFF pages are not affected.
    progress : callable(done, total), optional
        Called after each file header is read; ``total`` is the number of files found.
    cancel : callable() -> bool, optional
        Checked before each file; when it returns True the scan stops.
    found : list, optional
        An empty list that receives every image as soon as its header is read, in order,
        before the sizes are compared (for a reader in another thread: appending to a list
        is atomic). The images returned are these, less those of another size.

    Returns
    -------
    SourceSet
        Usable images in order, the reference size, the colour choice and the problems.

    Raises
    ------
    TypeError
        If an argument has the wrong type.
    ValueError
        If ``sources`` is empty or ``color`` is not "gray" or "rgb".
    NoUsableImagesError
        If no usable image was found; the message says how many files were looked at and
        lists the first problems.
    AnalysisCancelled
        If ``cancel()`` returned True.

    Examples
    --------
    >>> sset = scan_sources(["frames/"], color="gray")          # doctest: +SKIP
    >>> sset.n_images, sset.image_shape                          # doctest: +SKIP
    (240, (96, 128, 1))
    """
    source_list = _as_source_list(sources)
    check_bool("recursive", recursive)
    check_choice("color", color, _COLORS)
    check_bool("resize_mismatched", resize_mismatched)
    check_callable("progress", progress)
    check_callable("cancel", cancel)
    if frames is not None and not isinstance(frames, FrameRange):
        raise TypeError(f"frames must be a FrameRange or None, got {type(frames).__name__}")

    problems: list[Problem] = []
    files: list[str] = []
    seen: set[str] = set()

    def add(path: str, key: str) -> None:
        # one file reached twice (overlapping folders, links, a file also named on its own)
        # is analysed once
        if key not in seen:
            seen.add(key)
            files.append(path)

    def real(path: str) -> str:
        return os.path.normcase(os.path.realpath(path))

    for source in source_list:
        if cancel is not None and cancel():
            raise AnalysisCancelled("scan of the image sources was cancelled")
        full = os.path.abspath(source)
        if os.path.isdir(full):
            real_folder = real(full)
            as_is = real_folder == full        # no link on the way: a path is its own key
            for path, is_link in _list_folder(full, recursive, problems):
                if is_link:
                    add(path, real(path))
                elif as_is:
                    add(path, path)
                else:
                    add(path, os.path.join(real_folder, os.path.relpath(path, full)))
        elif os.path.isfile(full):
            add(full, real(full))
        else:
            problems.append(Problem(full, not_regular_reason(full) or "does not exist"))

    # the natural-sort keys of a large folder (about 0.5 KB a file) are freed by now, but the
    # interpreter keeps their memory until a full collection: 10 MB per 20,000 files measured
    # here, which would otherwise stay for the whole analysis (a full collection costs tens of
    # milliseconds, so only after large listings)
    if len(files) > 5000:
        gc.collect()
    total = len(files)
    if found is None:
        found = []
    elif not isinstance(found, list):
        raise TypeError(f"found must be a list or None, got {type(found).__name__}")
    elif found:
        raise ValueError(f"found must be an empty list, got one of {len(found)} items")
    sizes: dict = {}
    notes: list[Problem] = []
    rates: dict = {}                         # video or stack -> its frame rate (or None)
    with warning_capture() as caught:        # one capture for every header read
        for done, path in enumerate(files, start=1):
            if cancel is not None and cancel():
                raise AnalysisCancelled("scan of the image sources was cancelled")
            found.extend(_probe(path, problems, sizes, notes, caught, frames, rates))
            if progress is not None:
                progress(done, total)

    multi_page = {ref.path for ref in found if ref.page > 0 or ref.path in rates}
    usable: list[ImageRef] = []
    reference_size = (0, 0)
    if found:
        counts = Counter(ref.size for ref in found)
        best = max(counts.values())
        reference_size = next(ref.size for ref in found if counts[ref.size] == best)
        for ref in found:
            if ref.size == reference_size or resize_mismatched:
                usable.append(ref)
            else:
                page = ref.page if ref.path in multi_page else None
                problems.append(Problem(
                    ref.path,
                    f"size {ref.size[0]}x{ref.size[1]} differs from the reference "
                    f"{reference_size[0]}x{reference_size[1]} (skipped; use "
                    "--resize-mismatched to include it)", page))

    if not usable:
        listed = "; ".join(str(p) for p in problems[:_MAX_PROBLEMS_IN_MESSAGE])
        more = len(problems) - _MAX_PROBLEMS_IN_MESSAGE
        if more > 0:
            listed += f"; and {more} more"
        where = ", ".join(repr(s) for s in source_list[:3])
        if len(source_list) > 3:
            where += f" and {len(source_list) - 3} more"
        if total == 0 and not problems:
            hint = "" if recursive else "; subfolders are searched only with the recursive option"
            message = (f"no usable image in {where}: 0 files looked at (no file with suffix "
                       f"{', '.join(SUPPORTED_SUFFIXES)}{hint})")
        else:
            message = (f"no usable image in {where}: {total} file"
                       f"{'' if total == 1 else 's'} looked at"
                       + (f"; problems: {listed}" if listed else ""))
        raise NoUsableImagesError(message)

    return SourceSet(images=tuple(usable), reference_size=reference_size, color=color,
                     resize_mismatched=resize_mismatched, problems=tuple(problems),
                     notes=tuple(notes), frame_rate=_common_rate(rates),
                     frame_step=frames.step if frames is not None and rates else 1)


def _common_rate(rates: dict) -> float | None:
    """The frame rate the videos of a scan agree on (None: none stated, or they differ)."""
    stated = {round(rate, 9) for rate in rates.values() if rate is not None}
    return stated.pop() if len(stated) == 1 and None not in rates.values() else None
