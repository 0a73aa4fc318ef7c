"""Tests of modescope.core.output.sheet: the contact sheet of basis images."""

import numpy as np
from PIL import Image

from modescope.core.output.export import export
from modescope.core.output.images import basis_image_rgb
from modescope.core.output.sheet import contact_sheet, share_caption


def test_contact_sheet_tiles_and_captions(gray):
    X, d = gray
    sheet = contact_sheet(d, count=5)
    img = np.asarray(sheet.image)
    assert len(sheet.tiles) == 5 and sheet.scale == 6.0          # 16 -> 96 (ceil(96/16))
    shares = d.singular_values ** 2 / d.total_energy
    for j, (top, left, bottom, right) in enumerate(sheet.tiles):
        rgb, _ = basis_image_rgb(d, j)
        np.testing.assert_array_equal(img[top:bottom, left:right],
                                      np.repeat(np.repeat(rgb, 6, 0), 6, 1))
        below = img[bottom + 2:bottom + 20, left:right]
        assert (below.min(axis=2) < 80).any()                    # dark caption text drawn
        pct = 100 * shares[j]
        assert sheet.captions[j] == (f"#{j + 1}  {pct:.1f} %" if pct >= 1 else
                                     f"#{j + 1}  {pct:.2g} %")
    assert share_caption(7, 0.000123) == "#7  0.012 %"


def test_sheet_file_written(tmp_path, gray):
    X, d = gray
    rep = export(d, tmp_path, rank=4, what="sheet", sheet_count=9)
    img = Image.open(rep.written[0])
    assert img.format == "PNG" and img.mode == "RGB"
    assert np.array_equal(np.asarray(img), np.asarray(contact_sheet(d, 4).image))
