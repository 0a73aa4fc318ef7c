"""Export an analysis: rank-k previews, basis images, a contact sheet, CSV tables and a compact
model file.

What is written (``what`` choices)
----------------------------------
``previews``
    The rank-k reconstruction ``mean + basis[:, :k] @ weights[:k, i]`` of each chosen image,
    clipped to [0, 1] and quantised (8-bit: ``rint(x * 255)``; 16-bit: ``rint(x * 65535)``;
    ``rint`` rounds to the nearest level, ties to even). Formats: PNG (8-bit), JPEG (8-bit,
    ``quality``), WebP (8-bit, lossy, ``quality``) and TIFF (16-bit, uncompressed). Gray images are
    written as single-channel files, RGB as RGB; WebP cannot hold one channel, so gray WebP
    previews are stored with three equal channels. Resolution: the analysis resolution (after any
    downscale); with ``upsample=True`` the reconstruction is resized, before clipping, to the
    source size ``decomposition.metadata["source_size"] = [rows, cols]`` with Pillow's bicubic
    filter applied to each channel in floating point.

    File names: ``<stem>_r<k>.<ext>`` where ``<stem>`` is the source file name without its
    suffix; ``_p<page>`` (page numbered from 0, as stored) is added before ``_r<k>`` when the
    source file contributes more than one image or its page is not 0. When two images would get
    the same name (compared case-insensitively, as on Windows and macOS), e.g. equal stems in
    different folders, each of them gets ``_i<index>`` added, ``index`` being its column in the
    model (0-based). The rule is applied over all images of the model, so an image's name does
    not depend on which images are chosen.
``basis``
    ``mean.png`` (gray or RGB, 8-bit) and ``basis_001.png`` ... ``basis_<k>.png`` (numbered from
    1, matching the ``w1..wk`` columns), at analysis resolution. Gray basis images use the
    diverging map of :mod:`modescope.core.output.colormap` with a per-image limit equal to the largest
    absolute value of that basis image (-limit teal, 0 off-white, +limit brick). RGB basis images
    are shown per channel as ``0.5 + value / (2 * limit)`` (mid-gray is zero), limit the largest
    absolute value over the three channels of that basis image. The limits are in
    :attr:`ExportReport.basis_limits`.
``sheet``
    ``basis_sheet.png``: the first ``sheet_count`` basis images as tiles, each with its number
    and energy share written under it.
``weights``
    ``weights_r<k>.csv``: ``path, page, w1..wk`` for each chosen image.
``spectrum``
    ``spectrum.csv``: ``index, singular_value, energy_share, cumulative_share`` for every mode
    stored in the model (index from 1).
``quality``
    ``quality_r<k>.csv``: ``path, page, relative_error, psnr_db, note`` for each chosen image:
    the clipped rank-k preview (floating point, before quantisation, at analysis resolution)
    against the source re-read at analysis resolution
    (:func:`modescope.core.engine.pipeline.load_analysis_image`). ``relative_error = ||x - x_k|| /
    ||x||``; ``psnr_db = 10 log10(1 / MSE)`` with peak 1.0 and the MSE over every pixel value,
    written ``inf`` when the MSE is 0. A source that cannot be read leaves the numbers empty and
    says why in ``note``.
``model``
    ``model_r<k>.npz`` (``model_r<k>_f16.npz`` with ``float16=True``): the model truncated to
    rank k, written with :func:`modescope.core.output.model_file.save_model`, optionally storing mean,
    basis and weights as float16.

CSV files have a header row, are written with the :mod:`csv` module (comma separated, UTF-8,
``\\r\\n`` line ends) and floats are written in Python's shortest round-trip form.

Compression ratios (always in the report)
-----------------------------------------
With ``n`` values per image (pixels x channels at analysis resolution) and ``m`` images, the
rank-k model stores ``k (n + m + 1) + n`` numbers (basis k n, weights k m, singular values k,
mean n) against ``n m`` for the data matrix. When the model file is written, its size on disk is
compared with the total size of the source files (each file counted once; missing files are
listed and left out of the total).

Safety
------
Every file goes to a temporary name in the destination folder and is renamed when complete
(:mod:`modescope.core.output.atomic`). All target names are checked before anything is written: an
existing file is refused unless ``overwrite=True``, and a folder that holds any source image is
refused unless ``allow_source_folder=True``; the folder is also checked to accept a new file. A
full or read-only destination raises :class:`~modescope.core.output.atomic.DestinationError` (its
``written`` attribute lists the files completed before), leaving no partial or temporary file.
``cancel()`` is checked before each file (and between images while the quality table is
computed); a cancelled export keeps the complete files and says how many were written.
"""

from __future__ import annotations

import csv
import io
import math
import numbers
import os
import struct
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path, PurePath
from typing import Callable, Iterable, Sequence

import numpy as np
from PIL import Image, ImageDraw, ImageFont

from modescope.core.validation import check_choice, check_float, check_int
from modescope.core.output.atomic import (DestinationError, atomic_write_bytes,
                     check_folder_writable)
from modescope.core.output.colormap import describe_mapping, signed_to_rgb
from modescope.core.decomposition import Decomposition
from modescope.core.errors import ModescopeError

__all__ = [
    "WHAT_CHOICES", "FORMATS", "ExportPlan", "ExportReport", "ContactSheet",
    "plan_export", "run_export", "export",
    "quantize", "preview_image", "upsample_image", "encode_image", "encode_tiff16",
    "preview_names", "basis_image_rgb", "mean_image", "contact_sheet", "share_caption",
    "psnr", "relative_error", "compression_numbers", "source_file_bytes", "select_images",
]

#: Parts of an export, in the order they are written.
WHAT_CHOICES = ("spectrum", "weights", "model", "basis", "sheet", "previews", "quality")
#: Preview formats and their file suffix.
FORMATS = {"png": ".png", "jpg": ".jpg", "webp": ".webp", "tiff": ".tif"}
_PIL_FORMAT = {"png": "PNG", "jpg": "JPEG", "webp": "WEBP"}

#: Longest side of a contact-sheet tile is brought into this range.
_TILE_MIN, _TILE_MAX = 96, 256


# ----------------------------------------------------------------------------------------------
# small numeric helpers
# ----------------------------------------------------------------------------------------------
def quantize(values, bits: int = 8) -> np.ndarray:
    """Clip values to [0, 1] and quantise them to 8 or 16 bits.

    Parameters
    ----------
    values : array_like, any shape
        Finite intensities, nominally in [0, 1].
    bits : {8, 16}

    Returns
    -------
    ndarray, same shape, uint8 (``rint(x * 255)``) or uint16 (``rint(x * 65535)``)

    Raises
    ------
    ValueError
        If ``bits`` is not 8 or 16 or ``values`` holds NaN.
    """
    if bits not in (8, 16):
        raise ValueError(f"bits must be 8 or 16, got {bits!r}")
    arr = np.asarray(values, dtype=np.float64)
    if np.isnan(arr).any():
        raise ValueError("values must not hold NaN")
    top = 255.0 if bits == 8 else 65535.0
    out = np.rint(np.clip(arr, 0.0, 1.0) * top)
    return out.astype(np.uint8 if bits == 8 else np.uint16)


def psnr(reference, estimate) -> float:
    """Return the peak signal-to-noise ratio in dB with peak 1.0: ``10 log10(1 / MSE)``.

    Parameters
    ----------
    reference, estimate : array_like, same shape
        Intensities in [0, 1]. The MSE is the mean over every value, computed in float64.

    Returns
    -------
    float
        ``inf`` when the MSE is 0.

    Raises
    ------
    ValueError
        If the shapes differ or the arrays are empty.
    """
    ref = np.asarray(reference, dtype=np.float64)
    est = np.asarray(estimate, dtype=np.float64)
    if ref.shape != est.shape:
        raise ValueError(f"reference and estimate must have the same shape, got {ref.shape} "
                         f"and {est.shape}")
    if ref.size == 0:
        raise ValueError("reference and estimate must not be empty")
    mse = float(np.mean((ref - est) ** 2))
    return math.inf if mse == 0.0 else 10.0 * math.log10(1.0 / mse)


def relative_error(reference, estimate) -> float:
    """Return ``||reference - estimate|| / ||reference||`` (Frobenius norms, float64).

    Returns 0.0 when both norms are 0 and ``inf`` when only the reference is all zero.

    Raises
    ------
    ValueError
        If the shapes differ.
    """
    ref = np.asarray(reference, dtype=np.float64)
    est = np.asarray(estimate, dtype=np.float64)
    if ref.shape != est.shape:
        raise ValueError(f"reference and estimate must have the same shape, got {ref.shape} "
                         f"and {est.shape}")
    num = float(np.linalg.norm((ref - est).ravel()))
    den = float(np.linalg.norm(ref.ravel()))
    if den == 0.0:
        return 0.0 if num == 0.0 else math.inf
    return num / den


def compression_numbers(n_values: int, n_images: int, rank: int) -> tuple[int, int]:
    """Return (numbers stored by a rank-k model, numbers in the data matrix).

    Parameters
    ----------
    n_values : int
        ``n``, values per image (pixels x channels).
    n_images : int
        ``m``, number of images.
    rank : int
        ``k``.

    Returns
    -------
    stored, full : int
        ``k (n + m + 1) + n`` and ``n m``.
    """
    n = check_int("n_values", n_values, minimum=1)
    m = check_int("n_images", n_images, minimum=1)
    k = check_int("rank", rank, minimum=0)
    return k * (n + m + 1) + n, n * m


def source_file_bytes(paths: Iterable[str]) -> tuple[int, tuple[str, ...], int]:
    """Return the total size of the distinct source files, the missing ones, and the count.

    Parameters
    ----------
    paths : iterable of str
        Source files (a multi-page file appears once per page; it is counted once).

    Returns
    -------
    total : int
        Sum of :func:`os.path.getsize` over the distinct files that exist.
    missing : tuple of str
        Files that could not be measured.
    distinct : int
        Number of distinct files.
    """
    seen: dict[str, None] = {}
    for p in paths:
        seen.setdefault(os.path.normcase(os.path.abspath(str(p))), None)
    total, missing = 0, []
    for p in seen:
        try:
            total += os.path.getsize(p)
        except OSError:
            missing.append(p)
    return total, tuple(missing), len(seen)


# ----------------------------------------------------------------------------------------------
# images
# ----------------------------------------------------------------------------------------------
def _check_decomposition(decomposition) -> Decomposition:
    if not isinstance(decomposition, Decomposition):
        raise TypeError(f"decomposition must be a Decomposition, got "
                        f"{type(decomposition).__name__}")
    return decomposition


def _source_size(decomposition: Decomposition) -> tuple[int, int]:
    size = decomposition.metadata.get("source_size")
    if (not isinstance(size, (list, tuple)) or len(size) != 2
            or not all(isinstance(v, numbers.Integral) and not isinstance(v, bool) and v > 0
                       for v in size)):
        raise ValueError(f"upsample needs decomposition.metadata['source_size'] = [rows, cols] "
                         f"(two positive integers), found {size!r}")
    return int(size[0]), int(size[1])


def upsample_image(image, size: tuple[int, int]) -> np.ndarray:
    """Resize an image to ``size`` with Pillow's bicubic filter, channel by channel, in float.

    Parameters
    ----------
    image : ndarray, shape (rows, cols, channels)
        Float values (not clipped).
    size : (rows, cols)
        Target size.

    Returns
    -------
    ndarray, shape (size[0], size[1], channels), float32
        Not clipped (bicubic can overshoot slightly).
    """
    arr = np.asarray(image, dtype=np.float32)
    if arr.ndim != 3:
        raise ValueError(f"image must have shape (rows, cols, channels), got {arr.shape}")
    rows, cols = int(size[0]), int(size[1])
    if (rows, cols) == arr.shape[:2]:
        return arr.copy()
    out = np.empty((rows, cols, arr.shape[2]), dtype=np.float32)
    for c in range(arr.shape[2]):
        im = Image.fromarray(np.ascontiguousarray(arr[:, :, c]), mode="F")
        out[:, :, c] = np.asarray(im.resize((cols, rows), Image.Resampling.BICUBIC))
    return out


def preview_image(decomposition: Decomposition, index: int, rank: int, *,
                  upsample: bool = False, clip: bool = True) -> np.ndarray:
    """Return the rank-k reconstruction of one image as an image array.

    Parameters
    ----------
    decomposition : Decomposition
    index : int
        Image column, 0 <= index < n_images.
    rank : int
        Modes used, 0..k.
    upsample : bool
        Resize to ``metadata["source_size"]`` (bicubic, before clipping).
    clip : bool
        Clip to [0, 1] (default True).

    Returns
    -------
    ndarray, shape (rows, cols, channels), float32

    Raises
    ------
    ValueError
        If ``index`` or ``rank`` is out of range, or ``upsample`` is asked without a recorded
        source size.
    """
    d = _check_decomposition(decomposition)
    img = d.to_image(d.reconstruct(index, rank)).astype(np.float32, copy=False)
    if upsample:
        img = upsample_image(img, _source_size(d))
    if clip:
        img = np.clip(img, 0.0, 1.0)
    return img


def encode_tiff16(array) -> bytes:
    """Encode a 16-bit gray or RGB image as an uncompressed baseline TIFF (little-endian).

    Parameters
    ----------
    array : ndarray, shape (rows, cols), (rows, cols, 1) or (rows, cols, 3), uint16

    Returns
    -------
    bytes
        One image, one strip, contiguous samples, SampleFormat unsigned integer.

    Raises
    ------
    TypeError
        If the array is not uint16.
    ValueError
        If the shape is not one of the above or the image exceeds 4 GiB.
    """
    arr = np.asarray(array)
    if arr.dtype != np.uint16:
        raise TypeError(f"array must be uint16, got {arr.dtype}")
    if arr.ndim == 2:
        arr = arr[:, :, None]
    if arr.ndim != 3 or arr.shape[2] not in (1, 3) or arr.shape[0] < 1 or arr.shape[1] < 1:
        raise ValueError(f"array must have shape (rows, cols[, 1 or 3]), got {np.shape(array)}")
    rows, cols, ch = arr.shape
    data = np.ascontiguousarray(arr, dtype="<u2").tobytes()
    if len(data) > 0xFFFFFFFF - 4096:
        raise ValueError(f"image of {len(data)} bytes is too large for a baseline TIFF")
    SHORT, LONG, RATIONAL = 3, 4, 5
    n_entries = 14
    ifd_offset = 8
    extra_offset = ifd_offset + 2 + 12 * n_entries + 4
    extra = bytearray()

    def put_extra(payload: bytes) -> int:
        nonlocal extra
        off = extra_offset + len(extra)
        extra += payload
        if len(extra) % 2:
            extra += b"\0"
        return off

    bits_off = put_extra(struct.pack("<3H", 16, 16, 16)) if ch == 3 else None
    fmt_off = put_extra(struct.pack("<3H", 1, 1, 1)) if ch == 3 else None
    xres_off = put_extra(struct.pack("<2I", 1, 1))
    yres_off = put_extra(struct.pack("<2I", 1, 1))
    data_offset = extra_offset + len(extra)

    def short_entry(tag, value):
        return struct.pack("<HHIH2x", tag, SHORT, 1, value)

    def long_entry(tag, value):
        return struct.pack("<HHII", tag, LONG, 1, value)

    def offset_entry(tag, typ, count, offset):
        return struct.pack("<HHII", tag, typ, count, offset)

    entries = [
        long_entry(256, cols),                                     # ImageWidth
        long_entry(257, rows),                                     # ImageLength
        offset_entry(258, SHORT, 3, bits_off) if ch == 3 else short_entry(258, 16),
        short_entry(259, 1),                                       # Compression: none
        short_entry(262, 2 if ch == 3 else 1),                     # RGB / BlackIsZero
        long_entry(273, data_offset),                              # StripOffsets
        short_entry(277, ch),                                      # SamplesPerPixel
        long_entry(278, rows),                                     # RowsPerStrip
        long_entry(279, len(data)),                                # StripByteCounts
        offset_entry(282, RATIONAL, 1, xres_off),                  # XResolution
        offset_entry(283, RATIONAL, 1, yres_off),                  # YResolution
        short_entry(284, 1),                                       # PlanarConfiguration
        short_entry(296, 1),                                       # ResolutionUnit: none
        offset_entry(339, SHORT, 3, fmt_off) if ch == 3 else short_entry(339, 1),
    ]
    assert len(entries) == n_entries
    header = b"II" + struct.pack("<HI", 42, ifd_offset)
    ifd = struct.pack("<H", n_entries) + b"".join(entries) + struct.pack("<I", 0)
    return header + ifd + bytes(extra) + data


def encode_image(image, image_format: str, quality: int = 90) -> bytes:
    """Encode a float image in [0, 1] (clipped) in one of :data:`FORMATS`.

    Parameters
    ----------
    image : ndarray, shape (rows, cols, 1) or (rows, cols, 3), float
    image_format : {"png", "jpg", "webp", "tiff"}
        png/jpg/webp are 8-bit; tiff is 16-bit uncompressed.
    quality : int
        1..100, for jpg and webp.

    Returns
    -------
    bytes
    """
    fmt = check_choice("image_format", image_format, FORMATS)
    quality = check_int("quality", quality, minimum=1, maximum=100)
    arr = np.asarray(image)
    if arr.ndim != 3 or arr.shape[2] not in (1, 3):
        raise ValueError(f"image must have shape (rows, cols, 1 or 3), got {arr.shape}")
    if fmt == "tiff":
        return encode_tiff16(quantize(arr, 16))
    q = quantize(arr, 8)
    pil = Image.fromarray(q[:, :, 0] if q.shape[2] == 1 else q)
    if fmt == "webp" and pil.mode == "L":
        pil = pil.convert("RGB")
    buf = io.BytesIO()
    options = {"quality": quality} if fmt in ("jpg", "webp") else {}
    pil.save(buf, format=_PIL_FORMAT[fmt], **options)
    return buf.getvalue()


def _png_bytes(array_uint8: np.ndarray) -> bytes:
    buf = io.BytesIO()
    arr = array_uint8[:, :, 0] if array_uint8.ndim == 3 and array_uint8.shape[2] == 1 \
        else array_uint8
    Image.fromarray(np.ascontiguousarray(arr)).save(buf, format="PNG")
    return buf.getvalue()


def basis_image_rgb(decomposition: Decomposition, index: int) -> tuple[np.ndarray, float]:
    """Return basis image ``index`` (0-based) as sRGB colours, and the limit used.

    Gray: the diverging map with limit = max |value| of this basis image. RGB: each channel
    shown as ``0.5 + value / (2 * limit)``, limit = max |value| over its three channels, then
    quantised ``rint(x * 255)`` (mid-gray 128 is zero). A basis image of zeros gives limit 0 and
    the middle colour everywhere.

    Returns
    -------
    rgb : ndarray, shape (rows, cols, 3), uint8
    limit : float
    """
    d = _check_decomposition(decomposition)
    j = check_int("index", index, minimum=0, maximum=d.rank - 1)
    img = d.to_image(d.basis[:, j]).astype(np.float64)
    limit = float(np.max(np.abs(img))) if img.size else 0.0
    if img.shape[2] == 1:
        return signed_to_rgb(img[:, :, 0], limit), limit
    if limit == 0.0:
        return np.full(img.shape, 128, dtype=np.uint8), 0.0
    return quantize(0.5 + img / (2.0 * limit), 8), limit


def mean_image(decomposition: Decomposition) -> np.ndarray:
    """Return the mean image, clipped and quantised to 8 bits, shape (rows, cols, channels)."""
    d = _check_decomposition(decomposition)
    return quantize(d.to_image(d.mean), 8)


def share_caption(number: int, share: float) -> str:
    """Return the caption of a contact-sheet tile, e.g. ``"#3  12.4%"``.

    Shares of 1 % and more get one decimal, smaller ones two significant digits.
    """
    pct = 100.0 * float(share)
    text = f"{pct:.1f}%" if pct >= 1.0 or pct == 0.0 else f"{pct:.2g}%"
    return f"#{int(number)}  {text}"


@dataclass(frozen=True)
class ContactSheet:
    """A contact sheet of basis images.

    Attributes
    ----------
    image : PIL.Image.Image
        RGB image.
    tiles : tuple of (top, left, bottom, right)
        Pixel box of each tile (bottom/right exclusive).
    captions : tuple of str
        Text written under each tile.
    scale : float
        Tile size / analysis size (integer when enlarged by pixel repetition).
    """

    image: Image.Image
    tiles: tuple
    captions: tuple
    scale: float


def _default_font():
    try:
        return ImageFont.load_default(size=12)
    except TypeError:  # pragma: no cover - Pillow < 10.1
        return ImageFont.load_default()


def contact_sheet(decomposition: Decomposition, count: int = 16, *,
                  columns: int | None = None) -> ContactSheet:
    """Draw the first ``count`` basis images as tiles with their number and energy share.

    Tiles use :func:`basis_image_rgb`. A small image is enlarged by repeating pixels (integer
    factor) until its longer side is at least 96; a large one is reduced with a box filter so its
    longer side is at most 256.

    Parameters
    ----------
    decomposition : Decomposition
        With at least one basis image.
    count : int
        Number of tiles, at least 1; at most ``decomposition.rank`` are drawn.
    columns : int, optional
        Tiles per row (default ``ceil(sqrt(count))``).

    Returns
    -------
    ContactSheet
    """
    d = _check_decomposition(decomposition)
    if d.rank == 0:
        raise ValueError("decomposition has no basis images to draw")
    count = min(check_int("count", count, minimum=1), d.rank)
    cols_n = math.ceil(math.sqrt(count)) if columns is None else check_int(
        "columns", columns, minimum=1)
    cols_n = min(cols_n, count)
    rows_n = math.ceil(count / cols_n)
    h, w = d.image_shape[:2]
    longest = max(h, w)
    if longest < _TILE_MIN:
        scale: float = float(math.ceil(_TILE_MIN / longest))
        th, tw = int(h * scale), int(w * scale)
    elif longest > _TILE_MAX:
        scale = _TILE_MAX / longest
        th, tw = max(1, round(h * scale)), max(1, round(w * scale))
    else:
        scale, th, tw = 1.0, h, w
    font = _default_font()
    probe = ImageDraw.Draw(Image.new("RGB", (1, 1)))
    shares = d.energy_shares()
    captions = tuple(share_caption(j + 1, shares[j]) for j in range(count))
    boxes = [probe.textbbox((0, 0), c, font=font) for c in captions]
    text_h = max(b[3] for b in boxes)
    text_w = max(b[2] for b in boxes)
    pad = 6
    cell_w = max(tw, text_w) + 2 * pad
    cell_h = th + text_h + 3 * pad
    sheet = Image.new("RGB", (cols_n * cell_w, rows_n * cell_h), (224, 224, 224))
    draw = ImageDraw.Draw(sheet)
    tiles = []
    for j in range(count):
        rgb, _ = basis_image_rgb(d, j)
        tile = Image.fromarray(rgb)
        if scale > 1:
            tile = tile.resize((tw, th), Image.Resampling.NEAREST)
        elif scale < 1:
            tile = tile.resize((tw, th), Image.Resampling.BOX)
        r, c = divmod(j, cols_n)
        left = c * cell_w + (cell_w - tw) // 2
        top = r * cell_h + pad
        sheet.paste(tile, (left, top))
        tiles.append((top, left, top + th, left + tw))
        tx = c * cell_w + (cell_w - boxes[j][2]) // 2
        draw.text((tx, top + th + pad), captions[j], fill=(20, 20, 20), font=font)
    return ContactSheet(sheet, tuple(tiles), captions, scale)


# ----------------------------------------------------------------------------------------------
# names and selection
# ----------------------------------------------------------------------------------------------
def _base_names(decomposition: Decomposition) -> list[str]:
    d = decomposition
    m = d.n_images
    if not d.paths:
        width = len(str(max(m - 1, 0)))
        return [f"image_{i:0{width}d}" for i in range(m)]
    counts = Counter(d.paths)
    bases = []
    for i, p in enumerate(d.paths):
        stem = PurePath(str(p)).stem or f"image_{i}"
        page = int(d.pages[i])
        if counts[p] > 1 or page != 0:
            stem = f"{stem}_p{page}"
        bases.append(stem)
    # collision rule: every name shared (case-insensitively) by several images gets _i<index>
    suffixed = [False] * m
    for _ in range(m + 1):
        folded = Counter(b.casefold() for b in bases)
        clash = [i for i in range(m) if folded[bases[i].casefold()] > 1 and not suffixed[i]]
        if not clash:
            break
        for i in clash:
            bases[i] = f"{bases[i]}_i{i}"
            suffixed[i] = True
    return bases


def preview_names(decomposition: Decomposition, indices: Sequence[int], rank: int,
                  image_format: str = "png") -> list[str]:
    """Return the preview file names of the given images (see the module docstring).

    Parameters
    ----------
    decomposition : Decomposition
    indices : sequence of int
        Image columns.
    rank : int
        k, written as ``_r<k>``.
    image_format : {"png", "jpg", "webp", "tiff"}

    Returns
    -------
    list of str
        Bare file names, unique case-insensitively.
    """
    d = _check_decomposition(decomposition)
    ext = FORMATS[check_choice("image_format", image_format, FORMATS)]
    k = check_int("rank", rank, minimum=0)
    bases = _base_names(d)
    return [f"{bases[int(i)]}_r{k}{ext}" for i in indices]


def select_images(decomposition: Decomposition, images="all", *, rank: int | None = None,
                  level: float = 0.99) -> np.ndarray:
    """Return the image columns chosen by ``images``.

    Parameters
    ----------
    decomposition : Decomposition
    images : "all", "flagged", sequence of int, or bool array of shape (n_images,)
        "flagged" takes the images flagged by
        :func:`modescope.core.review.outliers.score_table` at ``rank`` and ``level``. Integer indices
        are 0-based columns; duplicates are dropped, order kept.
    rank : int, optional
        Rank for "flagged" (default: the model's rank).
    level : float
        Confidence level for "flagged", in (0, 1).

    Returns
    -------
    ndarray of int64
    """
    d = _check_decomposition(decomposition)
    m = d.n_images
    if isinstance(images, str):
        check_choice("images", images, ("all", "flagged"))
        if images == "all":
            return np.arange(m, dtype=np.int64)
        from modescope.core.review.outliers import score_table
        table = score_table(d, rank, level)
        return np.flatnonzero(np.asarray(table.flag, dtype=bool)).astype(np.int64)
    arr = np.asarray(images)
    if arr.dtype == np.bool_:
        if arr.shape != (m,):
            raise ValueError(f"images as a mask must have shape ({m},), got {arr.shape}")
        return np.flatnonzero(arr).astype(np.int64)
    if arr.ndim != 1 or (arr.size and not np.issubdtype(arr.dtype, np.integer)):
        raise TypeError(f"images must be 'all', 'flagged', a sequence of integer indices or a "
                        f"boolean mask; got {type(images).__name__} of dtype {arr.dtype}")
    arr = arr.astype(np.int64)
    bad = arr[(arr < 0) | (arr >= m)]
    if bad.size:
        raise ValueError(f"images must be indices 0..{m - 1}, got {bad[:5].tolist()}")
    _, first = np.unique(arr, return_index=True)
    return arr[np.sort(first)]


# ----------------------------------------------------------------------------------------------
# plan and report
# ----------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Item:
    kind: str          # one of WHAT_CHOICES, plus "mean"
    path: Path
    index: int = -1    # image column (previews) or basis number (0-based)


@dataclass(frozen=True)
class ExportPlan:
    """Everything an export will write, decided before any file is touched.

    Attributes
    ----------
    decomposition : Decomposition
    folder : pathlib.Path
    rank : int
    what : tuple of str
        Parts chosen, in :data:`WHAT_CHOICES` order.
    image_format : str
    quality : int
    indices : ndarray of int
        Chosen image columns.
    upsample : bool
    float16 : bool
    sheet_count : int
    overwrite : bool
    loader : callable
        ``loader(decomposition, index) -> (rows, cols, channels) float`` for the quality table.
    items : tuple
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


def _check_bool(name: str, value) -> bool:
    if not isinstance(value, (bool, np.bool_)):
        raise TypeError(f"{name} must be True or False, got {type(value).__name__} {value!r}")
    return bool(value)


def _parse_what(what) -> tuple[str, ...]:
    if isinstance(what, str):
        parts = [p.strip() for p in what.split(",") if p.strip()]
    else:
        try:
            parts = list(what)
        except TypeError:
            raise TypeError(f"what must be a comma-separated string or a sequence of names, got "
                            f"{type(what).__name__}") from None
    if not parts:
        raise ValueError(f"what must name at least one of {', '.join(WHAT_CHOICES)}")
    for p in parts:
        check_choice("what", p, WHAT_CHOICES)
    return tuple(w for w in WHAT_CHOICES if w in parts)


def _source_folders(decomposition: Decomposition) -> set[str]:
    return {os.path.normcase(os.path.realpath(os.path.dirname(os.path.abspath(str(p)))))
            for p in decomposition.paths}


def _default_loader(decomposition, index):
    from modescope.core.engine.pipeline import load_analysis_image
    return load_analysis_image(decomposition, index)


def plan_export(decomposition: Decomposition, folder, *, rank: int,
                what=WHAT_CHOICES, image_format: str = "png", quality: int = 90,
                images="all", level: float = 0.99, upsample: bool = False,
                float16: bool = False, sheet_count: int = 16, overwrite: bool = False,
                allow_source_folder: bool = False,
                loader: Callable | None = None) -> ExportPlan:
    """Decide every file of an export and check the destination, without writing anything.

    Parameters
    ----------
    decomposition : Decomposition
    folder : str or os.PathLike
        Existing destination folder.
    rank : int
        k, 1..decomposition.rank.
    what : str or sequence of str
        Parts from :data:`WHAT_CHOICES` (a comma-separated string is accepted).
    image_format : {"png", "jpg", "webp", "tiff"}
        Preview format.
    quality : int
        1..100, JPEG and WebP quality.
    images : "all", "flagged", sequence of int or bool mask
        Images for previews, the weights table and the quality table (see
        :func:`select_images`).
    level : float
        Confidence level of "flagged".
    upsample : bool
        Write previews at the source size recorded in ``metadata["source_size"]``.
    float16 : bool
        Store mean, basis and weights of the compact model as float16.
    sheet_count : int
        Tiles on the contact sheet (at most k).
    overwrite : bool
        Allow replacing existing files.
    allow_source_folder : bool
        Allow writing into a folder that holds source images.
    loader : callable, optional
        ``loader(decomposition, index)`` returning the source image at analysis resolution,
        shape ``image_shape``; default :func:`modescope.core.engine.pipeline.load_analysis_image`.

    Returns
    -------
    ExportPlan

    Raises
    ------
    TypeError, ValueError
        For wrong arguments (message names the parameter).
    DestinationError
        If the folder is missing, not writable, holds source images (without
        ``allow_source_folder``) or already holds a planned file (without ``overwrite``).
    """
    d = _check_decomposition(decomposition)
    if d.rank < 1:
        raise ValueError("decomposition has no basis images; nothing to export")
    k = check_int("rank", rank, minimum=1, maximum=d.rank)
    parts = _parse_what(what)
    fmt = check_choice("image_format", image_format, FORMATS)
    quality = check_int("quality", quality, minimum=1, maximum=100)
    level = check_float("level", level, low=0.0, high=1.0, low_open=True, high_open=True)
    upsample = _check_bool("upsample", upsample)
    float16 = _check_bool("float16", float16)
    overwrite = _check_bool("overwrite", overwrite)
    allow_source_folder = _check_bool("allow_source_folder", allow_source_folder)
    sheet_count = check_int("sheet_count", sheet_count, minimum=1)
    if loader is None:
        loader = _default_loader
    elif not callable(loader):
        raise TypeError(f"loader must be callable, got {type(loader).__name__}")
    if not isinstance(folder, (str, os.PathLike)):
        raise TypeError(f"folder must be a str or os.PathLike path, got {type(folder).__name__}")
    folder = Path(folder)
    notes: list[str] = []
    per_image = {"previews", "weights", "quality"} & set(parts)
    indices = (select_images(d, images, rank=k, level=level) if per_image
               else np.arange(0, dtype=np.int64))
    if per_image and indices.size == 0:
        notes.append("no image was chosen (for example none is flagged): no previews, and "
                     "tables with a header only")
    if "previews" in parts:
        if upsample:
            size = _source_size(d)
            notes.append(f"previews written at the source size {size[0]}x{size[1]} (bicubic "
                         f"upsampling of the {d.image_shape[0]}x{d.image_shape[1]} "
                         f"reconstruction, then clipped to [0, 1])")
        else:
            notes.append(f"previews written at the analysis resolution "
                         f"{d.image_shape[0]}x{d.image_shape[1]}"
                         + (" (the analysis was downscaled; use upsample for the source size)"
                            if int(d.metadata.get("downscale", 1)) > 1 else ""))
        if fmt == "webp" and d.image_shape[2] == 1:
            notes.append("WebP holds no single-channel images: gray previews are stored with "
                         "three equal channels")
    if float16 and "model" in parts:
        big = float(np.max(np.abs(d.weights[:k]))) if d.weights.size else 0.0
        if big > 65504.0:
            raise ValueError(f"float16 cannot hold weights up to {big:.4g} (largest float16 "
                             f"is 65504); export the model without float16")

    # ---- destination checks (before anything is written) -------------------------------
    if not folder.is_dir():
        raise DestinationError(f"the destination folder {folder} does not exist or is not a "
                               f"folder", path=folder)
    here = os.path.normcase(os.path.realpath(folder))
    if d.paths and here in _source_folders(d) and not allow_source_folder:
        raise DestinationError(
            f"the destination folder {folder} holds source images of this analysis; choose "
            f"another folder or allow writing there explicitly (allow_source_folder=True)",
            path=folder)

    items: list[_Item] = []
    for part in parts:
        if part == "spectrum":
            items.append(_Item("spectrum", folder / "spectrum.csv"))
        elif part == "weights":
            items.append(_Item("weights", folder / f"weights_r{k}.csv"))
        elif part == "model":
            items.append(_Item("model", folder / (f"model_r{k}_f16.npz" if float16
                                                  else f"model_r{k}.npz")))
        elif part == "basis":
            items.append(_Item("mean", folder / "mean.png"))
            width = max(3, len(str(k)))
            items.extend(_Item("basis", folder / f"basis_{j + 1:0{width}d}.png", j)
                         for j in range(k))
        elif part == "sheet":
            items.append(_Item("sheet", folder / "basis_sheet.png"))
        elif part == "previews":
            names = preview_names(d, indices, k, fmt)
            items.extend(_Item("previews", folder / name, int(i))
                         for name, i in zip(names, indices))
        elif part == "quality":
            items.append(_Item("quality", folder / f"quality_r{k}.csv"))
    folded = Counter(item.path.name.casefold() for item in items)
    dup = [n for n, c in folded.items() if c > 1]
    if dup:  # pragma: no cover - the naming rules make this impossible
        raise ValueError(f"export would write two files named {dup[0]!r}")
    plan = ExportPlan(d, folder, k, parts, fmt, quality, indices, upsample, float16,
                      min(sheet_count, k), overwrite, loader, tuple(items), tuple(notes))
    _check_targets(plan)
    check_folder_writable(folder)
    return plan


def _check_targets(plan: ExportPlan) -> None:
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


# ----------------------------------------------------------------------------------------------
# writers
# ----------------------------------------------------------------------------------------------
class _Cancelled(Exception):
    pass


def _csv_bytes(header: Sequence[str], rows: Iterable[Sequence]) -> bytes:
    buf = io.StringIO(newline="")
    writer = csv.writer(buf)
    writer.writerow(header)
    for row in rows:
        writer.writerow(row)
    return buf.getvalue().encode("utf-8")


def _fmt(value: float) -> str:
    value = float(value)
    if math.isinf(value):
        return "inf" if value > 0 else "-inf"
    return repr(value)


def _spectrum_bytes(d: Decomposition) -> bytes:
    shares, cum = d.energy_shares(), d.cumulative_energy()
    rows = ((j + 1, _fmt(d.singular_values[j]), _fmt(shares[j]), _fmt(cum[j]))
            for j in range(d.rank))
    return _csv_bytes(("index", "singular_value", "energy_share", "cumulative_share"), rows)


def _path_of(d: Decomposition, i: int) -> str:
    return str(d.paths[i]) if d.paths else ""


def _weights_bytes(d: Decomposition, k: int, indices) -> bytes:
    header = ["path", "page"] + [f"w{j + 1}" for j in range(k)]
    rows = ([_path_of(d, i), int(d.pages[i])] + [_fmt(v) for v in d.weights[:k, i]]
            for i in indices)
    return _csv_bytes(header, rows)


def _quality_bytes(plan: ExportPlan, cancel, missing: list[str]) -> bytes:
    d, k = plan.decomposition, plan.rank
    rows = []
    for i in plan.indices:
        if cancel is not None and cancel():
            raise _Cancelled
        i = int(i)
        path = _path_of(d, i)
        try:
            src = np.asarray(plan.loader(d, i))
        except (ModescopeError, OSError) as exc:
            rows.append([path, int(d.pages[i]), "", "", f"source not read: {exc}"])
            missing.append(path)
            continue
        if src.shape != tuple(d.image_shape):
            rows.append([path, int(d.pages[i]), "", "",
                         f"source has shape {src.shape}, the model {tuple(d.image_shape)}"])
            continue
        est = preview_image(d, i, k)
        rows.append([path, int(d.pages[i]), _fmt(relative_error(src, est)),
                     _fmt(psnr(src, est)), ""])
    return _csv_bytes(("path", "page", "relative_error", "psnr_db", "note"), rows)


def _write_model(plan: ExportPlan, path: Path) -> int:
    from modescope.core.errors import ModelFileError
    from modescope.core.output.model_file import save_model
    model = plan.decomposition.truncated(plan.rank)
    try:
        written = save_model(path, model, overwrite=plan.overwrite,
                             dtype=np.float16 if plan.float16 else None)
    except ModelFileError as exc:
        raise DestinationError(f"cannot write the model file {path}: {exc}",
                               path=path) from exc
    return os.path.getsize(written)


def run_export(plan: ExportPlan, *, progress: Callable[[int, int], None] | None = None,
               cancel: Callable[[], bool] | None = None) -> ExportReport:
    """Write the files of a plan.

    Parameters
    ----------
    plan : ExportPlan
        From :func:`plan_export`.
    progress : callable, optional
        ``progress(done, total)`` with file counts: once with 0 before the first file and after
        each file.
    cancel : callable, optional
        Returns True to stop; checked before each file (and between images while computing the
        quality table). Completed files are kept.

    Returns
    -------
    ExportReport

    Raises
    ------
    DestinationError
        If a planned file now exists (without overwrite), or a file cannot be written (disk
        full, read-only); ``error.written`` lists the files completed before. No partial or
        temporary file is left.
    """
    if not isinstance(plan, ExportPlan):
        raise TypeError(f"plan must be an ExportPlan, got {type(plan).__name__}")
    for name, fn in (("progress", progress), ("cancel", cancel)):
        if fn is not None and not callable(fn):
            raise TypeError(f"{name} must be callable or None, got {type(fn).__name__}")
    _check_targets(plan)
    d, k = plan.decomposition, plan.rank
    total = len(plan.items)
    written: list[Path] = []
    missing: list[str] = []
    notes = list(plan.notes)
    limits: list[float] = []
    model_bytes = None
    quality_missing = 0
    cancelled = False
    if progress is not None:
        progress(0, total)
    for item in plan.items:
        if cancel is not None and cancel():
            cancelled = True
            break
        try:
            if item.kind == "model":
                model_bytes = _write_model(plan, item.path)
            else:
                if item.kind == "spectrum":
                    data = _spectrum_bytes(d)
                elif item.kind == "weights":
                    data = _weights_bytes(d, k, plan.indices)
                elif item.kind == "quality":
                    before = len(missing)
                    data = _quality_bytes(plan, cancel, missing)
                    quality_missing = len(missing) - before
                elif item.kind == "mean":
                    data = _png_bytes(mean_image(d))
                elif item.kind == "basis":
                    rgb, limit = basis_image_rgb(d, item.index)
                    limits.append(limit)
                    data = _png_bytes(rgb)
                elif item.kind == "sheet":
                    data = _png_bytes(np.asarray(contact_sheet(d, plan.sheet_count).image))
                else:  # previews
                    img = preview_image(d, item.index, k, upsample=plan.upsample)
                    data = encode_image(img, plan.image_format, plan.quality)
                atomic_write_bytes(item.path, data, overwrite=plan.overwrite)
        except _Cancelled:
            cancelled = True
            break
        except DestinationError as exc:
            raise DestinationError(
                f"{exc}; {len(written)} of {total} files were written before this failure "
                f"and are complete", path=exc.path, written=written) from exc
        written.append(item.path)
        if progress is not None:
            progress(len(written), total)

    if limits:
        mapping = ("RGB basis images are shown per channel as 0.5 + value/(2*limit), "
                   "mid-gray = 0" if d.image_shape[2] == 3 else
                   "gray basis images use the diverging map; for basis 1: "
                   + describe_mapping(limits[0]))
        notes.append(f"basis images: limit = largest absolute value of each basis image "
                     f"(basis 1: {limits[0]:.4g}); {mapping}")
    source_bytes = None
    if model_bytes is not None:
        total_src, gone, distinct = source_file_bytes(d.paths)
        source_bytes = total_src if len(gone) < distinct else None
        missing.extend(g for g in gone if g not in missing)
        if gone:
            notes.append(f"{len(gone)} of {distinct} source files are missing; the source "
                         f"byte count covers the other {distinct - len(gone)}")
    if quality_missing:
        notes.append(f"quality table: {quality_missing} source(s) could not be read; their "
                     f"rows say why in the note column")
    stored, full = compression_numbers(d.n_pixels, d.n_images, k)
    if cancelled:
        notes.append(f"cancelled: {len(written)} of {total} files written; they are complete")
    return ExportReport(
        folder=plan.folder, written=tuple(written), skipped=plan.files[len(written):],
        cancelled=cancelled, rank=k, n_values=d.n_pixels, n_images=d.n_images,
        stored_numbers=stored, full_numbers=full, model_bytes=model_bytes,
        source_bytes=source_bytes, missing_sources=tuple(dict.fromkeys(missing)),
        basis_limits=tuple(limits), notes=tuple(notes))


def export(decomposition: Decomposition, folder, *, rank: int,
           progress: Callable[[int, int], None] | None = None,
           cancel: Callable[[], bool] | None = None, **options) -> ExportReport:
    """Plan and write an export in one call (see :func:`plan_export` for the options).

    Parameters
    ----------
    decomposition : Decomposition
    folder : str or os.PathLike
    rank : int
    progress, cancel : callable, optional
        As :func:`run_export`.
    **options
        Keyword options of :func:`plan_export` (what, image_format, quality, images, level,
        upsample, float16, sheet_count, overwrite, allow_source_folder, loader).

    Returns
    -------
    ExportReport

    Raises
    ------
    TypeError, ValueError, DestinationError
        As :func:`plan_export` and :func:`run_export`.

    Examples
    --------
    >>> report = export(d, "out", rank=5, what="previews,spectrum")   # doctest: +SKIP
    >>> report.n_written                                              # doctest: +SKIP
    """
    plan = plan_export(decomposition, folder, rank=rank, **options)
    return run_export(plan, progress=progress, cancel=cancel)
