"""Atomic file output: write to a temporary name in the same folder, then rename.

A reader never sees a half-written file under the final name: the data goes to a hidden
temporary file ``.<name>.modescope-<host>-<pid>-<random>.tmp`` beside the target, and only a complete file is moved
into place with :func:`os.replace` (atomic on POSIX and Windows when both names are in the same
folder). On any error the temporary file is removed. Failures of the destination (missing or
read-only folder, no permission, disk full, file already present) are reported as
:class:`DestinationError`, whose message names the path.

Without ``overwrite`` an existing target is refused; the check is made before writing and again
just before the rename (a file created by another program between those two moments, a window
of microseconds, would be replaced).

Temporary files left by a process that was killed (power cut, ``kill -9``) are recognised by
their name, which holds a short digest of the host name and the writing process's id: the first
write into a folder (once per folder and process) removes those whose process no longer exists
on this host, and any older than :data:`STALE_SECONDS` (a file of another host, whose process
cannot be checked from here). Files of other programs are never touched.

Source images are never written over: :func:`refuse_sources` refuses a destination that is one
of the source files (same name, or the same file reached through a link), and the writers take
the sources to protect (``protect=``).
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import os
import re
import secrets
import socket
import time
from pathlib import Path
from typing import IO, Iterable, Iterator

from modescope.core.errors import ModescopeError
from modescope.core.validation import check_path

__all__ = ["DestinationError", "STALE_SECONDS", "atomic_writer", "atomic_write_bytes",
           "check_destination", "check_folder_writable", "destination_error", "is_temp_name",
           "refuse_sources", "remove_stale_temps", "temp_name"]

_TEMP_SUFFIX = ".tmp"
#: Age after which a temporary file of ours is removed even when its process cannot be checked.
STALE_SECONDS = 6 * 3600
_OURS = re.compile(r"^\..+\.modescope-([0-9a-f]{4})-(\d+)-[0-9a-f]{8}\.tmp$", re.DOTALL)
_HOST = hashlib.sha1(socket.gethostname().encode("utf-8", "surrogateescape")).hexdigest()[:4]
_CLEANED: set[str] = set()


class DestinationError(ModescopeError):
    """A file cannot be written where it was asked to go.

    Attributes
    ----------
    path : pathlib.Path or None
        The file or folder concerned.
    written : tuple of pathlib.Path
        Files completed before the failure, when the error ends a multi-file export.
    """

    def __init__(self, message: str, *, path=None, written=()):
        super().__init__(message)
        self.path = None if path is None else Path(path)
        self.written = tuple(Path(p) for p in written)


def is_temp_name(name: str) -> bool:
    """Return True if ``name`` (a bare file name) looks like one of our temporary files."""
    return name.startswith(".") and name.endswith(_TEMP_SUFFIX)


def temp_name(target, pid: int | None = None) -> Path:
    """Return a new temporary name beside ``target``: ``.<name>.modescope-<host>-<pid>-<random>.tmp``.

    Parameters
    ----------
    target : str or os.PathLike
        The final file.
    pid : int, optional
        Process id written into the name (default: this process).

    Returns
    -------
    pathlib.Path
    """
    target = Path(target)
    pid = os.getpid() if pid is None else pid
    return target.with_name(f".{target.name}.modescope-{_HOST}-{pid}-{secrets.token_hex(4)}"
                            f"{_TEMP_SUFFIX}")


def _process_gone(pid: int) -> bool:
    if pid <= 0:
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except (PermissionError, OSError, OverflowError):
        return False          # exists (another user's) or cannot be told: keep the file
    return False


def remove_stale_temps(folder, *, now: float | None = None) -> list[Path]:
    """Remove the temporary files our writers left in ``folder`` when they were killed.

    Only names made by :func:`temp_name` are considered; one is removed when it was made on
    this host by a process that no longer exists, or when it is older than
    :data:`STALE_SECONDS`. Errors (a file that vanished, no permission) are ignored.

    Parameters
    ----------
    folder : str or os.PathLike
        The folder to tidy.
    now : float, optional
        The current time (seconds since the epoch; default ``time.time()``).

    Returns
    -------
    list of pathlib.Path
        The files removed.
    """
    folder = check_path("folder", folder)
    now = time.time() if now is None else now
    removed = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    for entry in entries:
        match = _OURS.match(entry.name)
        if not match:
            continue
        try:
            if not entry.is_file(follow_symlinks=False):
                continue
            old = now - entry.stat(follow_symlinks=False).st_mtime > STALE_SECONDS
            gone = match.group(1) == _HOST and _process_gone(int(match.group(2)))
            if old or gone:
                os.unlink(entry.path)
                removed.append(Path(entry.path))
        except OSError:
            continue
    return removed


def _tidy_once(folder: Path) -> None:
    key = os.path.abspath(folder)
    if key not in _CLEANED:
        _CLEANED.add(key)
        remove_stale_temps(folder)


def refuse_sources(targets, sources: Iterable, *,
                   what: str = "a source image of this analysis") -> None:
    """Refuse to write any of ``targets`` when it is one of ``sources``.

    A target is refused when its absolute name equals a source's, or when it exists and is the
    same file as an existing source (:func:`os.path.samefile`: links, other spellings of the
    name, case-insensitive disks). The sources are only examined file by file when a target
    exists, so the check is cheap for a new file.

    Parameters
    ----------
    targets : str, os.PathLike or iterable of them
        The files about to be written.
    sources : iterable of str or os.PathLike
        The files that must stay untouched (source images, input files).
    what : str
        What a source is, in the message (default "a source image of this analysis").

    Raises
    ------
    TypeError
        If a target or source is not a path.
    DestinationError
        Naming the target and the source it would replace.
    """
    if isinstance(targets, (str, bytes, os.PathLike)) or not isinstance(targets, Iterable):
        targets = [targets]
    names = {}
    stats = {}
    for t in targets:
        t = check_path("target", t)
        names[os.path.normcase(os.path.abspath(t))] = t
        try:
            st = os.stat(t)
        except OSError:
            continue
        stats[(st.st_dev, st.st_ino)] = t
    if not names:
        return
    for src in sources:
        src = os.fspath(src)
        hit = names.get(os.path.normcase(os.path.abspath(src)))
        if hit is None and stats:
            try:
                st = os.stat(src)
            except (OSError, ValueError):
                continue
            hit = stats.get((st.st_dev, st.st_ino))
        if hit is not None:
            same = ("" if os.path.abspath(hit) == os.path.abspath(src)
                    else f" (the same file as {src})")
            raise DestinationError(f"refusing to write {hit}: it is {what}{same}, and "
                                   f"such a file is never replaced; choose another name or "
                                   f"folder", path=hit)


def destination_error(path, exc: OSError, action: str = "write") -> DestinationError:
    """Translate an :class:`OSError` met while writing ``path`` into a clear DestinationError.

    Parameters
    ----------
    path : str or os.PathLike
        The file that was being written.
    exc : OSError
        The error from the operating system.
    action : str
        Verb used in the message ("write", "create a file in", ...).

    Returns
    -------
    DestinationError
        Not raised; the caller raises it (``raise destination_error(p, e) from e``).
    """
    path = Path(path)
    folder = path.parent
    code = getattr(exc, "errno", None)
    detail = exc.strerror or str(exc)
    if code in (errno.ENOSPC, getattr(errno, "EDQUOT", -1)):
        msg = (f"cannot {action} {path}: the disk holding {folder} is full or over quota "
               f"({detail}); no partial file was left")
    elif code in (errno.EACCES, errno.EPERM, errno.EROFS):
        msg = (f"cannot {action} {path}: the folder {folder} is read-only or you lack "
               f"permission to write there ({detail})")
    elif code == errno.ENOENT:
        msg = f"cannot {action} {path}: the folder {folder} does not exist ({detail})"
    else:
        msg = f"cannot {action} {path}: {detail}"
    return DestinationError(msg, path=path)


def check_destination(path, *, overwrite: bool = False) -> Path:
    """Check that ``path`` can be written: its folder exists and it is not taken.

    Parameters
    ----------
    path : str or os.PathLike
        The file to write.
    overwrite : bool
        Allow replacing an existing file.

    Returns
    -------
    pathlib.Path
        ``path`` as a Path.

    Raises
    ------
    TypeError
        If ``path`` is not a path.
    DestinationError
        If the folder is missing or not a folder, ``path`` is a folder, or ``path`` exists and
        ``overwrite`` is False.
    """
    target = check_path("path", path)
    folder = target.parent
    if not folder.exists():
        raise DestinationError(f"cannot write {target}: the folder {folder} does not exist",
                               path=target)
    if not folder.is_dir():
        raise DestinationError(f"cannot write {target}: {folder} is not a folder", path=target)
    if target.is_dir():
        raise DestinationError(f"cannot write {target}: a folder of that name exists",
                               path=target)
    if not overwrite and os.path.lexists(target):
        raise DestinationError(f"{target} already exists; pass overwrite=True to replace it",
                               path=target)
    return target


def _open_temp(target: Path, mode: str, encoding, newline) -> tuple[IO, Path]:
    """Create and open a new temporary file beside ``target`` (honours the umask)."""
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0)
    _tidy_once(target.parent)
    for _ in range(100):
        tmp = temp_name(target)
        try:
            fd = os.open(tmp, flags, 0o666)
        except FileExistsError:
            continue
        except OSError as exc:
            raise destination_error(target, exc, "create a temporary file for") from exc
        try:
            if "b" in mode:
                return os.fdopen(fd, mode), tmp
            return os.fdopen(fd, mode, encoding=encoding or "utf-8", newline=newline), tmp
        except BaseException:
            os.close(fd)
            _remove_quietly(tmp)
            raise
    raise DestinationError(f"cannot create a temporary file beside {target}: 100 random "
                           f"names were all taken", path=target)


def _remove_quietly(path: Path) -> None:
    with contextlib.suppress(OSError):
        os.unlink(path)


def check_folder_writable(folder) -> Path:
    """Check that a file can be created in ``folder`` by creating and removing a temporary one.

    Parameters
    ----------
    folder : str or os.PathLike
        An existing folder.

    Returns
    -------
    pathlib.Path

    Raises
    ------
    DestinationError
        If the folder is missing, not a folder, or a file cannot be created there.
    """
    folder = check_path("folder", folder)
    if not folder.is_dir():
        raise DestinationError(f"the folder {folder} does not exist or is not a folder",
                               path=folder)
    probe = folder / "write-check"
    f, tmp = _open_temp(probe, "wb", None, None)
    f.close()
    try:
        os.unlink(tmp)
    except OSError as exc:
        raise destination_error(tmp, exc, "remove the temporary file") from exc
    return folder


@contextlib.contextmanager
def atomic_writer(path, mode: str = "wb", overwrite: bool = False, *,
                  encoding: str | None = None, newline: str | None = None,
                  fsync: bool = False, protect: Iterable = ()) -> Iterator[IO]:
    """Open a temporary file beside ``path``; move it to ``path`` when the block succeeds.

    Parameters
    ----------
    path : str or os.PathLike
        Final file name. Its folder must exist.
    mode : {"wb", "w"}
        Binary or text output.
    overwrite : bool
        Allow replacing an existing file.
    encoding : str, optional
        Text encoding for ``mode="w"`` (default UTF-8).
    newline : str, optional
        Passed to :func:`open` in text mode (use ``""`` for the csv module).
    fsync : bool
        Flush the file to the disk before the rename (slower, survives a power cut).
    protect : iterable of str or os.PathLike
        Source files that must never be replaced (see :func:`refuse_sources`), whatever
        ``overwrite`` says.

    Yields
    ------
    file object
        Open on the temporary file.

    Raises
    ------
    DestinationError
        If the target is refused (see :func:`check_destination` and
        :func:`refuse_sources`) or an :class:`OSError`
        happens while creating, writing, closing or renaming; any OSError raised inside the
        block is taken as a failure to write the destination. The temporary file is removed.
    Other exceptions raised inside the block propagate unchanged, after the temporary file is
    removed.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> with atomic_writer(d / "a.txt", "w") as f:
    ...     _ = f.write("hello")
    >>> (d / "a.txt").read_text()
    'hello'
    """
    if mode not in ("wb", "w"):
        raise ValueError(f"mode must be 'wb' or 'w', got {mode!r}")
    refuse_sources(check_path("path", path), protect)
    target = check_destination(path, overwrite=overwrite)
    f, tmp = _open_temp(target, mode, encoding, newline)
    try:
        try:
            yield f
            f.flush()
            if fsync:
                os.fsync(f.fileno())
        finally:
            f.close()
        if not overwrite and os.path.lexists(target):
            raise DestinationError(f"{target} appeared while it was being written; it was "
                                   f"left as it is (pass overwrite=True to replace it)",
                                   path=target)
        os.replace(tmp, target)
    except OSError as exc:
        _remove_quietly(tmp)
        raise destination_error(target, exc) from exc
    except BaseException:
        _remove_quietly(tmp)
        raise


def atomic_write_bytes(path, data, *, overwrite: bool = False, fsync: bool = False,
                       protect: Iterable = ()) -> Path:
    """Write ``data`` to ``path`` atomically (temporary file in the same folder, then rename).

    Parameters
    ----------
    path : str or os.PathLike
        Final file name. Its folder must exist.
    data : bytes-like
        The complete file content.
    overwrite : bool
        Allow replacing an existing file.
    fsync : bool
        Flush the file to the disk before the rename.
    protect : iterable of str or os.PathLike
        Source files that must never be replaced (see :func:`refuse_sources`).

    Returns
    -------
    pathlib.Path
        The file written.

    Raises
    ------
    TypeError
        If ``data`` is not bytes-like.
    DestinationError
        As :func:`atomic_writer`; no partial or temporary file is left.
    """
    try:
        view = memoryview(data)
    except TypeError:
        raise TypeError(f"data must be bytes-like, got {type(data).__name__}") from None
    with atomic_writer(path, "wb", overwrite, fsync=fsync, protect=protect) as f:
        f.write(view)
    return Path(path)
