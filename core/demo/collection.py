"""Writing the demo collection: every frame rendered and written atomically into a folder."""

from __future__ import annotations

import concurrent.futures
from pathlib import Path
from typing import Callable

import numpy as np
from PIL import Image

from modescope.core.demo.render import render
from modescope.core.demo.scene import check_seed, check_size
from modescope.core.demo.schedule import NAME_RE, check_fmt, check_n_frames, frame_name
from modescope.core.output.atomic import atomic_writer, destination_error
from modescope.core.validation import check_bool, check_callable, check_int, check_path

__all__ = ["write_collection"]


def _encode_and_write(img: np.ndarray, path: Path, fmt: str, quality: int) -> None:
    """Write ``img`` to ``path`` atomically (temporary name in the same folder, then renamed)."""
    with atomic_writer(path, "wb", overwrite=True) as fh:
        pil = Image.fromarray(img)
        if fmt == "jpg":
            pil.save(fh, format="JPEG", quality=quality)
        else:
            pil.save(fh, format="PNG", compress_level=3)


def write_collection(folder, n_frames: int = 240, *, size=(96, 128), seed: int = 7,
                     fmt: str = "jpg", quality: int = 90,
                     progress: Callable[[int, int], object] | None = None, workers: int = 1,
                     overwrite: bool = False,
                     cancel: Callable[[], bool] | None = None) -> list[Path]:
    """Write the demo collection as colour image files into a folder.

    Each frame is rendered with :func:`~modescope.core.demo.render.render_frame` and written
    through :mod:`modescope.core.output.atomic` (a temporary name in the same folder, then
    renamed into place), so a file either holds a whole frame or does not exist. The folder is
    created when missing.

    Parameters
    ----------
    folder : str or os.PathLike
        Target folder. It must be missing or empty unless ``overwrite`` is True.
    n_frames : int, default 240
        Number of frames, ``1 <= n_frames <= 1,000,000``.
    size : (int, int), default (96, 128)
        ``(rows, cols)`` of every frame, each between 24 and 4096.
    seed : int, default 7
        Seed of the scene and noise, a non-negative integer.
    fmt : {"jpg", "png"}, default "jpg"
        File format; PNG is lossless, so decoded PNG frames equal
        :func:`~modescope.core.demo.render.render_frame` exactly.
    quality : int, default 90
        JPEG quality, 1-100 (ignored for PNG).
    progress : callable, optional
        Called as ``progress(done, total)`` from the calling thread after each frame is written.
    workers : int, default 1
        Number of threads rendering and encoding frames, 1-64.
    overwrite : bool, default False
        Allow a non-empty folder. Frames of the same names are replaced and older demo frames
        (files named like ``tray_d03_h14.jpg`` or ``tray_0042_d01_h10m05.png``) that are not
        part of the new collection are removed, so the folder holds one collection; other files
        are left alone.
    cancel : callable, optional
        Called without arguments before each frame is started; when it returns True no further
        frame is started and the files written so far are returned.

    Returns
    -------
    list of pathlib.Path
        The written files in frame order: all ``n_frames`` of them, or fewer when cancelled.

    Raises
    ------
    TypeError
        If an argument has the wrong type.
    ValueError
        If an argument is out of range, ``folder`` is a file, or ``folder`` is not empty and
        ``overwrite`` is False.
    DestinationError
        If the folder cannot be created or a file cannot be written (a
        :class:`~modescope.core.output.atomic.DestinationError`, whose message names the
        path; no partial or temporary file is left).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> paths = write_collection(pathlib.Path(tempfile.mkdtemp()) / "demo", 24, size=(32, 48))
    >>> paths[0].name, len(paths)
    ('tray_d01_h00.jpg', 24)
    """
    folder = check_path("folder", folder)
    n_frames = check_n_frames(n_frames)
    rows, cols = check_size(size)
    seed = check_seed(seed)
    fmt = check_fmt(fmt)
    quality = check_int("quality", quality, minimum=1, maximum=100)
    check_callable("progress", progress)
    workers = check_int("workers", workers, minimum=1, maximum=64)
    overwrite = check_bool("overwrite", overwrite)
    check_callable("cancel", cancel)
    _check_folder(folder, overwrite)
    names = [frame_name(i, n_frames, fmt=fmt) for i in range(n_frames)]
    _prepare_folder(folder, set(names), overwrite)
    paths = [folder / name for name in names]

    def job(i: int) -> None:
        _encode_and_write(render(i, n_frames, rows, cols, seed, True), paths[i], fmt, quality)

    if workers == 1:
        done = _write_in_turn(job, n_frames, progress, cancel)
    else:
        done = _write_in_threads(job, n_frames, workers, progress, cancel)
    return [paths[i] for i in done]


def _check_folder(folder: Path, overwrite: bool) -> None:
    """Refuse a file, or a non-empty folder without ``overwrite``."""
    if folder.exists() and not folder.is_dir():
        raise ValueError(f"folder must be a directory, but {str(folder)!r} is a file")
    if folder.is_dir() and not overwrite:
        existing = [p.name for p in folder.iterdir()]
        if existing:
            shown = ", ".join(sorted(existing)[:3]) + (", ..." if len(existing) > 3 else "")
            raise ValueError(f"folder {str(folder)!r} is not empty ({len(existing)} entries: "
                             f"{shown}); choose an empty folder or pass overwrite=True")


def _prepare_folder(folder: Path, keep: set[str], overwrite: bool) -> None:
    """Create the folder; with ``overwrite``, remove older demo frames not in ``keep``."""
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise destination_error(folder, exc, "create the folder") from exc
    if not overwrite:
        return
    for p in folder.iterdir():
        if NAME_RE.match(p.name) and p.name not in keep and p.is_file():
            try:
                p.unlink()
            except OSError as exc:
                raise destination_error(p, exc, "remove the older demo frame") from exc


def _write_in_turn(job, n_frames: int, progress, cancel) -> list[int]:
    """Write the frames one after the other; return the indices written."""
    for i in range(n_frames):
        if cancel is not None and cancel():
            return list(range(i))
        job(i)
        if progress is not None:
            progress(i + 1, n_frames)
    return list(range(n_frames))


def _write_in_threads(job, n_frames: int, workers: int, progress, cancel) -> list[int]:
    """Write the frames with ``workers`` threads, at most 4 per thread queued; return the
    indices written, sorted."""
    with concurrent.futures.ThreadPoolExecutor(max_workers=workers) as pool:
        pending: dict[concurrent.futures.Future, int] = {}
        written: list[int] = []
        next_index = 0
        cancelled = False
        try:
            while (next_index < n_frames and not cancelled) or pending:
                while next_index < n_frames and len(pending) < 4 * workers and not cancelled:
                    if cancel is not None and cancel():
                        cancelled = True
                        break
                    pending[pool.submit(job, next_index)] = next_index
                    next_index += 1
                if not pending:
                    break
                finished, _ = concurrent.futures.wait(
                    pending, return_when=concurrent.futures.FIRST_COMPLETED)
                for fut in finished:
                    index = pending.pop(fut)
                    fut.result()
                    written.append(index)
                    if progress is not None:
                        progress(len(written), n_frames)
        except BaseException:
            for fut in pending:
                fut.cancel()
            raise
    return sorted(written)
