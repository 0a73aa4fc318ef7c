"""Frequencies and pairs of the weights of a sequence (core.review.frequencies)."""

from __future__ import annotations

import csv

import numpy as np
import pytest
from scipy import signal

from modescope.core.decomposition import Decomposition, fix_signs
from modescope.core.review.frequencies import (CSV_COLUMNS, MIN_FRAMES_FOR_PAIRS,
                                               FrequencyReport, frame_rate_of, frequencies_of,
                                               mode_frequencies, weight_spectra,
                                               write_frequencies_csv)

FS = 25.0                    # frames per second of the invented sequences
N = 200                      # frames: one bin is FS / N = 0.125 Hz


def travelling_waves(freqs=(2.0, 5.3), wavenumbers=(2, 5), amplitudes=(1.0, 0.5), n=N,
                     noise=0.03, seed=0):
    """Frames (n, 24, 64) of waves cos(2 pi (k x - f t)) travelling along the columns."""
    t = np.arange(n) / FS
    x = np.arange(64) / 64.0
    field = np.zeros((n, 64))
    for f, k, a in zip(freqs, wavenumbers, amplitudes):
        field += a * np.cos(2 * np.pi * (k * x[None, :] - f * t[:, None]))
    frames = np.repeat(field[:, None, :], 24, axis=1)
    rng = np.random.default_rng(seed)
    return 0.5 + 0.2 * frames + rng.normal(0.0, noise, frames.shape)


def exact_decomposition(frames, k, metadata=None):
    """An exact Decomposition from numpy.linalg.svd (LAPACK), frames as columns."""
    n = frames.shape[0]
    x = frames.reshape(n, -1).T
    mean = x.mean(axis=1)
    c = x - mean[:, None]
    u, s, vt = np.linalg.svd(c, full_matrices=False)
    basis, weights = fix_signs(u[:, :k], s[:k, None] * vt[:k])
    return Decomposition(mean=mean.astype(np.float32), basis=basis.astype(np.float32),
                         singular_values=s[:k], weights=weights,
                         total_energy=float(np.sum(c ** 2)),
                         image_shape=(frames.shape[1], frames.shape[2], 1), exact=True,
                         metadata=dict(metadata or {}))


def test_travelling_waves_give_two_pairs_at_their_frequencies():
    # Known result of proper orthogonal decomposition of travelling waves: each wave gives a
    # pair of modes with nearly equal singular values whose weights are in quadrature.
    d = exact_decomposition(travelling_waves(), 6, {"frame_rate": FS})
    report = frequencies_of(d)
    assert report.rate_known and report.unit == "Hz" and report.frame_rate == FS
    assert report.resolution == pytest.approx(FS / N)
    assert [p.modes for p in report.pairs] == [(0, 1), (2, 3)]
    assert list(report.pair_of[:4]) == [1, 0, 3, 2]
    assert list(report.pair_of[4:]) == [-1, -1]          # noise modes pair with nothing
    for pair, f in zip(report.pairs, (2.0, 5.3)):
        assert abs(pair.frequency - f) <= report.resolution     # within one bin
        assert abs(abs(pair.phase_lag) - 90.0) < 5.0
        assert pair.coherence > 0.99
        assert pair.singular_value_ratio > 0.95
    for j, f in enumerate((2.0, 2.0, 5.3, 5.3)):
        assert abs(report.dominant[j] - f) <= report.resolution
        assert report.power_share[j] > 0.9
    assert np.all(report.power_share[4:] < 0.3)


def test_spectra_are_scipy_periodogram_of_the_detrended_weights():
    # reference: scipy.signal.periodogram with the documented settings, and a direct DFT
    rng = np.random.default_rng(5)
    w = rng.normal(size=(3, 64)) + np.linspace(0, 4, 64)[None, :]
    freqs, psd = weight_spectra(w, 8.0)
    f_ref, p_ref = signal.periodogram(w, fs=8.0, window="hann", detrend="linear",
                                      scaling="spectrum")
    np.testing.assert_allclose(freqs, f_ref)
    np.testing.assert_allclose(psd, p_ref)
    # the same by hand: linear trend removed, Hann window, |DFT|^2 / (sum window)^2, one side
    t = np.arange(64)
    trend = np.polyval(np.polyfit(t, w[0], 1), t)
    win = signal.get_window("hann", 64)
    spec = np.abs(np.fft.rfft((w[0] - trend) * win)) ** 2 / win.sum() ** 2
    spec[1:-1] *= 2
    np.testing.assert_allclose(psd[0], spec, rtol=1e-9, atol=1e-14)


def test_a_pure_tone_on_a_bin_has_its_frequency_and_nearly_all_power():
    t = np.arange(128)
    w = np.vstack([np.cos(2 * np.pi * 10 * t / 128), np.sin(2 * np.pi * 30 * t / 128)])
    r = mode_frequencies(w, np.array([2.0, 1.0]))
    assert not r.rate_known and r.unit == "cycles per frame" and r.frame_rate == 1.0
    np.testing.assert_allclose(r.dominant, [10 / 128, 30 / 128])
    # Hann window: a tone on a bin lands in that bin and its two neighbours only (the linear
    # detrend takes out a small slope of the finite tone and spreads 1e-4 of the power)
    np.testing.assert_allclose(r.power_share, [1.0, 1.0], atol=1e-3)
    assert r.pairs == ()                        # different frequencies and s ratio 0.5


def test_in_phase_modes_are_not_a_pair():
    t = np.arange(96)
    base = np.cos(2 * np.pi * 6 * t / 96)
    w = np.vstack([base, 0.9 * base + 0.01 * np.sin(2 * np.pi * 40 * t / 96)])
    r = mode_frequencies(w, np.array([1.0, 0.95]), frame_rate=12.0)
    assert r.dominant[0] == r.dominant[1] == pytest.approx(0.75)
    assert r.pairs == () and list(r.pair_of) == [-1, -1]


def test_unequal_singular_values_are_not_a_pair():
    t = np.arange(96)
    w = np.vstack([np.cos(2 * np.pi * 6 * t / 96), np.sin(2 * np.pi * 6 * t / 96)])
    assert mode_frequencies(w, np.array([1.0, 0.95])).pairs[0].modes == (0, 1)
    assert mode_frequencies(w, np.array([1.0, 0.5])).pairs == ()
    assert mode_frequencies(w, np.array([1.0, 0.5]), sv_ratio_min=0.4).pairs[0].modes == (0, 1)


def test_short_series_have_spectra_but_no_pairs():
    t = np.arange(MIN_FRAMES_FOR_PAIRS - 1)
    w = np.vstack([np.cos(2 * np.pi * t / 6), np.sin(2 * np.pi * t / 6)])
    r = mode_frequencies(w, np.array([1.0, 1.0]))
    assert r.pairs == ()
    assert f"at least {MIN_FRAMES_FOR_PAIRS} frames" in r.pairs_note
    assert abs(r.dominant[0] - 1 / 6) <= r.resolution


def test_frame_rate_given_overrides_the_stored_one_and_rank_limits_modes():
    d = exact_decomposition(travelling_waves(n=120), 5, {"frame_rate": FS})
    assert frame_rate_of(d) == FS
    assert frame_rate_of(d.replace(metadata={})) is None
    r = frequencies_of(d, rank=2, frame_rate=2 * FS)
    assert r.rank == 2 and r.frame_rate == 2 * FS
    assert abs(r.dominant[0] - 4.0) <= r.resolution        # twice the rate, twice the Hz
    r1 = frequencies_of(d.replace(metadata={}))
    assert r1.unit == "cycles per frame"
    assert abs(r1.dominant[0] - 2.0 / FS) <= r1.resolution


def test_csv_columns_and_values(tmp_path):
    d = exact_decomposition(travelling_waves(), 5, {"frame_rate": FS})
    report = frequencies_of(d)
    path = write_frequencies_csv(tmp_path / "f.csv", report)
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    assert tuple(rows[0]) == CSV_COLUMNS
    assert [r[0] for r in rows[1:]] == ["1", "2", "3", "4", "5"]
    assert [r[4] for r in rows[1:]] == ["2", "1", "4", "3", ""]
    np.testing.assert_array_equal([float(r[1]) for r in rows[1:]], d.singular_values)
    np.testing.assert_array_equal([float(r[2]) for r in rows[1:]], report.dominant)
    np.testing.assert_array_equal([float(r[3]) for r in rows[1:]], report.power_share)
    with pytest.raises(ValueError, match="exists"):
        write_frequencies_csv(path, report)
    assert list(tmp_path.iterdir()) == [path]           # nothing temporary left behind


@pytest.mark.parametrize("weights, s, kwargs, err, match", [
    ([[1.0, 2.0, 3.0, 4.0]], np.ones(1), {}, TypeError, "weights must be a numpy array"),
    (np.ones(8), np.ones(1), {}, ValueError, r"shape \(modes, frames\)"),
    (np.ones((1, 3)), np.ones(1), {}, ValueError, "at least 4 frames"),
    (np.full((1, 8), np.nan), np.ones(1), {}, ValueError, "finite"),
    (np.ones((2, 8)), np.ones(3), {}, ValueError, r"singular_values must have shape \(2,\)"),
    (np.ones((1, 8)), np.ones(1), {"frame_rate": 0.0}, ValueError, "frame_rate must be >"),
    (np.ones((1, 8)), np.ones(1), {"frame_rate": "25"}, TypeError, "frame_rate must be a"),
    (np.ones((1, 8)), np.ones(1), {"phase_tolerance": 95.0}, ValueError, "phase_tolerance"),
])
def test_bad_input_is_named(weights, s, kwargs, err, match):
    with pytest.raises(err, match=match):
        mode_frequencies(weights, s, **kwargs)


def test_bad_rank_and_report_types_are_named(tmp_path):
    d = exact_decomposition(travelling_waves(n=40), 3)
    with pytest.raises(ValueError, match="rank must be at most 3, got 4"):
        frequencies_of(d, rank=4)
    with pytest.raises(TypeError, match="decomposition must be a Decomposition"):
        frequencies_of("model.npz")
    with pytest.raises(TypeError, match="report must be a FrequencyReport"):
        write_frequencies_csv(tmp_path / "x.csv", {"mode": 1})
    assert isinstance(frequencies_of(d), FrequencyReport)
