"""The report of an export: what was written and the compression it reached."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

__all__ = ["ExportReport"]


@dataclass(frozen=True)
class ExportReport:
    """What an export did.

    Attributes
    ----------
    folder : pathlib.Path
    written : tuple of pathlib.Path
        Complete files written, in order.
    skipped : tuple of pathlib.Path
        Planned files not written (after a cancel).
    cancelled : bool
    rank : int
    n_values, n_images : int
        ``n`` (values per image) and ``m`` (images) of the model.
    stored_numbers, full_numbers : int
        ``k (n + m + 1) + n`` and ``n m``.
    model_bytes : int or None
        Size of the compact model file (None when not written).
    source_bytes : int or None
        Total size of the distinct source files that exist (None when no model was written).
    missing_sources : tuple of str
        Source files that could not be measured or read.
    basis_limits : tuple of float
        The limit used to show each exported basis image.
    notes : tuple of str
    """

    folder: Path
    written: tuple
    skipped: tuple
    cancelled: bool
    rank: int
    n_values: int
    n_images: int
    stored_numbers: int
    full_numbers: int
    model_bytes: int | None = None
    source_bytes: int | None = None
    missing_sources: tuple = ()
    basis_limits: tuple = ()
    notes: tuple = field(default=())

    @property
    def n_written(self) -> int:
        """Number of complete files written."""
        return len(self.written)

    @property
    def number_ratio(self) -> float:
        """``n m / (k (n + m + 1) + n)``: how many times fewer numbers the model stores."""
        return self.full_numbers / self.stored_numbers

    @property
    def byte_ratio(self) -> float | None:
        """Source bytes / model bytes, or None when either is unknown or zero."""
        if not self.model_bytes or not self.source_bytes:
            return None
        return self.source_bytes / self.model_bytes

    def summary(self) -> str:
        """Return a few lines describing the export, for a log or the command line."""
        lines = []
        state = "cancelled after" if self.cancelled else "wrote"
        lines.append(f"{state} {self.n_written} file(s) in {self.folder}"
                     + (f" ({len(self.skipped)} not written)" if self.skipped else ""))
        lines.append(
            f"rank {self.rank} model: {self.stored_numbers} numbers stored, "
            f"k(n+m+1)+n with k={self.rank}, n={self.n_values} values per image, "
            f"m={self.n_images} images, against n*m={self.full_numbers} "
            f"({_times(self.number_ratio, 'fewer', 'more')})")
        if self.model_bytes is not None:
            src = "unknown" if self.source_bytes is None else f"{self.source_bytes} bytes"
            ratio = ("" if self.byte_ratio is None
                     else f" ({_times(self.byte_ratio, 'smaller', 'larger')})")
            lines.append(f"model file {self.model_bytes} bytes against source files {src}"
                         f"{ratio}")
        if self.missing_sources:
            lines.append(f"{len(self.missing_sources)} source file(s) missing, e.g. "
                         f"{self.missing_sources[0]}")
        lines.extend(self.notes)
        return "\n".join(lines)


def _times(ratio: float, less: str, more: str) -> str:
    if ratio >= 1.0:
        return f"{ratio:.3g} times {less}"
    return f"{1.0 / ratio:.3g} times {more}"
