"""Tests of modescope.core.output.colormap: the diverging table and the value-to-colour mappings.

Outside references: CIELAB lightness L* from scikit-image's ``skimage.color.rgb2lab`` (D65,
sRGB), the rounding of ``numpy.rint``.
"""

import numpy as np
import pytest
from skimage.color import rgb2lab

from modescope.core.output.colormap import (CENTRE_INDEX, DIVERGING_ANCHORS, DIVERGING_LUT,
                                     describe_mapping, gray_to_rgb, signed_to_index,
                                     signed_to_rgb)


def lightness(rgb_uint8):
    """L* of sRGB colours, reference: skimage.color.rgb2lab."""
    rgb = np.asarray(rgb_uint8, dtype=np.float64).reshape(1, -1, 3) / 255.0
    return rgb2lab(rgb)[0, :, 0]


def test_table_shape_type_and_read_only():
    assert DIVERGING_LUT.shape == (256, 3)
    assert DIVERGING_LUT.dtype == np.uint8
    with pytest.raises(ValueError):
        DIVERGING_LUT[0, 0] = 1


def test_anchors_are_in_the_table_at_their_positions():
    # row 128 + 127 t shows position t: the end and centre anchors sit exactly on rows 1, 128
    # and 255 (the +-0.5 anchors fall between rows 64/65 and 191/192)
    by_position = {t: rgb for t, _, rgb in DIVERGING_ANCHORS}
    for t, row in ((-1.0, 1), (0.0, 128), (1.0, 255)):
        assert DIVERGING_LUT[row].tolist() == list(by_position[t])
    lo, hi = DIVERGING_LUT[64].astype(int), DIVERGING_LUT[65].astype(int)
    mid = np.array(by_position[-0.5])
    assert np.all((np.minimum(lo, hi) <= mid) & (mid <= np.maximum(lo, hi)))


@pytest.mark.parametrize("limit", [None, 1.0, 0.003, 250.0])
def test_zero_maps_to_centre(limit):
    values = np.array([0.0, -0.0])
    if limit is None:
        values = np.array([0.0, 2.0, -1.0])
    rgb = signed_to_rgb(values, limit)
    assert rgb[0].tolist() == DIVERGING_LUT[CENTRE_INDEX].tolist()
    assert signed_to_index(values, limit)[0] == 128


def test_ends_are_symmetric_and_extreme():
    L = 0.37
    idx = signed_to_index(np.array([-L, L, -5 * L, 5 * L]), L)
    assert idx.tolist() == [1, 255, 1, 255]          # beyond the limit: clipped to the ends
    assert DIVERGING_LUT[0].tolist() == DIVERGING_LUT[1].tolist()
    rng = np.random.default_rng(3)
    v = rng.uniform(-L, L, 1000)
    # mirror rows: -v lands at 256 - row(v), because numpy.rint is an odd function
    assert np.array_equal(signed_to_index(-v, L).astype(int),
                          256 - signed_to_index(v, L).astype(int))


def test_linear_mapping_hits_each_row():
    L = 2.5
    j = np.arange(-127, 128)
    values = j / 127 * L
    assert np.array_equal(signed_to_index(values, L).astype(int), 128 + j)
    # between rows: nearest row, numpy.rint reference
    v = np.random.default_rng(0).uniform(-L, L, 500)
    expected = 128 + np.rint(127 * v / L)
    assert np.array_equal(signed_to_index(v, L), expected.astype(np.uint8))


def test_default_limit_is_max_abs_value():
    v = np.array([[0.1, -0.4], [0.2, 0.05]])
    idx = signed_to_index(v)
    assert idx[0, 1] == 1                      # -0.4 is the largest |value| -> teal end
    assert idx[1, 0] == 128 + np.rint(127 * 0.2 / 0.4)
    assert signed_to_rgb(v).shape == (2, 2, 3)


def test_limit_zero_maps_everything_to_middle():
    v = np.array([0.0, 1.0, -3.0])
    assert (signed_to_index(v, 0.0) == 128).all()
    assert (signed_to_index(np.zeros(4)) == 128).all()


def test_lightness_monotone_from_each_end_to_middle():
    L = lightness(DIVERGING_LUT)
    # from the teal end (row 1) up to the middle, and from the middle down to the brick end
    assert np.all(np.diff(L[1:CENTRE_INDEX + 1]) > 0)
    assert np.all(np.diff(L[CENTRE_INDEX:]) < 0)
    # mirror rows have nearly the same lightness (the design claim: within 1)
    mirror = np.abs(L[CENTRE_INDEX - np.arange(128)] - L[CENTRE_INDEX + np.arange(128)])
    assert mirror.max() < 1.0
    assert L[CENTRE_INDEX] > 90                 # a light off-white in the middle


def test_hues_of_the_ends():
    lab = rgb2lab(DIVERGING_LUT[[1, 128, 255]].reshape(1, 3, 3) / 255.0)[0]
    teal, mid, brick = lab
    assert teal[1] < -5 and teal[2] < 0         # green-blue: a* < 0, b* < 0
    assert brick[1] > 20 and brick[2] > 20      # red-orange: a* > 0, b* > 0
    assert abs(mid[1]) < 3 and 0 < mid[2] < 10  # near neutral, slightly warm


def test_gray_to_rgb():
    v = np.array([[-0.5, 0.0, 0.25], [0.5, 1.0, 3.0]])
    out = gray_to_rgb(v)
    expected = np.rint(np.clip(v, 0, 1) * 255).astype(np.uint8)
    assert out.shape == (2, 3, 3)
    for c in range(3):
        assert np.array_equal(out[..., c], expected)
    out2 = gray_to_rgb(v, low=-0.5, high=0.5)
    assert np.array_equal(out2[..., 0], np.rint(np.clip(v + 0.5, 0, 1) * 255).astype(np.uint8))


def test_describe_mapping_names_colours_and_limit():
    text = describe_mapping(0.0213)
    assert "-0.0213" in text and "+0.0213" in text
    for row in (1, 128, 255):
        assert str(tuple(int(c) for c in DIVERGING_LUT[row])) in text
    assert "teal" in text and "sRGB" in text
    assert "limit 0" in describe_mapping(0)


@pytest.mark.parametrize("values, limit, error, match", [
    (np.array([0.0, np.nan]), None, ValueError, "finite"),
    (np.array([1.0]), -1.0, ValueError, "limit"),
    (np.array([1.0]), float("inf"), ValueError, "limit"),
    ("abc", None, TypeError, "values"),
    (np.array([1.0]), "1", TypeError, "limit"),
    (np.array([1 + 1j]), None, TypeError, "real"),
])
def test_invalid_input(values, limit, error, match):
    with pytest.raises(error, match=match):
        signed_to_rgb(values, limit)


def test_gray_to_rgb_invalid_range():
    with pytest.raises(ValueError, match="low"):
        gray_to_rgb([0.5], low=1.0, high=0.0)
