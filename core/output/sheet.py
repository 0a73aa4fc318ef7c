"""The contact sheet: the first basis images as tiles, each captioned with its number and
energy share."""

from __future__ import annotations

import math
from dataclasses import dataclass

from PIL import Image, ImageDraw, ImageFont

from modescope.core.decomposition import Decomposition
from modescope.core.output.images import basis_image_rgb
from modescope.core.validation import check_instance, check_int

__all__ = ["ContactSheet", "contact_sheet", "share_caption"]

#: Longest side of a contact-sheet tile is brought into this range.
_TILE_MIN, _TILE_MAX = 96, 256
#: Padding around tiles and captions, in pixels.
_PAD = 6
_BACKGROUND, _INK = (224, 224, 224), (20, 20, 20)


def share_caption(number: int, share: float) -> str:
    """Return the caption of a contact-sheet tile, e.g. ``"#3  12.4 %"``.

    Shares of 1 % and more get one decimal, smaller ones two significant digits.

    Parameters
    ----------
    number : int
        Basis image number (from 1).
    share : float
        Energy share as a fraction.

    Returns
    -------
    str
    """
    pct = 100.0 * float(share)
    text = f"{pct:.1f} %" if pct >= 1.0 or pct == 0.0 else f"{pct:.2g} %"
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


def _tile_size(rows: int, cols: int) -> tuple[float, int, int]:
    """Return (scale, tile rows, tile cols): enlarged by an integer factor or reduced."""
    longest = max(rows, cols)
    if longest < _TILE_MIN:
        scale = float(math.ceil(_TILE_MIN / longest))
        return scale, int(rows * scale), int(cols * scale)
    if longest > _TILE_MAX:
        scale = _TILE_MAX / longest
        return scale, max(1, round(rows * scale)), max(1, round(cols * scale))
    return 1.0, rows, cols


def _tile(decomposition: Decomposition, j: int, scale: float, th: int, tw: int) -> Image.Image:
    rgb, _ = basis_image_rgb(decomposition, j)
    tile = Image.fromarray(rgb)
    if scale > 1:
        return tile.resize((tw, th), Image.Resampling.NEAREST)
    if scale < 1:
        return tile.resize((tw, th), Image.Resampling.BOX)
    return tile


def contact_sheet(decomposition: Decomposition, count: int = 16, *,
                  columns: int | None = None) -> ContactSheet:
    """Draw the first ``count`` basis images as tiles with their number and energy share.

    Tiles use :func:`~modescope.core.output.images.basis_image_rgb`. A small image is enlarged
    by repeating pixels (integer factor) until its longer side is at least 96; a large one is
    reduced with a box filter so its longer side is at most 256.

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

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition or a count is not an integer.
    ValueError
        If the decomposition has no basis image or a count is below 1.
    """
    d = check_instance("decomposition", decomposition, Decomposition)
    if d.rank == 0:
        raise ValueError("decomposition has no basis images to draw")
    count = min(check_int("count", count, minimum=1), d.rank)
    cols_n = math.ceil(math.sqrt(count)) if columns is None else check_int(
        "columns", columns, minimum=1)
    cols_n = min(cols_n, count)
    rows_n = math.ceil(count / cols_n)
    scale, th, tw = _tile_size(*d.image_shape[:2])
    font = _default_font()
    probe = ImageDraw.Draw(Image.new("RGB", (1, 1)))
    shares = d.energy_shares()
    captions = tuple(share_caption(j + 1, shares[j]) for j in range(count))
    boxes = [probe.textbbox((0, 0), c, font=font) for c in captions]
    text_h = max(b[3] for b in boxes)
    text_w = max(b[2] for b in boxes)
    cell_w = max(tw, text_w) + 2 * _PAD
    cell_h = th + text_h + 3 * _PAD
    sheet = Image.new("RGB", (cols_n * cell_w, rows_n * cell_h), _BACKGROUND)
    draw = ImageDraw.Draw(sheet)
    tiles = []
    for j in range(count):
        r, c = divmod(j, cols_n)
        left = c * cell_w + (cell_w - tw) // 2
        top = r * cell_h + _PAD
        sheet.paste(_tile(d, j, scale, th, tw), (left, top))
        tiles.append((top, left, top + th, left + tw))
        tx = c * cell_w + (cell_w - boxes[j][2]) // 2
        draw.text((tx, top + th + _PAD), captions[j], fill=_INK, font=font)
    return ContactSheet(sheet, tuple(tiles), captions, scale)
