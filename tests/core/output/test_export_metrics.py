"""Tests of modescope.core.output.metrics: quantisation, PSNR, relative error, compression counts.

Outside references: scikit-image's ``peak_signal_noise_ratio`` and numpy norms.
"""

import os

import numpy as np
import pytest
from skimage.metrics import peak_signal_noise_ratio

from modescope.core.output.metrics import (compression_numbers, psnr, quantize, relative_error,
                                           source_file_bytes)


def test_quantize_formula():
    v = np.array([-0.1, 0.0, 0.3, 0.5, 1.0, 1.7])
    np.testing.assert_array_equal(quantize(v, 8), np.rint(np.clip(v, 0, 1) * 255))
    np.testing.assert_array_equal(quantize(v, 16), np.rint(np.clip(v, 0, 1) * 65535))
    assert quantize(v, 16).dtype == np.uint16
    with pytest.raises(ValueError, match="bits"):
        quantize(v, 12)


def test_psnr_and_relative_error_match_references():
    rng = np.random.default_rng(2)
    a = rng.uniform(0, 1, (9, 11, 3))
    b = np.clip(a + 0.05 * rng.standard_normal(a.shape), 0, 1)
    # scikit-image as the outside reference, peak 1.0
    assert psnr(a, b) == pytest.approx(peak_signal_noise_ratio(a, b, data_range=1.0),
                                          rel=1e-12)
    assert psnr(a, a) == float("inf")
    assert relative_error(a, b) == pytest.approx(np.linalg.norm(a - b) / np.linalg.norm(a))


def test_compression_numbers_formula():
    # k (n + m + 1) + n numbers stored against n m (basis, weights, singular values, mean)
    assert compression_numbers(10, 5, 2) == (2 * 16 + 10, 50)
    assert compression_numbers(10, 5, 0) == (10, 50)
    with pytest.raises(ValueError, match="n_images"):
        compression_numbers(10, 0, 2)
    with pytest.raises(TypeError, match="rank"):
        compression_numbers(10, 5, 2.0)


def test_source_file_bytes_counts_each_file_once(tmp_path):
    a, b = tmp_path / "a.tif", tmp_path / "b.png"
    a.write_bytes(b"x" * 100)
    b.write_bytes(b"y" * 7)
    gone = tmp_path / "gone.png"
    total, missing, distinct = source_file_bytes([str(a), str(a), str(b), str(gone)])
    assert (total, distinct) == (107, 3)                 # the two-page file counted once
    assert missing == (os.path.normcase(os.path.abspath(gone)),)
