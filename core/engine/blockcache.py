"""A spill file that keeps the decoded blocks of the learning pass for the scoring pass.

The exact scoring pass needs every image once more. Decoding it again from the source files
costs as much as the first decode (for small PNGs, most of the pass), so the learning pass writes
each decoded block to one anonymous temporary file and the scoring pass reads it back:

* blocks whose values are all exact 8-bit data (``Block.exact8``) are stored as uint8 (the
  decoder's own copy of the stored values, ``Block.raw8``, or else ``rint(x * 255)``, which
  recovers them) and restored bit for bit (``v / 255`` in float32 is what the decoder
  computes); other blocks are stored as float32;
* the file is written through plain ``write`` calls and read back with ``readinto`` into one
  block buffer, never memory-mapped, so the program's memory does not grow with the collection
  (the operating system's file cache may hold the pages, and gives them back when it needs to);
* a size budget caps the file: once a block would exceed it, caching stops and the scoring
  pass decodes the remaining images from their files as before. The default budget is the
  smaller of 2 GiB and a quarter of the free space of the temporary folder, or of 512 MB and an
  eighth of it when that folder is in memory (tmpfs); our own choice, no published source;
* the file is created with :func:`tempfile.TemporaryFile`, which has no name on POSIX systems
  and is removed by the operating system when it is closed, even after a crash;
* the writes run in a thread of their own, at most ``_WRITES_IN_FLIGHT`` blocks behind, so that
  the learning pass does not wait for them (they took 0.05 s of its 1.3 s on the benchmark
  collection); reading waits for them, and a write that fails keeps only the blocks before it
  (the later images are decoded from their files, as when the budget is reached).

Source images are never touched: the cache only holds copies of decoded pixels.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from typing import Iterator

import numpy as np

from modescope.core.sources.decode import Block

__all__ = ["BlockCache", "default_budget"]

_GIB = 1 << 30
_SCALE8 = np.float32(255.0)
_WRITES_IN_FLIGHT = 4


def _in_memory_filesystem(folder: str, mounts_file: str = "/proc/mounts") -> bool:
    """True when ``folder`` lies on a tmpfs or ramfs mount (Linux; False where unknown)."""
    try:
        with open(mounts_file, encoding="utf-8", errors="replace") as fh:
            mounts = [line.split()[1:3] for line in fh if len(line.split()) >= 3]
    except OSError:
        return False
    path = os.path.realpath(folder)
    best, kind = "", ""
    for point, fstype in mounts:
        point = point.replace("\\040", " ")
        inside = path == point or path.startswith(point.rstrip("/") + "/")
        if inside and len(point) >= len(best):
            best, kind = point, fstype
    return kind in ("tmpfs", "ramfs")


def default_budget(folder: str | None = None) -> int:
    """Return the default cache budget in bytes.

    min(2 GiB, free space of ``folder`` / 4); when the folder is in memory (tmpfs or ramfs, as
    /tmp is on some Linux systems) min(512 MB, free / 8), because the file then takes RAM.
    """
    folder = folder or tempfile.gettempdir()
    try:
        free = shutil.disk_usage(folder).free
    except OSError:
        return 0
    if _in_memory_filesystem(folder):
        return int(min(_GIB // 2, free // 8))
    return int(min(2 * _GIB, free // 4))


@dataclass(frozen=True)
class _Entry:
    offset: int
    start: int
    indices: np.ndarray
    exact8: bool


class BlockCache:
    """Append decoded blocks to a temporary file and read them back in order.

    Parameters
    ----------
    n_pixels : int
        Values per image.
    budget : int, optional
        Largest file size in bytes (default :func:`default_budget`). 0 disables the cache.
    folder : str, optional
        Folder of the temporary file (default: the system's temporary folder).

    Examples
    --------
    >>> with BlockCache(16) as cache:                       # doctest: +SKIP
    ...     for block in learning_blocks:
    ...         cache.put(block)
    ...     for block in cache.blocks():
    ...         score(block.data)
    """

    def __init__(self, n_pixels: int, budget: int | None = None, folder: str | None = None):
        self.n_pixels = int(n_pixels)
        self.budget = default_budget(folder) if budget is None else max(int(budget), 0)
        self._folder = folder
        self._file = None
        self._entries: list[_Entry] = []
        self._size = 0
        self.full = self.budget <= 0       # True once a block did not fit: caching stopped
        self._images = 0
        self._writer: ThreadPoolExecutor | None = None
        self._writes: list[Future] = []    # one per entry, in order

    # ------------------------------------------------------------------------------------
    def __enter__(self) -> "BlockCache":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        """Close and so remove the file (safe to call twice)."""
        if self._writer is not None:
            self._writer.shutdown(wait=True)
            self._writer = None
        self._writes = []
        if self._file is not None:
            try:
                self._file.close()
            except OSError:  # pragma: no cover - closing an unlinked temporary file
                pass
            self._file = None
        self._entries = []
        self.full = True

    @property
    def size(self) -> int:
        """Bytes written so far."""
        self._settle()
        return self._size

    @property
    def images(self) -> int:
        """Images stored so far."""
        self._settle()
        return self._images

    def _settle(self) -> None:
        """Wait for the writes in flight; after a failed one keep only the blocks before it."""
        writes, self._writes = self._writes, []
        first = len(self._entries) - len(writes)          # the entry of writes[0]
        failed = None
        for i, write in enumerate(writes):
            try:
                write.result()
            except OSError:
                # a full disk only costs speed: the passes decode the images of this block
                # and of the later ones from their files
                failed = first + i if failed is None else failed
        if failed is not None:
            kept = self._entries[:failed]
            self._size = self._entries[failed].offset
            self._images = sum(entry.indices.size for entry in kept)
            self._entries = kept
            self.full = True

    def _write(self, payload: np.ndarray) -> None:
        self._file.write(memoryview(payload).cast("B"))

    # ------------------------------------------------------------------------------------
    def put(self, block: Block) -> bool:
        """Store a block; return False (and stop caching) when it does not fit or cannot be
        written. Blocks must be put in collection order."""
        if self.full:
            return False
        m = block.data.shape[1]
        if m == 0:
            return True
        if block.data.shape[0] != self.n_pixels:
            raise ValueError(f"block has {block.data.shape[0]} values per image, the cache "
                             f"{self.n_pixels}")
        if block.exact8 and block.raw8 is not None:
            payload = block.raw8                                    # m x pixels, uint8
        elif block.exact8:
            payload = np.rint(block.data.T * _SCALE8).astype(np.uint8)
        else:
            payload = np.ascontiguousarray(block.data.T, dtype=np.float32)
        if self._size + payload.nbytes > self.budget:
            self.full = True
            return False
        try:
            if self._file is None:
                self._file = tempfile.TemporaryFile(prefix="modescope-cache-",
                                                    dir=self._folder)
        except OSError:
            # an unwritable temporary folder only costs speed: the passes decode from the
            # files instead
            self.full = True
            return False
        if self._writer is None:
            self._writer = ThreadPoolExecutor(1, thread_name_prefix="modescope-cache")
        if len(self._writes) >= _WRITES_IN_FLIGHT:
            self._writes[-_WRITES_IN_FLIGHT].exception()      # wait: bounded memory
        self._entries.append(_Entry(self._size, int(block.start),
                                    np.asarray(block.indices, dtype=np.int64).copy(),
                                    bool(block.exact8)))
        # payload is the decoder's own array of this block (or a new one): nobody changes it
        self._writes.append(self._writer.submit(self._write, payload))
        self._size += payload.nbytes
        self._images += m
        return True

    def blocks(self) -> Iterator[Block]:
        """Yield the stored blocks in order, as float32 columns equal to what was put."""
        for entry, stored in self.stored():
            yield Block(start=entry.start, indices=entry.indices, data=as_columns(stored),
                        problems=(), exact8=entry.exact8, raw8=None)

    def stored(self) -> Iterator[tuple]:
        """Yield ``(entry, rows)`` of the stored blocks in order, ``rows`` as stored (m x
        pixels, uint8 or float32): :func:`as_columns` makes them the float32 columns that were
        put, where the caller wants that work done (in another thread, say)."""
        self._settle()
        if self._file is None:
            return
        self._file.flush()
        for entry in self._entries:
            m = entry.indices.size
            itemsize = 1 if entry.exact8 else 4
            raw = np.empty(m * self.n_pixels * itemsize, dtype=np.uint8)
            self._file.seek(entry.offset)
            got = self._file.readinto(memoryview(raw))
            if got != raw.size:
                raise OSError("the temporary cache file was truncated")
            if entry.exact8:
                yield entry, raw.reshape(m, self.n_pixels)
            else:
                yield entry, raw.view(np.float32).reshape(m, self.n_pixels)


def as_columns(rows: np.ndarray) -> np.ndarray:
    """Return stored rows (see :meth:`BlockCache.stored`) as float32 image columns."""
    if rows.dtype == np.uint8:
        return np.divide(rows, _SCALE8, dtype=np.float32).T
    return rows.T


def rows_into(rows: np.ndarray, out: np.ndarray) -> None:
    """Write stored rows (see :meth:`BlockCache.stored`) into ``out`` (m x pixels, float32)
    with the values :func:`as_columns` gives."""
    if rows.dtype == np.uint8:
        np.divide(rows, _SCALE8, out=out, dtype=np.float32)
    else:
        out[...] = rows
